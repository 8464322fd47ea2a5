"""Damaged blobs: a version whose stored file is truncated, altered or missing is refused on
load, while the service keeps serving the version it already has and reports the broken one as
not ready; once the blob is repaired, the next retry brings the new version in.

tests/service/test_swap.py covers an altered model file at startup and during a swap; this
module adds truncation and deletion, other files of the bundle, the registry's own refusal,
requests pinned to the broken version, the readiness report and the recovery.
"""

from __future__ import annotations

import asyncio
from collections.abc import Callable
from pathlib import Path

import pytest

from tests.helpers.net import readyz_until
from tests.helpers.service import MODEL, serving, settings_for
from textsieve.errors import IntegrityError
from textsieve.registry import open_registry

pytestmark = pytest.mark.anyio


def _truncate(path: Path) -> None:
    data = path.read_bytes()
    path.write_bytes(data[: len(data) // 2])


def _flip(path: Path) -> None:
    data = bytearray(path.read_bytes())
    data[len(data) // 3] ^= 0x01  # one bit: the smallest change sha256 must still notice
    path.write_bytes(bytes(data))


def _delete(path: Path) -> None:
    path.unlink()


DAMAGE: dict[str, tuple[str, Callable[[Path], None], str]] = {
    "truncated model": ("model.onnx", _truncate, "altered"),
    "one bit of the manifest": ("manifest.json", _flip, "altered"),
    "missing model": ("model.onnx", _delete, "missing"),
}


def _damage(registry: Path, kind: str) -> tuple[Path, bytes, str]:
    """Damage version 2's file (one it does not share with version 1); returns what restores it."""
    name, act, word = DAMAGE[kind]
    with open_registry(registry) as reg:
        v1, v2 = reg.version(MODEL, 1), reg.version(MODEL, 2)
    digest = v2.files[name]
    assert digest not in v1.files.values()
    path = registry / "blobs" / digest
    original = path.read_bytes()
    path.chmod(0o644)
    act(path)
    return path, original, word


@pytest.mark.parametrize("kind", list(DAMAGE))
def test_the_registry_refuses_a_damaged_version_and_leaves_no_partial_copy(registry_dir: Path, kind: str) -> None:
    _, _, word = _damage(registry_dir, kind)
    with open_registry(registry_dir) as reg:
        with pytest.raises(IntegrityError, match=word):
            reg.fetch(MODEL, 2)
        with pytest.raises(IntegrityError, match=word):
            reg.promote(MODEL, 2, "live", reason="damaged", actor="tests", force=True)  # not even forced
        assert reg.live(MODEL).version == 1  # type: ignore[union-attr]
        assert reg.fetch(MODEL, 1).manifest.labels  # the intact version is untouched
    cache = registry_dir / "cache" / MODEL
    assert not [p for p in cache.iterdir() if p.name.startswith("2-") or ".tmp" in p.name]


@pytest.mark.parametrize("kind", list(DAMAGE))
async def test_a_damaged_new_live_version_is_refused_while_the_old_one_keeps_serving(
    registry_dir: Path, kind: str
) -> None:
    settings = settings_for(registry_dir, poll_seconds=0.1)
    async with serving(settings) as (_, client):
        assert (await client.post("/v1/predict", json={"texts": ["charged twice"]})).json()["version"] == 1
        # Promoted elsewhere while intact, then damaged in storage before this replica fetched
        # it. Both calls block the event loop on purpose: the poller cannot run in between.
        with open_registry(registry_dir) as reg:
            reg.promote(MODEL, 2, "live", reason="promoted elsewhere", actor="tests", force=True)
        path, original, word = _damage(registry_dir, kind)

        ready = await readyz_until(
            client, lambda body: "failed_version" in body["models"][MODEL], timeout=20, awaiting="the failed version"
        )
        entry = ready["models"][MODEL]
        assert ready["ready"] is True, "the service still answers every request"
        assert entry["version"] == 1 and entry["state"] == "ready"
        failed = entry["failed_version"]
        assert failed["version"] == 2 and failed["ready"] is False and word in failed["reason"]
        assert any("version 2" in d for d in ready["degraded"]), ready

        replies = await asyncio.gather(
            *[client.post("/v1/predict", json={"texts": ["login fails", "great"]}) for _ in range(8)]
        )
        assert {r.status_code for r in replies} == {200}
        assert {r.json()["version"] for r in replies} == {1}
        pinned = await client.post("/v1/predict", json={"texts": ["a"], "version": 2})
        assert pinned.status_code == 503 and pinned.headers["content-type"] == "application/problem+json"
        assert pinned.json()["type"] == "/problems/integrity" and word in pinned.json()["detail"]
        assert pinned.headers["retry-after"]
        metrics = (await client.get("/metrics")).text
        assert f'textsieve_swaps_total{{model="{MODEL}",outcome="failed"}}' in metrics

        # Repaired storage: the next retry loads version 2 and the report clears.
        if path.exists():
            path.chmod(0o644)
        path.write_bytes(original)
        healed = await readyz_until(
            client, lambda body: body["models"][MODEL].get("version") == 2, timeout=30, awaiting="version 2 to serve"
        )
        assert "failed_version" not in healed["models"][MODEL] and not healed["degraded"]
        assert (await client.post("/v1/predict", json={"texts": ["charged twice"]})).json()["version"] == 2
