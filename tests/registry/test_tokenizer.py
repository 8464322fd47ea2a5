"""Tokenizer: offsets index the text as sent, whatever Unicode it holds."""

from __future__ import annotations

import unicodedata
import warnings
from collections import Counter

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from textsieve.errors import BundleError
from textsieve.registry.tokenizer import PAD, UNK, Tokenizer, TokenizerSpec, UnicodeVersionWarning, Vocabulary

TOK = Tokenizer()

# Characters that break naive offset arithmetic: emoji with modifiers and joiners, combining
# marks, CJK, right-to-left scripts, zero-width and bidi controls, a byte-order mark.
TRICKY = [
    "👍🏽",
    "👨\u200d👩\u200d👧",
    "e\u0301",
    "A\u0308",
    "東京",
    "שלום",
    "مرحبا",
    "\u200b",
    "\u200f",
    "\ufeff",
    "don’t",
    "ß",
    "ﬁ",
    "\u00a0",
    "Ω",
    "x\u0327\u0301",
    # for split()'s routes: plain accents, dashes, currency, Greek capitals, dotted I, titlecase
    # digraphs, compatibility ideographs, Hangul jamo that compose, Kelvin/ohm signs
    "é",
    "—",
    "€",
    "ΣΟΦΟΣ",
    "İ",
    "ǅ",
    "豈",
    "\u1100\u1161\u11a8",
    "\u212a",
    "\u2126",
    "ʼ",
    "＇",
]


def _texts() -> st.SearchStrategy[str]:
    pieces = st.one_of(st.sampled_from(TRICKY), st.text(max_size=8), st.sampled_from([" ", "  ", "\n", "!"]))
    return st.lists(pieces, max_size=20).map("".join)


@settings(max_examples=400, deadline=None)
@given(_texts())
def test_offsets_index_the_original_text(text: str) -> None:
    tokens = TOK.tokenize(text)
    last_end = 0
    for t in tokens:
        assert 0 <= last_end <= t.start < t.end <= len(text)
        assert TOK.normalize(text[t.start : t.end]) == t.norm
        last_end = t.end
    # Nothing visible is dropped: what lies between tokens is whitespace or invisible format characters.
    covered = set()
    for t in tokens:
        covered.update(range(t.start, t.end))
    for i, ch in enumerate(text):
        if i not in covered:
            assert ch.isspace() or unicodedata.category(ch) == "Cf", (text, i, ch)


def test_examples() -> None:
    text = "Don’t stop! cafe\u0301 👍🏽 東京 ok\u200bgo"
    got = [(t.norm, text[t.start : t.end]) for t in TOK.tokenize(text)]
    assert got == [
        ("don't", "Don’t"),
        ("stop", "stop"),
        ("!", "!"),
        ("café", "cafe\u0301"),
        ("👍", "👍"),
        ("🏽", "🏽"),
        ("東", "東"),
        ("京", "京"),
        ("ok", "ok"),
        ("go", "go"),
    ]


def test_zero_width_space_is_a_separator_not_a_token() -> None:
    assert [t.norm for t in TOK.tokenize("a\u200b\u200bb \u200b")] == ["a", "b"]


def test_normalisation_is_nfkc_and_case_folded() -> None:
    # NFKC maps the ligature ﬁ to "fi" (Unicode Standard Annex #15); casefold maps ß to "ss".
    assert [t.norm for t in TOK.tokenize("ﬁne STRAẞE")] == ["fine", "strasse"]


def test_spec_round_trips_and_rejects_unknown_fields() -> None:
    spec = TokenizerSpec()
    assert TokenizerSpec.model_validate(spec.model_dump()) == spec
    with pytest.raises(ValueError):
        TokenizerSpec.model_validate({**spec.model_dump(), "lowercase": True})


def test_vocabulary_is_deterministic_and_reserves_pad_and_unk() -> None:
    counts = Counter({"b": 3, "a": 3, "c": 1, "d": 2})
    v = Vocabulary.build(counts, min_count=2)
    assert v.tokens == [PAD, UNK, "a", "b", "d"]
    assert v.encode(["a", "zzz", "d"]) == [2, 1, 4]
    assert Vocabulary.build(counts, max_size=3).tokens == [PAD, UNK, "a"]


def test_vocabulary_file_round_trip(tmp_path) -> None:  # type: ignore[no-untyped-def]
    v = Vocabulary.build(Counter({"é": 2, "東": 1, "x y": 1}))
    path = tmp_path / "vocab.txt"
    path.write_text(v.dumps(), encoding="utf-8")
    assert Vocabulary.load(path).tokens == v.tokens
    path.write_text("x\n<unk>\n", encoding="utf-8")
    with pytest.raises(BundleError):
        Vocabulary.load(path)


@settings(max_examples=1500, deadline=None)
@given(st.one_of(_texts(), st.text(max_size=40), st.text(alphabet=st.characters(max_codepoint=127), max_size=60)))
def test_fast_paths_equal_the_full_pattern(text: str) -> None:
    # split() takes ASCII and "plain Unicode" shortcuts; split_slow() uses only the full
    # pattern. They must agree token for token and offset for offset.
    assert TOK.split(text) == TOK.split_slow(text)


def test_fast_paths_on_examples() -> None:
    for text in [
        "Don't STOP me now!",
        "DON’T stop, café ünd Straße",
        "\x00a\x1fb\tc",
        "O'Neil's 'quoted' text''",
        "naïve 東京 résumé",
        "e\u0301 x",
        "a\u200bb",
        "ǅemal ＡＢＣ ½",
        # each route of split(): plain Unicode folded whole, ideographs, per-token folding
        "Crème brûlée — 12 € at Hauptstraße",
        "ΣΊΣΥΦΟΣ Ὀδυσσεύς",
        "Thanks, 美咲! 谢谢 Ünïcödé",
        "İstanbul ﬁle ǈ",
        "\u1100\u1161\u11a8 한국어",
        "豈 compatibility 兀 ideographs",
        "a\u2019b 東\u3099 x",
        "Ωmega ohm\u2126 K\u212a",
    ]:
        assert TOK.split(text) == TOK.split_slow(text), text


def test_every_composing_character_takes_the_full_pattern() -> None:
    # Unicode's composition data (unicodedata, this Python's tables): every character that can
    # be joined onto its neighbour is the second half of a two-part canonical decomposition.
    # The tokenizer's fast routes rely on each such character being a combining mark or one of
    # the Hangul jamo it lists; a newer Unicode that adds another kind must fail here.
    from textsieve.registry.tokenizer import HANGUL_COMPOSING

    seconds = set()
    for cp in range(0x80, 0x110000):
        d = unicodedata.decomposition(chr(cp))
        if d and not d.startswith("<") and len(d.split()) == 2:
            seconds.add(chr(int(d.split()[1], 16)))
    assert seconds
    for c in seconds:
        assert unicodedata.category(c)[0] == "M" or unicodedata.combining(c) or c in HANGUL_COMPOSING, hex(ord(c))
    # Hangul syllables compose algorithmically (no decomposition entry): L + V and LV + T.
    assert unicodedata.normalize("NFC", "\u1100\u1161\u11a8") == "\uac01"
    assert all(unicodedata.normalize("NFC", "\uac00" + t) != "\uac00" + t for t in HANGUL_COMPOSING if t >= "\u11a8")


def test_another_unicode_version_warns_naming_both_and_still_tokenizes() -> None:
    # "3.2.0" is the frozen table Python keeps as unicodedata.ucd_3_2_0 (for IDNA), so it can
    # never be this Python's own version.
    recorded = unicodedata.ucd_3_2_0.unidata_version
    assert recorded != unicodedata.unidata_version
    with pytest.warns(UnicodeVersionWarning) as caught:
        tok = Tokenizer(TokenizerSpec(unicode_version=recorded))
    assert len(caught) == 1
    message = str(caught[0].message)
    assert f"Unicode {recorded}" in message and f"Unicode {unicodedata.unidata_version}" in message
    assert "NFKC" in message and "classes" in message
    assert caught[0].filename == __file__  # points at the code that loaded the spec
    assert tok.split("Charged twice") == TOK.split("Charged twice")


def test_the_running_unicode_version_is_silent() -> None:
    with warnings.catch_warnings():
        warnings.simplefilter("error")  # any warning fails the test, whatever pytest's settings
        Tokenizer(TokenizerSpec(unicode_version=unicodedata.unidata_version))
