"""Crash safety: publish, promote and rollback SIGKILLed at random moments, on SQLite and on
PostgreSQL, many times over one growing registry.

tests/registry/test_concurrency.py kills fresh publishes (one new model per trial). Here the
kills land in every kind of write — publish (with and without an evaluation set), promote to
candidate, promote to live through the gates (which score the evaluation set and write verified
copies into the cache), rollback — on one model whose history keeps growing, so a crash can
also hit version numbering, the retire-and-replace of the live version and the cache.

Each operation runs in a process forked from a warm parent (imports done once), and is killed
after a delay drawn uniformly from 0 to 1.1 × that operation's measured duration. After every
trial, a fresh handle must find:

- the database opens (SQLite: ``PRAGMA integrity_check`` is ok);
- versions numbered 1..n, each complete: every file's blob present and hashing to its name,
  its manifest readable;
- the state of every version (and its remembered predecessor) equal to what replaying the
  audit trail gives, so no state change exists without its event or the other way round;
- the operation all-or-nothing: no new event, or exactly the events it writes;
- no file under a final blob name whose content does not hash to that name;
- the live version fetchable (its verified copy assembled even after a kill mid-copy).
"""

from __future__ import annotations

import contextlib
import hashlib
import json
import os
import random
import secrets
import select
import signal
import subprocess
import sys
import time
from pathlib import Path
from typing import Any

from tests.helpers.registries import RegistrySpec, card_variants
from textsieve.registry import Registry, VersionInfo
from textsieve.registry.blobs import OWNER_FILE
from textsieve.registry.manifest import MANIFEST, Manifest

TRIALS = 80
MODEL = "m"
KILL_SPAN = 1.1

# The warm parent: imports once, then forks one child per operation. A child reports
# "started" once its registry is open, so the kill delay is measured from the operation itself.
FORK_SERVER = r"""
import json, os, sys
import numpy, onnx, onnxruntime
import textsieve.registry.evalsets, textsieve.registry.gates, textsieve.registry.runtime
from textsieve.registry import open_registry
if sys.argv[1].startswith("postgres"):
    import psycopg

location, blobs = sys.argv[1], sys.argv[2] or None

def run(op):
    reg = open_registry(location, blobs=blobs)
    os.write(1, b'{"event": "started"}\n')
    kind = op["kind"]
    if kind == "publish":
        reg.publish(op["bundle"], "m", evalset=op.get("evalset"), actor="crash-test")
    elif kind == "live":
        reg.promote("m", op["version"], "live", reason="crash test", actor="crash-test", force=True)
    elif kind == "candidate":
        reg.promote("m", op["version"], "candidate", reason="crash test", actor="crash-test")
    elif kind == "rollback":
        reg.rollback("m", reason="crash test", actor="crash-test")
    reg.close()

print("ready", flush=True)
for line in sys.stdin:
    op = json.loads(line)
    pid = os.fork()
    if pid == 0:
        code = 0
        try:
            run(op)
        except BaseException as exc:
            os.write(2, f"{type(exc).__name__}: {exc}\n".encode())
            code = 3
        os._exit(code)
    os.write(1, json.dumps({"event": "forked", "pid": pid}).encode() + b"\n")
    _, status = os.waitpid(pid, 0)
    os.write(1, json.dumps({"event": "ended", "status": status}).encode() + b"\n")
"""


class Lines:
    """Line reader over a pipe with timeouts (select on the raw descriptor, no hidden buffer)."""

    def __init__(self, fd: int) -> None:
        self.fd = fd
        self.buffer = b""

    def read(self, timeout: float) -> dict[str, Any] | str | None:
        deadline = time.monotonic() + timeout
        while b"\n" not in self.buffer:
            left = deadline - time.monotonic()
            if left <= 0 or not select.select([self.fd], [], [], left)[0]:
                return None
            chunk = os.read(self.fd, 65536)
            if not chunk:
                raise AssertionError("the fork server exited")
            self.buffer += chunk
        line, _, self.buffer = self.buffer.partition(b"\n")
        text = line.decode()
        return json.loads(text) if text.startswith("{") else text


class ForkServer:
    def __init__(self, spec: RegistrySpec, log: Path) -> None:
        self.log = log
        self.spec = spec
        location = spec.location
        self.application = f"crash-test-{secrets.token_hex(4)}"
        if spec.kind == "postgres":
            # Named connections, so the test can tell when the server has dealt with a dead child's.
            location += ("&" if "?" in location else "?") + f"application_name={self.application}"
        with open(log, "wb") as err:
            self.proc = subprocess.Popen(
                [sys.executable, "-c", FORK_SERVER, location, spec.blobs or ""],
                stdin=subprocess.PIPE,
                stdout=subprocess.PIPE,
                stderr=err,
                env={**os.environ, "PYTHONUNBUFFERED": "1"},
            )
        assert self.proc.stdout is not None
        self.lines = Lines(self.proc.stdout.fileno())
        assert self.lines.read(120) == "ready", log.read_text()

    def run(self, op: dict[str, Any], kill_after: float | None) -> tuple[str, float]:
        """Run ``op``; SIGKILL it ``kill_after`` seconds after it started (None: let it finish).

        Returns ("killed" | "completed", seconds from start to end).
        """
        assert self.proc.stdin is not None
        self.proc.stdin.write(json.dumps(op).encode() + b"\n")
        self.proc.stdin.flush()
        pid, started, pidfd = None, None, None
        try:
            while pid is None or started is None:
                msg = self.lines.read(60)
                assert isinstance(msg, dict), f"no start report: {msg!r}\n{self.log.read_text()[-2000:]}"
                if msg["event"] == "forked":
                    pid = msg["pid"]
                    # A pidfd names this very process: a late kill cannot reach a recycled pid.
                    with contextlib.suppress(ProcessLookupError):
                        pidfd = os.pidfd_open(pid)
                elif msg["event"] == "started":
                    started = time.monotonic()
                elif msg["event"] == "ended":
                    raise AssertionError(f"{op} ended before starting:\n{self.log.read_text()[-2000:]}")
            ended = self.lines.read(kill_after) if kill_after is not None else self.lines.read(120)
            if ended is None:
                if pidfd is not None:
                    with contextlib.suppress(ProcessLookupError):
                        signal.pidfd_send_signal(pidfd, signal.SIGKILL)
                ended = self.lines.read(60)
        finally:
            if pidfd is not None:
                os.close(pidfd)
        assert isinstance(ended, dict) and ended["event"] == "ended", ended
        status = ended["status"]
        if os.WIFSIGNALED(status):
            assert os.WTERMSIG(status) == signal.SIGKILL
            seconds = time.monotonic() - started
            self._wait_for_server_side_end()
            return "killed", seconds
        code = os.WEXITSTATUS(status)
        assert code == 0, f"{op} failed:\n{self.log.read_text()[-2000:]}"
        return "completed", time.monotonic() - started

    def _wait_for_server_side_end(self) -> None:
        """PostgreSQL: wait until the server has closed the killed child's session.

        A COMMIT already sent when the client died still commits, a moment later; checking
        before the server has finished with the session would see that commit arrive mid-check.
        """
        if self.spec.kind != "postgres":
            return
        import psycopg

        deadline = time.monotonic() + 30
        with psycopg.connect(self.spec.location, autocommit=True, connect_timeout=5) as conn:
            while conn.execute(
                "SELECT count(*) FROM pg_stat_activity WHERE application_name = %s", (self.application,)
            ).fetchone()[0]:  # type: ignore[index]
                assert time.monotonic() < deadline, "PostgreSQL kept a dead client's session for 30 s"
                time.sleep(0.01)

    def close(self) -> None:
        if self.proc.stdin is not None:
            with contextlib.suppress(BrokenPipeError):
                self.proc.stdin.close()
        try:
            self.proc.wait(timeout=30)
        except subprocess.TimeoutExpired:
            self.proc.kill()
            self.proc.wait(timeout=10)
        if self.proc.stdout is not None:
            self.proc.stdout.close()


# -- what a fresh handle must find --------------------------------------------------------------
def _replay(reg: Registry) -> tuple[dict[int, str], dict[int, int | None]]:
    """Version states and remembered predecessors, derived from the audit trail alone."""
    state: dict[int, str] = {}
    previous: dict[int, int | None] = {}
    been_live: set[int] = set()  # a replaced candidate goes back to retired if it has been live

    def holder(s: str) -> int | None:
        return next((v for v, st in state.items() if st == s), None)

    for e in reg.history(MODEL):
        v = e.version
        if e.kind == "publish":
            assert v is not None and v not in state
            state[v], previous[v] = "registered", None
        elif e.kind == "promote" and e.details["to"] == "candidate":
            old = holder("candidate")
            if old is not None:
                state[old] = "retired" if old in been_live else "registered"
            state[v] = "candidate"
        elif e.kind == "promote":
            old = holder("live")
            if old is not None:
                state[old] = "retired"
            state[v], previous[v] = "live", old
            been_live.add(v)
        elif e.kind == "rollback":
            assert holder("live") == e.details["from"]
            state[e.details["from"]] = "retired"
            state[v] = "live"
        else:
            assert e.kind in ("evalset", "refuse"), e.kind
    return state, previous


def _blob_names_match_content(blob_dir: Path) -> int:
    checked = 0
    for entry in blob_dir.iterdir():
        if entry.name.startswith(".tmp-"):
            continue  # a writer's temporary file, swept later; never read as a blob
        if entry.name == OWNER_FILE:
            assert len(entry.read_text(encoding="ascii").strip()) == 24, "the mark names one registry, whole"
            continue
        assert hashlib.sha256(entry.read_bytes()).hexdigest() == entry.name, f"partial blob {entry.name}"
        checked += 1
    return checked


def _check(
    spec: RegistrySpec, files: set[str], cursor: int, op: dict[str, Any], outcome: str
) -> tuple[int, list[VersionInfo]]:
    with spec.open() as reg:
        if spec.kind == "sqlite":
            with reg.backend.read() as tx:
                assert tx.all("PRAGMA integrity_check") == [{"integrity_check": "ok"}]
        versions = reg.versions(MODEL)
        assert [v.version for v in versions] == list(range(1, len(versions) + 1))
        for v in versions:
            assert set(v.files) == files | {MANIFEST}
            for digest in v.files.values():
                reg.blobs.verify(digest)
            Manifest.model_validate_json(reg.blobs.read_bytes(v.files[MANIFEST]))
        state, previous = _replay(reg)
        assert {v.version: v.state for v in versions} == state
        assert {v.version: v.previous_live for v in versions} == previous
        assert [v.state for v in versions].count("live") <= 1
        assert [v.state for v in versions].count("candidate") <= 1

        new_cursor, events = reg.changes_since(cursor)
        kinds = [e.kind for e in events]
        written = {
            "publish": ["publish", "evalset"] if op.get("evalset") else ["publish"],
            "live": ["promote"],
            "candidate": ["promote"],
            "rollback": ["rollback"],
        }[op["kind"]]
        if outcome == "completed":
            assert kinds == written, (op, kinds)
        else:  # killed: before its commit (nothing) or after it (all of it)
            assert kinds in ([], written), (op, kinds)
        if kinds and op["kind"] in ("live", "candidate"):
            assert events[0].version == op["version"] and events[0].details["to"] == op["kind"]

        _blob_names_match_content(spec.blob_dir)
        live = reg.live(MODEL)
        if live is not None:
            bundle = reg.fetch(MODEL)  # re-hashes the blobs and (re)builds the verified copy
            assert {p.name for p in bundle.path.iterdir()} == files | {MANIFEST}
        return new_cursor, versions


def _choose(
    rng: random.Random, versions: list[VersionInfo], bundles: list[Path], used: int, evalset: Path
) -> dict[str, Any]:
    live = next((v for v in versions if v.state == "live"), None)
    options: list[tuple[int, dict[str, Any]]] = []
    if used < len(bundles):
        op: dict[str, Any] = {"kind": "publish", "bundle": str(bundles[used])}
        if rng.random() < 0.3:
            op["evalset"] = str(evalset)
        options.append((3, op))
    not_live = [v.version for v in versions if v.state != "live"]
    if not_live:
        options.append((3, {"kind": "live", "version": rng.choice(not_live)}))
    may_candidate = [v.version for v in versions if v.state in ("registered", "retired")]
    if may_candidate:
        options.append((2, {"kind": "candidate", "version": rng.choice(may_candidate)}))
    if live is not None and live.previous_live is not None:
        options.append((3, {"kind": "rollback"}))
    weights, ops = zip(*options, strict=True)
    return dict(rng.choices(ops, weights=weights)[0])


def test_kills_at_random_moments_leave_a_valid_registry_of_complete_versions(
    spec: RegistrySpec, tiny_bundles: dict[str, Path], tiny_data: Path, tmp_path: Path
) -> None:
    bundles = card_variants(tiny_bundles["a"], tmp_path / "bundles", TRIALS + 3)
    files = {p.name for p in tiny_bundles["a"].iterdir()} - {MANIFEST}
    evalset = tiny_data / "test.jsonl"
    rng = random.Random(6_2026)
    with spec.open():
        pass  # the schema exists before the first child opens it
    server = ForkServer(spec, tmp_path / "fork-server.log")
    began = time.perf_counter()
    try:
        # Calibration: each kind of operation once, uncut, to time it (and to give the model a
        # history: two versions, an evaluation set, a candidate, a rollback target).
        durations: dict[str, float] = {}
        calibration = [
            {"kind": "publish", "bundle": str(bundles[0]), "evalset": str(evalset)},
            {"kind": "live", "version": 1},
            {"kind": "publish", "bundle": str(bundles[1])},
            {"kind": "live", "version": 2},
            {"kind": "publish", "bundle": str(bundles[2])},
            {"kind": "candidate", "version": 3},
            {"kind": "rollback"},
        ]
        cursor = 0
        for op in calibration:
            outcome, seconds = server.run(op, None)
            durations[op["kind"]] = max(durations.get(op["kind"], 0.0), seconds)
            cursor, versions = _check(spec, files, cursor, op, outcome)
        used = 3

        outcomes: list[tuple[str, str]] = []
        for _ in range(TRIALS):
            op = _choose(rng, versions, bundles, used, evalset)
            if op["kind"] == "publish":
                used += 1
            delay = rng.uniform(0.0, KILL_SPAN * durations[op["kind"]])
            outcome, seconds = server.run(op, delay)
            outcomes.append((op["kind"], outcome))
            if outcome == "completed":  # first runs are cold and slow: follow the warm timings
                durations[op["kind"]] = 0.5 * (durations[op["kind"]] + seconds)
            cursor, versions = _check(spec, files, cursor, op, outcome)
    finally:
        server.close()

    killed = [kind for kind, outcome in outcomes if outcome == "killed"]
    assert len(outcomes) == TRIALS
    assert len(killed) >= TRIALS // 3, f"too few operations were cut short: {outcomes}"
    assert killed.count("publish") >= 5 and killed.count("live") >= 5, outcomes
    with spec.open() as reg:
        # Killed publishes left blobs no version refers to: garbage collection removes exactly
        # those and keeps every referenced blob intact.
        referenced = {d for v in reg.versions(MODEL) for d in v.files.values()}
        evalset_info = reg.evalset(MODEL)
        if evalset_info is not None:
            referenced.add(evalset_info.sha256)
        # Evaluation reports that publishes and promotions stored (issue 12) are referenced too.
        for stored_report in reg.reports(MODEL):
            referenced |= {stored_report.json_sha256, stored_report.html_sha256, stored_report.evalset_sha256}
        before = {d for d, _, _ in reg.blobs.stored()}
        report = reg.collect_garbage(older_than=0)
        assert set(report.removed) == before - referenced, report  # one evaluation set file in this test
        assert {d for d, _, _ in reg.blobs.stored()} >= referenced
        for digest in referenced:
            reg.blobs.verify(digest)
    with spec.open() as reg:  # still fully usable
        n = reg.publish(bundles[-1], MODEL, actor="crash-test").version
        reg.promote(MODEL, n, "live", reason="after the kills", actor="crash-test", force=True)
        assert reg.fetch(MODEL).manifest.labels == reg.version(MODEL, n).labels
    summary = ", ".join(
        f"{k} {killed.count(k)}/{[o[0] for o in outcomes].count(k)}"
        for k in ("publish", "live", "candidate", "rollback")
    )
    timing = ", ".join(f"{k} {v * 1000:.0f} ms" for k, v in durations.items())  # as last followed
    print(
        f"\n{spec.kind}: {TRIALS} trials in {time.perf_counter() - began:.0f}s; killed mid-operation "
        f"(killed/total): {summary}; warm durations: {timing}"
    )
