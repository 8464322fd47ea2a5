"""Loading one model version for serving: verify the bundle, open one session per worker, warm up.

A version is only handed to requests after the warm-up has run every session once and checked
what the graph returns: the shapes the manifest promises, finite probabilities, and the same
result for a text alone as inside a batch with a much longer one (the design's batch-invariance
promise, within ``INVARIANCE_TOLERANCE``).
"""

from __future__ import annotations

import copy
import datetime as dt
import time
from dataclasses import dataclass, field
from typing import TYPE_CHECKING

import numpy as np

from textsieve.errors import BundleError
from textsieve.registry.bundle import Bundle, open_bundle
from textsieve.registry.drift import DriftBaseline, Window
from textsieve.registry.runtime import Predictor, make_session

if TYPE_CHECKING:
    from textsieve.service.inference.batcher import Batcher
    from textsieve.service.inference.workers import WorkerProcesses

INVARIANCE_TOLERANCE = 1e-5


@dataclass(eq=False)
class ServedModel:
    """One loaded, warmed version; ``predictors[i]`` belongs to inference thread i alone.

    In process mode ``predictors`` is empty: each worker process
    holds its own warmed copy under ``worker_key`` (see :mod:`textsieve.service.inference.workers`).
    """

    name: str
    version: int
    labels: list[str]
    predictors: list[Predictor]
    loaded_at: str
    load_seconds: float
    manifest_sha256: str | None = None
    batcher: Batcher | None = None
    active: int = 0  # requests in flight, counted on the event loop thread
    retiring: bool = False
    closed: bool = field(default=False)
    worker_key: tuple[str, int, int] | None = None  # set when loaded in the worker processes
    # The model's review threshold (a registry setting of the model, not of this version): read
    # by the batcher for each batch, so a change applies from the next batch on.
    review_threshold: float | None = None
    baseline: DriftBaseline | None = None  # the bundle's drift baseline (None for bundles without one)
    window: Window | None = None  # live texts' drift counts, when drift bookkeeping is on

    @property
    def key(self) -> tuple[str, int]:
        return (self.name, self.version)

    def loaded_in(self, procs: WorkerProcesses | None) -> bool:
        """Whether sessions for this version exist (in this process or every worker process)."""
        if self.worker_key is not None:
            return procs is not None and procs.holds(self.worker_key)
        return bool(self.predictors)

    def describe(self) -> dict[str, object]:
        return {
            "version": self.version,
            "labels": self.labels,
            "loaded_at": self.loaded_at,
            "load_seconds": round(self.load_seconds, 3),
        }


def _warm_texts(p: Predictor) -> list[str]:
    words = [t for t in p.vocab.tokens[2:200] if t.isalpha()] or ["text"]
    long = " ".join(words[i % len(words)] for i in range(p.max_length + 5))
    return ["", words[0], " ".join(words[:3]), long, "zzqx unknownish " + words[-1]]


def warm_and_check(p: Predictor, labels: list[str]) -> None:
    """Run the warm-up texts batched and alone; raise BundleError if the graph misbehaves."""
    texts = _warm_texts(p)
    enc = [p.encode(t) for t in texts]
    out = p.run(enc)
    n, classes, filters = len(texts), len(labels), len(p.filter_widths)
    expected = {
        "logits": (n, classes),
        "pooled": (n, filters),
        "positions": (n, filters),
        "contributions": (n, filters, classes),
    }
    for name, shape in expected.items():
        got = getattr(out, name).shape
        if got != shape:
            raise BundleError(f"warm-up: output {name} has shape {got}, the manifest implies {shape}")
    probs = p.probabilities(out.logits)
    if not np.isfinite(probs).all():
        raise BundleError("warm-up: the model returned non-finite probabilities")
    worst = 0.0
    for row, e in enumerate(enc):
        alone = p.probabilities(p.run([e]).logits)[0]
        worst = max(worst, float(np.abs(alone - probs[row]).max()))
    if worst > INVARIANCE_TOLERANCE:
        raise BundleError(
            f"warm-up: a text alone and inside a batch differ by {worst:.2e} "
            f"(allowed {INVARIANCE_TOLERANCE:.0e}); the graph does not mask padding"
        )
    p.results(enc, out, spans=3)


def load_served(
    bundle: Bundle,
    name: str,
    version: int,
    *,
    workers: int,
    batch_size: int,
    manifest_sha256: str | None = None,
    procs: WorkerProcesses | None = None,
) -> ServedModel:
    """Blocking: verify, load ``workers`` sessions and warm each. Run it off the event loop."""
    started = time.perf_counter()
    # The registry re-checked sha256 on fetch; open_bundle checks again, plus the graph's
    # inputs/outputs and the parity report, so the service never trusts a folder blindly.
    if procs is not None:
        # The whole check once, here; each worker process then re-hashes the files, loads and warms
        # its own copy without the graph check (which imports the onnx package: 0.75 s and 16 MB a
        # process).
        open_bundle(bundle.path)
        key = procs.new_key(name, version)
        procs.load(key, bundle.path, batch_size)
        return ServedModel(
            name=name,
            version=version,
            labels=list(bundle.manifest.labels),
            predictors=[],
            loaded_at=dt.datetime.now(dt.UTC).replace(microsecond=0).isoformat(),
            load_seconds=time.perf_counter() - started,
            manifest_sha256=manifest_sha256,
            worker_key=key,
            baseline=bundle.manifest.drift,
        )
    checked = open_bundle(bundle.path)
    first = Predictor.from_bundle(checked, threads=1, batch_size=batch_size)
    model_file = checked.path / checked.manifest.onnx.file
    predictors = [first]
    for _ in range(workers - 1):
        # Tokenizer and vocabulary are read-only and shared; each worker gets its own session.
        other = copy.copy(first)
        other.session = make_session(model_file, 1)
        predictors.append(other)
    labels = list(checked.manifest.labels)
    for p in predictors:
        warm_and_check(p, labels)
    return ServedModel(
        name=name,
        version=version,
        labels=labels,
        predictors=predictors,
        loaded_at=dt.datetime.now(dt.UTC).replace(microsecond=0).isoformat(),
        load_seconds=time.perf_counter() - started,
        manifest_sha256=manifest_sha256,
        baseline=checked.manifest.drift,
    )


__all__ = ["INVARIANCE_TOLERANCE", "ServedModel", "load_served", "warm_and_check"]
