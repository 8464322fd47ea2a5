"""Verdicts recorded under an idempotency key, on SQLite and PostgreSQL: a repeat returns the first
verdict, another request with the key is refused, concurrent requests store one verdict, deletion
frees the key, and registries from before the key migrate without loss.

The behaviour checked is the one draft-ietf-httpapi-idempotency-key-header asks of a resource
server (sections "Idempotency Enforcement Scenarios" and "Error Scenarios", read from the working
group's draft): a retry after the first request completed gets that request's result; a key reused
with a different payload is refused (422 over HTTP).
"""

from __future__ import annotations

import threading
from pathlib import Path
from typing import Any

import pytest

import textsieve.registry.api as registry_api
from tests.helpers.registries import RegistrySpec
from textsieve.errors import InputError, KeyReusedError, StateError
from textsieve.registry import Registry
from textsieve.registry.migrations import MIGRATIONS, applied, migrate
from textsieve.registry.verdicts import Recorded

KEY = "8e03978e-40d5-43e8-bc93-6894a57f9324"  # the draft's own example key
ASKED: dict[str, Any] = {
    "text": "I was charged twice for one ride at Market Square.",
    "predicted_label": "billing",
    "predicted_probability": 0.8,
    "verdict_label": "billing",
    "reviewer": "ana",
}


def _once(registry: Registry, key: str = KEY, model: str = "helpdesk", **change: Any) -> Recorded:
    return registry.verdicts.record_once(model, 1, key=key, **{**ASKED, **change})


def test_a_repeat_with_the_key_returns_the_first_verdict_and_stores_nothing(
    registry: Registry, tiny_bundles: dict[str, Path]
) -> None:
    registry.publish(tiny_bundles["a"], "helpdesk", actor="ci")
    first = _once(registry)
    again = _once(registry)
    assert (first.replayed, again.replayed) == (False, True)
    assert again.verdict == first.verdict  # same id, same time: the first verdict, not a copy
    assert [v.id for v in registry.verdicts.of("helpdesk")] == [first.verdict.id]
    assert registry.verdicts.agreement("helpdesk")[0].verdicts == 1  # the judgement is counted once
    # Without a key every call is a new verdict, as before.
    registry.verdicts.record("helpdesk", 1, **ASKED)
    registry.verdicts.record("helpdesk", 1, **ASKED)
    assert len(registry.verdicts.of("helpdesk")) == 3


@pytest.mark.parametrize(
    "change",
    [
        {"verdict_label": "repair"},
        {"reviewer": "bo"},
        {"text": "Another text."},
        {"predicted_probability": 0.81},
        {"predicted_label": "repair"},
    ],
)
def test_the_key_with_another_request_is_refused_and_nothing_is_stored(
    registry: Registry, tiny_bundles: dict[str, Path], change: dict[str, Any]
) -> None:
    registry.publish(tiny_bundles["a"], "helpdesk", actor="ci")
    first = _once(registry)
    with pytest.raises(KeyReusedError, match=f"already used for another verdict on 'helpdesk' \\(#{first.verdict.id}"):
        _once(registry, **change)
    assert registry.verdicts.of("helpdesk") == [first.verdict]


def test_keys_are_per_model(registry: Registry, tiny_bundles: dict[str, Path]) -> None:
    registry.publish(tiny_bundles["a"], "helpdesk", actor="ci")
    registry.publish(tiny_bundles["a"], "triage", actor="ci")
    a, b = _once(registry), _once(registry, model="triage")
    assert not a.replayed and not b.replayed
    assert len(registry.verdicts.of("helpdesk")) == len(registry.verdicts.of("triage")) == 1


@pytest.mark.parametrize(
    ("key", "why"),
    [("", "bad idempotency key ''"), ("k" * 256, "1 to 255"), ("clé", "printable ASCII"), ("a\nb", "printable ASCII")],
)
def test_keys_outside_the_rule_are_refused(
    registry: Registry, tiny_bundles: dict[str, Path], key: str, why: str
) -> None:
    registry.publish(tiny_bundles["a"], "helpdesk", actor="ci")
    with pytest.raises(InputError, match=why):
        _once(registry, key=key)
    assert registry.verdicts.of("helpdesk") == []
    assert not _once(registry, key="k" * 255).replayed  # the longest allowed


def test_deleting_a_verdict_deletes_its_key(registry: Registry, tiny_bundles: dict[str, Path]) -> None:
    registry.publish(tiny_bundles["a"], "helpdesk", actor="ci")
    first = _once(registry)
    registry.verdicts.delete("helpdesk", ids=[first.verdict.id], actor="dpo", reason="request #41")
    with registry.backend.read() as tx:
        assert tx.all("SELECT id FROM verdicts WHERE idempotency_key = ?", (KEY,)) == []
    # The key is free again: it records a new verdict, even for another request.
    again = _once(registry, verdict_label="repair")
    assert not again.replayed and again.verdict.id != first.verdict.id


def test_the_database_itself_holds_one_verdict_per_model_and_key(
    registry: Registry, tiny_bundles: dict[str, Path]
) -> None:
    registry.publish(tiny_bundles["a"], "helpdesk", actor="ci")
    _once(registry)
    row = (
        "INSERT INTO verdicts (model, version, text, predicted_label, predicted_probability, verdict_label, reviewer, "
        "at, idempotency_key, request_sha256) "
        "VALUES ('helpdesk', 1, 't', 'billing', 0.5, 'billing', 'x', 'now', ?, 's')"
    )
    with pytest.raises(StateError, match="conflicts with the registry's rules"), registry.backend.write() as tx:
        tx.run(row, (KEY,))
    with registry.backend.write() as tx:  # rows without a key are not held to it
        tx.run(row.replace("?", "NULL"))
        tx.run(row.replace("?", "NULL"))


def test_concurrent_requests_with_one_key_store_one_verdict(spec: RegistrySpec, tiny_bundles: dict[str, Path]) -> None:
    """Eight writers, each with its own connection, released together."""
    with spec.open() as reg:
        reg.publish(tiny_bundles["a"], "helpdesk", actor="ci")
    writers = [spec.open() for _ in range(8)]
    start = threading.Barrier(len(writers))
    results: list[Recorded | BaseException] = []

    def write(reg: Registry) -> None:
        start.wait()
        try:
            results.append(_once(reg))
        except BaseException as exc:  # noqa: BLE001 - reported by the assertion below
            results.append(exc)

    threads = [threading.Thread(target=write, args=(r,)) for r in writers]
    try:
        for t in threads:
            t.start()
        for t in threads:
            t.join(timeout=120)
    finally:
        for r in writers:
            r.close()
    assert all(isinstance(r, Recorded) for r in results) and len(results) == len(writers), results
    recorded = [r for r in results if isinstance(r, Recorded)]
    assert len({r.verdict.id for r in recorded}) == 1
    assert sorted(r.replayed for r in recorded) == [False] + [True] * (len(writers) - 1)
    with spec.open() as reg:
        assert len(reg.verdicts.of("helpdesk")) == 1


def test_a_registry_from_before_the_keys_migrates_without_loss(
    spec: RegistrySpec, tiny_bundles: dict[str, Path], monkeypatch: pytest.MonkeyPatch
) -> None:
    before = tuple(m for m in MIGRATIONS if m.name <= "0007_verdicts")
    assert [m.name for m in MIGRATIONS][len(before)] == "0008_verdict_keys"  # the next step, later ones after it
    with monkeypatch.context() as m:
        m.setattr(registry_api, "migrate", lambda backend, now: migrate(backend, now, before))
        with spec.open() as old:
            assert applied(old.backend)[-1] == "0007_verdicts"
            old.publish(tiny_bundles["a"], "helpdesk", actor="ci")
            with old.backend.write() as tx:  # verdicts as the release before the keys wrote them
                for i, label in enumerate(["billing", "repair", "billing"]):
                    tx.run(
                        "INSERT INTO verdicts (model, version, text, predicted_label, predicted_probability, "
                        "verdict_label, reviewer, at) VALUES (?, ?, ?, ?, ?, ?, ?, ?)",
                        ("helpdesk", 1, f"text {i}", "billing", 0.5 + i / 10, label, "ana", f"2026-11-0{i + 1}T00:00Z"),
                    )
            kept = old.verdicts.of("helpdesk")
    with spec.open() as new:
        assert applied(new.backend)[len(before)] == "0008_verdict_keys"
        assert new.verdicts.of("helpdesk") == kept and len(kept) == 3
        with new.backend.read() as tx:
            keys = tx.all("SELECT idempotency_key, request_sha256 FROM verdicts ORDER BY id")
        assert keys == [{"idempotency_key": None, "request_sha256": None}] * 3
        first = _once(new)
        assert _once(new).verdict == first.verdict and first.verdict.id > kept[-1].id
        assert [a.verdicts for a in new.verdicts.agreement("helpdesk")] == [4]
