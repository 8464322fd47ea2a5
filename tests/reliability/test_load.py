"""Load with hot swaps: 32 concurrent clients send a fixed number of requests to a real
``textsieve serve`` while the live version is promoted and rolled back several times, half of
the changes through the admin API and half directly in the registry (as another process would;
the service notices them by polling).

Promised: no request fails, and every reply's probabilities are those of the version the reply
names, recomputed one text at a time with a plain onnxruntime session and
``scipy.special.softmax(logits / T)`` (temperature scaling, Guo et al., 2017, §4.2) — so
nothing of one version leaks into a reply that claims the other, and batching requests of
different clients together changes no number beyond float32 rounding (1e-5, the project's
batch-invariance tolerance).
"""

from __future__ import annotations

import asyncio
import random
import time
from pathlib import Path
from typing import Any

import httpx
import numpy as np

from tests.helpers.jsonl import read_jsonl
from tests.helpers.net import readyz_until
from tests.helpers.servers import DirectModel, running_server
from tests.helpers.service import ADMIN_TOKEN, AUTH, MODEL, make_registry
from textsieve.registry import open_registry

CLIENTS = 32
REQUESTS_PER_CLIENT = 50
ROUNDS = 4  # each round: promote version 2, then roll back to version 1
TOLERANCE = 1e-5
EXTRA_TEXTS = [
    "The tyre is flat 😀 and the café's app won't load… 修理 please",
    "charged twice " * 120,  # longer than max_length: truncated
    "qzxv wbbt plonk",  # unknown words only
    "ok",
]


def _pool(data: Path) -> list[str]:
    rows = read_jsonl(data / "test.jsonl")
    return [r["text"] for r in rows[:150]] + EXTRA_TEXTS


def test_concurrent_clients_through_promotions_and_rollbacks(
    tmp_path: Path, tiny_bundles: dict[str, Path], tiny_data: Path
) -> None:
    registry = make_registry(tmp_path / "registry", tiny_bundles, live=1)
    pool = _pool(tiny_data)
    direct = {1: DirectModel(tiny_bundles["a"]), 2: DirectModel(tiny_bundles["b"])}
    expected = {(v, t): m.probabilities(t) for v, m in direct.items() for t in set(pool)}
    spread = max(np.abs(expected[(1, t)] - expected[(2, t)]).max() for t in pool)
    assert spread > 1e-2, "the two versions must be told apart by their numbers"

    with running_server(
        str(registry),
        tmp_path / "server.log",
        admin_token=ADMIN_TOKEN,
        poll_seconds=0.1,
        access_log="false",
        batch_wait_ms=2,
    ) as server:
        started = time.perf_counter()
        replies, failures, swaps = asyncio.run(_drive(server.url, registry, pool))
        elapsed = time.perf_counter() - started
        log = server.output()

    total = CLIENTS * REQUESTS_PER_CLIENT
    assert not failures, failures[:5]
    assert len(replies) == total
    assert [kind for kind, _ in swaps].count("promote") == ROUNDS
    assert [kind for kind, _ in swaps].count("rollback") == ROUNDS
    versions = [reply["version"] for _, reply in replies]
    assert set(versions) == {1, 2}, "both versions answered during the run"
    checked = 0
    for texts, reply in replies:
        assert reply["model"] == MODEL
        for text, result in zip(texts, reply["results"], strict=True):
            want = expected[(reply["version"], text)]
            got = np.array([result["probabilities"][label] for label in direct[reply["version"]].labels])
            assert np.abs(got - want).max() <= TOLERANCE, (reply["version"], text)
            assert result["label"] == direct[reply["version"]].labels[int(want.argmax())]
            checked += 1
    assert "unhandled error" not in log and '"level":"error"' not in log, log[-3000:]
    print(
        f"\n{total} requests ({checked} texts) from {CLIENTS} clients in {elapsed:.1f}s, "
        f"{len(swaps)} version changes, replies by version: {versions.count(1)} v1 / {versions.count(2)} v2"
    )


async def _drive(
    url: str, registry: Path, pool: list[str]
) -> tuple[list[tuple[list[str], dict[str, Any]]], list[str], list[tuple[str, str]]]:
    total = CLIENTS * REQUESTS_PER_CLIENT
    done = 0
    replies: list[tuple[list[str], dict[str, Any]]] = []
    failures: list[str] = []
    swaps: list[tuple[str, str]] = []

    async def client(i: int) -> None:
        nonlocal done
        rng = random.Random(i)
        async with httpx.AsyncClient(base_url=url, timeout=60) as http:
            for _ in range(REQUESTS_PER_CLIENT):
                texts = rng.sample(pool, rng.randint(1, 8))
                try:
                    r = await http.post("/v1/predict", json={"texts": texts, "spans": rng.randint(0, 3)})
                except httpx.HTTPError as exc:
                    failures.append(f"client {i}: {type(exc).__name__}: {exc}")
                else:
                    if r.status_code == 200:
                        replies.append((texts, r.json()))
                    else:
                        failures.append(f"client {i}: HTTP {r.status_code}: {r.text[:300]}")
                done += 1

    async def change(step: int, http: httpx.AsyncClient) -> None:
        # Odd rounds go through the admin API (the reply comes after the swap); even rounds
        # change the registry directly and wait for the poller to bring the service along.
        kind = "promote" if step % 2 == 0 else "rollback"
        target = 2 if kind == "promote" else 1
        via = "api" if (step // 2) % 2 == 0 else "registry"
        if via == "api":
            if kind == "promote":
                r = await http.post(
                    f"/v1/models/{MODEL}/versions/2/promote",
                    headers=AUTH,
                    json={"to": "live", "reason": f"load test round {step // 2}", "force": True},
                )
            else:
                r = await http.post(
                    f"/v1/models/{MODEL}/rollback", headers=AUTH, json={"reason": f"load test round {step // 2}"}
                )
            assert r.status_code == 200, r.text
            assert r.json()["serving"]["version"] == target
        else:
            await asyncio.to_thread(_change_registry, registry, kind)
            await readyz_until(
                http,
                lambda body: body["models"][MODEL]["version"] == target,
                timeout=20,
                awaiting=f"the service to follow the {kind}",
            )
        swaps.append((kind, via))

    async def swapper() -> None:
        # Changes are spread over the run by progress, not by time, so they land while the
        # clients are busy however fast this machine is.
        steps = 2 * ROUNDS
        async with httpx.AsyncClient(base_url=url, timeout=60) as http:
            for step in range(steps):
                while done < total * (step + 1) / (steps + 1):
                    await asyncio.sleep(0.005)
                await change(step, http)

    await asyncio.gather(swapper(), *(client(i) for i in range(CLIENTS)))
    return replies, failures, swaps


def _change_registry(folder: Path, kind: str) -> None:
    with open_registry(folder) as reg:
        if kind == "promote":
            reg.promote(MODEL, 2, "live", reason="load test (registry)", actor="load-test", force=True)
        else:
            reg.rollback(MODEL, reason="load test (registry)", actor="load-test")
