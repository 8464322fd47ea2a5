"""A whole batch's results: labels, calibrated probabilities and spans, vectorised.

The numbers are those of :meth:`Predictor.results`; the spans come from
:func:`textsieve.registry.spans.batch_spans`, which finds a whole batch's in a few array
operations instead of ~100 µs of Python per text (file scoring uses it too).
:func:`replies` writes each text's result as the JSON the service sends (what the workers
return); :func:`explain` and :func:`mark_for_review` give the same results as dicts, which
``orjson.dumps`` turns into those bytes exactly (tests/service/test_replies.py).
"""

from __future__ import annotations

import functools
import itertools
import operator
from collections.abc import Iterable
from typing import Any

import numpy as np
import orjson

from textsieve.registry.runtime import Encoded, Outputs, Predictor
from textsieve.registry.spans import batch_spans


def explain(
    p: Predictor, encoded: list[Encoded], out: Outputs, ks: list[int], *, probs: np.ndarray | None = None
) -> list[dict[str, Any]]:
    """One public result dict per text; text i gets at most ``ks[i]`` spans (``probs``: already computed)."""
    labels = p.labels
    if probs is None:
        probs = p.probabilities(out.logits)
    best = probs.argmax(axis=1)
    spans_by_row = batch_spans(p, encoded, out, best, np.asarray(ks, dtype=np.int64))
    return [
        {
            "label": labels[c],
            "probabilities": dict(zip(labels, row, strict=True)),
            "spans": found,
            "tokens": e.tokens,
            "truncated": e.tokens > len(e.ids),
            "unknown": e.unknown,
        }
        for e, c, row, found in zip(encoded, best.tolist(), probs.tolist(), spans_by_row, strict=True)
    ]


def replies(
    p: Predictor, encoded: list[Encoded], out: Outputs, ks: list[int], probs: np.ndarray, review: float | None = None
) -> list[bytes]:
    """Each text's result as JSON: ``orjson.dumps`` of its :func:`explain` dict (marked by
    :func:`mark_for_review` when ``review`` is given), byte for byte, without that dict.

    A result's dicts were made only to be serialised once and thrown away; here each result is
    one bytes template filled with ``%``, and only the spans, where a text has any, are dicts
    (bench/README.md, "Replies written without their dicts"). Every string and number is still
    written by orjson: the batch's probabilities in one call (a list of lists of numbers, split
    at its brackets and commas, which no number holds), each text's spans in one. A batch where
    no text asks for spans makes none of their arrays."""
    n = len(encoded)
    if n == 0:
        return []
    labels = p.labels
    width = len(labels)
    best = probs.argmax(axis=1)
    rows = probs.tolist()
    # b"[[p00,p01],[p10,p11]]" -> [b"p00", b"p01", b"p10", b"p11"]
    numbers = orjson.dumps(rows)[2:-2].replace(b"],[", b",").split(b",")
    names = [orjson.dumps(label) for label in labels]
    tokens = [e.tokens for e in encoded]
    kept = [len(e.ids) for e in encoded]
    # Each field a column, every text's template filled by one C-level map over their zip: a
    # Python loop that built each text's tuple cost as much again as the formatting itself.
    columns: list[Iterable[Any]] = [
        list(map(names.__getitem__, best.tolist())),
        *(numbers[i::width] for i in range(width)),
        _spans(p, encoded, out, best, ks),
        tokens,
        map(_BOOLEAN.__getitem__, map(operator.gt, tokens, kept)),
        [e.unknown for e in encoded],
    ]
    if review is not None:  # mark_for_review's comparison, max(probabilities) < review, on the same floats
        columns.append(map(_BOOLEAN.__getitem__, map(float(review).__gt__, map(max, rows))))
    return list(map(_template(tuple(labels), review is not None).__mod__, zip(*columns, strict=True)))


_BOOLEAN = (b"false", b"true")


def _spans(p: Predictor, encoded: list[Encoded], out: Outputs, best: np.ndarray, ks: list[int]) -> Iterable[bytes]:
    """Each text's spans as a JSON list; a batch where no text asks for spans makes none of their arrays."""
    if not any(ks):
        return itertools.repeat(b"[]", len(encoded))
    return map(orjson.dumps, batch_spans(p, encoded, out, best, np.asarray(ks, dtype=np.int64)))


@functools.lru_cache(maxsize=64)
def _template(labels: tuple[str, ...], review: bool) -> bytes:
    """A result's JSON with a field for each value, keys in :func:`explain`'s order: label, each
    label's probability, spans, tokens, truncated, unknown and, with ``review``, needs_review.
    ``%b`` takes a value written as JSON already, ``%d`` an int (written as JSON writes it). The
    probabilities' keys are written here, once a model (a ``%`` in a label doubled, as the
    template needs)."""
    keys = b",".join(orjson.dumps(label).replace(b"%", b"%%") + b":%b" for label in labels)
    tail = b',"needs_review":%b}' if review else b"}"
    return b'{"label":%b,"probabilities":{' + keys + b'},"spans":%b,"tokens":%d,"truncated":%b,"unknown":%d' + tail


def mark_for_review(results: list[dict[str, Any]], threshold: float) -> None:
    """Selective prediction (Geifman & El-Yaniv, 2017): a result whose top probability is below
    the model's review threshold is marked for a person to check rather than trusted as it is."""
    for r in results:
        r["needs_review"] = max(r["probabilities"].values()) < threshold


__all__ = ["explain", "mark_for_review", "replies"]
