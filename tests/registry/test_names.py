"""Model names, version numbers, actors and reasons: what is allowed and what is refused."""

from __future__ import annotations

import getpass

import pytest

from tests.helpers.printable import JOINED
from textsieve.errors import InputError
from textsieve.registry.names import (
    resolve_actor,
    validate_model_name,
    validate_reason,
    validate_reviewer,
    validate_version,
)

NAME_RULE = "a-z, 0-9"


@pytest.mark.parametrize("name", ["a", "0", "spam-filter", "spam_filter.v2", "a" * 64, "x.y-z_1", "9lives"])
def test_valid_model_names(name: str) -> None:
    assert validate_model_name(name) == name


# The message quotes the refused name as Python's repr (control characters escaped) and states
# the rule, so it says what is allowed.
@pytest.mark.parametrize(
    ("argument", "expected_msg"),
    [
        pytest.param("", "bad model name ''", id="empty"),
        pytest.param("A", "bad model name 'A'", id="capital"),
        pytest.param("Spam", "bad model name 'Spam'", id="capitalised word"),
        pytest.param("-lead", "bad model name '-lead'", id="leading dash"),
        pytest.param(".hidden", "bad model name '.hidden'", id="leading dot"),
        pytest.param("_under", "bad model name '_under'", id="leading underscore"),
        pytest.param("a..b", "bad model name 'a..b'", id="two dots inside"),
        pytest.param("..", "bad model name '..'", id="parent folder"),
        pytest.param("a/b", "bad model name 'a/b'", id="slash"),
        pytest.param("../etc", "bad model name '../etc'", id="path traversal"),
        pytest.param("a\\b", "bad model name 'a\\\\b'", id="backslash"),
        pytest.param("a b", "bad model name 'a b'", id="space"),
        pytest.param("a\n", "bad model name 'a\\n'", id="trailing newline"),
        pytest.param("a\x00", "bad model name 'a\\x00'", id="NUL"),
        pytest.param("a" * 65, f"bad model name '{'a' * 65}'", id="65 characters"),
        pytest.param("é", "bad model name 'é'", id="non-ASCII letter"),
        pytest.param("spam:1", "bad model name 'spam:1'", id="colon"),
        pytest.param("a/../b", "bad model name 'a/../b'", id="traversal inside"),
        pytest.param(None, "model name must be a string", id="not a string"),
    ],
)
def test_bad_model_names_are_refused_with_the_rule(argument: object, expected_msg: str) -> None:
    with pytest.raises(InputError) as info:
        validate_model_name(argument)
    assert info.value.message.startswith(expected_msg), info.value.message
    assert NAME_RULE in info.value.message  # the message says what is allowed


@pytest.mark.parametrize(("given", "expected"), [(1, 1), (12, 12), ("3", 3), ("007", 7)])
def test_versions(given: object, expected: int) -> None:
    assert validate_version(given) == expected


# The whole message: the refused value as Python's repr, then the rule with PostgreSQL's
# largest INTEGER (PostgreSQL docs, "Numeric Types"), the column versions are stored in.
@pytest.mark.parametrize(
    ("argument", "expected_msg"),
    [
        pytest.param(0, "bad version 0", id="zero"),
        pytest.param(-1, "bad version -1", id="negative"),
        pytest.param("0", "bad version 0", id="zero as text, shown as read"),
        pytest.param("-1", "bad version '-1'", id="negative as text"),
        pytest.param("1.5", "bad version '1.5'", id="fraction as text"),
        pytest.param("x", "bad version 'x'", id="a letter"),
        pytest.param("", "bad version ''", id="empty text"),
        pytest.param(True, "bad version True", id="a boolean"),
        pytest.param(2.0, "bad version 2.0", id="a float"),
        pytest.param("١", "bad version '١'", id="Arabic-Indic digit one"),
    ],
)
def test_bad_versions(argument: object, expected_msg: str) -> None:
    with pytest.raises(InputError) as info:
        validate_version(argument)
    assert info.value.message == f"{expected_msg}: versions are whole numbers from 1 to 2147483647"


def test_actor_defaults_to_the_os_user() -> None:
    assert resolve_actor(None) == getpass.getuser()
    assert resolve_actor("  alice ") == "alice"


NAME_CHARACTERS = (
    "1–120 printable characters: no control, format (invisible or bidi), separator, private-use "
    "or unassigned characters"
)


@pytest.mark.parametrize(
    ("argument", "expected_msg"),
    [
        pytest.param("", "bad actor ''", id="empty"),
        pytest.param("   ", "bad actor ''", id="blank"),
        pytest.param("a\x07b", "bad actor 'a\\x07b' (U+0007 control character)", id="control character"),
        pytest.param(
            "x" * 500, f"bad actor '{'x' * 40}'… (500 characters; at most 120)", id="500 characters, 40 shown"
        ),
        pytest.param("x" * 121, f"bad actor '{'x' * 40}'… (121 characters; at most 120)", id="one too many"),
        pytest.param(" " + "x" * 120 + "\n", None, id="120 once stripped: accepted"),
        pytest.param(
            "\u202e" + "x" * 130,
            f"bad actor '\\u202e{'x' * 39}'… (131 characters; at most 120; U+202E RIGHT-TO-LEFT OVERRIDE)",
            id="too long and a bidi override",
        ),
        pytest.param("x" * 40 + "\x07", f"bad actor '{'x' * 40}'… (U+0007 control character)", id="41, cut"),
    ],
)
def test_bad_actors(argument: str, expected_msg: str | None) -> None:
    # A name is refused in the same words as an actor and as a reviewer (the reviewer page says them too);
    # a blank reviewer is told a verdict needs one (REVIEWER_MISSING, tested with the verdicts).
    checks = [("actor", resolve_actor), ("reviewer", validate_reviewer)][: 2 if argument.strip() else 1]
    for what, check in checks:
        if expected_msg is None:
            assert check(argument) == argument.strip()
            continue
        with pytest.raises(InputError) as info:
            check(argument)
        assert info.value.message == f"{expected_msg.replace('bad actor', f'bad {what}', 1)}: {NAME_CHARACTERS}"


# Names of characters and their general categories as the Unicode Character Database gives them
# (UnicodeData.txt); the Trojan Source case is Boucher and Anderson 2021 (CVE-2021-42574).
@pytest.mark.parametrize(
    ("name", "shown"),
    [
        pytest.param("ana\u202egnp.exe", "'ana\\u202egnp.exe' (U+202E RIGHT-TO-LEFT OVERRIDE)", id="Cf bidi override"),
        pytest.param("\u2066ana\u2069", "'\\u2066ana\\u2069' (U+2066 LEFT-TO-RIGHT ISOLATE)", id="Cf bidi isolate"),
        pytest.param("a\u200bna", "'a\\u200bna' (U+200B ZERO WIDTH SPACE)", id="Cf zero width space"),
        pytest.param("an\u00ada", "'an\\xada' (U+00AD SOFT HYPHEN)", id="Cf soft hyphen"),
        pytest.param("ana\ufeff", "'ana\\ufeff' (U+FEFF ZERO WIDTH NO-BREAK SPACE)", id="Cf byte order mark"),
        pytest.param("ana\u200d", "'ana\\u200d' (U+200D ZERO WIDTH JOINER)", id="Cf joiner at the end"),
        pytest.param("ana \u200cbo", "'ana \\u200cbo' (U+200C ZERO WIDTH NON-JOINER)", id="Cf joiner after a space"),
        pytest.param("a\u200d\u200dna", "'a\\u200d\\u200dna' (U+200D ZERO WIDTH JOINER)", id="Cf joiners doubled"),
        pytest.param("ana\u2028bob", "'ana\\u2028bob' (U+2028 LINE SEPARATOR)", id="Zl"),
        pytest.param("ana\u2029bob", "'ana\\u2029bob' (U+2029 PARAGRAPH SEPARATOR)", id="Zp"),
        pytest.param("ana\ue000", "'ana\\ue000' (U+E000 private-use character)", id="Co"),
        pytest.param("ana\U000e0fff", "'ana\\U000e0fff' (U+E0FFF unassigned)", id="Cn unassigned"),
        pytest.param("ana\ufffe", "'ana\\ufffe' (U+FFFE unassigned)", id="Cn noncharacter"),
        pytest.param("an\x85a", "'an\\x85a' (U+0085 control character)", id="Cc C1 next line"),
    ],
)
def test_names_refuse_format_separator_private_and_unassigned_characters(name: str, shown: str) -> None:
    for what, check in (("actor", resolve_actor), ("reviewer", validate_reviewer)):
        with pytest.raises(InputError) as info:
            check(name)
        assert info.value.message == f"bad {what} {shown}: {NAME_CHARACTERS}"


@pytest.mark.parametrize(
    "name",
    [
        pytest.param("Zoë Ødegård", id="Latin letters with marks"),
        *JOINED,
        pytest.param("李小龍", id="CJK"),
        pytest.param("ops-bot@ci", id="ASCII punctuation"),
    ],
)
def test_names_in_any_script_are_kept_as_given(name: str) -> None:
    assert resolve_actor(name) == name
    assert validate_reviewer(name) == name


def test_reasons() -> None:
    assert validate_reason("  because  ", required=True) == "because"
    assert validate_reason("", required=False) == ""
    # Free text in any language keeps its line breaks, joiners and bidi marks, which reorder nothing.
    free = "\u05e2\u05d1\u05e8\u05d9\u05ea\u200f macro-F1\n\u0645\u06cc\u200c\u0646\u0627\u2028ok\u00ad"
    assert validate_reason(free, required=True) == free


@pytest.mark.parametrize(
    ("argument", "required", "expected_msg"),
    [
        pytest.param("   ", True, "a reason is required: say why", id="blank, required"),
        pytest.param(
            "bad\x1b[31m",
            False,
            "reason holds a control character (U+001B, character 4); write plain text: line breaks and tabs are kept",
            id="terminal escape code (ECMA-48 ESC)",
        ),
        pytest.param("ok\rthen", False, "control character (U+000D, character 3)", id="carriage return"),
        pytest.param("ok\udcffthen", False, "reason holds bytes that are not UTF-8 (at character 3)", id="not UTF-8"),
        pytest.param("x" * 5000, False, "reason is 5000 characters; at most 2000 are kept", id="5000 characters"),
        pytest.param(
            "ok \u202eevil",
            False,
            "reason holds a bidi control (U+202E RIGHT-TO-LEFT OVERRIDE, character 4), which reorders the text",
            id="bidi override (Trojan Source, CVE-2021-42574)",
        ),
        pytest.param("\u2067x\u2069", False, "bidi control (U+2067 RIGHT-TO-LEFT ISOLATE, character 1)", id="isolate"),
    ],
)
def test_bad_reasons(argument: str, required: bool, expected_msg: str) -> None:
    with pytest.raises(InputError) as info:
        validate_reason(argument, required=required)
    assert expected_msg in info.value.message
