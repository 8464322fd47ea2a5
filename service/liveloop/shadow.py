"""Shadow scoring: the candidate version labels a sample of live texts, off the request path.

A sampled request is answered exactly as any other; after its reply has been handed to the
server, its texts and the live version's labels and probabilities are offered to a bounded
queue (:meth:`ShadowScorer.offer`, a few list appends on the event loop). What does not fit is
dropped and counted, never waited for. One task takes queued texts in batches, scores them with
the candidate on the inference pool (probabilities only: no spans, no JSON) and adds the
comparison to a per-(model, live, candidate) :class:`~textsieve.registry.shadow.Tally`; another
adds the tallies to the registry every ``shadow_flush_seconds`` (one transaction per pair, see
registry/shadow_queries.py) and starts new ones, so a crash loses at most one interval.
"""

from __future__ import annotations

import asyncio
import contextlib
import logging
import time
from collections import deque
from collections.abc import Callable
from dataclasses import dataclass
from typing import Any

import numpy as np
from numpy.typing import NDArray

from textsieve.errors import TextsieveError
from textsieve.registry.shadow import KeptText, Tally
from textsieve.service.inference.batcher import InferencePool, LiveScores
from textsieve.service.modelset.loader import ServedModel
from textsieve.service.modelset.registry_thread import RegistryThread
from textsieve.service.settings import Settings
from textsieve.service.telemetry import ServiceMetrics

log = logging.getLogger("textsieve.service")
BATCH_TEXTS = 128  # most texts scored in one candidate call
DRAIN_SECONDS = 5.0  # at shutdown, how long queued samples may still be scored
PairKey = tuple[str, int, int]  # model, live version, candidate version


@dataclass(slots=True)
class _Item:
    model: str
    live: int
    live_labels: list[str]
    texts: list[str]
    scores: LiveScores


class ShadowScorer:
    """The shadow queue, its scoring task and its flushing task, for every model of a replica."""

    def __init__(
        self,
        settings: Settings,
        pool: InferencePool,
        store: RegistryThread,
        metrics: ServiceMetrics,
        *,
        candidate: Callable[[str], ServedModel | None],
        release: Callable[[ServedModel], None],
    ) -> None:
        self.settings = settings
        self.pool = pool
        self.store = store
        self.metrics = metrics
        self._candidate = candidate  # the model's loaded candidate (counted as in use by the caller)
        self._release = release
        self._queue: deque[_Item] = deque()
        self.queued_texts = 0
        self._wakeup = asyncio.Event()
        self.tallies: dict[PairKey, Tally] = {}
        self._tasks: list[asyncio.Task[None]] = []
        self._flushing: asyncio.Task[None] | None = None  # the flush the flushing task runs, if any
        self.flush_failures = 0
        self._scoring = False

    # -- the request side ------------------------------------------------------------------
    def offer(self, model: str, live: int, live_labels: list[str], texts: list[str], scores: LiveScores) -> None:
        """Queue a sampled request's texts for the candidate, or drop and count them when full."""
        cand = self._candidate(model)
        if cand is None:
            return
        try:
            if self.queued_texts + len(texts) > self.settings.shadow_queue_texts:
                self._tally((model, live, cand.version)).dropped += len(texts)
                self.metrics.shadow.dropped.labels(model).inc(len(texts))
                return
            self._queue.append(_Item(model, live, live_labels, texts, scores))
            self.queued_texts += len(texts)
            self._wakeup.set()
        finally:
            self._release(cand)

    async def offer_after_reply(
        self, model: str, live: int, live_labels: list[str], texts: list[str], scores: LiveScores
    ) -> None:
        """:meth:`offer` as a response's background task (async, so it runs on the event loop)."""
        self.offer(model, live, live_labels, texts, scores)

    def _tally(self, key: PairKey) -> Tally:
        found = self.tallies.get(key)
        if found is None:
            found = self.tallies[key] = Tally()
        return found

    # -- lifetime ----------------------------------------------------------------------------
    def start(self) -> None:
        loop = asyncio.get_running_loop()
        self._tasks = [
            loop.create_task(self._score_loop(), name="shadow scoring"),
            loop.create_task(self._flush_loop(), name="shadow flushing"),
        ]

    async def stop(self, drain_seconds: float = DRAIN_SECONDS) -> None:
        """Score what is queued (for at most ``drain_seconds``), stop, and flush: a clean shutdown
        loses no sample it had taken; what is still queued after the drain is counted as dropped."""
        end = time.monotonic() + drain_seconds
        while (self._queue or self._scoring) and time.monotonic() < end and self._tasks:
            await asyncio.sleep(0.01)
        for task in self._tasks:
            task.cancel()
        for task in self._tasks:
            with contextlib.suppress(asyncio.CancelledError):
                await task
        self._tasks = []
        if self._flushing is not None:  # a flush the cancel interrupted finishes its pairs first
            flushing, self._flushing = self._flushing, None
            await flushing
        while self._queue:
            item = self._queue.popleft()
            self.queued_texts -= len(item.texts)
            self._drop([item], "the service stopped before it was scored")
        await self.flush()

    # -- scoring -----------------------------------------------------------------------------
    async def _score_loop(self) -> None:
        while True:
            while not self._queue:
                self._wakeup.clear()
                await self._wakeup.wait()
            items = self._take()
            self._scoring = True
            try:
                await self._score(items)
            except asyncio.CancelledError:
                raise
            except TextsieveError as exc:  # e.g. a worker died: these samples are lost, counted as dropped
                self._drop(items, exc.message)
            except Exception as exc:  # keep scoring whatever one batch hit; the log has the traceback
                log.exception("shadow scoring failed")
                self._drop(items, type(exc).__name__)
            finally:
                self._scoring = False

    def _take(self) -> list[_Item]:
        """Queued items of the first item's model, up to BATCH_TEXTS texts (at least one item)."""
        first = self._queue.popleft()
        items, n = [first], len(first.texts)
        rest: deque[_Item] = deque()
        while self._queue and n < BATCH_TEXTS:
            item = self._queue.popleft()
            if item.model == first.model and n + len(item.texts) <= BATCH_TEXTS:
                items.append(item)
                n += len(item.texts)
            else:
                rest.append(item)
        rest.extend(self._queue)
        self._queue = rest
        self.queued_texts -= n
        return items

    def _drop(self, items: list[_Item], why: str) -> None:
        log.warning("shadow scoring of %d texts failed: %s", sum(len(i.texts) for i in items), why)
        cand = self._candidate(items[0].model)
        if cand is None:
            return
        try:
            for item in items:
                self._tally((item.model, item.live, cand.version)).dropped += len(item.texts)
                self.metrics.shadow.dropped.labels(item.model).inc(len(item.texts))
        finally:
            self._release(cand)

    async def _score(self, items: list[_Item]) -> None:
        model = items[0].model
        cand = self._candidate(model)
        if cand is None:  # the candidate went away while these waited: nothing to compare with
            return
        try:
            texts = [t for item in items for t in item.texts]
            slots = self.pool.slots
            await slots.acquire()  # one inference thread, like a batch of live texts
            try:
                loop = asyncio.get_running_loop()
                probs = await loop.run_in_executor(self.pool.executor, self._probabilities, cand, texts)
            finally:
                slots.release()
            at = 0
            for item in items:
                n = len(item.texts)
                self._compare(item, cand, probs[at : at + n])
                at += n
        finally:
            self._release(cand)

    def _probabilities(self, cand: ServedModel, texts: list[str]) -> NDArray[np.floating]:
        """On an inference thread: the candidate's calibrated probabilities (in its process, or here)."""
        procs = self.pool.procs
        if procs is not None and cand.worker_key is not None:
            return np.asarray(procs.score(self.pool.index(), cand.worker_key, texts))
        from textsieve.service.inference.packing import run_packed

        p = cand.predictors[self.pool.index()]
        out = run_packed(p, [p.encode(t, offsets=False) for t in texts])
        return p.probabilities(out.logits)

    def _compare(self, item: _Item, cand: ServedModel, probs: NDArray[np.floating]) -> None:
        """Agreement, transitions and the change in the live label's probability, vectorised."""
        n = len(item.texts)
        column = {label: i for i, label in enumerate(cand.labels)}
        # Where the live label is one the candidate lacks, the candidate gives it probability 0.
        live_col = np.array([column.get(label, -1) for label in item.live_labels], dtype=np.int64)[item.scores.best]
        rows = np.arange(n)
        p_live_label = np.where(live_col >= 0, probs[rows, np.maximum(live_col, 0)], 0.0)
        delta_sum = float((p_live_label - item.scores.top).sum())
        cand_best = probs.argmax(axis=1)
        live_names = [item.live_labels[i] for i in item.scores.best.tolist()]
        cand_names = [cand.labels[i] for i in cand_best.tolist()]
        keep = self.settings.shadow_keep_texts
        kept: list[KeptText] = []
        if keep > 0:
            top = probs.max(axis=1)
            kept = [
                KeptText(item.texts[i], live_names[i], float(item.scores.top[i]), cand_names[i], float(top[i]))
                for i in range(n)
                if live_names[i] != cand_names[i]
            ]
        tally = self._tally((item.model, item.live, cand.version))
        before = tally.agreed
        tally.add(live_names, cand_names, delta_sum, kept, keep)
        m = self.metrics.shadow
        m.texts.labels(item.model).inc(n)
        m.agreed.labels(item.model).inc(tally.agreed - before)

    # -- flushing ----------------------------------------------------------------------------
    async def _flush_loop(self) -> None:
        while True:
            await asyncio.sleep(self.settings.shadow_flush_seconds)
            # Its own task, shielded: stop() cancels this loop, and a flush cancelled between two
            # pairs would lose the tallies it had taken and not written yet.
            self._flushing = asyncio.get_running_loop().create_task(self.flush(), name="shadow flush")
            await asyncio.shield(self._flushing)
            self._flushing = None

    async def flush(self) -> None:
        """Add every pair's tally to the registry and start new ones; a failed pair is kept for the next try."""
        pending, self.tallies = self.tallies, {}
        for key, tally in pending.items():
            if tally.empty and not tally.kept:
                continue
            model, live, cand = key
            try:
                await self.store.add_shadow_counts(
                    model,
                    live,
                    cand,
                    tally,
                    keep_texts=self.settings.shadow_keep_texts,
                    keep_seconds=self.settings.shadow_keep_days * 86400.0,
                )
            except TextsieveError as exc:
                self.flush_failures += 1
                self.metrics.shadow.flushes.labels("failed").inc()
                log.warning("shadow counts of %s v%s/v%s not flushed (kept for the next try): %s", *key, exc.message)
                self._tally(key).merge(tally, self.settings.shadow_keep_texts)
            else:
                self.metrics.shadow.flushes.labels("ok").inc()

    def describe(self) -> dict[str, Any]:
        return {"queued_texts": self.queued_texts, "pairs": len(self.tallies)}


__all__ = ["ShadowScorer"]
