"""Inline SVG figures for the evaluation report: a heat map, line plots, bar charts and a scatter.

Plain strings, no plotting library: the service shows stored reports and a serving install
carries no plotting stack. Every figure is an ``<svg role="img">`` with a ``<title>`` and
``<desc>`` (read out by screen readers) and uses presentation attributes and classes only,
never ``style="…"`` attributes, so the report's Content-Security-Policy needs no
``'unsafe-inline'`` (CSP Level 2 governs style attributes; SVG presentation attributes are not
styles). Each figure carries the CSS class ``plot`` so tests and the page can find them.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from html import escape

from textsieve.registry.tables import clip, one_line

# Our own palette: a teal-to-amber series set and a paper-white to deep-teal sequential ramp.
SERIES_COLOURS = ("#1f6f78", "#d08c2b", "#7a4f9a", "#3d8b3d", "#b0413e", "#5a6b7b")
_RAMP_LOW = (247, 250, 249)
_RAMP_HIGH = (14, 77, 86)
_FONT = 12

Point = tuple[float, float]


def _f(x: float) -> str:
    return f"{x:.2f}".rstrip("0").rstrip(".")


def shown(s: str) -> str:
    """``s`` (a label, a series name) as text for HTML or SVG: escaped for markup, and shown as the CLI's
    tables and the reviewer page show it (``registry/tables.py one_line``): control, format (bidi,
    zero-width), private-use and unassigned characters as their escapes (``\\u202e``), so a stored label
    can neither hide itself nor reorder the text around it; joiners between visible characters stay."""
    return escape(one_line(s))


def _text(x: float, y: float, s: str, *, anchor: str = "middle", cls: str = "", extra: str = "") -> str:
    c = f' class="{cls}"' if cls else ""
    return f'<text x="{_f(x)}" y="{_f(y)}" text-anchor="{anchor}"{c}{extra}>{shown(s)}</text>'


def ramp(value: float) -> str:
    """A colour on the sequential ramp for ``value`` in [0, 1] (NaN shows as light grey)."""
    if not math.isfinite(value):
        return "#e6e6e6"
    v = min(max(value, 0.0), 1.0)
    r, g, b = (round(lo + (hi - lo) * v) for lo, hi in zip(_RAMP_LOW, _RAMP_HIGH, strict=True))
    return f"#{r:02x}{g:02x}{b:02x}"


def _ink(value: float) -> str:
    # Light numbers on dark cells: the ramp passes mid-grey around 0.55.
    return "#ffffff" if math.isfinite(value) and value > 0.55 else "#1a1a1a"


def _open(width: float, height: float, title: str, desc: str, kind: str) -> str:
    return (
        f'<svg xmlns="http://www.w3.org/2000/svg" class="plot plot-{kind}" role="img" '
        f'viewBox="0 0 {_f(width)} {_f(height)}" width="{_f(width)}" height="{_f(height)}" '
        f'font-size="{_FONT}" font-family="system-ui, sans-serif">'
        f"<title>{shown(title)}</title><desc>{shown(desc)}</desc>"
    )


def _short(label: str, limit: int = 14) -> str:
    return clip(label, limit)


def heatmap(
    values: Sequence[Sequence[float]],
    rows: Sequence[str],
    columns: Sequence[str],
    cells: Sequence[Sequence[str]],
    *,
    title: str,
    row_title: str = "true label",
    column_title: str = "predicted label",
) -> str:
    """A matrix drawn as coloured cells (``values`` in [0, 1] choose the colour) with ``cells`` written in them."""
    n_rows, n_cols = len(rows), len(columns)
    cell = max(34.0, min(64.0, 420.0 / max(n_cols, 1)))
    left, top = 120.0, 56.0
    width = left + cell * n_cols + 20
    height = top + cell * n_rows + 40
    out = [_open(width, height, title, f"{n_rows} by {n_cols} matrix, {row_title} by {column_title}", "heatmap")]
    out.append(_text(left + cell * n_cols / 2, 16, column_title, cls="axis-title"))
    for j, name in enumerate(columns):
        out.append(_text(left + cell * (j + 0.5), top - 8, _short(name, 10), extra=f' data-label="{escape(name)}"'))
    out.append(
        _text(
            14,
            top + cell * n_rows / 2,
            row_title,
            cls="axis-title",
            extra=f' transform="rotate(-90 14 {_f(top + cell * n_rows / 2)})"',
        )
    )
    for i, name in enumerate(rows):
        y = top + cell * i
        out.append(_text(left - 6, y + cell / 2 + 4, _short(name), anchor="end"))
        for j in range(n_cols):
            v = float(values[i][j])
            x = left + cell * j
            out.append(
                f'<rect class="cell" x="{_f(x)}" y="{_f(y)}" width="{_f(cell)}" height="{_f(cell)}" '
                f'fill="{ramp(v)}" stroke="#ffffff"/>'
            )
            out.append(_text(x + cell / 2, y + cell / 2 + 4, cells[i][j], extra=f' fill="{_ink(v)}" class="cell-text"'))
    out.append("</svg>")
    return "".join(out)


def _ticks(lo: float, hi: float, count: int = 5) -> list[float]:
    if hi <= lo:
        return [lo]
    step = (hi - lo) / count
    magnitude = 10 ** math.floor(math.log10(step))
    step = min((m * magnitude for m in (1, 2, 2.5, 5, 10) if m * magnitude >= step), default=step)
    first = math.ceil(lo / step) * step
    return [round(first + k * step, 10) for k in range(int((hi - first) / step + 1e-9) + 1)]


class _Frame:
    """A plotting area: data coordinates to SVG coordinates, and the axes drawn around it."""

    def __init__(self, x_range: tuple[float, float], y_range: tuple[float, float], width: float, height: float) -> None:
        self.x0, self.x1 = x_range
        self.y0, self.y1 = y_range
        self.left, self.right, self.top, self.bottom = 58.0, width - 16.0, 30.0, height - 46.0

    def x(self, v: float) -> float:
        span = self.x1 - self.x0 or 1.0
        return self.left + (v - self.x0) / span * (self.right - self.left)

    def y(self, v: float) -> float:
        span = self.y1 - self.y0 or 1.0
        return self.bottom - (v - self.y0) / span * (self.bottom - self.top)

    def axes(self, x_label: str, y_label: str, *, x_ticks: bool = True) -> str:
        out = [
            f'<rect x="{_f(self.left)}" y="{_f(self.top)}" width="{_f(self.right - self.left)}" '
            f'height="{_f(self.bottom - self.top)}" fill="none" stroke="#8a9499"/>'
        ]
        for t in _ticks(self.y0, self.y1):
            y = self.y(t)
            out.append(f'<line x1="{_f(self.left)}" x2="{_f(self.right)}" y1="{_f(y)}" y2="{_f(y)}" stroke="#e3e7e8"/>')
            out.append(_text(self.left - 5, y + 4, f"{t:g}", anchor="end"))
        if x_ticks:
            for t in _ticks(self.x0, self.x1):
                out.append(_text(self.x(t), self.bottom + 15, f"{t:g}"))
        out.append(_text((self.left + self.right) / 2, self.bottom + 34, x_label, cls="axis-title"))
        mid = (self.top + self.bottom) / 2
        out.append(_text(14, mid, y_label, cls="axis-title", extra=f' transform="rotate(-90 14 {_f(mid)})"'))
        return "".join(out)


def _legend(names: Sequence[str], left: float, top: float) -> str:
    out = []
    x = left
    for k, name in enumerate(names):
        colour = SERIES_COLOURS[k % len(SERIES_COLOURS)]
        out.append(f'<rect x="{_f(x)}" y="{_f(top - 9)}" width="10" height="10" fill="{colour}"/>')
        out.append(_text(x + 14, top, name, anchor="start"))
        x += 24 + 7 * len(name)
    return "".join(out)


def line_plot(
    series: Sequence[tuple[str, Sequence[Point]]],
    *,
    title: str,
    x_label: str,
    y_label: str,
    x_range: tuple[float, float] = (0.0, 1.0),
    y_range: tuple[float, float] = (0.0, 1.0),
    diagonal: bool = False,
    markers: bool = True,
    width: float = 420.0,
    height: float = 320.0,
) -> str:
    """Lines through each series' points (NaN points are skipped); ``diagonal`` draws y = x as a reference."""
    fr = _Frame(x_range, y_range, width, height)
    out = [_open(width, height, title, f"{len(series)} series of {y_label} against {x_label}", "line")]
    out.append(fr.axes(x_label, y_label))
    if diagonal:
        lo, hi = max(fr.x0, fr.y0), min(fr.x1, fr.y1)
        out.append(
            f'<line class="reference" x1="{_f(fr.x(lo))}" y1="{_f(fr.y(lo))}" x2="{_f(fr.x(hi))}" '
            f'y2="{_f(fr.y(hi))}" stroke="#9aa3a7" stroke-dasharray="4 3"/>'
        )
    for k, (name, points) in enumerate(series):
        colour = SERIES_COLOURS[k % len(SERIES_COLOURS)]
        kept = [(x, y) for x, y in points if math.isfinite(x) and math.isfinite(y)]
        if not kept:
            continue
        path = " ".join(f"{_f(fr.x(x))},{_f(fr.y(y))}" for x, y in kept)
        out.append(
            f'<polyline class="series" data-series="{escape(name)}" points="{path}" fill="none" '
            f'stroke="{colour}" stroke-width="2"/>'
        )
        if markers:
            out.extend(f'<circle cx="{_f(fr.x(x))}" cy="{_f(fr.y(y))}" r="2.6" fill="{colour}"/>' for x, y in kept)
    out.append(_legend([n for n, _ in series], fr.left, 18))
    out.append("</svg>")
    return "".join(out)


def bar_chart(
    categories: Sequence[str],
    series: Sequence[tuple[str, Sequence[float]]],
    *,
    title: str,
    y_label: str,
    y_range: tuple[float, float] | None = None,
    width: float | None = None,
    height: float = 300.0,
) -> str:
    """Grouped vertical bars: one group per category, one bar per series (values may be negative)."""
    values = [v for _, vs in series for v in vs if math.isfinite(v)]
    if y_range is None:
        lo = min([0.0, *values])
        hi = max([0.0, *values]) or 1.0
        y_range = (lo, hi)
    n_series = max(len(series), 1)
    group = max(40.0, 14.0 * n_series + 16)
    legend = 74 + sum(24 + 7 * len(name) for name, _ in series) if len(series) > 1 else 0
    width = width or max(320.0, 90 + group * len(categories), legend)
    fr = _Frame((0.0, float(max(len(categories), 1))), y_range, width, height)
    out = [_open(width, height, title, f"{y_label} for {len(categories)} groups", "bar")]
    out.append(fr.axes("", y_label, x_ticks=False))
    slot = (fr.right - fr.left) / max(len(categories), 1)
    bar = min(22.0, (slot - 10) / n_series)
    zero = fr.y(max(min(0.0, fr.y1), fr.y0))
    for c, name in enumerate(categories):
        x_mid = fr.left + slot * (c + 0.5)
        out.append(_text(x_mid, fr.bottom + 15, _short(name, 12), extra=f' data-label="{escape(name)}"'))
        for k, (sname, vs) in enumerate(series):
            v = float(vs[c])
            if not math.isfinite(v):
                continue
            x = x_mid - bar * n_series / 2 + bar * k
            y = fr.y(v)
            top, h = min(y, zero), abs(zero - y)
            out.append(
                f'<rect class="bar" x="{_f(x)}" y="{_f(top)}" width="{_f(bar - 2)}" height="{_f(h)}" '
                f'fill="{SERIES_COLOURS[k % len(SERIES_COLOURS)]}"><title>{shown(f"{sname} {name}: {v:.4g}")}'
                "</title></rect>"
            )
    if len(series) > 1:
        out.append(_legend([n for n, _ in series], fr.left, 18))
    out.append("</svg>")
    return "".join(out)


def scatter(
    groups: Sequence[tuple[str, Sequence[tuple[float, float, str]]]],
    *,
    title: str,
    x_label: str = "",
    y_label: str = "",
    width: float = 440.0,
    height: float = 360.0,
    annotate: bool = True,
) -> str:
    """Points ``(x, y, name)`` in one colour per group, each optionally labelled with its name."""
    xs = [p[0] for _, pts in groups for p in pts if math.isfinite(p[0])]
    ys = [p[1] for _, pts in groups for p in pts if math.isfinite(p[1])]

    def padded(v: list[float]) -> tuple[float, float]:
        if not v:
            return 0.0, 1.0
        lo, hi = min(v), max(v)
        pad = (hi - lo) * 0.08 or 1.0
        return lo - pad, hi + pad

    fr = _Frame(padded(xs), padded(ys), width, height)
    out = [_open(width, height, title, f"{len(xs)} points in {len(groups)} groups", "scatter")]
    out.append(fr.axes(x_label, y_label))
    for k, (_, pts) in enumerate(groups):
        colour = SERIES_COLOURS[k % len(SERIES_COLOURS)]
        for x, y, name in pts:
            if not (math.isfinite(x) and math.isfinite(y)):
                continue
            cx, cy = fr.x(x), fr.y(y)
            out.append(
                f'<circle class="point" cx="{_f(cx)}" cy="{_f(cy)}" r="3.2" fill="{colour}">'
                f"<title>{shown(name)}</title></circle>"
            )
            if annotate and name:
                out.append(_text(cx + 5, cy - 4, _short(name, 18), anchor="start", cls="point-label"))
    out.append(_legend([n for n, _ in groups], fr.left, 18))
    out.append("</svg>")
    return "".join(out)


__all__ = ["SERIES_COLOURS", "bar_chart", "heatmap", "line_plot", "ramp", "scatter", "shown"]
