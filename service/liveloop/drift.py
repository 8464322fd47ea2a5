"""Drift windows shared by replicas: this replica's counts go to the registry, the window comes back.

Each served version's :class:`~textsieve.registry.drift.Window` collects the drift counts of the
batches this replica answers (one vector addition on the event loop, in the batcher). Every
``shadow_flush_seconds`` one task writes each window's pending sum as one registry row and reads
the window back (the newest rows of every replica, registry/drift_queries.py), in one transaction
on the registry thread: never on the request path. Each row records this replica's window size;
replicas set to different sizes each read the newest texts of their own, rows are kept for the
largest, and the reply and the log say that they disagree. A failed flush keeps the counts for the next
try and is counted (``textsieve_drift_flushes_total{outcome="failed"}``); predictions never wait
for it. Windows are kept per (model, version), not per loaded copy, so a reload finds the same
window, and a restart reads it from the registry when the version is loaded.
"""

from __future__ import annotations

import asyncio
import contextlib
import logging
import os
import socket
from collections.abc import Callable

from textsieve.errors import TextsieveError
from textsieve.registry.drift import Layout, Window
from textsieve.service.modelset.registry_thread import RegistryThread
from textsieve.service.settings import Settings
from textsieve.service.telemetry import ServiceMetrics

log = logging.getLogger("textsieve.service")
VersionKey = tuple[str, int]


def replica_name() -> str:
    """What a flushed row says about who wrote it (for an operator reading the table; windows ignore it)."""
    return f"{socket.gethostname()}:{os.getpid()}"


class DriftRecorder:
    """Every served version's window, and the task that flushes them, for one replica."""

    def __init__(
        self,
        settings: Settings,
        store: RegistryThread,
        metrics: ServiceMetrics,
        *,
        served: Callable[[], set[VersionKey]],
    ) -> None:
        self.settings = settings
        self._served = served  # the versions this replica serves now: only their windows are read back
        self.store = store
        self.metrics = metrics
        self.replica = replica_name()
        self.windows: dict[VersionKey, Window] = {}
        self._task: asyncio.Task[None] | None = None
        self._flushing: asyncio.Task[None] | None = None
        self.flush_failures = 0
        self._warned: dict[VersionKey, tuple[int, ...]] = {}  # the disagreement last logged, per version

    async def window(self, model: str, version: int, layout: Layout) -> Window:
        """The window of (``model``, ``version``), read from the registry the first time it is served."""
        key = (model, version)
        found = self.windows.get(key)
        if found is not None and found.layout == layout:
            return found
        window = self.windows[key] = Window(layout, self.settings.drift_window_texts)
        await self._read(key, window)
        return window

    async def refresh(self, model: str) -> None:
        """Read ``model``'s windows from the registry now (what ``GET …/drift`` answers with)."""
        served = self._served()
        for key, window in list(self.windows.items()):
            if key[0] == model and key in served:
                await self._read(key, window)

    async def _read(self, key: VersionKey, window: Window) -> None:
        flushes = window.flushes
        try:
            stored = await self.store.drift_window(*key, window_texts=window.size, size=window.layout.size)
        except TextsieveError as exc:  # the next flush reads it again; serving goes on
            log.warning("drift window of %s v%s not read from the registry: %s", *key, exc.message)
            return
        # A flush begun meanwhile settles the window itself, its own row included; this read may predate it.
        if not window.flushing and window.flushes == flushes:
            window.read(stored)
            self._say_disagreement(key, window)

    def _say_disagreement(self, key: VersionKey, window: Window) -> None:
        """Log once per change when the replicas sharing a window are set to different sizes."""
        sizes = window.sizes()
        if len(sizes) > 1 and self._warned.get(key) != sizes:
            log.warning(
                "drift window of %s v%s: replicas are set to different TEXTSIEVE_DRIFT_WINDOW_TEXTS (%s; this "
                "one %s): each reports the newest texts of its own size, and rows are kept for the largest; "
                "set the same size on every replica",
                *key,
                ", ".join(f"{n:,}" for n in sizes),
                f"{window.size:,}",
            )
        self._warned[key] = sizes

    def start(self) -> None:
        self._task = asyncio.get_running_loop().create_task(self._flush_loop(), name="drift flushing")

    async def stop(self) -> None:
        """Stop the task and flush: a clean shutdown loses no count it had taken."""
        if self._task is not None:
            self._task.cancel()
            with contextlib.suppress(asyncio.CancelledError):
                await self._task
            self._task = None
        if self._flushing is not None:  # a flush the cancel interrupted writes what it took first
            flushing, self._flushing = self._flushing, None
            await flushing
        await self.flush()

    async def _flush_loop(self) -> None:
        while True:
            await asyncio.sleep(self.settings.shadow_flush_seconds)
            # Its own task, shielded, as shadow counts are flushed: a flush cancelled between two
            # versions would leave what it had taken neither written nor pending.
            self._flushing = asyncio.get_running_loop().create_task(self.flush(), name="drift flush")
            await asyncio.shield(self._flushing)
            self._flushing = None

    async def flush(self) -> None:
        """Write each window's pending counts as one row and read every window back from the registry."""
        served = self._served()
        for (model, version), window in list(self.windows.items()):
            if window.pending_texts == 0 and (model, version) not in served:
                continue  # a version no longer served here: nothing to write, and no one reads its window
            texts, counts = window.take()
            try:
                if texts > 0:
                    stored = await self.store.add_drift_counts(
                        model, version, self.replica, texts, counts, window_texts=window.size
                    )
                else:
                    stored = await self.store.drift_window(
                        model, version, window_texts=window.size, size=window.layout.size
                    )
            except TextsieveError as exc:
                window.put_back()
                if texts > 0:
                    self.flush_failures += 1
                    self.metrics.drift_flushes.labels("failed").inc()
                    log.warning(
                        "drift counts of %s v%s not flushed (kept for the next try): %s", model, version, exc.message
                    )
            else:
                window.settle(stored)
                self._say_disagreement((model, version), window)
                if texts > 0:
                    self.metrics.drift_flushes.labels("ok").inc()


__all__ = ["DriftRecorder", "replica_name"]
