"""Tokenizer: offsets index the text as sent, whatever Unicode it holds."""

from __future__ import annotations

import re
import sys
import unicodedata
import warnings
from collections import Counter

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from textsieve.errors import BundleError
from textsieve.registry.tokenizer import (
    PAD,
    UNK,
    Tokenizer,
    TokenizerSpec,
    UnicodeVersionWarning,
    Vocabulary,
    has_no_tokens,
)

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
    tokens, starts, ends = TOK.bounds(text)
    assert (tokens, list(zip(starts, ends, strict=True))) == TOK.split_slow(text)


KEEP = Tokenizer(TokenizerSpec(case="keep", split_cjk=False))


@settings(max_examples=600, deadline=None)
@given(st.one_of(_texts(), st.text(max_size=40)))
def test_fast_paths_equal_the_full_pattern_when_case_is_kept(text: str) -> None:
    # The other spec: nothing folded, ideographs inside words; the same routes, other patterns.
    assert KEEP.split(text) == KEEP.split_slow(text)


def test_a_token_pattern_that_captures_is_refused() -> None:
    # bounds() reads tokens as every second piece of a capturing split (gap, token, gap, ...);
    # a group inside the pattern would put its own pieces among them (re.split's documented
    # behaviour), so building such a splitter must fail loudly.
    from textsieve.registry.tokenizer import _capturing

    with pytest.raises(ValueError, match="no capturing groups"):
        _capturing(re.compile("(\\w)+|[^\\s\\w]"))
    assert _capturing(re.compile("\\w+|[^\\s\\w]")).split("a, b") == ["", "a", "", ",", " ", "b", ""]


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
        # tokens normalised in one go (joined by U+0000): nothing may compose across the joins
        "Straße \u1100 \u1161 e \u0301x \u0301",
        "\u200b \u200d",
        "ß\x00ß a\x00",
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


def test_the_stored_unicode_tables_are_this_pythons_marks_and_format_characters(
    monkeypatch: pytest.MonkeyPatch,
) -> None:
    """registry/_unicode_tables.py spares each process a scan of every code point; it must hold what
    the scan finds (categories M* and Cf, The Unicode Standard §4.5), and another Python's version
    must scan instead of trusting it."""
    from textsieve.registry import _unicode_tables as tables
    from textsieve.registry import tokenizer

    marks, formats = tokenizer.scan_marks_and_formats()
    assert marks[0] == (0x0300, 0x036F)  # combining grave accent .. latin small letter x: from memory
    assert (0x200B, 0x200F) in formats and (0xFEFF, 0xFEFF) in formats  # ZWSP .. RLM, and the BOM
    if tables.UNICODE_VERSION == unicodedata.unidata_version:
        assert (list(tables.MARKS), list(tables.FORMATS)) == (marks, formats), (
            "registry/_unicode_tables.py is stale: run .venv/bin/python scripts/unicode_tables.py"
        )
    monkeypatch.setattr(tables, "UNICODE_VERSION", "0.0.0")
    monkeypatch.setattr(tables, "MARKS", ())  # were they read, the classes would come out empty
    tokenizer._marks_and_formats.cache_clear()
    try:
        assert tokenizer._marks_and_formats() == (tokenizer._class_body(marks), tokenizer._class_body(formats))
    finally:
        tokenizer._marks_and_formats.cache_clear()


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


# --- against the Unicode Character Database -----------------------------------------------------
# The spec (registry/tokenizer.py): tokens are found in the text as sent. A word is a run of
# letters, digits, '_' and combining marks (general categories L*, N*, M*), joined across an
# inner apostrophe; with split_cjk each CJK ideograph is a token of its own. Whitespace and
# format characters (Cf) separate tokens and are never part of one. Any other character is a
# token of one character plus the marks after it. Each token is normalised with NFKC, then
# full case folding (case="casefold"), and U+2019 becomes "'".
#
# The references, from this Python's Unicode Character Database (unicodedata.unidata_version):
# - General_Category (UAX #44, "Unicode Character Database", §5.7.1, table 12);
# - whitespace as Python's str.isspace() defines it (the re module's \s): general category Zs,
#   or Bidi_Class WS, B or S (UAX #44, Bidi_Class);
# - CJK ideographs: the code points the standard names by rule NR2, "CJK UNIFIED IDEOGRAPH-"
#   or "CJK COMPATIBILITY IDEOGRAPH-" plus the code point (The Unicode Standard, §4.8);
# - normalisation: unicodedata.normalize("NFKC", ...) (UAX #15, "Unicode Normalization
#   Forms") and str.casefold() (the standard's full case folding, §3.13, CaseFolding.txt).

UNICODE_VERSION = unicodedata.unidata_version
GENERAL_CATEGORIES = set(
    "Lu Ll Lt Lm Lo Mn Mc Me Nd Nl No Pc Pd Ps Pe Pi Pf Po Sm Sc Sk So Zs Zl Zp Cc Cf Cs Co Cn".split()
)
# White_Space in the UCD's PropList.txt (unchanged since Unicode 6.3 dropped U+180E).
WHITE_SPACE = {*range(0x09, 0x0E), 0x20, 0x85, 0xA0, 0x1680, *range(0x2000, 0x200B), 0x2028, 0x2029, 0x202F}
WHITE_SPACE |= {0x205F, 0x3000}
APOSTROPHES = ("'", "\u2019")

# Code points that are easy to get wrong, besides the strided sample below.
HARD_CASES = {
    "combining marks: Mn, Mn, Me (enclosing circle), Mc": [0x0301, 0x0327, 0x20DD, 0x0903],
    "Hangul: leading, vowel, trailing jamo; a syllable; a compatibility jamo": [0x1100, 0x1161, 0x11A8, 0xAC00, 0x3131],
    "first and last CJK ideographs of each block (unified, compatibility)": [
        *(0x3400, 0x4DBF, 0x4E00, 0x9FFF, 0xF900, 0xFA6D, 0xFA6E, 0xFAD9, 0x20000, 0x2A6DF, 0x2A700, 0x2B738),
        *(0x2B740, 0x2B81D, 0x2B820, 0x2CEA1, 0x2CEB0, 0x2EBE0, 0x2F800, 0x2FA1D, 0x30000, 0x3134A),
    ],
    "where CJK extensions H and I start (unassigned before Unicode 15.0 and 15.1)": [0x31350, 0x2EBF0],
    "ideographic number zero (Nl), a Kangxi radical (So), the iteration mark (Lm)": [0x3007, 0x2F00, 0x3005],
    "format characters: ZWSP, ZWNJ, ZWJ, LRM, RLM, word joiner, BOM, soft hyphen": [
        *(0x200B, 0x200C, 0x200D, 0x200E, 0x200F, 0x2060, 0xFEFF, 0x00AD, 0x180E),
    ],
    "fullwidth A, a, 0, low line, apostrophe": [0xFF21, 0xFF41, 0xFF10, 0xFF3F, 0xFF07],
    "ligatures fi, ff, IJ; titlecase DŽ (Lt)": [0xFB01, 0xFB00, 0x0132, 0x01C5],
    "Turkish dotted and dotless I, ß and ẞ, sigma and final sigma": [0x0130, 0x0131, 0x00DF, 0x1E9E, 0x03A3, 0x03C2],
    "Kelvin and ohm signs, ², ½, Roman numerals, Arabic-Indic 1": [0x212A, 0x2126, 0xB2, 0xBD, 0x2160, 0x216B, 0x661],
    "spaces and separators": [0x0009, 0x001C, 0x001F, 0x0085, 0x00A0, 0x1680, 0x2028, 0x2029, 0x202F, 0x3000],
    "low line and undertie (Pc), apostrophes, diaeresis (NFKC adds a space)": [0x005F, 0x203F, 0x2019, 0x0027, 0x00A8],
    "dollar and euro (Sc), opening quotation marks (Pi)": [0x0024, 0x20AC, 0x00AB, 0x2018],
    "emoji, a skin-tone modifier (Sk), a regional indicator, a variation selector": [0x1F44D, 0x1F3FD, 0x1F1EB, 0xFE0F],
    "surrogates (Cs), private use (Co), unassigned (Cn)": [0xD800, 0xDFFF, 0xE000, 0x10FFFD, 0x0378, 0xFFFF],
}


def _sample() -> list[str]:
    # A stride that is prime to every block size, so the sample drifts through each block.
    hard = [cp for group in HARD_CASES.values() for cp in group]
    return sorted({chr(cp) for cp in (*range(0, sys.maxunicode + 1, 97), *hard)})


def _is_space(c: str) -> bool:
    return unicodedata.category(c) == "Zs" or unicodedata.bidirectional(c) in ("WS", "B", "S")


def _is_ideograph(c: str) -> bool:
    return unicodedata.name(c, "").startswith(("CJK UNIFIED IDEOGRAPH-", "CJK COMPATIBILITY IDEOGRAPH-"))


def _kind(c: str, split_cjk: bool) -> str:
    """What the spec makes of ``c``, from the UCD alone: 'separator', 'word' or 'alone'."""
    category = unicodedata.category(c)
    if category == "Cf" or _is_space(c):
        return "separator"
    if split_cjk and _is_ideograph(c):
        return "alone"
    if category[0] in "LNM" or c == "_":
        return "word"
    return "alone"


def _reference_norm(piece: str, casefold: bool) -> str:
    nfkc = unicodedata.normalize("NFKC", piece).replace("\u2019", "'")
    return nfkc.casefold() if casefold else nfkc


def _expected(c: str, kind: str) -> dict[str, list[tuple[int, int]]]:
    """Token offsets the spec gives for ``c`` between word characters, alone, and before a mark."""
    between = {"word": [(0, 3)], "alone": [(0, 1), (1, 2), (2, 3)], "separator": [(0, 1), (2, 3)]}[kind]
    if c in APOSTROPHES:
        between = [(0, 3)]  # an inner apostrophe joins the word: "don't"
    return {
        f"x{c}x": between,
        c: [] if kind == "separator" else [(0, 1)],
        f"{c}\u0301": [(1, 2)] if kind == "separator" else [(0, 2)],
    }


def test_the_sample_covers_every_general_category() -> None:
    seen = {unicodedata.category(c) for c in _sample()}
    assert seen == GENERAL_CATEGORIES, GENERAL_CATEGORIES - seen
    assert TokenizerSpec().unicode_version == UNICODE_VERSION


@pytest.mark.parametrize(
    "spec",
    [
        pytest.param(TokenizerSpec(), id=f"casefold, ideographs split, Unicode {UNICODE_VERSION}"),
        pytest.param(
            TokenizerSpec(case="keep", split_cjk=False), id=f"case kept, ideographs in words, Unicode {UNICODE_VERSION}"
        ),
    ],
)
def test_tokens_and_their_normal_forms_follow_the_unicode_character_database(spec: TokenizerSpec) -> None:
    tok = Tokenizer(spec)
    casefold = spec.case == "casefold"
    wrong: list[str] = []
    for c in _sample():
        kind = _kind(c, spec.split_cjk)
        for text, spans in _expected(c, kind).items():
            token_spans = [(t.start, t.end) for t in tok.tokenize(text)]
            norms = [_reference_norm(text[s:e], casefold) for s, e in spans]
            if token_spans != spans:
                wrong.append(f"U+{ord(c):04X} {unicodedata.category(c)} as {kind} in {text!r}: {token_spans}")
            elif [t.norm for t in tok.tokenize(text)] != norms or tok.split(text) != (norms, spans):
                wrong.append(f"U+{ord(c):04X} in {text!r}: normal forms {tok.split(text)[0]}, not {norms}")
    assert not wrong, f"{len(wrong)} differences from the UCD of Unicode {UNICODE_VERSION}:\n" + "\n".join(wrong[:40])


def test_whitespace_is_the_white_space_property_plus_the_information_separators() -> None:
    # Python's whitespace (and so the tokenizer's separators, besides Cf) is the UCD's
    # White_Space property plus U+001C..U+001F, the information separators (Bidi_Class B and S),
    # which Python counts as whitespace and White_Space does not.
    spaces = {cp for cp in range(sys.maxunicode + 1) if _is_space(chr(cp))}
    assert spaces == WHITE_SPACE | set(range(0x1C, 0x20)), sorted(spaces ^ (WHITE_SPACE | set(range(0x1C, 0x20))))
    assert [t.norm for t in TOK.tokenize("a\x1cb\x1fc")] == ["a", "b", "c"]


# Sequences whose normal form joins or splits characters (NFKC: UAX #15; full case folding:
# The Unicode Standard §3.13), as one token each unless listed otherwise.
@pytest.mark.parametrize(
    ("text", "expected"),
    [
        pytest.param("cafe\u0301", ["café"], id="e + combining acute composes to é"),
        pytest.param("\u1100\u1161\u11a8", ["\uac01"], id="Hangul jamo compose to a syllable"),
        pytest.param("\u1100\u1161 \u11a8", ["\uac00", "\u11a8"], id="jamo split by a space stay apart"),
        pytest.param("東京", ["東", "京"], id="one token per ideograph"),
        pytest.param("\uf900", ["\u8c48"], id="a compatibility ideograph maps to its unified one"),
        pytest.param("👨\u200d👩\u200d👧", ["👨", "👩", "👧"], id="ZWJ separates emoji"),
        pytest.param("co\u00adop", ["co", "op"], id="soft hyphen (Cf) separates"),
        pytest.param("ＡＢＣ１２", ["abc12"], id="fullwidth forms"),
        pytest.param("ﬁne ﬀ", ["fine", "ff"], id="ligatures"),
        pytest.param("İstanbul", ["i\u0307stanbul"], id="Turkish dotted capital I folds to i + dot above"),
        pytest.param("ılık", ["ılık"], id="Turkish dotless i is kept"),
        pytest.param("Straße STRAẞE", ["strasse", "strasse"], id="sharp s and capital sharp s fold to ss"),
        pytest.param("ΣΊΣΥΦΟΣ", ["σίσυφοσ"], id="final sigma folds like sigma"),
        pytest.param("\u212a \u2126", ["k", "ω"], id="Kelvin and ohm signs"),
        pytest.param("x² ½ Ⅻ", ["x2", "1⁄2", "xii"], id="superscripts, fractions, Roman numerals"),
        pytest.param("don\u2019t", ["don't"], id="right single quotation mark as apostrophe"),
    ],
)
def test_normal_forms_of_hard_sequences(text: str, expected: list[str]) -> None:
    assert [t.norm for t in TOK.tokenize(text)] == expected
    assert TOK.split(text)[0] == expected
    for t in TOK.tokenize(text):
        assert t.norm == unicodedata.normalize("NFKC", text[t.start : t.end]).replace("\u2019", "'").casefold()


_SPARSE = st.text(
    alphabet=st.sampled_from(
        [" ", "\t", "\n", "\u3000", "\u00a0", "\u200b", "\u200d", "\u2060", "\ufeff", "\u202e", "\u00ad"]
        + ["a", "\u0301", "\u4e00", "!", "\x00", "\U0001f600", "\u0600", "\U000e0001"]
    ),
    max_size=8,
)


@settings(max_examples=500, deadline=None)
@given(_SPARSE, st.booleans())
def test_has_no_tokens_is_what_every_spec_finds(text: str, split_cjk: bool) -> None:
    """The check the HTTP API, the Python API and file scoring refuse a text with (nothing to
    classify) holds exactly when the tokenizer finds no token, under either spec."""
    tokenizer = Tokenizer(TokenizerSpec(split_cjk=split_cjk))
    assert has_no_tokens(text) == (not tokenizer.tokenize(text))
    assert has_no_tokens(text) == (not tokenizer.bounds(text)[0])
