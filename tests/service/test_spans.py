"""The batch span bookkeeping (registry/spans.py, used by the service's workers and by file
scoring) against Predictor.spans.

``Predictor.spans`` (registry/runtime.py) explains one text at a time with plain Python loops
and is what the exporter's parity check and the registry's gates use; the batch path finds the
same windows for a whole batch at once, on a dense grid (``_windows``) or, for grids too large, by
sorting window keys (``_windows_sorted``). Both must give the very same spans: offsets, text,
weights to the last bit, order. The graph's outputs are the real model's on hard Unicode, and
made-up ones (hypothesis) that force ties, overlaps, clipped windows and empty texts.
"""

from __future__ import annotations

from pathlib import Path
from typing import Any

import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from textsieve.registry import spans
from textsieve.registry.runtime import Encoded, Outputs, Predictor
from textsieve.service.inference.spans import explain

HARD = [
    "my card was charged twice 😀 for the café's ride… 修理 please",
    "👩‍💻 login broken again, e\u0301 n\u0303o a\u0308\u0323 can't reset",
    "\u200f שלום the invoice \u202e is wrong مرحبا \u200b thanks",
    "ﬁx the Ⅻ repair １２３ ありがとう\tgreat\nservice",
    "🇫🇷👍🏽 great great great thanks thanks the technician fixed it",
    "charged " * 80,  # longer than max_length: truncated
    "ok",
    "qzxv wbbt plonk",
    "",  # no tokens: no spans
    "नमस्ते refund \ufeff\u2060 please",
]


def _by_the_reference_tokenizer(p: Predictor, encoded: list[Encoded]) -> list[Encoded]:
    """``encoded`` with every token's offsets found now by the reference tokenizer
    (``Tokenizer.split_slow``), not from the layout the serving encoder keeps (``Encoded.layout``)."""
    out = []
    for e in encoded:
        _, bounds = p.tokenizer.split_slow(e.text)
        kept = bounds[: len(e.ids)]
        out.append(Encoded(e.text, e.ids, [s for s, _ in kept], [t for _, t in kept], e.tokens, e.unknown))
    return out


def _reference(p: Predictor, encoded: list[Encoded], out: Outputs, ks: list[int]) -> list[list[dict[str, Any]]]:
    encoded = _by_the_reference_tokenizer(p, encoded)
    best = p.probabilities(out.logits).argmax(axis=1)
    return [
        [s.public() for s in p.spans(e, out, row, int(best[row]), k)]
        for row, (e, k) in enumerate(zip(encoded, ks, strict=True))
    ]


def _both_paths(
    p: Predictor, encoded: list[Encoded], out: Outputs, ks: list[int], monkeypatch: pytest.MonkeyPatch
) -> tuple[list[list[dict[str, Any]]], list[list[dict[str, Any]]]]:
    dense = [r["spans"] for r in explain(p, encoded, out, ks)]
    with monkeypatch.context() as m:
        m.setattr(spans, "DENSE_CELLS", 0)  # every grid is "too large": the sorting path
        by_sorting = [r["spans"] for r in explain(p, encoded, out, ks)]
    return dense, by_sorting


def _objects_equal_reference(
    p: Predictor, encoded: list[Encoded], out: Outputs, ks: list[int], monkeypatch: pytest.MonkeyPatch
) -> None:
    """The whole Span objects ``load_model(...).predict`` returns (token positions and filters too),
    by both window paths, equal to Predictor.spans's, field for field."""
    best = p.probabilities(out.logits).argmax(axis=1)
    want = [p.spans(e, out, row, int(best[row]), k) for row, (e, k) in enumerate(zip(encoded, ks, strict=True))]
    ks_array = np.asarray(ks, dtype=np.int64)
    assert spans.batch_span_objects(p, encoded, out, best, ks_array) == want
    with monkeypatch.context() as m:
        m.setattr(spans, "DENSE_CELLS", 0)
        assert spans.batch_span_objects(p, encoded, out, best, ks_array) == want


@pytest.fixture(scope="module")
def predictor(tiny_bundles: dict[str, Path]) -> Predictor:
    return Predictor.from_bundle(tiny_bundles["a"])


def test_dense_and_sorted_windows_equal_predictor_spans_on_hard_unicode(
    tiny_bundles: dict[str, Path], monkeypatch: pytest.MonkeyPatch
) -> None:
    found = 0
    for key in ("a", "b"):
        p = Predictor.from_bundle(tiny_bundles[key])
        encoded = [p.encode(t) for t in HARD]
        # Spans read their offsets from the tokens' layout where the encoder kept one, else from
        # offsets found at encoding: the batch has both.
        assert {e.layout is None for e in encoded} == {True, False}
        out = p.run(encoded)
        lengths = np.array([len(e.ids) for e in encoded])
        best = p.probabilities(out.logits).argmax(axis=1)
        # The batch above takes the dense path (else this test would only check the sorting one).
        assert spans._windows(p, lengths, out, best, np.full(len(HARD), 3)) is not None
        for ks in ([1] * len(HARD), [3] * len(HARD), [20] * len(HARD), [i % 4 for i in range(len(HARD))]):
            want = _reference(p, encoded, out, ks)
            dense, by_sorting = _both_paths(p, encoded, out, ks, monkeypatch)
            assert dense == want
            assert by_sorting == want
            _objects_equal_reference(p, encoded, out, ks, monkeypatch)
            for text, row in zip(HARD, dense, strict=True):
                for s in row:
                    assert text[s["start"] : s["end"]] == s["text"]
            found += sum(len(r) for r in dense)
    assert found > 50


@st.composite
def _outputs(draw: st.DrawFn, p: Predictor, encoded: list[Encoded]) -> tuple[Outputs, list[int]]:
    """Graph outputs as the graph could give them: each filter's window starts inside its text
    (at most at length − width, or 0). Starts drawn from the first ``reach`` positions pile many
    filters into one window (sums of several terms, where the order of adding shows); shares drawn
    from a few values make windows tie; some rows get no positive share at all."""
    n, widths, classes = len(encoded), p.filter_widths, len(p.labels)
    rng = np.random.default_rng(draw(st.integers(0, 2**32 - 1)))
    lengths = np.array([len(e.ids) for e in encoded])
    last = np.maximum(lengths[:, None] - widths[None, :], 0)
    reach = draw(st.sampled_from([1, 2, 3, 1000]))
    positions = (rng.random((n, len(widths))) * np.minimum(last + 1, reach)).astype(np.int64)
    # A row without tokens is all padding: its positions mean nothing and may be anything.
    positions[lengths == 0] = rng.integers(0, 1 << 40, size=(int((lengths == 0).sum()), len(widths)))
    # float32 shares of like size add up exactly in float64 whatever the order; shares 10⁻⁹ and
    # 10⁴ apart do not, so a sum taken in another order than Predictor.spans's would show.
    scales = np.array([1e-9, 1e-4, 1.0, 1e4])
    # −0.0 and NaN are not shares that fired (Predictor.spans keeps share > 0 alone); the dense
    # path adds every filter with those as zeros, which must leave each total as it was.
    pool = [-1.0, 0.0, -0.0, np.nan, 0.125, 0.5, 3.0, 1 / 3, *(rng.random(6) * rng.choice(scales, 6)).tolist()]
    values = np.array(draw(st.lists(st.sampled_from(pool), min_size=1, max_size=5)))
    contributions = rng.choice(values, size=(n, len(widths), classes)).astype(np.float32)
    logits = rng.normal(size=(n, classes)).astype(np.float32)
    pooled = np.abs(rng.normal(size=(n, len(widths)))).astype(np.float32)
    ks = draw(st.lists(st.integers(0, 6), min_size=n, max_size=n))
    return Outputs(logits, pooled, positions, contributions), ks


def test_dense_and_sorted_windows_equal_predictor_spans_on_made_up_outputs(
    predictor: Predictor, monkeypatch: pytest.MonkeyPatch
) -> None:
    p = predictor
    encoded = [p.encode(t) for t in HARD + ["a b", "refund", "the the the the"]]

    @settings(max_examples=150, deadline=None, suppress_health_check=[HealthCheck.too_slow])
    @given(_outputs(p, encoded))
    def check(drawn: tuple[Outputs, list[int]]) -> None:
        out, ks = drawn
        want = _reference(p, encoded, out, ks)
        dense, by_sorting = _both_paths(p, encoded, out, ks, monkeypatch)
        assert dense == want
        assert by_sorting == want
        _objects_equal_reference(p, encoded, out, ks, monkeypatch)

    check()


def test_predict_returns_the_per_text_spans_with_their_tokens_and_filters(predictor: Predictor) -> None:
    """Predictor.predict (load_model(...).predict) finds spans for the whole list at once."""
    texts = [t for t in HARD if t]
    got = predictor.predict(texts, spans=4)
    encoded = [predictor.encode(t) for t in texts]
    out = predictor.run(encoded)
    best = predictor.probabilities(out.logits).argmax(axis=1)
    assert [g.spans for g in got] == [predictor.spans(e, out, i, int(best[i]), 4) for i, e in enumerate(encoded)]
    assert sum(len(g.spans) for g in got) >= 5 and all(s.filters for g in got for s in g.spans)
    assert all(g.spans == [] for g in predictor.predict(texts, spans=0))


def test_both_window_paths_keep_the_same_windows_at_or_above_the_floor_alone(predictor: Predictor) -> None:
    """The windows below SPAN_FLOOR of their row's strongest are dropped where they are found
    (on the grid, before its cells are decoded), by both paths alike; Predictor.spans drops them
    by the same comparison (registry/runtime.py, SPAN_FLOOR)."""
    p = predictor
    encoded = [p.encode(t) for t in HARD]
    out = p.run(encoded)
    best = p.probabilities(out.logits).argmax(axis=1)
    lengths = np.array([len(e.ids) for e in encoded])
    ks = np.full(len(HARD), 3)
    dense = spans._windows(p, lengths, out, best, ks)
    assert dense is not None
    by_sorting = spans._windows_sorted(p, lengths, out, best, ks)
    for a, b in zip(dense[:5], by_sorting[:5], strict=True):
        np.testing.assert_array_equal(a, b)
    w_row, _, _, totals, row_max, _ = dense
    assert (totals >= spans.SPAN_FLOOR * row_max[w_row]).all() and (totals > 0).all()
    assert set(w_row.tolist()) == {i for i, e in enumerate(encoded) if e.ids}
    # The rows' strongest windows are those of all windows, floor or not.
    contrib = out.contributions[np.arange(len(HARD)), :, best]
    for row in set(w_row.tolist()):
        fired = np.flatnonzero(contrib[row] > 0)
        ends = np.minimum(out.positions[row, fired] + p.filter_widths[fired], lengths[row])
        sums: dict[tuple[int, int], float] = {}
        for f, s, e in zip(fired.tolist(), out.positions[row, fired].tolist(), ends.tolist(), strict=True):
            sums[(s, e)] = sums.get((s, e), 0.0) + float(contrib[row, f])
        assert row_max[row] == max(sums.values())
        kept = sorted(key for key, v in sums.items() if v >= spans.SPAN_FLOOR * row_max[row])
        assert kept == list(zip(dense[1][w_row == row].tolist(), dense[2][w_row == row].tolist(), strict=True))


def test_a_window_outside_its_text_takes_the_sorting_path(predictor: Predictor) -> None:
    """The graph never gives one (warm_and_check would refuse such a bundle); if it did, the
    dense grid would put the window in the wrong cell, so the batch goes the old way instead."""
    p = predictor
    encoded = [p.encode(t) for t in ("my card was charged twice", "login broken")]
    out = p.run(encoded)
    best = p.probabilities(out.logits).argmax(axis=1)
    lengths = np.array([len(e.ids) for e in encoded])
    ks = np.array([3, 3])
    assert spans._windows(p, lengths, out, best, ks) is not None
    out.positions[1, 0] = lengths[1]  # starts at the text's end
    assert spans._windows(p, lengths, out, best, ks) is None
    out.positions[1, 0] = -1
    assert spans._windows(p, lengths, out, best, ks) is None


@pytest.mark.parametrize("k", [1, 3, 7])
def test_file_scoring_finds_the_same_spans_as_predictor_spans(predictor: Predictor, k: int) -> None:
    """textsieve score (and its Dask workers) take the batch path too (textsieve/scoring/rows.py)."""
    from textsieve.scoring.rows import score_texts

    texts = [t for t in HARD if t] * 3  # the scorer refuses empty texts before this point
    encoded = [predictor.encode(t) for t in texts]
    assert score_texts(predictor, texts, k).spans == _reference(
        predictor, encoded, predictor.run(encoded), [k] * len(texts)
    )


def test_a_batch_too_large_for_one_grid_is_taken_in_blocks_of_rows_with_the_same_spans(
    predictor: Predictor, monkeypatch: pytest.MonkeyPatch
) -> None:
    texts = [t for t in HARD if t] * 4
    encoded = [predictor.encode(t) for t in texts]
    out = predictor.run(encoded)
    best = predictor.probabilities(out.logits).argmax(axis=1)
    ks = np.full(len(texts), 3)
    want = _reference(predictor, encoded, out, [3] * len(texts))
    stride = max(len(e.ids) for e in encoded) + 1
    cells = int(predictor.filter_widths.max()) + 1
    blocks: list[int] = []
    real = spans._spans
    monkeypatch.setattr(spans, "_spans", lambda p, e, *rest: blocks.append(len(e)) or real(p, e, *rest))
    monkeypatch.setattr(spans, "DENSE_CELLS", stride * cells * 5)  # five texts a grid
    assert spans.batch_spans(predictor, encoded, out, best, ks) == want
    assert blocks == [5] * (len(texts) // 5) + ([len(texts) % 5] if len(texts) % 5 else [])
