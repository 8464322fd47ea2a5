"""report.html: one self-contained page drawn from report.json alone (inline CSS and SVG, no script).

The page loads nothing: :func:`report_csp` allows only its own ``<style>`` by sha256 (CSP
Level 2 hash source), as the reviewer page does, and no script at all. The page states the same
policy in a ``<meta http-equiv>``, so the file holds to it when opened from disk.
"""

from __future__ import annotations

import base64
import hashlib
import re
from collections.abc import Sequence
from html import escape
from typing import Any

from textsieve.registry.measures import TEMPERATURE_BOUNDS, temperature_bound
from textsieve.registry.report import svg
from textsieve.registry.report.build import Section, default_sections
from textsieve.registry.tables import one_line_part

STYLE = """
body{font-family:system-ui,sans-serif;margin:0 auto;max-width:1100px;padding:1rem 1.5rem;color:#1a1a1a;
background:#fbfcfc;line-height:1.4}
h1{font-size:1.5rem;margin:.2rem 0}h2{font-size:1.2rem;border-bottom:2px solid #1f6f78;padding-bottom:.2rem;
margin-top:2rem}h3{font-size:1rem}
table{border-collapse:collapse;margin:.5rem 0}th,td{padding:.25rem .6rem;border-bottom:1px solid #dde3e4;
text-align:left;vertical-align:top}td.num,th.num{text-align:right;font-variant-numeric:tabular-nums}
.caution{background:#fff6e6;border-left:4px solid #d08c2b;padding:.5rem .8rem}
.notes{background:#f3eef7;border-left:4px solid #7a4f9a;padding:.5rem .8rem}
.figures{display:flex;flex-wrap:wrap;gap:1rem;align-items:flex-start}
.plot{background:#fff;border:1px solid #dde3e4}.plot .axis-title{font-weight:600}
.meta{color:#4b5558}.meta code{font-size:.85em}
mark{background:#cfe8e6;padding:0 .1rem}.worse{color:#a13a36}.better{color:#2f7a2f}
.text{max-width:46rem}
"""


def _policy(styles: Sequence[str]) -> str:
    hashes = " ".join(f"'sha256-{base64.b64encode(hashlib.sha256(s.encode()).digest()).decode()}'" for s in styles)
    return (
        f"default-src 'none'; style-src {hashes}; img-src 'none'; script-src 'none'; base-uri 'none'; "
        "form-action 'none'"
    )


def report_csp(html: str) -> str:
    """The page's Content-Security-Policy: its own inline style by hash, nothing else."""
    return _policy(re.findall(r"<style>(.*?)</style>", html, flags=re.S)) + "; frame-ancestors 'none'"


def _num(x: object, digits: int = 4) -> str:
    if x is None:
        return "–"
    if isinstance(x, bool):
        return str(x)
    if isinstance(x, int):
        return f"{x:,}"
    if isinstance(x, float):
        return f"{x:.{digits}f}"
    return escape(str(x))


def _pct(x: object) -> str:
    return "–" if not isinstance(x, int | float) else f"{x:.1%}"


def _ci(pair: object) -> str:
    if not isinstance(pair, list) or len(pair) != 2 or None in pair:
        return "–"
    return f"{pair[0]:.4f} – {pair[1]:.4f}"


def _table(headers: Sequence[str], rows: Sequence[Sequence[str]], numeric: Sequence[int] = ()) -> str:
    head = "".join(f"<th{' class=num' if i in numeric else ''}>{escape(h)}</th>" for i, h in enumerate(headers))
    body = "".join(
        "<tr>" + "".join(f"<td{' class=num' if i in numeric else ''}>{c}</td>" for i, c in enumerate(r)) + "</tr>"
        for r in rows
    )
    return f"<table><thead><tr>{head}</tr></thead><tbody>{body}</tbody></table>"


def highlighted(text: str, spans: Sequence[dict[str, Any]]) -> str:
    """``text`` escaped, with the spans that fall inside it marked (overlaps were merged upstream). It is
    shown as the CLI's tables show a text (``registry/tables.py one_line``): a stored text's control,
    format (bidi overrides, zero-width), private-use and unassigned characters as their escapes
    (``\\u202e``), so a text can neither hide characters from the reader nor show itself reordered
    ("Trojan Source", Boucher and Anderson 2021); joiners inside words stay. Spans' offsets count the
    stored text's characters, so each piece is cut first and made visible after."""
    out, at = [], 0
    for sp in sorted(spans, key=lambda s: int(s["start"])):
        start, end = int(sp["start"]), int(sp["end"])
        if start < at or end > len(text):
            continue  # beyond the clipped text, or overlapping: shown in the span list instead
        out.append(escape(one_line_part(text, at, start)))
        out.append(
            f'<mark title="{svg.shown(str(sp["label"]))} {float(sp["weight"]):.3f}">'
            f"{escape(one_line_part(text, start, end))}</mark>"
        )
        at = end
    out.append(escape(one_line_part(text, at, len(text))))
    return "".join(out)


# -- sections -------------------------------------------------------------------------------
def _header(r: dict[str, Any]) -> str:
    version = r.get("version")
    return (
        f"<h1>Evaluation report: {escape(str(r['model']))} version {escape(str(version))}</h1>"
        f'<p class="meta">{_num(r["n"])} labelled texts; evaluation set sha256 <code>{escape(r["evalset_sha256"])}'
        f"</code>; made {escape(str(r['created_at']))}; intervals: 95 % percentile bootstrap, "
        f"{r['bootstrap']['resamples']} resamples, seed {r['bootstrap']['seed']}.</p>"
        f'<p class="caution">{escape(str(r.get("cautions", "")))}</p>'
    )


def _notes(r: dict[str, Any]) -> str:
    notes = r.get("notes") or []
    if not notes:
        return ""
    items = "".join(f"<li>{escape(n)}</li>" for n in notes)
    return f'<div class="notes"><strong>Not produced:</strong><ul>{items}</ul></div>'


def _summary(r: dict[str, Any]) -> str:
    m = r["metrics"]
    rows = [
        ["accuracy", _num(m["accuracy"]), _ci(m.get("accuracy_ci"))],
        ["macro-F1", _num(m["macro_f1"]), _ci(m.get("macro_f1_ci"))],
        ["expected calibration error (15 bins)", _num(m["ece"]), ""],
        ["maximum calibration error", _num(m["mce"]), ""],
        ["Brier score", _num(m["brier"]), ""],
        ["negative log-likelihood", _num(m["nll"]), ""],
    ]
    return "<h2>What this version does</h2>" + _table(["figure", "value", "95 % interval"], rows, (1, 2))


def _classes(r: dict[str, Any]) -> str:
    pc = r["per_class"]
    labels = list(pc)
    rows = [
        [svg.shown(k), _num(v["precision"]), _num(v["recall"]), _num(v["f1"]), _num(v["support"])]
        for k, v in pc.items()
    ]
    chart = svg.bar_chart(
        labels,
        [(name, [pc[k][name] for k in labels]) for name in ("precision", "recall", "f1")],
        title="Per-class precision, recall and F1",
        y_label="score",
        y_range=(0.0, 1.0),
    )
    c = r["confusion"]
    cells = [
        [f"{count} ({share:.0%})" if count else "0" for count, share in zip(crow, nrow, strict=True)]
        for crow, nrow in zip(c["counts"], c["normalised"], strict=True)
    ]
    heat = svg.heatmap(
        c["normalised"], c["labels"], c["labels"], cells, title="Confusion matrix (colour: share of the true label)"
    )
    return (
        "<h2>Per class</h2>"
        + _table(["label", "precision", "recall", "F1", "support"], rows, (1, 2, 3, 4))
        + f'<div class="figures">{chart}{heat}</div>'
        + "<p>Rows are the true labels, columns the predicted ones; each cell shows the count and the row's share.</p>"
    )


def _reliability_points(bins: list[dict[str, Any]]) -> list[tuple[float, float]]:
    return [(b["confidence"], b["accuracy"]) for b in bins if b["count"] and b["confidence"] is not None]


def _calibration(r: dict[str, Any]) -> str:
    cal = r["calibration"]
    before, after = cal["before"], cal["after"]
    plot = svg.line_plot(
        [
            ("before scaling (T = 1)", _reliability_points(before["reliability"])),
            (f"after (T = {cal['temperature']:.3f})", _reliability_points(after["reliability"])),
        ],
        title="Reliability diagram",
        x_label="confidence",
        y_label="accuracy",
        diagonal=True,
    )
    rows = [
        [name, _num(before[key]), _num(after[key])]
        for name, key in (("ECE", "ece"), ("MCE", "mce"), ("Brier", "brier"), ("NLL", "nll"))
    ]
    return (
        "<h2>Calibration</h2>"
        + f'<div class="figures">{plot}'
        + _table(["figure", "before scaling", "after scaling"], rows, (1, 2))
        + "</div>"
        + f"<p>Temperature stored with the bundle: {cal['temperature']:.4f}; the temperature this evaluation "
        f"set would choose: {_refit(cal)} Points on the dashed diagonal are perfectly "
        "calibrated; below it the model is over-confident.</p>"
    )


def _refit(cal: dict[str, Any]) -> str:
    # Reports stored before refit_temperature_bound existed lack it; measures.temperature_bound is the
    # one detector (the card and the export's parity report use it too), so ask it again.
    refit = cal.get("refit_temperature")
    bound = cal.get("refit_temperature_bound") or (temperature_bound(refit) if isinstance(refit, float) else None)
    if bound == "upper":
        return (
            f"none: not a fit, the search stopped at its upper bound, T = {TEMPERATURE_BOUNDS[1]:g}. The loss kept "
            "falling as the probabilities flattened towards uniform: on these texts the version's scores carry "
            "little information about the right label, or it is badly over-confident (often sure and wrong). "
            "Check the labels and the metrics above before trusting its probabilities."
        )
    if bound == "lower":
        return (
            f"none: not a fit, the search stopped at its lower bound, T = {TEMPERATURE_BOUNDS[0]:g}. The loss kept "
            "falling as the probabilities sharpened towards 0 or 1: these texts (too few, too easy, or every one "
            "classified correctly) say nothing about how confident the version should be."
        )
    return f"{_num(refit)}."


def _selective(r: dict[str, Any]) -> str:
    curve = [(p["coverage"], p["accuracy"]) for p in r["selective"]]
    lo = min([p[1] for p in curve if p[1] is not None] + [1.0])
    plot = svg.line_plot(
        [("accuracy of the texts kept", curve)],
        title="Selective prediction: accuracy against coverage",
        x_label="coverage (share of texts answered automatically)",
        y_label="accuracy",
        y_range=(max(0.0, round(lo - 0.05, 1)), 1.0),
    )
    rows = [
        [
            _pct(t["target_accuracy"]),
            _num(t["threshold"]),
            _pct(t["coverage"]),
            _num(t.get("threshold_bounded")),
            _pct(t.get("coverage_bounded")),
        ]
        for t in r["selective_targets"]
    ]
    return (
        "<h2>Selective prediction</h2>"
        "<p>Texts whose top probability is below a threshold go to a person (Geifman &amp; El-Yaniv, 2017). "
        "The table gives, for each target accuracy, the lowest threshold that reaches it on this set and the "
        "share of texts it keeps; the bounded columns ask the Wilson 95 % lower bound to reach it.</p>"
        + f'<div class="figures">{plot}'
        + _table(["target", "threshold", "keeps", "threshold (bounded)", "keeps (bounded)"], rows, (1, 2, 3, 4))
        + "</div>"
    )


def _by_length(r: dict[str, Any]) -> str:
    bands = r["by_length"]
    if not bands:
        return ""
    chart = svg.bar_chart(
        [b["band"] for b in bands],
        [
            ("accuracy", [b["accuracy"] for b in bands]),
            ("truncated", [b["truncated_share"] for b in bands]),
            ("unknown tokens", [b["unknown_rate"] for b in bands]),
        ],
        title="By text length (tokens)",
        y_label="share",
        y_range=(0.0, 1.0),
    )
    rows = [
        [escape(b["band"]), _num(b["n"]), _num(b["accuracy"]), _pct(b["truncated_share"]), _pct(b["unknown_rate"])]
        for b in bands
    ]
    return (
        "<h2>By text length</h2>"
        + f'<div class="figures">{chart}'
        + _table(["tokens", "texts", "accuracy", "truncated", "unknown tokens"], rows, (1, 2, 3, 4))
        + "</div>"
    )


def _worst(r: dict[str, Any]) -> str:
    rows = [
        [
            f'<span class="text">{highlighted(w["text"], w["spans"])}</span>',
            svg.shown(w["label"]),
            svg.shown(w["predicted"]),
            _num(w["confidence"], 3),
        ]
        for w in r["worst"]
    ]
    if not rows:
        return "<h2>Worst mistakes</h2><p>No mistakes on this set.</p>"
    return (
        "<h2>Worst mistakes</h2><p>The most confident wrong answers; marked: the n-grams that drove the "
        "predicted label.</p>" + _table(["text", "label", "predicted", "confidence"], rows, (3,))
    )


def _signed(x: object) -> str:
    if not isinstance(x, int | float):
        return "–"
    cls = "better" if x > 0 else "worse" if x < 0 else ""
    return f'<span class="{cls}">{x:+.4f}</span>'


def _comparison(r: dict[str, Any]) -> str:
    c = r.get("comparison")
    if not c:
        return ""
    version = r.get("version")
    rows = [
        ["accuracy change", _signed(c["accuracy_delta"]), _ci(c.get("accuracy_delta_ci"))],
        ["macro-F1 change", _signed(c["macro_f1_delta"]), _ci(c.get("macro_f1_delta_ci"))],
        ["McNemar exact p", _num(c["mcnemar_p"]), ""],
        ["smallest accuracy difference this set detects (power 0.8)", _num(c["minimum_detectable_difference"]), ""],
        ["same label from both", _pct(c["agreement"]), ""],
    ]
    transitions = [
        ["right → wrong", _num(c["right_to_wrong"])],
        ["wrong → right", _num(c["wrong_to_right"])],
        ["wrong → another wrong label", _num(c["wrong_to_other_wrong"])],
    ]
    labels = list(c["per_class"])
    deltas = svg.bar_chart(
        labels,
        [
            ("precision", [c["per_class"][k]["precision_delta"] for k in labels]),
            ("recall", [c["per_class"][k]["recall_delta"] for k in labels]),
            ("F1", [c["per_class"][k]["f1_delta"] for k in labels]),
        ],
        title=f"Per-class change, version {version} minus {c['against']}",
        y_label="change",
    )
    cal_rows = [
        [k.upper() if k != "brier" else "Brier", _num(v["against"]), _num(v["this"]), _signed(-v["delta"])]
        for k, v in c["calibration"].items()
    ]
    examples = []
    for kind, title in (
        ("right_to_wrong", "Right before, wrong now"),
        ("wrong_to_right", "Wrong before, right now"),
        ("wrong_to_other_wrong", "Wrong both times, differently"),
    ):
        ex = c["examples"].get(kind) or []
        if not ex:
            continue
        ex_rows = [
            [
                svg.shown(e["label"]),
                f"{svg.shown(e['against']['predicted'])} ({e['against']['confidence']:.2f})<br>"
                f'<span class="text">{highlighted(e["text"], e["against"]["spans"])}</span>',
                f"{svg.shown(e['this']['predicted'])} ({e['this']['confidence']:.2f})<br>"
                f'<span class="text">{highlighted(e["text"], e["this"]["spans"])}</span>',
            ]
            for e in ex
        ]
        examples.append(
            f"<h3>{title}</h3>" + _table(["label", f"version {c['against']}", f"version {version}"], ex_rows)
        )
    return (
        f"<h2>Compared with version {escape(str(c['against']))}</h2>"
        "<p>Paired on the same texts. McNemar's exact test (McNemar, 1947; Dietterich, 1998) asks whether the "
        "right → wrong and wrong → right counts differ by more than chance.</p>"
        + '<div class="figures">'
        + _table(["figure", "value", "95 % interval"], rows, (1, 2))
        + _table(["transition", "texts"], transitions, (1,))
        + "</div>"
        + f'<div class="figures">{deltas}'
        + _table(["calibration", f"version {c['against']}", f"version {version}", "improvement"], cal_rows, (1, 2, 3))
        + "</div>"
        + "".join(examples)
    )


def render_html(report: dict[str, Any], sections: Sequence[Section] | None = None) -> str:
    """The whole page for a report (``sections``: extra sections to draw, default :func:`default_sections`)."""
    extra = []
    for section in default_sections() if sections is None else sections:
        if report.get(section.key) is not None:
            extra.append(f'<section id="{escape(section.key)}"><h2>{escape(section.title)}</h2>')
            extra.append(section.render(report[section.key]) + "</section>")
    body = (
        _header(report)
        + _notes(report)
        + _summary(report)
        + _classes(report)
        + _calibration(report)
        + _selective(report)
        + _by_length(report)
        + _worst(report)
        + _comparison(report)
        + "".join(extra)
    )
    title = f"Evaluation report: {report['model']} version {report.get('version')}"
    return (
        '<!doctype html><html lang="en"><head><meta charset="utf-8">'
        # The file carries its policy too: report.html opened from disk (written by `textsieve
        # evaluate`, or saved from the service) has no response header to lock it down, and escaping
        # would be its only guard. A <meta> policy cannot hold frame-ancestors (CSP Level 3 §3.3:
        # ignored there, with a console error); the service's header adds it.
        f'<meta http-equiv="Content-Security-Policy" content="{_policy([STYLE])}">'
        '<meta name="viewport" content="width=device-width, initial-scale=1">'
        f"<title>{escape(title)}</title><style>{STYLE}</style></head><body>{body}</body></html>"
    )


__all__ = ["STYLE", "highlighted", "render_html", "report_csp"]
