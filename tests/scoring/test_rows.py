"""``score_texts``: a long list of texts is scored a piece at a time, with the results one call over
the whole list gives and a peak of memory that does not grow with the list's length."""

from __future__ import annotations

import tracemalloc
from pathlib import Path

import numpy as np
import pytest

from tests.scoring.conftest import uci_rows
from textsieve.registry.runtime import Predictor
from textsieve.scoring.rows import PIECE, score_texts

# A text's result does not depend on what it is batched with (padded windows are masked before
# max-over-time pooling): agreement to ~1e-6 is float32 rounding (DEVELOPERS.md, "Numbers to keep in mind").
TOLERANCE = 1e-6


@pytest.fixture(scope="module")
def predictor(tiny_bundles: dict[str, Path]) -> Predictor:
    return Predictor.from_bundle(tiny_bundles["a"])


def _texts(n: int) -> list[str]:
    sentences = [str(r["text"]) for r in uci_rows()]  # the UCI sentences (Kotzias et al., KDD 2015)
    return [sentences[i % len(sentences)] for i in range(n)]


def _peak(predictor: Predictor, texts: list[str]) -> int:
    tracemalloc.start()  # NumPy reports its arrays to Python's allocation tracer
    try:
        score_texts(predictor, texts, 0)
        return tracemalloc.get_traced_memory()[1]
    finally:
        tracemalloc.stop()


def test_a_list_longer_than_a_piece_gets_the_results_of_one_run_over_it(predictor: Predictor) -> None:
    texts = _texts(2 * PIECE + 300)  # two whole pieces and a short one
    encoded = [predictor.encode(t, offsets=False) for t in texts]
    want = predictor.probabilities(predictor.run(encoded).logits)
    got = score_texts(predictor, texts, 0)
    assert got.probabilities.shape == want.shape and got.spans is None
    assert np.abs(got.probabilities - want).max() <= TOLERANCE
    assert got.best.tolist() == want.argmax(axis=1).tolist()
    with_spans = score_texts(predictor, texts, 2)
    assert with_spans.spans is not None and len(with_spans.spans) == len(texts)
    # The spans of a piece's texts are those the same texts get scored on their own.
    tail = texts[2 * PIECE :]
    assert with_spans.spans[2 * PIECE :] == score_texts(predictor, tail, 2).spans


def test_memory_while_scoring_does_not_grow_with_the_number_of_texts(predictor: Predictor) -> None:
    """One run over a whole Dask partition (125,000 rows) held every text's pooled values, positions
    and contributions at once: ~1 GB for the demo model (bench/README.md)."""
    _peak(predictor, _texts(PIECE))  # onnxruntime's own first-run allocations out of the way
    small = _peak(predictor, _texts(4 * PIECE))
    large = _peak(predictor, _texts(16 * PIECE))
    # What must grow is the results (a label index and the probabilities, ~24 bytes a text for the
    # tiny model's 2 classes) and the concatenation of the pieces' results.
    grows = 2 * 24 * 12 * PIECE
    assert large - small <= grows, (small, large)
