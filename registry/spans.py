"""Spans for a whole batch at once, vectorised: the windows each text's filters fired on, summed,
merged and ranked in a few array operations instead of :meth:`Predictor.spans`'s Python loop a
text (~5 µs a text in a batch of 128, against ~50 µs). Shared by the service's workers
(textsieve/service/inference/spans.py), file scoring (textsieve/scoring/rows.py) and
:meth:`Predictor.predict` (``load_model(...).predict``), which also gets each span's token positions
and filters (:func:`batch_span_objects`).

The span measure is :meth:`Predictor.spans`'s (each filter's max-over-time window is an n-gram
detector, Jacovi et al., 2018, and its weight is ``pooled_f · W[c, f]``, its additive share of
class c's logit). Sums are accumulated with ``np.bincount`` in the same order as the loops there,
so the results are equal, not merely close; the tests compare them (tests/service/test_spans.py).
The windows of a batch are found on a dense grid of cells, one per (text, start, width): a
128-text batch of the benchmark's texts costs ~3.5 µs a text there against ~8.4 µs by sorting the
windows' keys, which is kept for grids too large to allocate.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass
from typing import Any, TypeVar

import numpy as np

from textsieve.registry.encoder import Layout
from textsieve.registry.runtime import SPAN_FLOOR, Encoded, Outputs, Predictor, Span

T = TypeVar("T")
# What turns the chosen spans into a batch's results: public dicts, or Span objects.
Build = Callable[[Predictor, list[Encoded], Outputs, np.ndarray, "_Chosen"], list[list[T]]]


def batch_spans(
    p: Predictor, encoded: list[Encoded], out: Outputs, best: np.ndarray, ks: np.ndarray
) -> list[list[dict[str, Any]]]:
    """Text i's strongest spans for class ``best[i]``, at most ``ks[i]`` of them, as public dicts
    (``start``, ``end``, ``text``, ``label``, ``weight``, ``width``): :meth:`Span.public` of
    :meth:`Predictor.spans`, for every text of the batch at once.

    A batch whose grid would exceed ``DENSE_CELLS`` (a scoring worker's 2,048 texts, say) is taken
    in blocks of rows that fit it: each text's spans depend on its own row alone."""
    return _in_blocks(p, encoded, out, best, ks, _public)


def batch_span_objects(
    p: Predictor, encoded: list[Encoded], out: Outputs, best: np.ndarray, ks: np.ndarray
) -> list[list[Span]]:
    """:meth:`Predictor.spans` for every text of the batch at once, whole :class:`Span` objects:
    :func:`batch_spans`' fields plus each span's token positions and the filters whose windows it
    merged (what ``load_model(...).predict`` returns)."""
    return _in_blocks(p, encoded, out, best, ks, _objects)


def _in_blocks(
    p: Predictor,
    encoded: list[Encoded],
    out: Outputs,
    best: np.ndarray,
    ks: np.ndarray,
    build: Build[T],
) -> list[list[T]]:
    n = len(encoded)
    stride = max((len(e.ids) for e in encoded), default=0) + 1
    rows = max(DENSE_CELLS // (stride * _cells(p)), 1)
    if n <= rows:
        return _spans(p, encoded, out, best, ks, build)
    found: list[list[T]] = []
    for lo in range(0, n, rows):
        hi = min(lo + rows, n)
        block = Outputs(out.logits[lo:hi], out.pooled[lo:hi], out.positions[lo:hi], out.contributions[lo:hi])
        found += _spans(p, encoded[lo:hi], block, best[lo:hi], ks[lo:hi], build)
    return found


def _cells(p: Predictor) -> int:
    """Grid cells a (text, start): one per window width, 1 .. the widest filter."""
    return int(p.filter_widths.max(initial=0)) + 1


@dataclass(frozen=True, slots=True)
class _Chosen:
    """The spans kept, in row order and strongest first within a row: row, first token, end token,
    summed weight; and, when asked for, what finds their filters: every merged group's first
    token as ``row · stride + start`` (ascending), each group's place among the chosen spans (−1:
    not chosen), the rows' strongest window and the fired filters."""

    row: np.ndarray
    start: np.ndarray
    end: np.ndarray
    weight: np.ndarray
    group_starts: np.ndarray
    span_of_group: np.ndarray
    row_max: np.ndarray
    stride: int
    fired: _Fired | None


def _spans(
    p: Predictor,
    encoded: list[Encoded],
    out: Outputs,
    best: np.ndarray,
    ks: np.ndarray,
    build: Build[T],
) -> list[list[T]]:
    n = len(encoded)
    lengths = np.fromiter((len(e.ids) for e in encoded), dtype=np.int64, count=n)
    if n == 0 or not ((lengths > 0) & (ks > 0)).any():
        return [[] for _ in range(n)]
    members = build is _objects
    windows = _windows(p, lengths, out, best, ks, members)
    if windows is None:
        windows = _windows_sorted(p, lengths, out, best, ks, members)
    w_row, w_start, w_end, totals, row_max, fired = windows  # at or above the floor alone
    if totals.size == 0:
        return [[] for _ in range(n)]

    # Merge overlapping windows: a window opens a new span when it starts at or after the
    # furthest end seen so far in its row (rows are offset so they never overlap).
    stride = int(lengths.max()) + 1
    flat_start = w_row * stride + w_start
    reach = np.maximum.accumulate(w_row * stride + w_end)
    opens = np.ones(len(totals), dtype=bool)
    opens[1:] = flat_start[1:] >= reach[:-1]
    group = np.cumsum(opens) - 1
    g_weight = np.bincount(group, weights=totals)
    first = np.flatnonzero(opens)
    g_row = w_row[first]
    g_start = w_start[first]
    g_end = np.maximum.reduceat(w_end, first)

    # Strongest first within each row; equal weights keep left-to-right order (stable sort).
    order = np.lexsort((np.arange(len(g_weight)), -g_weight, g_row))
    row_sorted = g_row[order]
    rank = np.arange(len(order)) - np.searchsorted(row_sorted, row_sorted, side="left")
    chosen = order[rank < ks[row_sorted]]
    span_of_group = np.full(len(g_weight), -1)
    span_of_group[chosen] = np.arange(len(chosen))
    picked = _Chosen(
        g_row[chosen],
        g_start[chosen],
        g_end[chosen],
        g_weight[chosen],
        flat_start[first],
        span_of_group,
        row_max,
        stride,
        fired,
    )
    return build(p, encoded, out, best, picked)


def _public(
    p: Predictor, encoded: list[Encoded], out: Outputs, best: np.ndarray, c: _Chosen
) -> list[list[dict[str, Any]]]:
    found: list[list[dict[str, Any]]] = [[] for _ in range(len(encoded))]
    labels = p.labels
    best_list = best.tolist()
    last = -1
    layout: Layout | None = None
    enc = None
    text = name = ""
    into: list[dict[str, Any]] = []
    # Spans are in row order, so a row's text and label are looked up once for all its spans. A
    # span's two offsets alone are found, not every token's of its text: from the tokens' layout
    # (registry/encoder.py, span_bounds, inlined: two calls a span cost a third of the sums), or
    # where the text has none (Encoded.layout), from its offsets.
    for r, s, e, w in zip(c.row.tolist(), c.start.tolist(), c.end.tolist(), c.weight.tolist(), strict=True):
        if r != last:
            enc = encoded[r]
            layout, text, name, into, last = enc.layout, enc.text, labels[best_list[r]], found[r], r
        if layout is not None:
            cs = sum(layout[: 2 * s + 1]) - 1
            ce = cs + sum(layout[2 * s + 1 : 2 * e])
        else:
            assert enc is not None
            cs, ce = enc.bounds(s, e)
        into.append({"start": cs, "end": ce, "text": text[cs:ce], "label": name, "weight": w, "width": e - s})
    return found


def _objects(p: Predictor, encoded: list[Encoded], out: Outputs, best: np.ndarray, c: _Chosen) -> list[list[Span]]:
    # A span's filters: the fired filters whose window was kept (the same comparison with the same
    # floats as the windows' own) and fell in its group: the last group starting at or before it.
    f = c.fired
    assert f is not None, "the windows were found with members=True"
    kept = f.total >= SPAN_FLOOR * c.row_max[f.row]
    rows, filters = f.row[kept], f.filter[kept]
    group = np.searchsorted(c.group_starts, rows * c.stride + f.start[kept], side="right") - 1
    span = c.span_of_group[group]
    member = span >= 0
    span, filters = span[member], filters[member]
    order = np.argsort(span, kind="stable")  # a span's filters stay ascending (row-major order)
    listed = filters[order].tolist()
    ends = np.cumsum(np.bincount(span, minlength=len(c.row))).tolist()

    found: list[list[Span]] = [[] for _ in range(len(encoded))]
    labels = p.labels
    best_list = best.tolist()
    lo = 0
    for r, s, e, w, hi in zip(c.row.tolist(), c.start.tolist(), c.end.tolist(), c.weight.tolist(), ends, strict=True):
        enc = encoded[r]
        cs, ce = enc.starts[s], enc.ends[e - 1]
        found[r].append(Span(cs, ce, enc.text[cs:ce], labels[best_list[r]], w, e - s, s, e, listed[lo:hi]))
        lo = hi
    return found


@dataclass(frozen=True, slots=True)
class _Fired:
    """Each fired filter (row-major, so a row's filters ascending): its row, its index, its window's
    first token and the summed weight of its window (what decides whether the window is kept)."""

    row: np.ndarray
    filter: np.ndarray
    start: np.ndarray
    total: np.ndarray


# row, start, end, summed weight of each window at or above its row's floor; each row's
# strongest window's weight (0.0: none); the fired filters when asked for
Windows = tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray, np.ndarray, _Fired | None]
# The dense window grid (rows x starts x widths) is used up to this many cells; beyond it (many
# long texts at once) the windows are found by sorting their keys instead.
DENSE_CELLS = 1 << 20


def _windows(
    p: Predictor, lengths: np.ndarray, out: Outputs, best: np.ndarray, ks: np.ndarray, members: bool = False
) -> Windows | None:
    """Every window a filter fired on (its share of the chosen class > 0) whose summed shares reach
    SPAN_FLOOR of its row's strongest window's, with the shares summed, in (row, start, end)
    order, and each row's strongest: one ``np.bincount`` over a dense grid, one cell per (row, start,
    width), instead of sorting the fired filters' keys. The fired filters are taken in row-major
    order, which meets a window's filters in ascending order, so each total is the same sum in the
    same order as :meth:`Predictor.spans`. None when the grid would
    be too large or the graph gave a window start outside its text (the sorting path then does
    exactly what it always did)."""
    n = len(lengths)
    stride = int(lengths.max()) + 1
    cells = _cells(p)
    if n * stride * cells > DENSE_CELLS:
        return None
    starts = out.positions
    # Every start within its text (a row without tokens may hold any: it is never read). A row's
    # largest start, not an elementwise comparison with ``where=``: a fifth of the time.
    if starts.min(initial=0) < 0 or not ((starts.max(axis=1, initial=0) < lengths) | (lengths == 0)).all():
        return None
    contrib = out.contributions[np.arange(n), :, best]  # [n, F]: filter shares of the chosen class
    # cell = (row · stride + start) · cells + (end − start), with end = min(start + width, length).
    # In int32 (the grid has at most DENSE_CELLS cells; starts were checked above): half the
    # memory traffic of int64.
    s32 = starts.astype(np.int32)
    key = s32 * np.int32(cells)
    key += np.minimum(lengths.astype(np.int32)[:, None] - s32, p.filter_widths.astype(np.int32))
    key += (np.arange(n, dtype=np.int32) * np.int32(stride * cells))[:, None]
    # Every filter goes into the sum, those that did not fire (share ≤ 0, or NaN: ``fmax``) with a
    # weight of zero: adding a zero to a sum of positive shares that starts at 0.0 leaves it as it
    # was, bit for bit, so each window's total is still the fired shares added in ascending
    # filter order, and the ~half of the filters that did not fire cost less as zeros than
    # picking the others out. Rows without tokens or without spans asked for go wholly to cell 0
    # (row 0, start 0, width 0: no window), with weight zero; a row without tokens may hold any
    # start.
    weights = np.fmax(contrib, np.float32(0))
    eligible = (lengths > 0) & (ks > 0)
    if not eligible.all():
        key[~eligible] = 0
        weights[~eligible] = 0
    totals = np.bincount(key.ravel(), weights=weights.ravel(), minlength=n * stride * cells)
    # The windows at or above SPAN_FLOOR of their row's strongest, picked on the grid before their
    # cells are decoded (a row's cells are one run of the grid): a few a text of its ~100.
    # ``_floor`` leaves out the empty cells as ``totals > 0`` did.
    grid = totals.reshape(n, stride * cells)
    row_max = grid.max(axis=1)
    cell = np.flatnonzero(grid >= _floor(row_max)[:, None])
    # Floor division by a scalar (numpy divides by a constant fast), not np.divmod.
    w_row = cell // (stride * cells)
    rest = cell - w_row * (stride * cells)
    w_start = rest // cells
    w_end = w_start + (rest - w_start * cells)
    fired_filters = None
    if members:
        which = np.flatnonzero((contrib > 0) & eligible[:, None])
        rows, filters = np.divmod(which, contrib.shape[1])
        fired_filters = _Fired(rows, filters, starts.ravel()[which], totals[key.ravel()[which]])
    return w_row, w_start, w_end, totals[cell], row_max, fired_filters


def _floor(row_max: np.ndarray) -> np.ndarray:
    """The least total a row's window needs to be kept: SPAN_FLOOR of the row's strongest, and
    never below the least positive float, so that no empty cell (0.0) passes it. A positive total
    is at least that float anyway, so ``total >= _floor(row_max)`` is ``total >= SPAN_FLOOR ·
    row_max`` for every window (the comparison Predictor.spans makes), and false for every empty
    cell, rows without windows (``row_max`` 0) included."""
    return np.maximum(SPAN_FLOOR * row_max, _LEAST)


_LEAST = float(np.finfo(np.float64).smallest_subnormal)


def _windows_sorted(
    p: Predictor, lengths: np.ndarray, out: Outputs, best: np.ndarray, ks: np.ndarray, members: bool = False
) -> Windows:
    """:func:`_windows` by sorting the fired filters' window keys (any grid size)."""
    n = len(lengths)
    contrib = out.contributions[np.arange(n), :, best]
    eligible = (lengths > 0) & (ks > 0)
    fired_rows, fired_f = np.nonzero((contrib > 0) & eligible[:, None])  # row-major: filters ascending
    weights = contrib[fired_rows, fired_f].astype(np.float64)
    starts = out.positions[fired_rows, fired_f]
    ends = np.minimum(starts + p.filter_widths[fired_f], lengths[fired_rows])
    # One window per distinct (row, start, end); np.unique sorts them like the loop's sorted().
    stride = int(lengths.max()) + 1
    key = (fired_rows * stride + starts) * stride + ends
    uniq, inverse = np.unique(key, return_inverse=True)
    totals = np.bincount(inverse, weights=weights)  # adds in filter order, starting from 0.0
    fired_filters = _Fired(fired_rows, fired_f, starts, totals[inverse]) if members else None
    w_row = uniq // (stride * stride)
    row_max = np.zeros(n)
    np.maximum.at(row_max, w_row, totals)
    keep = totals >= _floor(row_max)[w_row]
    w_row, uniq = w_row[keep], uniq[keep]
    return w_row, (uniq // stride) % stride, uniq % stride, totals[keep], row_max, fired_filters


__all__ = ["DENSE_CELLS", "batch_span_objects", "batch_spans"]
