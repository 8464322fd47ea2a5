"""Instructions a text costs in a service worker's batch, with and without spans, under callgrind.

    .venv/bin/python bench/worker_instructions.py [--texts 1920] [--spans 3 0]   # needs valgrind

``bench/inprocess.py``'s ``worker`` variants (``workers._run`` on batches of ``WORKER_BATCH``
texts and the reply pickled for the pipe) timed on this machine move by ±20 % between runs,
and several processes share its two cores; instruction counts repeat within a fraction of a
per cent. For each number of spans this script runs itself under valgrind's callgrind, warms
the worker's caches on the same batches, switches instrumentation on for the measured passes
only and prints instructions per text, then the ratio of each to the last (spans 0): what
``spans_overhead_in_worker`` measures in time. ``callgrind_annotate`` on the file it names shows
where the instructions go (``--inclusive=yes`` for whole functions).
"""

from __future__ import annotations

import argparse
import os
import re
import shutil
import subprocess
import sys
from pathlib import Path

HERE = Path(__file__).resolve().parent
sys.path.insert(0, str(HERE))

import demo_model  # noqa: E402
import inprocess  # noqa: E402
from texts import bench_texts  # noqa: E402

PASSES = 2


def _callgrind(on: bool) -> None:
    subprocess.run(["callgrind_control", "-i", "on" if on else "off", str(os.getpid())], capture_output=True)


def inside(n_texts: int, spans: int) -> None:
    """The measured passes (run under callgrind by :func:`main`)."""
    import gc

    from textsieve.registry.runtime import Predictor

    model = demo_model.ensure_model(lambda *a: None)
    p = Predictor.from_bundle(model.bundle, threads=1, batch_size=inprocess.BATCH)
    work = inprocess.worker_pipeline(p, bench_texts(n_texts), spans=spans)
    work()  # warm: the encoder's chunk caches, onnxruntime's buffers
    gc.collect()
    gc.freeze()  # as a worker does once started
    _callgrind(True)
    for _ in range(PASSES):
        work()
    _callgrind(False)


def count(n_texts: int, spans: int, out: Path) -> float:
    # Python's own allocator, as a worker has it: with PYTHONMALLOC=malloc (bench/loop_cost.py)
    # each small object's malloc and free cost several times pymalloc's, which weighs code that
    # makes many small objects (spans' dicts, offsets as ints) more than it weighs in a worker.
    env = dict(os.environ)
    cmd = ["valgrind", "--tool=callgrind", "--instr-atstart=no", f"--callgrind-out-file={out}"]
    args = [sys.executable, __file__, "--inside", "--texts", str(n_texts), "--spans", str(spans)]
    run = subprocess.run([*cmd, *args], env=env, capture_output=True, text=True)
    found = re.search(r"Collected : (\d+)", run.stderr)
    if run.returncode != 0 or found is None:
        raise SystemExit(run.stdout + run.stderr[-3000:])
    return int(found.group(1)) / (n_texts * PASSES)


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--texts", type=int, default=1920, help="benchmark texts a pass (batches of 96)")
    parser.add_argument("--spans", type=int, nargs="+", default=[3, 0], help="spans a text, one count each")
    parser.add_argument("--inside", action="store_true", help=argparse.SUPPRESS)
    args = parser.parse_args(argv)
    if args.inside:
        inside(args.texts, args.spans[0])
        return 0
    if shutil.which("valgrind") is None or shutil.which("callgrind_control") is None:
        print("needs valgrind (apt-get install valgrind)", file=sys.stderr)
        return 2
    work = demo_model.CACHE / "work"
    work.mkdir(parents=True, exist_ok=True)
    per_text = {}
    import textsieve

    print(f"textsieve imported from {Path(textsieve.__file__).parent}")
    for k in args.spans:
        out = work / f"worker-{k}-spans-{os.getpid()}.callgrind"
        per_text[k] = count(args.texts, k, out)
        print(f"spans {k}: {per_text[k]:,.0f} instructions a text ({out})", flush=True)
    base = per_text[args.spans[-1]]
    for k in args.spans[:-1]:
        print(f"spans {k} / spans {args.spans[-1]}: {per_text[k] / base:.3f}")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
