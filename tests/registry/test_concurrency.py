"""Several processes at once, and processes killed mid-publish: the registry stays consistent.

- Concurrent promotions (separate OS processes, same model): at every moment one live
  version; the history is one unbroken chain in which each promotion retired the version
  the previous one made live.
- SIGKILL during publish, at random moments, many times: afterwards a model has either no
  version or a complete one (every blob present and verified, its publish event and its
  evaluation set recorded with it).
"""

from __future__ import annotations

import contextlib
import json
import os
import random
import signal
import subprocess
import sys
import time
from collections import deque
from pathlib import Path

import pytest

from tests.helpers.registries import RegistrySpec, card_variants
from textsieve.errors import NotFoundError, UnavailableError

PROMOTER = r"""
import json, sys, time
from textsieve.errors import TextsieveError
from textsieve.registry import open_registry
location, blobs, model, versions, start = sys.argv[1], sys.argv[2] or None, sys.argv[3], sys.argv[4], float(sys.argv[5])
reg = open_registry(location, blobs=blobs)
time.sleep(max(0.0, start - time.time()))
outcomes = []
for n in [int(v) for v in versions.split(",")]:
    try:
        p = reg.promote(model, n, "live", reason=f"race {n}", force=True)
        outcomes.append(["promoted", n, p.retired])
    except TextsieveError as exc:
        outcomes.append([type(exc).__name__, n, exc.message])
print(json.dumps(outcomes))
"""

PUBLISHER = r"""
import sys
import onnx, textsieve.labelled  # imported before "ready": kills should land in the publish itself
from textsieve.registry import open_registry

location, blobs, bundle, model, evalset = sys.argv[1], sys.argv[2] or None, sys.argv[3], sys.argv[4], sys.argv[5]
reg = open_registry(location, blobs=blobs)
print("ready", flush=True)
sys.stdin.readline()
reg.publish(bundle, model, evalset=evalset)
print("done", flush=True)
"""


def _env() -> dict[str, str]:
    return {**os.environ, "PYTHONUNBUFFERED": "1"}


def test_concurrent_promotions_leave_one_live_version_and_a_consistent_history(
    spec: RegistrySpec, tiny_bundles: dict[str, Path], tmp_path: Path
) -> None:
    workers = 4
    with spec.open() as reg:
        for bundle in card_variants(tiny_bundles["a"], tmp_path, workers):
            reg.publish(bundle, "m")
    start = time.time() + 4.0  # every process imported and connected before the start
    rng = random.Random(7)
    plans = []
    for w in range(workers):
        order = [w + 1, *rng.sample(range(1, workers + 1), workers)]  # each also re-promotes the others
        plans.append(",".join(map(str, order)))
    procs = [
        subprocess.Popen(
            [sys.executable, "-c", PROMOTER, spec.location, spec.blobs or "", "m", plan, str(start)],
            stdout=subprocess.PIPE,
            stderr=subprocess.PIPE,
            text=True,
            env=_env(),
        )
        for plan in plans
    ]
    results = []
    for p in procs:
        out, err = p.communicate(timeout=180)
        assert p.returncode == 0, err
        results.extend(json.loads(out))
    kinds = {r[0] for r in results}
    assert kinds <= {"promoted", "StateError"}, results  # "already live" is the only acceptable refusal
    promoted = [r for r in results if r[0] == "promoted"]

    with spec.open() as reg:
        versions = reg.versions("m")
        assert [v.state for v in versions].count("live") == 1
        assert [v.state for v in versions].count("candidate") == 0
        events = [e for e in reg.history("m") if e.kind == "promote"]
        assert len(events) == len(promoted)
        # one unbroken chain: each promotion retired what the previous one made live
        previous = None
        for e in events:
            assert e.details["retired"] == previous, [(x.version, x.details["retired"]) for x in events]
            previous = e.version
        live = reg.live("m")
        assert live is not None and live.version == previous
        assert live.previous_live == events[-1].details["retired"]
        ids = [e.id for e in reg.history("m")]
        assert ids == sorted(ids) and len(set(ids)) == len(ids)


TRIALS = 20


def test_publish_killed_at_random_moments_leaves_nothing_or_a_complete_version(
    spec: RegistrySpec, tiny_bundles: dict[str, Path], tiny_data: Path
) -> None:
    bundle = tiny_bundles["a"]
    evalset = tiny_data / "test.jsonl"
    files = {p.name for p in bundle.iterdir()}
    rng = random.Random(20260501)

    def spawn(model: str) -> subprocess.Popen[str]:
        p = subprocess.Popen(
            [sys.executable, "-c", PUBLISHER, spec.location, spec.blobs or "", str(bundle), model, str(evalset)],
            stdin=subprocess.PIPE,
            stdout=subprocess.PIPE,
            stderr=subprocess.PIPE,
            text=True,
            env=_env(),
        )
        return p

    def ready(p: subprocess.Popen[str]) -> None:
        assert p.stdout is not None and p.stdout.readline().strip() == "ready", p.stderr.read() if p.stderr else ""

    with spec.open():
        pass  # the schema exists before the first child starts
    outcomes: list[str] = []
    queue: deque[subprocess.Popen[str]] = deque([spawn("calibration")])
    duration = 0.0
    for i in range(-1, TRIALS):
        child = queue.popleft()
        ready(child)
        if i + 1 < TRIALS:
            queue.append(spawn(f"k{i + 1}"))  # the next one imports while this one runs
        assert child.stdin is not None and child.stdout is not None
        t0 = time.perf_counter()
        child.stdin.write("go\n")
        child.stdin.flush()
        if i < 0:
            # How long a whole publish takes here, under the same load; kills land uniformly within it.
            assert child.stdout.readline().strip() == "done"
            duration = time.perf_counter() - t0
            child.wait(timeout=30)
        else:
            time.sleep(rng.uniform(0.0, duration * 1.1))
            child.send_signal(signal.SIGKILL)
            child.wait(timeout=30)
        _close(child)
        if i >= 0:
            outcomes.append(_check_after_kill(spec, f"k{i}", files))
    assert len(outcomes) == TRIALS
    print(
        f"\n{spec.kind}: publish ≈ {duration * 1000:.0f} ms; after SIGKILL: "
        f"{outcomes.count('none')} none, {outcomes.count('complete')} complete"
    )

    with spec.open() as reg:  # still fully usable afterwards
        info = reg.publish(bundle, "after-the-kills")
        assert info.version == 1
        reg.promote("after-the-kills", 1, "live", reason="still works")
        assert reg.fetch("after-the-kills").manifest.labels == info.labels
        if spec.kind == "sqlite":
            with reg.backend.read() as tx:
                assert tx.all("PRAGMA integrity_check") == [{"integrity_check": "ok"}]


def _close(p: subprocess.Popen[str]) -> None:
    for stream in (p.stdin, p.stdout, p.stderr):
        if stream is not None:
            with contextlib.suppress(BrokenPipeError):  # stdin of a killed child with unflushed data
                stream.close()


def _check_after_kill(spec: RegistrySpec, model: str, files: set[str]) -> str:
    with spec.open() as reg:
        try:
            versions = reg.versions(model)
        except NotFoundError:
            assert model not in [m.name for m in reg.models()]
            return "none"
        # The model row, the version, its files, its event and its evaluation set commit together.
        assert [v.version for v in versions] == [1], versions
        info = versions[0]
        assert set(info.files) == files
        bundle = reg.fetch(model, 1)  # re-hashes every blob
        assert {p.name for p in bundle.path.iterdir()} == files
        assert [e.kind for e in reg.history(model)] == ["publish", "evalset"]
        assert reg.evalset(model) is not None
        return "complete"


def test_sqlite_writers_wait_for_each_other_instead_of_failing(tmp_path: Path, tiny_bundles: dict[str, Path]) -> None:
    """Two handles on one SQLite file: a write transaction held by one makes the other wait
    (busy timeout), not fail, and both changes land."""
    import threading

    from textsieve.registry import open_registry

    location = tmp_path / "reg"
    with open_registry(location) as one, open_registry(location) as two:
        one.publish(tiny_bundles["a"], "m")
        entered, release = threading.Event(), threading.Event()
        errors: list[BaseException] = []

        def hold() -> None:
            try:
                with one.backend.write() as tx:
                    tx.run("UPDATE models SET updated_at = ? WHERE name = ?", ("held", "m"))
                    entered.set()
                    release.wait(10)
            except BaseException as exc:  # reported below
                errors.append(exc)

        t = threading.Thread(target=hold)
        t.start()
        entered.wait(10)
        timer = threading.Timer(0.5, release.set)
        timer.start()
        began = time.perf_counter()
        two.promote("m", 1, "live", reason="waits its turn")
        waited = time.perf_counter() - began
        t.join()
        assert not errors
        assert waited >= 0.4  # it waited for the other writer
        assert two.live("m").version == 1  # type: ignore[union-attr]


def test_a_writer_stalled_inside_its_transaction_makes_others_give_up_not_hang(
    spec: RegistrySpec, tiny_bundles: dict[str, Path], monkeypatch: pytest.MonkeyPatch
) -> None:
    """A session that holds the write lock and stops (a suspended command, a lost client) costs the
    other writers their lock timeout, then an UnavailableError (exit 1, HTTP 503), on both backends."""
    import threading

    from textsieve.registry import _postgres, _sqlite

    monkeypatch.setattr(_sqlite, "BUSY_TIMEOUT_S", 1.0)
    monkeypatch.setattr(_postgres, "LOCK_TIMEOUT_S", 1.0)
    with spec.open() as one, spec.open() as two:
        one.publish(tiny_bundles["a"], "m")
        entered, release = threading.Event(), threading.Event()

        def hold() -> None:
            with one.backend.write() as tx:
                tx.run("UPDATE models SET updated_at = ? WHERE name = ?", ("held", "m"))
                entered.set()
                release.wait(60)

        t = threading.Thread(target=hold)
        t.start()
        try:
            assert entered.wait(10)
            began = time.perf_counter()
            with pytest.raises(UnavailableError, match="another writer for 1 s; try again"):
                two.change_settings("m", {"mcnemar_p": 0.04}, reason="waits, then gives up")
            assert time.perf_counter() - began < 10
        finally:
            release.set()
            t.join()
        assert two.change_settings("m", {"mcnemar_p": 0.04}, reason="the lock is free again")[1] == ["mcnemar_p"]
