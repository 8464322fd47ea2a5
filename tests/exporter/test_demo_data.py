"""The invented demo data: determinism, balance, sizes, lengths, negation, files on disk."""

from __future__ import annotations

import collections
import json
import os
import re
import subprocess
import sys
from pathlib import Path

import pytest

from textsieve.exporter import demo_data
from textsieve.exporter.demo_data import LABELS, MAX_TOKENS, MIN_TOKENS, generate, token_count, write_splits

NEGATION = re.compile(r"\bnot\b|n't\b")


def _read_jsonl(path: Path) -> list[dict[str, str]]:
    # strict decoding: a byte that is not UTF-8 raises here instead of turning into U+FFFD
    text = path.read_bytes().decode("utf-8", errors="strict")
    assert text.endswith("\n")
    return [json.loads(line) for line in text.split("\n")[:-1]]


def test_same_seed_same_output_different_seed_different() -> None:
    assert generate(500, seed=7) == generate(500, seed=7)
    assert generate(500, seed=7) != generate(500, seed=8)


def test_output_does_not_depend_on_hash_seed(tmp_path: Path) -> None:
    # str hashing is salted per process (PYTHONHASHSEED): any set/hash-order dependence shows here.
    script = (
        "import sys, pathlib; from textsieve.exporter.demo_data import write_splits;"
        "write_splits(pathlib.Path(sys.argv[1]), n=300, seed=3)"
    )
    for hash_seed in ("1", "2"):
        env = {**os.environ, "PYTHONHASHSEED": hash_seed}
        subprocess.run([sys.executable, "-c", script, str(tmp_path / hash_seed)], env=env, check=True)
    write_splits(tmp_path / "here", n=300, seed=3)
    for name in ("train", "valid", "test"):
        here = (tmp_path / "here" / f"{name}.jsonl").read_bytes()
        assert (tmp_path / "1" / f"{name}.jsonl").read_bytes() == here
        assert (tmp_path / "2" / f"{name}.jsonl").read_bytes() == here


def test_labels_and_balance(demo_rows: list[dict[str, str]]) -> None:
    assert len(demo_rows) == 6000
    assert all(set(row) == {"text", "label"} for row in demo_rows)
    counts = collections.Counter(row["label"] for row in demo_rows)
    assert sorted(counts) == sorted(LABELS)
    for label, count in counts.items():
        assert 0.15 <= count / len(demo_rows) <= 0.40, (label, count)


def test_texts_are_distinct(demo_rows: list[dict[str, str]]) -> None:
    # duplicates would leak between train and test once split
    assert len({row["text"] for row in demo_rows}) == len(demo_rows)
    # ... and so would texts the model cannot tell apart: a message and its lower-cased copy (36 pairs did).
    # The reference is a plain casefold of the word and punctuation runs, not the project's tokenizer.
    words = [tuple(re.findall(r"\w+|[^\w\s]", row["text"].casefold())) for row in demo_rows]
    assert len(set(words)) == len(demo_rows)


def test_lengths_in_range_and_varied(demo_rows: list[dict[str, str]]) -> None:
    lengths = [token_count(row["text"]) for row in demo_rows]
    assert MIN_TOKENS == 5 and MAX_TOKENS == 60
    assert min(lengths) >= MIN_TOKENS and max(lengths) <= MAX_TOKENS
    assert min(lengths) <= 8 and max(lengths) >= 45
    assert len(set(lengths)) >= 35


def test_token_count_counts_words_and_punctuation() -> None:
    assert token_count("My account isn't locked, thanks!") == 9


def test_each_label_has_negated_and_contrast_examples(demo_rows: list[dict[str, str]]) -> None:
    for label in LABELS:
        texts = [row["text"] for row in demo_rows if row["label"] == label]
        assert sum(bool(NEGATION.search(t)) for t in texts) >= 150, label
        assert sum(" but " in t or "until" in t for t in texts) >= 100, label


def test_negation_twins_share_words_but_not_labels(demo_rows: list[dict[str, str]]) -> None:
    # "The chain is not broken, but I was charged twice." (billing) has exactly the words of
    # "The chain is broken, but I was not charged twice." (repair).
    bags: dict[tuple[str, ...], set[str]] = collections.defaultdict(set)
    for row in demo_rows:
        bags[tuple(sorted(re.findall(r"\w+", row["text"].lower())))].add(row["label"])
    assert any(len(labels) > 1 for labels in bags.values())


def test_word_order_matters_for_a_linear_model() -> None:
    # External check with scikit-learn, on the rule-following labels (no disagreement):
    # unigram logistic regression must fall short, while the same model with bigrams (which
    # see "not broken" vs "is broken") must nearly solve it.
    from sklearn.feature_extraction.text import CountVectorizer
    from sklearn.linear_model import LogisticRegression

    rows = generate(disagreement=0.0)
    texts, labels = [r["text"] for r in rows], [r["label"] for r in rows]

    def held_out_accuracy(ngrams: tuple[int, int]) -> float:
        vec = CountVectorizer(ngram_range=ngrams, token_pattern=r"(?u)\b\w+\b")
        model = LogisticRegression(max_iter=2000).fit(vec.fit_transform(texts[:4800]), labels[:4800])
        return float((model.predict(vec.transform(texts[4800:])) == labels[4800:]).mean())

    unigram, bigram = held_out_accuracy((1, 1)), held_out_accuracy((1, 2))
    assert 0.75 <= unigram <= 0.95, unigram
    assert bigram >= 0.97, bigram


def test_text_exercises_non_ascii(demo_rows: list[dict[str, str]]) -> None:
    joined = "".join(row["text"] for row in demo_rows)
    for needle in ("é", "ü", "ø", "自転車", "谢谢", "€", "❤️"):
        assert needle in joined, needle
    assert any(ord(ch) > 0xFFFF for ch in joined), "no emoji outside the Basic Multilingual Plane"


def test_write_splits_sizes_and_disjoint(tmp_path: Path, demo_rows: list[dict[str, str]]) -> None:
    paths = write_splits(tmp_path / "demo")
    assert set(paths) == {"train", "valid", "test"}
    splits = {name: _read_jsonl(path) for name, path in paths.items()}
    assert [len(splits[n]) for n in ("train", "valid", "test")] == [4800, 600, 600]
    assert splits["train"] + splits["valid"] + splits["test"] == demo_rows
    seen = [{row["text"] for row in split} for split in splits.values()]
    assert not (seen[0] & seen[1] or seen[0] & seen[2] or seen[1] & seen[2])


def test_write_splits_small_n_and_files(tmp_path: Path) -> None:
    paths = write_splits(tmp_path, n=10, seed=1)
    assert [len(_read_jsonl(paths[n])) for n in ("train", "valid", "test")] == [8, 1, 1]
    raw = paths["train"].read_bytes()
    assert b"\\u" not in raw  # non-ASCII is written as UTF-8, not as JSON escapes
    assert sorted(p.name for p in tmp_path.iterdir()) == ["test.jsonl", "train.jsonl", "valid.jsonl"]


def test_write_splits_same_bytes_twice_and_overwrites(tmp_path: Path) -> None:
    first = write_splits(tmp_path / "a", n=200)
    (tmp_path / "b").mkdir()
    (tmp_path / "b" / "train.jsonl").write_text("stale\n", encoding="utf-8")
    second = write_splits(tmp_path / "b", n=200)
    for name in first:
        assert first[name].read_bytes() == second[name].read_bytes()
    assert not [p for p in (tmp_path / "b").iterdir() if p.suffix == ".tmp"]


@pytest.mark.parametrize("bad", [0, -3, 2.5, True, "100"])
def test_generate_rejects_bad_n(bad: object) -> None:
    with pytest.raises(ValueError, match="positive whole number"):
        generate(bad)  # type: ignore[arg-type]


def test_write_splits_needs_one_example_per_split(tmp_path: Path) -> None:
    with pytest.raises(ValueError, match="at least 10"):
        write_splits(tmp_path, n=9)


def test_module_says_data_is_invented() -> None:
    doc = " ".join((demo_data.__doc__ or "").lower().split())
    assert "invented" in doc
    assert "not test reference data" in doc


def test_disagreement_flips_labels_not_texts(demo_rows: list[dict[str, str]]) -> None:
    clean = generate(disagreement=0.0)
    assert [r["text"] for r in clean] == [r["text"] for r in demo_rows]
    flipped = sum(a["label"] != b["label"] for a, b in zip(clean, demo_rows, strict=True))
    # 5 % of 6,000 is 300; a binomial standard deviation is about 17.
    assert 230 <= flipped <= 370, flipped
    with pytest.raises(ValueError, match="disagreement"):
        generate(10, disagreement=1.0)
