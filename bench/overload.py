"""Overload proof (``make overload``; not in ``make test``): 1,000 connections against one replica.

What runs: the demo's help-desk model (as ``make bench`` builds it) served by a real
``textsieve serve`` with default settings, and wrk keeping ``--connections`` single-text
requests in flight for ``--seconds`` (closed loop, as a crowd of impatient callers would).
Without admission control such a crowd makes every request wait longer and longer; with it a
request is either admitted (and waits at most TEXTSIEVE_QUEUE_WAIT_MS for inference) or
refused at once with 503 and Retry-After.

What it prints and checks (exit status 0 only when all hold):
- no request lost: no connect, read, write or timeout error in wrk's counts;
- none past 2 s: wrk's slowest request (answered or refused) under 2,000 ms;
- the split between answered (200) and refused (503, counted by the server's /metrics) and the
  latency percentiles of all requests together.
"""

from __future__ import annotations

import argparse
import json
import sys
import tempfile
import time
import urllib.error
import urllib.request
from pathlib import Path

HERE = Path(__file__).resolve().parent
sys.path.insert(0, str(HERE))

import demo_model  # noqa: E402  (bench/ is a folder of scripts: its path is added just above)
from loadgen import ensure_wrk, run_load  # noqa: E402
from servers import free_port, start  # noqa: E402
from texts import bench_texts  # noqa: E402

LIMIT_MS = 2000.0


def _refusals(url: str) -> dict[str, float]:
    from prometheus_client.parser import text_string_to_metric_families

    for _ in range(100):  # right after the load the replica may still be draining and refusing
        try:
            with urllib.request.urlopen(url + "/metrics", timeout=10) as reply:
                text = reply.read().decode()
            break
        except urllib.error.HTTPError:
            time.sleep(0.1)
    out: dict[str, float] = {}
    for family in text_string_to_metric_families(text):
        for s in family.samples:
            if s.name == "textsieve_overload_refusals_total":
                out[s.labels["reason"]] = s.value
            if s.name == "textsieve_http_request_seconds_bucket" and s.labels.get("route") == "/v1/predict":
                out[f"in_app_le_{s.labels['le']}"] = s.value
            if s.name == "textsieve_http_requests_total" and s.labels.get("route") == "/v1/predict":
                out[f"status_{s.labels['status']}"] = out.get(f"status_{s.labels['status']}", 0) + s.value
    return out


def main() -> int:
    p = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    p.add_argument("--connections", type=int, default=1000, help="connections kept busy (default 1000)")
    p.add_argument("--seconds", type=float, default=15.0, help="how long the load runs (default 15)")
    p.add_argument("--workers", type=int, default=None, help="inference workers (default: one per core)")
    args = p.parse_args()
    model = demo_model.ensure_model()
    wrk = ensure_wrk()
    if wrk is None:
        print("overload: wrk is needed (apt-get install wrk)", file=sys.stderr)
        return 2
    with tempfile.TemporaryDirectory(prefix="textsieve-overload-") as tmp:
        registry = demo_model.live_registry(model, Path(tmp) / "registry")
        port = free_port()
        cmd = [sys.executable, "-m", "textsieve.cli", "serve", "--registry", str(registry), "--port", str(port)]
        if args.workers:
            cmd += ["--workers", str(args.workers)]
        env = {"TEXTSIEVE_ACCESS_LOG": "false"}
        server = start("textsieve", cmd, "/readyz", port, Path(tmp) / "server.log", env=env)
        try:
            bodies = [json.dumps({"texts": [t]}).encode() for t in bench_texts(2000, seed=11)]
            print(f"overload: {args.connections} connections, single-text requests, {args.seconds:g} s (wrk) …")
            started = time.perf_counter()
            result = run_load(server.url, bodies, connections=args.connections, seconds=args.seconds, wrk=wrk)
            took = time.perf_counter() - started
            counts = _refusals(server.url)
        finally:
            server.stop()
    raw_errors: dict[str, int] = dict(result.raw["errors"])  # type: ignore[arg-type]
    lost = sum(v for k, v in raw_errors.items() if k != "status")
    # Refusals from the protocol never reach the app's request counts: take them by reason.
    answered = counts.get("status_200", 0)
    refused = sum(v for k, v in counts.items() if not k.startswith(("status_", "in_app_")))
    lat = result.latency_ms
    print(f"  requests      {result.requests:,} in {took:.1f} s ({result.requests_per_second:,.0f}/s)")
    print(f"  answered 200  {answered:,.0f}")
    reasons = {k: v for k, v in counts.items() if not k.startswith(("status_", "in_app_"))}
    print(f"  refused 503   {refused:,.0f}  (by reason: {json.dumps(reasons)})")
    in_app = {k.removeprefix("in_app_le_"): v for k, v in counts.items() if k.startswith("in_app_le_")}
    print(f"  in the app    {json.dumps(in_app)} (requests within each bound, seconds, server-side)")
    print(f"  lost          {lost}  ({json.dumps(raw_errors)})")
    print(f"  latency ms    p50 {lat['p50']:.1f}  p90 {lat['p90']:.1f}  p99 {lat['p99']:.1f}  max {lat['max']:.1f}")
    ok = lost == 0 and lat["max"] < LIMIT_MS and answered > 0
    print(f"overload: {'PASS' if ok else 'FAIL'} (none lost, none past {LIMIT_MS:.0f} ms)")
    return 0 if ok else 1


if __name__ == "__main__":
    raise SystemExit(main())
