"""The set of served versions: startup load, hot swap on promotion or rollback, pinned versions.

Swap protocol. A change is noticed by polling the registry's change cursor (or at once, after
an admin call through this service). The new live version is fetched, verified, loaded and
warmed beside the old one; then the table entry is replaced on the event loop thread, which is
atomic for requests. A request takes its version when it starts (``acquire``) and keeps it to
the end, so in-flight requests finish on the version they started with; the old version is
closed when its last request is released. If the new version fails to load, the old one keeps
serving and the failure is reported in ``/readyz`` (the model's ``failed_version`` and the
``degraded`` list) and the ``textsieve_swaps_total`` metric; loading is retried with backoff.

Registry outage. Loaded versions keep answering when the registry cannot be read; a failed
poll is reported in ``/readyz`` as degraded (not as not-ready: the replica still answers) and
clears on the next successful poll.

Pinned versions. A request may pin any version except a retired one; pinned versions are
dropped from memory when their model changes, so the next pinned request checks the state again.

Review thresholds. A model's ``review_threshold`` setting (per model, not per version) is read
when the model is first served and again whenever a ``settings`` event for it is polled; a
settings change alone swaps nothing and keeps pinned versions loaded.

Shadow candidates. With ``shadow_rate`` > 0 a model's ``candidate`` version is loaded beside its
live one (no batcher: only the shadow task scores it, see service/liveloop/shadow.py) and
reloaded or dropped when the registry says the candidate changed. A candidate that fails to load
only stops shadow scoring; serving goes on. Every live and pinned version has a drift window
(registry/drift.py) unless ``drift`` is off. The window belongs to the version, not to the loaded
copy nor to this replica: replicas share it through the registry (service/liveloop/drift.py), so
a reload (a rollback to a version served before) or a restart finds it where it was.
"""

from __future__ import annotations

import asyncio
import contextlib
import datetime as dt
import logging
import random
import time
from collections import OrderedDict
from dataclasses import dataclass
from enum import StrEnum
from typing import NoReturn

from textsieve.errors import InputError, NotFoundError, StateError, TextsieveError, UnavailableError
from textsieve.registry import State
from textsieve.registry.drift import DriftReport, Layout, compare
from textsieve.registry.model_settings import REVIEW_THRESHOLD
from textsieve.service.inference.batcher import Batcher, InferencePool
from textsieve.service.inference.memory import release_freed_memory
from textsieve.service.liveloop.drift import DriftRecorder
from textsieve.service.liveloop.shadow import ShadowScorer
from textsieve.service.modelset.loader import ServedModel, load_served
from textsieve.service.modelset.registry_thread import RegistryThread, private_detail
from textsieve.service.settings import Settings
from textsieve.service.telemetry import ServiceMetrics

log = logging.getLogger("textsieve.service")
MAX_RETRY_SECONDS = 300.0


class ServingState(StrEnum):
    """What this service does with a model; the values are what /readyz and the model views show."""

    LOADING = "loading"
    READY = "ready"
    FAILED = "failed"  # its live version could not be loaded (or the model is unknown)
    NO_LIVE_VERSION = "no-live-version"
    NOT_SERVED = "not-served"  # only in views: a model this service has no status for


@dataclass
class ModelStatus:
    state: ServingState = ServingState.LOADING
    detail: str = ""
    failures: int = 0
    retry_at: float = 0.0
    failed_version: int | None = None  # the registry's live version, when it could not be loaded


class ModelSet:
    def __init__(self, settings: Settings, store: RegistryThread, pool: InferencePool, metrics: ServiceMetrics) -> None:
        self.settings = settings
        self.store = store
        self.pool = pool
        self.metrics = metrics
        self.live: dict[str, ServedModel] = {}
        self.pinned: OrderedDict[tuple[str, int], ServedModel] = OrderedDict()
        self.status: dict[str, ModelStatus] = {name: ModelStatus() for name in settings.models}
        self.started = False
        self.startup_error: str | None = None
        self.registry_error: str | None = None  # the last poll's failure, until a poll succeeds
        self._cursor: int | None = None
        self._locks: dict[object, asyncio.Lock] = {}
        self._poller: asyncio.Task[None] | None = None
        self._retiring: set[ServedModel] = set()
        self._discovered = False
        self._closing: set[asyncio.Task[None]] = set()
        # model → its review threshold; a model without one has no entry (replies then carry no
        # needs_review field).
        self.review_thresholds: dict[str, float] = {}
        self._settings_read: set[str] = set()
        # Shadow scoring: each model's candidate version, loaded beside its live one.
        self.candidates: dict[str, ServedModel] = {}
        self.shadow: ShadowScorer | None = None
        self.drift = DriftRecorder(settings, store, metrics, served=self._served_versions) if settings.drift else None
        if settings.shadow_rate > 0:
            self.shadow = ShadowScorer(
                settings, pool, store, metrics, candidate=self.use_candidate, release=self.release
            )

    # -- lifecycle ------------------------------------------------------------------------
    async def start(self) -> None:
        """Load every served model's live version, then poll for changes."""
        if self.shadow is not None:
            self.shadow.start()
        if self.drift is not None:
            self.drift.start()
        try:
            await self._discover()
        except TextsieveError as exc:
            self.startup_error = exc.message
            log.error(
                "startup failed: %s (retrying every %s s)", private_detail(exc), f"{self.settings.poll_seconds:g}"
            )
        finally:
            self.started = True
            self._update_ready()
            self._poller = asyncio.get_running_loop().create_task(self._poll(), name="registry poller")

    async def _discover(self) -> None:
        await self.store.open()
        # Read the cursor before loading: a promotion that lands during the load is then seen
        # by the first poll instead of being missed.
        self._cursor = await self.store.cursor()
        names = list(self.settings.models)
        if not names:
            names = [m.name for m in await self.store.models() if m.live is not None]
            for name in names:
                self.status.setdefault(name, ModelStatus())
        for name in names:
            await self.read_settings(name)
            await self.refresh(name, why="startup")
            await self.refresh_candidate(name)
        self._discovered = True
        self.startup_error = None

    async def stop(self) -> None:
        if self._poller is not None:
            self._poller.cancel()
            with contextlib.suppress(asyncio.CancelledError):
                await self._poller
        if self.shadow is not None:
            await self.shadow.stop()  # flushes what was counted while the registry is still open
        if self.drift is not None:
            await self.drift.stop()  # likewise; no request is answered any more, so nothing is counted after it
        served = {*self.live.values(), *self.pinned.values(), *self.candidates.values(), *self._retiring}
        self.live.clear()
        self.pinned.clear()
        self.candidates.clear()
        for s in served:
            await self._close(s)
        if self._closing:
            await asyncio.gather(*self._closing, return_exceptions=True)
        await self.store.close()

    # -- readiness ------------------------------------------------------------------------
    def readiness(self) -> tuple[bool, str]:
        if not self.started:
            return False, "starting: loading the live version of each served model"
        # Readiness answers callers who hold no token: it names no folder or database of this
        # machine (the server's log does, with the whole reason).
        if self.startup_error and not self.live:
            return False, (
                f"startup failed: the registry could not be read (the server's log says why); "
                f"retrying every {self.settings.poll_seconds:g} s"
            )
        if not self.status:
            return False, (
                "no model has a live version in the registry; "
                "publish and promote one (textsieve promote NAME VERSION --to live)"
            )
        waiting = [
            f"{name}: {st.state}{' (' + st.detail + ')' if st.detail else ''}"
            for name, st in sorted(self.status.items())
            if name not in self.live
        ]
        if waiting:
            return False, "not serving " + "; ".join(waiting)
        serving = "serving " + ", ".join(f"{n} v{s.version}" for n, s in sorted(self.live.items()))
        degraded = self.degraded()
        return True, serving + ("; degraded: " + "; ".join(degraded) if degraded else "")

    def degraded(self) -> list[str]:
        """What works less well than it should while every served model still answers."""
        notes = []
        if self.registry_error:
            # Said only when there are any: before a first load there are none to keep serving.
            kept = "; the versions already loaded keep serving" if self.live else ""
            notes.append(f"registry: {self.registry_error}{kept}")
        for name, st in sorted(self.status.items()):
            current = self.live.get(name)
            if st.failed_version is not None and current is not None:
                notes.append(f"{name}: {st.detail}; still serving version {current.version}")
        return notes

    def _update_ready(self) -> None:
        self.metrics.ready.set(1.0 if self.readiness()[0] else 0.0)

    def describe(self) -> dict[str, object]:
        out: dict[str, object] = {}
        for name, st in sorted(self.status.items()):
            s = self.live.get(name)
            entry: dict[str, object] = {
                "state": ServingState.READY if s is not None and st.state == ServingState.READY else st.state,
                **({"detail": st.detail} if st.detail else {}),
                **(s.describe() if s is not None else {}),
            }
            if st.failed_version is not None and s is not None:
                entry["failed_version"] = {"version": st.failed_version, "ready": False, "reason": st.detail}
            out[name] = entry
        return out

    def serving(self, name: str) -> dict[str, object]:
        """What this service does with ``name``: the ServingView fields."""
        st = self.status.get(name)
        s = self.live.get(name)
        if st is None:
            return {"version": None, "state": ServingState.NOT_SERVED, "detail": None, "loaded_at": None}
        return {
            "version": s.version if s else None,
            "state": ServingState.READY if s and st.state == ServingState.READY else st.state,
            "detail": st.detail or None,
            "loaded_at": s.loaded_at if s else None,
        }

    # -- loading and swapping ---------------------------------------------------------------
    def _lock(self, key: object) -> asyncio.Lock:
        return self._locks.setdefault(key, asyncio.Lock())

    async def _load(self, name: str, version: int, manifest_sha256: str | None, *, batcher: bool = True) -> ServedModel:
        bundle = await self.store.fetch(name, version)
        served = await asyncio.to_thread(
            load_served,
            bundle,
            name,
            version,
            workers=self.pool.workers,
            batch_size=self.settings.batch_max_texts,
            manifest_sha256=manifest_sha256,
            procs=self.pool.procs,
        )
        served.review_threshold = self.review_thresholds.get(name)
        if not batcher:  # a shadow candidate: scored by the shadow task only, no drift window
            return served
        if self.drift is not None:
            served.window = await self.drift.window(name, version, Layout.of(len(served.labels), served.baseline))
        served.batcher = Batcher(
            served,
            self.pool,
            self.metrics,
            max_texts=self.settings.batch_max_texts,
            wait_ms=self.settings.batch_wait_ms,
        )
        served.batcher.start()
        return served

    async def refresh(self, name: str, *, why: str) -> ServedModel | None:
        """Make ``name`` serve its current live version; returns what serves it afterwards."""
        async with self._lock(name):
            status = self.status.setdefault(name, ModelStatus())
            current = self.live.get(name)
            try:
                info = await self.store.live(name)
            except NotFoundError as exc:
                status.state, status.detail = ServingState.FAILED, exc.message
                self._update_ready()
                return current
            if info is None:
                if current is None:
                    if not self.settings.models:
                        # Serving every live model: one without a live version is not ours to wait for.
                        self.status.pop(name, None)
                    else:
                        status.state, status.detail = ServingState.NO_LIVE_VERSION, "promote a version to live"
                self._update_ready()
                return current
            version = info.version
            if current is not None and current.version == version:
                if status.failed_version is not None:  # the registry went back to what we serve
                    status.state, status.detail, status.failures, status.failed_version = (
                        ServingState.READY,
                        "",
                        0,
                        None,
                    )
                    self._update_ready()
                return current
            status.state = ServingState.LOADING if current is None else status.state
            try:
                new = await self._load(name, version, info.manifest_sha256)
            except TextsieveError as exc:
                status.failures += 1
                status.retry_at = time.monotonic() + min(
                    self.settings.poll_seconds * 2**status.failures, MAX_RETRY_SECONDS
                )
                if current is None:
                    status.state = ServingState.FAILED
                status.failed_version = version
                status.detail = f"version {version} could not be loaded: {exc.message}"
                self.metrics.swaps.labels(name, "failed").inc()
                log.error("model %s: loading version %s failed (%s): %s", name, version, why, private_detail(exc))
                self._update_ready()
                return current
            # The switch: one assignment on the event loop thread.
            self.live[name] = new
            status.state, status.detail, status.failures, status.failed_version = ServingState.READY, "", 0, None
            self.metrics.now_serving(name, version, new.manifest_sha256)
            self.metrics.swaps.labels(name, "startup" if current is None else "swapped").inc()
            log.info("model %s: now serving version %s (%s, loaded in %.2fs)", name, version, why, new.load_seconds)
            if current is not None:
                self._retire(current)
            self._update_ready()
            return new

    def _retire(self, served: ServedModel) -> None:
        served.retiring = True
        if served.active == 0:
            self._close_later(served)
        else:
            self._retiring.add(served)

    def _close_later(self, served: ServedModel) -> None:
        name = f"close {served.name} v{served.version}"
        task = asyncio.get_running_loop().create_task(self._close(served), name=name)
        self._closing.add(task)  # a reference, so the task is not collected before it runs
        task.add_done_callback(self._closing.discard)

    async def _close(self, served: ServedModel) -> None:
        if served.closed:
            return
        served.closed = True
        self._retiring.discard(served)
        if served.batcher is not None:
            await served.batcher.close()
        served.predictors.clear()  # drops the onnxruntime sessions
        if served.worker_key is not None and self.pool.procs is not None:
            await asyncio.to_thread(self.pool.procs.drop, served.worker_key)
        await asyncio.to_thread(release_freed_memory)

    async def read_settings(self, name: str) -> None:
        """Learn ``name``'s review threshold from the registry (a model it does not know has none)."""
        try:
            settings = await self.store.model_settings(name)
        except NotFoundError:
            self.review_thresholds.pop(name, None)
            return
        self._settings_read.add(name)
        threshold = settings.get(REVIEW_THRESHOLD)
        if threshold is None:
            self.review_thresholds.pop(name, None)
        else:
            self.review_thresholds[name] = threshold
        # Every loaded version of the model: live and pinned alike answer for the same model.
        for served in [self.live.get(name), *(s for key, s in self.pinned.items() if key[0] == name)]:
            if served is not None:
                served.review_threshold = threshold

    # -- requests -----------------------------------------------------------------------------
    def acquire_live(self, name: str | None, version: int | None) -> ServedModel | None:
        """:meth:`acquire` without a coroutine when the request asks for the live version (the
        common case: the predict route calls this first, every request); None when it does not
        (a pinned version, a model not live here), and the caller awaits :meth:`acquire`."""
        if name is None:
            name = self._only_model()
        served = self.live.get(name)
        if served is None or (version is not None and served.version != version):
            return None
        served.active += 1
        return served

    async def acquire(self, name: str | None, version: int | None) -> ServedModel:
        """The version a request will use; pair with :meth:`release`."""
        if name is None:
            name = self._only_model()
        served = self.live.get(name)
        if version is not None and (served is None or served.version != version):
            served = await self._pinned(name, version)
        elif served is None:
            await self._missing(name)
            raise AssertionError("unreachable")
        # No await between looking the version up and counting the request: a swap cannot
        # close it in between.
        served.active += 1
        return served

    def release(self, served: ServedModel) -> None:
        served.active -= 1
        if served.active == 0 and served.retiring and not served.closed:
            self._close_later(served)

    def _only_model(self) -> str:
        if len(self.status) == 1:
            return next(iter(self.status))
        if not self.status:
            if not self._discovered:  # the registry has not been read: nobody knows yet what it holds
                raise UnavailableError(
                    "this service has not read its registry yet: it is starting, or the registry cannot be "
                    "reached (/readyz and the server's log say which); retry after the Retry-After seconds"
                )
            raise UnavailableError("no model is served yet: publish and promote one, then retry")
        raise InputError(f"several models are served ({', '.join(sorted(self.status))}); name one in 'model'")

    async def _missing(self, name: str) -> NoReturn:
        st = self.status.get(name)
        if st is not None:
            if st.state == ServingState.NO_LIVE_VERSION:
                raise NotFoundError(f"model {name!r} has no live version; pin one with 'version' or promote one")
            raise UnavailableError(f"model {name!r} is not ready ({st.state}{': ' + st.detail if st.detail else ''})")
        if self.settings.models:
            raise NotFoundError(f"model {name!r} is not served here; served: {', '.join(self.settings.models)}")
        # Serving every live model: a name we do not know is either unknown or not live yet.
        info = await self.store.live(name)  # NotFoundError for an unknown model
        if info is None:
            raise NotFoundError(f"model {name!r} has no live version; pin one with 'version' or promote one")
        raise UnavailableError(f"model {name!r} became live recently and is still loading")

    async def _pinned(self, name: str, version: int) -> ServedModel:
        if name not in self.status and self.settings.models:
            raise NotFoundError(f"model {name!r} is not served here; served: {', '.join(self.settings.models)}")
        key = (name, version)
        cached = self.pinned.get(key)
        if cached is not None:
            self.pinned.move_to_end(key)
            return cached
        info = await self.store.version(name, version)  # NotFoundError when unknown
        if info.state == State.RETIRED:
            live = self.live.get(name)
            instead = f"the live version ({live.version})" if live is not None else "the live version"
            raise StateError(
                f"version {version} of {name!r} is retired and no longer served; pin {instead}, "
                "a candidate or a registered version, or roll back to it",
                model=name,
                version=version,
                state=State.RETIRED,
            )
        if self.settings.pinned_versions == 0:
            raise NotFoundError(
                f"model {name!r} version {version} exists but this service only serves "
                f"live versions (TEXTSIEVE_PINNED_VERSIONS=0)"
            )
        async with self._lock(key):
            cached = self.pinned.get(key)
            if cached is not None:
                return cached
            live = self.live.get(name)
            if live is not None and live.version == version:
                return live
            if name not in self._settings_read:
                await self.read_settings(name)
            served = await self._load(name, version, info.manifest_sha256)
            self.pinned[key] = served
            while len(self.pinned) > self.settings.pinned_versions:
                _, old = self.pinned.popitem(last=False)
                self._retire(old)
            return served

    # -- shadow scoring and drift -------------------------------------------------------------
    async def refresh_candidate(self, name: str) -> None:
        """Load ``name``'s candidate beside its live version for shadow scoring (or drop one that went)."""
        if self.shadow is None:
            return
        async with self._lock(("candidate", name)):
            current = self.candidates.get(name)
            try:
                info = await self.store.candidate(name)
            except NotFoundError:
                info = None
            if info is not None and current is not None and current.version == info.version:
                return
            if current is not None:
                del self.candidates[name]
                self._retire(current)
            if info is None or name not in self.live:
                return
            try:
                self.candidates[name] = await self._load(name, info.version, info.manifest_sha256, batcher=False)
            except TextsieveError as exc:
                # Shadow scoring is an aid: serving goes on without it, and the next change retries.
                log.error(
                    "model %s: candidate version %s not loaded for shadow scoring: %s",
                    name,
                    info.version,
                    private_detail(exc),
                )
                return
            log.info("model %s: candidate version %s scored in the shadow of live traffic", name, info.version)

    def use_candidate(self, name: str) -> ServedModel | None:
        """The loaded candidate of ``name``, counted as in use (pair with :meth:`release`), or None."""
        cand = self.candidates.get(name)
        if cand is None or cand.closed or cand.retiring:
            return None
        cand.active += 1
        return cand

    def shadow_sample(self, served: ServedModel) -> bool:
        """Whether this request (answered by ``served``) is also scored by the candidate."""
        return (
            self.shadow is not None
            and served.name in self.candidates
            and self.live.get(served.name) is served  # live traffic only, not pinned requests
            and random.random() < self.settings.shadow_rate
        )

    def _served_versions(self) -> set[tuple[str, int]]:
        return {(s.name, s.version) for s in [*self.live.values(), *self.pinned.values()]}

    def drift_reports(self, name: str | None = None) -> list[tuple[str, int, DriftReport]]:
        """(model, version, report) of every served version with a drift window (of ``name`` only, if given)."""
        out = []
        seen: set[int] = set()
        for served in [*self.live.values(), *self.pinned.values()]:
            if served.window is None or id(served) in seen or (name is not None and served.name != name):
                continue
            seen.add(id(served))
            report = compare(served.window.layout, served.baseline, served.window.counts())
            out.append((served.name, served.version, report))
        return sorted(out, key=lambda t: (t[0], t[1]))

    def _drop_pinned(self, name: str) -> None:
        """Forget the pinned versions of a changed model: their state may have changed too."""
        for key in [k for k in self.pinned if k[0] == name]:
            self._retire(self.pinned.pop(key))

    # -- polling --------------------------------------------------------------------------------
    async def _poll(self) -> None:
        while True:
            await asyncio.sleep(self.settings.poll_seconds)
            try:
                await self.poll_once()
            except TextsieveError as exc:
                self._registry_failed(private_detail(exc))
            except Exception as exc:  # keep polling whatever one round hit; the log has the traceback
                log.exception("registry poll failed")
                self._registry_failed(f"{type(exc).__name__} while polling (see the log)")
            else:
                if self.registry_error is not None:
                    log.info("registry reachable again: %s", self.settings.registry_label)
                    self.registry_error = None

    def _registry_failed(self, message: str) -> None:
        if self.registry_error is None:  # log the change, not every failed round
            log.warning("registry poll failed: %s", message)
            since = dt.datetime.now(dt.UTC).replace(microsecond=0).isoformat()
            # Shown on /readyz, which anyone may call: no host, database or folder (the log has them).
            self.registry_error = f"unavailable since {since} (the server's log says why)"

    async def poll_once(self) -> None:
        if not self._discovered:
            await self._discover()
            self._update_ready()
            return
        assert self._cursor is not None  # read by _discover, which has run
        # The cursor moves on only once every change read here has been acted on (the end of this
        # method): when the registry goes away in between (a view of the new live version, its
        # fetch), the next poll reads the same changes again. Before, they were lost, and a version
        # promoted just before an outage was never served after it. Acting twice is harmless: a
        # refresh to the version already served does nothing.
        cursor, events = await self.store.changes_since(self._cursor)
        # A settings change swaps nothing: it only refreshes what the service knows of the settings.
        changed = {e.model for e in events if e.kind != "settings"}
        resettled = {e.model for e in events if e.kind == "settings"}
        if self.settings.models:
            changed &= set(self.settings.models)
            resettled &= set(self.settings.models)
        for name in sorted(resettled & (self._settings_read | set(self.status))):
            await self.read_settings(name)
        now = time.monotonic()
        retry = {
            n
            for n, st in self.status.items()
            if (st.state == ServingState.FAILED or st.failed_version is not None) and st.retry_at <= now
        }
        for name in changed:
            self._drop_pinned(name)
        for name in sorted(changed | retry):
            await self.refresh(name, why="registry change" if name in changed else "retry")
        for name in sorted(changed):
            await self.refresh_candidate(name)
        self._cursor = cursor
        self._update_ready()


__all__ = ["ModelSet", "ModelStatus", "ServingState"]
