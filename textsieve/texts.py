"""The rules a text to classify obeys, in one place below every side.

The HTTP API (service/web/schemas.py), ``load_model(...).predict``, file scoring, reviewers'
verdicts and every labelled file read for training, evaluation or the promotion gates
(textsieve/labelled.py) refuse the same texts in the same words: a text with nothing to classify
(empty, or only whitespace and invisible format characters), a NUL, or a lone surrogate. A model
trained or judged on texts the service would never accept learns from, or is scored on, inputs
that cannot reach it. Kept free of the tokenizer's imports so the lowest layer can use it;
registry/tokenizer.py names these too, and its tests hold :func:`has_no_tokens` to every
tokenizer spec.
"""

from __future__ import annotations

import unicodedata
from codecs import utf_8_encode

# The most spans a text may ask for: the HTTP API's default limit (TEXTSIEVE_MAX_SPANS, service/settings.py),
# which load_model(...).predict, score_frame and textsieve score hold too (README: spans 0–20).
MAX_SPANS = 20


def has_no_tokens(text: str) -> bool:
    """Whether no tokenizer spec finds a token in ``text``: every character is whitespace or an
    invisible format character (category Cf: zero-width space, joiners, bidi controls), which
    separate tokens and never become one. Read up to the first character that is neither, so a
    text with a visible first character costs one step."""
    for c in text:
        if not c.isspace() and (c.isascii() or unicodedata.category(c) != "Cf"):
            return False
    return True


def nothing_to_classify(text: str) -> str | None:
    """Why ``text`` gives the model nothing to classify (a label for no tokens would be the model's
    prior, whatever the text), or None: the words the HTTP API, the Python API and file scoring
    refuse such a text with."""
    if not text.strip():
        return "is empty (only whitespace)" if text else "is empty"
    if has_no_tokens(text):
        shown = next(c for c in text if not c.isspace())
        return f"has only whitespace and invisible characters (such as U+{ord(shown):04X}), no words"
    return None


def text_refusal(text: str, *, keep: bool = False) -> str | None:
    """Why a text sent to be classified is refused, or None: nothing to classify, a NUL (no human
    text holds one; C-based consumers cut strings at it), or a lone surrogate (JSON may carry
    ``"\\ud800"``; it is not text and cannot be encoded in a reply). The words the HTTP API
    (service/web/schemas.py), ``load_model(...).predict``, a verdict's text and a labelled file's
    rows (textsieve/labelled.py) are refused with, after what names the text.

    ``keep=True`` leaves a non-ASCII text's UTF-8 form on the string, for a caller that pickles it
    next (the service's event loop, sending a batch to a worker): ``str.encode`` makes a new bytes
    object each call, while ``PyUnicode_AsUTF8AndSize`` stores the UTF-8 form on the str, and pickle's
    C pickler, which calls it for every str, then copies that rather than encoding again.
    ``codecs.utf_8_encode``'s ``errors`` argument goes through that call (Argument Clinic's ``str``
    converter: a lone surrogate raises the same UnicodeEncodeError, ``start`` the same index) and,
    with the empty string as what is encoded, is never otherwise read: no error handler is looked up,
    even under ``-X dev`` (where ``"".encode("utf-8", text)`` looks one up and fails). The kept form
    takes the UTF-8 length plus one byte and lives as long as the string, so readers that hold many
    texts (a training file) leave ``keep`` off."""
    why = nothing_to_classify(text)
    if why is not None:
        return f"{why}; every text needs something to classify"
    nul = text.find("\x00")
    if nul >= 0:
        return f"contains a NUL character (U+0000) at character {nul}; remove it"
    if not text.isascii():  # an ASCII string (a flag CPython keeps on it) has no surrogate
        try:
            if keep:
                utf_8_encode("", text)  # after the NUL check: the converter refuses a NUL in other words
            else:
                text.encode("utf-8")
        except UnicodeEncodeError as exc:
            return _surrogate_words(text, exc.start)
    return None


def _surrogate_words(text: str, at: int) -> str:
    return f"contains a lone surrogate (U+{ord(text[at]):04X}) at character {at}; send valid Unicode"


def lone_surrogate(text: str) -> str | None:
    """Why ``text`` is no text, in :func:`text_refusal`'s words, or None: a lone surrogate. The rule
    for a string that is not a text to classify (a reason, a reviewer's name, a field of a request),
    which a service would otherwise refuse in its parser's words."""
    try:
        text.encode("utf-8")  # a lone surrogate is the one character UTF-8 cannot hold
    except UnicodeEncodeError as exc:
        return _surrogate_words(text, exc.start)
    return None


__all__ = ["MAX_SPANS", "has_no_tokens", "lone_surrogate", "nothing_to_classify", "text_refusal"]
