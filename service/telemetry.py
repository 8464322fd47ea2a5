"""What the service measures, kept in prometheus_client and exposed in the Prometheus text format.

Each app gets a private ``CollectorRegistry`` (``create_app`` runs many times in one test
process; the library's global default registry would refuse the second app's families).

The hot path never calls ``.labels()``: resolving a child takes a lock and a dict look-up
(about 2 µs, measured), so the children of a served version are resolved once
(:meth:`ServiceMetrics.for_version`, kept by its batcher) and those of an HTTP route and status
once per distinct triple (:meth:`ServiceMetrics.answered`).

Collectors of our own, each run only when ``/metrics`` is scraped:

- :class:`CountedHistogram` for every histogram the event loop feeds (request and batch times,
  batch sizes, the queue wait): every text of a request's slice of a batch waited the same time,
  and the library's ``observe`` takes one value at a time, so a 128-text batch would cost 128
  locked observations on the event loop; this one takes ``(value, count)``, and one observation
  costs a lock, a bisection and two additions, not the library's Python loop over its buckets.
- :class:`PlainCounter` for the counters the event loop adds to per request or batch: a lock and
  an addition per ``inc``, not the library's ~1 µs. Both are written exactly as the library
  writes its counters and histograms (tests/service/test_observability.py compares them).
- :class:`WorkerProcessCollector` reads ``/proc/<pid>/stat`` and ``statm`` of each inference
  worker process (rather than asking the worker: a request in a worker's pipe waits behind the
  batches queued there, and a stuck worker would stall the scrape, while ``/proc`` answers at once).
"""

from __future__ import annotations

import bisect
import copy
import math
import os
import threading
from collections.abc import Callable, Iterable, Iterator, Sequence
from dataclasses import dataclass
from typing import Any, Generic, TypeVar

from prometheus_client import CollectorRegistry, Counter, Gauge, Info, ProcessCollector, generate_latest
from prometheus_client.metrics_core import CounterMetricFamily, GaugeMetricFamily, HistogramMetricFamily, Metric
from prometheus_client.registry import Collector

# generate_latest writes text format 0.0.4; recent prometheus_client versions name 1.0.0 in
# CONTENT_TYPE_LATEST (it negotiates escaping for UTF-8 metric names, which ours never need).
CONTENT_TYPE = "text/plain; version=0.0.4; charset=utf-8"

SECONDS_BUCKETS = (0.0005, 0.001, 0.0025, 0.005, 0.01, 0.025, 0.05, 0.1, 0.25, 0.5, 1.0, 2.5, 5.0, 10.0)
SIZE_BUCKETS = (1, 2, 4, 8, 16, 32, 64, 128, 256, 512, 1024, 2048, 4096)
WorkerPids = Callable[[], Iterable[tuple[int, int]]]  # (worker index, pid) of each running worker


def _le(bound: float) -> str:
    """A bucket bound as prometheus_client's own histograms write it ("1.0", "0.0005", "+Inf")."""
    return "+Inf" if math.isinf(bound) else repr(float(bound))


Child = TypeVar("Child")


class _CounterChild:
    __slots__ = ("_lock", "_value")

    def __init__(self) -> None:
        self._value = 0.0
        self._lock = threading.Lock()

    def inc(self, amount: float = 1) -> None:
        if amount < 0:
            raise ValueError("a counter only goes up: the amount cannot be negative")
        with self._lock:
            self._value += amount

    def get(self) -> float:
        with self._lock:
            return self._value


class _Family(Collector, Generic[Child]):
    """A labelled metric family of our own: its children, made on first use of their labels."""

    def __init__(self, name: str, documentation: str, labelnames: Sequence[str]) -> None:
        self.name, self.documentation, self.labelnames = name, documentation, tuple(labelnames)
        self._children: dict[tuple[str, ...], Child] = {}
        self._lock = threading.Lock()

    def _new_child(self) -> Child:
        raise NotImplementedError

    def labels(self, *values: str) -> Child:
        if len(values) != len(self.labelnames):
            raise ValueError(f"{self.name} takes labels {self.labelnames}, got {values}")
        with self._lock:
            child = self._children.get(values)
            if child is None:
                child = self._children[values] = self._new_child()
            return child

    def _children_now(self) -> list[tuple[tuple[str, ...], Child]]:
        """(label values, child) of every child, in the order they were made."""
        with self._lock:
            return list(self._children.items())


class PlainCounter(_Family[_CounterChild]):
    """A labelled counter family whose children cost a lock and an addition per ``inc``.

    The library's ``Counter.inc`` checks the metric's state and goes through a value object and
    its lock, ~1 µs; the event loop pays that several times a request (bench/README.md, "The
    loop's own work"). Exposed as the library writes a counter (``name`` ends in ``_total``),
    without the ``_created`` series, in the order the children were first asked for."""

    def __init__(self, name: str, documentation: str, labelnames: Sequence[str]) -> None:
        if not name.endswith("_total"):
            raise ValueError(f"counter {name!r}: the name must end in _total")
        super().__init__(name, documentation, labelnames)

    def _new_child(self) -> _CounterChild:
        return _CounterChild()

    def collect(self) -> Iterator[Metric]:
        family = CounterMetricFamily(self.name, self.documentation, labels=self.labelnames)
        for values, child in self._children_now():
            family.add_metric(list(values), child.get())
        yield family


class _CountedChild:
    __slots__ = ("_bounds", "_counts", "_lock", "_sum")

    def __init__(self, bounds: tuple[float, ...]) -> None:
        self._bounds = bounds
        self._counts = [0] * (len(bounds) + 1)  # per bucket, not cumulative; the last is +Inf
        self._sum = 0.0
        self._lock = threading.Lock()

    def observe(self, value: float, count: int = 1) -> None:
        """Record ``value`` ``count`` times."""
        if count < 0:
            raise ValueError("an observation count cannot be negative")
        with self._lock:
            self._counts[bisect.bisect_left(self._bounds, value)] += count  # "le": first bound >= value
            self._sum += value * count

    def buckets(self) -> tuple[list[tuple[str, float]], float]:
        with self._lock:
            counts, total = list(self._counts), self._sum
        cumulative, acc = [], 0
        for bound, c in zip((*self._bounds, math.inf), counts, strict=True):
            acc += c
            cumulative.append((_le(bound), float(acc)))
        return cumulative, total


class CountedHistogram(_Family[_CountedChild]):
    """A labelled histogram family whose observations carry a count."""

    def __init__(self, name: str, documentation: str, labelnames: Sequence[str], buckets: Sequence[float]) -> None:
        if not buckets or list(buckets) != sorted(set(buckets)):
            raise ValueError("histogram buckets must be increasing and unique")
        super().__init__(name, documentation, labelnames)
        self._bounds = tuple(float(b) for b in buckets)

    def _new_child(self) -> _CountedChild:
        return _CountedChild(self._bounds)

    def collect(self) -> Iterator[Metric]:
        family = HistogramMetricFamily(self.name, self.documentation, labels=self.labelnames)
        children = sorted(self._children_now())
        for values, child in children:
            buckets, total = child.buckets()
            family.add_metric(list(values), buckets, total)
        yield family


def _sysconf(name: str, default: int) -> int:
    try:
        return int(os.sysconf(name))
    except (AttributeError, ValueError, OSError):
        return default


_TICKS = _sysconf("SC_CLK_TCK", 100)
_PAGE = _sysconf("SC_PAGE_SIZE", 4096)


def _read_proc(pid: int) -> tuple[float, float, float, float] | None:
    """CPU seconds, start time since boot, resident and shared bytes of ``pid``; None once it is gone."""
    try:
        with open(f"/proc/{pid}/stat", "rb") as f:
            # The command name may hold spaces and parentheses: fields are counted after the last ")".
            stat = f.read().rsplit(b")", 1)[1].split()
        with open(f"/proc/{pid}/statm", "rb") as f:
            statm = f.read().split()
    except (OSError, IndexError):
        return None
    # proc(5): stat's fields 14 and 15 are utime and stime, 22 starttime, in clock ticks (index
    # 0 here is field 3); statm's second and third fields are resident and resident-shared pages.
    cpu = (int(stat[11]) + int(stat[12])) / _TICKS
    return cpu, int(stat[19]) / _TICKS, int(statm[1]) * _PAGE, int(statm[2]) * _PAGE


def _boot_time() -> float:
    try:
        with open("/proc/stat", "rb") as f:
            for line in f:
                if line.startswith(b"btime "):
                    return float(line.split()[1])
    except OSError:
        pass
    return 0.0


class WorkerProcessCollector(Collector):
    """CPU, memory and start time of each inference worker process, labelled by worker index."""

    def __init__(self) -> None:
        self.pids: WorkerPids | None = None  # set while a pool of worker processes runs
        self.pool: Any = None  # service.inference.batcher.InferencePool: its scheduling policy
        self._boot = _boot_time()

    def collect(self) -> Iterator[Metric]:
        if self.pids is None or not self._boot:  # threads mode, or no /proc on this system
            return
        w = ("worker",)
        rss = GaugeMetricFamily("textsieve_worker_resident_memory_bytes", "Resident memory of a worker.", labels=w)
        shared = GaugeMetricFamily(
            "textsieve_worker_shared_memory_bytes",
            "Resident memory of a worker that is file-backed or shared (libraries, the model file): "
            "summing resident memory over workers counts it once per worker.",
            labels=w,
        )
        cpu = CounterMetricFamily("textsieve_worker_cpu_seconds", "User and system CPU time of a worker.", labels=w)
        start = GaugeMetricFamily(
            "textsieve_worker_start_time_seconds",
            "Start time of a worker since the Unix epoch; it changes when a dead worker is replaced.",
            labels=w,
        )
        for index, pid in self.pids():
            read = _read_proc(pid)
            if read is None:  # ended between listing and reading: it is being replaced
                continue
            seconds, started, resident, shared_bytes = read
            label = [str(index)]
            cpu.add_metric(label, seconds)
            start.add_metric(label, self._boot + started)
            rss.add_metric(label, resident)
            shared.add_metric(label, shared_bytes)
        yield from (rss, shared, cpu, start)
        pool = self.pool
        if pool is not None:
            yield GaugeMetricFamily(
                "textsieve_workers_batch_scheduled",
                "1 while the server has put the worker processes under Linux SCHED_BATCH "
                "(TEXTSIEVE_WORKER_SCHEDULING; a system that refuses the policy leaves them as they were; under "
                "adaptive, batches then also gather on the first worker with room), else 0.",
                value=int(pool.scheduling == "batch"),
            )
            yield CounterMetricFamily(
                "textsieve_worker_scheduling_switches",
                "How often TEXTSIEVE_WORKER_SCHEDULING=adaptive moved the workers between policies.",
                value=pool.scheduling_switches,
            )


class OverloadCollector(Collector):
    """The replica's bounds (connections, request bodies, the inference queue), read when scraped.

    The guards keep plain integer counts (they sit on the hot path); this turns them into series.
    """

    def __init__(self) -> None:
        self.guard: Any = None  # service.web.transport.ConnectionGuard (only under uvicorn)
        self.budget: Any = None  # service.web.bodylimit.BodyBudget
        self.admission: Any = None  # service.inference.admission.Admission, while the pool runs

    def collect(self) -> Iterator[Metric]:
        refused = CounterMetricFamily(
            "textsieve_overload_refusals",
            "Requests or connections refused at once because this replica was at a bound "
            "(connections, requests, body_budget, queue) or the caller's deadline had passed (deadline).",
            labels=("reason",),
        )
        guard, budget, admission = self.guard, self.budget, self.admission
        if guard is not None:
            refused.add_metric(["connections"], guard.refused)
            refused.add_metric(["requests"], guard.refused_requests)
            yield GaugeMetricFamily(
                "textsieve_requests_limit",
                "Most requests inside the application at once (adapts to keep them within the admitted wait).",
                value=int(guard.limit),
            )
            yield GaugeMetricFamily("textsieve_connections_open", "Open client connections.", value=guard.open)
            yield CounterMetricFamily(
                "textsieve_connections_timed_out",
                "Connections closed because a request's headers and body did not arrive in time.",
                value=guard.timed_out,
            )
            yield CounterMetricFamily(
                "textsieve_connections_malformed",
                "Connections closed because a request could not be parsed as HTTP/1.1 (answered 400).",
                value=guard.malformed_requests,
            )
        if budget is not None:
            refused.add_metric(["body_budget"], budget.refused)
            yield GaugeMetricFamily(
                "textsieve_body_bytes_in_flight", "Request-body bytes reserved across connections.", value=budget.used
            )
        if admission is not None:
            refused.add_metric(["queue"], admission.refused)
            refused.add_metric(["deadline"], admission.deadline_passed)
            yield GaugeMetricFamily(
                "textsieve_queue_texts", "Texts admitted and not yet answered.", value=admission.queued
            )
            yield GaugeMetricFamily(
                "textsieve_queue_limit_texts",
                "Most texts admitted at once: the measured rate times the admitted wait.",
                value=admission.limit,
            )
            yield CounterMetricFamily(
                "textsieve_queue_abandoned_requests",
                "Requests dropped from the inference queue uncomputed because their client had closed the "
                "connection (booked 499); their texts were given back to the queue's bound.",
                value=admission.client_left,
            )
        yield refused


@dataclass(frozen=True, slots=True)
class ShadowMetrics:
    """Shadow scoring's families, labelled by model (off the request path: ``.labels()`` is fine)."""

    texts: Counter
    agreed: Counter
    dropped: Counter
    flushes: Counter


class LiveLoopCollector(Collector):
    """The shadow queue and each served version's drift figures, computed when scraped.

    PSI and Jensen–Shannon distance cost a few small NumPy calls per signal; doing them here
    rather than per batch keeps the request path to one vector addition.
    """

    def __init__(self) -> None:
        self.models: Any = None  # service.modelset.model_set.ModelSet, while the app runs

    def collect(self) -> Iterator[Metric]:
        models = self.models
        if models is None:
            return
        shadow = getattr(models, "shadow", None)
        if shadow is not None:
            yield GaugeMetricFamily(
                "textsieve_shadow_queue_texts", "Texts waiting for shadow scoring.", value=shadow.queued_texts
            )
        mv = ("model", "version")
        window = GaugeMetricFamily(
            "textsieve_drift_window_texts", "Live texts in the drift window of a served version.", labels=mv
        )
        psi = GaugeMetricFamily(
            "textsieve_drift_psi",
            "Population stability index of a drift signal, live window against the bundle's baseline.",
            labels=(*mv, "signal"),
        )
        js = GaugeMetricFamily(
            "textsieve_drift_js_distance",
            "Jensen-Shannon distance (natural log) of a drift signal, live window against the baseline.",
            labels=(*mv, "signal"),
        )
        for name, version, report in models.drift_reports():
            labels = [name, str(version)]
            window.add_metric(labels, report.texts)
            for sig in report.signals:
                if sig.psi is not None and sig.js_distance is not None:
                    psi.add_metric([*labels, sig.name], sig.psi)
                    js.add_metric([*labels, sig.name], sig.js_distance)
        yield from (window, psi, js)


class _WithoutCreated(Collector):
    """The registry minus the ``*_created`` series the library adds to counters and histograms:
    they were never part of what this service exposes, and they would double its series."""

    def __init__(self, registry: CollectorRegistry) -> None:
        self._registry = registry

    def collect(self) -> Iterator[Metric]:
        for metric in self._registry.collect():
            if metric.type in ("counter", "histogram"):
                created = metric.name + "_created"
                metric = copy.copy(metric)
                metric.samples = [s for s in metric.samples if s.name != created]
            yield metric


@dataclass(frozen=True, slots=True)
class VersionMetrics:
    """One served version's label children, resolved once and updated per request or batch."""

    requests: _CounterChild
    texts: _CounterChild
    tokens: _CounterChild
    unknown: _CounterChild
    truncated: _CounterChild
    batch_texts: _CountedChild
    inference: _CountedChild
    queue_wait: _CountedChild


class ServiceMetrics:
    """The service's metric families; model-level ones are labelled by model and version."""

    def __init__(self) -> None:
        r = self.registry = CollectorRegistry()
        mv = ("model", "version")
        # Updated per request or per batch on the event loop: our own lighter collectors.
        self.http_requests = PlainCounter(
            "textsieve_http_requests_total", "HTTP requests answered.", ("method", "route", "status")
        )
        self.http_seconds = CountedHistogram(
            "textsieve_http_request_seconds", "Time to answer an HTTP request.", ("route",), SECONDS_BUCKETS
        )
        self.predict_requests = PlainCounter("textsieve_predict_requests_total", "Prediction requests answered.", mv)
        self.texts = PlainCounter("textsieve_texts_total", "Texts scored.", mv)
        self.tokens = PlainCounter("textsieve_tokens_total", "Tokens scored (after truncation).", mv)
        self.unknown = PlainCounter("textsieve_unknown_tokens_total", "Scored tokens outside the vocabulary.", mv)
        self.truncated = PlainCounter("textsieve_truncated_texts_total", "Texts cut to the model's max_length.", mv)
        self.batch_texts = CountedHistogram("textsieve_batch_texts", "Texts per onnxruntime batch.", mv, SIZE_BUCKETS)
        self.queue_wait = CountedHistogram(
            "textsieve_queue_wait_seconds", "Time a text waited before its batch started.", mv, SECONDS_BUCKETS
        )
        self.inference = CountedHistogram(
            "textsieve_inference_seconds", "Time to encode, run and explain one batch.", mv, SECONDS_BUCKETS
        )
        for family in (
            self.http_requests,
            self.http_seconds,
            self.predict_requests,
            self.texts,
            self.tokens,
            self.unknown,
            self.truncated,
            self.batch_texts,
            self.queue_wait,
            self.inference,
        ):
            r.register(family)
        self.served = Gauge(
            "textsieve_served_version", "Version answering unpinned requests, per model.", ("model",), registry=r
        )
        self.served_info = Info(
            "textsieve_served_model",
            "The version answering unpinned requests, per model, and its manifest's sha256.",
            ("model",),
            registry=r,
        )
        self.ready = Gauge("textsieve_ready", "1 when every served model is loaded and warmed.", registry=r)
        self.swaps = Counter(
            "textsieve_swaps_total", "Version changes of a served model.", ("model", "outcome"), registry=r
        )
        self.worker_processes = WorkerProcessCollector()
        r.register(self.worker_processes)
        self.overload = OverloadCollector()
        r.register(self.overload)
        self.shadow = ShadowMetrics(
            texts=Counter(
                "textsieve_shadow_texts_total", "Live texts also scored by the candidate.", ("model",), registry=r
            ),
            agreed=Counter(
                "textsieve_shadow_agreed_texts_total",
                "Shadow-scored texts the candidate gave the live version's label.",
                ("model",),
                registry=r,
            ),
            dropped=Counter(
                "textsieve_shadow_dropped_texts_total",
                "Texts sampled for shadow scoring but dropped (queue full, scoring failed, or the service stopped).",
                ("model",),
                registry=r,
            ),
            flushes=Counter(
                "textsieve_shadow_flushes_total",
                "Shadow-count flushes to the registry, per outcome (ok, failed).",
                ("outcome",),
                registry=r,
            ),
        )
        self.drift_flushes = Counter(
            "textsieve_drift_flushes_total",
            "Drift-count flushes to the registry, per outcome (ok; failed: the counts are kept for the next).",
            ("outcome",),
            registry=r,
        )
        self.live_loop = LiveLoopCollector()
        r.register(self.live_loop)
        ProcessCollector(registry=r)  # the server process's own process_* series
        self._versions: dict[tuple[str, int], VersionMetrics] = {}
        self._http: dict[tuple[str, str, int], tuple[_CounterChild, _CountedChild]] = {}
        self._exposed = _WithoutCreated(r)

    def for_version(self, model: str, version: int) -> VersionMetrics:
        """The children of one served version (cached: each is resolved once)."""
        found = self._versions.get((model, version))
        if found is None:
            v = (model, str(version))
            found = VersionMetrics(
                requests=self.predict_requests.labels(*v),
                texts=self.texts.labels(*v),
                tokens=self.tokens.labels(*v),
                unknown=self.unknown.labels(*v),
                truncated=self.truncated.labels(*v),
                batch_texts=self.batch_texts.labels(*v),
                inference=self.inference.labels(*v),
                queue_wait=self.queue_wait.labels(*v),
            )
            found = self._versions.setdefault((model, version), found)
        return found

    def answered(self, method: str, route: str, status: int, seconds: float) -> None:
        """Count one HTTP request (route is the matched path template, so the keys stay few)."""
        key = (method, route, status)
        pair = self._http.get(key)
        if pair is None:
            pair = self._http.setdefault(
                key, (self.http_requests.labels(method, route, str(status)), self.http_seconds.labels(route))
            )
        pair[0].inc()
        pair[1].observe(seconds)

    def now_serving(self, model: str, version: int, manifest_sha256: str | None) -> None:
        """A model's unpinned version changed (at startup or on a swap)."""
        self.served.labels(model).set(version)
        info = {"version": str(version)} | ({"manifest_sha256": manifest_sha256} if manifest_sha256 else {})
        self.served_info.labels(model).info(info)

    def watch_workers(self, pids: WorkerPids | None, pool: Any = None) -> None:
        """Report these worker processes, and ``pool``'s scheduling policy, when scraped (None: there
        are none, e.g. threads mode)."""
        self.worker_processes.pids = pids
        self.worker_processes.pool = pool if pids is not None else None

    def render(self) -> bytes:
        return generate_latest(self._exposed)


__all__ = [
    "CONTENT_TYPE",
    "CountedHistogram",
    "LiveLoopCollector",
    "OverloadCollector",
    "PlainCounter",
    "ServiceMetrics",
    "ShadowMetrics",
    "VersionMetrics",
    "WorkerProcessCollector",
]
