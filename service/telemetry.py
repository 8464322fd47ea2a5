"""Counters, gauges and histograms in the Prometheus text exposition format (version 0.0.4).

Written here rather than taken from a client library to keep the serving install small. The
format: ``# HELP`` / ``# TYPE`` lines, then ``name{label="value"} number``; histograms expose
cumulative ``_bucket{le=...}`` series ending in ``le="+Inf"``, plus ``_sum`` and ``_count``
(Prometheus documentation, "Exposition formats"). Worker threads update these, so each family
takes the registry's lock; updates happen once per batch or request, never per text.
"""

from __future__ import annotations

import bisect
import math
import threading
from collections.abc import Iterable, Sequence
from typing import TypeVar

CONTENT_TYPE = "text/plain; version=0.0.4; charset=utf-8"
Labels = tuple[str, ...]

SECONDS_BUCKETS = (0.0005, 0.001, 0.0025, 0.005, 0.01, 0.025, 0.05, 0.1, 0.25, 0.5, 1.0, 2.5, 5.0, 10.0)
SIZE_BUCKETS = (1, 2, 4, 8, 16, 32, 64, 128, 256, 512, 1024, 2048, 4096)


def _escape_label(value: str) -> str:
    return value.replace("\\", "\\\\").replace("\n", "\\n").replace('"', '\\"')


def _escape_help(text: str) -> str:
    return text.replace("\\", "\\\\").replace("\n", "\\n")


def _number(v: float) -> str:
    if math.isinf(v):
        return "+Inf" if v > 0 else "-Inf"
    if math.isnan(v):
        return "NaN"
    if float(v).is_integer() and abs(v) < 1e15:
        return str(int(v))
    return repr(float(v))


def _series(name: str, labelnames: Sequence[str], values: Labels, extra: tuple[str, str] | None = None) -> str:
    pairs = [f'{k}="{_escape_label(v)}"' for k, v in zip(labelnames, values, strict=True)]
    if extra:
        pairs.append(f'{extra[0]}="{extra[1]}"')
    return f"{name}{{{','.join(pairs)}}}" if pairs else name


class _Family:
    kind = "untyped"

    def __init__(self, name: str, help: str, labelnames: Sequence[str], lock: threading.Lock) -> None:
        self.name = name
        self.help = help
        self.labelnames = tuple(labelnames)
        self._lock = lock

    def _check(self, labels: Labels) -> Labels:
        if len(labels) != len(self.labelnames):
            raise ValueError(f"{self.name} takes labels {self.labelnames}, got {labels}")
        return tuple(str(v) for v in labels)

    def header(self) -> list[str]:
        return [f"# HELP {self.name} {_escape_help(self.help)}", f"# TYPE {self.name} {self.kind}"]

    def lines(self) -> list[str]:
        raise NotImplementedError


class Counter(_Family):
    kind = "counter"

    def __init__(self, name: str, help: str, labelnames: Sequence[str], lock: threading.Lock) -> None:
        super().__init__(name, help, labelnames, lock)
        self._values: dict[Labels, float] = {}

    def inc(self, labels: Labels = (), amount: float = 1.0) -> None:
        if amount < 0:
            raise ValueError("a counter only goes up")
        key = self._check(labels)
        with self._lock:
            self._values[key] = self._values.get(key, 0.0) + amount

    def value(self, labels: Labels = ()) -> float:
        with self._lock:
            return self._values.get(self._check(labels), 0.0)

    def lines(self) -> list[str]:
        return [f"{_series(self.name, self.labelnames, k)} {_number(v)}" for k, v in sorted(self._values.items())]


class Gauge(Counter):
    kind = "gauge"

    def set(self, labels: Labels, value: float) -> None:
        key = self._check(labels)
        with self._lock:
            self._values[key] = float(value)

    def remove(self, labels: Labels) -> None:
        with self._lock:
            self._values.pop(self._check(labels), None)


class Histogram(_Family):
    kind = "histogram"

    def __init__(
        self, name: str, help: str, labelnames: Sequence[str], lock: threading.Lock, buckets: Sequence[float]
    ) -> None:
        super().__init__(name, help, labelnames, lock)
        if list(buckets) != sorted(set(buckets)) or not buckets:
            raise ValueError("histogram buckets must be increasing and unique")
        self.bounds = tuple(float(b) for b in buckets)
        # per label set: counts per bucket (not cumulative), sum, count
        self._data: dict[Labels, tuple[list[int], list[float]]] = {}

    def observe(self, labels: Labels, value: float) -> None:
        self.observe_many(labels, (value,))

    def observe_many(self, labels: Labels, values: Iterable[float], times: Iterable[int] | None = None) -> None:
        """Observe each value (``times[i]`` times each, when given)."""
        key = self._check(labels)
        values = list(values)
        repeats = [1] * len(values) if times is None else list(times)
        with self._lock:
            counts, total = self._data.setdefault(key, ([0] * (len(self.bounds) + 1), [0.0]))
            for v, t in zip(values, repeats, strict=True):
                # "le" buckets: v lands in the first bound >= v.
                counts[bisect.bisect_left(self.bounds, v)] += t
                total[0] += v * t

    def snapshot(self, labels: Labels) -> tuple[list[int], float, int]:
        """Cumulative bucket counts, sum and count (for tests and the readiness view)."""
        with self._lock:
            counts, total = self._data.get(self._check(labels), ([0] * (len(self.bounds) + 1), [0.0]))
            cum, acc = [], 0
            for c in counts:
                acc += c
                cum.append(acc)
            return cum, total[0], acc

    def lines(self) -> list[str]:
        out: list[str] = []
        for key, (counts, total) in sorted(self._data.items()):
            acc = 0
            for bound, c in zip((*self.bounds, math.inf), counts, strict=True):
                acc += c
                out.append(f"{_series(self.name + '_bucket', self.labelnames, key, ('le', _number(bound)))} {acc}")
            out.append(f"{_series(self.name + '_sum', self.labelnames, key)} {_number(total[0])}")
            out.append(f"{_series(self.name + '_count', self.labelnames, key)} {acc}")
        return out


_F = TypeVar("_F", bound=_Family)


class Registry:
    """A set of metric families rendered together."""

    def __init__(self) -> None:
        self._lock = threading.Lock()
        self._families: list[_Family] = []

    def counter(self, name: str, help: str, labels: Sequence[str] = ()) -> Counter:
        return self._add(Counter(name, help, labels, self._lock))

    def gauge(self, name: str, help: str, labels: Sequence[str] = ()) -> Gauge:
        return self._add(Gauge(name, help, labels, self._lock))

    def histogram(self, name: str, help: str, labels: Sequence[str], buckets: Sequence[float]) -> Histogram:
        return self._add(Histogram(name, help, labels, self._lock, buckets))

    def _add(self, family: _F) -> _F:
        if any(f.name == family.name for f in self._families):
            raise ValueError(f"metric {family.name} registered twice")
        self._families.append(family)
        return family

    def render(self) -> str:
        with self._lock:
            lines: list[str] = []
            for fam in self._families:
                lines.extend(fam.header())
                lines.extend(fam.lines())
        return "\n".join(lines) + "\n"


class ServiceMetrics:
    """The service's metric families; model-level ones are labelled by model and version."""

    def __init__(self) -> None:
        r = self.registry = Registry()
        mv = ("model", "version")
        self.http_requests = r.counter(
            "textsieve_http_requests_total", "HTTP requests answered.", ("method", "route", "status")
        )
        self.http_seconds = r.histogram(
            "textsieve_http_request_seconds", "Time to answer an HTTP request.", ("route",), SECONDS_BUCKETS
        )
        self.predict_requests = r.counter("textsieve_predict_requests_total", "Prediction requests answered.", mv)
        self.texts = r.counter("textsieve_texts_total", "Texts scored.", mv)
        self.tokens = r.counter("textsieve_tokens_total", "Tokens scored (after truncation).", mv)
        self.unknown = r.counter("textsieve_unknown_tokens_total", "Scored tokens outside the vocabulary.", mv)
        self.truncated = r.counter("textsieve_truncated_texts_total", "Texts cut to the model's max_length.", mv)
        self.batch_texts = r.histogram("textsieve_batch_texts", "Texts per onnxruntime batch.", mv, SIZE_BUCKETS)
        self.queue_wait = r.histogram(
            "textsieve_queue_wait_seconds", "Time a text waited before its batch started.", mv, SECONDS_BUCKETS
        )
        self.inference = r.histogram(
            "textsieve_inference_seconds", "Time to encode, run and explain one batch.", mv, SECONDS_BUCKETS
        )
        self.served = r.gauge("textsieve_served_version", "Version answering unpinned requests, per model.", ("model",))
        self.ready = r.gauge("textsieve_ready", "1 when every served model is loaded and warmed.")
        self.swaps = r.counter("textsieve_swaps_total", "Version changes of a served model.", ("model", "outcome"))

    def render(self) -> str:
        return self.registry.render()


__all__ = ["CONTENT_TYPE", "Counter", "Gauge", "Histogram", "Registry", "ServiceMetrics"]
