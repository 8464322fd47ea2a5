"""Two packing settings side by side: a worker's CPU per text for batches of a given size.

    .venv/bin/python bench/packing_ab.py --a 4 --b 24 [--sizes 4 8 16 32 64 128] [--rounds 20]

Runs in one process, no server: the worker's whole batch (``workers._run``: encode, the packed
onnxruntime calls, probabilities, spans, drift counts, each reply's JSON) on the demo model,
batches of ``--sizes`` consecutive bench texts, 3 spans each. ``--a``/``--b`` are values of
``packing.MIN_TEXTS`` (the fewest texts a sub-batch keeps; a batch of at most that many runs as
one call). Each round times every batch with one setting and then the other (the order
alternates), in this process's CPU time; the ratio b/a is of the summed rounds. A size at or
below both settings runs the same code either way: its ratio shows the noise.
"""

from __future__ import annotations

import argparse
import sys
import time
from pathlib import Path

HERE = Path(__file__).resolve().parent
sys.path.insert(0, str(HERE))

import demo_model  # noqa: E402
from texts import bench_texts  # noqa: E402

from textsieve.registry.bundle import open_bundle  # noqa: E402
from textsieve.registry.drift import Layout  # noqa: E402
from textsieve.registry.runtime import Predictor  # noqa: E402
from textsieve.service.inference import packing  # noqa: E402
from textsieve.service.inference.workers import Run, _run  # noqa: E402

SPANS = 3


def main() -> int:
    p = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    p.add_argument("--a", type=int, default=packing.MIN_TEXTS, help="MIN_TEXTS of side a")
    p.add_argument("--b", type=int, required=True, help="MIN_TEXTS of side b")
    p.add_argument("--sizes", type=int, nargs="+", default=[4, 8, 16, 32, 64, 128], help="texts per batch")
    p.add_argument("--rounds", type=int, default=20)
    args = p.parse_args()
    model = demo_model.ensure_model()
    checked = open_bundle(model.bundle, check_onnx=False)
    predictor = Predictor.from_bundle(checked, threads=1, batch_size=64)
    layout = Layout.of(len(checked.manifest.labels), checked.manifest.drift)
    texts = bench_texts(4096)
    for t in texts:  # warm the encoder's caches for both sides alike
        predictor.encode(t)
    print(f"MIN_TEXTS a={args.a} b={args.b}; {args.rounds} alternating rounds; worker CPU µs per text")
    print(f"{'texts/batch':>11}  {'a':>8}  {'b':>8}  {'b/a':>6}")
    for k in args.sizes:
        batches = [
            Run(("bench", 1, 1), texts[lo : lo + k], [SPANS] * k, review=0.5, drift=True)
            for lo in range(0, len(texts) - k + 1, k)
        ]
        spent = {args.a: 0.0, args.b: 0.0}
        for r in range(args.rounds):
            for setting in (args.a, args.b) if r % 2 else (args.b, args.a):
                packing.MIN_TEXTS = setting
                started = time.process_time()
                for batch in batches:
                    _run(predictor, layout, batch)
                spent[setting] += time.process_time() - started
        per_text = {s: v / (len(batches) * k * args.rounds) * 1e6 for s, v in spent.items()}
        print(f"{k:>11}  {per_text[args.a]:8.1f}  {per_text[args.b]:8.1f}  {spent[args.b] / spent[args.a]:6.3f}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
