"""Each text's reply as the workers write it (``service/inference/spans.py replies``), against the
result dicts it stands for.

- Reference: :meth:`Predictor.results` (its probabilities held to PyTorch and its spans to NumPy
  in test_predict.py), each result's public dict serialised by ``orjson.dumps``: what the
  service sent before replies were written without their dicts. The bytes must be equal, not
  merely equivalent, since callers may hash or diff replies.
- Every reply also parses with Python's own ``json`` module (RFC 8259) to that same dict.
- The review mark is selective prediction's rule (Geifman & El-Yaniv, 2017): top probability
  below the threshold.
"""

from __future__ import annotations

import functools
import json
from pathlib import Path

import numpy as np
import orjson
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from tests.helpers.jsonl import read_jsonl
from textsieve.registry.runtime import Predictor
from textsieve.service.inference.packing import run_packed
from textsieve.service.inference.spans import explain, mark_for_review, replies
from textsieve.texts import text_refusal

HARD_TEXTS = [
    "e\u0301te\u0301 cafe\u0301 the printer wont start",  # combining marks
    "👩\u200d👩\u200d👧 my laptop 👨🏽\u200d💻 screen is broken",  # emoji ZWJ sequences
    "שלום the invoice עובד לא was charged twice",  # right-to-left text
    'a "quoted" back\\slash\ttab 100% refund \u2028 line separator \x1f',  # what JSON escapes
    "  two  spaces\nand a newline ",
    "ﬁx the ＷＩＦＩ password ①②",  # compatibility characters
    "charged twice " * 200,  # truncated
    "qzxv wbbt plonk",  # unknown words only
    "ok",
]
# Labels JSON must escape, and a % the reply's template must not take for a field.
ODD_LABELS = ['100% "sure"', "back\\slash\ttab", "é 中文 😀 %s %d %%", "\u2028sep", "plain"]


@functools.cache
def _predictor(bundle: Path) -> Predictor:
    return Predictor.from_bundle(bundle)


def _want(p: Predictor, texts: list[str], ks: list[int], review: float | None) -> list[bytes]:
    encoded = [p.encode(t, offsets=k > 0) for t, k in zip(texts, ks, strict=True)]
    out = run_packed(p, encoded)
    results = [r.public() for r in p.results(encoded, out, spans=max(ks, default=0))]
    for r, k in zip(results, ks, strict=True):
        r["spans"] = r["spans"][:k]  # type: ignore[index]
    assert results == explain(p, encoded, out, ks)
    if review is not None:
        mark_for_review(results, review)
    return [orjson.dumps(r) for r in results]


def _got(p: Predictor, texts: list[str], ks: list[int], review: float | None) -> list[bytes]:
    encoded = [p.encode(t, offsets=k > 0) for t, k in zip(texts, ks, strict=True)]
    out = run_packed(p, encoded)
    return replies(p, encoded, out, ks, p.probabilities(out.logits), review)


@pytest.mark.parametrize("review", [None, 0.9, 1.0], ids=["no-review", "review-0.9", "review-all"])
@pytest.mark.parametrize("spans", [0, 1, 3, "mixed"])
def test_replies_are_the_result_dicts_bytes(
    tiny_bundles: dict[str, Path], tiny_data: Path, spans: int | str, review: float | None
) -> None:
    texts = [r["text"] for r in read_jsonl(tiny_data / "test.jsonl")[:150]] + HARD_TEXTS
    for key in ("a", "relabelled"):
        p = Predictor.from_bundle(tiny_bundles[key])
        ks = [i % 4 for i in range(len(texts))] if spans == "mixed" else [int(spans)] * len(texts)
        want = _want(p, texts, ks, review)
        got = _got(p, texts, ks, review)
        assert got == want
        for g, w in zip(got, want, strict=True):
            assert json.loads(g) == json.loads(w)
        if spans == 3:
            assert sum(len(json.loads(g)["spans"]) for g in got) > len(texts)  # spans were written
        if review == 1.0:
            assert all(json.loads(g)["needs_review"] for g in got)


def test_labels_that_json_escapes_or_hold_a_percent_sign(tiny_bundles: dict[str, Path]) -> None:
    p = Predictor.from_bundle(tiny_bundles["a"])
    p.labels = ODD_LABELS[: len(p.labels)]
    assert len(p.labels) >= 2
    for review in (None, 0.99):
        assert _got(p, HARD_TEXTS, [3] * len(HARD_TEXTS), review) == _want(p, HARD_TEXTS, [3] * len(HARD_TEXTS), review)


def test_no_texts(tiny_bundles: dict[str, Path]) -> None:
    p = Predictor.from_bundle(tiny_bundles["a"])
    encoded = [p.encode("ok")]
    out = run_packed(p, encoded)
    assert replies(p, [], out, [], np.zeros((0, len(p.labels)))) == []


@settings(max_examples=150, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(texts=st.lists(st.text(min_size=1, max_size=60), min_size=1, max_size=8), k=st.integers(0, 4))
def test_replies_equal_the_dicts_on_any_unicode(tiny_bundles: dict[str, Path], texts: list[str], k: int) -> None:
    texts = [t for t in texts if text_refusal(t) is None]  # what the service would refuse never gets here
    if not texts:
        return
    p = _predictor(tiny_bundles["b"])
    ks = [k] * len(texts)
    assert _got(p, texts, ks, 0.8) == _want(p, texts, ks, 0.8)
