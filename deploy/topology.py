#!/usr/bin/env python3
"""The scaled-out topology on loopback, without Docker: PostgreSQL, two ``textsieve serve``
replicas sharing one registry and one blob folder, and nginx in front of them.

It runs the commands of the Dockerfile and compose.yaml with the same settings, ports and
health endpoint (tests/deploy/test_deploy.py holds the three together), then checks what scaling
out promises:

1. before any version is live, each replica is alive (``/healthz``) but not ready
   (``/readyz``, and the image's health command exits 1);
2. a version published with the CLI and promoted through one replica's admin API is served
   by both replicas within the polling interval (plus the time the replica takes to load it);
3. both replicas, and nginx in front of them, give the same predictions;
4. promoting another version through one replica while requests flow through nginx fails
   no request, and the other replica follows;
5. stopping one replica (SIGTERM, as ``docker compose stop`` does) and later killing the
   other (SIGKILL, a crash) under load loses no request sent through nginx.

Usage::

    python deploy/topology.py --bundle BUNDLE_V1 --bundle BUNDLE_V2 [--pg URL] [--install-nginx]

deploy/loopback.py starts the processes. PostgreSQL comes from ``--pg`` or
``TEXTSIEVE_TEST_PG`` (``scripts/test-services.sh``); the topology gets a database of its own,
dropped at the end. nginx comes from Debian's packages (``deploy/install-nginx.sh``). Every
server binds 127.0.0.1, every request loop is bounded, and everything started is stopped at
the end, also when a check fails.
"""

from __future__ import annotations

import argparse
import json
import os
import signal
import sys
import tempfile
import threading
import time
from collections.abc import Callable, Sequence
from dataclasses import asdict, dataclass, field
from pathlib import Path
from typing import Any

import httpx

# Run as a script, this folder is on sys.path; imported (tests/deploy/test_deploy.py), the importer puts it there.
from loopback import (
    FAIL_TIMEOUT_S,
    LAG_SLACK_S,
    MODEL,
    PROBABILITY_TOLERANCE,
    READINESS_PATH,
    CheckFailed,
    Replica,
    Topology,
    check,
    fresh_database,
    health_exit,
    log_tail,
    nginx_executable,
    wait_for_version,
)

DEFAULT_TEXTS = (
    "I was charged twice for my order this month",
    "the app crashes every time I open the settings page",
    "thank you so much, the new dashboard is great",
    "how do I change the email address on my account",
    "my parcel has not arrived and tracking shows nothing",
    "ok",
)


def predict(url: str, texts: Sequence[str], spans: int = 3) -> dict[str, Any]:
    r = httpx.post(f"{url}/v1/predict", json={"texts": list(texts), "model": MODEL, "spans": spans}, timeout=60)
    check(r.status_code == 200, f"{url}/v1/predict: HTTP {r.status_code} {r.text[:300]}")
    reply: dict[str, Any] = r.json()
    return reply


def disagreement(a: dict[str, Any], b: dict[str, Any]) -> float:
    """Largest |Δprobability| between two replies; a CheckFailed if labels or spans differ."""
    check(a["version"] == b["version"], f"versions differ: {a['version']} vs {b['version']}")
    worst = 0.0
    for i, (x, y) in enumerate(zip(a["results"], b["results"], strict=True)):
        check(x["label"] == y["label"], f"text {i}: label {x['label']!r} vs {y['label']!r}")
        check(set(x["probabilities"]) == set(y["probabilities"]), f"text {i}: different label sets")
        worst = max(worst, *(abs(x["probabilities"][k] - y["probabilities"][k]) for k in x["probabilities"]))
        spans_x = [(s["start"], s["end"], s["text"]) for s in x["spans"]]
        spans_y = [(s["start"], s["end"], s["text"]) for s in y["spans"]]
        check(spans_x == spans_y, f"text {i}: spans {spans_x} vs {spans_y}")
    return worst


# -- load through nginx ---------------------------------------------------------------------
@dataclass
class LoadResult:
    ok: int = 0
    failed: list[str] = field(default_factory=list)
    versions: dict[int, int] = field(default_factory=dict)

    @property
    def sent(self) -> int:
        return self.ok + len(self.failed)


class LoadLoop:
    """Predictions through ``url`` from ``threads`` clients until stopped, bounded in count and time."""

    def __init__(
        self, url: str, texts: Sequence[str], *, threads: int = 2, max_requests: int = 5000, max_seconds: float = 60.0
    ) -> None:
        self.url, self.texts = url, [t for t in texts if t][:4] or ["hello"]
        self.threads, self.max_requests, self.max_seconds = threads, max_requests, max_seconds
        self.result = LoadResult()
        self._lock = threading.Lock()
        self._stop = threading.Event()
        self._workers: list[threading.Thread] = []

    def _run(self) -> None:
        deadline = time.monotonic() + self.max_seconds
        with httpx.Client(timeout=30) as client:
            while not self._stop.is_set() and time.monotonic() < deadline:
                with self._lock:
                    if self.result.sent >= self.max_requests:
                        return
                try:
                    r = client.post(f"{self.url}/v1/predict", json={"texts": self.texts, "model": MODEL, "spans": 1})
                    outcome = r.json()["version"] if r.status_code == 200 else f"HTTP {r.status_code}: {r.text[:200]}"
                except Exception as exc:  # every failure is a finding, whatever its kind
                    outcome = f"{type(exc).__name__}: {exc}"
                with self._lock:
                    if isinstance(outcome, int):
                        self.result.ok += 1
                        self.result.versions[outcome] = self.result.versions.get(outcome, 0) + 1
                    else:
                        self.result.failed.append(outcome)

    def __enter__(self) -> LoadLoop:
        self._workers = [threading.Thread(target=self._run, name=f"load-{i}", daemon=True) for i in range(self.threads)]
        for t in self._workers:
            t.start()
        return self

    def __exit__(self, *exc: object) -> None:
        self._stop.set()
        for t in self._workers:
            t.join(60)

    def wait_for(self, successes: int, timeout: float = 30.0) -> None:
        deadline = time.monotonic() + timeout
        target = self.result.ok + successes
        while self.result.ok < target:
            check(
                time.monotonic() < deadline,
                f"load: {self.result.ok} successes, wanted {target}; failures: {self.result.failed[:3]}",
            )
            time.sleep(0.01)


# -- the scenario -------------------------------------------------------------------------------
@dataclass
class Report:
    replicas: list[str] = field(default_factory=list)
    balancer: str = ""
    poll_seconds: float = 0.0
    not_ready_reason: str = ""
    first_live_lag_s: float = 0.0
    first_live_load_s: float = 0.0
    swap_lag_s: float = 0.0
    swap_load_s: float = 0.0
    max_probability_delta: float = 0.0
    swap_requests: int = 0
    swap_failed: list[str] = field(default_factory=list)
    swap_versions: dict[int, int] = field(default_factory=dict)
    stop_requests: int = 0
    stop_failed: list[str] = field(default_factory=list)
    stop_retried: int = 0
    kill_requests: int = 0
    kill_failed: list[str] = field(default_factory=list)
    kill_retried: int = 0
    rejoin_s: float = 0.0
    # nginx's replies to the agreement request, before and after the swap (for outside checks)
    first_reply: dict[str, Any] = field(default_factory=dict)
    swapped_reply: dict[str, Any] = field(default_factory=dict)
    seconds: float = 0.0


def _agreement(texts: Sequence[str], urls: Sequence[str]) -> tuple[float, dict[str, Any]]:
    """Largest |Δprobability| among the replies of ``urls`` to the same request, and the last reply."""
    replies = [predict(url, texts) for url in urls]
    return max(disagreement(replies[0], other) for other in replies[1:]), replies[-1]


def _under_load_stop(topo: Topology, victim: Replica, sig: signal.Signals, texts: Sequence[str]) -> LoadResult:
    """Requests through nginx while ``victim`` is stopped with ``sig``; then some more."""
    assert topo.balancer is not None
    with LoadLoop(topo.balancer.url, texts) as load:
        load.wait_for(40)
        code = victim.stop(sig)
        if sig == signal.SIGTERM:
            # docker stop sends SIGTERM: a replica must shut down cleanly (uvicorn finishes in-flight
            # requests, then ends with status 0 or re-raises the signal), not fail with an error status.
            check(
                code in (0, -signal.SIGTERM),
                f"{victim.name} exited with status {code} on SIGTERM:\n{log_tail(victim.log)}",
            )
        # Round robin sends the stopped replica its share of these; each must reach the other.
        load.wait_for(60)
    return load.result


def run_scenario(
    pg_url: str,
    bundles: Sequence[Path],
    *,
    workdir: Path,
    texts: Sequence[str] = DEFAULT_TEXTS,
    poll_seconds: float = 0.5,
    install_nginx: bool = False,
    log: Callable[[str], None] = lambda _: None,
) -> Report:
    """Start the topology, run checks 1–5 (module docstring), tear down; CheckFailed on a broken promise."""
    check(len(bundles) >= 2, "two bundles are needed: one to publish first, one to swap to")
    started = time.monotonic()
    report = Report(poll_seconds=poll_seconds)
    nginx = nginx_executable(install=install_nginx)
    with fresh_database(pg_url) as db:
        topo = Topology(db, workdir, poll_seconds=poll_seconds, nginx=nginx)
        try:
            log(f"database {db.name}; starting two replicas")
            topo.start_replicas(2)
            r1, r2 = topo.replicas
            report.replicas = [r.url for r in topo.replicas]

            # 1. alive but not ready while the registry has no live version
            for r in topo.replicas:
                ready = httpx.get(r.url + READINESS_PATH, timeout=5)
                check(ready.status_code == 503, f"{r.name} {READINESS_PATH}: {ready.status_code} before any promotion")
                code, line = health_exit(r.url)
                check(code == 1 and line.startswith("not ready"), f"{r.name} health: exit {code}, {line!r}")
                report.not_ready_reason = line

            # 2. publish with the CLI, promote through replica 1, both serve it
            v1 = topo.publish(bundles[0])
            reply = topo.promote(r1, v1, reason="topology test: first live version")
            lag, load_s = wait_for_version(r2.url, v1, timeout=poll_seconds + 60)
            report.first_live_lag_s, report.first_live_load_s = lag, load_s
            check(reply["serving"]["version"] == v1, f"{r1.name} answered the promotion serving {reply['serving']}")
            check(
                lag <= poll_seconds + load_s + LAG_SLACK_S,
                f"{r2.name} served v{v1} {lag:.2f}s after the promotion; allowed {poll_seconds}s polling "
                f"+ {load_s:.2f}s load + {LAG_SLACK_S}s",
            )
            for r in topo.replicas:
                code, line = health_exit(r.url)
                check(code == 0, f"{r.name} health after promotion: exit {code}, {line!r}")

            # nginx starts once both replicas are healthy, as compose's depends_on has it
            lb = topo.start_balancer()
            report.balancer = lb.url
            code, line = health_exit(lb.url)
            check(code == 0, f"health through nginx: exit {code}, {line!r}")
            log(f"nginx on {lb.url} in front of {report.replicas}")

            # 3. the same predictions everywhere
            report.max_probability_delta, report.first_reply = _agreement(texts, [r1.url, r2.url, lb.url])
            check(
                report.max_probability_delta <= PROBABILITY_TOLERANCE,
                f"replicas disagree by {report.max_probability_delta:.2e} in probability",
            )

            # 4. swap to the next version through replica 2 while requests flow through nginx
            v2 = topo.publish(bundles[1])
            with LoadLoop(lb.url, texts) as load:
                load.wait_for(20)
                # Forced: the gates have their own tests; here the swap across replicas is what counts.
                reply = topo.promote(r2, v2, reason="topology test: swap under load", force=True)
                swap_lag, swap_load = wait_for_version(r1.url, v2, timeout=poll_seconds + 60)
                load.wait_for(20)
            report.swap_lag_s, report.swap_load_s = swap_lag, swap_load
            report.swap_requests, report.swap_failed = load.result.sent, load.result.failed
            report.swap_versions = dict(load.result.versions)
            check(reply["serving"]["version"] == v2, f"{r2.name} answered the promotion serving {reply['serving']}")
            check(
                swap_lag <= poll_seconds + swap_load + LAG_SLACK_S,
                f"{r1.name} served v{v2} {swap_lag:.2f}s after the promotion; allowed {poll_seconds}s polling "
                f"+ {swap_load:.2f}s load + {LAG_SLACK_S}s",
            )
            check(not load.result.failed, f"requests failed during the swap: {load.result.failed[:5]}")
            delta, report.swapped_reply = _agreement(texts, [r1.url, r2.url, lb.url])
            report.max_probability_delta = max(report.max_probability_delta, delta)
            check(delta <= PROBABILITY_TOLERANCE, f"replicas disagree by {delta:.2e} after the swap")

            # 5. stop one replica, bring it back, then kill the other: nothing lost through nginx
            before = lb.retried_requests()
            result = _under_load_stop(topo, r2, signal.SIGTERM, texts)
            report.stop_requests, report.stop_failed = result.sent, result.failed
            report.stop_retried = lb.retried_requests() - before
            check(
                not result.failed,
                f"{len(result.failed)} of {result.sent} requests lost when {r2.name} stopped: {result.failed[:5]}",
            )
            r2.start()
            wait_for_version(r2.url, v2, timeout=60)
            # nginx took it out of rotation when it stopped; until it tries it again (fail_timeout),
            # a failure of the other replica would find no replica to retry on.
            report.rejoin_s = lb.wait_in_rotation(f"127.0.0.1:{r2.port}", texts, timeout=FAIL_TIMEOUT_S + 10)
            before = lb.retried_requests()
            result = _under_load_stop(topo, r1, signal.SIGKILL, texts)
            report.kill_requests, report.kill_failed = result.sent, result.failed
            report.kill_retried = lb.retried_requests() - before
            check(
                not result.failed,
                f"{len(result.failed)} of {result.sent} requests lost when {r1.name} was killed: {result.failed[:5]}",
            )
        finally:
            topo.close()
    report.seconds = time.monotonic() - started
    return report


def main(argv: Sequence[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0] if __doc__ else None)
    parser.add_argument(
        "--bundle",
        type=Path,
        action="append",
        required=True,
        help="a bundle folder (textsieve export); give two: the first goes live, then the second",
    )
    parser.add_argument(
        "--pg",
        default=os.environ.get("TEXTSIEVE_TEST_PG"),
        help="PostgreSQL URL of a role that may create databases (default $TEXTSIEVE_TEST_PG)",
    )
    parser.add_argument("--poll-seconds", type=float, default=0.5)
    parser.add_argument("--install-nginx", action="store_true", help="install nginx from Debian's packages if missing")
    args = parser.parse_args(argv)
    if not args.pg:
        parser.error("no PostgreSQL: pass --pg URL or run 'bash scripts/test-services.sh' and source .test-env")
    with tempfile.TemporaryDirectory(prefix="textsieve-topology-") as tmp:
        try:
            report = run_scenario(
                args.pg,
                args.bundle,
                workdir=Path(tmp),
                poll_seconds=args.poll_seconds,
                install_nginx=args.install_nginx,
                log=lambda m: print(f"topology: {m}", file=sys.stderr),
            )
        except CheckFailed as exc:
            print(f"topology: FAILED: {exc}", file=sys.stderr)
            return 1
    figures = {k: v for k, v in asdict(report).items() if not k.endswith("_reply")}
    print(json.dumps(figures, indent=2))
    print("topology: all checks passed", file=sys.stderr)
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
