"""onnxruntime in-process: the ceiling any server of this model can reach on this machine.

Layout (the design's measured best): one single-thread session per core, each driven by its
own Python thread; ``session.run`` releases the GIL, so the threads compute in parallel and
only tokenizing and padding take turns on the GIL. Each thread gets half the texts.

Variants, all from the same texts:
- ``sorted``: encode 512 texts, sort them by length, run batches of 64 each padded to its own
  longest (``Predictor.run``) — what "runtime" reports;
- ``fixed``: encode 512 texts, run batches of 64 in arrival order, each padded to the model's
  max_length;
- ``graph``: the ``sorted`` batches pre-built, timing ``session.run`` alone;
- ``graph_fixed``: the ``fixed`` batches pre-built, timing ``session.run`` alone.

``graph`` against ``graph_fixed`` isolates what padding costs: tokenizing is the same work
either way, so the end-to-end pair (``sorted`` against ``fixed``) shows a diluted effect.

``conv_graph`` and ``conv_graph_fixed`` repeat the two graph-only variants on the same run
exported with the convolution layout (the graph the FLOP limit describes), when given.
"""

from __future__ import annotations

import threading
import time
from collections.abc import Callable
from pathlib import Path

import numpy as np

from textsieve.registry.runtime import Encoded, Predictor

BATCH = 64
CHUNK = 512  # texts encoded and sorted together


def load(bundle: Path, sessions: int = 2) -> list[Predictor]:
    return [Predictor.from_bundle(bundle, threads=1, batch_size=BATCH) for _ in range(sessions)]


def _parallel(work: list[Callable[[], int]], min_seconds: float) -> tuple[float, float]:
    """Run each callable on its own thread, repeatedly, for ``min_seconds``.

    Returns (items per second, this process's CPU seconds per 1,000 items).
    """
    barrier = threading.Barrier(len(work) + 1)
    done = [0] * len(work)
    stop = threading.Event()

    def loop(i: int) -> None:
        barrier.wait()
        while not stop.is_set():
            done[i] += work[i]()

    threads = [threading.Thread(target=loop, args=(i,)) for i in range(len(work))]
    for t in threads:
        t.start()
    barrier.wait()
    started, cpu = time.perf_counter(), time.process_time()
    time.sleep(min_seconds)
    stop.set()
    for t in threads:
        t.join()
    wall, cpu = time.perf_counter() - started, time.process_time() - cpu
    return sum(done) / wall, 1000 * cpu / max(sum(done), 1)


def _halves(texts: list[str], parts: int) -> list[list[str]]:
    return [texts[i::parts] for i in range(parts)]


def sorted_pipeline(p: Predictor, texts: list[str]) -> Callable[[], int]:
    """Encode a chunk, sort it, run it in batches each padded to its own longest.

    Chunks keep each thread's stretches of Python (which hold the GIL) short, so the other
    thread is not kept waiting between its graph calls; measured a little faster than encoding
    everything first, and it is what a server's batcher does with the texts it has collected.
    """

    def run() -> int:
        for lo in range(0, len(texts), CHUNK):
            p.run([p.encode(t) for t in texts[lo : lo + CHUNK]])
        return len(texts)

    return run


def fixed_pipeline(p: Predictor, texts: list[str]) -> Callable[[], int]:
    """The same chunks, batches in arrival order each padded to the model's max_length."""

    def run() -> int:
        for lo in range(0, len(texts), CHUNK):
            encoded = [p.encode(t) for t in texts[lo : lo + CHUNK]]
            for b in range(0, len(encoded), BATCH):
                p.run_arrays(*p.pad(encoded[b : b + BATCH], width=p.max_length))
        return len(texts)

    return run


def graph_only(p: Predictor, texts: list[str], *, fixed: bool = False) -> Callable[[], int]:
    encoded: list[Encoded] = [p.encode(t) for t in texts]
    if fixed:
        batches = [p.pad(encoded[lo : lo + BATCH], width=p.max_length) for lo in range(0, len(encoded), BATCH)]
    else:
        order = np.argsort([len(e.ids) for e in encoded], kind="stable")
        batches = [p.pad([encoded[i] for i in order[lo : lo + BATCH]]) for lo in range(0, len(order), BATCH)]

    def run() -> int:
        for ids, lengths in batches:
            p.run_arrays(ids, lengths)
        return len(texts)

    return run


class InProcess:
    """The four variants prepared once; ``window`` measures one of them for a while."""

    def __init__(self, bundle: Path, texts: list[str], sessions: int = 2, conv_bundle: Path | None = None) -> None:
        self.predictors = load(bundle, sessions)
        parts = _halves(texts, sessions)
        makers: dict[str, Callable[[Predictor, list[str]], Callable[[], int]]] = {
            "sorted": sorted_pipeline,
            "fixed": fixed_pipeline,
            "graph": graph_only,
            "graph_fixed": lambda p, t: graph_only(p, t, fixed=True),
        }
        self.work = {
            name: [make(p, part) for p, part in zip(self.predictors, parts, strict=True)]
            for name, make in makers.items()
        }
        if conv_bundle is not None:
            conv = load(conv_bundle, sessions)
            self.work["conv_graph"] = [graph_only(p, part) for p, part in zip(conv, parts, strict=True)]
            self.work["conv_graph_fixed"] = [
                graph_only(p, part, fixed=True) for p, part in zip(conv, parts, strict=True)
            ]
        for work in self.work.values():
            for w in work:
                w()  # warm: the first runs of a new shape allocate

    def window(self, variant: str, seconds: float) -> dict[str, float]:
        rate, cpu = _parallel(self.work[variant], seconds)
        return {"texts_per_s": rate, "cpu_s_per_1k_texts": cpu}


__all__ = ["BATCH", "InProcess", "load"]
