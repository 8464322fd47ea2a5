"""Drift signals (registry/drift.py): counting against NumPy, PSI against a hand-worked figure,
Jensen–Shannon against SciPy on real histograms, a replica's view of the shared window, and bundles
without a baseline."""

from __future__ import annotations

import json
import math
import shutil
from pathlib import Path

import numpy as np
import pytest
from scipy.spatial.distance import jensenshannon

from tests.helpers.jsonl import read_jsonl
from tests.helpers.registries import edit_manifest
from textsieve.registry import stats
from textsieve.registry.bundle import open_bundle
from textsieve.registry.drift import (
    SIGNALS,
    Layout,
    StoredWindow,
    Window,
    compare,
    count,
    count_encoded,
    newest_rows,
)
from textsieve.registry.runtime import Predictor


def _numpy_histogram(values: np.ndarray, edges: tuple[float, ...]) -> list[int]:
    # NumPy's own histogram, with values beyond the edges put in the end bins as the drift
    # histograms do (every text must be counted).
    clipped = np.clip(values, edges[0], edges[-1])
    return [int(c) for c in np.histogram(clipped, bins=np.asarray(edges, dtype=np.float64))[0]]


def test_counts_equal_numpy_histograms() -> None:
    rng = np.random.default_rng(7)
    n, labels = 500, 4
    tokens = rng.integers(0, 900, n)
    kept = np.minimum(tokens, 64)
    unknown = rng.binomial(kept, 0.1)
    best = rng.integers(0, labels, n)
    top = rng.uniform(0.25, 1.0, n)
    layout = Layout.of(labels)
    c = count(layout, tokens, kept, unknown, best, top)
    sl = layout.slices()
    assert c[sl["tokens"]].tolist() == _numpy_histogram(tokens.astype(float), layout.edges["tokens"])
    share = unknown / np.maximum(kept, 1)
    assert c[sl["unknown_share"]].tolist() == _numpy_histogram(share, layout.edges["unknown_share"])
    assert c[sl["truncated"]].tolist() == [int((tokens <= kept).sum()), int((tokens > kept).sum())]
    assert c[sl["label"]].tolist() == np.bincount(best, minlength=labels).tolist()
    assert c[sl["top_probability"]].tolist() == _numpy_histogram(top, layout.edges["top_probability"])
    assert c[-2:].tolist() == [int(unknown.sum()), int(kept.sum())]
    assert all(int(c[sl[s]].sum()) == n for s in SIGNALS)


def test_counts_at_and_beyond_every_edge_equal_numpy_histograms() -> None:
    """Values on each edge, between, below the first and above the last (NumPy's histogram as
    the reference: [e_i, e_i+1), the last bin closed; beyond the ends clipped into them)."""
    layout = Layout.of(3)
    e_tok, e_share, e_top = (np.asarray(layout.edges[k]) for k in ("tokens", "unknown_share", "top_probability"))
    tokens = np.concatenate((e_tok, e_tok + 0.5, [-1, 10_000])).astype(np.int64)
    n = len(tokens)
    kept = np.maximum(np.minimum(tokens, 64), 0)
    top = np.resize(np.concatenate((e_top, (e_top[:-1] + e_top[1:]) / 2, [1.5])), n)
    share_wanted = np.resize(np.concatenate((e_share, [0.07, 0.99])), n)
    unknown = np.round(share_wanted * np.maximum(kept, 1)).astype(np.int64)
    best = np.arange(n) % 3
    c = count(layout, tokens, kept, unknown, best, top)
    sl = layout.slices()
    assert c[sl["tokens"]].tolist() == _numpy_histogram(tokens.astype(float), layout.edges["tokens"])
    share = unknown / np.maximum(kept, 1)
    assert c[sl["unknown_share"]].tolist() == _numpy_histogram(share, layout.edges["unknown_share"])
    assert c[sl["top_probability"]].tolist() == _numpy_histogram(top, layout.edges["top_probability"])
    assert c[sl["truncated"]].tolist() == [int((tokens <= kept).sum()), int((tokens > kept).sum())]
    assert c[sl["label"]].tolist() == [n // 3 + (n % 3 > 0), n // 3 + (n % 3 > 1), n // 3]
    assert c.dtype == np.int64 and len(c) == layout.size


def test_psi_of_a_hand_worked_label_mix() -> None:
    # Hand-worked: baseline label shares (.1, .2, .3, .4), live (.2, .2, .3, .3):
    # PSI = (.2-.1)·ln 2 + 0 + 0 + (.3-.4)·ln(.3/.4) = 0.0693147 + 0.0287682 = 0.0980829
    # (formula: Yurdakul, 2018, eq. 1) - just under the 0.1 "stable" bound (common practice).
    # 1,000 texts a side: enough for a band (stats.psi_min_texts, tested in test_stats.py).
    layout = Layout.of(4)
    base_best = np.repeat(np.arange(4), [100, 200, 300, 400])
    live_best = np.repeat(np.arange(4), [200, 200, 300, 300])

    def vector(best: np.ndarray) -> np.ndarray:
        n = len(best)
        return count(layout, np.full(n, 10), np.full(n, 10), np.zeros(n, np.int64), best, np.full(n, 0.9))

    from textsieve.registry.drift import baseline

    report = compare(layout, baseline(layout, vector(base_best)), vector(live_best))
    label = next(s for s in report.signals if s.name == "label")
    assert label.psi == pytest.approx(0.0980829, abs=1e-7)
    e, a = np.array([0.1, 0.2, 0.3, 0.4]), np.array([0.2, 0.2, 0.3, 0.3])
    assert label.psi == pytest.approx(float(np.sum((a - e) * np.log(a / e))), rel=1e-12)  # NumPy, independently
    assert label.band == "stable"
    same = next(s for s in report.signals if s.name == "tokens")
    assert same.psi == pytest.approx(0.0) and same.js_distance == pytest.approx(0.0) and same.band == "stable"
    assert label.min_texts is not None and label.min_texts <= 1000


def test_a_window_too_small_to_tell_drift_from_noise_gets_figures_and_no_band() -> None:
    from textsieve.registry.drift import baseline

    layout = Layout.of(4)

    def vector(best: np.ndarray) -> np.ndarray:
        n = len(best)
        return count(layout, np.full(n, 10), np.full(n, 10), np.zeros(n, np.int64), best, np.full(n, 0.9))

    base = baseline(layout, vector(np.repeat(np.arange(4), [150, 150, 150, 150])))  # 600 texts
    few = compare(layout, base, vector(np.array([0, 1, 2])))  # three live texts, one label never seen
    label = next(s for s in few.signals if s.name == "label")
    assert label.psi is not None and label.psi > 0.25  # it would read "act" ...
    assert label.band is None and label.min_texts == stats.psi_min_texts(4, 600)  # ... but is not judged
    enough = compare(layout, base, vector(np.arange(label.min_texts) % 4))
    assert next(s for s in enough.signals if s.name == "label").band == "stable"


@pytest.fixture(scope="module")
def real_histograms(tiny_bundles: dict[str, Path], tiny_data: Path) -> tuple[Layout, object, np.ndarray, list[str]]:
    """Bundle a's baseline (its validation texts) and the counts of the test split, scored here."""
    bundle = open_bundle(tiny_bundles["a"])
    assert bundle.manifest.drift is not None
    p = Predictor.from_bundle(bundle)
    texts = [r["text"] for r in read_jsonl(tiny_data / "test.jsonl")]
    # Shift the mix the way live traffic might: longer texts with a made-up word.
    texts = texts[:150] + [t + " " + t + " zzkwq" for t in texts[150:300]]
    encoded = [p.encode(t) for t in texts]
    probs = p.probabilities(p.run(encoded).logits)
    layout = Layout.of(len(p.labels), bundle.manifest.drift)
    return layout, bundle.manifest.drift, count_encoded(layout, encoded, probs), texts


def test_js_distance_equals_scipy_on_real_histograms(
    real_histograms: tuple[Layout, object, np.ndarray, list[str]],
) -> None:
    # Reference: scipy.spatial.distance.jensenshannon (natural logarithm, its default).
    layout, base, counts, _ = real_histograms
    report = compare(layout, base, counts)  # type: ignore[arg-type]
    sl = layout.slices()
    for s in report.signals:
        expected = base.histograms[s.name].counts  # type: ignore[attr-defined]
        ref = float(jensenshannon(np.asarray(expected, float), counts[sl[s.name]].astype(float)))
        assert s.js_distance == pytest.approx(ref, abs=1e-12), s.name
        assert 0.0 <= (s.js_distance or 0.0) <= math.sqrt(math.log(2)) + 1e-12
    tokens = next(s for s in report.signals if s.name == "tokens")
    assert tokens.psi is not None and tokens.psi > 0.1  # doubled texts moved the length mix


def test_baseline_counts_every_validation_text(tiny_bundles: dict[str, Path], tiny_runs: dict[str, Path]) -> None:
    drift = open_bundle(tiny_bundles["a"]).manifest.drift
    assert drift is not None and drift.source == "validation"
    valid = read_jsonl(tiny_runs["a"] / "valid.jsonl")
    assert drift.texts == len(valid)
    for name in SIGNALS:
        assert sum(drift.histograms[name].counts) == len(valid), name


def test_a_replicas_window_is_the_registrys_plus_what_it_has_not_flushed() -> None:
    layout = Layout.of(2)
    w = Window(layout, size=100)

    def batch(n: int, label: int) -> np.ndarray:
        return count(layout, np.full(n, 5), np.full(n, 5), np.zeros(n, np.int64), np.full(n, label), np.full(n, 0.9))

    labels = layout.slices()["label"]
    w.add(60, batch(60, 0))
    texts, counts = w.take()
    assert texts == 60 and w.texts == 60, "taken counts still count while their flush is under way"
    w.add(10, batch(10, 1))
    w.put_back()  # the flush failed: nothing is lost, the next flush writes both
    assert w.texts == 70 and w.counts()[labels].tolist() == [60, 10]
    texts, counts = w.take()
    assert texts == 70
    # The registry's window now holds that row and another replica's 40 texts of label 1.
    w.settle(StoredWindow(110, counts + batch(40, 1), rows=2))
    assert w.texts == 110 and w.counts()[labels].tolist() == [60, 50]
    w.add(5, batch(5, 0))
    assert w.texts == 115 and w.counts()[labels].tolist() == [65, 50]


def test_the_newest_rows_holding_the_window_make_it() -> None:
    assert newest_rows([60, 60, 60], 100) == 2  # a row more than the size at most
    assert newest_rows([100, 60], 100) == 1
    assert newest_rows([10, 20], 100) == 2  # fewer texts than the size: every row
    assert newest_rows([], 100) == 0


def test_a_bundle_without_a_baseline_still_loads(tiny_bundles: dict[str, Path], tmp_path: Path) -> None:
    old = tmp_path / "old"
    shutil.copytree(tiny_bundles["a"], old)
    data = json.loads((old / "manifest.json").read_text())
    data.pop("drift")
    (old / "manifest.json").write_text(json.dumps(data))
    edit_manifest(old, {})
    b = open_bundle(old)
    assert b.manifest.drift is None
    layout = Layout.of(len(b.manifest.labels), None)
    report = compare(layout, None, np.zeros(layout.size, np.int64))
    assert report.baseline is None and all(s.psi is None for s in report.signals)
