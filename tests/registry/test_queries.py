"""The metadata stores (SQLite, PostgreSQL): named transactional migrations and the
invariants the database itself enforces."""

from __future__ import annotations

import re

import pytest

from tests.helpers.registries import RegistrySpec
from textsieve.errors import RegistryError, StateError
from textsieve.registry import STATES, Registry, State
from textsieve.registry.migrations import MIGRATIONS, Migration, applied, migrate
from textsieve.registry.queries import Queries

NOW = "2026-01-01T00:00:00.000000+00:00"


def test_every_step_is_recorded_by_name_once(registry: Registry, spec: RegistrySpec) -> None:
    assert applied(registry.backend) == [m.name for m in MIGRATIONS]
    assert [m.name for m in MIGRATIONS] == sorted(m.name for m in MIGRATIONS)  # names sort in apply order
    assert migrate(registry.backend, NOW) == []  # opening again applies nothing
    with spec.open() as again:
        assert applied(again.backend) == [m.name for m in MIGRATIONS]


def test_a_failing_step_leaves_no_trace(registry: Registry) -> None:
    broken = Migration("0999_broken", "CREATE TABLE half_done (x INTEGER); CREATE TABLE half_done (x INTEGER)")
    with pytest.raises(RegistryError):
        migrate(registry.backend, NOW, steps=(*MIGRATIONS, broken))
    assert applied(registry.backend) == [m.name for m in MIGRATIONS]
    with pytest.raises(RegistryError), registry.backend.read() as tx:
        tx.all("SELECT x FROM half_done")
    # and a good step after it is applied, recorded, usable
    good = Migration("0999_notes", "CREATE TABLE notes (id {serial}, body TEXT NOT NULL)")
    assert migrate(registry.backend, NOW, steps=(*MIGRATIONS, good)) == ["0999_notes"]
    with registry.backend.write() as tx:
        tx.run("INSERT INTO notes (body) VALUES (?)", ("hello",))
        assert tx.all("SELECT id, body FROM notes") == [{"id": 1, "body": "hello"}]


def test_a_registry_from_a_newer_textsieve_is_refused(registry: Registry, spec: RegistrySpec) -> None:
    with registry.backend.write() as tx:
        tx.run("INSERT INTO schema_migrations (name, applied_at) VALUES (?, ?)", ("9000_future", NOW))
    with pytest.raises(RegistryError, match=r"9000_future.*upgrade textsieve"):
        spec.open()


@pytest.mark.parametrize("additive", [True, False])
def test_a_newer_releases_additive_steps_leave_the_registry_to_an_older_one(
    registry: Registry, spec: RegistrySpec, additive: bool
) -> None:
    """A newer release that only adds (a nullable column, a table) records its step as additive, and
    this release, which knows nothing of it, reads and writes the registry as before: replicas of two
    releases share one registry through a rolling upgrade (the expand half of an expand-and-contract
    schema change: common practice). A step not marked additive is still refused."""
    newer = Migration(
        "9001_newer",
        "ALTER TABLE verdicts ADD COLUMN later_note TEXT; CREATE TABLE later_things (id {serial})",
        additive=additive,
    )
    assert migrate(registry.backend, NOW, steps=(*MIGRATIONS, newer)) == ["9001_newer"]
    if not additive:
        with pytest.raises(RegistryError, match=r"schema step '9001_newer'.*upgrade textsieve"):
            spec.open()
        return
    assert migrate(registry.backend, NOW) == []  # this release: nothing to apply, nothing refused
    with spec.open() as older:
        assert applied(older.backend) == sorted([m.name for m in MIGRATIONS] + ["9001_newer"])
        with older.backend.write() as tx:
            q = Queries(tx)
            q.ensure_model("m", NOW)
            _insert(q, 1, "live")
        with older.backend.read() as tx:
            assert [v.state for v in Queries(tx).versions("m")] == ["live"]
    # A later newer step that is not additive is refused, though an additive one came before it.
    breaking = Migration("9002_breaking", "ALTER TABLE verdicts ADD COLUMN must TEXT")
    migrate(registry.backend, NOW, steps=(*MIGRATIONS, newer, breaking))
    with pytest.raises(RegistryError, match=r"schema step '9002_breaking'"):
        spec.open()


def _insert(q: Queries, version: int, state: str) -> None:
    q.insert_version(
        model="m",
        version=version,
        labels=["a", "b"],
        manifest_sha256=f"{version:064x}",
        created_at=NOW,
        published_by="t",
        reason="",
        accuracy=0.5,
        macro_f1=0.5,
        parity_passed=True,
        files={},
    )
    q.set_state("m", version, state)


@pytest.mark.parametrize("state", ["live", "candidate"])
def test_the_database_itself_allows_one_live_and_one_candidate(registry: Registry, state: str) -> None:
    with registry.backend.write() as tx:
        q = Queries(tx)
        q.ensure_model("m", NOW)
        _insert(q, 1, state)
        _insert(q, 2, "retired")
    with pytest.raises(StateError), registry.backend.write() as tx:
        Queries(tx).set_state("m", 2, state)
    with registry.backend.read() as tx:
        assert [v.state for v in Queries(tx).versions("m")] == [state, "retired"]


def test_states_outside_the_lifecycle_are_refused(registry: Registry) -> None:
    with pytest.raises(StateError), registry.backend.write() as tx:
        q = Queries(tx)
        q.ensure_model("m", NOW)
        _insert(q, 1, "staging")


def test_the_state_enum_holds_the_strings_the_schema_allows(registry: Registry) -> None:
    """The database and JSON keep the stored strings: each member is its string and reads back as the member."""
    check = re.search(r"CHECK \(state IN \(([^)]*)\)\)", MIGRATIONS[0].sql)
    assert check is not None
    assert [s.strip().strip("'") for s in check.group(1).split(",")] == [str(s) for s in STATES] == list(State)
    with registry.backend.write() as tx:
        q = Queries(tx)
        q.ensure_model("m", NOW)
        _insert(q, 1, State.CANDIDATE)
    with registry.backend.read() as tx:
        assert tx.all("SELECT state FROM versions") == [{"state": "candidate"}]
        info = Queries(tx).in_state("m", State.CANDIDATE)
    assert info is not None and info.state is State.CANDIDATE
    assert info.model_dump(mode="json")["state"] == "candidate" and f"{info.state}" == "candidate"


def test_a_failed_write_transaction_leaves_nothing(registry: Registry) -> None:
    with pytest.raises(RuntimeError), registry.backend.write() as tx:
        Queries(tx).ensure_model("m", NOW)
        raise RuntimeError("crash in the middle")
    assert registry.models() == []


def test_postgres_tests_fail_in_ci_when_the_server_is_not_configured(monkeypatch: pytest.MonkeyPatch) -> None:
    from tests.helpers.registries import postgres_url

    monkeypatch.delenv("TEXTSIEVE_TEST_PG", raising=False)
    monkeypatch.setenv("CI", "true")
    with pytest.raises(pytest.fail.Exception, match="TEXTSIEVE_TEST_PG is not set"):
        postgres_url()
    monkeypatch.delenv("CI")
    with pytest.raises(pytest.skip.Exception):
        postgres_url()
    monkeypatch.setenv("TEXTSIEVE_TEST_PG", "postgresql://u:p@127.0.0.1:5432/db")
    assert postgres_url() == "postgresql://u:p@127.0.0.1:5432/db"
