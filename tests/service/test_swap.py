"""Hot swap, pinned versions and readiness.

A promotion or rollback made directly in the registry (as another process would) is noticed by
polling; requests keep succeeding throughout, each names the version that produced it, and its
numbers are that version's (checked against a Predictor on the version's own bundle).
"""

from __future__ import annotations

import asyncio
import time
from pathlib import Path
from typing import Any

import numpy as np
import pytest

from tests.helpers.net import poll_readyz_async, wait_ready_async
from tests.helpers.service import MODEL, make_registry, serving, settings_for
from textsieve.registry import open_registry
from textsieve.registry.runtime import Predictor

pytestmark = pytest.mark.anyio
PROBE = ["my card was charged twice", "the boiler repair was quick and great", "cannot log in since Monday"]


def _reference(bundle: Path) -> np.ndarray:
    p = Predictor.from_bundle(bundle)
    return np.array([list(pred.probabilities.values()) for pred in p.predict(PROBE)])


def _probs(reply: dict[str, Any]) -> np.ndarray:
    return np.array([list(r["probabilities"].values()) for r in reply["results"]])


async def _registry(call: str, folder: Path, *args: Any, **kwargs: Any) -> Any:
    def run() -> Any:
        with open_registry(folder) as reg:
            return getattr(reg, call)(*args, **kwargs)

    return await asyncio.to_thread(run)


async def test_swap_on_registry_change_without_failed_requests(
    registry_dir: Path, tiny_bundles: dict[str, Path]
) -> None:
    expected = {1: _reference(tiny_bundles["a"]), 2: _reference(tiny_bundles["b"])}
    assert np.abs(expected[1] - expected[2]).max() > 1e-3  # the two versions are distinguishable
    replies: list[tuple[int, float, dict[str, Any]]] = []
    failures: list[str] = []
    stop = asyncio.Event()

    async with serving(settings_for(registry_dir, poll_seconds=0.1)) as (app, client):

        async def hammer(worker: int) -> None:
            while not stop.is_set():
                r = await client.post("/v1/predict", json={"texts": PROBE})
                if r.status_code != 200:
                    failures.append(r.text)
                else:
                    replies.append((worker, time.monotonic(), r.json()))

        workers = [asyncio.create_task(hammer(i)) for i in range(6)]
        await asyncio.sleep(0.3)
        await _registry("promote", registry_dir, MODEL, 2, "live", reason="swap test", actor="tests", force=True)
        deadline = time.monotonic() + 20
        while app.state.models.live[MODEL].version != 2 and time.monotonic() < deadline:
            await asyncio.sleep(0.05)
        await asyncio.sleep(0.3)
        await _registry("rollback", registry_dir, MODEL, reason="and back", actor="tests")
        while app.state.models.live[MODEL].version != 1 and time.monotonic() < deadline:
            await asyncio.sleep(0.05)
        await asyncio.sleep(0.3)
        stop.set()
        await asyncio.gather(*workers)
        metrics = (await client.get("/metrics")).text

    assert not failures
    versions = [reply["version"] for _, _, reply in replies]
    assert versions[0] == 1 and 2 in versions and versions[-1] == 1
    for _, _, reply in replies:
        # Each reply is wholly one version's numbers: nothing mixed within a request.
        assert np.abs(_probs(reply) - expected[reply["version"]]).max() <= 1e-5
    for worker in range(6):  # per client, versions go 1 … 2 … 1, never back and forth
        seq = [reply["version"] for w, _, reply in replies if w == worker]
        changes = sum(1 for a, b in zip(seq, seq[1:], strict=False) if a != b)
        assert changes <= 2
    assert f'textsieve_swaps_total{{model="{MODEL}",outcome="swapped"}} 2.0\n' in metrics


async def test_in_flight_requests_finish_on_the_version_they_started_with(registry_dir: Path) -> None:
    async with serving(settings_for(registry_dir, poll_seconds=600)) as (app, client):
        models = app.state.models
        old = await models.acquire(MODEL, None)  # a request that has started
        await _registry("promote", registry_dir, MODEL, 2, "live", reason="swap", actor="tests", force=True)
        await models.refresh(MODEL, why="test")
        assert models.live[MODEL].version == 2 and old.version == 1
        assert not old.closed and old.loaded_in(app.state.pool.procs)  # still usable by its request
        results = await old.batcher.submit(PROBE, 2)
        assert len(results) == len(PROBE)
        new_reply = (await client.post("/v1/predict", json={"texts": PROBE})).json()
        assert new_reply["version"] == 2
        models.release(old)
        for _ in range(100):
            if old.closed:
                break
            await asyncio.sleep(0.01)
        assert old.closed and not old.loaded_in(app.state.pool.procs)  # sessions dropped once the last request ended


async def test_pinned_versions(registry_dir: Path, tiny_bundles: dict[str, Path]) -> None:
    async with serving(settings_for(registry_dir, pinned_versions=1)) as (app, client):
        pinned = (await client.post("/v1/predict", json={"texts": PROBE, "version": 2})).json()
        live = (await client.post("/v1/predict", json={"texts": PROBE, "model": MODEL, "version": 1})).json()
        default = (await client.post("/v1/predict", json={"texts": PROBE})).json()
        assert list(app.state.models.pinned) == [(MODEL, 2)]
    assert pinned["version"] == 2 and live["version"] == 1 and default["version"] == 1
    assert np.abs(_probs(pinned) - _reference(tiny_bundles["b"])).max() <= 1e-5
    async with serving(settings_for(registry_dir, pinned_versions=0)) as (_, client):
        r = await client.post("/v1/predict", json={"texts": PROBE, "version": 2})
    assert r.status_code == 404 and "TEXTSIEVE_PINNED_VERSIONS" in r.json()["detail"]


async def test_not_ready_until_a_live_version_exists(tmp_path: Path, tiny_bundles: dict[str, Path]) -> None:
    folder = make_registry(tmp_path / "registry", tiny_bundles, live=None)
    async with serving(settings_for(folder, models=[MODEL], poll_seconds=0.1), ready=False) as (_, client):
        r = await poll_readyz_async(
            client, lambda r: "no-live-version" in r.text, timeout=20, awaiting="the no-live-version reason"
        )
        assert r.status_code == 503 and r.json()["ready"] is False
        assert "promote" in r.json()["reason"]
        assert (await client.get("/healthz")).status_code == 200
        predict = await client.post("/v1/predict", json={"texts": ["a"]})
        assert predict.status_code == 404 and "no live version" in predict.json()["detail"]
        await _registry("promote", folder, MODEL, 2, "live", reason="go", actor="tests", force=True)
        body = await wait_ready_async(client, timeout=20)
        assert body["models"][MODEL]["version"] == 2


async def test_not_ready_reasons(tmp_path: Path) -> None:
    async with serving(settings_for(tmp_path / "missing"), ready=False) as (_, client):
        r = await _settled(client)
        assert r.status_code == 503 and "startup failed" in r.json()["reason"]
        # Readiness answers callers without a token: no path of this machine (the log has it).
        assert str(tmp_path) not in r.text and "the server's log says why" in r.json()["reason"]
        # Nothing was ever loaded: once a poll has failed too, the registry's note may not say that the
        # loaded versions keep serving (found by an audit, 2026-12-05).
        noted = await poll_readyz_async(client, lambda r: bool(r.json()["degraded"]), timeout=20, awaiting="a poll")
        assert noted.status_code == 503 and noted.json()["degraded"][0].startswith("registry: unavailable since")
        assert "keep serving" not in noted.json()["degraded"][0], noted.json()
        assert r.headers["retry-after"]
        p = await client.post("/v1/predict", json={"texts": ["a"]})
        assert p.status_code == 503 and p.headers["content-type"] == "application/problem+json"
        assert str(tmp_path) not in p.text
    empty = tmp_path / "empty"
    open_registry(empty).close()
    async with serving(settings_for(empty), ready=False) as (_, client):
        r = await _settled(client)
        assert r.status_code == 503 and "no model has a live version" in r.json()["reason"]


async def _settled(client: Any) -> Any:
    return await poll_readyz_async(
        client, lambda r: "starting" not in r.json()["reason"], timeout=20, awaiting="start-up to finish"
    )


async def test_damaged_blob_fails_startup_and_a_failed_swap_keeps_the_old_version(registry_dir: Path) -> None:
    with open_registry(registry_dir) as reg:
        v1, v2 = reg.version(MODEL, 1), reg.version(MODEL, 2)
        reg.promote(MODEL, 2, "live", reason="v2 first", actor="tests", force=True)
        reg.rollback(MODEL, reason="back to 1", actor="tests")
    blobs = registry_dir / "blobs"

    # 1. The live version's model file is damaged: the service never becomes ready.
    path = blobs / v1.files["model.onnx"]
    original = path.read_bytes()
    path.chmod(0o644)
    path.write_bytes(original[:-10] + b"0123456789")
    async with serving(settings_for(registry_dir, poll_seconds=600), ready=False) as (_, client):
        r = await _settled(client)
        assert r.status_code == 503
        assert "could not be loaded" in r.json()["reason"] and "altered" in r.json()["reason"]
    path.write_bytes(original)

    # 2. Version 2 is damaged after it became live again elsewhere: version 1 keeps serving.
    async with serving(settings_for(registry_dir, poll_seconds=600)) as (app, client):
        await _registry("promote", registry_dir, MODEL, 2, "live", reason="again", actor="tests", force=True)
        path2 = blobs / v2.files["model.onnx"]
        path2.chmod(0o644)
        path2.write_bytes(path2.read_bytes()[:-4] + b"xxxx")
        await app.state.models.poll_once()
        ready = await client.get("/readyz")
        predict = (await client.post("/v1/predict", json={"texts": ["a"]})).json()
        metrics = (await client.get("/metrics")).text
    assert ready.status_code == 200
    assert "version 2 could not be loaded" in ready.json()["models"][MODEL]["detail"]
    assert predict["version"] == 1
    assert f'textsieve_swaps_total{{model="{MODEL}",outcome="failed"}} 1.0\n' in metrics


async def test_a_change_read_just_before_the_registry_went_away_is_acted_on_once_it_is_back(
    registry_dir: Path,
) -> None:
    """Found on a real textsieve serve whose PostgreSQL was stopped right after a promotion: after the
    database came back the replica kept serving the old version (still version 1 twenty seconds
    later, while its /readyz said nothing was degraded). The poll had read the promotion and moved
    its cursor past it, then the registry went away while the new live version was looked up; the
    change was lost. Here the look-up fails once, as it did during that outage."""
    from tests.helpers.net import readyz_until
    from textsieve.errors import UnavailableError

    async with serving(settings_for(registry_dir, poll_seconds=0.1)) as (app, client):
        store = app.state.store
        real_live = store.live
        failed = asyncio.Event()

        async def live_once_unreachable(name: str) -> Any:
            if not failed.is_set():
                failed.set()
                raise UnavailableError("the registry's database cannot be reached (a stand-in for the outage)")
            return await real_live(name)

        store.live = live_once_unreachable
        await _registry(
            "promote", registry_dir, MODEL, 2, "live", reason="before the outage", actor="tests", force=True
        )
        await asyncio.wait_for(failed.wait(), 10)
        body = await readyz_until(
            client, lambda b: b["models"][MODEL].get("version") == 2, timeout=10, awaiting="version 2 after the outage"
        )
        assert not body["degraded"]
        r = await client.post("/v1/predict", json={"texts": PROBE})
        assert r.json()["version"] == 2


async def test_acquire_live_counts_as_acquire_does_and_leaves_pins_to_it(registry_dir: Path) -> None:
    # The predict route takes the live version without a coroutine (ModelSet.acquire_live); a
    # request counted that way must hold its version through a swap exactly as acquire's does.
    async with serving(settings_for(registry_dir, poll_seconds=600)) as (app, client):
        models = app.state.models
        live = models.live[MODEL]
        before = live.active
        assert models.acquire_live(MODEL, None) is live and models.acquire_live(None, live.version) is live
        assert live.active == before + 2
        models.release(live)
        models.release(live)
        assert models.acquire_live(MODEL, live.version + 1) is None  # a pin: acquire's to load
        assert models.acquire_live("no-such-model", None) is None  # acquire's to word the refusal
        assert live.active == before
        old = models.acquire_live(None, None)
        assert old is live
        await _registry("promote", registry_dir, MODEL, 2, "live", reason="swap", actor="tests", force=True)
        await models.refresh(MODEL, why="test")
        assert models.live[MODEL].version == 2 and not old.closed
        results, scores = await old.batcher.run(PROBE, 2, None, keep_scores=False)
        assert len(results) == len(PROBE) and scores is None
        models.release(old)
        for _ in range(100):
            if old.closed:
                break
            await asyncio.sleep(0.01)
        assert old.closed
