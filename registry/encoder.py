"""Text → vocabulary ids and character offsets: the tokenizer and vocabulary at serving speed.

Every served text passes through here while holding the GIL, so this is the Python that the
inference threads take turns on. Most texts (ASCII, or plain Unicode that folds in place, see
:meth:`Tokenizer.fold_whole`) are normalised whole, and their tokens are then the token
pattern's matches on the normalised text. Those matches never contain the space character and
the pattern looks neither behind nor ahead, so the text's tokens are the tokens of its
space-separated chunks, in order: ``"hi team, the app"`` → ``hi`` · ``team,`` → ``team`` ``,`` ·
``the`` · ``app``. A chunk's tokens, as vocabulary ids with the lengths of each token and of
the gap before it, are cached (a word seen once is usually seen again), so a text costs one
``str.split``, one dictionary look-up per chunk and a few passes over plain lists, all at C
speed, instead of a regular-expression scan. Chunks not yet cached are tokenized with the
same pattern; texts with a route that normalises token by token go through
:meth:`Tokenizer.bounds`. Tests hold the result equal to the reference tokenizer's.
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
# A chunk whose tokens cannot be chained with the next chunk's: empty (two spaces in a row) or
# ending in other whitespace, which would have to join the next chunk's first gap. Any value
# that is not iterable makes the fast path fall back, as an uncached chunk (None) does.
_IRREGULAR = 0

Split = Callable[[str], list[str]]  # a capturing pattern's split: gap, token, gap, …, gap
Entry = tuple[int, ...] | int


class Encoder:
    """Ids and offsets for the tokens of a text, as :meth:`Tokenizer.bounds` finds them."""

    def __init__(self, tokenizer: Tokenizer, vocab: Vocabulary, *, capacity: int = CAPACITY) -> None:
        self.tokenizer = tokenizer
        self.vocab = vocab
        self.capacity = capacity
        # One cache per split function (the pattern with or without ideographs): chunk → flat
        # tuple (id, gap before, token length) per token, the gap counting the space before it.
        self._caches: dict[Split, dict[str, Entry]] = {}

    def __call__(self, text: str) -> tuple[list[int], list[int], list[int]]:
        """Every token's id, start and end (no truncation)."""
        whole = self.tokenizer.fold_whole(text)
        if whole is not None:
            folded, split = whole
            cache = self._caches.get(split)
            if cache is None:
                cache = self._caches.setdefault(split, {})
            chunks = folded.split(" ")
            entries = list(map(cache.get, chunks))
            flat: list[int] | None
            try:
                flat = list(chain.from_iterable(entries))  # type: ignore[arg-type]
            except TypeError:  # a chunk not cached yet, or an irregular one
                flat = self._learn(cache, split, chunks, entries)
            if flat is not None:
                ids = flat[0::3]
                del flat[0::3]  # leaves gap, token, gap, token, …
                # Every chunk's first gap counts a space before it; the first chunk has none.
                edges = list(accumulate(flat, initial=-1))
                return ids, edges[1::2], edges[2::2]
            # What Tokenizer.bounds does with a text folded whole, without folding it again.
            pieces = split(folded)
            edges = list(accumulate(map(len, pieces)))
            return self.vocab.encode(pieces[1::2]), edges[0:-1:2], edges[1::2]
        tokens, starts, ends = self.tokenizer.bounds(text)
        return self.vocab.encode(tokens), starts, ends

    def _learn(
        self,
        cache: dict[str, Entry],
        split: Split,
        chunks: list[str],
        entries: list[Entry | None],
    ) -> list[int] | None:
        """Tokenize and cache the chunks not cached yet; None when a chunk is irregular."""
        get = self.vocab.index.get
        unk = self.vocab.unk_id
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
                if chunk.isascii() and chunk.isalnum():
                    # Letters and digits only: one word under either pattern (no ideographs).
                    entry = (get(chunk, unk), 1, len(chunk))
                else:
                    entry = self._tokenize(split, chunk, get, unk)
                if len(cache) >= self.capacity:
                    cache.clear()
                cache[chunk] = entries[i] = entry
            if entry is _IRREGULAR:
                return None
        return list(chain.from_iterable(entries))  # type: ignore[arg-type]

    @staticmethod
    def _tokenize(split: Split, chunk: str, get: Callable[[str, int], int], unk: int) -> Entry:
        pieces = split(" " + chunk)
        if pieces[-1]:  # also a chunk without tokens: its only piece is a gap
            return _IRREGULAR
        entry: list[int] = []
        for k in range(1, len(pieces), 2):
            token = pieces[k]
            entry += (get(token, unk), len(pieces[k - 1]), len(token))
        return tuple(entry)


__all__ = ["CAPACITY", "LEARN_PER_TEXT", "MAX_CHUNK_CHARS", "Encoder"]
