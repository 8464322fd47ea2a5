"""Drift windows shared by replicas (registry/drift_queries.py), on SQLite and PostgreSQL: every
replica's rows add up to the window, the newest rows holding the window's texts make it, older
rows are deleted, and the step is additive (an older release keeps using the registry)."""

from __future__ import annotations

import threading

import numpy as np

from tests.helpers.registries import RegistrySpec
from tests.helpers.service import MODEL  # the model live_spec publishes
from textsieve.registry import Registry
from textsieve.registry.drift import Layout, count, decode_counts, encode_counts
from textsieve.registry.migrations import MIGRATIONS, applied

LAYOUT = Layout.of(2)


def _batch(n: int, label: int, tokens: int = 5) -> np.ndarray:
    return count(
        LAYOUT, np.full(n, tokens), np.full(n, tokens), np.zeros(n, np.int64), np.full(n, label), np.full(n, 0.9)
    )


def test_the_step_is_recorded_as_additive(registry: Registry) -> None:
    assert "0009_drift_counts" in applied(registry.backend)
    [step] = [m for m in MIGRATIONS if m.name == "0009_drift_counts"]
    assert step.additive  # a new table only: an older release never reads it


def test_the_encoding_round_trips_large_counts() -> None:
    counts = np.array([0, 1, 2**40, 7, 0], dtype=np.int64)
    assert decode_counts(encode_counts(counts)).tolist() == counts.tolist()


def test_two_replicas_flushing_at_once_make_one_window(live_spec: RegistrySpec) -> None:
    # Two registry handles (two replicas' connections) each flush 20 rows at once; the window is the
    # sum of all 40, computed here with NumPy from what was sent.
    sent: list[np.ndarray] = []
    errors: list[BaseException] = []
    lock = threading.Lock()

    def replica(name: str, label: int) -> None:
        try:
            with live_spec.open() as reg:
                for i in range(20):
                    c = _batch(3 + i % 4, label)
                    with lock:
                        sent.append(c)
                    reg.add_drift_counts(MODEL, 1, name, 3 + i % 4, c, window_texts=10_000)
        except BaseException as exc:  # noqa: BLE001 - reported below
            errors.append(exc)

    threads = [threading.Thread(target=replica, args=(f"r{k}", k)) for k in range(2)]
    for t in threads:
        t.start()
    for t in threads:
        t.join()
    assert not errors
    with live_spec.open() as reg:
        w = reg.drift_window(MODEL, 1, window_texts=10_000, size=LAYOUT.size)
    assert w.rows == 40
    assert w.texts == 2 * sum(3 + i % 4 for i in range(20))
    assert w.counts.tolist() == np.sum(sent, axis=0).tolist()


def test_the_window_is_the_newest_rows_holding_its_texts_and_older_rows_go(live_spec: RegistrySpec) -> None:
    with live_spec.open() as reg:
        for label in (0, 0, 1, 1, 1):  # 60 texts each; a window of 100 needs the newest two
            w = reg.add_drift_counts(MODEL, 1, "r", 60, _batch(60, label), window_texts=100)
        assert (w.texts, w.rows) == (120, 2)
        assert w.counts[LAYOUT.slices()["label"]].tolist() == [0, 120]
        kept = reg.backend
        with kept.read() as tx:
            rows = tx.all("SELECT texts FROM drift_counts WHERE model = ? AND version = ?", (MODEL, 1))
        assert len(rows) == 2, "rows no window of 100 texts can reach are deleted"
        # Another version's window is its own; a version with no rows has an empty one.
        assert reg.drift_window(MODEL, 2, window_texts=100, size=LAYOUT.size).texts == 0
