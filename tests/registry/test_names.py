"""Model names, version numbers, actors and reasons: what is allowed and what is refused."""

from __future__ import annotations

import getpass

import pytest

from textsieve.errors import InputError
from textsieve.registry.names import resolve_actor, validate_model_name, validate_reason, validate_version

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


@pytest.mark.parametrize(
    ("argument", "expected_msg"),
    [
        pytest.param("", "bad actor ''", id="empty"),
        pytest.param("   ", "bad actor ''", id="blank"),
        pytest.param("a\x07b", "bad actor 'a\\x07b'", id="control character"),
        pytest.param("x" * 500, f"bad actor '{'x' * 40}'", id="500 characters, 40 shown"),
    ],
)
def test_bad_actors(argument: str, expected_msg: str) -> None:
    with pytest.raises(InputError) as info:
        resolve_actor(argument)
    assert info.value.message == f"{expected_msg}: 1–120 printable characters"


def test_reasons() -> None:
    assert validate_reason("  because  ", required=True) == "because"
    assert validate_reason("", required=False) == ""


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
    ],
)
def test_bad_reasons(argument: str, required: bool, expected_msg: str) -> None:
    with pytest.raises(InputError) as info:
        validate_reason(argument, required=required)
    assert expected_msg in info.value.message
