"""Instructions a batch costs on each side of a worker's pipe: the loop pickling a Run, the worker
reading it back, under callgrind.

    PYTHONPATH=<checkout> PYTHONSAFEPATH=1 .venv/bin/python bench/pipe_instructions.py [--texts 16]

``bench/loop_cost.py`` counts the loop's side inside a whole request, whose count moves ~1.5 %
between runs; this counts the pipe alone, on 2,000 batches of the bench's texts (each a fresh
``str``, as a request's are, checked beforehand by the checkout's ``PredictRequest``, which since
2026-12-05 leaves a text's UTF-8 form on it for the pickler), ``workers.pickled`` on the loop's side
and ``ForkingPickler.loads`` (what ``Connection.recv`` does) on the worker's. Run it from two
checkouts to compare them (bench/README.md, "A batch on the pipe", "A text encoded once on the loop").
"""

from __future__ import annotations

import argparse
import gc
import os
import sys
from pathlib import Path

HERE = Path(__file__).resolve().parent
sys.path.insert(0, str(HERE))

import callgrind  # noqa: E402
from texts import bench_texts  # noqa: E402

BATCHES = 2000


def measure(side: str, n: int) -> None:
    """Under callgrind: instrumentation on only while ``side`` handles the batches."""
    from multiprocessing.reduction import ForkingPickler

    from textsieve.service.inference.workers import Run, pickled
    from textsieve.service.web.schemas import PredictRequest

    texts = bench_texts(4000)

    def batches() -> list[Run]:
        starts = [i * n % 3000 for i in range(BATCHES)]
        return [
            Run(("bench", 1, 1), [t.encode().decode() for t in texts[s : s + n]], [3] * n, 0.5, True) for s in starts
        ]

    payloads = [pickled(b) for b in batches()]
    msgs = batches()
    for m in msgs:  # the request schema's check, on these very strs (pydantic keeps a str as it is)
        checked = PredictRequest.model_validate({"texts": m.texts}).texts
        if any(a is not b for a, b in zip(checked, m.texts, strict=True)):
            raise SystemExit("PredictRequest copied the texts: the batch would not hold the checked strs")
    gc.disable()
    callgrind.instrument(True)
    if side == "loop":
        for m in msgs:
            pickled(m)
    else:
        for p in payloads:
            ForkingPickler.loads(p)
    callgrind.instrument(False)


def main() -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--texts", type=int, default=16, help="texts a batch")
    parser.add_argument("--side", choices=["loop", "worker"], help=argparse.SUPPRESS)
    args = parser.parse_args()
    if args.side:
        measure(args.side, args.texts)
        return 0
    if not callgrind.available():
        return 2
    for side in ("loop", "worker"):
        env = os.environ | {"PYTHONMALLOC": "malloc"}
        counted = callgrind.collected([sys.executable, __file__, "--side", side, "--texts", str(args.texts)], env)
        if counted is None:
            return 1
        print(f"{side}: {counted / BATCHES:,.0f} instructions a batch of {args.texts} texts (callgrind)")
    return 0


if __name__ == "__main__":
    sys.exit(main())
