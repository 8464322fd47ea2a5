"""Shadow scoring (service/liveloop/shadow.py): replies unchanged, two replicas' counts adding up in
one registry (SQLite and PostgreSQL) and matching an independent scorer, and a full queue dropping
and counting instead of waiting."""

from __future__ import annotations

import asyncio
import time
from pathlib import Path
from typing import Any

import numpy as np
import pytest

from tests.helpers.jsonl import read_jsonl
from tests.helpers.registries import RegistrySpec
from tests.helpers.servers import DirectModel
from tests.helpers.service import MODEL, serving
from textsieve.registry.shadow import ShadowCounts
from textsieve.service.inference.batcher import LiveScores
from textsieve.service.liveloop.shadow import ShadowScorer
from textsieve.service.modelset.loader import ServedModel
from textsieve.service.settings import Settings
from textsieve.service.telemetry import ServiceMetrics

pytestmark = pytest.mark.anyio


def _publish(spec: RegistrySpec, bundles: dict[str, Path]) -> None:
    """``support``: v1 (bundle a) live, v2 (bundle b) candidate."""
    with spec.open() as reg:
        reg.publish(bundles["a"], MODEL, actor="tests")
        reg.publish(bundles["b"], MODEL, actor="tests")
        reg.promote(MODEL, 1, "live", reason="start", actor="tests", force=True)
        reg.promote(MODEL, 2, "candidate", reason="trial", actor="tests")


def _settings(spec: RegistrySpec, **overrides: Any) -> Settings:
    base: dict[str, Any] = {
        "registry": spec.location,
        "blobs": spec.blobs,
        "workers": 1,
        "inference": "threads",
        "poll_seconds": 0.2,
        "access_log": False,
        "shadow_flush_seconds": 0.2,
    }
    return Settings(**(base | overrides))


async def _counts_when(spec: RegistrySpec, done: Any, timeout: float = 60.0) -> ShadowCounts:
    end = time.monotonic() + timeout
    counts = None
    while time.monotonic() < end:

        def read() -> ShadowCounts | None:
            with spec.open() as reg:
                return reg.shadow_pair(MODEL, 1, 2)

        counts = await asyncio.to_thread(read)
        if counts is not None and done(counts):
            return counts
        await asyncio.sleep(0.2)
    raise AssertionError(f"shadow counts did not arrive in {timeout}s: {counts}")


def _texts(tiny_data: Path, n: int) -> list[str]:
    return [r["text"] for r in read_jsonl(tiny_data / "test.jsonl")[:n]]


async def test_two_replicas_add_up_and_match_an_independent_scorer(
    spec: RegistrySpec, tiny_bundles: dict[str, Path], tiny_data: Path
) -> None:
    _publish(spec, tiny_bundles)
    texts = _texts(tiny_data, 48)
    settings = _settings(spec, shadow_rate=1.0)
    async with serving(settings) as (_, one), serving(settings) as (_, two):
        for i in range(0, len(texts), 4):
            client = one if i % 8 else two
            r = await client.post("/v1/predict", json={"texts": texts[i : i + 4], "spans": 0})
            assert r.status_code == 200 and r.json()["version"] == 1
        counts = await _counts_when(spec, lambda c: c.texts >= len(texts))
        metrics = (await one.get("/metrics")).text + (await two.get("/metrics")).text
    assert counts.texts == len(texts) and counts.dropped == 0
    assert counts.flushes >= 2  # both replicas flushed into the same row

    # Reference: each version's bundle scored alone, one text at a time, with onnxruntime and
    # scipy.special.softmax (tests/helpers/servers.py DirectModel), bypassing the service.
    live, cand = DirectModel(tiny_bundles["a"]), DirectModel(tiny_bundles["b"])
    assert live.labels == cand.labels
    p_live = np.array([live.probabilities(t) for t in texts])
    p_cand = np.array([cand.probabilities(t) for t in texts])
    a, b = p_live.argmax(1), p_cand.argmax(1)
    assert counts.agreed == int((a == b).sum())
    rows = np.arange(len(texts))
    assert counts.delta_sum == pytest.approx(float((p_cand[rows, a] - p_live[rows, a]).sum()), abs=1e-4)
    expected: dict[tuple[str, str], int] = {}
    for i, j in zip(a, b, strict=True):
        key = (live.labels[i], cand.labels[j])
        expected[key] = expected.get(key, 0) + 1
    assert {(t.live_label, t.candidate_label): t.texts for t in counts.transitions} == expected
    assert "textsieve_shadow_texts_total" in metrics and 'textsieve_shadow_flushes_total{outcome="ok"}' in metrics


async def test_replies_are_the_same_with_shadow_scoring_on(
    tmp_path: Path, tiny_bundles: dict[str, Path], tiny_data: Path
) -> None:
    spec = RegistrySpec("sqlite", str(tmp_path / "reg"), None)
    _publish(spec, tiny_bundles)
    body = {"texts": _texts(tiny_data, 12), "spans": 3}
    replies = []
    for rate in (0.0, 1.0):
        # Worker processes (the default): the candidate is scored in them too.
        async with serving(_settings(spec, shadow_rate=rate, inference="processes")) as (app, client):
            r = await client.post("/v1/predict", json=body)
            assert r.status_code == 200
            replies.append((r.content, r.headers["X-Model-Version"]))
            assert (app.state.models.shadow is not None) == (rate > 0)
            if rate > 0:
                counts = await _counts_when(spec, lambda c: c.texts >= len(body["texts"]))
                assert counts.texts == len(body["texts"])
    assert replies[0] == replies[1]  # byte for byte


async def test_a_full_queue_drops_and_counts_what_it_cannot_keep(
    tmp_path: Path, tiny_bundles: dict[str, Path], tiny_data: Path
) -> None:
    spec = RegistrySpec("sqlite", str(tmp_path / "reg"), None)
    _publish(spec, tiny_bundles)
    # A request of 4 texts never fits a queue of 3: every sample is dropped, counted, and flushed.
    async with serving(_settings(spec, shadow_rate=1.0, shadow_queue_texts=3)) as (_, client):
        for _ in range(5):
            r = await client.post("/v1/predict", json={"texts": _texts(tiny_data, 4), "spans": 0})
            assert r.status_code == 200
        counts = await _counts_when(spec, lambda c: c.dropped >= 20)
        metrics = (await client.get("/metrics")).text
    assert (counts.texts, counts.dropped) == (0, 20)
    assert 'textsieve_shadow_dropped_texts_total{model="support"} 20.0' in metrics


def test_the_queue_bound_is_in_texts(tmp_path: Path) -> None:
    settings = Settings(registry=str(tmp_path / "r"), shadow_queue_texts=5, workers=1, access_log=False)
    metrics = ServiceMetrics()
    cand = ServedModel(name="m", version=2, labels=["a", "b"], predictors=[], loaded_at="", load_seconds=0.0)
    released: list[ServedModel] = []
    scorer = ShadowScorer(
        settings,
        None,
        None,
        metrics,
        candidate=lambda _: cand,
        release=released.append,  # type: ignore[arg-type]
    )

    def offer(n: int) -> None:
        scorer.offer("m", 1, ["a", "b"], ["text"] * n, LiveScores.empty(n))

    offer(3)
    offer(3)  # 6 > 5: dropped whole
    offer(2)  # 5: fits
    offer(1)  # 6 > 5: dropped
    assert scorer.queued_texts == 5
    assert scorer.tallies[("m", 1, 2)].dropped == 4
    assert len(released) == 4  # every use of the candidate was handed back
    assert 'textsieve_shadow_dropped_texts_total{model="m"} 4.0' in metrics.render().decode()


class _SlowStore:
    """Takes shadow counts as the registry thread does, the first pair held until ``go`` is set."""

    def __init__(self) -> None:
        self.written: list[tuple[str, int, int, int]] = []
        self.started = asyncio.Event()
        self.go = asyncio.Event()

    async def add_shadow_counts(self, model: str, live: int, candidate: int, tally: Any, **_: Any) -> None:
        self.started.set()
        await self.go.wait()
        self.written.append((model, live, candidate, tally.texts))


async def test_stopping_during_a_flush_writes_every_pair_the_flush_had_taken(tmp_path: Path) -> None:
    """Before, stop() cancelled the flushing task while it waited on a pair's write, and the pairs
    after it, already taken from the tallies, were never written (with the registry thread the pair
    being written still landed; this store loses it too, so all three were missing)."""
    settings = Settings(registry=str(tmp_path / "r"), shadow_flush_seconds=0.01, workers=1, access_log=False)
    store = _SlowStore()
    scorer = ShadowScorer(
        settings,
        None,  # type: ignore[arg-type]
        store,  # type: ignore[arg-type]
        ServiceMetrics(),
        candidate=lambda _: None,
        release=lambda _: None,
    )
    for model, texts in (("m", 3), ("n", 5), ("o", 7)):
        scorer._tally((model, 1, 2)).texts = texts
    scorer.start()
    await asyncio.wait_for(store.started.wait(), 10)
    stopping = asyncio.ensure_future(scorer.stop(drain_seconds=0))
    while scorer._tasks:  # until stop() has cancelled and awaited the scoring and flushing tasks
        await asyncio.sleep(0.001)
    store.go.set()
    await asyncio.wait_for(stopping, 10)
    assert sorted(store.written) == [("m", 1, 2, 3), ("n", 1, 2, 5), ("o", 1, 2, 7)]
