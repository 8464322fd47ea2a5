"""Where the registry and the service are: flag, else variable, else default; bad variables named."""

from __future__ import annotations

import pytest

from textsieve.environment import (
    DEFAULT_REGISTRY,
    DEFAULT_URL,
    RegistryLocation,
    check_url,
    registry_location,
    service_url,
)
from textsieve.errors import InputError


def test_a_flag_wins_then_the_variable_then_the_default() -> None:
    env = {"TEXTSIEVE_REGISTRY": "/srv/reg", "TEXTSIEVE_BLOBS": "/srv/blobs", "TEXTSIEVE_URL": "http://h:1"}
    assert registry_location("here", "there", environ=env) == RegistryLocation("here", "there")
    assert registry_location(environ=env) == RegistryLocation("/srv/reg", "/srv/blobs")
    assert registry_location(environ={}) == RegistryLocation(DEFAULT_REGISTRY, None)
    assert (service_url("http://flag", environ=env), service_url(environ=env)) == ("http://flag", "http://h:1")
    assert service_url(environ={}) == DEFAULT_URL


def test_a_flag_is_passed_through_for_its_verb_to_judge() -> None:
    # `textsieve health --url x` reports "not ready" (exit 1) in its own words; see client.cli_health.
    assert service_url("localhost:8000", environ={}) == "localhost:8000"
    assert registry_location("", environ={}).registry == ""


@pytest.mark.parametrize(
    ("env", "expected_msg"),
    [
        ({"TEXTSIEVE_REGISTRY": ""}, "TEXTSIEVE_REGISTRY: empty; give a registry folder or a postgresql:// URL"),
        ({"TEXTSIEVE_REGISTRY": "sqlite:///r.db"}, "TEXTSIEVE_REGISTRY: sqlite:// is not a registry"),
        ({"TEXTSIEVE_BLOBS": "\t"}, "TEXTSIEVE_BLOBS: empty; give the blob folder"),
    ],
)
def test_a_bad_registry_variable_is_an_input_error_naming_it(env: dict[str, str], expected_msg: str) -> None:
    with pytest.raises(InputError) as info:
        registry_location(environ=env)
    assert info.value.message.startswith(expected_msg) and info.value.exit_code == 2


def test_postgresql_urls_pass_and_their_passwords_are_never_echoed() -> None:
    url = "postgresql://textsieve:pw@db:5432/textsieve"
    assert registry_location(environ={"TEXTSIEVE_REGISTRY": url}).registry == url
    with pytest.raises(InputError) as info:
        registry_location(environ={"TEXTSIEVE_REGISTRY": "mysql://u:hunter2@db/x"})
    assert "hunter2" not in info.value.message


@pytest.mark.parametrize("url", ["localhost:8000", "ftp://h", "http://", "https:///path", "//h:80"])
def test_a_service_address_needs_http_and_a_host(url: str) -> None:
    with pytest.raises(ValueError, match="not an http:// or https:// address with a host"):
        check_url(url)
    with pytest.raises(InputError, match="^TEXTSIEVE_URL: "):
        service_url(environ={"TEXTSIEVE_URL": url})


@pytest.mark.parametrize("url", ["http://127.0.0.1:99999", "http://h:80x", "http://h:-1"])
def test_a_service_address_needs_a_port_that_is_a_port(url: str) -> None:
    with pytest.raises(ValueError, match="the port is not a number from 1 to 65535"):
        check_url(url)


@pytest.mark.parametrize("url", ["http://127.0.0.1:8000", "https://sieve.example/base/", "http://[::1]:9"])
def test_service_addresses_that_pass(url: str) -> None:
    assert check_url(url) == url
