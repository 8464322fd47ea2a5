"""report.json: what a version does on an evaluation set, and how it differs from another version.

Scored with the service's own code (:class:`~textsieve.registry.runtime.Predictor`), so the
figures are the ones callers get. Every section is computed on its own; one that cannot be
produced leaves a line in ``notes`` and the rest of the report stands.

Sources: bootstrap percentile intervals (Efron & Tibshirani, 1993); calibration by equal-width
confidence bins, ECE and maximum calibration error (Naeini et al., 2015; Guo et al., 2017,
eq. 3 and 5); Brier score (Brier, 1950: squared error summed over classes); temperature
scaling (Guo et al., 2017, §4.2); selective prediction by a confidence threshold, the
risk-coverage trade-off (Geifman & El-Yaniv, 2017); McNemar's exact test for two classifiers on
the same texts (McNemar, 1947; Dietterich, 1998) and its detectable difference (Connor, 1987).
"""

from __future__ import annotations

import datetime as dt
import hashlib
import math
from collections.abc import Callable, Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np
from numpy.typing import NDArray

from textsieve.errors import InputError, TextsieveError
from textsieve.registry import measures, stats
from textsieve.registry.bundle import Bundle
from textsieve.registry.evalsets import LabelledText, normalise, unknown_labels
from textsieve.registry.runtime import Encoded, Predictor

SCHEMA = 1
CALIBRATION_BINS = 15  # the gates' ECE uses the same 15 bins
TARGET_ACCURACIES = (0.95, 0.98, 0.99)
SELECTIVE_POINTS = 50
WORST = 12
EXAMPLES_PER_TRANSITION = 5
TEXT_LIMIT = 600  # characters of a text kept in the report: enough to read, not a copy of the data
# Token-count bands (inclusive); the last is open. Short texts are where CNNs with wide filters
# see padding, long ones where truncation bites, so the bands are narrow at the short end.
LENGTH_BANDS: tuple[tuple[int, int | None], ...] = ((0, 5), (6, 10), (11, 20), (21, 40), (41, 80), (81, None))


@dataclass
class Context:
    """What an extra section gets: the version under report, already scored, and the other one."""

    bundle: Bundle
    predictor: Predictor
    texts: list[str]
    labels: list[str]  # the true label of each text
    bands: tuple[tuple[int, int | None], ...]
    against: Bundle | None = None


@dataclass(frozen=True)
class Section:
    """An extra report section: ``compute`` fills ``report[key]``; ``render`` draws it as HTML.

    ``compute`` may raise: the report then records a note instead of the section. ``render``
    gets exactly the stored dict, so a report is redrawn from report.json alone.
    """

    key: str
    title: str
    compute: Callable[[Context], dict[str, Any]]
    render: Callable[[dict[str, Any]], str]


# Sections beyond the core, drawn after it. Empty here: registry/report/probe_sections.py builds
# the probes (word order, filters, embeddings) on this module's Section, so the default list is
# made when a report is built (default_sections) rather than imported at the top.
EXTRA_SECTIONS: list[Section] = []


def default_sections(
    run: Path | None = None, against_run: Path | None = None, against_name: str = "the other version"
) -> list[Section]:
    """The sections every report carries: :data:`EXTRA_SECTIONS` and the three probes
    (``run``/``against_run``: training run folders, for how the embeddings moved; ``against_name``:
    how the notes name the other version)."""
    from textsieve.registry.report.probe_sections import probe_sections

    return [*EXTRA_SECTIONS, *probe_sections(run, against_run=against_run, against_name=against_name)]


@dataclass
class _Scored:
    """One version's outputs on the evaluation set, in the model's label order of the report."""

    predictor: Predictor
    encoded: list[Encoded]
    logits: NDArray[np.float64]
    raw: NDArray[np.float64]  # probabilities at T = 1
    probs: NDArray[np.float64]  # calibrated, as served
    predicted: NDArray[np.int64]
    order: list[int] = field(default_factory=list)  # this version's class index of each report label


def band_name(band: tuple[int, int | None]) -> str:
    lo, hi = band
    return f"{lo}+" if hi is None else f"{lo}–{hi}"


def build_report(
    bundle: Bundle,
    examples: Sequence[LabelledText],
    *,
    model: str,
    version: int | None,
    against: tuple[Bundle, int] | None = None,
    bootstrap_resamples: int = 2000,
    seed: int = 0,
    extra_sections: Sequence[Section] | None = None,
    progress: Callable[[str], None] | None = None,
) -> dict[str, Any]:
    """The report of ``bundle`` on ``examples`` (InputError for an empty set or unknown labels)."""
    say = progress or (lambda _: None)
    labels = list(bundle.manifest.labels)
    examples = list(examples)
    if not examples:
        raise InputError("the evaluation set is empty; a report needs at least one labelled text")
    unknown = unknown_labels([e.label for e in examples], labels)
    if unknown:
        raise InputError(
            f"the evaluation set has labels version {version} does not know: "
            f"{', '.join(repr(x) for x in unknown[:10])}; allowed: {', '.join(labels)}"
        )
    index = {name: i for i, name in enumerate(labels)}
    targets = np.array([index[e.label] for e in examples], dtype=np.int64)
    texts = [e.text for e in examples]
    notes: list[str] = []
    say("scoring")
    cand = _score(Predictor.from_bundle(bundle), texts, labels)
    report: dict[str, Any] = {
        "schema": SCHEMA,
        "model": model,
        "version": version,
        "evalset_sha256": hashlib.sha256(normalise(examples).data).hexdigest(),
        "n": len(examples),
        "labels": labels,
        "temperature": cand.predictor.temperature,
        "created_at": dt.datetime.now(dt.UTC).isoformat(timespec="seconds"),
        "bootstrap": {"resamples": bootstrap_resamples, "seed": seed, "confidence": 0.95, "method": "percentile"},
        "cautions": CAUTIONS,
    }
    k = len(labels)
    say("metrics")
    report["metrics"] = _metrics(targets, cand, k, bootstrap_resamples, seed)
    report["per_class"] = _per_class(targets, cand.predicted, labels)
    report["confusion"] = _confusion(targets, cand.predicted, labels)
    report["calibration"] = _calibration(targets, cand)
    report["selective"], report["selective_targets"] = _selective(targets, cand)
    report["by_length"] = _by_length(targets, cand)
    report["worst"] = _worst(targets, cand, labels)
    if against is not None:
        say("comparison")
        other_bundle, other_version = against
        try:
            report["comparison"] = _comparison(
                targets, cand, other_bundle, other_version, labels, bootstrap_resamples, seed
            )
        except TextsieveError as exc:
            notes.append(f"comparison with version {other_version}: {exc.message}")
    context = Context(bundle, cand.predictor, texts, [e.label for e in examples], LENGTH_BANDS, None)
    if against is not None:
        context.against = against[0]
    for section in default_sections() if extra_sections is None else extra_sections:
        say(section.key)
        try:
            report[section.key] = section.compute(context)
        except TextsieveError as exc:
            notes.append(f"{section.title}: {exc.message}")
        except (ValueError, RuntimeError, OSError, KeyError) as exc:
            notes.append(f"{section.title}: could not be produced ({type(exc).__name__}: {exc})")
    report["notes"] = notes
    clean: dict[str, Any] = finite(report)
    return clean


CAUTIONS = (
    "Predictions are aids for human review: decisions stay with accountable people. The model can carry "
    "biases of its training data, and these figures hold only for texts like this evaluation set; monitor "
    "unknown tokens, truncation and the label mix in production and re-evaluate when they drift."
)


def finite(value: Any) -> Any:
    """``value`` with NaN and infinities as None (JSON has neither), recursively."""
    if isinstance(value, float):
        return value if math.isfinite(value) else None
    if isinstance(value, dict):
        return {k: finite(v) for k, v in value.items()}
    if isinstance(value, list | tuple):
        return [finite(v) for v in value]
    if isinstance(value, np.floating | np.integer):
        return finite(value.item())
    return value


# -- scoring --------------------------------------------------------------------------------
def _score(predictor: Predictor, texts: list[str], labels: list[str]) -> _Scored:
    """Score ``texts``, columns reordered to ``labels`` (another version may order them differently)."""
    own = predictor.labels
    missing = sorted(set(labels) - set(own)) + sorted(set(own) - set(labels))
    if missing:
        raise InputError(
            f"labels differ ({', '.join(repr(x) for x in missing[:10])}); only same-label versions compare"
        )
    order = [own.index(name) for name in labels]
    # Offsets are found only for the few texts whose spans the report shows (the worst mistakes).
    encoded = [predictor.encode(t, offsets=False) for t in texts]
    # Logits alone, in chunks: the worst mistakes' spans run their few texts again (_spans).
    logits = np.asarray(predictor.logits(encoded), dtype=np.float64)[:, order]
    raw = measures.softmax(logits, 1.0)
    probs = measures.softmax(logits, predictor.temperature)
    return _Scored(predictor, encoded, logits, raw, probs, probs.argmax(axis=1).astype(np.int64), order)


def _cm(t: NDArray[np.int64], p: NDArray[np.int64], k: int) -> NDArray[np.int64]:
    # bincount instead of measures.confusion_matrix's np.add.at: the bootstrap calls this thousands of times
    return np.bincount(t * k + p, minlength=k * k).reshape(k, k)


def _prf(cm: NDArray[np.int64]) -> tuple[NDArray[np.float64], NDArray[np.float64], NDArray[np.float64]]:
    """Per-class precision, recall and F1 from a confusion matrix, 0 where undefined (zero_division=0)."""
    tp = np.diag(cm).astype(np.float64)
    predicted, actual = cm.sum(axis=0).astype(np.float64), cm.sum(axis=1).astype(np.float64)
    precision = np.divide(tp, predicted, out=np.zeros_like(tp), where=predicted > 0)
    recall = np.divide(tp, actual, out=np.zeros_like(tp), where=actual > 0)
    denom = predicted + actual
    f1 = np.divide(2 * tp, denom, out=np.zeros_like(tp), where=denom > 0)
    return precision, recall, f1


def _macro_f1(cm: NDArray[np.int64]) -> float:
    """Macro-F1 over the labels present in the texts or the predictions, as the gates compute it
    (scikit-learn's ``f1_score(average="macro")`` without a ``labels`` argument)."""
    present = (cm.sum(axis=0) + cm.sum(axis=1)) > 0
    return float(_prf(cm)[2][present].mean()) if present.any() else 0.0


def _metrics(targets: NDArray[np.int64], s: _Scored, k: int, resamples: int, seed: int) -> dict[str, Any]:
    correct = (s.predicted == targets).astype(np.float64)
    n = len(targets)
    cal = _calibration_figures(s.probs, targets)
    return {
        "accuracy": float(correct.mean()),
        "accuracy_ci": list(stats.bootstrap_interval(lambda i: float(correct[i].mean()), n, resamples, seed)),
        "macro_f1": _macro_f1(_cm(targets, s.predicted, k)),
        "macro_f1_ci": list(
            stats.bootstrap_interval(lambda i: _macro_f1(_cm(targets[i], s.predicted[i], k)), n, resamples, seed)
        ),
        **cal,
    }


def _per_class(targets: NDArray[np.int64], predicted: NDArray[np.int64], labels: list[str]) -> dict[str, Any]:
    cm = _cm(targets, predicted, len(labels))
    precision, recall, f1 = _prf(cm)
    support = cm.sum(axis=1)
    return {
        name: {
            "precision": float(precision[i]),
            "recall": float(recall[i]),
            "f1": float(f1[i]),
            "support": int(support[i]),
        }
        for i, name in enumerate(labels)
    }


def _confusion(targets: NDArray[np.int64], predicted: NDArray[np.int64], labels: list[str]) -> dict[str, Any]:
    cm = _cm(targets, predicted, len(labels))
    rows = cm.sum(axis=1, keepdims=True).astype(np.float64)
    normalised = np.divide(cm, rows, out=np.zeros(cm.shape, dtype=np.float64), where=rows > 0)
    return {"labels": labels, "counts": cm.tolist(), "normalised": normalised.tolist()}


# -- calibration ----------------------------------------------------------------------------
def reliability(
    probs: NDArray[np.float64], targets: NDArray[np.int64], bins: int = CALIBRATION_BINS
) -> list[dict[str, Any]]:
    """Equal-width bins of top-class confidence; a prediction with confidence c is in bin m when
    (m-1)/M < c ≤ m/M (Guo et al., 2017, §2), as ``measures.expected_calibration_error`` bins it."""
    confidence = probs.max(axis=1)
    correct = (probs.argmax(axis=1) == targets).astype(np.float64)
    edges = np.linspace(0.0, 1.0, bins + 1)
    which = np.clip(np.searchsorted(edges, confidence, side="left") - 1, 0, bins - 1)
    out = []
    for m in range(bins):
        sel = which == m
        count = int(sel.sum())
        out.append(
            {
                "lower": float(edges[m]),
                "upper": float(edges[m + 1]),
                "count": count,
                "confidence": float(confidence[sel].mean()) if count else math.nan,
                "accuracy": float(correct[sel].mean()) if count else math.nan,
            }
        )
    return out


def maximum_calibration_error(
    probs: NDArray[np.float64], targets: NDArray[np.int64], bins: int = CALIBRATION_BINS
) -> float:
    """MCE: the largest |accuracy − confidence| over non-empty bins (Naeini et al., 2015; Guo et al., 2017, eq. 5)."""
    gaps = [abs(b["accuracy"] - b["confidence"]) for b in reliability(probs, targets, bins) if b["count"]]
    return float(max(gaps)) if gaps else 0.0


def brier(probs: NDArray[np.float64], targets: NDArray[np.int64]) -> float:
    """Brier score: squared error summed over classes, averaged over texts (Brier, 1950)."""
    onehot = np.zeros_like(probs)
    onehot[np.arange(len(targets)), targets] = 1.0
    return float(((probs - onehot) ** 2).sum(axis=1).mean())


def _nll_probs(probs: NDArray[np.float64], targets: NDArray[np.int64]) -> float:
    # measures.nll takes logits; log of the probabilities (floored like scikit-learn's log_loss) is the same figure
    p = np.clip(probs[np.arange(len(targets)), targets], np.finfo(np.float64).eps, 1.0)
    return float(-np.log(p).mean())


def _calibration_figures(probs: NDArray[np.float64], targets: NDArray[np.int64]) -> dict[str, float]:
    return {
        "ece": measures.expected_calibration_error(probs, targets, bins=CALIBRATION_BINS),
        "mce": maximum_calibration_error(probs, targets),
        "brier": brier(probs, targets),
        "nll": _nll_probs(probs, targets),
    }


def _calibration(targets: NDArray[np.int64], s: _Scored) -> dict[str, Any]:
    refit = measures.fit_temperature(s.logits, targets)
    return {
        "bins": CALIBRATION_BINS,
        "temperature": s.predictor.temperature,
        "before": {**_calibration_figures(s.raw, targets), "reliability": reliability(s.raw, targets)},
        "after": {**_calibration_figures(s.probs, targets), "reliability": reliability(s.probs, targets)},
        # What temperature this evaluation set itself would choose: far from the stored one means the
        # validation texts the temperature was fitted on differ from these.
        "refit_temperature": refit,
        # "lower" or "upper" when that search stopped at a bound of its bracket: no minimum, so no fit.
        "refit_temperature_bound": measures.temperature_bound(refit),
    }


# -- selective prediction -------------------------------------------------------------------
def _selective(targets: NDArray[np.int64], s: _Scored) -> tuple[list[dict[str, Any]], list[dict[str, Any]]]:
    """Accuracy against coverage when texts below a confidence threshold go to a person."""
    confidence = s.probs.max(axis=1)
    correct = (s.predicted == targets).astype(np.int64)
    order = np.argsort(-confidence, kind="stable")
    conf_sorted = confidence[order]
    hits = np.cumsum(correct[order])
    n = len(targets)
    # Keep only the last of each run of equal confidences: a threshold keeps all of a tie or none.
    ends = np.flatnonzero(np.r_[conf_sorted[1:] != conf_sorted[:-1], True])
    kept = ends + 1
    acc = hits[ends] / kept
    curve = []
    picks = np.unique(np.searchsorted(kept, np.linspace(1, n, SELECTIVE_POINTS), side="left").clip(0, len(ends) - 1))
    for j in picks:
        curve.append(
            {"threshold": float(conf_sorted[ends[j]]), "coverage": float(kept[j] / n), "accuracy": float(acc[j])}
        )
    table = []
    for target in TARGET_ACCURACIES:
        ok = np.flatnonzero(acc >= target)
        row: dict[str, Any] = {"target_accuracy": target}
        if ok.size:
            j = int(ok.max())
            row |= {"threshold": float(conf_sorted[ends[j]]), "coverage": float(kept[j] / n), "accuracy": float(acc[j])}
        else:
            row |= {"threshold": None, "coverage": 0.0, "accuracy": None}
        # The same with the Wilson lower bound at or above the target: a threshold this evaluation
        # set supports with 95 % confidence, in the spirit of Geifman & El-Yaniv's guaranteed risk.
        bounded = [j for j in range(len(ends)) if stats.wilson_interval(int(hits[ends[j]]), int(kept[j]))[0] >= target]
        if bounded:
            j = max(bounded)
            row |= {"threshold_bounded": float(conf_sorted[ends[j]]), "coverage_bounded": float(kept[j] / n)}
        else:
            row |= {"threshold_bounded": None, "coverage_bounded": 0.0}
        table.append(row)
    return curve, table


# -- by length ------------------------------------------------------------------------------
def _by_length(targets: NDArray[np.int64], s: _Scored) -> list[dict[str, Any]]:
    tokens = np.array([e.tokens for e in s.encoded], dtype=np.int64)
    kept = np.array([len(e.ids) for e in s.encoded], dtype=np.int64)
    unknown = np.array([e.unknown for e in s.encoded], dtype=np.int64)
    truncated = tokens > kept
    correct = s.predicted == targets
    rows = []
    for band in LENGTH_BANDS:
        lo, hi = band
        sel = (tokens >= lo) & (tokens <= (hi if hi is not None else np.iinfo(np.int64).max))
        n = int(sel.sum())
        if not n:
            continue
        kept_tokens = int(kept[sel].sum())
        rows.append(
            {
                "band": band_name(band),
                "min_tokens": lo,
                "max_tokens": hi,
                "n": n,
                "accuracy": float(correct[sel].mean()),
                "truncated_share": float(truncated[sel].mean()),
                "unknown_rate": float(unknown[sel].sum() / kept_tokens) if kept_tokens else 0.0,
            }
        )
    return rows


# -- mistakes -------------------------------------------------------------------------------
def _clip(text: str) -> str:
    return text if len(text) <= TEXT_LIMIT else text[: TEXT_LIMIT - 1] + "…"


def _spans(s: _Scored, row: int, report_class: int) -> list[dict[str, object]]:
    own = s.order[report_class]
    enc = s.encoded[row]
    # The text run alone: its outputs are those it had in the whole set (padding is masked).
    return [sp.public() for sp in s.predictor.spans(enc, s.predictor.run([enc]), 0, own, 3)]


def _worst(targets: NDArray[np.int64], s: _Scored, labels: list[str]) -> list[dict[str, Any]]:
    confidence = s.probs.max(axis=1)
    wrong = np.flatnonzero(s.predicted != targets)
    wrong = wrong[np.argsort(-confidence[wrong], kind="stable")][:WORST]
    return [
        {
            "index": int(i),
            "text": _clip(s.encoded[i].text),
            "label": labels[int(targets[i])],
            "predicted": labels[int(s.predicted[i])],
            "confidence": float(confidence[i]),
            "probability_of_label": float(s.probs[i, targets[i]]),
            "spans": _spans(s, int(i), int(s.predicted[i])),
        }
        for i in wrong
    ]


# -- comparison -----------------------------------------------------------------------------
def _comparison(
    targets: NDArray[np.int64],
    cand: _Scored,
    other_bundle: Bundle,
    other_version: int,
    labels: list[str],
    resamples: int,
    seed: int,
) -> dict[str, Any]:
    other = _score(Predictor.from_bundle(other_bundle), [e.text for e in cand.encoded], labels)
    k = len(labels)
    n = len(targets)
    new_ok = cand.predicted == targets
    old_ok = other.predicted == targets
    r2w = old_ok & ~new_ok
    w2r = ~old_ok & new_ok
    w2w = ~old_ok & ~new_ok & (cand.predicted != other.predicted)
    diff = new_ok.astype(np.float64) - old_ok.astype(np.float64)
    cm_new, cm_old = _cm(targets, cand.predicted, k), _cm(targets, other.predicted, k)

    def f1_delta(i: NDArray[np.int64]) -> float:
        return _macro_f1(_cm(targets[i], cand.predicted[i], k)) - _macro_f1(_cm(targets[i], other.predicted[i], k))

    p_new, r_new, f_new = _prf(cm_new)
    p_old, r_old, f_old = _prf(cm_old)
    cal_new, cal_old = _calibration_figures(cand.probs, targets), _calibration_figures(other.probs, targets)
    discordant = int(r2w.sum() + w2r.sum())

    def examples(mask: NDArray[np.bool_]) -> list[dict[str, Any]]:
        conf = cand.probs.max(axis=1)
        rows = np.flatnonzero(mask)
        rows = rows[np.argsort(-conf[rows], kind="stable")][:EXAMPLES_PER_TRANSITION]
        return [
            {
                "index": int(i),
                "text": _clip(cand.encoded[i].text),
                "label": labels[int(targets[i])],
                "this": {
                    "predicted": labels[int(cand.predicted[i])],
                    "confidence": float(cand.probs[i].max()),
                    "spans": _spans(cand, int(i), int(cand.predicted[i])),
                },
                "against": {
                    "predicted": labels[int(other.predicted[i])],
                    "confidence": float(other.probs[i].max()),
                    "spans": _spans(other, int(i), int(other.predicted[i])),
                },
            }
            for i in rows
        ]

    return {
        "against": other_version,
        "n": n,
        "agreement": float((cand.predicted == other.predicted).mean()),
        "right_to_wrong": int(r2w.sum()),
        "wrong_to_right": int(w2r.sum()),
        "wrong_to_other_wrong": int(w2w.sum()),
        "both_right": int((old_ok & new_ok).sum()),
        "mcnemar_p": stats.mcnemar_exact_p(int(r2w.sum()), int(w2r.sum())),
        "accuracy_delta": float(diff.mean()),
        "accuracy_delta_ci": list(stats.bootstrap_interval(lambda i: float(diff[i].mean()), n, resamples, seed)),
        "macro_f1_delta": _macro_f1(cm_new) - _macro_f1(cm_old),
        "macro_f1_delta_ci": list(stats.bootstrap_interval(f1_delta, n, resamples, seed)),
        "per_class": {
            name: {
                "precision_delta": float(p_new[j] - p_old[j]),
                "recall_delta": float(r_new[j] - r_old[j]),
                "f1_delta": float(f_new[j] - f_old[j]),
            }
            for j, name in enumerate(labels)
        },
        "calibration": {
            key: {"this": cal_new[key], "against": cal_old[key], "delta": cal_new[key] - cal_old[key]}
            for key in cal_new
        },
        "examples": {
            "right_to_wrong": examples(r2w),
            "wrong_to_right": examples(w2r),
            "wrong_to_other_wrong": examples(w2w),
        },
        # Connor (1987) at alpha 0.05, power 0.8, with the disagreement share these versions show
        # (at least one text's worth, so identical versions still get a finite figure).
        "minimum_detectable_difference": stats.minimum_detectable_difference(n, max(discordant, 1) / n),
        "discordant_share": discordant / n,
    }


__all__ = [
    "CALIBRATION_BINS",
    "EXTRA_SECTIONS",
    "default_sections",
    "LENGTH_BANDS",
    "SCHEMA",
    "TARGET_ACCURACIES",
    "Context",
    "Section",
    "band_name",
    "brier",
    "build_report",
    "finite",
    "maximum_calibration_error",
    "reliability",
]
