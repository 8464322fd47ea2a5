"""Fixtures for tests that need a registry on each backend, SQLite and PostgreSQL: ``spec`` (the
registry and reliability tests use it); the opened ``registry`` lives in tests/registry/conftest.py.

Loaded for the whole suite by ``pytest_plugins`` in tests/conftest.py. PostgreSQL tests run against the real
server that scripts/test-services.sh starts (its URL in TEXTSIEVE_TEST_PG); each test gets its
own schema, dropped afterwards. Without the server they are skipped on a developer machine
and fail in CI (CI=true), so they cannot go missing unnoticed.
"""

from __future__ import annotations

import secrets
import urllib.parse
from collections.abc import Iterator
from pathlib import Path

import pytest

from tests.helpers.registries import RegistrySpec, postgres_url


@pytest.fixture
def pg_schema_url() -> Iterator[str]:
    """A URL whose connections use a fresh, empty schema; the schema is dropped afterwards."""
    import psycopg

    base = postgres_url()
    schema = f"ts_{secrets.token_hex(6)}"
    with psycopg.connect(base, autocommit=True, connect_timeout=5) as conn:
        conn.execute(f"CREATE SCHEMA {schema}")
    sep = "&" if "?" in base else "?"
    yield f"{base}{sep}options={urllib.parse.quote(f'-csearch_path={schema}')}"
    with psycopg.connect(base, autocommit=True, connect_timeout=5) as conn:
        conn.execute(f"DROP SCHEMA {schema} CASCADE")


@pytest.fixture(params=["sqlite", pytest.param("postgres", marks=pytest.mark.postgres)])
def spec(request: pytest.FixtureRequest, tmp_path: Path) -> RegistrySpec:
    """Where this test's registry lives, once per backend."""
    if request.param == "sqlite":
        return RegistrySpec("sqlite", str(tmp_path / "reg"), None)
    url = request.getfixturevalue("pg_schema_url")
    return RegistrySpec("postgres", url, str(tmp_path / "blobs"))
