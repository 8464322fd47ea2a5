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
from textsieve.registry.migrations import MIGRATIONS, applied, migrate

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


def _rows(reg: Registry) -> list[dict[str, object]]:
    with reg.backend.read() as tx:
        return tx.all(
            "SELECT texts, window_texts FROM drift_counts WHERE model = ? AND version = ? ORDER BY id", (MODEL, 1)
        )


def test_a_replica_with_a_smaller_window_keeps_the_rows_a_larger_one_reads(live_spec: RegistrySpec) -> None:
    """Replicas set to 100 and 1,000 texts share a version's rows. Each pruned by its own size, so every
    flush of the small one cut the large one's window back to about 100 texts. Rows are now kept for
    the largest size declared, each replica reads the newest texts of its own, and both see the sizes
    disagree. The sums are NumPy's over what was sent."""
    large, small = [], []
    with live_spec.open() as reg:
        for _ in range(5):  # the large replica: 300 texts
            large.append(_batch(60, 0))
            reg.add_drift_counts(MODEL, 1, "large", 60, large[-1], window_texts=1000)
        small.append(_batch(60, 1))
        w_small = reg.add_drift_counts(MODEL, 1, "small", 60, small[-1], window_texts=100)
        w_large = reg.drift_window(MODEL, 1, window_texts=1000, size=LAYOUT.size)
        assert (w_large.texts, w_large.rows) == (360, 6), "the small replica deleted none of the large one's rows"
        assert w_large.counts.tolist() == np.sum(large + small, axis=0).tolist()
        assert (w_small.texts, w_small.rows) == (120, 2), "the small replica still reads its own 100 texts"
        assert w_small.counts.tolist() == np.sum([large[-1], small[-1]], axis=0).tolist()
        assert w_small.declared == w_large.declared == (100, 1000)
        assert [r["window_texts"] for r in _rows(reg)] == [1000] * 5 + [100]


def test_a_size_nobody_declares_any_more_stops_keeping_rows(live_spec: RegistrySpec) -> None:
    """Once the large replica is gone (or set again), its size keeps rows only until its last row falls
    out of its window: then the table shrinks back to the smaller window by itself."""
    with live_spec.open() as reg:
        reg.add_drift_counts(MODEL, 1, "large", 60, _batch(60, 0), window_texts=1000)
        # 17 rows of 60 (1,020 texts) are the fewest newer rows holding 1,000 texts: the large row goes
        # with the 17th, and its size with it; the next flush prunes to the small window.
        for i in range(17):
            w = reg.add_drift_counts(MODEL, 1, "small", 60, _batch(60, 1), window_texts=100)
            assert w.declared == ((100, 1000) if i < 16 else (100,)), i
        assert len(_rows(reg)) == 17
        w = reg.add_drift_counts(MODEL, 1, "small", 60, _batch(60, 1), window_texts=100)
        assert (w.texts, w.rows, w.declared) == (120, 2, (100,))
        assert len(_rows(reg)) == 2


# How releases before 0010_drift_window_texts write a flush (registry/drift_queries.py at 00fb708).
OLDER_INSERT = "INSERT INTO drift_counts (model, version, replica, flushed_at, texts, counts) VALUES (?, ?, ?, ?, ?, ?)"


def test_the_window_size_step_is_additive_and_keeps_the_rows_written_before(live_spec: RegistrySpec) -> None:
    """0010_drift_window_texts adds a nullable column in one transaction: rows written under 0009 stay,
    declare nothing, and still count; an older release that knows only the steps up to 0009 keeps
    writing rows without the column, and this release reads them."""
    [step] = [m for m in MIGRATIONS if m.name == "0010_drift_window_texts"]
    assert step.additive
    before = tuple(m for m in MIGRATIONS if m.name < "0010")
    [drift_step] = [m for m in before if m.name == "0009_drift_counts"]
    with live_spec.open() as reg:
        backend = reg.backend
        # The registry as 0009 left it: the table without the column, one row an older release wrote.
        with backend.write() as tx:
            tx.run("DROP TABLE drift_counts")
            tx.script(drift_step.sql.format(**backend.ddl_types))
            tx.run("DELETE FROM schema_migrations WHERE name = ?", (step.name,))
            tx.run("DELETE FROM schema_additive_steps WHERE name = ?", (step.name,))
            old = _batch(40, 0)
            tx.run(
                OLDER_INSERT,
                (MODEL, 1, "old", "2026-12-01T00:00:00.000000+00:00", 40, encode_counts(old)),
            )
        assert migrate(backend, "2026-12-05T00:00:00.000000+00:00") == [step.name]
        assert _rows(reg) == [{"texts": 40, "window_texts": None}]
        assert migrate(backend, "2026-12-05T00:00:00.000000+00:00", steps=before) == [], "an older one carries on"
        with backend.write() as tx:  # an older release's flush, after the step
            tx.run(
                OLDER_INSERT,
                (MODEL, 1, "old", "2026-12-05T00:00:01.000000+00:00", 40, encode_counts(old)),
            )
        new = _batch(30, 1)
        w = reg.add_drift_counts(MODEL, 1, "new", 30, new, window_texts=10_000)
        assert (w.texts, w.rows, w.declared) == (110, 3, (10_000,))
        assert w.counts.tolist() == np.sum([old, old, new], axis=0).tolist()
