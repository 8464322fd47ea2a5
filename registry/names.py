"""What a model name, a version number, an actor and a reason may be.

Model names end up in file paths (the fetch cache), URLs and SQL parameters, so they are kept
to a small, boring alphabet: lowercase letters, digits, '.', '_' and '-', starting with a
letter or digit, at most 64 characters, and never containing '..'.
"""

from __future__ import annotations

import getpass
import os
import re
import unicodedata

from textsieve.errors import InputError
from textsieve.printable import REFUSED_CATEGORIES, UNNAMED, category_runs, character_name, refused_character

MODEL_NAME = re.compile(r"[a-z0-9][a-z0-9._-]{0,63}")
MODEL_NAME_RULE = "1–64 characters from a-z, 0-9, '.', '_', '-', starting with a letter or digit, no '..'"
MAX_ACTOR = 120
MAX_REASON = 2000
# Versions are stored in INTEGER columns; PostgreSQL's INTEGER is 32-bit, and a larger number
# would fail in the database driver instead of being refused here with a message.
MAX_VERSION = 2**31 - 1
_VERSION_RULE = f"versions are whole numbers from 1 to {MAX_VERSION}"


def validate_model_name(name: object) -> str:
    """Return ``name`` unchanged when it is a valid model name; InputError otherwise."""
    if not isinstance(name, str):
        raise InputError(f"model name must be a string ({MODEL_NAME_RULE})")
    if not MODEL_NAME.fullmatch(name) or ".." in name:
        shown = name if len(name) <= 80 else name[:77] + "..."
        raise InputError(f"bad model name {shown!r}: use {MODEL_NAME_RULE}")
    return name


def _shown(value: object) -> str:
    try:
        text = repr(value)
    except ValueError:  # an int past Python's limit on digits to print
        return "(a number of thousands of digits)"
    return text if len(text) <= 40 else text[:37] + "..."


def validate_version(version: object) -> int:
    """A version number: a positive integer (strings of digits are accepted, as typed on a command line)."""
    if isinstance(version, str):
        # Checked before int(): a digit string of thousands of characters makes int() raise.
        digits = version.lstrip("0")
        if not version.isascii() or not version.isdigit() or len(digits) > len(str(MAX_VERSION)):
            raise InputError(f"bad version {_shown(version)}: {_VERSION_RULE}")
        version = int(version)
    if isinstance(version, bool) or not isinstance(version, int) or not 1 <= version <= MAX_VERSION:
        raise InputError(f"bad version {_shown(version)}: {_VERSION_RULE}")
    return version


# What a person's name (an actor, a reviewer) may not hold: textsieve/printable.py, which labels
# obey too (PRECIS, RFC 8264: no control, format, separator, private-use or unassigned characters,
# joiners only between two visible characters).
NAME_RULE = (
    f"1–{MAX_ACTOR} printable characters: no control, format (invisible or bidi), separator, private-use "
    "or unassigned characters"
)


SHOWN_NAME_CHARS = 40  # of a refused name, quoted: it names the name, it does not echo it


def _name_refusal(what: str, name: str) -> InputError:
    """``bad reviewer 'ana\\u202egnp.exe' (U+202E RIGHT-TO-LEFT OVERRIDE): <rule>``: the name as ``repr`` shows it,
    its first SHOWN_NAME_CHARS characters and "…" after a longer one, then what is wrong with it: its
    length when over MAX_ACTOR (a name cut to 40 characters said neither that it was too long nor how long)
    and its first refused character."""
    why = [f"{len(name)} characters; at most {MAX_ACTOR}"] if len(name) > MAX_ACTOR else []
    bad = refused_character(name)
    if bad is not None:
        why.append(character_name(bad))
    cut = "…" if len(name) > SHOWN_NAME_CHARS else ""
    where = f" ({'; '.join(why)})" if why else ""
    return InputError(f"bad {what} {name[:SHOWN_NAME_CHARS]!r}{cut}{where}: {NAME_RULE}")


def resolve_actor(actor: str | None) -> str:
    """The actor recorded in the audit trail: the one given, or the OS user running us."""
    if actor is None:
        try:
            actor = getpass.getuser()
        except (KeyError, OSError):  # no passwd entry, e.g. an arbitrary uid in a container
            actor = f"uid:{os.getuid()}"
    actor = actor.strip()
    if not actor or len(actor) > MAX_ACTOR or refused_character(actor) is not None:
        raise _name_refusal("actor", actor)
    return actor


REVIEWER_MISSING = "a verdict needs the reviewer's name: who judged the prediction"


def validate_reviewer(reviewer: object) -> str:
    """The person who gave a verdict, as they named themselves: 1–120 printable characters.

    The reviewer page refuses the same names at sign-in, in the same words: :func:`reviewer_rule` gives it
    this rule's data and its script mirrors this function (tests/service/test_page.py compares them)."""
    if not isinstance(reviewer, str) or not reviewer.strip():
        raise InputError(REVIEWER_MISSING)
    reviewer = reviewer.strip()
    if len(reviewer) > MAX_ACTOR or refused_character(reviewer) is not None:
        raise _name_refusal("reviewer", reviewer)
    return reviewer


def reviewer_rule() -> dict[str, object]:
    """What the reviewer page needs to judge a reviewer's name as :func:`validate_reviewer` does and say
    why in its words: the limit, the messages, and from this Python's Unicode Character Database the
    runs of refused categories (and of Zs, which ``repr`` escapes too), what ``str.strip`` removes, and
    the names of the refused characters that have one."""
    runs = category_runs(REFUSED_CATEGORIES | {"Zs"})
    return {
        "max": MAX_ACTOR,
        "shown": SHOWN_NAME_CHARS,
        "missing": REVIEWER_MISSING,
        "rule": NAME_RULE,
        "refused": sorted(REFUSED_CATEGORIES),
        "runs": [list(run) for run in runs],
        # str.isspace: Zs, or bidi class WS, B or S, which only Cc, Zl and Zp characters have besides Zs.
        "spaces": [
            cp
            for first, last, category in runs
            if category in ("Cc", "Zs", "Zl", "Zp")
            for cp in range(first, last + 1)
            if chr(cp).isspace()
        ],
        "names": {
            str(cp): unicodedata.name(chr(cp))
            for first, last, category in runs
            if category in ("Cf", "Zl", "Zp")
            for cp in range(first, last + 1)
            if unicodedata.name(chr(cp), "")
        },
        "unnamed": dict(UNNAMED),
    }


# UAX #9's explicit formatting characters (embeddings, overrides, isolates): each reorders the text
# after it on its line, so an audit reason could show its words in another order than they are
# stored ("Trojan Source", CVE-2021-42574). A reason is free text in any language, so the other
# format characters stay: joiners, soft hyphens and the bidi marks (U+200E, U+200F, U+061C), which
# move nothing.
_REORDERING = frozenset("\u202a\u202b\u202c\u202d\u202e\u2066\u2067\u2068\u2069")


def validate_reason(reason: str, *, required: bool) -> str:
    reason = (reason or "").strip()
    if required and not reason:
        raise InputError("a reason is required: say why, e.g. 'macro-F1 +2 points on the March set'")
    if len(reason) > MAX_REASON:
        raise InputError(f"reason is {len(reason)} characters; at most {MAX_REASON} are kept")
    bad = next(
        (c for c in reason if c in _REORDERING or (c not in "\n\t" and unicodedata.category(c) in ("Cc", "Cs"))),
        None,
    )
    if bad is not None:
        at = reason.index(bad) + 1
        if unicodedata.category(bad) == "Cs":  # what Python makes of command-line bytes that are not UTF-8
            raise InputError(f"reason holds bytes that are not UTF-8 (at character {at}); write it as UTF-8 text")
        if bad in _REORDERING:
            raise InputError(
                f"reason holds a bidi control (U+{ord(bad):04X} {unicodedata.name(bad)}, character {at}), which "
                "reorders the text after it; write plain text (bidi marks U+200E and U+200F are kept)"
            )
        raise InputError(
            f"reason holds a control character (U+{ord(bad):04X}, character {at}); write plain text: "
            "line breaks and tabs are kept, other control characters (escape sequences) are not"
        )
    return reason


__all__ = [
    "MAX_ACTOR",
    "MAX_VERSION",
    "MODEL_NAME",
    "MODEL_NAME_RULE",
    "REVIEWER_MISSING",
    "resolve_actor",
    "reviewer_rule",
    "validate_model_name",
    "validate_reason",
    "validate_reviewer",
    "validate_version",
]
