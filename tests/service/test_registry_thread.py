"""The service's registry boundary: typed calls, all on one thread, errors arriving unchanged (but for
the storage's own failures, reworded to name no folder or database)."""

from __future__ import annotations

import asyncio
import threading
from collections.abc import AsyncIterator, Awaitable, Callable
from pathlib import Path

import pytest

from textsieve.errors import InputError, NotFoundError, StateError, TextsieveError, UnavailableError
from textsieve.registry import Registry, open_registry
from textsieve.service.modelset.registry_thread import RegistryThread

pytestmark = pytest.mark.anyio
Call = Callable[[RegistryThread], Awaitable[object]]


@pytest.fixture
async def store(tmp_path: Path) -> AsyncIterator[RegistryThread]:
    open_registry(tmp_path / "reg").close()  # an empty registry; the service opens with create=False
    store = RegistryThread(str(tmp_path / "reg"))
    await store.open()
    try:
        yield store
    finally:
        await store.close()


# Raised inside the registry on its thread; the awaiting request must see the same class and
# message, since the service maps exactly these classes to HTTP statuses (problems.KINDS).
ERROR_CASES: list[tuple[str, Call, type[TextsieveError], str]] = [
    ("live", lambda s: s.live("nobody"), NotFoundError, "no model 'nobody'"),
    ("version", lambda s: s.version("nobody", 1), NotFoundError, "no model 'nobody'"),
    ("versions", lambda s: s.versions("nobody"), NotFoundError, "no model 'nobody'"),
    ("history", lambda s: s.history("nobody"), NotFoundError, "no model 'nobody'"),
    ("fetch", lambda s: s.fetch("nobody"), NotFoundError, "no model 'nobody'"),
    ("bad name", lambda s: s.live("../etc"), InputError, "model name"),
    ("bad cursor", lambda s: s.changes_since(-1), InputError, "bad cursor -1"),
    ("promote to", lambda s: s.promote("m", 1, "retired", reason="r"), InputError, "cannot promote to 'retired'"),
    ("rollback", lambda s: s.rollback("nobody", reason="r"), NotFoundError, "no model 'nobody'"),
    (
        "record verdict",
        lambda s: s.record_verdict(
            "nobody", 1, text="t", predicted_label="a", predicted_probability=0.5, verdict_label="a", reviewer="r"
        ),
        NotFoundError,
        "no model 'nobody'",
    ),
]


@pytest.mark.parametrize(("call", "error", "words"), [c[1:] for c in ERROR_CASES], ids=[c[0] for c in ERROR_CASES])
async def test_a_registry_error_arrives_as_the_same_error(
    store: RegistryThread, call: Call, error: type[TextsieveError], words: str
) -> None:
    with pytest.raises(TextsieveError, match=words) as caught:
        await call(store)
    assert type(caught.value) is error


async def test_every_call_runs_on_the_thread_that_opened_the_registry(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    open_registry(tmp_path / "reg").close()
    store = RegistryThread(str(tmp_path / "reg"))
    opened_on: list[int] = []
    real_open = store._open

    def recording_open() -> Registry:
        opened_on.append(threading.get_ident())
        return real_open()

    monkeypatch.setattr(store, "_open", recording_open)
    await store.open()
    try:
        monkeypatch.setattr(store.registry, "cursor", threading.get_ident)
        ran_on = await asyncio.gather(*(store.cursor() for _ in range(8)))
        assert set(ran_on) == set(opened_on) and len(opened_on) == 1
        assert threading.get_ident() not in ran_on  # never on the event loop's thread
        assert await store.models() == []  # the real methods still answer through the same thread
    finally:
        await store.close()


async def test_calls_before_open_or_after_close_are_unavailable_not_attribute_errors(tmp_path: Path) -> None:
    open_registry(tmp_path / "reg").close()
    store = RegistryThread(str(tmp_path / "reg"))
    with pytest.raises(UnavailableError, match="has not opened its registry yet"):
        await store.models()
    await store.open()
    assert store.is_open and isinstance(store.registry, Registry)
    await store.close()
    assert not store.is_open
    with pytest.raises(UnavailableError, match="has not opened its registry yet"):
        await store.cursor()


async def test_a_state_conflict_on_the_thread_is_a_state_error(
    store: RegistryThread, tiny_bundles: dict[str, Path]
) -> None:
    await asyncio.to_thread(_publish, store.location, tiny_bundles["a"])
    with pytest.raises(StateError, match="has no live version"):
        await store.rollback("m", reason="nothing to go back to")
    promotion = await store.promote("m", 1, "live", reason="first", actor="tests", force=True)
    assert promotion.version.state == "live" and promotion.retired is None
    assert [e.kind for e in (await store.changes_since(0))[1]] == ["publish", "promote"]


def _publish(location: str, bundle: Path) -> None:
    with open_registry(location) as reg:
        reg.publish(bundle, "m", actor="tests")


async def test_a_storage_failure_reaches_callers_in_words_that_name_no_folder(tmp_path: Path) -> None:
    """A SQLite registry whose database is damaged: the registry's words name its folder (right for
    the CLI); the service's callers, who may hold no token, get the same class without it, and
    private_detail keeps the registry's words for the log (DEVELOPERS.md: callers without a token
    learn no folder, host or database of the machine)."""
    from textsieve.service.modelset.registry_thread import private_detail

    folder = tmp_path / "secret-folder-name" / "reg"
    open_registry(folder).close()
    store = RegistryThread(str(folder))
    await store.open()
    try:
        for db in folder.glob("registry.sqlite3*"):  # what sqlite reads is no longer a database
            db.write_bytes(b"this is not a database" * 512)
        with pytest.raises(TextsieveError) as caught:
            await store.models()
    finally:
        await store.close()
    assert "secret-folder-name" not in caught.value.message, caught.value.message
    assert "log says why" in caught.value.message
    assert "secret-folder-name" in private_detail(caught.value)
