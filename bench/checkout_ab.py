"""Two checkouts of textsieve served side by side under the benchmark's batched load, in turn.

    .venv/bin/python bench/checkout_ab.py --a /path/to/base --b . [--rounds 8] [--seconds 6]

Each checkout's ``textsieve serve`` runs with ``PYTHONPATH`` on that checkout, on its own copy of
the demo model's registry. Each round loads one and then the other (the order alternates: a
window's speed depends on what ran just before it) with ``make bench``'s "service batched" load:
32 kept-alive connections, 16 texts a request, 3 spans, closed loop. It reads from /proc the CPU
time of each server's whole process tree and, apart, of its worker processes (those whose command
line is the multiprocessing fork server's child), and from /metrics the mean texts per batch, and
prints each window, the medians and the per-round ratios b ÷ a.
"""

from __future__ import annotations

import argparse
import os
import statistics
import sys
import urllib.request
from pathlib import Path
from typing import Any

HERE = Path(__file__).resolve().parent
sys.path.insert(0, str(HERE))

import demo_model  # noqa: E402
import loadgen  # noqa: E402
import servers  # noqa: E402
from run import CONNECTIONS, SPANS, TEXTS_PER_REQUEST, bodies  # noqa: E402
from texts import bench_texts  # noqa: E402

_TICKS = os.sysconf("SC_CLK_TCK")


def _cpu(pid: int) -> float:
    fields = Path(f"/proc/{pid}/stat").read_text().rsplit(")", 1)[1].split()
    return (int(fields[11]) + int(fields[12])) / _TICKS


def worker_seconds(server: servers.Server) -> float:
    """CPU of the worker processes: below the server, forked by the fork server (not the fork server itself)."""
    total = 0.0
    for pid in server.pids():
        try:
            cmd = Path(f"/proc/{pid}/cmdline").read_bytes()
            parent_cmd = Path(f"/proc/{_ppid(pid)}/cmdline").read_bytes()
            if b"forkserver" in cmd and b"forkserver" in parent_cmd:
                total += _cpu(pid)
        except OSError:
            continue
    return total


def _ppid(pid: int) -> int:
    return int(Path(f"/proc/{pid}/stat").read_text().rsplit(")", 1)[1].split()[1])


def batches(server: servers.Server) -> tuple[float, float]:
    """Texts and batches the server has run so far (its batch-size histogram on /metrics)."""
    page = urllib.request.urlopen(server.url + "/metrics", timeout=10).read().decode()
    found = {"sum": 0.0, "count": 0.0}
    for line in page.splitlines():
        for part in found:
            if line.startswith(f"textsieve_batch_texts_{part}{{"):
                found[part] += float(line.rsplit(" ", 1)[1])
    return found["sum"], found["count"]


def window(server: servers.Server, body_list: list[bytes], seconds: float, wrk: str | None) -> dict[str, float]:
    cpu0, work0, (texts0, batches0) = server.cpu_seconds(), worker_seconds(server), batches(server)
    res = loadgen.run_load(server.url + "/v1/predict", body_list, connections=CONNECTIONS, seconds=seconds, wrk=wrk)
    cpu, work = server.cpu_seconds() - cpu0, worker_seconds(server) - work0
    texts1, batches1 = batches(server)
    if res.errors:
        raise RuntimeError(f"{server.name}: {res.errors} failed requests ({res.raw['errors']}); see {server.log}")
    texts = res.requests * TEXTS_PER_REQUEST
    return {
        "texts_per_s": texts / res.seconds,
        "cpu_s_per_1k": 1000 * cpu / texts,
        "worker_us_per_text": 1e6 * work / texts,
        "rest_us_per_text": 1e6 * (cpu - work) / texts,
        "p99_ms": res.latency_ms["p99"],
        "texts_per_batch": (texts1 - texts0) / max(batches1 - batches0, 1),
    }


def start(name: str, checkout: Path, registry: Path, work: Path) -> servers.Server:
    port = servers.free_port()
    cmd = [str(Path(sys.executable).with_name("textsieve")), "serve", "--registry", str(registry), "--port", str(port)]
    # A shared, busy machine must not make either server shed load (503): the bound is raised for both.
    env = {"PYTHONPATH": str(checkout.resolve()), "TEXTSIEVE_QUEUE_WAIT_MS": "20000"}
    # Run from the checkout itself: the worker processes' fork server is started with `python -c`,
    # which puts the working directory first on its path, ahead of PYTHONPATH (Python 3.11's fork
    # server does not apply the sys_path it is given), so from anywhere else both servers' workers
    # would import the textsieve found there.
    return servers.start(name, cmd, "/readyz", port, work / f"checkout-ab-{name}.log", env=env, cwd=checkout.resolve())


def main() -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--a", type=Path, required=True, help="the base checkout")
    parser.add_argument("--b", type=Path, required=True, help="the changed checkout")
    parser.add_argument("--rounds", type=int, default=8)
    parser.add_argument("--seconds", type=float, default=6.0)
    args = parser.parse_args()
    model = demo_model.ensure_model()
    work = demo_model.CACHE / "work"
    body_list = bodies(bench_texts(4096), TEXTS_PER_REQUEST, SPANS)
    wrk = loadgen.ensure_wrk()
    started = {}
    try:
        for name, checkout in (("a", args.a), ("b", args.b)):
            registry = demo_model.live_registry(model, work / f"checkout-ab-registry-{name}")
            started[name] = start(name, checkout, registry, work)
        for s in started.values():  # warm: the first batches of each shape allocate
            loadgen.run_load(s.url + "/v1/predict", body_list, connections=CONNECTIONS, seconds=2, wrk=wrk)
        rows: dict[str, list[dict[str, float]]] = {"a": [], "b": []}
        for r in range(args.rounds):
            for name in ("a", "b") if r % 2 == 0 else ("b", "a"):
                w = window(started[name], body_list, args.seconds, wrk)
                rows[name].append(w)
                print(
                    f"round {r} {name}: {w['texts_per_s']:8.0f} texts/s  {w['cpu_s_per_1k']:.4f} CPU-s/1k texts  "
                    f"workers {w['worker_us_per_text']:5.1f} µs/text  rest {w['rest_us_per_text']:5.1f}  "
                    f"p99 {w['p99_ms']:.1f} ms  {w['texts_per_batch']:.0f} texts a batch",
                    flush=True,
                )
        print(f"\nload average at the end: {os.getloadavg()}")
        report(rows)
    finally:
        for s in started.values():
            s.stop()
    return 0


def report(rows: dict[str, list[dict[str, Any]]]) -> None:
    keys = ["texts_per_s", "cpu_s_per_1k", "worker_us_per_text", "rest_us_per_text", "p99_ms", "texts_per_batch"]
    for k in keys:
        a = [w[k] for w in rows["a"]]
        b = [w[k] for w in rows["b"]]
        ratios = [y / x for x, y in zip(a, b, strict=True) if x]
        print(
            f"{k:20s} a {statistics.median(a):10.4g}  b {statistics.median(b):10.4g}  "
            f"b/a median {statistics.median(ratios):.3f} (range {min(ratios):.3f}–{max(ratios):.3f})"
        )


if __name__ == "__main__":
    raise SystemExit(main())
