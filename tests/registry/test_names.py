"""Model names, version numbers, actors and reasons: what is allowed and what is refused."""

from __future__ import annotations

import getpass

import pytest

from textsieve.errors import InputError
from textsieve.registry.names import resolve_actor, validate_model_name, validate_reason, validate_version


@pytest.mark.parametrize("name", ["a", "0", "spam-filter", "spam_filter.v2", "a" * 64, "x.y-z_1", "9lives"])
def test_valid_model_names(name: str) -> None:
    assert validate_model_name(name) == name


@pytest.mark.parametrize(
    "name",
    [
        "",
        "A",
        "Spam",
        "-lead",
        ".hidden",
        "_under",
        "a..b",
        "..",
        "a/b",
        "../etc",
        "a\\b",
        "a b",
        "a\n",
        "a\x00",
        "a" * 65,
        "é",
        "spam:1",
        "a/../b",
    ],
)
def test_bad_model_names_are_refused_with_the_rule(name: str) -> None:
    with pytest.raises(InputError) as info:
        validate_model_name(name)
    assert "a-z, 0-9" in info.value.message  # the message says what is allowed


def test_non_string_model_name() -> None:
    with pytest.raises(InputError):
        validate_model_name(None)


@pytest.mark.parametrize(("given", "expected"), [(1, 1), (12, 12), ("3", 3), ("007", 7)])
def test_versions(given: object, expected: int) -> None:
    assert validate_version(given) == expected


@pytest.mark.parametrize("given", [0, -1, "0", "-1", "1.5", "x", "", True, 2.0, "١"])
def test_bad_versions(given: object) -> None:
    with pytest.raises(InputError, match="whole numbers from 1"):
        validate_version(given)


def test_actor_defaults_to_the_os_user() -> None:
    assert resolve_actor(None) == getpass.getuser()
    assert resolve_actor("  alice ") == "alice"
    for bad in ("", "   ", "a\x07b", "x" * 500):
        with pytest.raises(InputError):
            resolve_actor(bad)


def test_reasons() -> None:
    assert validate_reason("  because  ", required=True) == "because"
    assert validate_reason("", required=False) == ""
    with pytest.raises(InputError, match="reason is required"):
        validate_reason("   ", required=True)
    with pytest.raises(InputError, match="control characters"):
        validate_reason("bad\x1b[31m", required=False)
    with pytest.raises(InputError, match="at most"):
        validate_reason("x" * 5000, required=False)
