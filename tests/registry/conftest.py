"""Fixtures only the registry tests use; ``spec`` (SQLite and PostgreSQL) comes from
tests/helpers/registry_fixtures.py, shared with the reliability tests."""

from __future__ import annotations

from collections.abc import Iterator

import pytest

from tests.helpers.registries import RegistrySpec
from textsieve.registry import Registry


@pytest.fixture
def registry(spec: RegistrySpec) -> Iterator[Registry]:
    """The registry ``spec`` names, opened for this test and closed after it, once per backend."""
    reg = spec.open()
    try:
        yield reg
    finally:
        reg.close()
