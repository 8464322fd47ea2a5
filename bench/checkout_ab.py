"""Two checkouts of the service side by side: single-text requests, alternating windows.

    .venv/bin/python bench/checkout_ab.py --a /path/to/main-checkout --b . [--floor] [--rounds 6] [--seconds 5]
    .venv/bin/python bench/checkout_ab.py --a . --b . --b-env TEXTSIEVE_BATCH_WAIT_MS=0 --texts 16
    .venv/bin/python bench/checkout_ab.py --a /path/to/main-checkout --b . --floors 600   # server stacks only

Requests carry one text (``--texts`` for more; the CPU figures stay per request). Each side is
``textsieve serve`` run from its own checkout (``PYTHONPATH`` pointing at it and
``PYTHONSAFEPATH=1``, so a working directory holding a checkout does not come first; each side
prints where it imports textsieve from; with its own ``TEXTSIEVE_*`` variables from
``--a-env``/``--b-env``) on its own copy of the demo model's
registry; with ``--floors`` each side runs its checkout's bench/http_floor.py instead. Each
round loads every server in turn (the order rotates and reverses: a window's speed depends on
what ran just before it) with single-text requests over 32 kept-alive connections, closed loop,
and reads from /proc the CPU time of the event loop (the server's main thread), of the server's
other threads and of its worker processes. With ``--floor`` the HTTP floor (bench/http_floor.py
from side b's checkout, answering the mean size of b's replies) takes a window in each round
too, and ``single_text_vs_http_floor`` is computed per round for both sides. Prints each window
and the medians; ratios are of the same round.
"""

from __future__ import annotations

import argparse
import os
import subprocess
import sys
from pathlib import Path
from typing import Any

HERE = Path(__file__).resolve().parent
sys.path.insert(0, str(HERE))

import demo_model  # noqa: E402
import loadgen  # noqa: E402
import servers  # noqa: E402
from run import CONNECTIONS, OPEN_LOOP_CONNECTIONS, SPANS, bodies, mean_reply_bytes, median  # noqa: E402
from texts import bench_texts  # noqa: E402

_TICKS = os.sysconf("SC_CLK_TCK")
SERVE = "import sys; from textsieve.cli import main; sys.exit(main())"


def _jiffies(path: str) -> int:
    fields = Path(path).read_text().rsplit(")", 1)[1].split()
    return int(fields[11]) + int(fields[12])


def cpu_split(server: servers.Server) -> dict[str, float]:
    """CPU seconds so far: the event loop (main thread), the server's other threads, its children."""
    pid = server.proc.pid
    loop = whole = children = 0
    try:
        loop = _jiffies(f"/proc/{pid}/task/{pid}/stat")
        whole = _jiffies(f"/proc/{pid}/stat")
    except OSError:
        pass
    for child in server.pids():
        if child != pid:
            try:
                children += _jiffies(f"/proc/{child}/stat")
            except OSError:
                continue
    return {"loop": loop / _TICKS, "threads": (whole - loop) / _TICKS, "workers": children / _TICKS}


def window(
    server: servers.Server, body_list: list[bytes], seconds: float, wrk: str | None, connections: int = CONNECTIONS
) -> dict[str, float]:
    before = cpu_split(server)
    res = loadgen.run_load(server.url + "/v1/predict", body_list, connections=connections, seconds=seconds, wrk=wrk)
    after = cpu_split(server)
    if res.errors or not res.requests:
        raise RuntimeError(f"{server.name}: {res.errors} failed requests of {res.requests}; see {server.log}")
    used = {k: after[k] - before[k] for k in after}
    total = sum(used.values())
    return {
        "requests_per_s": res.requests / res.seconds,
        "server_cpu_ms_per_request": 1000 * total / res.requests,
        "loop_cpu_ms_per_request": 1000 * used["loop"] / res.requests,
        "threads_cpu_ms_per_request": 1000 * used["threads"] / res.requests,
        "workers_cpu_ms_per_request": 1000 * used["workers"] / res.requests,
        "server_cores_busy": total / res.seconds,
        "loop_cores_busy": used["loop"] / res.seconds,
        "p50_ms": res.latency_ms["p50"],
        "p99_ms": res.latency_ms["p99"],
    }


def _side_registry(bundle: Path, folder: Path, env: dict[str, str]) -> Path:
    """A fresh registry whose live version of the demo model is ``bundle``, made by the side's CLI."""
    import shutil

    shutil.rmtree(folder, ignore_errors=True)
    folder.parent.mkdir(parents=True, exist_ok=True)
    where = ["--registry", str(folder)]
    name = demo_model.MODEL_NAME
    for argv in (
        ["publish", str(bundle), "--model", name, "--reason", "bench", *where],
        ["promote", name, "1", "--to", "candidate", "--reason", "bench", *where],
        ["promote", name, "1", "--to", "live", "--reason", "bench", *where],
    ):
        subprocess.run([sys.executable, "-c", SERVE, *argv], env={**os.environ, **env}, check=True, capture_output=True)
    return folder


def _imported_from(env: dict[str, str]) -> str:
    """Where a server started with ``env`` imports textsieve from; refuses any other checkout than
    the one named in its ``PYTHONPATH``."""
    where = subprocess.run(
        [sys.executable, "-c", "import textsieve; print(textsieve.__file__)"],
        env={**os.environ, **env},
        capture_output=True,
        text=True,
        check=True,
    ).stdout.strip()
    if not Path(where).resolve().is_relative_to(Path(env["PYTHONPATH"]).resolve()):
        raise SystemExit(f"a server would import textsieve from {where}, not from {env['PYTHONPATH']}")
    return where


def _env(pairs: list[str]) -> dict[str, str]:
    out = {}
    for pair in pairs:
        name, _, value = pair.partition("=")
        out[name] = value
    return out


def main() -> int:
    p = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    p.add_argument("--a", required=True, help="checkout of side a (its folder holding textsieve/)")
    p.add_argument("--b", required=True, help="checkout of side b")
    p.add_argument("--a-env", action="append", default=[], metavar="NAME=VALUE")
    p.add_argument("--b-env", action="append", default=[], metavar="NAME=VALUE")
    p.add_argument("--rounds", type=int, default=6)
    p.add_argument("--seconds", type=float, default=5.0)
    p.add_argument("--floor", action="store_true", help="also load the HTTP floor (b's checkout) in each round")
    p.add_argument("--texts", type=int, default=1, help="texts per request (make bench's batched load: 16)")
    p.add_argument("--connections", type=int, default=CONNECTIONS, help="closed-loop connections")
    p.add_argument(
        "--floors",
        type=int,
        metavar="BYTES",
        help="run each side's HTTP floor (answering BYTES) instead of the service",
    )
    p.add_argument(
        "--open-loop",
        type=float,
        metavar="RATE",
        help="instead of the closed loop, send RATE requests a second at fixed times (bench/openloop.py, "
        f"{OPEN_LOOP_CONNECTIONS} connections at most) and compare latency from each intended send time",
    )
    args = p.parse_args()

    model = demo_model.ensure_model()
    work = demo_model.CACHE / "work"
    body_list = bodies(bench_texts(4096), args.texts, SPANS)
    wrk = loadgen.ensure_wrk()
    sides = {"a": (Path(args.a).resolve(), _env(args.a_env)), "b": (Path(args.b).resolve(), _env(args.b_env))}
    started: dict[str, servers.Server] = {}
    try:
        for name, (checkout, env) in sides.items():
            # PYTHONSAFEPATH: ``python -c`` would otherwise put the working directory first on
            # sys.path, and a working directory holding a checkout (this one, as documented) would
            # serve its own code on both sides (it did, until 2026-12-03: see bench/README.md).
            side_env = {**env, "PYTHONPATH": str(checkout), "PYTHONSAFEPATH": "1"}
            print(f"side {name}: {_imported_from(side_env)}", flush=True)
            # Each side's registry is made by its own code: an older checkout refuses a registry whose
            # schema a newer one has migrated.
            registry = _side_registry(model.bundle, work / f"registry-checkout-ab-{name}", side_env)
            port = servers.free_port()
            cmd = [sys.executable, "-c", SERVE, "serve", "--registry", str(registry), "--port", str(port)]
            if args.floors:  # the side's own server stack with a fixed reply (bench/http_floor.py)
                cmd = [sys.executable, str(checkout / "bench" / "http_floor.py"), "--port", str(port)]
                cmd += ["--reply-bytes", str(args.floors)]
            started[name] = servers.start(name, cmd, "/readyz", port, work / f"checkout-ab-{name}.log", env=side_env)
            loadgen.run_load(started[name].url + "/v1/predict", body_list, connections=CONNECTIONS, seconds=2, wrk=wrk)
        names = ["a", "b"]
        if args.floor:
            port = servers.free_port()
            size = mean_reply_bytes(started["b"], body_list)
            cmd = [sys.executable, str(sides["b"][0] / "bench" / "http_floor.py"), "--port", str(port)]
            cmd += ["--reply-bytes", str(size)]
            env = {"PYTHONPATH": str(sides["b"][0])}
            started["floor"] = servers.start("floor", cmd, "/readyz", port, work / "checkout-ab-floor.log", env=env)
            names.append("floor")
        rounds: list[dict[str, dict[str, float]]] = []
        for i in range(args.rounds):
            if len(names) == 2:
                order = names if i % 2 == 0 else names[::-1]
            else:  # each name first, middle and last in turn, forwards and backwards
                order = names[i % len(names) :] + names[: i % len(names)]
                order = order if i % 2 == 0 else order[::-1]
            if args.open_loop:
                got = {name: open_window(started[name], body_list, args.open_loop, args.seconds) for name in order}
            else:
                got = {name: window(started[name], body_list, args.seconds, wrk, args.connections) for name in order}
            rounds.append(got)
            if args.open_loop:
                print(
                    f"round {i + 1} ({' then '.join(order)}; load {os.getloadavg()[0]:.2f}): "
                    + "; ".join(
                        f"{n} p50 {w['p50_ms']:.1f} p99 {w['p99_ms']:.1f} p99.9 {w['p99.9_ms']:.1f} ms, "
                        f"{w['server_cores_busy']:.2f} cores"
                        for n, w in got.items()
                    ),
                    flush=True,
                )
                continue
            print(
                f"round {i + 1} ({' then '.join(order)}; load {os.getloadavg()[0]:.2f}): "
                + "; ".join(
                    f"{n} {w['requests_per_s']:.0f} req/s, server {w['server_cpu_ms_per_request']:.3f} CPU-ms/req "
                    f"({w['server_cores_busy']:.2f} cores), loop {w['loop_cpu_ms_per_request']:.3f} "
                    f"({w['loop_cores_busy']:.2f} cores), p99 {w['p99_ms']:.1f} ms"
                    for n, w in got.items()
                ),
                flush=True,
            )
    finally:
        for server in started.values():
            server.stop()
    print(summary(rounds))
    return 0


def open_window(server: servers.Server, body_list: list[bytes], rate: float, seconds: float) -> dict[str, float]:
    """Requests at a fixed rate for ``seconds``: latency percentiles from each intended send time."""
    before = cpu_split(server)
    res: dict[str, Any] = loadgen.run_open_loop(
        server.url + "/v1/predict", body_list, rate=rate, seconds=seconds, connections=OPEN_LOOP_CONNECTIONS
    )
    used = sum(cpu_split(server).values()) - sum(before.values())
    if any(res["errors"].values()):
        raise RuntimeError(f"{server.name}: {res['errors']} failed requests; see {server.log}")
    lat = res["latency_ms"]
    return {
        "p50_ms": lat["p50"],
        "p99_ms": lat["p99"],
        "p99.9_ms": lat["p99.9"],
        "send_lag_p99_ms": res["send_lag_ms"]["p99"],
        "server_cores_busy": used / float(res["duration_s"]),
    }


def summary(rounds: list[dict[str, dict[str, float]]]) -> str:
    out = []
    if "floor" in rounds[0]:
        for n in ("a", "b"):
            vs = [r[n]["requests_per_s"] / r["floor"]["requests_per_s"] for r in rounds]
            out.append(f"single_text_vs_http_floor ({n}): median {median(vs):.3f} ({min(vs):.3f}–{max(vs):.3f})")
        floor = [r["floor"]["requests_per_s"] for r in rounds]
        out.append(f"floor requests_per_s: median {median(floor):.0f} ({min(floor):.0f}–{max(floor):.0f})")
    for key in rounds[0]["a"]:
        per = {n: [r[n][key] for r in rounds] for n in ("a", "b")}
        ratios = [r["b"][key] / r["a"][key] for r in rounds if r["a"][key]]
        if not ratios:
            continue
        out.append(
            f"{key}: a {median(per['a']):.3f} ({min(per['a']):.3f}–{max(per['a']):.3f}), "
            f"b {median(per['b']):.3f} ({min(per['b']):.3f}–{max(per['b']):.3f}), "
            f"b/a {median(ratios):.3f} ({min(ratios):.3f}–{max(ratios):.3f})"
        )
    return "\n".join(out)


if __name__ == "__main__":
    raise SystemExit(main())
