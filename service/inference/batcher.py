"""Dynamic micro-batching: texts from concurrent requests share onnxruntime calls.

Threading model. With ``inference=processes`` (the default) the collector hands each batch
from the event loop to the least busy worker process (while the loop is busy, to the first with
room: :meth:`InferencePool._adapt`) and the worker's reply comes back to the
loop (:mod:`textsieve.service.inference.workers`), with no inference thread in between: every
hand-over between threads waits its turn for the GIL behind whatever the loop is running, which
cost single-text requests most of their latency. With ``inference=threads``, ``workers``
inference threads (default: one per core) each own one single-thread onnxruntime session of every
loaded version and do all of a batch's work themselves; onnxruntime releases the GIL inside
``session.run``, but tokenizing and building replies take turns with the event loop on the GIL.
At most ``workers`` × 2 batches are in flight with processes (one computing and one waiting in
each worker's pipe), ``workers`` with threads.

Dispatch. A batch's worth of texts is the recently admitted texts shared out over the workers
(:meth:`Batcher._target`). When a request's texts make the queue reach it and a slot is free,
the batch leaves at once from that request's own task. Otherwise each served version's collector
task on the event loop waits for a free slot, then for the queue to reach the target, or
``batch_wait_ms`` after the oldest text arrived, whichever comes first, and takes queued texts
in arrival order, up to ``batch_max_texts``. Under load the wait for a free slot is what fills
batches; the explicit wait only matters when workers are idle, so it is short (0.1 ms unless
set; bench/README.md, "The batch wait"). The worker encodes the batch,
sorts it by length and runs it as sub-batches each padded only to its own longest text
(:mod:`textsieve.service.inference.packing`), and builds the reply dicts, so the event loop only
routes finished results. Graph outputs are masked, so a text's result does not depend on its
batch neighbours.

A request none of whose texts is in a batch yet is dropped when it comes up in the queue if its
deadline has passed, or if its client has gone (the connection layer marks its scope,
``CLIENT_LEFT``): nothing is computed for nobody, and its admitted texts are given back. A batch
already sent is computed whole (nothing interrupts a worker), as is the rest of a request that
has texts in one.
"""

from __future__ import annotations

import asyncio
import contextlib
import functools
import itertools
import math
import threading
import time
from collections import deque
from collections.abc import Mapping
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass
from typing import Any

import numpy as np
import orjson
from numpy.typing import NDArray

from textsieve.errors import ClientGoneError, DeadlinePassedError, UnavailableError
from textsieve.registry.drift import count_encoded
from textsieve.service.inference.admission import CLIENT_LEFT, Admission
from textsieve.service.inference.packing import run_packed
from textsieve.service.inference.spans import replies
from textsieve.service.inference.workers import PIPELINE, WorkerProcesses
from textsieve.service.modelset.loader import ServedModel
from textsieve.service.telemetry import ServiceMetrics

Result = orjson.Fragment  # a text's result as JSON (service/inference/spans.py replies), embedded as it is
# Fair order: each pass over the queue takes at most this many texts from a request before the
# next request's turn, so one large request does not hold many small ones behind it.
QUANTUM = 16
# TEXTSIEVE_WORKER_SCHEDULING=adaptive: every ADAPT_SECONDS the event loop's own CPU share over
# the last interval decides; at BUSY_ON of a core or more the workers go under SCHED_BATCH, at
# BUSY_OFF or less back to the normal policy (in between, as they were). bench/README.md, "Workers
# as batch work, when the loop is busy".
ADAPT_SECONDS = 0.25
BUSY_ON = 0.6
BUSY_OFF = 0.45


class InferencePool:
    """``workers`` threads; thread i only ever uses session i of a version, or worker process i."""

    def __init__(
        self, workers: int, mode: str = "threads", *, queue_wait_ms: float = 250.0, worker_scheduling: str = "normal"
    ) -> None:
        self.workers = workers
        self.mode = mode
        try:  # the loop the pool is made on reads the workers' replies (see WorkerProcesses)
            loop: asyncio.AbstractEventLoop | None = asyncio.get_running_loop()
        except RuntimeError:
            loop = None
        self.procs = WorkerProcesses(workers, loop, scheduling=worker_scheduling) if mode == "processes" else None
        # With processes, two threads (two batches in flight) per worker: the next batch waits
        # in the worker's pipe while it computes the current one (see procs._Worker).
        self.threads = workers * (PIPELINE if self.procs is not None else 1)
        self._local = threading.local()
        self._numbers = itertools.count()
        self._executor = ThreadPoolExecutor(
            self.threads, thread_name_prefix="textsieve-infer", initializer=self._name_thread
        )
        self._slots: asyncio.Semaphore | None = None
        self.admission = Admission(max_wait_seconds=queue_wait_ms / 1000.0, threads=self.threads)
        # The worker processes' policy now ("normal" or "batch"), and how often "adaptive" changed it.
        self.scheduling = "batch" if worker_scheduling == "batch" else "normal"
        self.scheduling_switches = 0
        self._adapting: asyncio.TimerHandle | None = None  # touched on the loop only
        self._adapt_loop = loop
        self._adapt_stopped = False
        self._mark = (time.monotonic(), time.thread_time())
        self._placed: list[int] = []  # the worker pids the policy was last applied to
        if self.procs is not None and worker_scheduling == "adaptive" and loop is not None:
            self._adapting = loop.call_later(ADAPT_SECONDS, self._adapt, loop)

    def _adapt(self, loop: asyncio.AbstractEventLoop) -> None:
        """On the event loop, every ADAPT_SECONDS: while the loop itself is busy, the workers run
        under SCHED_BATCH and batches gather on the first worker with room (``procs.gather``, the
        whole queue a batch); when it is not, the normal policy and the least busy worker.

        A worker woken by a batch otherwise often takes the loop's core at once; near capacity the
        loop (which reads, batches and answers every request) is worth more on its core, while at
        light load the worker should start at once (bench/README.md, "Workers as batch work"). A
        busy loop is also when small requests make small batches, whose fixed cost weighs most:
        one worker taking larger batches pays it less often and keeps its caches warm, and the
        next worker takes a batch as soon as the first has one computing and one waiting
        (bench/README.md, "Gathering batches on one worker"). The loop's own CPU time over the
        last interval tells which case this is, for one clock read."""
        assert self.procs is not None
        if self._adapt_stopped:
            self._adapting = None
            return
        wall, cpu = time.monotonic(), time.thread_time()  # thread_time: the loop's thread only
        share = (cpu - self._mark[1]) / max(wall - self._mark[0], 1e-6)
        self._mark = (wall, cpu)
        want = "batch" if share >= BUSY_ON else "normal" if share <= BUSY_OFF else self.scheduling
        pids = self.procs.pids()
        if want != self.scheduling:
            self.scheduling = want
            self.scheduling_switches += 1
            self.procs.set_scheduling(want)
            self.procs.gather = want == "batch"
        elif pids != self._placed:  # a worker was replaced meanwhile: it may have started as it was
            self.procs.set_scheduling(want)
        self._placed = pids
        self._adapting = loop.call_later(ADAPT_SECONDS, self._adapt, loop)

    def sharing(self) -> int:
        """Over how many workers the queued texts are shared out (:meth:`Batcher._target`): all of
        them, except while the workers gather on the first with room (``adaptive``, the loop busy)."""
        return 1 if self.procs is not None and self.procs.gather else self.workers

    def _name_thread(self) -> None:
        self._local.index = next(self._numbers)

    def index(self) -> int:
        return int(self._local.index)

    @property
    def slots(self) -> asyncio.Semaphore:
        if self._slots is None:  # created lazily so it binds to the running loop
            self._slots = asyncio.Semaphore(self.threads)
        return self._slots

    @property
    def executor(self) -> ThreadPoolExecutor:
        return self._executor

    def _stop_adapting(self) -> None:  # on the loop: its timer handles are not thread-safe (uvloop's)
        if self._adapting is not None:
            self._adapting.cancel()
            self._adapting = None

    def shutdown(self) -> None:
        """Stop the workers (blocking: the server calls it off the event loop)."""
        self._adapt_stopped = True  # the timer does not re-arm, wherever this is called from
        loop = self._adapt_loop
        if loop is not None:
            try:
                on_loop = asyncio.get_running_loop() is loop
            except RuntimeError:
                on_loop = False
            if on_loop:
                self._stop_adapting()
            else:
                with contextlib.suppress(RuntimeError):  # the loop has closed: its timers went with it
                    loop.call_soon_threadsafe(self._stop_adapting)
        self._executor.shutdown(wait=True, cancel_futures=True)
        if self.procs is not None:
            self.procs.shutdown()


@dataclass(eq=False, slots=True)
class _Job:
    texts: list[str]
    spans: int
    future: asyncio.Future[list[Result]]
    enqueued: float
    results: list[Result | None]
    taken: int = 0
    pending: int = 0
    deadline: float | None = None  # perf_counter time from the caller's Textsieve-Deadline header
    watch: Mapping[str, Any] | None = None  # the request's scope: CLIENT_LEFT in it once its client has gone
    scores: LiveScores | None = None  # kept only for requests sampled for shadow scoring


@dataclass(slots=True)
class LiveScores:
    """Each text's label index and calibrated probability of that label (what shadow scoring compares)."""

    best: NDArray[np.int32]
    top: NDArray[np.float64]

    @classmethod
    def empty(cls, n: int) -> LiveScores:
        return cls(np.zeros(n, dtype=np.int32), np.zeros(n, dtype=np.float64))


@dataclass(slots=True)
class _Piece:
    job: _Job
    lo: int
    hi: int


@dataclass(slots=True)
class _Done:
    results: list[Result]
    started: float
    seconds: float
    tokens: int = 0
    unknown: int = 0
    truncated: int = 0
    best: Any = None  # per text, in batch order: label index and its probability
    top: Any = None
    counts: Any = None  # drift counts of the batch, when asked for


class Batcher:
    """The queue and collector of one served version."""

    def __init__(
        self, served: ServedModel, pool: InferencePool, metrics: ServiceMetrics, *, max_texts: int, wait_ms: float
    ) -> None:
        self.served = served
        self.pool = pool
        self.max_texts = max_texts
        self.wait = wait_ms / 1000.0
        self.metrics = metrics.for_version(served.name, served.version)  # children resolved once, not per batch
        self._queue: deque[_Job] = deque()
        self._untaken = 0  # texts queued and not yet taken into a batch
        self._wakeup = asyncio.Event()
        self._task: asyncio.Task[None] | None = None
        self._inflight: set[asyncio.Future[_Done]] = set()

    def start(self) -> None:
        self._task = asyncio.get_running_loop().create_task(
            self._collect(), name=f"batcher {self.served.name} v{self.served.version}"
        )

    async def submit(self, texts: list[str], spans: int, *, deadline: float | None = None) -> list[Result]:
        """Queue ``texts`` and wait for their results; refused at once when the replica is full."""
        return (await self.run(texts, spans, deadline, keep_scores=False))[0]

    async def submit_scored(
        self, texts: list[str], spans: int, *, deadline: float | None = None
    ) -> tuple[list[Result], LiveScores]:
        """:meth:`submit`, plus each text's label index and probability (for shadow scoring)."""
        results, scores = await self.run(texts, spans, deadline, keep_scores=True)
        assert scores is not None
        return results, scores

    async def run(
        self,
        texts: list[str],
        spans: int,
        deadline: float | None,
        *,
        keep_scores: bool,
        watch: Mapping[str, Any] | None = None,
    ) -> tuple[list[Result], LiveScores | None]:
        """:meth:`submit` (``keep_scores`` False: the scores are None) or :meth:`submit_scored` in one
        coroutine: the predict route awaits this directly, one coroutine fewer a request on the loop.
        ``watch`` is the request's ASGI scope: if its client leaves (CLIENT_LEFT) before any of its
        texts went into a batch, they are dropped uncomputed (ClientGoneError)."""
        if self._task is None or self._task.done():
            raise UnavailableError(f"model {self.served.name} version {self.served.version} is not accepting work")
        admission = self.pool.admission
        admission.check_deadline(deadline)
        admission.admit(len(texts))
        try:
            loop = asyncio.get_running_loop()
            job = _Job(texts, spans, loop.create_future(), time.perf_counter(), [None] * len(texts), 0, len(texts))
            job.deadline, job.watch = deadline, watch
            if keep_scores:
                job.scores = LiveScores.empty(len(texts))
            self._queue.append(job)
            self._untaken += len(texts)
            # Enough texts for a batch and a slot free: it leaves now, from this request's task,
            # rather than when the collector's turn on the loop comes (after every request that
            # arrived in the same burst): the workers start while the loop still reads requests.
            while self._untaken >= self._target() and not self.pool.slots.locked():
                await self._dispatch_now()
            if self._queue:  # what is left: the collector's
                self._wakeup.set()
            return await job.future, job.scores
        finally:
            admission.finished(len(texts))

    def _dropped(self, job: _Job, now: float) -> Exception | None:
        """Why a request none of whose texts is in a batch yet is answered without computing, or None:
        its deadline passed while it was queued, or its client has gone (nobody would read its reply)."""
        admission = self.pool.admission
        try:
            admission.check_deadline(job.deadline, now)
        except DeadlinePassedError as exc:
            return exc
        if job.watch is not None and CLIENT_LEFT in job.watch:
            admission.client_left += 1
            return ClientGoneError("the client went away before inference started; nothing was computed")
        return None

    def _take(self, room: int) -> list[_Piece]:
        """Up to ``room`` texts, QUANTUM per request per turn, requests taking turns in arrival order."""
        pieces: list[_Piece] = []
        now = time.perf_counter()
        while room > 0 and self._queue:
            job = self._queue.popleft()
            if job.taken == 0:
                dropped = self._dropped(job, now)
                if dropped is not None:  # answered without computing
                    self._untaken -= len(job.texts)
                    if not job.future.done():
                        job.future.set_exception(dropped)
                    continue
            hi = min(len(job.texts), job.taken + min(room, QUANTUM))
            pieces.append(_Piece(job, job.taken, hi))
            room -= hi - job.taken
            self._untaken -= hi - job.taken
            job.taken = hi
            if hi < len(job.texts):
                self._queue.append(job)  # its next turn comes after the requests behind it
        return pieces

    def _target(self) -> int:
        """Texts worth a batch now: the texts recently admitted, shared out over the worker
        processes (or inference threads; all to one while they gather, see
        :meth:`InferencePool._adapt`), at least 1 and at most ``max_texts``.

        Under a closed loop of N single-text callers, about N/workers texts go per batch: while the
        workers compute one group, the event loop answers the previous group and reads the next
        requests, instead of the whole crowd travelling as one batch (loop and workers then take
        turns, each idle while the other works: bench/README.md). One caller alone waits for no one.
        """
        mean = self.pool.admission.mean_queued
        return max(1, min(self.max_texts, math.ceil(mean / self.pool.sharing())))

    async def _collect(self) -> None:
        """Batches whose texts did not reach :meth:`_target` on arrival (see :meth:`_submit`): once a
        slot is free, the queued texts go when they reach the target, or ``wait`` after the oldest
        arrived, whichever comes first."""
        slots = self.pool.slots
        while True:
            while not self._queue:
                self._wakeup.clear()
                await self._wakeup.wait()
            await slots.acquire()
            pieces: list[_Piece] = []
            try:
                while self._queue and self._untaken < self._target():
                    left = self._queue[0].enqueued + self.wait - time.perf_counter()
                    if left <= 0:
                        break
                    self._wakeup.clear()
                    try:
                        await asyncio.wait_for(self._wakeup.wait(), left)
                    except TimeoutError:
                        break
                pieces = self._take(self.max_texts)
                if not pieces:  # a request's own dispatch took them meanwhile
                    slots.release()
                    continue
                self._dispatch(pieces)
            except BaseException:  # cancelled at shutdown: texts already taken must not hang
                slots.release()
                for p in pieces:
                    if not p.job.future.done():
                        p.job.future.set_exception(UnavailableError("the service is shutting down"))
                raise

    async def _dispatch_now(self) -> None:
        """Take a free slot (the caller saw one: this does not wait) and send the queue's texts."""
        slots = self.pool.slots
        await slots.acquire()
        pieces = self._take(self.max_texts)
        if not pieces:  # their deadlines passed
            slots.release()
            return
        try:
            self._dispatch(pieces)
        except BaseException:
            slots.release()
            raise

    def _dispatch(self, pieces: list[_Piece]) -> None:
        """Send ``pieces`` as one batch (a slot is already held for it); ``_finish`` routes the results."""
        texts = [t for p in pieces for t in p.job.texts[p.lo : p.hi]]
        ks = [p.job.spans for p in pieces for _ in range(p.hi - p.lo)]
        fut: asyncio.Future[_Done]
        loop = asyncio.get_running_loop()
        if self.pool.procs is not None and self.served.worker_key is not None:
            fut = loop.create_task(self._work_in_process(texts, ks))
        else:
            fut = loop.run_in_executor(self.pool.executor, self._work, texts, ks)
        self._inflight.add(fut)
        fut.add_done_callback(functools.partial(self._finish, pieces=pieces))

    async def _work_in_process(self, texts: list[str], ks: list[int]) -> _Done:
        """On the event loop: the batch goes to a worker process and its reply comes back here,
        with no inference thread in between (see WorkerProcesses.run_async)."""
        procs, key = self.pool.procs, self.served.worker_key
        assert procs is not None and key is not None
        window = self.served.window
        started = time.perf_counter()
        results, tokens, unknown, truncated, best, top, counts = await procs.run_async(
            key, texts, ks, self.served.review_threshold, drift=window is not None, executor=self.pool.executor
        )
        seconds = time.perf_counter() - started
        return _Done(results, started, seconds, tokens, unknown, truncated, best, top, counts)

    def _work(self, texts: list[str], ks: list[int]) -> _Done:
        """On an inference thread: encode, run, explain, build reply dicts (here or in its process)."""
        started = time.perf_counter()
        procs = self.pool.procs
        key = self.served.worker_key
        review = self.served.review_threshold
        window = self.served.window
        if procs is not None and key is not None:
            results, tokens, unknown, truncated, best, top, counts = procs.run(
                self.pool.index(), key, texts, ks, review, drift=window is not None
            )
            seconds = time.perf_counter() - started
            return _Done(results, started, seconds, tokens, unknown, truncated, best, top, counts)
        p = self.served.predictors[self.pool.index()]
        encoded = [p.encode(t, offsets=k > 0) for t, k in zip(texts, ks, strict=True)]
        out = run_packed(p, encoded)
        probs = p.probabilities(out.logits)
        results = [orjson.Fragment(r) for r in replies(p, encoded, out, ks, probs, review)]
        done = _Done(results, started, time.perf_counter() - started, best=probs.argmax(axis=1), top=probs.max(axis=1))
        if window is not None:
            done.counts = count_encoded(window.layout, encoded, probs)
        for e in encoded:
            done.tokens += len(e.ids)
            done.unknown += e.unknown
            done.truncated += e.tokens > len(e.ids)
        return done

    def _finish(self, fut: asyncio.Future[_Done], pieces: list[_Piece]) -> None:
        self._inflight.discard(fut)
        self.pool.slots.release()
        exc = fut.exception() if not fut.cancelled() else UnavailableError("the service is shutting down")
        if exc is not None:
            for p in pieces:
                if not p.job.future.done():
                    p.job.future.set_exception(exc)
            return
        done = fut.result()
        self.pool.admission.measured(len(done.results), done.seconds)
        m = self.metrics
        m.batch_texts.observe(len(done.results))
        m.inference.observe(done.seconds)
        m.texts.inc(len(done.results))
        m.tokens.inc(done.tokens)
        m.unknown.inc(done.unknown)
        m.truncated.inc(done.truncated)
        for p in pieces:  # every text of a piece waited as long as its request
            m.queue_wait.observe(done.started - p.job.enqueued, p.hi - p.lo)
        window = self.served.window
        if window is not None and done.counts is not None:
            window.add(len(done.results), done.counts)
        at = 0
        for p in pieces:
            job = p.job
            n = p.hi - p.lo
            if job.scores is not None:
                job.scores.best[p.lo : p.hi] = done.best[at : at + n]
                job.scores.top[p.lo : p.hi] = done.top[at : at + n]
            job.results[p.lo : p.hi] = done.results[at : at + n]
            at += n
            job.pending -= n
            if job.pending == 0 and not job.future.done():
                job.future.set_result(job.results)  # type: ignore[arg-type]

    async def close(self) -> None:
        """Stop collecting; fail whatever is still queued (only at shutdown)."""
        if self._task is not None:
            self._task.cancel()
            try:
                await self._task
            except asyncio.CancelledError:
                pass
        while self._queue:
            job = self._queue.popleft()
            self._untaken -= len(job.texts) - job.taken
            if not job.future.done():
                job.future.set_exception(UnavailableError("the service is shutting down"))
        if self._inflight:
            await asyncio.wait(self._inflight)

    @property
    def queued(self) -> int:
        return self._untaken


__all__ = ["Batcher", "InferencePool", "LiveScores"]
