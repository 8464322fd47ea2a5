"""``GET /v1/models/{name}/drift``, the drift series in /metrics and ``textsieve drift``: the window
holds what was answered (checked against the replies themselves), PSI against its formula in
NumPy and Jensen–Shannon against SciPy, a bundle without a baseline says so, and a version loaded
again (a rollback, a restart) continues its window."""

from __future__ import annotations

import asyncio
import json
import shutil
import time
from pathlib import Path
from typing import Any

import httpx
import numpy as np
import pytest
from scipy.spatial.distance import jensenshannon

from tests.helpers.drift import psi_numpy, tokens_histogram
from tests.helpers.jsonl import read_jsonl
from tests.helpers.registries import edit_manifest
from tests.helpers.service import MODEL, assert_problem, serving, settings_for
from textsieve.registry import open_registry, stats
from textsieve.registry.bundle import open_bundle
from textsieve.service.client import render_drift

pytestmark = pytest.mark.anyio


async def test_drift_window_matches_the_replies(
    registry_dir: Path, tiny_bundles: dict[str, Path], tiny_data: Path
) -> None:
    texts = [r["text"] for r in read_jsonl(tiny_data / "test.jsonl")[:90]]
    texts += ["zzqv " * 300]  # one long, unknown, truncated text
    settings = settings_for(registry_dir, inference="threads", shadow_rate=0.0)
    async with serving(settings) as (_, client):
        results = []
        for i in range(0, len(texts), 13):
            r = await client.post("/v1/predict", json={"texts": texts[i : i + 13], "spans": 0})
            assert r.status_code == 200
            results += r.json()["results"]
        view = (await client.get(f"/v1/models/{MODEL}/drift")).json()
        metrics = (await client.get("/metrics")).text
        missing = await client.get("/v1/models/nosuchmodel/drift")
    assert_problem(missing, 404, "not-found")
    [v] = view["versions"]
    assert (view["model"], view["scope"], v["version"], v["role"]) == (MODEL, "shared", 1, "live")
    assert v["texts"] == len(texts)
    assert v["truncation_rate"] == pytest.approx(sum(r["truncated"] for r in results) / len(texts))
    base = open_bundle(tiny_bundles["a"]).manifest.drift
    assert base is not None and v["baseline"]["texts"] == base.texts

    signals = {s["name"]: s for s in v["signals"]}
    labels = open_bundle(tiny_bundles["a"]).manifest.labels
    live_mix = [sum(r["label"] == name for r in results) for name in labels]  # from the replies themselves
    expected_mix = base.histograms["label"].counts
    assert signals["label"]["psi"] == pytest.approx(psi_numpy(expected_mix, live_mix), abs=1e-12)
    # Reference: scipy.spatial.distance.jensenshannon (natural log).
    assert signals["label"]["js_distance"] == pytest.approx(
        float(jensenshannon(np.asarray(expected_mix, float), np.asarray(live_mix, float))), abs=1e-12
    )
    edges = base.histograms["tokens"].edges
    assert edges is not None
    live_tokens = tokens_histogram(results, edges)
    assert signals["tokens"]["psi"] == pytest.approx(
        psi_numpy(base.histograms["tokens"].counts, live_tokens), abs=1e-12
    )
    for s in signals.values():
        # A band only from the window size at which the baseline's own texts would read stable 95
        # times in 100 (stats.psi_min_texts, from Yurdakul, 2018): 91 texts is below that for some.
        assert s["min_texts"] == stats.psi_min_texts(len(base.histograms[s["name"]].counts), base.texts)
        if s["min_texts"] is not None and len(texts) >= s["min_texts"]:
            assert s["band"] == ("stable" if s["psi"] < 0.1 else "watch" if s["psi"] <= 0.25 else "act")
        else:
            assert s["band"] is None
    assert any(s["band"] is None for s in signals.values()) and any(s["band"] for s in signals.values())
    line = f'textsieve_drift_psi{{model="{MODEL}",signal="label",version="1"}}'
    assert any(
        x.startswith(line) and float(x.split()[-1]) == pytest.approx(signals["label"]["psi"])
        for x in metrics.splitlines()
    )
    assert f'textsieve_drift_window_texts{{model="{MODEL}",version="1"}} {float(len(texts))}' in metrics

    shown = render_drift(view)
    assert f"{MODEL} v1 (live): {len(texts)} live texts" in shown
    assert "label" in shown and "PSI < 0.1 stable" in shown
    for s in signals.values():
        row = next(line for line in shown.splitlines() if line.strip().startswith(s["name"] + " "))
        if s["band"]:
            assert row.endswith(s["band"]), row
        else:
            least = s["min_texts"]
            assert row.endswith(f"- (from {least:,} texts)" if least else "- (baseline too small)"), row


async def test_a_bundle_without_a_baseline_says_so(tmp_path: Path, tiny_bundles: dict[str, Path]) -> None:
    old = tmp_path / "old-bundle"
    shutil.copytree(tiny_bundles["a"], old)
    data = json.loads((old / "manifest.json").read_text())
    data.pop("drift")  # as bundles exported before drift signals were
    (old / "manifest.json").write_text(json.dumps(data))
    edit_manifest(old, {})
    folder = tmp_path / "registry"
    with open_registry(folder) as reg:
        reg.publish(old, MODEL, actor="tests")
        reg.promote(MODEL, 1, "live", reason="old bundle", actor="tests", force=True)
    async with serving(settings_for(folder, inference="threads")) as (_, client):
        assert (await client.post("/v1/predict", json={"texts": ["my card was charged twice"]})).status_code == 200
        r = await client.get(f"/v1/models/{MODEL}/drift")
        metrics = (await client.get("/metrics")).text
    assert r.status_code == 200
    [v] = r.json()["versions"]
    assert v["baseline"] is None and v["detail"].startswith("no baseline")
    assert v["texts"] == 1 and all(s["psi"] is None and s["band"] is None for s in v["signals"])
    assert "textsieve_drift_psi{" not in metrics
    assert "no baseline" in render_drift(r.json())


async def test_drift_off_keeps_no_window(registry_dir: Path) -> None:
    async with serving(settings_for(registry_dir, inference="threads", drift=False)) as (_, client):
        await client.post("/v1/predict", json={"texts": ["my card was charged twice"]})
        r = await client.get(f"/v1/models/{MODEL}/drift")
    assert r.status_code == 200 and r.json()["versions"] == []
    assert "serves no version of it with a drift window" in render_drift(r.json())


def test_the_detail_line_leads_with_the_band_that_matters_not_the_largest_unjudged_psi() -> None:
    """A signal whose window is still too small to judge can read a large PSI by chance; the line led
    with it ("largest PSI: tokens 0.900") while a judged signal said "act". It now leads with the
    most severe band (then the larger PSI) and names the larger unjudged reading after it, as such."""
    from textsieve.registry.drift import DriftBaseline, DriftReport, SignalDrift
    from textsieve.service.web.drift import _detail

    base = DriftBaseline(source="validation", texts=600, unknown_rate=0.01, truncation_rate=0.0, histograms={})

    def report(*signals: SignalDrift) -> DriftReport:
        return DriftReport(texts=300, unknown_rate=0.0, truncation_rate=0.0, baseline=base, signals=list(signals))

    label = SignalDrift("label", 0.31, 0.2, "act")
    tokens = SignalDrift("tokens", 0.9, 0.4, None, min_texts=469)
    top = SignalDrift("top_probability", 0.12, 0.1, "watch")
    line = _detail(report(tokens, top, label))
    assert line.startswith("largest drift: label PSI 0.310 (act) over 300 live texts"), line
    assert "tokens reads PSI 0.900, not yet judged" in line and "bands from 469 texts" in line
    stable = SignalDrift("label", 0.05, 0.02, "stable")
    assert _detail(report(stable, top)).startswith("largest drift: top_probability PSI 0.120 (watch)")
    assert _detail(report(tokens)).startswith("largest PSI: tokens 0.900 over 300 live texts")  # nothing judged


async def _window_texts(client: httpx.AsyncClient) -> dict[int, int]:
    view = (await client.get(f"/v1/models/{MODEL}/drift")).json()
    return {v["version"]: v["texts"] for v in view["versions"]}


async def _await_live(app: Any, version: int) -> None:
    deadline = time.monotonic() + 20
    while app.state.models.live[MODEL].version != version:
        assert time.monotonic() < deadline, f"version {version} never became live"
        await asyncio.sleep(0.05)


async def test_a_reloaded_version_and_a_restart_continue_the_window(registry_dir: Path) -> None:
    """The window belongs to the version and lives in the registry: a rollback to a version served
    before, or a restart, finds it where it was (README, Drift); a version served for the first time
    starts empty. The restart finds what the shutdown's own flush wrote (the interval is never reached)."""

    def registry(call: str, *args: Any, **kwargs: Any) -> Any:
        with open_registry(registry_dir) as reg:
            return getattr(reg, call)(*args, **kwargs)

    texts = ["my card was charged twice", "the boiler repair was quick", "cannot log in", "thanks!", "refund"]
    async with serving(
        settings_for(registry_dir, inference="threads", shadow_rate=0.0, poll_seconds=0.1, shadow_flush_seconds=3600)
    ) as (
        app,
        client,
    ):
        assert (await client.post("/v1/predict", json={"texts": texts})).status_code == 200
        assert await _window_texts(client) == {1: 5}
        await asyncio.to_thread(registry, "promote", MODEL, 2, "live", reason="v2", actor="tests", force=True)
        await _await_live(app, 2)
        assert (await client.post("/v1/predict", json={"texts": texts[:3]})).status_code == 200
        assert await _window_texts(client) == {2: 3}
        await asyncio.to_thread(registry, "rollback", MODEL, reason="back to 1", actor="tests")
        await _await_live(app, 1)
        assert await _window_texts(client) == {1: 5}, "version 1's earlier 5 texts are kept"
        assert (await client.post("/v1/predict", json={"texts": texts[:2]})).status_code == 200
        assert await _window_texts(client) == {1: 7}
    async with serving(settings_for(registry_dir, inference="threads", shadow_rate=0.0)) as (_, client):
        assert await _window_texts(client) == {1: 7}, "a restart continues the window"
