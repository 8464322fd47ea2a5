"""Encoder: the serving path's ids and offsets equal the reference tokenizer's, cached or not.

The reference is ``Tokenizer.split_slow`` (the full token pattern, each token normalised on its
own: the spec in registry/tokenizer.py) followed by ``Vocabulary.encode``. The encoder caches
the tokens of space-separated chunks, so each case runs cold and warm, with a cache large
enough to keep everything and with one that starts over every few chunks.
"""

from __future__ import annotations

from pathlib import Path

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from tests.registry.test_tokenizer import TRICKY
from textsieve.registry.encoder import LEARN_PER_TEXT, MAX_CHUNK_CHARS, Encoder, offsets, span_bounds
from textsieve.registry.tokenizer import PAD, UNK, Tokenizer, TokenizerSpec, Vocabulary

CASEFOLD = Tokenizer()
KEEP = Tokenizer(TokenizerSpec(case="keep", split_cjk=False))
WORDS = ["team", "the", "app", ",", ".", "don't", "café", "東", "straße", "strasse", "ß", "ok", "!", "i̇stanbul"]


def _vocab() -> Vocabulary:
    return Vocabulary([PAD, UNK, *WORDS])


def _reference(tok: Tokenizer, vocab: Vocabulary, text: str) -> tuple[list[int], list[int], list[int]]:
    tokens, offsets = tok.split_slow(text)
    return vocab.encode(tokens), [s for s, _ in offsets], [e for _, e in offsets]


def _texts() -> st.SearchStrategy[str]:
    # Words the vocabulary knows, the tokenizer's hard characters, and every kind of gap:
    # single and double spaces, newlines, tabs, no-break spaces, leading and trailing ones.
    pieces = st.one_of(
        st.sampled_from(WORDS + [w.upper() for w in WORDS] + TRICKY),
        st.text(max_size=6),
        st.sampled_from([" ", " ", " ", "  ", "\n", "\t", "\u00a0", ",", "'", "\u2019"]),
    )
    return st.lists(pieces, max_size=24).map("".join)


@pytest.mark.parametrize("tok", [CASEFOLD, KEEP], ids=["casefold", "case kept"])
@pytest.mark.parametrize("capacity", [1 << 14, 3], ids=["cache keeps all", "cache starts over"])
@settings(max_examples=300, deadline=None)
@given(texts=st.lists(_texts(), min_size=1, max_size=6))
def test_ids_and_offsets_equal_the_reference_cold_and_warm(tok: Tokenizer, capacity: int, texts: list[str]) -> None:
    vocab = _vocab()
    encoder = Encoder(tok, vocab, capacity=capacity)
    ids_only = Encoder(tok, vocab, capacity=capacity)  # its own cache: ids() learns chunks too
    for _ in range(2):  # the second pass finds the chunks cached
        for text in texts:
            reference = _reference(tok, vocab, text)
            assert encoder(text) == reference, text
            assert ids_only.ids(text) == reference[0], text


def _check_layout(encoder: Encoder, reference: tuple[list[int], list[int], list[int]], text: str) -> None:
    """``Encoder.layout`` gives the reference's ids, and its offsets (all, or a span's two) when read."""
    ids, layout, starts, ends = encoder.layout(text)
    assert ids == reference[0], text
    if layout is None:  # a gap without a token, or the whole text through bounds: found now
        assert (starts, ends) == reference[1:], text
        return
    assert starts is None and ends is None
    assert offsets(layout) == reference[1:], text
    for first in range(len(ids)):
        for end in range(first + 1, len(ids) + 1):
            assert span_bounds(layout, first, end) == (reference[1][first], reference[2][end - 1]), (text, first, end)


@pytest.mark.parametrize("tok", [CASEFOLD, KEEP], ids=["casefold", "case kept"])
@settings(max_examples=300, deadline=None)
@given(texts=st.lists(_texts(), min_size=1, max_size=6))
def test_the_layout_gives_the_reference_offsets_and_span_bounds(tok: Tokenizer, texts: list[str]) -> None:
    vocab = _vocab()
    encoder = Encoder(tok, vocab)
    for _ in range(2):  # cold, then cached
        for text in texts:
            _check_layout(encoder, _reference(tok, vocab, text), text)


@pytest.mark.parametrize(
    ("text", "kept"),
    [
        pytest.param("Hi team, the app.", True, id="ASCII: layout kept"),
        pytest.param("İstanbul ﬁ e\u0301 ok DON’T", True, id="tokens normalised one by one: layout kept"),
        pytest.param("team 東京 ok", True, id="ideographs: layout kept"),
        pytest.param("a\U0001f44d\U0001f3fd b \u05e9\u05dc\u05d5\u05dd, ok", True, id="astral and RTL: layout kept"),
        pytest.param("team\n ok", False, id="a chunk ending in a newline: offsets now"),
        pytest.param("Hi  team", False, id="two spaces: offsets now"),
        pytest.param("", False, id="empty: one gap without a token"),
    ],
)
def test_the_layout_is_kept_where_it_can_be_and_always_exact(text: str, kept: bool) -> None:
    vocab = _vocab()
    encoder = Encoder(CASEFOLD, vocab)
    _check_layout(encoder, _reference(CASEFOLD, vocab, text), text)  # cold: up to 4 chunks learnt
    _check_layout(encoder, _reference(CASEFOLD, vocab, text), text)
    encoder.layout(text)  # a text of 5 new chunks: cached by now
    assert (encoder.layout(text)[1] is not None) == kept


@pytest.mark.parametrize(
    "text",
    [
        pytest.param("Hi team, the app.", id="ASCII, one chunk with a symbol"),
        pytest.param("Hi  team", id="two spaces: an empty chunk"),
        pytest.param(" team ", id="leading and trailing space"),
        pytest.param("team\n", id="a chunk ending in a newline"),
        pytest.param("team\n ok", id="a chunk ending in a newline, then another chunk"),
        pytest.param("team\t\u00a0 the,  app ", id="tab and no-break space before a space"),
        pytest.param("team,\n\nthe app", id="newlines inside a chunk"),
        pytest.param("", id="empty"),
        pytest.param("Café STRASSE Straße", id="plain Unicode folded whole"),
        pytest.param("team 東京 ok", id="ideographs: the other pattern"),
        pytest.param("İstanbul ﬁ e\u0301 ok", id="tokens normalised one by one"),
        pytest.param("DON’T don't", id="both apostrophes"),
    ],
)
def test_examples_equal_the_reference(text: str) -> None:
    vocab = _vocab()
    encoder = Encoder(CASEFOLD, vocab)
    assert encoder(text) == _reference(CASEFOLD, vocab, text)
    assert encoder(text) == _reference(CASEFOLD, vocab, text)
    assert encoder.ids(text) == _reference(CASEFOLD, vocab, text)[0]
    cold = Encoder(CASEFOLD, vocab)
    assert cold.ids(text) == _reference(CASEFOLD, vocab, text)[0]  # learning through ids()


def test_ideographs_take_their_own_pattern_and_cache() -> None:
    # With ideographs split, "東京," is two ideographs and a comma; with split_cjk off (the
    # case-kept spec here) it is one word and a comma. Chunks such as "team," occur in texts of
    # both routes of one encoder.
    vocab = _vocab()
    cjk = Encoder(CASEFOLD, vocab)
    kept = Encoder(KEEP, vocab)
    for text in ["team, ok", "東京, team, ok", "team,", "東京,", "ok 東京,"]:
        assert cjk(text) == _reference(CASEFOLD, vocab, text)
        assert kept(text) == _reference(KEEP, vocab, text)
    assert cjk("東京,")[0] == [vocab.index["東"], vocab.unk_id, vocab.index[","]]
    assert kept("東京,")[0] == [vocab.unk_id, vocab.index[","]]
    assert len(cjk._caches) == 2


def test_offsets_left_out_are_found_when_read_and_equal_the_eager_ones(tiny_bundles: dict[str, Path]) -> None:
    from textsieve.registry.runtime import Predictor

    p = Predictor.from_bundle(tiny_bundles["a"])
    long = " ".join(["the chain is broken, and the refund?"] * 40)  # past max_length: cut
    for text in ("Hi team, the app.", "team\n ok  東京", long, "ok"):
        eager, lazy = p.encode(text), p.encode(text, offsets=False)
        assert lazy._starts is None and lazy._ends is None  # nothing computed yet
        # A span's two offsets, from the layout (texts without a gap lacking a token), from the
        # offsets found at encoding, or by encoding again: all equal to the reference tokenizer's.
        tokens, spans = p.tokenizer.split_slow(text)
        kept = len(eager.ids)
        for first in range(kept):
            for end in range(first + 1, min(first + 6, kept + 1)):
                want = (spans[first][0], spans[end - 1][1])
                assert eager.bounds(first, end) == want and lazy.bounds(first, end) == want, (text, first, end)
        assert (lazy.ids, lazy.tokens, lazy.unknown, lazy.truncated) == (
            eager.ids,
            eager.tokens,
            eager.unknown,
            eager.truncated,
        )
        assert (lazy.starts, lazy.ends) == (eager.starts, eager.ends) and len(lazy.starts) == len(lazy.ids)
    assert p.encode(long).truncated


def test_the_cache_never_holds_more_than_its_capacity() -> None:
    vocab = _vocab()
    encoder = Encoder(CASEFOLD, vocab, capacity=4)
    for i in range(50):
        text = f"w{i} the app, team{i % 7}"
        assert encoder(text) == _reference(CASEFOLD, vocab, text)
    assert encoder._caches
    assert all(len(cache) <= 4 for cache in encoder._caches.values())


def test_a_text_of_mostly_new_chunks_learns_a_few_and_is_still_exact() -> None:
    vocab = _vocab()
    encoder = Encoder(CASEFOLD, vocab)
    text = " ".join(f"new{i}," for i in range(10))  # 10 distinct chunks, all new
    assert encoder(text) == _reference(CASEFOLD, vocab, text)
    learnt = sum(len(cache) for cache in encoder._caches.values())
    assert learnt == LEARN_PER_TEXT
    for _ in range(3):  # each pass learns a few more, the last all that are left
        assert encoder(text) == _reference(CASEFOLD, vocab, text)
    assert sum(len(cache) for cache in encoder._caches.values()) == 10


def test_long_chunks_are_never_cached_and_still_exact() -> None:
    # A caller sending long unbroken chunks must not grow the cache by their length.
    vocab = _vocab()
    encoder = Encoder(CASEFOLD, vocab)
    long_chunk = "x" * (MAX_CHUNK_CHARS + 1)
    text = f"the {long_chunk} app"
    for _ in range(3):
        assert encoder(text) == _reference(CASEFOLD, vocab, text)
    cached = {chunk for cache in encoder._caches.values() for chunk in cache}
    assert long_chunk not in cached
    assert all(len(chunk) <= MAX_CHUNK_CHARS for chunk in cached)


@pytest.mark.parametrize(
    "text",
    [
        pytest.param("team — ok\n", id="a chunk without tokens and a trailing newline"),
        pytest.param("Straße  ok", id="a token that changes length when folded, two spaces"),
        pytest.param("DON’T 東京, team", id="ideographs and the other apostrophe"),
    ],
)
def test_warm_texts_of_the_chunk_routes_never_take_bounds(text: str, monkeypatch: pytest.MonkeyPatch) -> None:
    # Gaps without tokens are cached with the chunk, and texts that do not fold in place are
    # split chunk by chunk on the original text: once learnt, none of them needs the whole-text path.
    vocab = _vocab()
    encoder = Encoder(CASEFOLD, vocab)
    expected = _reference(CASEFOLD, vocab, text)
    assert encoder(text) == expected

    def refuse(_: str) -> None:
        raise AssertionError("took Tokenizer.bounds")

    monkeypatch.setattr(CASEFOLD, "bounds", refuse)
    assert encoder(text) == expected


def test_texts_of_the_full_pattern_are_cached_by_chunk_too(monkeypatch: pytest.MonkeyPatch) -> None:
    # A combining mark sends a text to the full pattern; its chunks are cached under that pattern.
    vocab = _vocab()
    encoder = Encoder(CASEFOLD, vocab)
    text = "Cafe\u0301 team ❤\ufe0f ok"
    expected = _reference(CASEFOLD, vocab, text)
    assert encoder(text) == expected
    monkeypatch.setattr(CASEFOLD, "bounds", lambda _: pytest.fail("took Tokenizer.bounds"))
    assert encoder(text) == expected
    assert CASEFOLD._full_split in encoder._caches
