"""``textsieve score`` from two checkouts side by side: wall time and the CPU of every process.

    .venv/bin/python bench/score_ab.py --a /path/to/base-checkout --b . [--pairs 8] [--output csv] [-- --spans 3]

The input is ``bench/score.py``'s (the bench's texts as JSON Lines, ``{"id", "text"}`` a row) and the
registry a fresh copy of the demo model's, both under ``bench/.cache/score-ab/``. Each pair runs side
a then side b (the order alternates from pair to pair: a run's speed depends on what ran just
before it), each with ``PYTHONPATH`` set to its checkout and ``PYTHONSAFEPATH=1``, byte-compiled
first as ``bench/score.py`` does, after one run a side that is not measured (the first run of a
while is slower: 0.89 against 0.62 CPU-s for 2,000 texts, the same code on both sides). Arguments
after ``--`` go to both sides' ``textsieve score``.

- ``wall``: from the command's start until the scoring process ends (what ``bench/score.py`` times).
- ``cpu``: user + system time of the scoring process and everything below it (the fork server, the
  resource tracker and the workers), read with ``getrusage(RUSAGE_CHILDREN)`` once every one of
  them has ended and been waited for: this process makes itself their subreaper
  (``PR_SET_CHILD_SUBREAPER``), so the fork server, which outlives the scoring process by a few
  milliseconds, is counted too. On a shared machine the wall time moves ±30 % with no code change;
  the CPU is the figure to compare.

Prints each run, then each side's medians and ranges and the medians of the pairs' ratios
(b ÷ a); ``--check`` also compares the two sides' outputs byte for byte.
"""

from __future__ import annotations

import argparse
import compileall
import ctypes
import os
import resource
import statistics
import subprocess
import sys
import time
from pathlib import Path

HERE = Path(__file__).resolve().parent
sys.path.insert(0, str(HERE))

import demo_model  # noqa: E402
from score import _write_jsonl  # noqa: E402
from texts import bench_texts  # noqa: E402

_PR_SET_CHILD_SUBREAPER = 36


def _subreaper() -> None:
    libc = ctypes.CDLL(None, use_errno=True)
    if libc.prctl(_PR_SET_CHILD_SUBREAPER, 1, 0, 0, 0) != 0:
        raise OSError(ctypes.get_errno(), "prctl(PR_SET_CHILD_SUBREAPER) failed")


def _reap_all() -> None:
    while True:
        try:
            os.wait()
        except ChildProcessError:
            return


def run_once(checkout: Path, argv: list[str]) -> tuple[float, float]:
    """(wall seconds until the scoring process ended, CPU seconds of it and every descendant)."""
    env = {k: v for k, v in os.environ.items() if not k.startswith("TEXTSIEVE_")}
    env |= {"PYTHONPATH": str(checkout), "PYTHONSAFEPATH": "1"}
    cmd = [sys.executable, "-m", "textsieve.cli", "score", *argv, "--progress-every", "3600"]
    before = resource.getrusage(resource.RUSAGE_CHILDREN)
    started = time.perf_counter()
    proc = subprocess.Popen(cmd, env=env, stdout=subprocess.DEVNULL, stderr=subprocess.PIPE)
    _, err = proc.communicate()
    wall = time.perf_counter() - started
    if proc.returncode != 0:
        raise RuntimeError(f"textsieve score from {checkout} failed ({proc.returncode}): {err.decode()[-500:]}")
    _reap_all()
    after = resource.getrusage(resource.RUSAGE_CHILDREN)
    cpu = (after.ru_utime - before.ru_utime) + (after.ru_stime - before.ru_stime)
    return wall, cpu


def _summary(values: list[float]) -> str:
    return f"median {statistics.median(values):.3f} ({min(values):.3f}–{max(values):.3f})"


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    parser.add_argument("--a", type=Path, required=True, help="checkout of side a (the base)")
    parser.add_argument("--b", type=Path, required=True, help="checkout of side b (the change)")
    parser.add_argument("--pairs", type=int, default=8)
    parser.add_argument("--texts", type=int, default=100_000)
    parser.add_argument("--output", choices=("jsonl", "csv", "tsv"), default="jsonl", help="the output's format")
    parser.add_argument("--check", action="store_true", help="compare the two sides' outputs byte for byte")
    parser.add_argument("score_args", nargs="*", help="after --: more arguments for textsieve score")
    args = parser.parse_args(argv)
    _subreaper()
    work = demo_model.CACHE / "score-ab"
    work.mkdir(parents=True, exist_ok=True)
    demo_model.compile_bytecode()
    model = demo_model.ensure_model(print)
    registry = demo_model.live_registry(model, work / "registry")
    pool = bench_texts(min(args.texts, 20_000))
    source = _write_jsonl(work / "in.jsonl", [pool[i % len(pool)] for i in range(args.texts)], args.texts)
    sides = {"a": args.a.resolve(), "b": args.b.resolve()}
    for name, checkout in sides.items():
        for folder in demo_model.PACKAGE_DIRS:
            compileall.compile_dir(checkout / folder, quiet=1)
        print(f"side {name}: {checkout}")
    out_suffix = f".{args.output}"
    common = ["--model", demo_model.MODEL_NAME, "--registry", str(registry), *args.score_args]
    results: dict[str, list[tuple[float, float]]] = {"a": [], "b": []}
    for name in ("a", "b"):  # not measured: the first run after a while reads libraries from disk
        run_once(sides[name], [str(source), "--out", str(work / f"out-{name}{out_suffix}"), *common])
    print(f"load average before: {os.getloadavg()[0]:.2f}")
    for pair in range(args.pairs):
        order = ("a", "b") if pair % 2 == 0 else ("b", "a")
        for name in order:
            out = work / f"out-{name}{out_suffix}"
            wall, cpu = run_once(sides[name], [str(source), "--out", str(out), *common])
            results[name].append((wall, cpu))
            print(f"pair {pair + 1} side {name}: wall {wall:.3f} s, cpu {cpu:.3f} s")
    print(f"load average after: {os.getloadavg()[0]:.2f}")
    for name in ("a", "b"):
        walls = [w for w, _ in results[name]]
        cpus = [c for _, c in results[name]]
        print(f"side {name}: wall {_summary(walls)} s; cpu {_summary(cpus)} s")
    wall_ratio = [a[0] / b[0] for a, b in zip(results["a"], results["b"], strict=True)]
    cpu_ratio = [a[1] / b[1] for a, b in zip(results["a"], results["b"], strict=True)]
    print(f"a ÷ b (above 1: b is faster): wall {_summary(wall_ratio)}; cpu {_summary(cpu_ratio)}")
    if args.check:
        same = (work / f"out-a{out_suffix}").read_bytes() == (work / f"out-b{out_suffix}").read_bytes()
        print("outputs byte-identical" if same else "OUTPUTS DIFFER")
        return 0 if same else 1
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
