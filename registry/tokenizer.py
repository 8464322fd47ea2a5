"""The tokenizer and vocabulary shared by the exporter and the service.

Tokens are found in the text exactly as sent, so their character offsets always index the
caller's string; normalisation (NFKC, case folding, one apostrophe) is applied to each token
afterwards, only to look it up in the vocabulary. That is what lets a span's
``text[start:end]`` equal what the caller sent, whatever Unicode it contains.
"""

from __future__ import annotations

import functools
import itertools
import re
import unicodedata
import warnings
from collections import Counter
from collections.abc import Callable, Iterable
from dataclasses import dataclass
from pathlib import Path
from typing import Literal

from pydantic import BaseModel, ConfigDict

from textsieve.errors import BundleError
from textsieve.printable import category_runs

# The rules a text to classify obeys live below every side (textsieve/texts.py); named here too.
from textsieve.texts import has_no_tokens, nothing_to_classify, text_refusal

PAD = "<pad>"
UNK = "<unk>"

# CJK ideographs are written without spaces; one token per ideograph is common practice
# (it is what Devlin et al., 2019, BERT's basic tokenizer does).
_CJK_RANGES = (
    (0x3400, 0x4DBF),
    (0x4E00, 0x9FFF),
    (0xF900, 0xFAFF),
    (0x20000, 0x2A6DF),
    (0x2A700, 0x2EBEF),
    (0x2F800, 0x2FA1F),
    (0x30000, 0x3134F),
)


class TokenizerSpec(BaseModel):
    """What the manifest records so both sides tokenize identically."""

    model_config = ConfigDict(extra="forbid", frozen=True)

    scheme: Literal["textsieve-words"] = "textsieve-words"
    version: Literal[1] = 1
    normalization: Literal["NFKC"] = "NFKC"
    case: Literal["casefold", "keep"] = "casefold"
    split_cjk: bool = True
    unicode_version: str = unicodedata.unidata_version


def _class_body(pairs: Iterable[tuple[int, int]]) -> str:
    """(first, last) runs as a regex character-class body."""
    return "".join(_class_range(lo, hi) for lo, hi in pairs)


def _class_range(lo: int, hi: int) -> str:
    return re.escape(chr(lo)) if lo == hi else f"{re.escape(chr(lo))}-{re.escape(chr(hi))}"


_MARK_AND_FORMAT_CATEGORIES = frozenset(("Mn", "Mc", "Me", "Cf"))


def scan_marks_and_formats() -> tuple[list[tuple[int, int]], list[tuple[int, int]]]:
    """Every combining mark (category M*) and every format character (Cf) of this Python's Unicode
    database, as runs: one scan of all 1,114,112 code points (textsieve/printable.py, which the names'
    rule shares), the three mark categories' runs joined where they meet."""
    marks: list[tuple[int, int]] = []
    formats: list[tuple[int, int]] = []
    for first, last, category in category_runs(_MARK_AND_FORMAT_CATEGORIES):
        pairs = formats if category == "Cf" else marks
        if pairs and pairs[-1][1] == first - 1:
            pairs[-1] = (pairs[-1][0], last)
        else:
            pairs.append((first, last))
    return marks, formats


@functools.cache
def _marks_and_formats() -> tuple[str, str]:
    """Character-class bodies of every combining mark and every format character. Read from
    registry/_unicode_tables.py when it was made from this Python's Unicode version (the tests
    scan again and compare); otherwise scanned, once a process (the fork servers do it before they
    fork: textsieve/registry/prewarm.py)."""
    from textsieve.registry import _unicode_tables as tables

    if tables.UNICODE_VERSION == unicodedata.unidata_version:
        return _class_body(tables.MARKS), _class_body(tables.FORMATS)
    marks, formats = scan_marks_and_formats()
    return _class_body(marks), _class_body(formats)


@functools.cache
def _pattern(split_cjk: bool) -> re.Pattern[str]:
    m, cf = _marks_and_formats()
    cjk = _class_body(_CJK_RANGES) if split_cjk else ""
    # A word: letters/digits/underscore (minus ideographs) with any combining marks, and
    # inner apostrophes so that "don't" stays one token.
    word_char = f"(?:[^\\W{cjk}]|[{m}])" if cjk else f"(?:\\w|[{m}])"
    word = f"{word_char}+(?:['\u2019]{word_char}+)*"
    ideograph = f"[{cjk}][{m}]*" if cjk else None
    # Anything else visible is a one-character token (punctuation, emoji) with its marks;
    # whitespace and invisible format characters (zero-width space, joiners, bidi controls)
    # separate tokens and never become one.
    symbol = f"[^\\s\\w{m}{cf}][{m}]*"
    alternatives = [word] + ([ideograph] if ideograph else []) + [symbol]
    return re.compile("|".join(alternatives))


# On text without combining marks, format characters or ideographs the full pattern reduces
# to this one, which the regex engine runs several times faster; tests check that both give
# the same tokens and offsets. The quantifiers are possessive (no backtracking): giving back
# a word character could never let an apostrophe or the end of a word match, so the matches
# are the same, found with less bookkeeping.
_SIMPLE = re.compile("\\w++(?:['\u2019]\\w++)*+|[^\\s\\w]")


def _capturing(pattern: re.Pattern[str]) -> re.Pattern[str]:
    """``pattern`` as one capturing group, so that its ``split`` alternates gap, token, gap, ….

    ``re.split`` then finds every token in one call at C speed, and the pieces' lengths add up to
    the offsets; no Python runs per token. The pattern must not capture anything itself, or its
    groups would appear among the pieces.
    """
    if pattern.groups:
        raise ValueError(f"a token pattern must have no capturing groups, this one has {pattern.groups}")
    return re.compile(f"({pattern.pattern})", pattern.flags)


# A capturing pattern's bound ``split``: text → [gap, token, gap, token, …, gap].
_Split = Callable[[str], list[str]]
_SIMPLE_SPLIT: _Split = _capturing(_SIMPLE).split


_NON_ASCII = re.compile("[^\x00-\x7f]")
_WORD = re.compile("\\w")
_SPACE = re.compile("\\s")


# Characters canonical composition can join onto the character before them are the second
# halves of two-part canonical decompositions (how Unicode's NFC_Quick_Check=Maybe set is
# built). All of them are combining marks (category M or a non-zero combining class), which
# _Route already sends to the full pattern, except the Hangul vowel and final jamo, which
# compose algorithmically; tests/registry/test_tokenizer.py checks this against this Python's tables.
HANGUL_COMPOSING = frozenset(chr(cp) for cp in (*range(0x1161, 0x1176), *range(0x11A8, 0x11C3)))


@functools.cache
def _cjk_simple() -> re.Pattern[str]:
    """The full pattern for text with ideographs but no combining marks or format characters."""
    cjk = _class_body(_CJK_RANGES)
    word = f"[^\\W{cjk}]++(?:['\u2019][^\\W{cjk}]++)*+"
    return re.compile(f"{word}|[{cjk}]|[^\\s\\w]")


@functools.cache
def _cjk_simple_split() -> _Split:
    return _capturing(_cjk_simple()).split


@functools.cache
def _full_split(split_cjk: bool) -> _Split:
    return _capturing(_pattern(split_cjk)).split


class _Route:
    """How :meth:`Tokenizer.split` may handle a non-ASCII text, decided per character.

    Per character (cached; a text has few distinct non-ASCII characters) three facts:
    - ``full``: a combining mark, format character, or a character that canonical
      composition can join onto its neighbour. Such text takes the full pattern.
    - ``cjk``: an ideograph (when ideographs are split); the pattern then needs the ideograph
      alternative, which is cheap without the mark classes.
    - ``fold``: unchanged by NFKC and case-folds to exactly one character of the same kind
      (word character, space or other). When every character folds like this, folding the
      whole text and matching once gives the same tokens and offsets as matching first and
      normalising each token; otherwise each token is normalised. Tests hold every route
      equal to the full pattern.
    """

    def __init__(self, split_cjk: bool, fold: bool) -> None:
        self.split_cjk = split_cjk
        self.fold = fold
        # Each character seen is in ``seen`` and in the sets of the facts that hold for it; a
        # text's route is then a few set operations on its distinct non-ASCII characters. A
        # character joins ``seen`` last, so another thread never finds it with facts missing.
        self.seen: set[str] = set()
        self.full: set[str] = set()
        self.cjk: set[str] = set()
        self.unfolding: set[str] = set()

    def __call__(self, text: str) -> tuple[_Split, bool] | None:
        """(the pattern's split, fold the whole text first), or None for the full pattern."""
        chars = set(_NON_ASCII.findall(text))
        if not chars <= self.seen:
            self._learn(chars - self.seen)
        if not chars.isdisjoint(self.full):
            return None
        split = _SIMPLE_SPLIT if chars.isdisjoint(self.cjk) else _cjk_simple_split()
        return split, chars.isdisjoint(self.unfolding)

    def _learn(self, chars: set[str]) -> None:
        for c in chars:
            full, cjk, fold = self._facts(c)
            if full:
                self.full.add(c)
            if cjk:
                self.cjk.add(c)
            if not fold:
                self.unfolding.add(c)
            self.seen.add(c)

    def _facts(self, c: str) -> tuple[bool, bool, bool]:
        cp = ord(c)
        cat = unicodedata.category(c)
        full = cat[0] == "M" or cat == "Cf" or bool(unicodedata.combining(c)) or c in HANGUL_COMPOSING
        cjk = self.split_cjk and any(lo <= cp <= hi for lo, hi in _CJK_RANGES)
        folded = c.casefold() if self.fold else c
        fold = (
            unicodedata.normalize("NFKC", c) == c
            and len(folded) == 1
            and bool(_WORD.match(c)) == bool(_WORD.match(folded))
            and bool(_SPACE.match(c)) == bool(_SPACE.match(folded))
        )
        return full, cjk, fold


@dataclass(frozen=True, slots=True)
class Token:
    """One token: its normalised form and its character offsets into the original text."""

    norm: str
    start: int
    end: int


class UnicodeVersionWarning(UserWarning):
    """A tokenizer spec recorded another Unicode version than the running Python's tables."""


def _check_unicode_version(spec: TokenizerSpec) -> None:
    """Warn, not refuse: see README, "The bundle". The texts it affects are rare; refusing would
    make every Python upgrade a re-export of every model."""
    if spec.unicode_version == unicodedata.unidata_version:
        return
    # Python shows a warning once per place and text, so a process says this once per pair of
    # versions, however many bundles it loads (the service: once in each worker process).
    warnings.warn(
        UnicodeVersionWarning(
            f"this tokenizer spec was recorded with Unicode {spec.unicode_version}, but this Python's "
            f"tables are Unicode {unicodedata.unidata_version}: characters assigned or changed between "
            "the two can split differently (the token pattern's letter, mark and format-character "
            "classes) and normalise differently (NFKC, case folding), so a text that contains them may "
            "score differently from training; plain text of both versions tokenizes the same"
        ),
        stacklevel=3,
    )


class Tokenizer:
    """Splits text into tokens with offsets, as described by a :class:`TokenizerSpec`."""

    def __init__(self, spec: TokenizerSpec | None = None) -> None:
        self.spec = spec or TokenizerSpec()
        _check_unicode_version(self.spec)
        self._finditer = _pattern(self.spec.split_cjk).finditer
        self._full_split = _full_split(self.spec.split_cjk)
        self._fold = self.spec.case == "casefold"
        self._route = _Route(self.spec.split_cjk, self._fold)

    def normalize(self, piece: str) -> str:
        if not piece.isascii():
            piece = unicodedata.normalize("NFKC", piece).replace("\u2019", "'")
        return piece.casefold() if self._fold else piece

    def tokenize(self, text: str) -> list[Token]:
        norm = self.normalize
        return [Token(norm(m.group()), m.start(), m.end()) for m in self._finditer(text)]

    def split(self, text: str) -> tuple[list[str], list[tuple[int, int]]]:
        """Normalised tokens and their (start, end) offsets, as two parallel lists."""
        tokens, starts, ends = self.bounds(text)
        return tokens, list(zip(starts, ends, strict=True))

    def bounds(self, text: str) -> tuple[list[str], list[int], list[int]]:
        """Normalised tokens, their start offsets and their end offsets, as three parallel lists.

        What :meth:`split` gives, without a tuple per token. Each route splits the text with a
        capturing pattern (gap, token, gap, …, see :func:`_capturing`), so finding the tokens and
        adding up their offsets runs at C speed; Python runs per token only where a token needs
        normalising on its own.
        """
        whole = self.fold_whole(text)
        if whole is not None:
            pieces = whole[1](whole[0])
            tokens = pieces[1::2]
        else:
            route = self._route(text)
            pieces = (self._full_split if route is None else route[0])(text)
            tokens = self._normalize_each(pieces[1::2], text)
        # Running sums of the pieces' lengths: even entries are where tokens start, odd ones where
        # they end, the last is the text's length.
        edges = list(itertools.accumulate(map(len, pieces)))
        return tokens, edges[0:-1:2], edges[1::2]

    def _normalize_each(self, tokens: list[str], text: str) -> list[str]:
        """``[self.normalize(t) for t in tokens]``, normalising all of them in one go.

        Tokens joined by U+0000 normalise as they would one by one: NFKC never composes,
        reorders or decomposes across it (a starter that is no part of any composition or
        decomposition, UAX #15), case folding and the apostrophe map one character at a time.
        A text that contains U+0000 itself (a token of its own) takes the per-token way.
        """
        if not tokens or "\x00" in text:  # no tokens: the join would give one empty one
            return list(map(self.normalize, tokens))
        joined = unicodedata.normalize("NFKC", "\x00".join(tokens)).replace("\u2019", "'")
        return (joined.casefold() if self._fold else joined).split("\x00")

    def chunk_split(self, text: str) -> _Split:
        """The split that finds ``text``'s tokens chunk by chunk.

        Every route's pattern (the full one included: a word is word characters and marks, a
        symbol excludes whitespace) never matches a space and looks neither behind nor ahead, so
        the tokens of a text are those of its space-separated chunks, in order, each normalised
        on its own (:meth:`normalize`), at the same offsets.
        """
        if text.isascii():
            return _SIMPLE_SPLIT
        route = self._route(text)
        return self._full_split if route is None else route[0]

    def fold_whole(self, text: str) -> tuple[str, _Split] | None:
        """The text normalised whole, and the split that finds its tokens, when that is exact.

        ASCII case folding keeps every character in place, and so does every character of a text
        that :class:`_Route` lets fold whole: then the tokens are exactly the pattern's matches on
        the normalised text, already normalised, at the same offsets. None for texts whose tokens
        must be found first and normalised one by one.
        """
        if text.isascii():
            return (text.lower() if self._fold else text), _SIMPLE_SPLIT
        route = self._route(text)
        if route is None or not route[1]:
            return None
        return (text.casefold() if self._fold else text).replace("\u2019", "'"), route[0]

    def split_slow(self, text: str) -> tuple[list[str], list[tuple[int, int]]]:
        """:meth:`split` with the full pattern only; the reference its fast paths are tested against."""
        tokens = self.tokenize(text)
        return [t.norm for t in tokens], [(t.start, t.end) for t in tokens]


class Vocabulary:
    """Token ↔ id mapping; id 0 is padding, id 1 the unknown token."""

    pad_id = 0
    unk_id = 1

    def __init__(self, tokens: list[str]) -> None:
        if len(tokens) < 2 or tokens[0] != PAD or tokens[1] != UNK:
            raise BundleError(f"vocabulary must start with {PAD!r} and {UNK!r}")
        self.tokens = tokens
        self.index = {tok: i for i, tok in enumerate(tokens)}
        if len(self.index) != len(tokens):
            raise BundleError("vocabulary has duplicate tokens")

    def __len__(self) -> int:
        return len(self.tokens)

    @classmethod
    def build(cls, counts: Counter[str], *, min_count: int = 1, max_size: int | None = None) -> Vocabulary:
        """Most frequent first, ties broken alphabetically, so the result is deterministic."""
        kept = sorted(
            (t for t, c in counts.items() if c >= min_count and t not in (PAD, UNK)), key=lambda t: (-counts[t], t)
        )
        if max_size is not None:
            kept = kept[: max(max_size - 2, 0)]
        return cls([PAD, UNK, *kept])

    def encode(self, tokens: Iterable[str]) -> list[int]:
        return list(map(self.index.get, tokens, itertools.repeat(self.unk_id)))

    def dumps(self) -> str:
        return "".join(t + "\n" for t in self.tokens)

    @classmethod
    def load(cls, path: Path) -> Vocabulary:
        text = path.read_text(encoding="utf-8")
        tokens = text.split("\n")
        if tokens and tokens[-1] == "":
            tokens.pop()
        return cls(tokens)


__all__ = [
    "PAD",
    "UNK",
    "Token",
    "Tokenizer",
    "TokenizerSpec",
    "UnicodeVersionWarning",
    "Vocabulary",
    "has_no_tokens",
    "nothing_to_classify",
    "text_refusal",
]
