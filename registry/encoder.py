"""Text → vocabulary ids and character offsets: the tokenizer and vocabulary at serving speed.

Every served text passes through here while holding the GIL, so this is the Python that the
inference threads take turns on. The token patterns of every route (see
:meth:`Tokenizer.chunk_split`) never match the space character and look neither behind nor
ahead, so a text's tokens are the tokens of its space-separated chunks, in order, each token
normalised on its own as the spec says: ``"Hi team, the app"`` → ``Hi`` · ``team,`` → ``team``
``,`` · ``the`` · ``app`` → ``hi`` ``team`` ``,`` ``the`` ``app``. A chunk's tokens, as
vocabulary ids with the lengths of each token and of the gap before it, are cached (a word seen
once is usually seen again), so a text costs one ``str.split``, one dictionary look-up per chunk
and a few passes over plain lists, all at C speed, instead of a regular-expression scan and a
normalisation. Characters after a chunk's last token (a newline, a dash on its own, the empty
chunk between two spaces) are cached as a gap with no token (id ``_GAP``), dropped from the
result. Chunks not cached yet are tokenized with the text's route's pattern (one cache per
pattern); texts with too many new chunks or a chunk too long to cache go through
:meth:`Tokenizer.bounds`.
Tests hold the result equal to the reference tokenizer's.
"""

from __future__ import annotations

from collections.abc import Callable
from itertools import accumulate, chain

from textsieve.registry.tokenizer import Tokenizer, Vocabulary

# Chunks cached per pattern before the cache starts over: a few MB at most (a chunk's entry is
# its string and a tuple of small ints), far more chunks than a language's common words.
CAPACITY = 1 << 14
# New chunks a text adds to the cache at most when it holds more than that many.
LEARN_PER_TEXT = 4
# Longer chunks are never cached, so the cache's memory stays bounded (CAPACITY × this many
# characters, a few MB) whatever a caller sends: a text of long unbroken chunks takes bounds.
MAX_CHUNK_CHARS = 40
# The id of a gap with no token: what follows a chunk's last token (or a whole chunk without
# tokens), carried as a token of length 0 so the next chunk's offsets still add up.
_GAP = -1

Split = Callable[[str], list[str]]  # a capturing pattern's split: gap, token, gap, …, gap
Entry = tuple[int, ...]
# A text's tokens' gaps before them and lengths, flat (gap, length, gap, length, …), none of them
# a gap without a token: what its offsets are found from when read (:func:`offsets`,
# :func:`span_bounds`).
Layout = list[int]


class Encoder:
    """Ids and offsets for the tokens of a text, as :meth:`Tokenizer.bounds` finds them."""

    def __init__(self, tokenizer: Tokenizer, vocab: Vocabulary, *, capacity: int = CAPACITY) -> None:
        self.tokenizer = tokenizer
        self.vocab = vocab
        self.capacity = capacity
        # One cache per split function (the pattern with or without ideographs): chunk → flat
        # tuple (id, gap before, token length) per token, the gap counting the space before it.
        self._caches: dict[Split, dict[str, Entry]] = {}

    def _flat(self, text: str) -> list[int] | None:
        """(id, gap before, length) of every token and trailing gap of every chunk, one flat list;
        None when the text should take :meth:`Tokenizer.bounds` instead."""
        split = self.tokenizer.chunk_split(text)
        cache = self._caches.get(split)
        if cache is None:
            cache = self._caches.setdefault(split, {})
        chunks = text.split(" ")
        entries = list(map(cache.get, chunks))
        try:
            return list(chain.from_iterable(entries))  # type: ignore[arg-type]
        except TypeError:  # a chunk not cached yet
            return self._learn(cache, split, chunks, entries)

    def ids(self, text: str) -> list[int]:
        """Every token's id (no truncation): :meth:`__call__` without the offsets, which only spans
        use; about 30 % less work a text (bench/README.md, "Encoding without offsets")."""
        flat = self._flat(text)
        if flat is None:
            return self.vocab.encode(self.tokenizer.bounds(text)[0])
        ids = flat[0::3]
        if _GAP in ids:
            ids = [i for i in ids if i != _GAP]
        return ids

    def __call__(self, text: str) -> tuple[list[int], list[int], list[int]]:
        """Every token's id, start and end (no truncation)."""
        flat = self._flat(text)
        if flat is not None:
            return _eager(flat)
        # Too many new chunks, or a chunk too long to cache: the whole text at once.
        tokens, starts, ends = self.tokenizer.bounds(text)
        return self.vocab.encode(tokens), starts, ends

    def layout(self, text: str) -> tuple[list[int], Layout | None, list[int] | None, list[int] | None]:
        """:meth:`__call__` with the offsets left to be found when read: every token's id and either
        its layout (the gaps and lengths :func:`offsets` and :func:`span_bounds` read; the
        offsets None) or, where there is no such layout, the offsets themselves (layout None).

        A span needs two offsets of its text, and a text gets a few spans (1.4 on average on the
        benchmark's texts with 3 asked for): summing slices of the layout for those (C-level sums
        of small ints) costs far less than every token's offsets as Python ints (bench/README.md,
        "What spans cost in a worker")."""
        flat = self._flat(text)
        if flat is None:
            tokens, starts, ends = self.tokenizer.bounds(text)
            return self.vocab.encode(tokens), None, starts, ends
        ids = flat[0::3]
        if _GAP in ids:  # gaps with no token shift the indices: the offsets now (few texts)
            ids, starts, ends = _eager(flat)
            return ids, None, starts, ends
        del flat[0::3]  # leaves gap, token, gap, token, …
        return ids, flat, None, None

    def _learn(
        self,
        cache: dict[str, Entry],
        split: Split,
        chunks: list[str],
        entries: list[Entry | None],
    ) -> list[int] | None:
        """Tokenize and cache the chunks not cached yet; None when the text should take bounds."""
        # Learning a chunk costs more than its share of Tokenizer.bounds; a text of mostly new
        # chunks learns a few of them and takes bounds, so it costs about what it did before
        # the cache, and a word that recurs is learnt within a few texts.
        budget = LEARN_PER_TEXT if entries.count(None) > LEARN_PER_TEXT else len(entries)
        for i, entry in enumerate(entries):
            if entry is None:
                if not budget:
                    return None
                budget -= 1
                chunk = chunks[i]
                if len(chunk) > MAX_CHUNK_CHARS:
                    return None
                entry = self._tokenize(split, chunk)
                if len(cache) >= self.capacity:
                    cache.clear()
                cache[chunk] = entries[i] = entry
        return list(chain.from_iterable(entries))  # type: ignore[arg-type]

    def _tokenize(self, split: Split, chunk: str) -> Entry:
        """(id, gap before, length) per token of `` chunk``, then any gap after its last token."""
        get, unk = self.vocab.index.get, self.vocab.unk_id
        if chunk.isascii() and chunk.isalnum():
            # Letters and digits only: one word under any route, normalised by case alone.
            return (get(self.tokenizer.normalize(chunk), unk), 1, len(chunk))
        pieces = split(" " + chunk)  # gap, token, gap, …, gap (a chunk without tokens: one gap)
        tokens = pieces[1::2]
        entry: list[int] = []
        gaps = pieces[0:-1:2]  # the gap before each token
        for gap, token, norm in zip(gaps, tokens, map(self.tokenizer.normalize, tokens), strict=True):
            entry += (get(norm, unk), len(gap), len(token))
        if pieces[-1]:
            entry += (_GAP, len(pieces[-1]), 0)
        return tuple(entry)


def _eager(flat: list[int]) -> tuple[list[int], list[int], list[int]]:
    """Ids, starts and ends from a text's (id, gap, length) triples (which it takes apart)."""
    ids = flat[0::3]
    del flat[0::3]  # leaves gap, token, gap, token, …
    # Every chunk's first gap counts a space before it; the first chunk has none.
    edges = list(accumulate(flat, initial=-1))
    starts, ends = edges[1::2], edges[2::2]
    if _GAP in ids:  # few per text, at chunk ends: deleted one by one at C speed
        k = ids.index(_GAP)
        while True:
            del ids[k], starts[k], ends[k]
            try:
                k = ids.index(_GAP, k)
            except ValueError:
                break
    return ids, starts, ends


def offsets(layout: Layout) -> tuple[list[int], list[int]]:
    """Every token's start and end from :meth:`Encoder.layout`'s gaps and lengths."""
    # Every chunk's first gap counts a space before it; the first chunk has none.
    edges = list(accumulate(layout, initial=-1))
    return edges[1::2], edges[2::2]


def span_bounds(layout: Layout, first: int, end: int) -> tuple[int, int]:
    """The characters tokens ``first`` … ``end − 1`` cover: ``offsets(layout)``'s
    ``starts[first]`` and ``ends[end − 1]``, as two sums of the gaps and lengths before them (C
    sums of small ints, no list of every token's offsets).

    Token i's gap before it and length are ``layout[2i]`` and ``layout[2i + 1]``; the text's first
    gap counts a space that is not there, hence the −1, as in :func:`offsets`."""
    start = sum(layout[: 2 * first + 1]) - 1
    return start, start + sum(layout[2 * first + 1 : 2 * end])


__all__ = ["CAPACITY", "LEARN_PER_TEXT", "MAX_CHUNK_CHARS", "Encoder", "Layout", "offsets", "span_bounds"]
