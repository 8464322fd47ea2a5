"""The lone-surrogate rule of textsieve/texts.py, with and without keeping the UTF-8 form.

The reference is ``str.encode("utf-8")`` (Python's strict UTF-8 codec, which refuses the code points
U+D800–U+DFFF: RFC 3629 section 3, "the definition of UTF-8 prohibits encoding character numbers
between U+D800 and U+DFFF", quoted from memory) and the check as it was written before ``keep``
existed, copied below.
"""

from __future__ import annotations

import pickle
import sys

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from textsieve.texts import lone_surrogate, text_refusal


def _reference_refusal(text: str) -> str | None:
    """textsieve/texts.py ``text_refusal`` as of 0c77129, before ``keep``: each non-ASCII text encoded."""
    from textsieve.texts import nothing_to_classify

    why = nothing_to_classify(text)
    if why is not None:
        return f"{why}; every text needs something to classify"
    nul = text.find("\x00")
    if nul >= 0:
        return f"contains a NUL character (U+0000) at character {nul}; remove it"
    if not text.isascii():
        try:
            text.encode("utf-8")
        except UnicodeEncodeError as exc:
            code = ord(text[exc.start])
            return f"contains a lone surrogate (U+{code:04X}) at character {exc.start}; send valid Unicode"
    return None


# (text, the first lone surrogate's code point and character index); None where there is none.
# An astral character (U+1F6B2, U+1F44D, U+20000) is one character in a str but a surrogate pair in
# UTF-16 and four bytes in UTF-8: the index must count characters, not code units or bytes.
SURROGATE_CASES = [
    pytest.param("\ud800 first", (0xD800, 0), id="high first"),
    pytest.param("\udc00 first", (0xDC00, 0), id="low first"),
    pytest.param("in the \udbff middle", (0xDBFF, 7), id="high middle"),
    pytest.param("in the \udfff middle", (0xDFFF, 7), id="low middle"),
    pytest.param("last \ud83d", (0xD83D, 5), id="high last"),
    pytest.param("last \ude00", (0xDE00, 5), id="low last"),
    pytest.param("a \udc00 b \ud800 c", (0xDC00, 2), id="several: the first named"),
    pytest.param("\ude00\ud83d reversed pair", (0xDE00, 0), id="a pair in the wrong order"),
    pytest.param("\U0001f6b2 bike \ud800", (0xD800, 7), id="astral before"),
    pytest.param("\U0001f44d\U00020000 \udc00 \U0001f6b2", (0xDC00, 3), id="astral around"),
    pytest.param("caf\u00e9 \u2014 \u7f8e\u54b2 \udfff", (0xDFFF, 10), id="Latin-1, BMP and a low one"),
    pytest.param("\u00e9\ud800", (0xD800, 1), id="two characters"),
    pytest.param("\U0001f6b2 caf\u00e9 \u2014 \u7f8e\u54b2", None, id="valid, astral"),
    pytest.param("caf\u00e9", None, id="valid, Latin-1"),
    pytest.param("plain ascii", None, id="ascii"),
]


@pytest.mark.parametrize(("text", "expected"), SURROGATE_CASES)
@pytest.mark.parametrize("keep", [False, True])
def test_lone_surrogates_are_named_with_their_character_index(
    text: str, expected: tuple[int, int] | None, keep: bool
) -> None:
    why = text_refusal(text, keep=keep)
    assert why == _reference_refusal(text)
    if expected is None:
        assert why is None
    else:
        code, index = expected
        assert why == f"contains a lone surrogate (U+{code:04X}) at character {index}; send valid Unicode"


# Any code point, surrogates included (Hypothesis leaves category Cs out unless asked); short texts
# so that a surrogate, a NUL or only whitespace each turn up often.
_any_char = st.characters(min_codepoint=0, max_codepoint=0x10FFFF, exclude_categories=())
_mixed = st.sampled_from("a\u00e9\ud800\udfff\U0001f6b2 \x00")
_texts = st.text(alphabet=_any_char, max_size=12) | st.text(alphabet=_mixed, max_size=8)


@settings(max_examples=500, deadline=None)
@given(text=_texts)
def test_keeping_the_utf8_form_refuses_what_encoding_refuses(text: str) -> None:
    try:
        text.encode("utf-8")
        encodes = True
    except UnicodeEncodeError:
        encodes = False
    kept = text_refusal(text, keep=True)
    assert kept == text_refusal(text) == _reference_refusal(text)
    if kept is None or "lone surrogate" not in kept:
        # Only what the earlier rules (nothing to classify, a NUL) refuse may hide a surrogate.
        assert encodes or kept is not None
    else:
        assert not encodes


@settings(max_examples=500, deadline=None)
@given(text=_texts)
def test_a_string_that_is_not_a_text_is_refused_for_a_surrogate_in_the_same_words(text: str) -> None:
    # lone_surrogate judges strings with no text rules (a reason, a field of a request): only what
    # str.encode("utf-8") refuses, at the index it names, in text_refusal's words.
    try:
        text.encode("utf-8")
    except UnicodeEncodeError as exc:
        code = ord(text[exc.start])
        assert (
            lone_surrogate(text)
            == f"contains a lone surrogate (U+{code:04X}) at character {exc.start}; send valid Unicode"
        )
        if "\x00" not in text:  # a NUL is text_refusal's rule before this one
            assert lone_surrogate("x " + text) == text_refusal("x " + text)
    else:
        assert lone_surrogate(text) is None


def _fresh(text: str) -> str:
    """An equal str object that no earlier call has given a UTF-8 form."""
    return "".join(list(text))


@pytest.mark.parametrize(
    "text",
    [
        pytest.param("caf\u00e9 au lait", id="Latin-1"),
        pytest.param("\u7f8e\u54b2 \u2014 thanks", id="BMP"),
        pytest.param("\U0001f6b2 returned", id="astral"),
    ],
)
def test_keep_leaves_the_utf8_form_on_the_string_for_the_pickler(text: str) -> None:
    # CPython 3.11 keeps PyUnicode_AsUTF8AndSize's result on a non-ASCII str (Objects/unicodeobject.c,
    # unicode_fill_utf8), which __sizeof__ counts: the UTF-8 bytes and a NUL. str.encode does not
    # keep it. The C pickler (Modules/_pickle.c, save_unicode: callgrind names it) reads that form;
    # what the pickler then skips is counted in bench/README.md ("A text encoded once on the loop").
    encoded = len(text.encode("utf-8")) + 1
    plain, kept = _fresh(text), _fresh(text)
    before = sys.getsizeof(plain)
    assert text_refusal(plain) is None
    assert sys.getsizeof(plain) == before
    assert text_refusal(kept, keep=True) is None
    assert sys.getsizeof(kept) == before + encoded
    assert pickle.dumps(kept, protocol=5) == pickle.dumps(_fresh(text), protocol=5)
    assert pickle.loads(pickle.dumps(kept, protocol=5)) == text


def test_keep_leaves_ascii_and_refused_texts_as_they_were() -> None:
    ascii_text, refused = _fresh("plain words"), _fresh("caf\u00e9 \ud800")
    sizes = sys.getsizeof(ascii_text), sys.getsizeof(refused)
    assert text_refusal(ascii_text, keep=True) is None
    assert text_refusal(refused, keep=True) is not None
    assert (sys.getsizeof(ascii_text), sys.getsizeof(refused)) == sizes
