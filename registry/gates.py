"""The gates a version passes on its way to live, each giving a stored, explained result.

- ``parity``: the bundle's own parity report (ONNX vs PyTorch) passed within its tolerance.
- ``labels``: the same set of labels as the live version, so callers keyed on label names keep
  working (order may differ: results are keyed by name).
- ``cautions``: the version's model card makes the four points of its cautions section
  (registry/cautions.py). Publish refuses a card without them, but a version published before
  that check may hold one, and promoting it would serve a model whose card never says that
  predictions are aids for review. The fix is a new version (a published card never changes):
  the detail says to publish again from a bundle whose card has the section.
- ``macro_f1``: on the model's evaluation set, macro-F1 does not drop by more than
  ``macro_f1_tolerance`` (default 0.01) against the live version.
- ``ece``: on the same set, expected calibration error (15 equal-width bins; Naeini et al.,
  2015; Guo et al., 2017, eq. 3) does not rise by more than ``ece_tolerance`` (default 0.02).
- ``shadow_agreement`` (optional, off unless ``shadow_agreement_min`` is set): over at least
  ``shadow_min_texts`` live texts the replicas scored in the shadow, the candidate agreed with
  the live version's label at least that often.

- ``mcnemar`` (when the model's ``mcnemar`` setting is on): refuse a candidate that is
  significantly worse than live on the same texts: the exact McNemar p of the texts the two
  versions disagree on is below ``mcnemar_p`` *and* more texts went right→wrong than
  wrong→right (McNemar, 1947; recommended for comparing two classifiers on one test set by
  Dietterich, 1998, §3.2). Unlike a fixed tolerance it accounts for the evaluation set's size:
  with 600 texts a 0.01 change is noise, with 50,000 it is not. With ``tolerances`` off the
  statistical gate replaces the two fixed ones; with both on, both must pass.

Without a live version there is nothing to compare with: ``labels``, ``macro_f1`` and ``ece``
pass with detail "no live version" (the candidate's own scores are still recorded when an
evaluation set exists). With a live version but no evaluation set the metric gates fail and
say how to add one: "not worse" cannot be shown without data.

A stored set with texts the service refuses (textsieve/texts.py; sets registered before labelled
files obeyed those rules may hold a NUL or only zero-width characters) is not scored at all: with
a live version the metric gates fail naming the rows and saying to register a cleaned set. Skipping
those rows instead would judge a set other than the one whose sha256 the gates record.

Too small a set. On one text, or on texts of one label, "not worse than live" means nothing, yet
the metric gates passed it ("on 1 texts"). So with a live version to compare against they refuse
an evaluation set of fewer than ``evalset_min_texts`` texts (default 50) or with fewer than
``evalset_min_per_label`` texts (default 5) of any label of the candidate, naming what is short and
how to lower the minimums; ``--force`` with a reason still overrides, recorded as ever. The defaults
are floors against degenerate sets, not a promise of power (common practice, no single source). At 50
texts one text still moves accuracy by 0.02, twice the default macro-F1 tolerance: the fixed
tolerances suit far larger sets, and the McNemar gate weighs the set's size itself.

Macro-F1 is averaged over the labels present in the evaluation set or in the predictions,
which is scikit-learn's ``f1_score(average="macro")`` (a label nobody uses would add a 0 to
both versions alike and only blur the figure).
"""

from __future__ import annotations

from collections import Counter
from collections.abc import Callable, Mapping, Sequence
from dataclasses import asdict, dataclass

import numpy as np
from numpy.typing import NDArray

from textsieve.errors import TextsieveError
from textsieve.registry import measures
from textsieve.registry.bundle import Bundle
from textsieve.registry.cautions import POINTS, REQUIRED, cautions_problem, cautions_sections, missing_points
from textsieve.registry.evalsets import LabelledText, unknown_labels
from textsieve.registry.manifest import Manifest
from textsieve.registry.model_settings import (
    ECE_RISE,
    EVALSET_MIN_PER_LABEL,
    EVALSET_MIN_TEXTS,
    MACRO_F1_DROP,
    MCNEMAR,
    MCNEMAR_P,
    SHADOW_AGREEMENT_MIN,
    SHADOW_MIN_TEXTS,
    TOLERANCES,
    ModelSettings,
    Value,
)
from textsieve.registry.records import GateResult
from textsieve.registry.shadow import ShadowCounts
from textsieve.registry.stats import mcnemar_exact_p, wilson_interval

# Floating-point slack so that a change of exactly the tolerance passes as documented.
_EPS = 1e-12
ECE_BINS = 15
# Texts scored at once by the gates. Predictor.run keeps each filter's pooled value, window and
# per-class contribution for every text it is given: 8.4 KB a text for 300 filters (Kim, 2014) and
# 4 labels, so a 500,000-text evaluation set took 4 GB per version where the gates need the logits.
GRADE_CHUNK = 4096


@dataclass(frozen=True)
class GateSettings:
    """The gates' settings for one model (registry-wide defaults when given to ``open_registry``)."""

    macro_f1_tolerance: float = MACRO_F1_DROP.default
    ece_tolerance: float = ECE_RISE.default
    tolerances: bool = TOLERANCES.default
    mcnemar: bool = MCNEMAR.default
    mcnemar_p: float = MCNEMAR_P.default
    # The shadow-agreement gate is off (None) unless a level is set; see shadow_gate.
    shadow_agreement_min: float | None = SHADOW_AGREEMENT_MIN.default
    shadow_min_texts: int = int(SHADOW_MIN_TEXTS.default)
    evalset_min_texts: int = int(EVALSET_MIN_TEXTS.default)
    evalset_min_per_label: int = int(EVALSET_MIN_PER_LABEL.default)

    def as_defaults(self) -> dict[str, Value]:
        """These values as per-model setting defaults (keys of textsieve.registry.model_settings)."""
        return {
            MACRO_F1_DROP.key: self.macro_f1_tolerance,
            ECE_RISE.key: self.ece_tolerance,
            TOLERANCES.key: self.tolerances,
            MCNEMAR.key: self.mcnemar,
            MCNEMAR_P.key: self.mcnemar_p,
            SHADOW_AGREEMENT_MIN.key: self.shadow_agreement_min,
            SHADOW_MIN_TEXTS.key: float(self.shadow_min_texts),
            EVALSET_MIN_TEXTS.key: float(self.evalset_min_texts),
            EVALSET_MIN_PER_LABEL.key: float(self.evalset_min_per_label),
        }

    @classmethod
    def of(cls, settings: ModelSettings) -> GateSettings:
        return cls(
            macro_f1_tolerance=settings.get(MACRO_F1_DROP),
            ece_tolerance=settings.get(ECE_RISE),
            tolerances=settings.get(TOLERANCES),
            mcnemar=settings.get(MCNEMAR),
            mcnemar_p=settings.get(MCNEMAR_P),
            shadow_agreement_min=settings.get(SHADOW_AGREEMENT_MIN),
            shadow_min_texts=int(settings.get(SHADOW_MIN_TEXTS)),
            evalset_min_texts=int(settings.get(EVALSET_MIN_TEXTS)),
            evalset_min_per_label=int(settings.get(EVALSET_MIN_PER_LABEL)),
        )


@dataclass(frozen=True)
class Scores:
    texts: int
    accuracy: float
    macro_f1: float
    ece: float


@dataclass(frozen=True)
class Graded:
    """Scores plus, per text, whether the version got it right (what McNemar's test pairs up)."""

    scores: Scores
    correct: NDArray[np.bool_]


def score(bundle: Bundle, examples: list[LabelledText]) -> Scores:
    """Score a bundle on labelled texts with onnxruntime, exactly as the service would."""
    return grade(bundle, examples).scores


def grade(bundle: Bundle, examples: list[LabelledText]) -> Graded:
    """:func:`score`, keeping each text's right or wrong."""
    from textsieve.registry.runtime import Predictor

    labels = bundle.manifest.labels
    index = {name: i for i, name in enumerate(labels)}
    targets = np.array([index[e.label] for e in examples], dtype=np.int64)
    predictor = Predictor.from_bundle(bundle, threads=1)
    logits = np.empty((len(examples), len(labels)), np.float32)
    for lo in range(0, len(examples), GRADE_CHUNK):
        part = examples[lo : lo + GRADE_CHUNK]
        logits[lo : lo + len(part)] = predictor.run([predictor.encode(e.text, offsets=False) for e in part]).logits
    probs = predictor.probabilities(logits)
    predicted = probs.argmax(axis=1)
    scores = Scores(
        texts=len(examples),
        accuracy=measures.accuracy(targets, predicted),
        macro_f1=present_macro_f1(targets, predicted),
        ece=measures.expected_calibration_error(probs, targets, bins=ECE_BINS),
    )
    return Graded(scores, predicted == targets)


def present_macro_f1(targets: NDArray[np.int64], predicted: NDArray[np.int64]) -> float:
    """Macro-F1 over the classes that occur in ``targets`` or ``predicted``."""
    present = np.union1d(targets, predicted)
    remap = {int(c): i for i, c in enumerate(present)}
    t = np.array([remap[int(c)] for c in targets], dtype=np.int64)
    p = np.array([remap[int(c)] for c in predicted], dtype=np.int64)
    return measures.macro_f1(t, p, len(present))


def parity_gate(manifest: Manifest) -> GateResult:
    p = manifest.parity
    figures = {
        "max_abs_prob_diff": p.max_abs_prob_diff,
        "tolerance": p.tolerance,
        "label_agreement": p.label_agreement,
        "batch_invariance_max_diff": p.batch_invariance_max_diff,
        "texts": p.texts,
    }
    ok = p.passed and p.max_abs_prob_diff <= p.tolerance and p.label_agreement >= 1.0
    detail = (
        f"max |Δprobability| {p.max_abs_prob_diff:.2e} ≤ {p.tolerance:.0e}, labels agree on {p.texts} texts"
        if ok
        else f"parity failed: max |Δprobability| {p.max_abs_prob_diff:.2e} (tolerance {p.tolerance:.0e}), "
        f"label agreement {p.label_agreement:.2%}"
    )
    return GateResult(name="parity", passed=ok, detail=detail, figures=figures)


def cautions_gate(model: str, version: int, card: bytes | None) -> GateResult:
    """The card's cautions make every point publish asks for (``None``: the version stores no card)."""
    problem: str | None
    if card is None:
        problem, text = "is missing", ""
    else:
        try:
            text = card.decode("utf-8")
        except UnicodeDecodeError as exc:
            problem, text = f"is not UTF-8 text (byte {exc.start})", ""
        else:
            problem = cautions_problem(text)
    missing = missing_points(text)
    figures = {"sections": [heading for heading, _ in cautions_sections(text)], "missing": missing}
    if problem is None:
        named = ", ".join(repr(h) for h in figures["sections"])
        return GateResult(
            name="cautions",
            passed=True,
            detail=f"the card's cautions ({named}) make all {len(POINTS)} points",
            figures=figures,
        )
    return GateResult(
        name="cautions",
        passed=False,
        detail=(
            f"version {version}'s card.md {problem}: {REQUIRED}. It was published before publish checked that, and "
            "a published card never changes: add the section to the bundle's card.md (or export the run again: "
            f"'textsieve export RUN --out BUNDLE' writes it), record the card's sha256 in manifest.json, then "
            f"'textsieve publish BUNDLE --model {model}' and promote the new version"
        ),
        figures=figures,
    )


def labels_gate(candidate: list[str], live: list[str] | None, live_version: int | None) -> GateResult:
    if live is None:
        return GateResult(name="labels", passed=True, detail="no live version", figures={"candidate": candidate})
    figures = {"candidate": candidate, "live": live}
    added, removed = sorted(set(candidate) - set(live)), sorted(set(live) - set(candidate))
    if not added and not removed:
        same_order = candidate == live
        detail = (
            f"same labels as live version {live_version}"
            if same_order
            else f"same labels as live version {live_version} (different output order; results are keyed by name)"
        )
        return GateResult(name="labels", passed=True, detail=detail, figures=figures)
    parts = []
    if added:
        parts.append("adds " + ", ".join(repr(x) for x in added))
    if removed:
        parts.append("drops " + ", ".join(repr(x) for x in removed))
    return GateResult(
        name="labels",
        passed=False,
        figures={**figures, "added": added, "removed": removed},
        detail=f"labels differ from live version {live_version}: {'; '.join(parts)}",
    )


@dataclass(frozen=True)
class Side:
    """One version as the metric gates see it: its number, labels and a way to load it."""

    version: int
    labels: list[str]
    load: Callable[[], Bundle]


def report_path(model: str, version: int) -> str:
    """Where the service serves a version's evaluation report, and the command that writes it."""
    return (
        f"/v1/models/{model}/versions/{version}/report (write it: textsieve evaluate {model} {version} --against live)"
    )


def evalset_shortfall(
    counts: Mapping[str, int], labels: Sequence[str], settings: GateSettings
) -> tuple[str, dict[str, int]] | None:
    """What makes an evaluation set (``counts``: texts per label) too small to judge ``labels`` on
    under ``settings``, and the short labels' counts; None when it is large enough."""
    texts = sum(counts.values())
    short = {label: counts.get(label, 0) for label in labels if counts.get(label, 0) < settings.evalset_min_per_label}
    parts = []
    if texts < settings.evalset_min_texts:
        parts.append(f"{texts} texts, need at least {settings.evalset_min_texts} ({EVALSET_MIN_TEXTS.key})")
    if short:
        listed = ", ".join(f"{label!r} {n}" for label, n in list(short.items())[:10])
        more = f" and {len(short) - 10} more" if len(short) > 10 else ""
        parts.append(
            f"labels with fewer than {settings.evalset_min_per_label} texts ({EVALSET_MIN_PER_LABEL.key}): "
            f"{listed}{more}"
        )
    return ("; ".join(parts), short) if parts else None


def too_small_advice(model: str) -> str:
    return (
        f"register a larger set (textsieve evalset add {model} FILE) or lower the minimums "
        f"(textsieve gates {model} --set {EVALSET_MIN_TEXTS.key}=N --set {EVALSET_MIN_PER_LABEL.key}=N --reason …)"
    )


def metric_gates(
    model: str,
    candidate: Side,
    live: Side | None,
    evalset: list[LabelledText] | None,
    evalset_sha256: str | None,
    settings: GateSettings,
    refused: str | None = None,
) -> list[GateResult]:
    """The metric gates on ``evalset``; ``refused`` says why the stored set must not be scored at
    all (it holds texts the service refuses: scoring them, or scoring the rest, would judge a set
    other than the one recorded), and then no version is scored."""
    names = (["mcnemar"] if settings.mcnemar else []) + (["macro_f1", "ece"] if settings.tolerances else [])
    base: dict[str, object] = {
        "evalset_sha256": evalset_sha256,
        "texts": None if evalset is None else len(evalset),
        "macro_f1_tolerance": settings.macro_f1_tolerance,
        "ece_tolerance": settings.ece_tolerance,
        "evalset_min_texts": settings.evalset_min_texts,
        "evalset_min_per_label": settings.evalset_min_per_label,
    }
    if settings.mcnemar:
        base["mcnemar_p_level"] = settings.mcnemar_p
    if not names:
        return []
    if evalset is None:
        if live is None:
            return [GateResult(name=n, passed=True, detail="no live version", figures=base) for n in names]
        how = f"textsieve evalset add {model} FILE (or textsieve publish BUNDLE --model {model} --evalset FILE)"
        detail = (
            f"no evaluation set registered for {model!r}, so 'no worse than live' cannot be checked; add one: {how}"
        )
        return [GateResult(name=n, passed=False, detail=detail, figures=base) for n in names]
    if refused is not None:
        if live is None:
            detail = f"no live version (the candidate was not scored: {refused})"
            return [GateResult(name=n, passed=True, detail=detail, figures=base) for n in names]
        return [GateResult(name=n, passed=False, detail=refused, figures=base) for n in names]
    counts = Counter(e.label for e in evalset)
    # A set with labels a side does not know is refused by _score_side, naming them: say that first.
    if live is not None and not unknown_labels(counts, candidate.labels) and not unknown_labels(counts, live.labels):
        shortfall = evalset_shortfall(counts, candidate.labels, settings)
        if shortfall is not None:
            why, short = shortfall
            detail = (
                f"the evaluation set is too small to judge against live version {live.version}: {why}; "
                + too_small_advice(model)
            )
            figures = {**base, "label_counts": dict(sorted(counts.items())), "short_labels": short}
            return [GateResult(name=n, passed=False, detail=detail, figures=figures) for n in names]

    cand, problem = _score_side(candidate, evalset, paired=settings.mcnemar)
    if cand is None:
        return [
            GateResult(name=n, passed=False, detail=f"version {candidate.version}: {problem}", figures=base)
            for n in names
        ]
    cand_scores = cand.scores
    figures = {**base, "candidate": asdict(cand_scores)}
    if live is None:
        detail = "no live version"
        own = {
            "mcnemar": f"{detail} (candidate accuracy {cand_scores.accuracy:.4f})",
            "macro_f1": f"{detail} (candidate macro-F1 {cand_scores.macro_f1:.4f})",
            "ece": f"{detail} (candidate ECE {cand_scores.ece:.4f})",
        }
        return [GateResult(name=n, passed=True, figures=figures, detail=own[n]) for n in names]
    live_graded, problem = _score_side(live, evalset, paired=settings.mcnemar)
    if live_graded is None:
        return [
            GateResult(name=n, passed=False, detail=f"live version {live.version}: {problem}", figures=figures)
            for n in names
        ]
    live_scores = live_graded.scores
    figures = {**figures, "live": asdict(live_scores)}
    out: list[GateResult] = []
    if settings.mcnemar:
        out.append(_mcnemar_gate(model, candidate.version, live.version, cand, live_graded, figures, settings))
    if not settings.tolerances:
        return out

    drop = live_scores.macro_f1 - cand_scores.macro_f1
    change = cand_scores.macro_f1 - live_scores.macro_f1  # not -drop: equal scores read +0.0000, not -0.0000
    f1_ok = drop <= settings.macro_f1_tolerance + _EPS
    f1 = GateResult(
        name="macro_f1",
        passed=f1_ok,
        figures={**figures, "change": change},
        detail=(
            f"macro-F1 {cand_scores.macro_f1:.4f} vs live {live_scores.macro_f1:.4f} "
            f"(change {change:+.4f}, allowed drop {settings.macro_f1_tolerance:.4f}) on {len(evalset)} texts"
        ),
    )
    rise = cand_scores.ece - live_scores.ece
    ece_ok = rise <= settings.ece_tolerance + _EPS
    ece = GateResult(
        name="ece",
        passed=ece_ok,
        figures={**figures, "change": rise},
        detail=(
            f"ECE {cand_scores.ece:.4f} vs live {live_scores.ece:.4f} "
            f"(change {rise:+.4f}, allowed rise {settings.ece_tolerance:.4f}) on {len(evalset)} texts"
        ),
    )
    return [*out, f1, ece]


def _mcnemar_gate(
    model: str,
    version: int,
    live_version: int,
    cand: Graded,
    live: Graded,
    figures: dict[str, object],
    settings: GateSettings,
) -> GateResult:
    """Refuse only a significant step backwards: p below the level and more right→wrong than wrong→right."""
    right_to_wrong = int(np.count_nonzero(live.correct & ~cand.correct))
    wrong_to_right = int(np.count_nonzero(~live.correct & cand.correct))
    p = mcnemar_exact_p(right_to_wrong, wrong_to_right)
    n = int(cand.correct.size)
    delta = cand.scores.accuracy - live.scores.accuracy
    worse = p < settings.mcnemar_p and right_to_wrong > wrong_to_right
    report = report_path(model, version)
    figures = {
        **figures,
        "n": n,
        "right_to_wrong": right_to_wrong,
        "wrong_to_right": wrong_to_right,
        "mcnemar_p": p,
        "accuracy_delta": delta,
        "report": report.split(" ", 1)[0],
    }
    counts = (
        f"{right_to_wrong} texts right→wrong vs {wrong_to_right} wrong→right against live version {live_version} "
        f"on {n} texts, exact McNemar p = {p:.3g}, accuracy {delta:+.4f}"
    )
    if worse:
        detail = f"significantly worse: {counts} (p < {settings.mcnemar_p:g}); see the report at {report}"
    elif p < settings.mcnemar_p:
        detail = f"significantly better: {counts}"
    else:
        detail = f"no significant difference at p < {settings.mcnemar_p:g}: {counts}"
    return GateResult(name="mcnemar", passed=not worse, detail=detail, figures=figures)


def shadow_gate(counts: ShadowCounts | None, candidate: int, live: int | None, settings: GateSettings) -> GateResult:
    """``shadow_agreement``: over at least ``shadow_min_texts`` live texts scored in the shadow, the
    candidate gave the live version's label to at least ``shadow_agreement_min`` of them.

    The point estimate is compared, and the Wilson 95 % interval (Wilson, 1927) is recorded beside
    it, so a reader sees how firm the figure is. Without a live version there is nothing to agree with.
    """
    level, need = settings.shadow_agreement_min, settings.shadow_min_texts
    base: dict[str, object] = {"agreement_min": level, "min_texts": need, "live": live, "candidate": candidate}
    if live is None:
        return GateResult(name="shadow_agreement", passed=True, detail="no live version", figures=base)
    if level is None:
        return GateResult(name="shadow_agreement", passed=True, detail="gate off", figures=base)
    texts = 0 if counts is None else counts.texts
    agreed = 0 if counts is None else counts.agreed
    lo, hi = wilson_interval(agreed, texts)
    figures = {**base, "texts": texts, "agreed": agreed, "interval95": [lo, hi]}
    if texts < need:
        return GateResult(
            name="shadow_agreement",
            passed=False,
            figures=figures,
            detail=(
                f"only {texts} live texts scored in the shadow of live version {live} (need {need}); "
                f"keep version {candidate} as candidate while replicas serve traffic (TEXTSIEVE_SHADOW_RATE)"
            ),
        )
    agreement = agreed / texts
    ok = agreement + _EPS >= level
    return GateResult(
        name="shadow_agreement",
        passed=ok,
        figures={**figures, "agreement": agreement},
        detail=(
            f"agrees with live version {live} on {agreement:.2%} of {texts} live texts "
            f"(95 % interval {lo:.2%}–{hi:.2%}; required {level:.2%})"
        ),
    )


def _score_side(side: Side, evalset: list[LabelledText], *, paired: bool) -> tuple[Graded | None, str]:
    unknown = unknown_labels([e.label for e in evalset], side.labels)
    if unknown:
        shown = ", ".join(repr(x) for x in unknown[:10])
        return None, f"the evaluation set has labels this version does not know: {shown}"
    try:
        bundle = side.load()
        # Only the paired test needs each text's outcome; score() alone is what the tolerances use.
        return (grade(bundle, evalset) if paired else Graded(score(bundle, evalset), _NO_ANSWERS)), ""
    except TextsieveError as exc:
        return None, f"cannot be scored: {exc.message}"
    except (RuntimeError, ValueError, OSError) as exc:  # onnxruntime's own errors subclass RuntimeError
        return None, f"cannot be scored: {str(exc).splitlines()[0][:200] if str(exc) else type(exc).__name__}"


_NO_ANSWERS: NDArray[np.bool_] = np.zeros(0, dtype=np.bool_)


__all__ = [
    "ECE_BINS",
    "GateSettings",
    "Graded",
    "Scores",
    "Side",
    "evalset_shortfall",
    "labels_gate",
    "metric_gates",
    "parity_gate",
    "present_macro_f1",
    "grade",
    "report_path",
    "score",
    "shadow_gate",
    "too_small_advice",
]
