"""Drift windows shared by replicas (service/liveloop/drift.py), on one SQLite registry and on the
real PostgreSQL: two replicas answering different texts report the same window, equal to what
NumPy makes of the union of their replies; a new replica (a restart) finds it; a flush under way
at shutdown loses nothing; a registry that refuses flushes fails no prediction and loses no count;
real ``textsieve serve`` processes stopped by SIGTERM leave their counts to the next replica."""

from __future__ import annotations

import asyncio
import json
import subprocess
import sys
import time
from pathlib import Path
from typing import Any

import httpx
import pytest

from tests.helpers.drift import psi_numpy, tokens_histogram
from tests.helpers.environment import child_env
from tests.helpers.jsonl import read_jsonl
from tests.helpers.registries import RegistrySpec
from tests.helpers.servers import ServerProcess
from tests.helpers.service import MODEL, serving, settings_for
from textsieve.errors import UnavailableError
from textsieve.registry.bundle import open_bundle
from textsieve.service.client import render_drift
from textsieve.service.settings import Settings

pytestmark = pytest.mark.anyio


def _settings(spec: RegistrySpec, tmp_path: Path, **overrides: Any) -> Settings:
    settings = settings_for(tmp_path / "unused", inference="threads", shadow_rate=0.0, **overrides)
    return settings.model_copy(update={"registry": spec.location, "blobs": spec.blobs})


async def _predict(client: httpx.AsyncClient, texts: list[str]) -> list[dict[str, Any]]:
    results = []
    for i in range(0, len(texts), 11):
        r = await client.post("/v1/predict", json={"texts": texts[i : i + 11], "spans": 0})
        assert r.status_code == 200, r.text
        results += r.json()["results"]
    return results


async def _view(client: httpx.AsyncClient) -> dict[str, Any]:
    r = await client.get(f"/v1/models/{MODEL}/drift")
    assert r.status_code == 200, r.text
    return dict(r.json())


async def _until_texts(client: httpx.AsyncClient, texts: int, timeout: float = 30) -> dict[str, Any]:
    deadline = time.monotonic() + timeout
    while True:
        view = await _view(client)
        got = view["versions"][0]["texts"] if view["versions"] else 0
        if got == texts:
            return view
        assert time.monotonic() < deadline, f"the window holds {got} texts, not {texts}"
        await asyncio.sleep(0.05)


async def test_two_replicas_report_one_window_equal_to_numpy_on_the_union(
    live_spec: RegistrySpec, tmp_path: Path, tiny_data: Path, tiny_bundles: dict[str, Path]
) -> None:
    rows = read_jsonl(tiny_data / "test.jsonl")
    first = [r["text"] for r in rows[:50]]
    second = [r["text"] for r in rows[50:90]] + ["zzqv " * 300]  # one long, unknown, truncated text
    settings = _settings(live_spec, tmp_path, shadow_flush_seconds=0.2)
    async with serving(settings) as (_, a), serving(settings) as (_, b):
        results = await _predict(a, first) + await _predict(b, second)
        # Flushed on the timer, off the request path: each replica comes to report both replicas' texts.
        view_a = await _until_texts(a, len(first) + len(second))
        view_b = await _until_texts(b, len(first) + len(second))
    assert view_a == view_b, "every replica answers the same figures once flushed"
    [v] = view_a["versions"]
    assert (view_a["scope"], v["version"], v["texts"]) == ("shared", 1, 91)
    assert "91 live texts in the replicas' shared window of 10,000" in render_drift(view_a)
    assert v["truncation_rate"] == pytest.approx(sum(r["truncated"] for r in results) / 91)

    base = open_bundle(tiny_bundles["a"]).manifest.drift
    assert base is not None
    signals = {s["name"]: s for s in v["signals"]}
    labels = open_bundle(tiny_bundles["a"]).manifest.labels
    live_mix = [sum(r["label"] == name for r in results) for name in labels]  # the union of both replies
    assert signals["label"]["psi"] == pytest.approx(psi_numpy(base.histograms["label"].counts, live_mix), abs=1e-12)
    edges = base.histograms["tokens"].edges
    assert edges is not None
    live_tokens = tokens_histogram(results, edges)
    assert signals["tokens"]["psi"] == pytest.approx(
        psi_numpy(base.histograms["tokens"].counts, live_tokens), abs=1e-12
    )

    # A replica started afterwards (a restart) reports the same window at once, and so do its gauges.
    async with serving(settings) as (_, c):
        assert await _view(c) == view_a
        metrics = (await c.get("/metrics")).text
    assert f'textsieve_drift_window_texts{{model="{MODEL}",version="1"}} 91.0' in metrics


async def test_the_window_keeps_the_newest_texts_across_replicas(live_spec: RegistrySpec, tmp_path: Path) -> None:
    """Rows older than the window's newest texts are deleted: the window stays near its size."""
    settings = _settings(live_spec, tmp_path, shadow_flush_seconds=3600, drift_window_texts=100)
    texts = ["my card was charged twice", "the boiler repair was quick", "cannot log in", "thanks!", "refund"]
    async with serving(settings) as (app_a, a), serving(settings) as (app_b, b):
        for app, client in ((app_a, a), (app_b, b), (app_a, a), (app_b, b)):
            await _predict(client, texts * 12)  # 60 texts, one flush each
            await app.state.models.drift.flush()
        view_a, view_b = await _view(a), await _view(b)
    assert view_a == view_b
    assert view_a["versions"][0]["texts"] == 120  # the newest two rows: the fewest holding 100 texts
    with live_spec.open() as reg, reg.backend.read() as tx:
        assert len(tx.all("SELECT id FROM drift_counts")) == 2


async def test_replicas_set_to_different_windows_keep_each_others_rows_and_say_they_disagree(
    live_spec: RegistrySpec, tmp_path: Path, caplog: pytest.LogCaptureFixture
) -> None:
    """A replica set to a window of 100 texts deleted the rows of one set to 1,000 at each flush, so
    the larger window never held more than about 100 texts. Now each reports the newest texts of its
    own size, and both replies and the log name the sizes and the fix."""
    small = _settings(live_spec, tmp_path, shadow_flush_seconds=3600, drift_window_texts=100)
    large = small.model_copy(update={"drift_window_texts": 1000})
    texts = ["my card was charged twice", "the boiler repair was quick", "cannot log in", "thanks!", "refund"]
    async with serving(small) as (app_s, s), serving(large) as (app_l, big):
        for app, client in ((app_l, big), (app_l, big), (app_l, big), (app_s, s), (app_s, s)):
            await _predict(client, texts * 12)  # 60 texts, one flush each
            await app.state.models.drift.flush()
        view_s, view_l = await _view(s), await _view(big)
    [vs], [vl] = view_s["versions"], view_l["versions"]
    assert (vl["texts"], vl["window_texts"]) == (300, 1000), "the small replica deleted none of the large one's rows"
    assert (vs["texts"], vs["window_texts"]) == (120, 100)  # the newest two rows: the fewest holding 100 texts
    assert vs["declared_window_texts"] == vl["declared_window_texts"] == [100, 1000]
    assert "replicas disagree on TEXTSIEVE_DRIFT_WINDOW_TEXTS (100 here, 1,000 elsewhere)" in vs["detail"]
    assert "(1,000 here, 100 elsewhere)" in vl["detail"] and "set it the same on every replica" in vl["detail"]
    assert "replicas disagree" in render_drift(view_s)
    warned = [r.getMessage() for r in caplog.records if "different TEXTSIEVE_DRIFT_WINDOW_TEXTS" in r.getMessage()]
    assert any("(100, 1,000; this one 1,000)" in m for m in warned), warned
    with live_spec.open() as reg, reg.backend.read() as tx:
        rows = tx.all("SELECT window_texts FROM drift_counts ORDER BY id")
    assert [r["window_texts"] for r in rows] == [1000, 1000, 1000, 100, 100]


async def test_replicas_set_alike_say_nothing_of_window_sizes(live_spec: RegistrySpec, tmp_path: Path) -> None:
    settings = _settings(live_spec, tmp_path, shadow_flush_seconds=3600, drift_window_texts=100)
    async with serving(settings) as (app, client):
        await _predict(client, ["my card was charged twice"] * 20)
        await app.state.models.drift.flush()
        [v] = (await _view(client))["versions"]
    assert v["declared_window_texts"] == [100] and "disagree" not in v["detail"]


async def test_a_flush_under_way_at_shutdown_loses_nothing(
    live_spec: RegistrySpec, tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    settings = _settings(live_spec, tmp_path, shadow_flush_seconds=0.05)
    texts = ["my card was charged twice", "the boiler repair was quick", "cannot log in"]
    entered, release = asyncio.Event(), asyncio.Event()
    async with serving(settings) as (app, client):
        store = app.state.models.drift.store
        original = store.add_drift_counts

        async def slow(*args: Any, **kwargs: Any) -> Any:
            entered.set()
            await release.wait()  # the flush is under way when the service is told to stop
            return await original(*args, **kwargs)

        monkeypatch.setattr(store, "add_drift_counts", slow)
        await _predict(client, texts)
        await asyncio.wait_for(entered.wait(), 10)
        await _predict(client, texts * 2)  # counted while that flush waits: pending for the last one
        asyncio.get_running_loop().call_later(0.3, release.set)
    with live_spec.open() as reg:
        w = reg.drift_window(MODEL, 1, window_texts=10_000, size=len(app.state.models.drift.windows[MODEL, 1].counts()))
    assert w.texts == 9, "the interrupted flush and the shutdown's own flush both landed, once each"


async def test_flushes_the_registry_refuses_fail_no_prediction_and_lose_no_count(
    live_spec: RegistrySpec, tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    settings = _settings(live_spec, tmp_path, shadow_flush_seconds=0.05)
    texts = ["my card was charged twice", "the boiler repair was quick", "cannot log in", "refund"]
    async with serving(settings) as (app, client):
        drift = app.state.models.drift
        original = drift.store.add_drift_counts

        async def down(*args: Any, **kwargs: Any) -> Any:
            raise UnavailableError("the registry's database cannot be reached (test)")

        monkeypatch.setattr(drift.store, "add_drift_counts", down)
        for _ in range(3):
            await _predict(client, texts)
            await asyncio.sleep(0.1)
        metrics = (await client.get("/metrics")).text
        assert drift.flush_failures > 0
        assert 'textsieve_drift_flushes_total{outcome="failed"}' in metrics
        assert (await _view(client))["versions"][0]["texts"] == 12, "kept in memory meanwhile"
        monkeypatch.setattr(drift.store, "add_drift_counts", original)
        await asyncio.sleep(0.3)  # the registry is back: the next flush writes what was kept
        with live_spec.open() as reg:
            stored = reg.drift_window(MODEL, 1, window_texts=10_000, size=len(drift.windows[MODEL, 1].counts()))
        assert stored.texts == 12


async def test_with_drift_off_a_replica_writes_no_row(live_spec: RegistrySpec, tmp_path: Path) -> None:
    async with serving(_settings(live_spec, tmp_path, drift=False, shadow_flush_seconds=0.05)) as (app, client):
        await _predict(client, ["my card was charged twice", "refund"])
        await asyncio.sleep(0.2)
        assert app.state.models.drift is None
        assert (await _view(client))["versions"] == []
    with live_spec.open() as reg, reg.backend.read() as tx:
        assert tx.all("SELECT id FROM drift_counts") == []


def _drift_cli(url: str) -> dict[str, Any]:
    """What a deployment script gets: ``textsieve drift --json`` against one replica."""
    out = subprocess.run(
        [sys.executable, "-m", "textsieve.cli", "drift", MODEL, "--url", url, "--json"],
        capture_output=True,
        text=True,
        env=child_env(),
        timeout=60,
        check=False,
    )
    assert out.returncode == 0, out.stderr
    return dict(json.loads(out.stdout))


def test_real_servers_stopped_with_sigterm_leave_their_counts_to_the_next_one(
    live_spec: RegistrySpec, tmp_path: Path, tiny_data: Path, tiny_bundles: dict[str, Path]
) -> None:
    """Two ``textsieve serve`` processes (uvicorn, worker processes) on one registry, each sent other
    texts; both are stopped with SIGTERM, whose shutdown flush is the only one (the interval is an
    hour); a third started afterwards answers for all of them."""
    rows = read_jsonl(tiny_data / "test.jsonl")
    halves = [[r["text"] for r in rows[:30]], [r["text"] for r in rows[30:70]]]
    settings: dict[str, Any] = {"blobs": live_spec.blobs, "workers": 1, "shadow_flush_seconds": 3600}
    servers = [ServerProcess.start(live_spec.location, tmp_path / f"serve-{i}.log", **settings) for i in range(2)]
    results: list[dict[str, Any]] = []
    try:
        for server, texts in zip(servers, halves, strict=True):
            server.wait_ready()
            r = httpx.post(f"{server.url}/v1/predict", json={"texts": texts, "spans": 0}, timeout=60)
            assert r.status_code == 200, r.text
            results += r.json()["results"]
        # Not flushed yet: each replica counts its own texts only (plus nothing from the registry).
        assert [_drift_cli(s.url)["versions"][0]["texts"] for s in servers] == [30, 40]
    finally:
        codes = [s.terminate() for s in servers]
    assert codes == [0, 0]
    third = ServerProcess.start(live_spec.location, tmp_path / "serve-3.log", **settings)
    try:
        third.wait_ready()
        view = _drift_cli(third.url)
    finally:
        third.stop()
    [v] = view["versions"]
    assert v["texts"] == 70
    base = open_bundle(tiny_bundles["a"]).manifest.drift
    assert base is not None
    labels = open_bundle(tiny_bundles["a"]).manifest.labels
    live_mix = [sum(r["label"] == name for r in results) for name in labels]
    signals = {s["name"]: s for s in v["signals"]}
    assert signals["label"]["psi"] == pytest.approx(psi_numpy(base.histograms["label"].counts, live_mix), abs=1e-12)
