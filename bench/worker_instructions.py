"""Instructions a text costs in a service worker's batch, with and without spans, under callgrind.

    .venv/bin/python bench/worker_instructions.py [--texts 1920] [--spans 3 0]   # needs valgrind
    .venv/bin/python bench/worker_instructions.py --steps [--texts 960]         # each step apart

``bench/inprocess.py``'s ``worker`` variants (``workers._run`` on batches of ``WORKER_BATCH``
texts and the reply pickled for the pipe) timed on this machine move by ±20 % between runs,
and several processes share its two cores; instruction counts repeat within a fraction of a
per cent. For each number of spans this script runs itself under valgrind's callgrind, warms
the worker's caches on the same batches, switches instrumentation on for the measured passes
only and prints instructions per text, then the ratio of each to the last (spans 0): what
``spans_overhead_in_worker`` measures in time. ``callgrind_annotate`` on the file it names shows
where the instructions go (``--inclusive=yes`` for whole functions).

``--steps`` counts each step of ``_run`` apart, on the same batches, for spans 3 and 0 in one
run: encoding, the graph, probabilities, the span windows (``registry/spans.py``: the grid),
the windows merged and ranked, all of batch_spans (with the spans' public dicts), the reply
dicts with their spans (``explain``) and each serialised (``orjson``), as the worker did until
2026-12-05; ``replies``, what it does now (each text's JSON written without the dicts: all of
``explain`` and ``orjson``), and the batch's reply pickled. Steps
run one after the other on prepared inputs, so their sum is close to, not equal to, a whole
``_run`` (caches, the garbage collector).
"""

from __future__ import annotations

import argparse
import os
import re
import subprocess
import sys
from collections.abc import Callable
from pathlib import Path
from typing import Any

HERE = Path(__file__).resolve().parent
sys.path.insert(0, str(HERE))

import callgrind  # noqa: E402
import demo_model  # noqa: E402
import inprocess  # noqa: E402
from texts import bench_texts  # noqa: E402

PASSES = 2


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
    callgrind.instrument(True)
    for _ in range(PASSES):
        work()
    callgrind.instrument(False)


STEPS = (
    "encode",
    "graph",
    "probabilities",
    "windows",
    "windows_merged",
    "spans",
    "explain",
    "orjson",
    "replies",
    "pickle",
)


def inside_steps(n_texts: int, spans_list: list[int]) -> None:
    """Each step over every batch, instrumented alone and dumped under its name (``--steps``)."""
    import gc

    from textsieve.registry.runtime import Predictor

    model = demo_model.ensure_model(lambda *a: None)
    p = Predictor.from_bundle(model.bundle, threads=1, batch_size=inprocess.BATCH)
    texts = bench_texts(n_texts)
    size = inprocess.WORKER_BATCH
    batches = [texts[lo : lo + size] for lo in range(0, len(texts), size)]
    for _ in range(4):  # the encoder learns a text's new chunks a few at a time: all of them
        for t in texts:
            p.encode(t, offsets=True)
    for k in spans_list:
        steps = _steps(p, batches, k)
        for step in STEPS:
            steps[step]()  # warm
        gc.collect()
        gc.freeze()
        for step in STEPS:
            if step == "windows" and k == 0:
                continue  # batch_spans never finds windows for texts with no spans asked for
            callgrind.instrument(True)
            steps[step]()
            callgrind.instrument(False)
            subprocess.run(["callgrind_control", f"--dump={k}:{step}", str(os.getpid())], capture_output=True)


def _steps(p: Any, batches: list[list[str]], k: int) -> dict[str, Callable[[], object]]:
    """Each step of ``_run`` on every batch, ``k`` spans a text, its inputs made ready."""
    from multiprocessing.reduction import ForkingPickler

    import numpy as np
    import orjson

    from textsieve.registry import spans as batch
    from textsieve.service.inference.packing import run_packed
    from textsieve.service.inference.spans import explain
    from textsieve.service.inference.spans import replies as reply_json

    encoded = [[p.encode(t, offsets=k > 0) for t in b] for b in batches]
    outs = [run_packed(p, e) for e in encoded]
    probs = [p.probabilities(o.logits) for o in outs]
    best = [q.argmax(axis=1) for q in probs]
    ks = [np.full(len(b), k) for b in batches]
    lengths = [np.array([len(e.ids) for e in es]) for es in encoded]
    results = [explain(p, e, o, [k] * len(e), probs=q) for e, o, q in zip(encoded, outs, probs, strict=True)]
    replies = [[orjson.dumps(r) for r in rs] for rs in results]
    rows = list(zip(encoded, outs, best, ks, lengths, probs, strict=True))
    tail = (0, 0, 0, bytes(4 * len(batches[0])), bytes(8 * len(batches[0])), None)
    return {
        "encode": lambda: [[p.encode(t, offsets=k > 0) for t in b] for b in batches],
        "graph": lambda: [run_packed(p, e) for e in encoded],
        "probabilities": lambda: [p.probabilities(o.logits) for o in outs],
        "windows": lambda: [batch._windows(p, n, o, b, kk) for _, o, b, kk, n, _ in rows],
        "windows_merged": lambda: [batch._spans(p, e, o, b, kk, lambda *a: []) for e, o, b, kk, _, _ in rows],
        "spans": lambda: [batch.batch_spans(p, e, o, b, kk) for e, o, b, kk, _, _ in rows],
        "explain": lambda: [explain(p, e, o, [k] * len(e), probs=q) for e, o, _, _, _, q in rows],
        "orjson": lambda: [[orjson.dumps(r) for r in rs] for rs in results],
        "replies": lambda: [reply_json(p, e, o, [k] * len(e), q) for e, o, _, _, _, q in rows],
        "pickle": lambda: [ForkingPickler.dumps((r, *tail)) for r in replies],
    }


def count_steps(n_texts: int, spans_list: list[int], out: Path) -> dict[str, dict[int, float]]:
    """Instructions a text of each step (``--steps``), from the dumps callgrind wrote."""
    for old in out.parent.glob(out.name + ".*"):
        old.unlink()
    cmd = callgrind.command(str(out))
    args = [sys.executable, __file__, "--inside-steps", "--texts", str(n_texts), "--spans", *map(str, spans_list)]
    run = subprocess.run([*cmd, *args], env=dict(os.environ), capture_output=True, text=True)
    if run.returncode != 0:
        raise SystemExit(run.stdout + run.stderr[-3000:])
    found: dict[str, dict[int, float]] = {}
    for dump in out.parent.glob(out.name + ".*"):
        body = dump.read_text()
        trigger = re.search(r"^desc: Trigger: .*?dump (\d+):(\w+)", body, re.M)
        total = re.search(r"^totals: (\d+)", body, re.M)
        if trigger and total:
            found.setdefault(trigger.group(2), {})[int(trigger.group(1))] = int(total.group(1)) / n_texts
    return found


def count(n_texts: int, spans: int, out: Path) -> float:
    # Python's own allocator, as a worker has it: with PYTHONMALLOC=malloc (bench/loop_cost.py)
    # each small object's malloc and free cost several times pymalloc's, which weighs code that
    # makes many small objects (spans' dicts, offsets as ints) more than it weighs in a worker.
    args = [sys.executable, __file__, "--inside", "--texts", str(n_texts), "--spans", str(spans)]
    counted = callgrind.collected(args, os.environ, str(out))
    if counted is None:
        raise SystemExit(1)
    return counted / (n_texts * PASSES)


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--texts", type=int, default=1920, help="benchmark texts a pass (batches of 96)")
    parser.add_argument("--spans", type=int, nargs="+", default=[3, 0], help="spans a text, one count each")
    parser.add_argument("--steps", action="store_true", help="count each step of a batch apart")
    parser.add_argument("--inside", action="store_true", help=argparse.SUPPRESS)
    parser.add_argument("--inside-steps", action="store_true", help=argparse.SUPPRESS)
    args = parser.parse_args(argv)
    if args.inside:
        inside(args.texts, args.spans[0])
        return 0
    if args.inside_steps:
        inside_steps(args.texts, args.spans)
        return 0
    if not callgrind.available():
        return 2
    work = demo_model.CACHE / "work"
    work.mkdir(parents=True, exist_ok=True)
    import textsieve

    print(f"textsieve imported from {Path(textsieve.__file__).parent}")
    if args.steps:
        out = work / f"worker-steps-{os.getpid()}.callgrind"
        found = count_steps(args.texts, args.spans, out)
        print(f"instructions a text, step by step ({out}.*)")
        print(f"{'step':<16}" + "".join(f"{'spans ' + str(k):>14}" for k in args.spans))
        for step in STEPS:
            row = found.get(step, {})
            print(f"{step:<16}" + "".join(f"{row[k]:>14,.0f}" if k in row else f"{'-':>14}" for k in args.spans))
        return 0
    per_text = {}
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
