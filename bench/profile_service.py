"""Where a server's CPU goes under the benchmark's load: py-spy samples every thread for a while
and the collapsed stacks are summed per thread and per function (self time and total time).

    .venv/bin/python bench/profile_service.py [--target service|torch] [--load batched|single]
                                              [--seconds 12] [--env KEY=VALUE ...]

Needs py-spy (pip install py-spy) and permission to trace the server (root, or ptrace allowed).
Prints a summary; the raw collapsed stacks stay in bench/.cache/work/profile-*.txt.
"""

from __future__ import annotations

import argparse
import collections
import shutil
import subprocess
import sys
import threading
from pathlib import Path

HERE = Path(__file__).resolve().parent
sys.path.insert(0, str(HERE))

import demo_model  # noqa: E402
import loadgen  # noqa: E402
import servers  # noqa: E402
from run import SPANS, TEXTS_PER_REQUEST, bodies  # noqa: E402
from texts import bench_texts  # noqa: E402


def summarize(raw: Path, top: int = 25) -> str:
    per_thread: collections.Counter[str] = collections.Counter()
    self_time: collections.Counter[str] = collections.Counter()
    total_time: collections.Counter[str] = collections.Counter()
    samples = 0
    for line in raw.read_text().splitlines():
        stack, _, count_text = line.rpartition(" ")
        if not stack:
            continue
        count = int(count_text)
        frames = stack.split(";")
        thread = frames[0]
        per_thread[thread] += count
        samples += count
        self_time[frames[-1]] += count
        for f in set(frames[1:]):
            total_time[f] += count
    out = [f"{samples} samples (idle excluded)", "", "by thread:"]
    out += [f"  {n / samples:6.1%}  {t}" for t, n in per_thread.most_common()]
    out += ["", "self time:"] + [f"  {n / samples:6.1%}  {f}" for f, n in self_time.most_common(top)]
    out += ["", "total time:"] + [f"  {n / samples:6.1%}  {f}" for f, n in total_time.most_common(top)]
    return "\n".join(out)


def main() -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--target", choices=["service", "torch"], default="service")
    parser.add_argument("--load", choices=["batched", "single"], default="batched")
    parser.add_argument("--seconds", type=float, default=12.0)
    parser.add_argument("--spans", type=int, default=SPANS)
    parser.add_argument(
        "--gil", action="store_true", help="sample only the thread holding the GIL: where the serial Python time goes"
    )
    parser.add_argument("--env", action="append", default=[], help="KEY=VALUE for the server's environment")
    parser.add_argument("--serve", nargs="*", default=[], help="extra arguments for `textsieve serve`")
    args = parser.parse_args()
    pyspy = shutil.which("py-spy") or str(Path(sys.executable).with_name("py-spy"))
    model = demo_model.ensure_model()
    work = demo_model.CACHE / "work"
    work.mkdir(parents=True, exist_ok=True)
    texts = bench_texts(4096)
    body_list = bodies(texts, TEXTS_PER_REQUEST if args.load == "batched" else 1, args.spans)
    port = servers.free_port()
    env = dict(kv.split("=", 1) for kv in args.env)
    if args.target == "service":
        registry = demo_model.live_registry(model, work / "profile-registry")
        cmd = [
            str(Path(sys.executable).with_name("textsieve")),
            "serve",
            "--registry",
            str(registry),
            "--port",
            str(port),
            *args.serve,
        ]
        server = servers.start("service", cmd, "/readyz", port, work / "profile-service.log", env=env)
    else:
        cmd = [sys.executable, str(HERE / "torch_wrapper.py"), "--run", str(model.run), "--port", str(port)]
        server = servers.start("torch_wrapper", cmd, "/healthz", port, work / "profile-torch.log", env=env)
    raw = work / f"profile-{args.target}-{args.load}{'-gil' if args.gil else ''}.txt"
    wrk = loadgen.ensure_wrk()
    try:
        loadgen.run_load(server.url + "/v1/predict", body_list, connections=32, seconds=2, wrk=wrk)
        result: dict[str, loadgen.LoadResult] = {}
        thread = threading.Thread(
            target=lambda: result.update(
                r=loadgen.run_load(
                    server.url + "/v1/predict", body_list, connections=32, seconds=args.seconds + 3, wrk=wrk
                )
            )
        )
        cpu0 = server.cpu_seconds()
        thread.start()
        subprocess.run(
            [
                pyspy,
                "record",
                "--pid",
                str(server.proc.pid),
                "--duration",
                str(int(args.seconds)),
                "--rate",
                "200",
                "--threads",
                "--subprocesses",
                "--format",
                "raw",
                "--output",
                str(raw),
                "--nonblocking",
                *(["--gil"] if args.gil else []),
            ],
            check=True,
            stdout=subprocess.DEVNULL,
            stderr=subprocess.DEVNULL,
        )
        thread.join()
        cpu = server.cpu_seconds() - cpu0
    finally:
        server.stop()
    r = result["r"]
    per = TEXTS_PER_REQUEST if args.load == "batched" else 1
    texts_done = r.requests * per
    print(
        f"{args.target} {args.load}: {texts_done / r.seconds:.0f} texts/s, p99 {r.latency_ms['p99']:.1f} ms, "
        f"server CPU {1000 * cpu / texts_done:.3f} s per 1k texts\n"
    )
    print(summarize(raw))
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
