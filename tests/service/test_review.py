"""The review threshold in the service: a model's ``review_threshold`` setting marks results whose
top probability is below it (``needs_review``), learned at load and when changed in the registry;
without a threshold the reply has no such field (selective prediction: Geifman & El-Yaniv, 2017)."""

from __future__ import annotations

import asyncio
import time
from pathlib import Path
from typing import Any

import httpx
import numpy as np
import pytest

from tests.helpers.service import MODEL, serving, settings_for
from textsieve.registry import open_registry
from textsieve.registry.runtime import Predictor

pytestmark = pytest.mark.anyio
TEXTS = [
    "my card was charged twice",
    "the boiler repair was quick and great",
    "cannot log in since Monday",
    "hello",
    "refund please",
    "thanks a lot for the help",
]
FIELDS = {"label", "probabilities", "spans", "tokens", "truncated", "unknown"}


def _set(folder: Path, **kwargs: Any) -> None:
    with open_registry(folder) as reg:
        reg.change_settings(MODEL, actor="tests", **kwargs)


async def _predict(client: httpx.AsyncClient, **body: Any) -> list[dict[str, Any]]:
    r = await client.post("/v1/predict", json={"texts": TEXTS, **body})
    assert r.status_code == 200, r.text
    results: list[dict[str, Any]] = r.json()["results"]
    return results


async def _until(client: httpx.AsyncClient, check: Any, **body: Any) -> list[dict[str, Any]]:
    """Predict until ``check(results)`` holds: the change reaches the service by its poll."""
    deadline = time.monotonic() + 20
    while True:
        results = await _predict(client, **body)
        if check(results) or time.monotonic() > deadline:
            return results
        await asyncio.sleep(0.1)


def _top(bundle: Path) -> np.ndarray:
    """Each text's top probability, from a Predictor on the bundle (the reference scorer)."""
    p = Predictor.from_bundle(bundle)
    return np.array([max(pred.probabilities.values()) for pred in p.predict(TEXTS)])


async def test_needs_review_follows_the_threshold_set_and_cleared(
    registry_dir: Path, tiny_bundles: dict[str, Path]
) -> None:
    top = _top(tiny_bundles["a"])
    # A threshold halfway between two texts' top probabilities, so both verdicts occur and float
    # rounding (service vs reference, ~1e-6) cannot flip one.
    ordered = np.sort(top)
    gaps = np.diff(ordered)
    i = int(np.argmax(gaps[1:-1])) + 1  # the widest gap that leaves texts on both sides
    assert gaps[i] > 1e-4
    threshold = float((ordered[i] + ordered[i + 1]) / 2)
    expected = [bool(t < threshold) for t in top]
    assert any(expected) and not all(expected)
    async with serving(settings_for(registry_dir, poll_seconds=0.1)) as (app, client):
        before = await _predict(client)
        assert all(set(r) == FIELDS for r in before)  # no threshold: the reply as it always was

        await asyncio.to_thread(_set, registry_dir, values={"review_threshold": threshold}, reason="trial")
        results = await _until(client, lambda rs: "needs_review" in rs[0])
        assert [r["needs_review"] for r in results] == expected
        assert all(r["needs_review"] is (max(r["probabilities"].values()) < threshold) for r in results)
        assert [r["probabilities"] for r in results] == [r["probabilities"] for r in before]  # nothing else moved
        # a pinned version is the same model: marked by the same threshold
        pinned = await _predict(client, version=2)
        top_b = _top(tiny_bundles["b"])
        assert [r["needs_review"] for r in pinned] == [bool(t < threshold) for t in top_b]
        served = app.state.models.live[MODEL]

        await asyncio.to_thread(_set, registry_dir, reset=["review_threshold"], reason="trial over")
        after = await _until(client, lambda rs: "needs_review" not in rs[0])
        assert all(set(r) == FIELDS for r in after)
        # a settings change swaps nothing: the same loaded version answers
        assert app.state.models.live[MODEL] is served


@pytest.mark.parametrize("inference", ["processes", "threads"])
async def test_a_threshold_set_before_start_is_known_at_load(registry_dir: Path, inference: str) -> None:
    _set(registry_dir, values={"review_threshold": 1.0}, reason="everything to people")
    async with serving(settings_for(registry_dir, inference=inference)) as (_, client):
        results = await _predict(client)
    # every top probability is below 1, so a threshold of 1 hands every text to a person
    assert [r["needs_review"] for r in results] == [True] * len(TEXTS)


async def test_registry_thread_reads_the_settings(registry_dir: Path) -> None:
    from textsieve.service.modelset.registry_thread import RegistryThread

    _set(registry_dir, values={"review_threshold": 0.7}, reason="typed read")
    store = RegistryThread(str(registry_dir))
    await store.open()
    try:
        settings = await store.model_settings(MODEL)
    finally:
        await store.close()
    entry = settings.values["review_threshold"]
    assert (entry.value, entry.set_by, entry.reason) == (0.7, "tests", "typed read")


async def test_openapi_documents_needs_review(shared_client: httpx.AsyncClient) -> None:
    doc = (await shared_client.get("/openapi.json")).json()
    result = doc["components"]["schemas"]["ResultOut"]
    assert result["properties"]["needs_review"]["type"] == "boolean"
    assert "needs_review" not in result.get("required", [])
