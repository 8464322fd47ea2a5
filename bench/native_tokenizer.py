"""The Rust-backed ``tokenizers`` library against textsieve's encoder: the same tokens? faster?

    pip install --target /tmp/tokenizers-lib tokenizers==0.23.3
    PYTHONPATH=/tmp/tokenizers-lib RAYON_NUM_THREADS=1 .venv/bin/python bench/native_tokenizer.py

The library is not a dependency of textsieve; this script is how issue 15's "use a well-kept
native library where it can hold the tokenizer's spec" was checked (bench/README.md, "A native
tokenizer library"). It builds the library's closest pipeline to the spec ``textsieve-words`` v1
(registry/tokenizer.py): normalizers NFKC, ’ → ' and Lowercase (the library has no case folding),
then a ``Split`` pre-tokenizer on the spec's own pattern, its character classes spelt out code
point by code point from this Python's ``re`` (``\\w``, ``\\s``), marks (M*), format characters
(Cf) and ideograph blocks, so the two regex engines cannot disagree on what a class holds; then a
word-level vocabulary look-up with the demo model's vocabulary. It reports

- on the benchmark texts and on random strings of the tokenizer tests' hard cases
  (tests/registry/test_tokenizer.py): how many texts get other ids or other offsets, with examples;
- per text, one thread, the fastest of ``--rounds`` passes over the benchmark texts: textsieve's
  encoder (ids, and ids with offsets) and the library (that pipeline, and its cheapest built-in
  pre-tokenizer with no normaliser, a floor for any pipeline of it called from Python).
"""

from __future__ import annotations

import argparse
import random
import re
import sys
import time
import unicodedata
from collections.abc import Callable, Iterable
from pathlib import Path
from typing import Any

HERE = Path(__file__).resolve().parent
sys.path.insert(0, str(HERE))
sys.path.insert(0, str(HERE.parent))

import demo_model  # noqa: E402
from texts import bench_texts  # noqa: E402

from textsieve.registry.runtime import Predictor  # noqa: E402
from textsieve.registry.tokenizer import _CJK_RANGES  # noqa: E402

Encoding = tuple[list[int], list[tuple[int, int]]]


def _class(codepoints: Iterable[int]) -> str:
    """A regex character-class body for the library's engine (\\x{HHHH} escapes, ranges collapsed)."""
    parts: list[str] = []
    start = prev = -2
    for cp in [*sorted(codepoints), -9]:
        if cp == prev + 1:
            prev = cp
            continue
        if start >= 0:
            parts.append(f"\\x{{{start:X}}}" if start == prev else f"\\x{{{start:X}}}-\\x{{{prev:X}}}")
        start = prev = cp
    return "".join(parts)


def spec_pattern() -> str:
    """registry/tokenizer.py's full pattern (split_cjk on), every class spelt out from this Python."""
    cjk = {cp for lo, hi in _CJK_RANGES for cp in range(lo, hi + 1)}
    word, space, marks, formats = set(), set(), set(), set()
    w, s = re.compile(r"\w"), re.compile(r"\s")
    for cp in range(0x110000):
        if 0xD800 <= cp <= 0xDFFF:
            continue
        c = chr(cp)
        category = unicodedata.category(c)
        if category[0] == "M":
            marks.add(cp)
        elif category == "Cf":
            formats.add(cp)
        if w.match(c):
            word.add(cp)
        if s.match(c):
            space.add(cp)
    m = _class(marks)
    word_char = f"[{_class(word - cjk)}{m}]"
    return (
        f"{word_char}+(?:'{word_char}+)*"  # a word, inner apostrophes kept (’ is ' after the normaliser)
        f"|[{_class(cjk)}][{m}]*"  # one ideograph
        f"|[^{_class(space)}{_class(word)}{m}{_class(formats)}][{m}]*"  # any other visible character
    )


def library_pipelines(vocab: dict[str, int]) -> dict[str, Any]:
    from tokenizers import Regex, Tokenizer, normalizers, pre_tokenizers
    from tokenizers.models import WordLevel

    closest = Tokenizer(WordLevel(vocab, unk_token="<unk>"))
    closest.normalizer = normalizers.Sequence(
        [normalizers.NFKC(), normalizers.Replace("\u2019", "'"), normalizers.Lowercase()]
    )
    closest.pre_tokenizer = pre_tokenizers.Split(Regex(spec_pattern()), behavior="removed", invert=True)
    floor = Tokenizer(WordLevel(vocab, unk_token="<unk>"))
    floor.pre_tokenizer = pre_tokenizers.WhitespaceSplit()
    return {"closest": closest, "floor": floor}


def hard_texts(n: int, seed: int = 7) -> list[str]:
    from tests.registry.test_tokenizer import TRICKY, _sample

    rnd = random.Random(seed)
    pool = [*TRICKY, *_sample(), " ", "  ", "\n", "!", "Straße", "don't", "ﬁne", "ÉCOLE"]
    made = ("".join(rnd.choice(pool) for _ in range(rnd.randint(1, 12))) for _ in range(n))
    return [t for t in made if not any(0xD800 <= ord(c) <= 0xDFFF for c in t)]  # not valid in a request


def compare(name: str, texts: list[str], ours: Callable[[str], Encoding], theirs: Callable[[str], Encoding]) -> None:
    counts = {"ids": 0, "offsets": 0}
    examples: list[str] = []
    for text in texts:
        (a_ids, a_off), (b_ids, b_off) = ours(text), theirs(text)
        kind = "ids" if a_ids != b_ids else "offsets" if a_off != b_off else None
        if kind is None:
            continue
        counts[kind] += 1
        if len(examples) < 4:
            pairs = zip(a_ids, b_ids, strict=False) if kind == "ids" else zip(a_off, b_off, strict=False)
            at = next((i for i, (x, y) in enumerate(pairs) if x != y), min(len(a_off), len(b_off)))
            lo = (a_off if at < len(a_off) else b_off)[at][0]
            examples.append(
                f"    {kind} differ at {text[lo : lo + 6]!r}: textsieve {a_ids[at : at + 3]} at {a_off[at : at + 3]}, "
                f"library {b_ids[at : at + 3]} at {b_off[at : at + 3]}"
            )
    print(f"{name}: {len(texts):,} texts; other ids on {counts['ids']:,}, same ids but other offsets on ", end="")
    print(f"{counts['offsets']:,}")
    print("\n".join(examples))


def per_text(fn: Callable[[], object], n: int, rounds: int) -> float:
    best = float("inf")
    for _ in range(rounds):
        t0 = time.perf_counter()
        fn()
        best = min(best, time.perf_counter() - t0)
    return best / n * 1e6


def main() -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--texts", type=int, default=8192, help="benchmark texts")
    parser.add_argument("--hard", type=int, default=20000, help="random hard-case texts")
    parser.add_argument("--rounds", type=int, default=5)
    args = parser.parse_args()
    try:
        import tokenizers
    except ImportError:
        print("bench/native_tokenizer.py: the tokenizers library is not importable; see this script's docstring")
        return 2
    p = Predictor.from_bundle(demo_model.ensure_model(lambda *a: None).bundle, threads=1)
    pipes = library_pipelines(p.vocab.index)
    closest = pipes["closest"]
    print(f"tokenizers {tokenizers.__version__}; textsieve-words v1 on Unicode {unicodedata.unidata_version}")

    def ours(text: str) -> Encoding:
        ids, starts, ends = p.encoder(text)  # untruncated, as the library's
        return ids, list(zip(starts, ends, strict=True))

    def theirs(text: str) -> Encoding:
        e = closest.encode(text, add_special_tokens=False)
        return e.ids, [tuple(o) for o in e.offsets]

    texts = bench_texts(args.texts)
    compare("benchmark texts", texts, ours, theirs)
    compare("hard-case texts", hard_texts(args.hard), ours, theirs)
    n = len(texts)
    for t in texts:  # both warm: the encoder's chunk cache filled, the library's regex compiled
        p.encode(t)
        closest.encode(t, add_special_tokens=False)
    floor = pipes["floor"]
    rows = [
        ("textsieve encoder, ids", lambda: [p.encode(t, offsets=False) for t in texts]),
        ("textsieve encoder, ids and offsets", lambda: [p.encode(t) for t in texts]),
        ("library, closest pipeline, ids", lambda: [closest.encode(t, add_special_tokens=False).ids for t in texts]),
        (
            "library, closest pipeline, ids and offsets",
            lambda: [(e.ids, e.offsets) for e in map(lambda t: closest.encode(t, add_special_tokens=False), texts)],
        ),
        ("library, whitespace split only, ids (its floor)", lambda: [floor.encode(t).ids for t in texts]),
    ]
    print(f"\nµs a text, one thread, fastest of {args.rounds} passes over {n:,} benchmark texts")
    for name, fn in rows:
        print(f"  {name:<50} {per_text(fn, n, args.rounds):6.2f}")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
