"""Which characters a one-line name shown to people may hold: an actor's, a reviewer's, a label's.

Such a name is shown in tables, the audit trail, the reviewer page and replies, and two names that
look the same should be the same name. Refused, by Unicode general category:
- Cc control characters (terminal escape sequences) and Cs lone surrogates (bytes that were not UTF-8);
- Cf format characters: invisible (U+200B ZERO WIDTH SPACE, U+00AD SOFT HYPHEN) or reordering what
  follows on the line (U+202E RIGHT-TO-LEFT OVERRIDE: "Trojan Source", Boucher and Anderson 2021,
  CVE-2021-42574), except the two joiners below;
- Zl and Zp, U+2028 and U+2029: line breaks;
- Co private use: no meaning between two parties, so a reader cannot know what it shows;
- Cn unassigned code points and noncharacters (U+FFFE, U+FDD0): not text yet (in the Unicode
  version of this Python; unicodedata.unidata_version).
This follows PRECIS (RFC 8264, section 4.3, the FreeformClass for nicknames), which disallows
controls and default-ignorable code points and leaves unassigned ones out (from memory).
Kept in the lowest layer: registry/names.py checks actors and reviewers with it, and
textsieve/labelled.py the labels training reads, export writes and publish stores.
"""

from __future__ import annotations

import unicodedata
from typing import Final

REFUSED_CATEGORIES: Final = frozenset(("Cc", "Cs", "Cf", "Zl", "Zp", "Co", "Cn"))
# ZERO WIDTH NON-JOINER and ZERO WIDTH JOINER spell words in Persian and in Indic scripts, and join
# emoji sequences: PRECIS and IDNA (RFC 5892, appendix A) allow them in context. Here: between two
# characters that are neither spaces nor format characters, never leading, trailing or doubled.
JOINERS: Final = frozenset("\u200c\u200d")

# Characters the Unicode Character Database gives no name, by category.
UNNAMED: Final = {
    "Cc": "control character",
    "Cs": "lone surrogate",
    "Co": "private-use character",
    "Cn": "unassigned",
}

# What each refused category is, for an error message.
KINDS: Final = {
    "Cc": "a control character",
    "Cs": "a lone surrogate",
    "Cf": "a format character, invisible or reordering the text around it",
    "Zl": "a line separator",
    "Zp": "a paragraph separator",
    "Co": "a private-use character",
    "Cn": "an unassigned code point",
}


def refused_character(text: str) -> str | None:
    """The first character of ``text`` a name may not hold, or None."""
    for i, ch in enumerate(text):
        if ch.isascii() and ch.isprintable():  # the common case, without a look-up
            continue
        if unicodedata.category(ch) not in REFUSED_CATEGORIES:
            continue
        if ch in JOINERS and 0 < i < len(text) - 1:
            before, after = text[i - 1], text[i + 1]
            if not any(c.isspace() or unicodedata.category(c) == "Cf" for c in (before, after)):
                continue
        return ch
    return None


def character_name(ch: str) -> str:
    """``U+202E RIGHT-TO-LEFT OVERRIDE``: the code point and its name (or what it is, unnamed)."""
    return f"U+{ord(ch):04X} {unicodedata.name(ch, UNNAMED.get(unicodedata.category(ch), ''))}".rstrip()


def category_runs(categories: frozenset[str]) -> list[tuple[int, int, str]]:
    """The code points of ``categories`` as runs ``(first, last, category)``, in this Python's Unicode
    version: what a page needs to judge a name as :func:`refused_character` does (about 0.25 s)."""
    runs: list[tuple[int, int, str]] = []
    for cp in range(0x110000):
        category = unicodedata.category(chr(cp))
        if category not in categories:
            continue
        if runs and runs[-1][1] == cp - 1 and runs[-1][2] == category:
            runs[-1] = (runs[-1][0], cp, category)
        else:
            runs.append((cp, cp, category))
    return runs


__all__ = [
    "JOINERS",
    "KINDS",
    "REFUSED_CATEGORIES",
    "UNNAMED",
    "category_runs",
    "character_name",
    "refused_character",
]
