"""``make bench``: serving speed side by side with the graph alone, the raw runtime, an HTTP floor
and a hand-written PyTorch wrapper, on this machine, in one run; then open-loop tail latency and
the service's memory (PSS).

Writes bench/results.json and bench/throughput_latency.png and prints a table. Every figure
comes from this run; nothing is carried over. bench/README.md says what each line means.

Noise. The 2 cores may be shared with other work. When allowed (root), the script raises its
own scheduling priority (nice −10), which the servers and wrk it starts inherit, so the
measured processes get most of the CPU even then; every configuration is measured in several
short windows, the rounds interleaved (runtime, service, wrapper, runtime, …) so that a busy
spell hits all of them alike. The table shows each configuration's median window; each ratio
is computed within a round and the median over rounds is reported. How busy the rest of the
machine was is recorded beside the figures, and the CPU seconds per 1,000 texts (which other
work disturbs far less) are reported too.

    .venv/bin/python bench/run.py [--seconds 6] [--rounds 3] [--open-loop-seconds 10] [--texts 4096] [--quick]
"""

from __future__ import annotations

import argparse
import datetime as dt
import json
import os
import platform
import shutil
import signal
import subprocess
import sys
import time
from pathlib import Path
from typing import Any

HERE = Path(__file__).resolve().parent
sys.path.insert(0, str(HERE))

import demo_model  # noqa: E402
import flops  # noqa: E402
import inprocess  # noqa: E402
import loadgen  # noqa: E402
import report as report_bench  # noqa: E402
import servers  # noqa: E402
from texts import bench_texts  # noqa: E402

RESULTS = HERE / "results.json"
SCORE_VS_RUNTIME = 0.8  # issue 14: textsieve score end to end against the in-process runtime
AUTOGROUP = Path("/proc/self/autogroup")
CHART = HERE / "throughput_latency.png"
VARIANTS = (
    "sorted",
    "sorted_offsets",
    "fixed",
    "graph",
    "graph_fixed",
    "conv_graph",
    "conv_graph_fixed",
    "worker",
    "worker_no_spans",
)
CONNECTIONS = 32
TEXTS_PER_REQUEST = 16
SPANS = 3
OPEN_LOOP_SHARES = (0.5, 0.8)  # of the closed-loop single-text rate measured in the same run
OPEN_LOOP_CONNECTIONS = 64
TARGETS = {  # key -> (comparison, bound, the issue that set it)
    "runtime_vs_graph": (">=", 0.5, 15),
    "service_vs_runtime": (">=", 0.85, 15),
    "single_text_vs_http_floor": (">=", 0.5, 15),
    "open_loop_p99_ms_at_50pct": ("<=", 20.0, 15),
    "service_pss_mb": ("<=", 250.0, 15),
    "overload_guards_throughput_ratio": (">=", 0.97, 16),
    "service_vs_torch_wrapper": (">=", 5.0, 5),
    "spans_overhead": ("<=", 1.15, 5),
}
# Figures kept for comparison with earlier runs, no longer targets (bench/README.md says why):
# the FLOP limit counts a convolution the tap-tables graph never performs, and bucketing is
# bounded by the text mix; the runtime's older layout (threads in one process) loses to the GIL;
# the runtime with every token's offsets is what it measured before they became lazy.
HISTORY = (
    "runtime_vs_flop_limit",
    "runtime_with_offsets_vs_graph",
    "runtime_threads_vs_graph",
    "graph_vs_flop_limit",
    "conv_graph_vs_flop_limit",
    "bucketing_speedup",
    "bucketing_speedup_end_to_end",
    "bucketing_speedup_per_cpu",
    "bucketing_speedup_conv_layout",
    "tap_tables_vs_conv_graph",
)


def say(msg: str) -> None:
    print(msg, file=sys.stderr, flush=True)


# -- the machine and the code measured ------------------------------------------------------
def machine() -> dict[str, Any]:
    model = platform.processor() or "unknown"
    try:
        for line in subprocess.run(["lscpu"], capture_output=True, text=True, check=True).stdout.splitlines():
            if line.startswith("Model name:"):
                model = line.split(":", 1)[1].strip()
                break
    except (OSError, subprocess.CalledProcessError):
        pass
    return {
        "cpu": model,
        "cores": len(os.sched_getaffinity(0)),
        "python": platform.python_version(),
        "kernel": platform.release(),
    }


def code_version() -> dict[str, Any]:
    """The commit measured, and whether the serving code had uncommitted changes."""

    def git(*args: str) -> str:
        try:
            return subprocess.run(
                ["git", *args], cwd=HERE.parent, capture_output=True, text=True, check=True
            ).stdout.strip()
        except (OSError, subprocess.CalledProcessError):
            return ""

    dirty = git("status", "--porcelain", "--", "service", "registry", "textsieve")
    return {"commit": git("rev-parse", "--short", "HEAD") or None, "serving_code_uncommitted_changes": bool(dirty)}


def raise_priority(nice: int) -> dict[str, Any]:
    """Give this run (and the threads and processes it starts later) scheduling priority ``nice``.

    With the kernel's session autogroups on, a process's nice value only counts within its own
    session; sessions compete by their autogroup's nice. So both are set, and the servers stay in
    this session (see servers.start).
    """
    got: dict[str, Any] = {"requested": nice}
    if nice == 0:
        return got | {"process": os.getpriority(os.PRIO_PROCESS, 0)}
    try:
        os.setpriority(os.PRIO_PROCESS, 0, nice)
    except OSError:
        say(f"could not set scheduling priority {nice} (needs root); measuring at normal priority")
    got["process"] = os.getpriority(os.PRIO_PROCESS, 0)
    try:
        if AUTOGROUP.exists():
            got["autogroup_before"] = AUTOGROUP.read_text().split()[-1]
            AUTOGROUP.write_text(str(nice))
            got["autogroup"] = AUTOGROUP.read_text().split()[-1]
    except OSError:
        got["autogroup"] = "unchanged (not allowed)"
    return got


def restore_priority(got: dict[str, Any]) -> None:
    """The autogroup outlives this process (the caller's shell shares it): put its nice value back."""
    if "autogroup_before" in got:
        try:
            AUTOGROUP.write_text(got["autogroup_before"])
        except OSError:
            pass


def _busy_jiffies() -> int:
    parts = Path("/proc/stat").read_text().splitlines()[0].split()[1:]
    user, nice, system, _idle, _iowait, irq, softirq, steal = (int(x) for x in parts[:8])
    return user + nice + system + irq + softirq + steal


# -- requests and one HTTP window -----------------------------------------------------------
def bodies(texts: list[str], per_request: int, spans: int) -> list[bytes]:
    return [
        json.dumps({"texts": texts[i : i + per_request], "spans": spans}, ensure_ascii=False).encode()
        for i in range(0, len(texts) - per_request + 1, per_request)
    ]


def measure_http(
    server: servers.Server, body_list: list[bytes], per_request: int, *, seconds: float, wrk: str | None
) -> dict[str, Any]:
    """One load window: texts/s, latency, the server's own CPU per 1,000 texts."""
    cpu0, busy0 = server.cpu_seconds(), _busy_jiffies()
    res = loadgen.run_load(server.url + "/v1/predict", body_list, connections=CONNECTIONS, seconds=seconds, wrk=wrk)
    cpu1, busy1 = server.cpu_seconds(), _busy_jiffies()
    if res.errors:
        raise RuntimeError(f"{server.name}: {res.errors} failed requests ({res.raw['errors']}); see {server.log}")
    texts = res.requests * per_request
    server_cpu = cpu1 - cpu0
    all_cpu = (busy1 - busy0) / os.sysconf("SC_CLK_TCK")
    return {
        "texts_per_s": texts / res.seconds,
        "requests_per_s": res.requests_per_second,
        "requests": res.requests,
        "seconds": res.seconds,
        "latency_ms": res.latency_ms,
        "server_cpu_s_per_1k_texts": 1000 * server_cpu / texts if texts else float("nan"),
        "server_cores_busy": server_cpu / res.seconds,
        "loadgen_cpu_s_per_1k_texts": 1000 * res.client_cpu_seconds / texts if texts else float("nan"),
        # Everything else on the machine (other jobs, this script): the noise indicator.
        "other_cores_busy": max(0.0, all_cpu - server_cpu - res.client_cpu_seconds) / res.seconds,
        "loadgen": res.tool,
    }


def typical(windows: list[dict[str, Any]]) -> dict[str, Any]:
    """The median window by throughput, with every window's rate kept alongside."""
    ranked = sorted(windows, key=lambda w: w["texts_per_s"])
    mid = dict(ranked[len(ranked) // 2])
    mid["all_texts_per_s"] = [round(w["texts_per_s"], 1) for w in windows]
    return mid


# --quick: 2. A pair's ratio spreads ±0.05 around its median on this machine (2026-12-05 07:08–07:18,
# 40 pairs of fresh servers: 0.87–1.08), so the median of 8 moved by about ±0.02 from run to run,
# as wide as the bound's margin; 12 pairs narrow that at 32 s more per run (bench/README.md).
GUARD_PAIRS = 12
GUARD_SECONDS = 4.0


def median(values: list[float]) -> float:
    ranked = sorted(values)
    n = len(ranked)
    return ranked[n // 2] if n % 2 else (ranked[n // 2 - 1] + ranked[n // 2]) / 2


# -- the servers ----------------------------------------------------------------------------
def start_service(model: demo_model.DemoModel, work: Path) -> servers.Server:
    registry = demo_model.live_registry(model, work / "registry")
    port = servers.free_port()
    textsieve = str(Path(sys.executable).with_name("textsieve"))
    cmd = [textsieve, "serve", "--registry", str(registry), "--host", "127.0.0.1", "--port", str(port)]
    return servers.start("service", cmd, "/readyz", port, work / "service.log")


def start_torch_wrapper(model: demo_model.DemoModel, work: Path, temperature: float) -> servers.Server:
    port = servers.free_port()
    cmd = [
        sys.executable,
        str(HERE / "torch_wrapper.py"),
        "--run",
        str(model.run),
        "--port",
        str(port),
        "--temperature",
        repr(temperature),
    ]
    return servers.start("torch_wrapper", cmd, "/healthz", port, work / "torch_wrapper.log")


def start_unguarded(model: demo_model.DemoModel, work: Path) -> servers.Server:
    """The same service minus its overload layer (bench/unguarded_server.py): what the guards cost."""
    registry = demo_model.live_registry(model, work / "registry-unguarded")
    port = servers.free_port()
    cmd = [sys.executable, str(HERE / "unguarded_server.py"), "--registry", str(registry), "--port", str(port)]
    return servers.start("unguarded", cmd, "/readyz", port, work / "unguarded.log")


def start_http_floor(work: Path, reply_bytes: int) -> servers.Server:
    port = servers.free_port()
    cmd = [sys.executable, str(HERE / "http_floor.py"), "--port", str(port), "--reply-bytes", str(reply_bytes)]
    return servers.start("http_floor", cmd, "/readyz", port, work / "http_floor.log")


def mean_reply_bytes(server: servers.Server, body_list: list[bytes], n: int = 64) -> int:
    """The mean size of ``server``'s replies to the first ``n`` bodies: the floor answers this many bytes."""
    sizes = [len(servers.post_json(server.url + "/v1/predict", body)) for body in body_list[:n]]
    return round(sum(sizes) / len(sizes))


def check_and_warm(server: servers.Server, body_list: list[bytes], wrk: str | None, per_request: int) -> None:
    reply = json.loads(servers.post_json(server.url + "/v1/predict", body_list[0]))
    if len(reply.get("results", [])) != per_request:
        raise RuntimeError(f"{server.name} answered {str(reply)[:300]}; expected {per_request} results")
    loadgen.run_load(server.url + "/v1/predict", body_list, connections=CONNECTIONS, seconds=2, wrk=wrk)


def guard_pairs(
    service: servers.Server, unguarded: servers.Server, body_list: list[bytes], wrk: str | None, pairs_wanted: int
) -> dict[str, Any]:
    """What the overload layer (connection guard, body budget, request limit, admission) costs at
    normal load: the service beside the same app without it, in pairs of back-to-back windows
    whose order alternates (a window's speed depends on what ran just before it: with a fixed
    order the first server lost 6 % in every round on 2026-12-02), the median of the pair ratios."""
    pairs: list[dict[str, float]] = []
    for i in range(pairs_wanted):
        order = [("service", service), ("unguarded", unguarded)]
        pair = {
            name: measure_http(server, body_list, TEXTS_PER_REQUEST, seconds=GUARD_SECONDS, wrk=wrk)["texts_per_s"]
            for name, server in (order if i % 2 == 0 else order[::-1])
        }
        pairs.append(
            {k: round(v, 1) for k, v in pair.items()} | {"ratio": round(pair["service"] / pair["unguarded"], 4)}
        )
    return {
        "ratio": median([p["ratio"] for p in pairs]),
        "pairs": pairs,
        "window_seconds": GUARD_SECONDS,
        "note": "service (textsieve serve) ÷ bench/unguarded_server.py, 16 texts a request, 32 connections",
    }


def open_loop(
    server: servers.Server, body_list: list[bytes], max_rate: float, seconds: float, windows: int = 1
) -> dict[str, Any]:
    """Open-loop windows at each share of ``max_rate``: p50/p99/p99.9 from each request's intended send
    time. With several ``windows`` a share reports the window with the median p99 (as every other
    figure is a median of rounds) and lists every window's percentiles beside it: one pause of the
    machine of 50 ms moves a single 10 s window's p99 by several times (2026-12-04: 26.9 ms in one
    `make bench`, 7.4-10.5 ms in four windows straight after)."""
    out: dict[str, Any] = {"max_single_text_rate": round(max_rate, 1), "connections": OPEN_LOOP_CONNECTIONS}
    for share in OPEN_LOOP_SHARES:
        runs = []
        for w in range(windows):
            say(f"open loop: {share:.0%} of {max_rate:.0f} requests/s for {seconds:g} s ({w + 1}/{windows}) …")
            cpu0 = server.cpu_seconds()
            res = loadgen.run_open_loop(
                server.url + "/v1/predict",
                body_list,
                rate=share * max_rate,
                seconds=seconds,
                connections=OPEN_LOOP_CONNECTIONS,
            )
            res["server_cores_busy"] = round((server.cpu_seconds() - cpu0) / float(res["duration_s"]), 3)
            runs.append(res)
        median = sorted(runs, key=lambda r: r["latency_ms"]["p99"])[len(runs) // 2]
        median["windows"] = [
            {k: r["latency_ms"][k] for k in ("p50", "p99", "p99.9", "max")} for r in runs
        ]  # in the order they ran
        out[f"at_{round(share * 100)}pct"] = median
    return out


# -- the figures ----------------------------------------------------------------------------
def bench_flops(model: demo_model.DemoModel, lengths: list[int], min_length: int) -> dict[str, Any]:
    arch = json.loads((model.bundle / "manifest.json").read_text())["architecture"]
    per_text = flops.mean_conv_flops(
        lengths, dim=arch["embedding_dim"], maps=arch["maps"], widths=arch["widths"], min_length=min_length
    )
    say("flop_limit: 2-thread float32 matmul rate (NumPy/OpenBLAS and torch, the faster) …")
    rate = flops.matmul_rate(threads=2)
    gflops = float(rate["gflops"])  # type: ignore[arg-type]
    return {
        "mflop_per_text": per_text / 1e6,
        "matmul_gflops_2_threads": gflops,
        "matmul": rate,
        "texts_per_s": gflops * 1e9 / per_text,
    }


def summarize(
    rt: dict[str, Any],
    fl: dict[str, Any],
    sv: dict[str, Any],
    tw: dict[str, Any],
    floor: dict[str, Any],
) -> dict[str, float]:
    runtime = rt["sorted"]["texts_per_s"]
    return {
        # The model's own limit is the graph alone; the runtime adds tokenizing, padding and results.
        "runtime_vs_graph": runtime / rt["graph"]["texts_per_s"],
        "service_vs_runtime": sv["batched"]["texts_per_s"] / runtime,
        # What service_vs_runtime could be at most with this worker code: its batches (3 spans, reply
        # dicts, drift counts, pickling) in one process per core, with HTTP, the event loop and the
        # pipe costing nothing (bench/inprocess.py, ``worker``). Not a target: it shows how much of
        # the gap any server stack could close.
        "service_vs_runtime_ceiling": rt["worker"]["texts_per_s"] / runtime,
        "service_vs_runtime_ceiling_no_spans": rt["worker_no_spans"]["texts_per_s"] / runtime,
        "spans_overhead_in_worker": rt["worker_no_spans"]["texts_per_s"] / rt["worker"]["texts_per_s"],
        "single_text_vs_http_floor": sv["single"]["texts_per_s"] / floor["single"]["texts_per_s"],
        "single_text_vs_http_floor_per_cpu": (
            floor["single"]["server_cpu_s_per_1k_texts"] / sv["single"]["server_cpu_s_per_1k_texts"]
        ),
        "service_vs_torch_wrapper": sv["batched"]["texts_per_s"] / tw["batched"]["texts_per_s"],
        "spans_overhead": sv["batched_no_spans"]["texts_per_s"] / sv["batched"]["texts_per_s"],
        # Padding only changes the graph's work, so the graph-only pair measures it; the end-to-end
        # pair (tokenizing included, the same work either way) is reported beside it.
        "bucketing_speedup": rt["graph"]["texts_per_s"] / rt["graph_fixed"]["texts_per_s"],
        "bucketing_speedup_end_to_end": rt["sorted"]["texts_per_s"] / rt["fixed"]["texts_per_s"],
        "bucketing_speedup_per_cpu": rt["graph_fixed"]["cpu_s_per_1k_texts"] / rt["graph"]["cpu_s_per_1k_texts"],
        "runtime_vs_flop_limit": runtime / fl["texts_per_s"],
        # The runtime encoding every token's character offsets too, as it did before 2026-12-04 (only
        # spans read them; bench/README.md, "Encoding without offsets").
        "runtime_with_offsets_vs_graph": rt["sorted_offsets"]["texts_per_s"] / rt["graph"]["texts_per_s"],
        # One process, a thread per session: the layout the runtime had before (bench/inprocess.py).
        "runtime_threads_vs_graph": rt["sorted_threads"]["texts_per_s"] / rt["graph"]["texts_per_s"],
        "graph_vs_flop_limit": rt["graph"]["texts_per_s"] / fl["texts_per_s"],
        # The convolution layout (same run, Conv over embeddings): the graph the FLOP limit describes.
        "conv_graph_vs_flop_limit": rt["conv_graph"]["texts_per_s"] / fl["texts_per_s"],
        "bucketing_speedup_conv_layout": rt["conv_graph"]["texts_per_s"] / rt["conv_graph_fixed"]["texts_per_s"],
        "tap_tables_vs_conv_graph": rt["graph"]["texts_per_s"] / rt["conv_graph"]["texts_per_s"],
        "p99_ms_single_text_32_clients": sv["single"]["latency_ms"]["p99"],
        "service_vs_torch_wrapper_single": sv["single"]["texts_per_s"] / tw["single"]["texts_per_s"],
        # CPU-normalised: texts per CPU-second, less sensitive to other work on the machine.
        "service_vs_runtime_per_cpu": rt["sorted"]["cpu_s_per_1k_texts"] / sv["batched"]["server_cpu_s_per_1k_texts"],
        "service_vs_torch_wrapper_per_cpu": (
            tw["batched"]["server_cpu_s_per_1k_texts"] / sv["batched"]["server_cpu_s_per_1k_texts"]
        ),
    }


def table(rt: dict[str, Any], fl: dict[str, Any], sv: dict[str, Any], tw: dict[str, Any], floor: dict[str, Any]) -> str:
    ml = rt["max_length"]
    rows: list[tuple[str, str, float, dict[str, float] | None, float | None]] = [
        ("flop_limit (history)", "conv FLOPs ÷ 2-thread matmul rate", fl["texts_per_s"], None, None),
        (
            "runtime",
            "process per core, sorted batches, tokenizing incl.",
            rt["sorted"]["texts_per_s"],
            None,
            rt["sorted"]["cpu_s_per_1k_texts"],
        ),
        (
            "runtime (history)",
            "same, each token's character offsets too",
            rt["sorted_offsets"]["texts_per_s"],
            None,
            rt["sorted_offsets"]["cpu_s_per_1k_texts"],
        ),
        (
            "runtime (history)",
            "same, one process, a thread per session",
            rt["sorted_threads"]["texts_per_s"],
            None,
            rt["sorted_threads"]["cpu_s_per_1k_texts"],
        ),
        (
            "runtime",
            f"same, arrival order padded to {ml}",
            rt["fixed"]["texts_per_s"],
            None,
            rt["fixed"]["cpu_s_per_1k_texts"],
        ),
        (
            "runtime graph only",
            "session.run, sorted batches",
            rt["graph"]["texts_per_s"],
            None,
            rt["graph"]["cpu_s_per_1k_texts"],
        ),
        (
            "runtime graph only",
            f"session.run, padded to {ml}",
            rt["graph_fixed"]["texts_per_s"],
            None,
            rt["graph_fixed"]["cpu_s_per_1k_texts"],
        ),
        (
            "conv layout graph",
            "session.run, sorted batches",
            rt["conv_graph"]["texts_per_s"],
            None,
            rt["conv_graph"]["cpu_s_per_1k_texts"],
        ),
        (
            "conv layout graph",
            f"session.run, padded to {ml}",
            rt["conv_graph_fixed"]["texts_per_s"],
            None,
            rt["conv_graph_fixed"]["cpu_s_per_1k_texts"],
        ),
        (
            "service worker",
            f"its batches of {inprocess.WORKER_BATCH}, spans {SPANS}, no HTTP",
            rt["worker"]["texts_per_s"],
            None,
            rt["worker"]["cpu_s_per_1k_texts"],
        ),
        (
            "service worker",
            f"its batches of {inprocess.WORKER_BATCH}, spans 0, no HTTP",
            rt["worker_no_spans"]["texts_per_s"],
            None,
            rt["worker_no_spans"]["cpu_s_per_1k_texts"],
        ),
    ]
    for who, res in (("service", sv), ("http_floor", floor), ("torch_wrapper", tw)):
        for load, label in (
            ("batched", f"{CONNECTIONS} clients × {TEXTS_PER_REQUEST} texts, spans {SPANS}"),
            ("batched_no_spans", f"{CONNECTIONS} clients × {TEXTS_PER_REQUEST} texts, spans 0"),
            ("single", f"{CONNECTIONS} clients × 1 text, spans {SPANS}"),
        ):
            if load in res:
                w = res[load]
                rows.append((who, label, w["texts_per_s"], w["latency_ms"], w["server_cpu_s_per_1k_texts"]))
    lines = [f"{'':<20}{'load':<46}{'texts/s':>9}{'p50 ms':>9}{'p95 ms':>9}{'p99 ms':>9}{'CPU s/1k':>10}"]
    for who, label, rate, lat, cpu in rows:
        lat_s = "".join(f"{lat[k]:>9.1f}" for k in ("p50", "p95", "p99")) if lat else " " * 27
        cpu_s = f"{cpu:>10.3f}" if cpu is not None else ""
        lines.append(f"{who:<20}{label:<46}{rate:>9.0f}{lat_s}{cpu_s}")
    return "\n".join(lines)


def open_loop_table(ol: dict[str, Any]) -> str:
    lines = [
        f"open loop, {ol['connections']} connections at most, "
        f"shares of {ol['max_single_text_rate']:.0f} single-text requests/s (closed-loop maximum, this run)",
        f"{'':<8}{'req/s':>8}{'answered':>10}{'errors':>8}{'p50 ms':>9}{'p99 ms':>9}{'p99.9 ms':>10}"
        f"{'max ms':>9}{'send lag p99':>14}{'server cores':>14}",
    ]
    for key, res in ol.items():
        if not key.startswith("at_"):
            continue
        lat = res["latency_ms"]
        lines.append(
            f"{key[3:]:<8}{res['rate']:>8.0f}{res['answered']:>10}{sum(res['errors'].values()):>8}"
            f"{lat['p50']:>9.1f}{lat['p99']:>9.1f}{lat['p99.9']:>10.1f}{lat['max']:>9.1f}"
            f"{res['send_lag_ms']['p99']:>14.1f}{res['server_cores_busy']:>14.2f}"
        )
        if len(res.get("windows", [])) > 1:
            lines.append(f"{'':<8}p99 of each window: " + ", ".join(f"{w['p99']:.1f}" for w in res["windows"]) + " ms")
    return "\n".join(lines)


def memory_lines(mem: dict[str, Any]) -> str:
    lines = [
        f"service memory: PSS {mem['pss_mb']:.0f} MB summed over {len(mem['processes'])} processes "
        f"(summed RSS {mem['rss_mb']:.0f} MB)"
    ]
    for p in mem["processes"]:
        lines.append(
            f"  pid {p['pid']:<8} PSS {p['pss_mb']:>6.1f} MB "
            f"(anon {p['pss_anon_mb']:>6.1f}, file {p['pss_file_mb']:>5.1f})  "
            f"RSS {p['rss_mb']:>6.1f} MB  {p['command'][:60]}"
        )
    lines.append("  PSS by mapping: " + ", ".join(f"{k} {v:.1f}" for k, v in mem["mappings_pss_mb"].items()))
    return "\n".join(lines)


def write_json(path: Path, data: dict[str, Any]) -> None:
    tmp = path.with_name(path.name + ".tmp")  # gitignored
    try:
        with open(tmp, "w") as fh:
            json.dump(data, fh, indent=2)
            fh.write("\n")
            fh.flush()
            os.fsync(fh.fileno())
        os.replace(tmp, path)
    except BaseException:
        tmp.unlink(missing_ok=True)
        raise


# -- the run --------------------------------------------------------------------------------
def main(argv: list[str] | None = None) -> int:
    args = parse_args(argv)
    # A SIGTERM (a CI timeout, say) unwinds through the finally blocks, which stop the servers.
    signal.signal(signal.SIGTERM, lambda *_: sys.exit(143))
    priority = raise_priority(args.nice)
    try:
        return measure(args, priority)
    finally:
        restore_priority(priority)


def parse_args(argv: list[str] | None) -> argparse.Namespace:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--seconds", type=float, default=6.0, help="length of each HTTP load window")
    parser.add_argument("--inprocess-seconds", type=float, default=1.5, help="length of each in-process window")
    parser.add_argument("--rounds", type=int, default=3, help="interleaved rounds (odd: the median is one of them)")
    parser.add_argument(
        "--open-loop-seconds",
        type=float,
        default=10.0,
        help="length of each open-loop window (--rounds windows per share, the median p99 reported)",
    )
    parser.add_argument("--texts", type=int, default=4096)
    parser.add_argument("--quick", action="store_true", help="short windows, one round: for trying the script")
    parser.add_argument(
        "--no-scoring", action="store_true", help="skip textsieve score's figures (bench/score.py, a few minutes)"
    )
    parser.add_argument(
        "--nice",
        type=int,
        default=-10,
        help="scheduling priority for this run and the processes it starts, when allowed "
        "(default -10; 0 leaves it alone)",
    )
    args = parser.parse_args(argv)
    if args.quick:
        args.seconds, args.inprocess_seconds, args.rounds, args.open_loop_seconds = 3.0, 1.0, 1, 4.0
    return args


def measure(args: argparse.Namespace, priority: dict[str, Any]) -> int:
    started = time.perf_counter()
    load_before = os.getloadavg()
    work = demo_model.CACHE / "work"
    shutil.rmtree(work, ignore_errors=True)
    work.mkdir(parents=True)

    say("setting up …")
    model = demo_model.ensure_model(say)
    manifest = json.loads((model.bundle / "manifest.json").read_text())
    texts = bench_texts(args.texts)
    wrk = loadgen.ensure_wrk(say)
    batched = {k: bodies(texts, TEXTS_PER_REQUEST, k) for k in (SPANS, 0)}
    single = bodies(texts, 1, SPANS)
    runtime = inprocess.Processes(model.bundle, texts, conv_bundle=model.conv_bundle)
    # The older layout, threads in one process, for history (bench/inprocess.py says why).
    threads = inprocess.InProcess(model.bundle, texts, only_sorted=True)
    p = threads.predictors[0]
    token_counts = [len(p.tokenizer.split(t)[0]) for t in texts]
    lengths = [min(n, p.max_length) for n in token_counts]
    fl = bench_flops(model, lengths, p.min_length)

    service = torch_wrapper = floor_server = unguarded = None
    try:
        service = start_service(model, work)
        unguarded = start_unguarded(model, work)
        torch_wrapper = start_torch_wrapper(model, work, manifest["calibration"]["temperature"])
        reply_bytes = mean_reply_bytes(service, single)
        floor_server = start_http_floor(work, reply_bytes)
        check_and_warm(service, batched[SPANS], wrk, TEXTS_PER_REQUEST)
        check_and_warm(torch_wrapper, batched[SPANS], wrk, TEXTS_PER_REQUEST)
        check_and_warm(unguarded, batched[SPANS], wrk, TEXTS_PER_REQUEST)
        loadgen.run_load(floor_server.url + "/v1/predict", single, connections=CONNECTIONS, seconds=2, wrk=wrk)
        http_loads = {
            ("service", "batched"): (service, batched[SPANS], TEXTS_PER_REQUEST),
            ("service", "batched_no_spans"): (service, batched[0], TEXTS_PER_REQUEST),
            ("service", "single"): (service, single, 1),
            ("http_floor", "single"): (floor_server, single, 1),
            ("torch_wrapper", "batched"): (torch_wrapper, batched[SPANS], TEXTS_PER_REQUEST),
            ("torch_wrapper", "single"): (torch_wrapper, single, 1),
        }
        rt_windows: dict[str, list[dict[str, Any]]] = {v: [] for v in (*VARIANTS, "sorted_threads")}
        http_windows: dict[tuple[str, str], list[dict[str, Any]]] = {k: [] for k in http_loads}
        for r in range(args.rounds):
            say(
                f"round {r + 1}/{args.rounds}: runtime ({2 * len(VARIANTS)} × {args.inprocess_seconds:g} s), "
                f"HTTP ({len(http_loads)} × {args.seconds:g} s) …"
            )
            for _ in range(2):  # in-process windows are short: two of each per round
                for v in VARIANTS:
                    rt_windows[v].append(runtime.window(v, args.inprocess_seconds))
                rt_windows["sorted_threads"].append(threads.window("sorted", args.inprocess_seconds))
            # Odd rounds run the loads in reverse: no server is always measured first.
            for key, (server, body_list, per_request) in list(http_loads.items())[:: -1 if r % 2 else 1]:
                http_windows[key].append(measure_http(server, body_list, per_request, seconds=args.seconds, wrk=wrk))
        guard_pair_count = 2 if args.quick else GUARD_PAIRS
        say(f"overload guards: {guard_pair_count} pairs of {GUARD_SECONDS:g} s windows, service and unguarded …")
        guards = guard_pairs(service, unguarded, batched[SPANS], wrk, guard_pair_count)
        sv, floor, tw = (
            {load: typical(w) for (who, load), w in http_windows.items() if who == name}
            for name in ("service", "http_floor", "torch_wrapper")
        )
        floor["reply_bytes"] = reply_bytes
        # Open loop after the closed-loop rounds, at shares of the single-text rate they measured.
        max_rate = median([w["requests_per_s"] for w in http_windows[("service", "single")]])
        sv["open_loop"] = open_loop(service, single, max_rate, args.open_loop_seconds, windows=args.rounds)
        # Memory after every load has run through the service: what a replica holds in steady state.
        sv["memory"] = service.memory()
        for res, server in ((sv, service), (floor, floor_server), (tw, torch_wrapper)):
            res["peak_rss_mb"] = server.peak_rss_mb()
            res["threads"] = server.threads()
    finally:
        for started_server in (service, floor_server, torch_wrapper, unguarded):
            if started_server is not None:
                started_server.stop()
        runtime.close()

    say("evaluation report on 10,000 texts (issue 12) …")
    report_timing = report_bench.bench_report(model.bundle, 10_000)
    say(f"  report {report_timing['report_s']} s, against another version {report_timing['report_against_s']} s")

    # A round's in-process figure is the better of its two back-to-back windows.
    rt_rounds = {
        v: [max(w[2 * r : 2 * r + 2], key=lambda x: x["texts_per_s"]) for r in range(args.rounds)]
        for v, w in rt_windows.items()
    }
    rt: dict[str, Any] = {v: typical(w) for v, w in rt_rounds.items()}
    rt.update(max_length=p.max_length, min_length=p.min_length)
    # Each ratio is taken within a round (both sides measured within a minute of each other),
    # then the median over rounds: one lucky or unlucky window cannot swing it.
    per_round = [
        summarize(
            {v: rt_rounds[v][r] for v in rt_rounds},
            fl,
            *(
                {load: w[r] for (who, load), w in http_windows.items() if who == name}
                for name in ("service", "torch_wrapper", "http_floor")
            ),
        )
        for r in range(args.rounds)
    ]
    figures = {k: median([f[k] for f in per_round]) for k in per_round[0]}
    figures["overload_guards_throughput_ratio"] = guards["ratio"]
    # Measured once, after the rounds: no per-round ratio to take.
    figures["open_loop_p99_ms_at_50pct"] = sv["open_loop"]["at_50pct"]["latency_ms"]["p99"]
    figures["open_loop_p99_ms_at_80pct"] = sv["open_loop"]["at_80pct"]["latency_ms"]["p99"]
    figures["service_pss_mb"] = sv["memory"]["pss_mb"]
    figures["service_rss_sum_mb"] = sv["memory"]["rss_mb"]
    every = [w for windows in http_windows.values() for w in windows]
    results: dict[str, Any] = {
        **{k: round(v, 4) for k, v in figures.items() if k not in HISTORY},
        "per_round": [{k: round(v, 4) for k, v in f.items()} for f in per_round],
        "targets": {
            k: {
                "bound": f"{op} {bound}",
                "issue": issue,
                "met": bool(figures[k] >= bound if op == ">=" else figures[k] <= bound),
            }
            for k, (op, bound, issue) in TARGETS.items()
        },
        "history": {
            "note": "no longer targets (bench/README.md): the FLOP limit counts a convolution the tap-tables "
            "graph does not perform; bucketing is bounded by the text mix",
            **{k: round(figures[k], 4) for k in HISTORY},
            "flop_limit": fl,
        },
        "measured_at": dt.datetime.now(dt.UTC).replace(microsecond=0).isoformat(),
        "machine": machine(),
        "code": code_version(),
        "service_env": {k: v for k, v in os.environ.items() if k.startswith("TEXTSIEVE_")},
        "priority": priority,
        "load_average_before": [round(x, 2) for x in load_before],
        "load_average_after": [round(x, 2) for x in os.getloadavg()],
        "background_cores_busy": round(sum(w["other_cores_busy"] for w in every) / len(every), 3),
        "model": {
            "source": model.source,
            "widths": manifest["architecture"]["widths"],
            "maps": manifest["architecture"]["maps"],
            "embedding_dim": manifest["architecture"]["embedding_dim"],
            "labels": len(manifest["labels"]),
            "max_length": p.max_length,
            "min_length": p.min_length,
        },
        "texts": {
            "count": len(texts),
            "tokens": "5-60, equal counts per 5-token band",
            "mean_tokens_after_truncation": round(sum(lengths) / len(lengths), 2),
            "truncated_share": round(sum(n > p.max_length for n in token_counts) / len(texts), 4),
        },
        "load": {
            "connections": CONNECTIONS,
            "texts_per_request": TEXTS_PER_REQUEST,
            "spans": SPANS,
            "window_seconds": args.seconds,
            "inprocess_window_seconds": args.inprocess_seconds,
            "rounds": args.rounds,
            "generator": sv["batched"]["loadgen"],
        },
        "runtime": rt,
        "service": sv,
        "overload_guards": guards,
        "http_floor": floor,
        "torch_wrapper": tw,
        "report": report_timing,
        "bench_seconds": round(time.perf_counter() - started, 1),
    }
    if not args.no_scoring:
        import score

        say("textsieve score: end to end against the runtime, memory against input size, Dask against local …")
        sizes = {"texts": 20_000, "rss_rows": (10_000, 200_000), "dask_texts": 20_000} if args.quick else {}
        results["scoring"] = score.bench_score(demo_model.CACHE / "score-work", say=say, **sizes)
        met = results["scoring"]["score_vs_runtime"] >= SCORE_VS_RUNTIME
        results["targets"]["score_vs_runtime"] = {"bound": f">= {SCORE_VS_RUNTIME}", "met": met}
    results["bench_seconds"] = round(time.perf_counter() - started, 1)
    write_json(RESULTS, results)
    wrote = [RESULTS]
    try:
        import chart

        chart.draw(results, CHART)
        wrote.append(CHART)
    except ModuleNotFoundError as exc:
        say(f"no chart: {exc.name} is missing (pip install matplotlib)")
    print(table(rt, fl, sv, tw, floor))
    print()
    print(open_loop_table(sv["open_loop"]))
    print()
    for name, (op, bound, issue) in TARGETS.items():
        met = results["targets"][name]["met"]
        print(f"{name:<34}{figures[name]:>8.3f}   target {op} {bound:<6} {'met' if met else 'NOT met'} (issue {issue})")
    for name in (
        "service_vs_runtime_ceiling",
        "service_vs_runtime_ceiling_no_spans",
        "spans_overhead_in_worker",
        "service_rss_sum_mb",
        "single_text_vs_http_floor_per_cpu",
        "service_vs_runtime_per_cpu",
        "service_vs_torch_wrapper_per_cpu",
        "service_vs_torch_wrapper_single",
        "open_loop_p99_ms_at_80pct",
        "p99_ms_single_text_32_clients",
    ):
        print(f"{name:<34}{figures[name]:>8.3f}")
    print("history (no longer targets): " + ", ".join(f"{k} {figures[k]:.3f}" for k in HISTORY))
    print(f"\n{memory_lines(sv['memory'])}")
    print(f"server peak RSS: service {sv['peak_rss_mb']:.0f} MB, torch_wrapper {tw['peak_rss_mb']:.0f} MB")
    if "scoring" in results:
        sc = results["scoring"]
        print(
            f"textsieve score: {sc['score_vs_runtime']:.3f} of the runtime end to end ({sc['texts']:,} texts, target "
            f">= {SCORE_VS_RUNTIME}; a one-row run takes {sc['fixed_seconds']:.2f} s, which alone caps it at "
            f"{sc['ceiling_at_fixed_cost']:.3f}; {sc['score_vs_runtime_large']:.3f} at {sc['large_rows']:,} rows); "
            f"peak RSS {sc['peak_rss']['process_tree_mb']} MB "
            f"at {sc['peak_rss']['rows']} rows; "
            f"Dask, two local workers: {sc['dask']['dask_vs_local']:.3f} of local scoring"
        )
    print(
        f"noise: load average {results['load_average_before'][0]} before, {results['load_average_after'][0]} after; "
        f"other processes kept {results['background_cores_busy']:.2f} of {results['machine']['cores']} cores "
        "busy during the HTTP windows (this script included)"
    )
    print(f"wrote {' and '.join(str(w.relative_to(HERE.parent)) for w in wrote)} in {results['bench_seconds']:.0f} s")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
