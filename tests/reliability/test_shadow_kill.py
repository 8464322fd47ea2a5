"""A replica killed (SIGKILL) while flushing shadow counts loses at most that flush and corrupts nothing.

The child below is what a replica's flusher does (registry/api.py ``add_shadow_counts``), in a
tight loop so that the kill lands inside a flush: each flush adds 10 texts, 8 agreeing, 4
transitions rows and a kept text, in one transaction, and prints "ok" once it has committed.
"""

from __future__ import annotations

import random
import signal
import subprocess
import sys
import time
from pathlib import Path

import pytest

from tests.helpers.environment import child_env
from tests.helpers.registries import RegistrySpec
from textsieve.registry.shadow import ShadowCounts

MODEL = "support"
CHILD = r"""
import sys
from textsieve.registry import open_registry
from textsieve.registry.shadow import KeptText, Tally

location, blobs = sys.argv[1], (sys.argv[2] or None)
with open_registry(location, blobs=blobs) as reg:
    n = 0
    while True:
        t = Tally()
        kept = [KeptText(f"flush {n}", "billing", 0.8, "bug", 0.6)]
        t.add(["billing"] * 7 + ["bug"] * 3, ["billing"] * 7 + ["billing", "praise", "bug"], -0.5, kept, 50)
        reg.add_shadow_counts("support", 1, 2, t, keep_texts=50)
        n += 1
        print("ok", n, flush=True)
"""


def test_sigkill_mid_flush_loses_at_most_one_flush(spec: RegistrySpec, tiny_bundles: dict[str, Path]) -> None:
    with spec.open() as reg:
        reg.publish(tiny_bundles["a"], MODEL, actor="tests")
    proc = subprocess.Popen(
        [sys.executable, "-c", CHILD, spec.location, spec.blobs or ""],
        stdout=subprocess.PIPE,
        stderr=subprocess.PIPE,
        env=child_env(),
        text=True,
    )
    acked = 0
    try:
        assert proc.stdout is not None
        target = random.Random().randint(20, 60)
        while acked < target:
            line = proc.stdout.readline()
            assert line, f"the flushing child ended early: {proc.stderr.read() if proc.stderr else ''}"
            acked = int(line.split()[1])
        time.sleep(random.Random().uniform(0, 0.01))  # somewhere inside a later flush
        proc.send_signal(signal.SIGKILL)
        rest, _ = proc.communicate(timeout=30)
        # Complete lines only: with unbuffered output (PYTHONUNBUFFERED) print writes "ok", " " and
        # the number separately, so the kill may cut the last line short ("ok" alone).
        complete = rest.split("\n")[:-1]
        acked = max([acked, *(int(line.split()[1]) for line in complete if line.startswith("ok "))])
    finally:
        if proc.poll() is None:
            proc.kill()
            proc.wait()
    assert proc.returncode == -signal.SIGKILL

    with spec.open() as reg:
        counts = reg.shadow_pair(MODEL, 1, 2)
        kept = reg.shadow_texts(MODEL, 1, 2, limit=1000)
        assert counts is not None
        flushes = counts.flushes
        # Every acknowledged flush is there; at most one more committed before its "ok" was printed.
        assert flushes in (acked, acked + 1)
        # Nothing half-applied: every column agrees with a whole number of flushes.
        assert (counts.texts, counts.agreed) == (10 * flushes, 8 * flushes)
        assert counts.delta_sum == pytest.approx(-0.5 * flushes)
        cells = {(t.live_label, t.candidate_label): t.texts for t in counts.transitions}
        assert cells == {
            ("billing", "billing"): 7 * flushes,
            ("bug", "billing"): flushes,
            ("bug", "praise"): flushes,
            ("bug", "bug"): flushes,
        }
        assert [k.text for k in kept] == [f"flush {i}" for i in range(flushes - 1, max(flushes - 50, 0) - 1, -1)]
        # The registry still takes writes after the kill.
        from textsieve.registry.shadow import Tally

        t = Tally()
        t.add(["billing"], ["billing"], 0.0)
        reg.add_shadow_counts(MODEL, 1, 2, t)
        after = reg.shadow_pair(MODEL, 1, 2)
        assert after is not None and after.texts == counts.texts + 1
        if spec.kind == "sqlite":
            with reg.backend.read() as tx:
                assert tx.all("PRAGMA integrity_check") == [{"integrity_check": "ok"}]


def _consistent(counts: ShadowCounts) -> None:
    """Sums that only whole flushes keep equal: transitions add up to texts, agreement to the diagonal."""
    assert sum(t.texts for t in counts.transitions) == counts.texts
    assert sum(t.texts for t in counts.transitions if t.live_label == t.candidate_label) == counts.agreed


def test_a_killed_replica_keeps_what_it_flushed_and_the_next_one_adds_to_it(
    spec: RegistrySpec, tiny_bundles: dict[str, Path], tiny_data: Path, tmp_path: Path
) -> None:
    import httpx

    from tests.helpers.jsonl import read_jsonl
    from tests.helpers.servers import ServerProcess

    with spec.open() as reg:
        reg.publish(tiny_bundles["a"], MODEL, actor="tests")
        reg.publish(tiny_bundles["b"], MODEL, actor="tests")
        reg.promote(MODEL, 1, "live", reason="start", actor="tests", force=True)
        reg.promote(MODEL, 2, "candidate", reason="trial", actor="tests")
    texts = [r["text"] for r in read_jsonl(tiny_data / "test.jsonl")[:80]]
    settings = {"shadow_rate": 1.0, "shadow_flush_seconds": 0.1, "access_log": "false"}

    def read() -> ShadowCounts | None:
        with spec.open() as reg:
            return reg.shadow_pair(MODEL, 1, 2)

    def send(url: str, batch: list[str]) -> None:
        for i in range(0, len(batch), 2):
            r = httpx.post(f"{url}/v1/predict", json={"texts": batch[i : i + 2], "spans": 0}, timeout=60)
            assert r.status_code == 200

    first = ServerProcess.start(spec.location, tmp_path / "first.log", blobs=spec.blobs, workers=1, **settings)
    try:
        first.wait_ready()
        send(first.url, texts[:60])
        end = time.monotonic() + 60
        while (c := read()) is None or c.texts < 20:
            assert time.monotonic() < end, f"no shadow counts flushed: {first.output()[-2000:]}"
            time.sleep(0.05)
        first.proc.send_signal(signal.SIGKILL)  # flushing every 0.1 s: likely inside or near one
        first.proc.wait(timeout=30)
    finally:
        first.stop()
    killed = read()
    assert killed is not None and 20 <= killed.texts <= 60 and killed.dropped == 0
    _consistent(killed)

    second = ServerProcess.start(spec.location, tmp_path / "second.log", blobs=spec.blobs, workers=1, **settings)
    try:
        second.wait_ready()
        send(second.url, texts[60:80])
    finally:
        assert second.terminate() == 0  # a clean stop flushes what was scored
    after = read()
    assert after is not None and after.texts == killed.texts + 20
    _consistent(after)
