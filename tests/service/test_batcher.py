"""Micro-batching: texts from concurrent requests share batches, batches stay within the bound,
and every text still gets exactly what the Predictor gives it alone."""

from __future__ import annotations

import asyncio
from pathlib import Path
from typing import Any

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from tests.helpers.service import MODEL, serving, settings_for
from textsieve.registry.runtime import Predictor
from textsieve.service.inference.packing import CALL_TOKENS, MIN_TEXTS, SLACK, run_packed, sub_batches

pytestmark = pytest.mark.anyio
TEXTS = [
    f"ticket {i}: " + " ".join(["charged twice", "login fails", "boiler repair", "thanks"][i % 4 :]) * (1 + i % 5)
    for i in range(50)
]


def _batch_sizes(app: Any) -> tuple[float | None, float | None, float | None]:
    """Texts, batches and batches of at most 8 texts, from the app's histogram of batch sizes."""
    read = app.state.metrics.registry.get_sample_value
    mv = {"model": MODEL, "version": "1"}
    return (
        read("textsieve_batch_texts_sum", mv),
        read("textsieve_batch_texts_count", mv),
        read("textsieve_batch_texts_bucket", {**mv, "le": "8.0"}),
    )


async def test_concurrent_requests_share_batches(shared_registry: Path) -> None:
    settings = settings_for(shared_registry, workers=1, batch_wait_ms=40, batch_max_texts=64)
    async with serving(settings) as (app, client):
        replies = await asyncio.gather(*[client.post("/v1/predict", json={"texts": [t]}) for t in TEXTS[:12]])
        total, batches, _ = _batch_sizes(app)
    assert all(r.status_code == 200 for r in replies)
    assert total == 12
    assert batches < 12  # some requests were answered by a shared onnxruntime call


async def test_batches_are_bounded_and_results_in_order(shared_registry: Path, tiny_bundles: dict[str, Path]) -> None:
    settings = settings_for(shared_registry, batch_max_texts=8, max_texts=100)
    async with serving(settings) as (app, client):
        reply = (await client.post("/v1/predict", json={"texts": TEXTS, "spans": 2})).json()
        total, batches, at_most_8 = _batch_sizes(app)
    assert total == len(TEXTS) and batches >= 7
    assert at_most_8 == batches  # every batch had at most 8 texts
    expected = Predictor.from_bundle(tiny_bundles["a"]).predict(TEXTS, spans=2)
    for got, want in zip(reply["results"], expected, strict=True):
        assert got["label"] == want.label
        assert np.allclose(list(got["probabilities"].values()), list(want.probabilities.values()), atol=1e-5)
        assert [(s["start"], s["end"]) for s in got["spans"]] == [(s.start, s.end) for s in want.spans]


@settings(max_examples=200, deadline=None)
@given(st.lists(st.integers(0, 300), min_size=1, max_size=200), st.integers(1, 64))
def test_sub_batches_cover_every_text_once_with_bounded_padding(lengths: list[int], most: int) -> None:
    arr = np.asarray(lengths, dtype=np.int64)
    groups = sub_batches(arr, max_texts=most)
    flat = np.concatenate(groups)
    assert sorted(flat.tolist()) == list(range(len(lengths)))
    for g in groups:
        sizes = np.maximum(arr[g], 1)
        assert len(g) <= most
        assert np.all(np.diff(sizes) >= 0)  # sorted: each sub-batch is padded to its own last text
        if len(g) > MIN_TEXTS:  # padding within the larger of the two allowances
            waste = len(g) * sizes.max() - sizes.sum()
            assert waste <= max(SLACK * sizes.sum(), CALL_TOKENS) + 1e-9


def test_packed_run_equals_plain_run(tiny_bundles: dict[str, Path]) -> None:
    p = Predictor.from_bundle(tiny_bundles["a"], batch_size=16)
    encoded = [p.encode(t) for t in [*TEXTS, "", "x", "charged " * 500]]
    plain, packed = p.run(encoded), run_packed(p, encoded)
    assert np.abs(plain.logits - packed.logits).max() <= 1e-5
    assert np.array_equal(plain.positions, packed.positions)
    assert np.abs(plain.contributions - packed.contributions).max() <= 1e-5


def _sub_batches_one_by_one(lengths: np.ndarray, most: int) -> list[list[int]]:
    """sub_batches' rule, one text at a time, as it was first written (the reference)."""
    groups: list[list[int]] = []
    current: list[int] = []
    tokens = 0
    for i in np.argsort(lengths, kind="stable").tolist():
        n = max(int(lengths[i]), 1)
        wasteful = (len(current) + 1) * n - (tokens + n) > max(SLACK * (tokens + n), CALL_TOKENS)
        if current and (len(current) >= most or (wasteful and len(current) >= MIN_TEXTS)):
            groups.append(current)
            current, tokens = [], 0
        current.append(i)
        tokens += n
    if current:
        groups.append(current)
    return groups


@settings(max_examples=300, deadline=None)
@given(st.lists(st.integers(0, 300), min_size=0, max_size=300), st.integers(1, 200))
def test_sub_batches_cut_where_the_one_by_one_rule_cuts(lengths: list[int], most: int) -> None:
    arr = np.asarray(lengths, dtype=np.int64)
    assert [g.tolist() for g in sub_batches(arr, max_texts=most)] == _sub_batches_one_by_one(arr, most)


def test_packed_sub_batches_are_padded_as_predictor_pads_them(tiny_bundles: dict[str, Path]) -> None:
    """run_packed pads from one array of the batch's ids; each sub-batch's graph inputs, and so its
    outputs, are exactly those of Predictor.pad on the same texts."""
    p = Predictor.from_bundle(tiny_bundles["a"], batch_size=16)
    encoded = [p.encode(t) for t in [*TEXTS, "", "x", "charged " * 500, "a b"]]
    calls: list[tuple[np.ndarray, np.ndarray]] = []
    run_arrays = p.run_arrays

    def recording(ids: np.ndarray, lengths: np.ndarray) -> Any:
        calls.append((ids.copy(), lengths.copy()))
        return run_arrays(ids, lengths)

    p.run_arrays = recording  # type: ignore[method-assign]
    packed = run_packed(p, encoded)
    groups = sub_batches(np.array([len(e.ids) for e in encoded]), max_texts=p.batch_size)
    assert len(calls) == len(groups) > 3
    for (ids, lengths), idx in zip(calls, groups, strict=True):
        want_ids, want_lengths = p.pad([encoded[i] for i in idx])
        assert ids.dtype == want_ids.dtype and lengths.dtype == want_lengths.dtype
        assert np.array_equal(ids, want_ids) and np.array_equal(lengths, want_lengths)
        lg, pl, ps, ct = run_arrays(want_ids, want_lengths)
        assert np.array_equal(packed.logits[idx], lg) and np.array_equal(packed.positions[idx], ps)
        assert np.array_equal(packed.pooled[idx], pl) and np.array_equal(packed.contributions[idx], ct)


@pytest.mark.parametrize("inference", ["threads", "processes"])
async def test_queued_texts_of_a_client_that_left_are_dropped_uncomputed(
    shared_registry: Path, monkeypatch: pytest.MonkeyPatch, inference: str
) -> None:
    # A client that sent its whole request and went away (service/web/transport.py marks its scope)
    # was still computed, and kept its texts admitted until then. Here one request holds every slot,
    # a second waits in the queue, and its client leaves before a slot frees.
    from textsieve.errors import ClientGoneError
    from textsieve.service.inference.admission import CLIENT_LEFT
    from textsieve.service.inference.batcher import Batcher

    computed: list[list[str]] = []
    release = asyncio.Event()
    real = Batcher._dispatch

    def held(self: Batcher, pieces: Any) -> None:
        computed.append([t for p in pieces for t in p.job.texts[p.lo : p.hi]])
        if len(computed) == 1:  # the first batch keeps its slot until released
            asyncio.get_running_loop().create_task(release.wait()).add_done_callback(lambda _: real(self, pieces))
        else:
            real(self, pieces)

    monkeypatch.setattr(Batcher, "_dispatch", held)
    settings = settings_for(shared_registry, workers=1, inference=inference, batch_wait_ms=0)
    async with serving(settings) as (app, client):
        pool = app.state.pool
        served = app.state.models.acquire_live(MODEL, None)
        assert served is not None and served.batcher is not None
        batcher = served.batcher
        try:
            slots = pool.slots
            for _ in range(pool.threads - 1):  # every other slot is taken: the held batch has the last
                await slots.acquire()
            first = asyncio.create_task(batcher.run(TEXTS[:3], 0, None, keep_scores=False, watch={}))
            while not computed:
                await asyncio.sleep(0.001)
            scope: dict[str, Any] = {}
            second = asyncio.create_task(batcher.run(TEXTS[3:8], 0, None, keep_scores=False, watch=scope))
            kept = asyncio.create_task(batcher.run(TEXTS[8:10], 0, None, keep_scores=False, watch={}))
            await asyncio.sleep(0.01)
            assert not second.done() and pool.admission.queued == 10  # queued behind the held batch
            scope[CLIENT_LEFT] = True  # its client resets
            for _ in range(pool.threads - 1):
                slots.release()
            release.set()
            with pytest.raises(ClientGoneError):
                await second
            results, _ = await first
            kept_results, _ = await kept
        finally:
            app.state.models.release(served)
        assert len(results) == 3 and len(kept_results) == 2
        metrics = (await client.get("/metrics")).text
        assert computed == [TEXTS[:3], TEXTS[8:10]]  # the second request's texts never reached a worker
        assert pool.admission.queued == 0 and pool.admission.client_left == 1
        assert "\ntextsieve_queue_abandoned_requests_total 1.0\n" in metrics
