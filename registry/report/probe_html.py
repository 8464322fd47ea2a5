"""HTML fragments for the order probe, the filters and the embedding movement sections.

Each takes exactly the dict its section stored in report.json, so a stored report redraws
without the model. Inline SVG from :mod:`svg`, no script, no style attributes (the report's
Content-Security-Policy allows only its own stylesheet), every text escaped.
"""

from __future__ import annotations

from collections.abc import Sequence
from html import escape
from typing import Any

from textsieve.registry.report import svg

FILTER_ROWS = 60  # more filters than this are listed in report.json only
VARIANT_NAMES = {"random": "random shuffle", "alternate": "alternating", "beyond_width": "beyond the widths"}


def _num(x: object, digits: int = 3) -> str:
    if isinstance(x, bool) or x is None:
        return "–"
    if isinstance(x, int):
        return f"{x:,}"
    if isinstance(x, float):
        return f"{x:.{digits}f}"
    return escape(str(x))


def _pct(x: object) -> str:
    return f"{x:.1%}" if isinstance(x, int | float) and not isinstance(x, bool) else "–"


def _table(headers: Sequence[str], rows: Sequence[Sequence[str]], numeric: Sequence[int] = ()) -> str:
    """Cells are HTML already (callers escape); headers are escaped here."""
    head = "".join(f"<th{' class=num' if i in numeric else ''}>{escape(h)}</th>" for i, h in enumerate(headers))
    body = "".join(
        "<tr>" + "".join(f"<td{' class=num' if i in numeric else ''}>{c}</td>" for i, c in enumerate(r)) + "</tr>"
        for r in rows
    )
    return f"<table><thead><tr>{head}</tr></thead><tbody>{body}</tbody></table>"


def _nan(x: object) -> float:
    return float(x) if isinstance(x, int | float) and not isinstance(x, bool) else float("nan")


def _chart_width(groups: int) -> float:
    # Room for three bars and a "6–10 (12)" label per group, and for the three-name legend.
    return max(480.0, 110.0 * groups + 90)


# -- order probe ----------------------------------------------------------------------------------
def render_order_probe(section: dict[str, Any]) -> str:
    variants = [v for v in VARIANT_NAMES if v in section]
    verdict = section.get("verdict") or {}
    rules = section.get("rules") or {}
    rows = []
    for v in variants:
        entry = section[v]
        rule = escape(str(rules.get(v, "")))
        if v == "random" and entry.get("per_seed"):
            seeds = ", ".join(f"seed {s['seed']}: {_pct(s['label_change_rate'])}" for s in entry["per_seed"])
            rule += f'<br><span class="meta">{escape(seeds)}</span>'
        rows.append(
            [
                escape(VARIANT_NAMES[v]),
                rule,
                _pct(entry.get("label_change_rate")),
                _num(entry.get("mean_abs_dp")),
                _pct(entry.get("intact_ngram_share")),
            ]
        )
    widest = max(section.get("widths") or [0])
    table = _table(["reordering", "rule", "labels changed", "mean |Δp|", f"{widest}-grams intact"], rows, (2, 3, 4))
    bands = [b for b in section.get("bands", []) if b.get("n")]
    charts = ""
    if bands:
        names = [f"{b['band']} ({b['n']})" for b in bands]
        charts = svg.bar_chart(
            names,
            [(VARIANT_NAMES[v], [_nan(b[v]["label_change_rate"]) for b in bands]) for v in variants],
            title="Share of labels changed, by text length (tokens, texts)",
            y_label="labels changed",
            y_range=(0.0, 1.0),
            width=_chart_width(len(names)),
        ) + svg.bar_chart(
            names,
            [(VARIANT_NAMES[v], [_nan(b[v]["mean_abs_dp"]) for b in bands]) for v in variants],
            title="Mean |Δp| of the predicted class, by text length (tokens, texts)",
            y_label="mean |Δp|",
            width=_chart_width(len(names)),
        )
    band_rows = [
        [escape(b["band"]), _num(b["n"])]
        + [f"{_pct(b[v]['label_change_rate'])} / {_num(b[v]['mean_abs_dp'])}" for v in variants]
        for b in section.get("bands", [])
    ]
    band_table = _table(
        ["tokens", "texts", *(f"{VARIANT_NAMES[v]}: changed / |Δp|" for v in variants)], band_rows, (1,)
    )
    finding = escape(str(verdict.get("finding", "")))
    skipped = section.get("skipped_short") or 0
    return (
        f'<p class="verdict" data-finding="{finding}"><strong>{escape(str(verdict.get("text", "")))}</strong></p>'
        f'<p class="meta">{_num(section.get("probed"))} texts reordered'
        + (f" ({_num(skipped)} of one word or none left out: they have one order only)" if skipped else "")
        + "; each text's own words, as the model sees them after truncation, rejoined with spaces. "
        "|Δp|: change in the calibrated probability of the label predicted before reordering.</p>"
        f"{table}"
        f'<div class="figures">{charts}</div>'
        f"{band_table}"
    )


# -- filters --------------------------------------------------------------------------------------
def _ngrams(top: Sequence[dict[str, Any]]) -> str:
    return "; ".join(f"<q>{escape(t['ngram'])}</q> ×{int(t['count'])}" for t in top) or "–"


def render_filters(section: dict[str, Any]) -> str:
    filters: list[dict[str, Any]] = section.get("filters", [])
    dead: list[int] = section.get("dead", [])
    total = section.get("filters_total", len(filters))
    by_width: dict[int, list[int]] = {}
    for f in filters:
        firing, silent = by_width.setdefault(int(f["width"]), [0, 0])
        by_width[int(f["width"])] = [firing + (f["fires"] > 0), silent + (f["fires"] == 0)]
    widths = sorted(by_width)
    chart = svg.bar_chart(
        [f"width {w}" for w in widths],
        [
            ("fire on some text", [float(by_width[w][0]) for w in widths]),
            ("dead (never above zero)", [float(by_width[w][1]) for w in widths]),
        ],
        title="Filters by width: firing and dead",
        y_label="filters",
        width=max(360.0, 120.0 * len(widths) + 90),
        height=240.0,
    )
    class_rows = [[svg.shown(label), _ngrams(items)] for label, items in (section.get("by_class") or {}).items()]
    alive = sorted((f for f in filters if f["fires"] > 0), key=lambda f: (-f["fires"], f["index"]))
    shown = alive[:FILTER_ROWS]
    rows = [
        [
            f"#{f['index']}",
            _num(f["width"]),
            f'{svg.shown(str(f["pushes"]))} <span class="meta">(+{_num(f["margin"])})</span>',
            _pct(f["fire_rate"]),
            _pct(f["agreement"]),
            _ngrams(f["top"]),
        ]
        for f in shown
    ]
    more = (
        f'<p class="meta">The {len(shown)} filters that fire most often of {len(alive)} firing; all {total} are in '
        "report.json.</p>"
        if len(alive) > len(shown)
        else ""
    )
    dead_line = (
        f"<p><strong>Dead filters</strong> ({len(dead)} of {total}, never above zero on this set): "
        + escape(", ".join(f"#{i}" for i in dead))
        + "</p>"
        if dead
        else f"<p>No dead filter: all {total} fire above zero on some text of this set.</p>"
    )
    return (
        '<p class="meta">Each filter with max-over-time pooling reports one n-gram per text, the window where it '
        "is strongest (Jacovi, Sar Shalom and Goldberg, 2018); counted here over the evaluation set when its "
        "pooled value is above zero. <em>Pushes</em>: the class whose output weight for the filter is largest "
        "(margin over the next); <em>agrees</em>: of the texts it fires on, the share truly of that class.</p>"
        f'<div class="figures">{chart}'
        + _table(["class", "n-grams its filters fire on most"], class_rows)
        + "</div>"
        + dead_line
        + _table(["filter", "width", "pushes", "fires on", "agrees", "most frequent n-grams"], rows, (1, 3, 4))
        + more
    )


# -- embeddings -----------------------------------------------------------------------------------
def _comparison(part: dict[str, Any]) -> str:
    head = (
        f"<h3>{escape(str(part.get('title', '')))}</h3>"
        f'<p class="meta">{_num(part.get("words"))} words compared; cosine distance mean '
        f"{_num(part.get('mean_distance'))}, median {_num(part.get('median_distance'))}; "
        f"{_num(part.get('still'))} did not move.</p>"
    )
    if part.get("note"):
        head += f'<p class="notes">{escape(str(part["note"]))}</p>'
    moved = part.get("moved") or []
    if not moved:
        return head
    rows = [
        [
            f"<strong>{escape(m['word'])}</strong>",
            _num(m["distance"]),
            escape(", ".join(m["before"])),
            escape(", ".join(m["after"])),
        ]
        for m in moved
    ]
    table = _table(["word", "cosine distance", "nearest before", "nearest after"], rows, (1,))
    mapped = part.get("map")
    figure = ""
    if mapped:
        words = mapped["words"]
        figure = svg.scatter(
            [
                ("before", [(p[0], p[1], w) for p, w in zip(mapped["before"], words, strict=True)]),
                ("after", [(p[0], p[1], w) for p, w in zip(mapped["after"], words, strict=True)]),
            ],
            title=(
                f"The moved words before and after (t-SNE, seed {mapped['seed']}, perplexity "
                f"{mapped['perplexity']:.1f}; distances on this map are only roughly meaningful)"
            ),
            width=560.0,
            height=440.0,
        )
    return head + f'<div class="figures">{figure}{table}</div>'


def render_embeddings(section: dict[str, Any]) -> str:
    note = section.get("note")
    parts = section.get("comparisons") or []
    out = f'<p class="notes">{escape(str(note))}</p>' if note else ""
    return out + "".join(_comparison(p) for p in parts)


__all__ = ["render_embeddings", "render_filters", "render_order_probe"]
