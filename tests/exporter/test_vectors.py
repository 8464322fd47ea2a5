"""Pretrained vectors: the real GloVe excerpt, the word2vec header, and one-line errors."""

from __future__ import annotations

from collections import Counter
from pathlib import Path

import numpy as np
import pytest

from textsieve.errors import InputError
from textsieve.exporter.vectors import load_vectors
from textsieve.registry.tokenizer import Vocabulary

# GloVe 6B, 100 dimensions (Pennington, Socher & Manning, EMNLP 2014); an excerpt described in
# tests/data/README.md.
GLOVE = Path(__file__).parents[1] / "data" / "glove_excerpt_100d.txt"


def _vocab(*words: str) -> Vocabulary:
    return Vocabulary.build(Counter({w: 1 for w in words}))


def _row(vocab: Vocabulary, loaded_ids: np.ndarray, matrix: np.ndarray, word: str) -> np.ndarray:
    where = np.flatnonzero(loaded_ids == vocab.index[word])
    assert where.size == 1, f"{word!r} not loaded"
    return matrix[where[0]]


def _cos(a: np.ndarray, b: np.ndarray) -> float:
    a, b = a.astype(np.float64), b.astype(np.float64)
    return float(a @ b / (np.linalg.norm(a) * np.linalg.norm(b)))


def test_glove_excerpt_dimension_values_and_similarity() -> None:
    vocab = _vocab("the", "good", "great", "terrible", "banana", "qqqnotaword")
    vectors = load_vectors(GLOVE, vocab)
    assert vectors.dim == 100
    assert vectors.matrix.shape == (5, 100) and vectors.matrix.dtype == np.float32
    assert vectors.found == 5  # every word but the made-up one
    assert vocab.index["qqqnotaword"] not in vectors.ids

    # The first line of the file, as text: "the -0.038194 -0.24487 0.72812 ..." (tests/data/README.md
    # notes it equals glove.6B.100d.txt's first row, from memory).
    first_line = GLOVE.read_text(encoding="utf-8").split("\n", 1)[0].split(" ")
    assert first_line[:4] == ["the", "-0.038194", "-0.24487", "0.72812"]
    the = _row(vocab, vectors.ids, vectors.matrix, "the")
    np.testing.assert_array_equal(the, np.array(first_line[1:], dtype=np.float32))

    # From memory, common knowledge about GloVe: related words lie closer than unrelated ones.
    good = _row(vocab, vectors.ids, vectors.matrix, "good")
    great = _row(vocab, vectors.ids, vectors.matrix, "great")
    banana = _row(vocab, vectors.ids, vectors.matrix, "banana")
    assert _cos(good, great) > _cos(good, banana) + 0.2
    assert _cos(good, great) > 0.6


def test_only_vocabulary_rows_are_kept_and_specials_are_skipped(tmp_path: Path) -> None:
    f = tmp_path / "v.txt"
    f.write_text("<unk> 9 9\n<pad> 9 9\nalpha 1 2\nbeta 3 4\ngamma 5 6\n", encoding="utf-8")
    vocab = _vocab("gamma", "alpha")
    vectors = load_vectors(f, vocab)
    # Padding must stay zero and the unknown token random: the file cannot set them.
    assert sorted(vectors.ids.tolist()) == sorted([vocab.index["alpha"], vocab.index["gamma"]])
    assert _row(vocab, vectors.ids, vectors.matrix, "gamma").tolist() == [5.0, 6.0]


def test_word2vec_header_and_trailing_spaces(tmp_path: Path) -> None:
    # word2vec's text output: "count dim" first, then rows that end with a space.
    f = tmp_path / "w2v.txt"
    f.write_text("2 3\nalpha 0.5 -1 2e-1 \nbeta 1 1 1 \n", encoding="utf-8")
    vectors = load_vectors(f, _vocab("alpha"))
    assert vectors.dim == 3
    np.testing.assert_array_equal(vectors.matrix[0], np.array([0.5, -1, 0.2], dtype=np.float32))


def test_words_are_normalised_like_the_tokenizer_and_first_spelling_wins(tmp_path: Path) -> None:
    f = tmp_path / "v.txt"
    # "Cafe\u0301" (decomposed, capitalised) normalises to the vocabulary's "café" (NFKC + casefold);
    # its second spelling further down is ignored.
    f.write_text("Cafe\u0301 1 1\ncafé 2 2\nDon\u2019t 3 3\n", encoding="utf-8")
    vocab = _vocab("café", "don't")
    vectors = load_vectors(f, vocab)
    assert _row(vocab, vectors.ids, vectors.matrix, "café").tolist() == [1.0, 1.0]
    assert _row(vocab, vectors.ids, vectors.matrix, "don't").tolist() == [3.0, 3.0]


def test_rows_whose_word_holds_spaces_are_skipped_not_refused(tmp_path: Path) -> None:
    """The large Common Crawl GloVe files (Pennington et al., 2014) hold a few rows whose word has
    spaces in it, such as ". . ." (from memory): those files were refused at that row ("has 302
    values, expected 300"). No token holds a space, so such a row is skipped; an extra number is
    still a ragged row."""
    f = tmp_path / "v.txt"
    f.write_text("alpha 1 2\n. . . 7 7\nat name@domain.com 8 8\nbeta 3 4\n", encoding="utf-8")
    vocab = _vocab("alpha", "beta", ".", "at")
    vectors = load_vectors(f, vocab)
    assert sorted(vectors.ids.tolist()) == sorted([vocab.index["alpha"], vocab.index["beta"]])
    assert _row(vocab, vectors.ids, vectors.matrix, "beta").tolist() == [3.0, 4.0]
    f.write_text("alpha 1 2\nbeta 3 4 5\n", encoding="utf-8")
    assert "line 2: has 3 values, expected 2" in _error(f)


def test_gzip_files_are_read(tmp_path: Path) -> None:
    import gzip

    f = tmp_path / "v.txt.gz"
    with gzip.open(f, "wt", encoding="utf-8") as fh:
        fh.write("alpha 1 2\n")
    assert load_vectors(f, _vocab("alpha")).found == 1


def _error(path: Path, vocab: Vocabulary | None = None) -> str:
    with pytest.raises(InputError) as info:
        load_vectors(path, vocab or _vocab("alpha", "beta"))
    message = info.value.message
    assert "\n" not in message and str(path) in message
    return message


# file name, content (None: no file) -> words of the one-line error, which names the file
@pytest.mark.parametrize(
    ("name", "content", "expected_msg"),
    [
        pytest.param("none.txt", None, "no such file", id="missing file"),
        pytest.param("v.txt", b"", "has no vectors", id="empty file"),
        pytest.param(
            "v.txt", b"alpha 1 2\nb\xffeta 3 4\n", "line 2: byte offset 11 is not valid UTF-8", id="not UTF-8"
        ),
        # Checked even for words outside the vocabulary: a ragged file is a broken file.
        pytest.param("v.txt", b"alpha 1 2 3\nzeta 1 2\n", "line 2: has 2 values, expected 3", id="ragged rows"),
        pytest.param(
            "v.txt", b"1 4\nalpha 1 2 3\n", "line 2: has 3 values, expected 4", id="header dimension disagrees"
        ),
        pytest.param("v.txt", b"alpha 1 2\nbeta 3 x4\n", "line 2: value 'x4' is not a number", id="not a number"),
        pytest.param("v.txt", b"alpha 1 nan\n", "line 1: has a value that is not finite", id="not finite"),
        pytest.param(
            "v.bin", b"2 3\nalpha \x00\x00\x80?", "binary word2vec files are not supported", id="binary word2vec"
        ),
    ],
)
def test_bad_vectors_file(tmp_path: Path, name: str, content: bytes | None, expected_msg: str) -> None:
    path = tmp_path / name
    if content is not None:
        path.write_bytes(content)
    assert expected_msg in _error(path)
