"""What each step of a worker's batch costs per text, in-process, side by side in one run.

    .venv/bin/python bench/worker_cost.py [--sizes 16 128] [--texts 8192] [--rounds 3]

A worker process (textsieve/service/inference/workers.py, ``_run``) takes a batch of texts and
does, in order: encode them (tokenizer and vocabulary), run the graph on length-sorted
sub-batches (``run_packed``), calibrated probabilities, the reply dicts with their spans
(``explain``), each reply serialised (orjson), the whole reply pickled for the pipe. Here the
same functions run on the benchmark's texts cut into batches of each size, each step timed
apart; each figure is the fastest of ``--rounds`` passes (the machine's noise only adds). The
runtime's own work per text (``bench/inprocess.py``, ``sorted``: encode, pad, graph on batches
sorted over the whole set) is measured beside them: what a server without spans and replies
pays at best, the ceiling ``service_vs_runtime`` divides by.
"""

from __future__ import annotations

import argparse
import sys
import time
from pathlib import Path

HERE = Path(__file__).resolve().parent
sys.path.insert(0, str(HERE))

import demo_model  # noqa: E402
import inprocess  # noqa: E402
from run import SPANS  # noqa: E402
from texts import bench_texts  # noqa: E402

STEPS = ("encode", "graph", "probabilities", "spans_and_dicts", "orjson", "pickle")


def measure(sizes: list[int], n_texts: int, rounds: int) -> dict[str, dict[str, float]]:
    from multiprocessing.reduction import ForkingPickler

    import orjson

    from textsieve.registry.runtime import Predictor
    from textsieve.service.inference.packing import run_packed
    from textsieve.service.inference.spans import explain

    model = demo_model.ensure_model(lambda *a: None)
    p = Predictor.from_bundle(model.bundle, threads=1, batch_size=128)
    texts = bench_texts(n_texts)
    out: dict[str, dict[str, float]] = {}
    for size in sizes:
        batches = [texts[i : i + size] for i in range(0, len(texts) - size + 1, size)]
        n = len(batches) * size
        best = dict.fromkeys(STEPS, float("inf"))
        for _ in range(rounds):
            spent = dict.fromkeys(STEPS, 0.0)
            for batch in batches:
                t0 = time.perf_counter()
                enc = [p.encode(t) for t in batch]
                t1 = time.perf_counter()
                res = run_packed(p, enc)
                t2 = time.perf_counter()
                probs = p.probabilities(res.logits)
                t3 = time.perf_counter()
                results = explain(p, enc, res, [SPANS] * len(batch), probs=probs)
                t4 = time.perf_counter()
                replies = [orjson.dumps(r) for r in results]
                t5 = time.perf_counter()
                ForkingPickler.dumps((0, (replies, 0, 0, 0, bytes(4 * size), bytes(8 * size), None)))
                t6 = time.perf_counter()
                for step, a, b in zip(STEPS, (t0, t1, t2, t3, t4, t5), (t1, t2, t3, t4, t5, t6), strict=True):
                    spent[step] += b - a
            for step in STEPS:
                best[step] = min(best[step], spent[step] / n * 1e6)
        best["total"] = sum(best[s] for s in STEPS)
        out[f"batch_{size}"] = best
    runtime = inprocess.InProcess(model.bundle, texts, sessions=1, only_sorted=True)
    per_text = min(1e6 / runtime.window("sorted", 1.5)["texts_per_s"] for _ in range(rounds))
    out["runtime_sorted"] = {"total": per_text}
    return out


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--sizes", type=int, nargs="+", default=[16, 128], help="texts per batch")
    parser.add_argument("--texts", type=int, default=8192, help="benchmark texts to use")
    parser.add_argument("--rounds", type=int, default=3, help="passes; the fastest of each step is kept")
    args = parser.parse_args(argv)
    figures = measure(args.sizes, args.texts, args.rounds)
    print(f"{'µs per text':<16}" + "".join(f"{s:>17}" for s in (*STEPS, "total")))
    for name, row in figures.items():
        print(f"{name:<16}" + "".join(f"{row[s]:>17.2f}" if s in row else f"{'':>17}" for s in (*STEPS, "total")))
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
