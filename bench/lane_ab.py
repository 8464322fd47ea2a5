"""The predict lane's worth: single-text requests with the lane on and off, side by side.

    .venv/bin/python bench/lane_ab.py [--rounds 6] [--seconds 5]

Two servers run at once, each on its own copy of the demo model's registry: ``lane`` is the app
as ``textsieve serve`` builds it, ``full`` is the same app with ``create_app(fast_lane=False)``
(service/web/lane.py); both run under uvicorn exactly as ``serve`` runs it (``server_config``).
Each round loads one and then the other (the order alternates: a window's speed depends on what
ran just before it) with single-text requests over 32 kept-alive connections, closed loop, and
reads from /proc the CPU time of each server's whole process tree and of its main thread (the
event loop). With ``--floor`` the HTTP floor (bench/http_floor.py, answering the mean reply size
of the lane's replies) takes a window in each round too, and ``single_text_vs_http_floor``
(``make bench``'s figure: service ÷ floor requests/s) is computed per round for both. Prints
each window and the medians; ratios are of the same round.
"""

from __future__ import annotations

import argparse
import os
import sys
from pathlib import Path
from typing import Any

HERE = Path(__file__).resolve().parent
sys.path.insert(0, str(HERE))

import demo_model  # noqa: E402
import loadgen  # noqa: E402
import servers  # noqa: E402
from run import CONNECTIONS, SPANS, bodies, mean_reply_bytes, median, start_http_floor  # noqa: E402
from texts import bench_texts  # noqa: E402

_TICKS = os.sysconf("SC_CLK_TCK")


def serve(registry: str, port: int, fast_lane: bool) -> int:
    """Run one server in this process, as ``textsieve serve`` does (with or without the lane)."""
    import uvicorn

    from textsieve.service import logs
    from textsieve.service.cli import server_config
    from textsieve.service.settings import load_settings
    from textsieve.service.web.app import create_app

    logs.configure()
    settings = load_settings(host="127.0.0.1", port=port, registry=registry)
    app = create_app(settings, fast_lane=fast_lane)
    uvicorn.Server(server_config(app, app.state.guard, settings)).run()
    return 0


def main_thread_seconds(pid: int) -> float:
    fields = Path(f"/proc/{pid}/task/{pid}/stat").read_text().rsplit(")", 1)[1].split()
    return (int(fields[11]) + int(fields[12])) / _TICKS


def window(server: servers.Server, body_list: list[bytes], seconds: float, wrk: str | None) -> dict[str, float]:
    cpu0, loop0 = server.cpu_seconds(), main_thread_seconds(server.proc.pid)
    res = loadgen.run_load(server.url + "/v1/predict", body_list, connections=CONNECTIONS, seconds=seconds, wrk=wrk)
    cpu, loop = server.cpu_seconds() - cpu0, main_thread_seconds(server.proc.pid) - loop0
    if res.errors or not res.requests:
        raise RuntimeError(f"{server.name}: {res.errors} failed requests of {res.requests}; see {server.log}")
    return {
        "requests_per_s": res.requests / res.seconds,
        "server_cpu_ms_per_request": 1000 * cpu / res.requests,
        "loop_cpu_ms_per_request": 1000 * loop / res.requests,
        "loop_cores_busy": loop / res.seconds,
        "p50_ms": res.latency_ms["p50"],
        "p99_ms": res.latency_ms["p99"],
    }


def main() -> int:
    p = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    p.add_argument("--rounds", type=int, default=6)
    p.add_argument("--seconds", type=float, default=5.0)
    p.add_argument("--floor", action="store_true", help="also load the HTTP floor in each round")
    p.add_argument("--serve", choices=["lane", "full"], help=argparse.SUPPRESS)  # a server process of this script
    p.add_argument("--registry", help=argparse.SUPPRESS)
    p.add_argument("--port", type=int, help=argparse.SUPPRESS)
    args = p.parse_args()
    if args.serve:
        return serve(args.registry, args.port, args.serve == "lane")

    model = demo_model.ensure_model()
    work = demo_model.CACHE / "work"
    body_list = bodies(bench_texts(4096), 1, SPANS)
    wrk = loadgen.ensure_wrk()
    started: dict[str, servers.Server] = {}
    try:
        for name in ("lane", "full"):
            registry = demo_model.live_registry(model, work / f"registry-lane-ab-{name}")
            port = servers.free_port()
            cmd = [sys.executable, __file__, "--serve", name, "--registry", str(registry), "--port", str(port)]
            started[name] = servers.start(name, cmd, "/readyz", port, work / f"lane-ab-{name}.log")
            loadgen.run_load(started[name].url + "/v1/predict", body_list, connections=CONNECTIONS, seconds=2, wrk=wrk)
        names = ["lane", "full"]
        if args.floor:
            started["floor"] = start_http_floor(work, mean_reply_bytes(started["lane"], body_list))
            names.append("floor")
        rounds: list[dict[str, dict[str, float]]] = []
        for i in range(args.rounds):
            order = names[i % len(names) :] + names[: i % len(names)]
            order = order if i % 2 == 0 else order[::-1]
            got = {name: window(started[name], body_list, args.seconds, wrk) for name in order}
            rounds.append(got)
            print(
                f"round {i + 1} ({' then '.join(order)}): "
                + "; ".join(
                    f"{n} {w['requests_per_s']:.0f} req/s, server {w['server_cpu_ms_per_request']:.3f} CPU-ms/req, "
                    f"loop {w['loop_cpu_ms_per_request']:.3f} CPU-ms/req ({w['loop_cores_busy']:.2f} cores), "
                    f"p99 {w['p99_ms']:.1f} ms"
                    for n, w in got.items()
                ),
                flush=True,
            )
    finally:
        for server in started.values():
            server.stop()
    print(summary(rounds))
    return 0


def summary(rounds: list[dict[str, dict[str, float]]]) -> str:
    out = []
    if "floor" in rounds[0]:
        for n in ("lane", "full"):
            vs = [r[n]["requests_per_s"] / r["floor"]["requests_per_s"] for r in rounds]
            per_cpu = [r["floor"]["server_cpu_ms_per_request"] / r[n]["server_cpu_ms_per_request"] for r in rounds]
            out.append(
                f"single_text_vs_http_floor ({n}): median {median(vs):.3f} ({min(vs):.3f}–{max(vs):.3f}); "
                f"per CPU {median(per_cpu):.3f} ({min(per_cpu):.3f}–{max(per_cpu):.3f})"
            )
    for key in ("requests_per_s", "server_cpu_ms_per_request", "loop_cpu_ms_per_request", "p50_ms", "p99_ms"):
        per: dict[str, Any] = {n: [r[n][key] for r in rounds] for n in ("lane", "full")}
        ratios = [r["lane"][key] / r["full"][key] for r in rounds]
        out.append(
            f"{key}: lane median {median(per['lane']):.3f} ({min(per['lane']):.3f}–{max(per['lane']):.3f}), "
            f"full median {median(per['full']):.3f} ({min(per['full']):.3f}–{max(per['full']):.3f}), "
            f"lane/full median {median(ratios):.3f} ({min(ratios):.3f}–{max(ratios):.3f})"
        )
    return "\n".join(out)


if __name__ == "__main__":
    raise SystemExit(main())
