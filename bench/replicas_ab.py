"""A measurement for a design question: one server with worker processes, against N whole
servers sharing one port, each computing in-line.

    .venv/bin/python bench/replicas_ab.py [--texts 1] [--replicas 2] [--rounds 4] [--seconds 5]

``service`` is ``textsieve serve`` as shipped: one event loop that batches requests and hands
each batch to a worker process over a pipe (``TEXTSIEVE_INFERENCE=processes``, one worker per
core). ``replicas`` is ``--replicas`` copies of the same app in separate processes, all accepting
on one port (``SO_REUSEPORT``: the kernel spreads connections over them), each run with
``TEXTSIEVE_INFERENCE=threads`` and ``TEXTSIEVE_WORKERS=1``, so every request's inference runs
in the process that read it, with no pipe and no other process to wake. The same two shapes of
the bare HTTP floor (bench/http_floor.py: one process, and ``--replicas`` on one port) take a
window too, so the figure ``single_text_vs_http_floor`` can be read against either floor.

Each round loads the four in turn (the order rotates) over 32 kept-alive connections, closed
loop (wrk), and reads their CPU time from /proc. Prints every window, the medians and the ratios
per round. This is a prototype of a layout for a design decision (bench/README.md, "One server
or several"), not a supported way to serve: each replica would keep its own metrics, drift
window and model set.
"""

from __future__ import annotations

import argparse
import os
import signal
import socket
import sys
from pathlib import Path
from typing import Any

HERE = Path(__file__).resolve().parent
sys.path.insert(0, str(HERE))

import demo_model  # noqa: E402
import loadgen  # noqa: E402
import servers  # noqa: E402
from checkout_ab import window  # noqa: E402
from run import CONNECTIONS, SPANS, bodies, mean_reply_bytes, median  # noqa: E402
from texts import bench_texts  # noqa: E402


def _replica(kind: str, port: int, reply_bytes: int) -> None:
    """One replica process: the service's app (or the floor's) on a shared SO_REUSEPORT socket."""
    import gc

    import uvicorn
    from http_floor import fixed_reply, make_app

    from textsieve.service import logs
    from textsieve.service.cli import server_config
    from textsieve.service.settings import load_settings
    from textsieve.service.web.app import connection_guard, create_app

    sock = socket.socket(socket.AF_INET, socket.SOCK_STREAM)
    sock.setsockopt(socket.SOL_SOCKET, socket.SO_REUSEADDR, 1)
    sock.setsockopt(socket.SOL_SOCKET, socket.SO_REUSEPORT, 1)
    sock.bind(("127.0.0.1", port))
    settings = load_settings(host="127.0.0.1", port=port)
    app: Any
    if kind == "floor":
        app, guard = make_app(fixed_reply(reply_bytes), settings), connection_guard(settings)
    else:
        logs.configure()
        app = create_app(settings)
        guard = app.state.guard
    server = uvicorn.Server(server_config(app, guard, settings))
    gc.freeze()  # as service/cli.py does
    server.run(sockets=[sock])


def serve_replicas(kind: str, count: int, port: int, reply_bytes: int) -> int:
    """Fork ``count`` replicas (before any heavy import) and wait for them; SIGINT or SIGTERM stops them all."""
    children = []
    for _ in range(count):
        pid = os.fork()
        if pid == 0:
            try:
                _replica(kind, port, reply_bytes)
            finally:
                os._exit(0)
        children.append(pid)

    def stop(signum: int, frame: object) -> None:
        for child in children:
            try:
                os.kill(child, signal.SIGTERM)
            except ProcessLookupError:
                pass

    signal.signal(signal.SIGTERM, stop)
    signal.signal(signal.SIGINT, stop)  # how servers.Server.stop asks
    for child in children:
        os.waitpid(child, 0)
    return 0


def main() -> int:
    p = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    p.add_argument("--texts", type=int, default=1, help="texts per request")
    p.add_argument("--replicas", type=int, default=2, help="replicas on one port (and floors on one port)")
    p.add_argument("--rounds", type=int, default=4)
    p.add_argument("--seconds", type=float, default=5.0)
    p.add_argument("--serve", choices=["service", "floor"], help=argparse.SUPPRESS)  # a replica group of this script
    p.add_argument("--port", type=int, help=argparse.SUPPRESS)
    p.add_argument("--reply-bytes", type=int, default=0, help=argparse.SUPPRESS)
    args = p.parse_args()
    if args.serve:
        return serve_replicas(args.serve, args.replicas, args.port, args.reply_bytes)

    model = demo_model.ensure_model()
    work = demo_model.CACHE / "work"
    body_list = bodies(bench_texts(4096), args.texts, SPANS)
    wrk = loadgen.ensure_wrk()
    textsieve = str(Path(sys.executable).with_name("textsieve"))
    started: dict[str, servers.Server] = {}

    def start(name: str, cmd: list[str], env: dict[str, str] | None = None) -> None:
        port = servers.free_port()
        cmd = [str(port) if c == "{port}" else c for c in cmd]
        started[name] = servers.start(name, cmd, "/readyz", port, work / f"replicas-ab-{name}.log", env=env)
        loadgen.run_load(started[name].url + "/v1/predict", body_list, connections=CONNECTIONS, seconds=2, wrk=wrk)

    group = [sys.executable, __file__, "--replicas", str(args.replicas), "--port", "{port}"]
    try:
        registry = demo_model.live_registry(model, work / "registry-replicas-ab-service")
        start("service", [textsieve, "serve", "--registry", str(registry), "--port", "{port}"])
        registry = demo_model.live_registry(model, work / "registry-replicas-ab-replicas")
        env = {"TEXTSIEVE_REGISTRY": str(registry), "TEXTSIEVE_INFERENCE": "threads", "TEXTSIEVE_WORKERS": "1"}
        start("replicas", [*group, "--serve", "service"], env)
        size = str(mean_reply_bytes(started["service"], body_list))
        start("floor", [sys.executable, str(HERE / "http_floor.py"), "--port", "{port}", "--reply-bytes", size])
        start("floors", [*group, "--serve", "floor", "--reply-bytes", size])
        names = list(started)
        rounds: list[dict[str, dict[str, float]]] = []
        for i in range(args.rounds):
            order = names[i % len(names) :] + names[: i % len(names)]
            got = {n: window(started[n], body_list, args.seconds, wrk) for n in order}
            rounds.append(got)
            print(
                f"round {i + 1} (load {os.getloadavg()[0]:.2f}): "
                + "; ".join(
                    f"{n} {w['requests_per_s']:.0f} req/s, {w['server_cpu_ms_per_request']:.3f} CPU-ms/req, "
                    f"{w['server_cores_busy']:.2f} cores, p99 {w['p99_ms']:.1f} ms"
                    for n, w in got.items()
                ),
                flush=True,
            )
    finally:
        for server in started.values():
            server.stop()
    for n in names:
        rate = [r[n]["requests_per_s"] for r in rounds]
        cpu = [r[n]["server_cpu_ms_per_request"] for r in rounds]
        print(f"{n}: {median(rate):.0f} req/s ({min(rate):.0f}–{max(rate):.0f}), {median(cpu):.3f} CPU-ms/req")
    for a, b in (("replicas", "service"), ("service", "floor"), ("replicas", "floor"), ("replicas", "floors")):
        ratios = [r[a]["requests_per_s"] / r[b]["requests_per_s"] for r in rounds]
        print(f"{a} ÷ {b}: median {median(ratios):.3f} ({min(ratios):.3f}–{max(ratios):.3f})")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
