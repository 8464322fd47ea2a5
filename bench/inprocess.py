"""The model's own pipeline without a server: the ceiling any server of this model can reach here.

Layout (the measured best, :class:`Processes`): one process per core, each with one
single-thread onnxruntime session driven by its main thread over its share of the texts; the
processes start each window together and their rates add up. The older layout, one process
with a thread per core (:class:`InProcess` with ``sessions=2``), lets the graphs run in
parallel (``session.run`` releases the GIL) but makes tokenizing and padding take turns on the
GIL: with encoding now about as costly as the graph, it reached only ~0.75 of the processes'
rate (2026-12-02, 31.5–34k against 41.8–42.0k texts/s on the demo model), so ``make bench``
reports it as history (``runtime_threads``) beside the processes.

Variants, all from the same texts:
- ``sorted``: encode 512 texts, sort them by length, run batches of 64 each padded to its own
  longest (``Predictor.run``) — what "runtime" reports. The texts are encoded without their
  tokens' character offsets (``Predictor.encode(text, offsets=False)``): only spans read them, and
  a scorer without spans (``textsieve score``'s default) leaves them out the same way;
- ``sorted_offsets``: the same with every token's offsets, as a server pays for texts that get
  spans (reported as history, ``runtime_with_offsets_vs_graph``);
- ``fixed``: encode 512 texts, run batches of 64 in arrival order, each padded to the model's
  max_length;
- ``graph``: the ``sorted`` batches pre-built, timing ``session.run`` alone;
- ``graph_fixed``: the ``fixed`` batches pre-built, timing ``session.run`` alone.

- ``worker`` and ``worker_no_spans``: a service worker's own work on batches of ``WORKER_BATCH``
  texts (what the server gathers from 16-text requests under load): ``workers._run`` (encode,
  graph, probabilities, each text's reply written as JSON with 3 spans or none, drift counts)
  and the reply pickled for the pipe. A server running this code cannot be faster than this
  rate, whatever its HTTP stack costs: ``service_vs_runtime_ceiling`` in ``make bench``.

``graph`` against ``graph_fixed`` isolates what padding costs: tokenizing is the same work
either way, so the end-to-end pair (``sorted`` against ``fixed``) shows a diluted effect.

``conv_graph`` and ``conv_graph_fixed`` repeat the two graph-only variants on the same run
exported with the convolution layout (the graph the FLOP limit describes), when given.
"""

from __future__ import annotations

import multiprocessing
import threading
import time
from collections.abc import Callable
from multiprocessing.connection import Connection
from pathlib import Path
from typing import Any

import numpy as np

from textsieve.registry.runtime import Encoded, Predictor

BATCH = 64
CHUNK = 512  # texts encoded and sorted together
# Texts in a worker's batch under the bench's 16-text load (the server's textsieve_batch_texts
# histogram: ~100 on average in the runs of 2026-12-02 and 2026-12-04).
WORKER_BATCH = 96
WORKER_SPANS = 3  # bench/run.py's SPANS


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


def sorted_pipeline(p: Predictor, texts: list[str], *, offsets: bool = False) -> Callable[[], int]:
    """Encode a chunk, sort it, run it in batches each padded to its own longest.

    Chunks keep each thread's stretches of Python (which hold the GIL) short, so the other
    thread is not kept waiting between its graph calls; measured a little faster than encoding
    everything first, and it is what a server's batcher does with the texts it has collected.
    """

    def run() -> int:
        for lo in range(0, len(texts), CHUNK):
            p.run([p.encode(t, offsets=offsets) for t in texts[lo : lo + CHUNK]])
        return len(texts)

    return run


def fixed_pipeline(p: Predictor, texts: list[str]) -> Callable[[], int]:
    """The same chunks, batches in arrival order each padded to the model's max_length."""

    def run() -> int:
        for lo in range(0, len(texts), CHUNK):
            encoded = [p.encode(t, offsets=False) for t in texts[lo : lo + CHUNK]]
            for b in range(0, len(encoded), BATCH):
                p.run_arrays(*p.pad(encoded[b : b + BATCH], width=p.max_length))
        return len(texts)

    return run


def worker_pipeline(p: Predictor, texts: list[str], *, spans: int = WORKER_SPANS) -> Callable[[], int]:
    """A service worker's batches (``workers._run`` and the reply's pickling), ``spans`` spans a text."""
    from multiprocessing.reduction import ForkingPickler

    from textsieve.registry.drift import Layout
    from textsieve.service.inference.workers import Run, _run

    layout = Layout.of(len(p.labels))
    runs = [
        Run(("bench", 1), texts[lo : lo + WORKER_BATCH], [spans] * len(texts[lo : lo + WORKER_BATCH]), None, True)
        for lo in range(0, len(texts), WORKER_BATCH)
    ]

    def run() -> int:
        for msg in runs:
            ForkingPickler.dumps(_run(p, layout, msg))
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
    """The variants prepared once; ``window`` measures one of them for a while.

    ``only_sorted`` keeps just the ``sorted`` variant (no texts encoded ahead for the graph-only ones);
    ``warm=False`` leaves the encoder's caches as cold as a first pass finds them.
    """

    def __init__(
        self,
        bundle: Path,
        texts: list[str],
        sessions: int = 2,
        conv_bundle: Path | None = None,
        *,
        warm: bool = True,
        only_sorted: bool = False,
    ) -> None:
        self.predictors = load(bundle, sessions)
        parts = _halves(texts, sessions)
        makers: dict[str, Callable[[Predictor, list[str]], Callable[[], int]]] = {
            "sorted": sorted_pipeline,
            "sorted_offsets": lambda p, t: sorted_pipeline(p, t, offsets=True),
            "fixed": fixed_pipeline,
            "graph": graph_only,
            "graph_fixed": lambda p, t: graph_only(p, t, fixed=True),
            "worker": worker_pipeline,
            "worker_no_spans": lambda p, t: worker_pipeline(p, t, spans=0),
        }
        if only_sorted:
            makers = {"sorted": sorted_pipeline}
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
        if warm:
            for work in self.work.values():
                for w in work:
                    w()  # the first runs of a new shape allocate

    def window(self, variant: str, seconds: float) -> dict[str, float]:
        rate, cpu = _parallel(self.work[variant], seconds)
        return {"texts_per_s": rate, "cpu_s_per_1k_texts": cpu}

    def once(self, variant: str = "sorted") -> float:
        """Seconds for one pass of ``variant`` over the texts, the sessions' threads in parallel."""
        threads = [threading.Thread(target=w) for w in self.work[variant]]
        started = time.perf_counter()
        for t in threads:
            t.start()
        for t in threads:
            t.join()
        return time.perf_counter() - started


def _child(
    bundle: str,
    texts: list[str],
    conv_bundle: str | None,
    conn: Connection,
    barrier: Any,
    options: dict[str, bool],
) -> None:
    """One process of :class:`Processes`: a one-session :class:`InProcess`, run on command."""
    try:
        conv = Path(conv_bundle) if conv_bundle else None
        one = InProcess(Path(bundle), texts, sessions=1, conv_bundle=conv, **options)
    except BaseException as exc:  # noqa: BLE001 - reported to the parent, which raises it
        conn.send(("error", repr(exc)))
        return
    conn.send(("ready", None))
    while True:
        msg = conn.recv()
        if msg is None:
            return
        kind, variant, seconds = msg
        barrier.wait()
        try:
            conn.send(("done", one.window(variant, seconds) if kind == "window" else one.once(variant)))
        except Exception as exc:  # noqa: BLE001 - reported to the parent, which raises it
            conn.send(("error", repr(exc)))


class Processes:
    """The variants of :class:`InProcess` in ``sessions`` processes, one session each, run together.

    Each process gets every ``sessions``-th text (as the threads of :class:`InProcess` do); a
    window starts in all of them at once (a barrier) and the rates add up; CPU per 1,000 texts
    is the processes' CPU over their texts. ``warm`` and ``only_sorted`` are passed on to each
    process's :class:`InProcess` (cold and sorted only: a one-pass figure, :meth:`once`, that
    pays what a first pass pays).
    """

    def __init__(
        self,
        bundle: Path,
        texts: list[str],
        sessions: int = 2,
        conv_bundle: Path | None = None,
        *,
        warm: bool = True,
        only_sorted: bool = False,
    ) -> None:
        options = {"warm": warm, "only_sorted": only_sorted}
        ctx = multiprocessing.get_context("spawn")  # nothing inherited: each process loads its own session
        barrier = ctx.Barrier(sessions)
        self.conns: list[Connection] = []
        self.procs = []
        for i in range(sessions):
            ours, theirs = ctx.Pipe()
            proc = ctx.Process(
                target=_child,
                args=(str(bundle), texts[i::sessions], conv_bundle and str(conv_bundle), theirs, barrier, options),
                daemon=True,
            )
            proc.start()
            theirs.close()
            self.conns.append(ours)
            self.procs.append(proc)
        for conn in self.conns:
            kind, detail = conn.recv()
            if kind != "ready":
                self.close()
                raise RuntimeError(f"a runtime process could not start: {detail}")

    def _all(self, kind: str, variant: str, seconds: float) -> list[Any]:
        for conn in self.conns:
            conn.send((kind, variant, seconds))
        replies = [conn.recv() for conn in self.conns]
        failed = [detail for status, detail in replies if status != "done"]
        if failed:
            raise RuntimeError(f"a runtime process failed: {failed[0]}")
        return [detail for _, detail in replies]

    def window(self, variant: str, seconds: float) -> dict[str, float]:
        parts = self._all("window", variant, seconds)
        rate = sum(p["texts_per_s"] for p in parts)
        # Each process's CPU per text, weighted by its share of the texts done in the window.
        cpu = sum(p["cpu_s_per_1k_texts"] * p["texts_per_s"] for p in parts) / rate
        return {"texts_per_s": rate, "cpu_s_per_1k_texts": cpu}

    def once(self, variant: str = "sorted") -> float:
        """Seconds until every process has made one pass of ``variant`` over its texts."""
        return float(max(self._all("once", variant, 0.0)))

    def close(self) -> None:
        for conn in self.conns:
            try:
                conn.send(None)
            except OSError:
                pass
        for proc in self.procs:
            proc.join(timeout=10)
            if proc.is_alive():
                proc.kill()

    def __enter__(self) -> Processes:
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()


__all__ = ["BATCH", "WORKER_BATCH", "InProcess", "Processes", "load"]
