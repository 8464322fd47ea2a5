"""Evaluation reports (registry/report/): every figure held to scikit-learn or SciPy computed
independently from the same scores, the storage (once per version, evaluation set and version
compared; on SQLite and PostgreSQL), the publish and promotion hooks, the published card, and a
real-data report on the UCI sentences."""

from __future__ import annotations

import json
import os
import random
import re
import stat
from pathlib import Path
from typing import Any

import numpy as np
import pytest
import scipy.stats
from scipy.special import softmax as scipy_softmax
from sklearn.calibration import calibration_curve
from sklearn.metrics import (
    accuracy_score,
    brier_score_loss,
    classification_report,
    confusion_matrix,
    f1_score,
    log_loss,
)

from tests.helpers.calibration import BOUND_CASES, reference_minimum
from tests.helpers.jsonl import read_jsonl
from textsieve.errors import InputError, NotFoundError
from textsieve.registry import Registry
from textsieve.registry.bundle import Bundle, open_bundle
from textsieve.registry.evalsets import LabelledText
from textsieve.registry.report import build as build_module
from textsieve.registry.report.build import Context, Section, build_report
from textsieve.registry.report.html import render_html, report_csp
from textsieve.registry.runtime import Predictor

DATA = Path(__file__).resolve().parents[1] / "data"
RESAMPLES = 2000


def _examples(path: Path) -> list[LabelledText]:
    return [LabelledText(r["text"], r["label"]) for r in read_jsonl(path)]


@pytest.fixture(scope="module")
def tiny_eval(tiny_data: Path) -> list[LabelledText]:
    return _examples(tiny_data / "test.jsonl")


@pytest.fixture(scope="module")
def pair(tiny_bundles: dict[str, Path]) -> tuple[Bundle, Bundle]:
    return open_bundle(tiny_bundles["a"]), open_bundle(tiny_bundles["b"])


@pytest.fixture(scope="module")
def compared(pair: tuple[Bundle, Bundle], tiny_eval: list[LabelledText]) -> dict[str, Any]:
    a, b = pair
    return build_report(a, tiny_eval, model="tiny", version=2, against=(b, 1), bootstrap_resamples=RESAMPLES, seed=7)


def _reference_scores(bundle: Bundle, examples: list[LabelledText]) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """(targets, calibrated probabilities, raw probabilities) computed here with SciPy's softmax."""
    p = Predictor.from_bundle(bundle)
    logits = p.run([p.encode(e.text) for e in examples]).logits.astype(np.float64)
    labels = bundle.manifest.labels
    y = np.array([labels.index(e.label) for e in examples])
    t = bundle.manifest.calibration.temperature
    return y, scipy_softmax(logits / t, axis=1), scipy_softmax(logits, axis=1)


# -- figures against scikit-learn and SciPy ------------------------------------------------------
def test_metrics_per_class_and_confusion_match_scikit_learn(
    compared: dict[str, Any], pair: tuple[Bundle, Bundle], tiny_eval: list[LabelledText]
) -> None:
    y, probs, _ = _reference_scores(pair[0], tiny_eval)
    pred = probs.argmax(axis=1)
    labels = pair[0].manifest.labels
    k = range(len(labels))
    m = compared["metrics"]
    # scikit-learn accuracy_score and f1_score(average="macro"): labels present in y or pred
    assert m["accuracy"] == pytest.approx(accuracy_score(y, pred), abs=1e-12)
    assert m["macro_f1"] == pytest.approx(f1_score(y, pred, average="macro", zero_division=0), abs=1e-12)
    # scikit-learn classification_report (precision, recall, F1, support per class, zero_division=0)
    ref = classification_report(y, pred, labels=list(k), output_dict=True, zero_division=0)
    for i, name in enumerate(labels):
        got = compared["per_class"][name]
        for key, ref_key in (("precision", "precision"), ("recall", "recall"), ("f1", "f1-score")):
            assert got[key] == pytest.approx(ref[str(i)][ref_key], abs=1e-12), (name, key)
        assert got["support"] == ref[str(i)]["support"]
    # scikit-learn confusion_matrix, counts and normalize="true" (row shares)
    assert compared["confusion"]["labels"] == labels
    assert compared["confusion"]["counts"] == confusion_matrix(y, pred, labels=list(k)).tolist()
    np.testing.assert_allclose(
        compared["confusion"]["normalised"], np.nan_to_num(confusion_matrix(y, pred, labels=list(k), normalize="true"))
    )


def test_calibration_matches_scikit_learn(
    compared: dict[str, Any], pair: tuple[Bundle, Bundle], tiny_eval: list[LabelledText]
) -> None:
    y, probs, raw = _reference_scores(pair[0], tiny_eval)
    k = list(range(probs.shape[1]))
    cal = compared["calibration"]
    for side, p in (("after", probs), ("before", raw)):
        figures = cal[side]
        # scikit-learn brier_score_loss, multiclass form: squared error summed over classes (Brier, 1950)
        assert figures["brier"] == pytest.approx(brier_score_loss(y, p, labels=k, scale_by_half=False), abs=1e-9)
        assert figures["nll"] == pytest.approx(log_loss(y, p, labels=k), abs=1e-9)  # scikit-learn log_loss
        # scikit-learn calibration_curve on (correct?, top-class confidence), 15 uniform bins: the
        # reliability diagram's non-empty bins, in order (Guo et al., 2017, §2)
        confidence, correct = p.max(axis=1), (p.argmax(axis=1) == y).astype(int)
        prob_true, prob_pred = calibration_curve(correct, confidence, n_bins=15, strategy="uniform")
        bins = [b for b in figures["reliability"] if b["count"]]
        np.testing.assert_allclose([b["accuracy"] for b in bins], prob_true, atol=1e-12)
        np.testing.assert_allclose([b["confidence"] for b in bins], prob_pred, atol=1e-12)
        # maximum calibration error is the largest gap of those bins (Naeini et al., 2015)
        assert figures["mce"] == pytest.approx(np.abs(prob_true - prob_pred).max(), abs=1e-12)
        # ECE weights each gap by its bin's share (Guo et al., 2017, eq. 3), from the same bins
        counts = np.array([b["count"] for b in bins])
        assert figures["ece"] == pytest.approx(
            float((counts / len(y) * np.abs(prob_true - prob_pred)).sum()), abs=1e-12
        )
    assert compared["metrics"]["ece"] == cal["after"]["ece"]
    assert cal["temperature"] == pair[0].manifest.calibration.temperature


def test_bootstrap_intervals_agree_with_scipy(
    compared: dict[str, Any], pair: tuple[Bundle, Bundle], tiny_eval: list[LabelledText]
) -> None:
    """scipy.stats.bootstrap, percentile method, 2,000 resamples: its generator draws other
    resamples than ours, so the bounds agree within Monte Carlo error (a few hundredths on 90
    texts), not exactly."""
    y, probs, _ = _reference_scores(pair[0], tiny_eval)
    pred = probs.argmax(axis=1)
    y_b, probs_b, _ = _reference_scores(pair[1], tiny_eval)
    pred_b = probs_b.argmax(axis=1)
    rng = np.random.default_rng(7)
    correct = (pred == y).astype(float)
    acc = scipy.stats.bootstrap((correct,), np.mean, n_resamples=RESAMPLES, method="percentile", rng=rng)
    np.testing.assert_allclose(compared["metrics"]["accuracy_ci"], acc.confidence_interval, atol=0.03)

    def macro(t: np.ndarray, p: np.ndarray) -> float:
        return float(f1_score(t, p, average="macro", zero_division=0))

    f1 = scipy.stats.bootstrap(
        (y, pred), macro, n_resamples=RESAMPLES, method="percentile", paired=True, vectorized=False, rng=rng
    )
    np.testing.assert_allclose(compared["metrics"]["macro_f1_ci"], f1.confidence_interval, atol=0.03)

    def f1_delta(t: np.ndarray, p: np.ndarray, q: np.ndarray) -> float:
        return macro(t, p) - macro(t, q)

    delta = scipy.stats.bootstrap(
        (y, pred, pred_b), f1_delta, n_resamples=RESAMPLES, method="percentile", paired=True, vectorized=False, rng=rng
    )
    np.testing.assert_allclose(compared["comparison"]["macro_f1_delta_ci"], delta.confidence_interval, atol=0.04)
    assert compared["bootstrap"] == {"resamples": RESAMPLES, "seed": 7, "confidence": 0.95, "method": "percentile"}


def test_comparison_counts_and_mcnemar_match_scipy(
    compared: dict[str, Any], pair: tuple[Bundle, Bundle], tiny_eval: list[LabelledText]
) -> None:
    y, probs, _ = _reference_scores(pair[0], tiny_eval)
    _, probs_b, _ = _reference_scores(pair[1], tiny_eval)
    new, old = probs.argmax(axis=1), probs_b.argmax(axis=1)
    c = compared["comparison"]
    r2w = int(((old == y) & (new != y)).sum())
    w2r = int(((old != y) & (new == y)).sum())
    assert (c["against"], c["right_to_wrong"], c["wrong_to_right"]) == (1, r2w, w2r)
    assert c["wrong_to_other_wrong"] == int(((old != y) & (new != y) & (new != old)).sum())
    # McNemar's exact test = two-sided binomial test of b in b + c at 1/2 (McNemar, 1947;
    # Dietterich, 1998, §3.2): SciPy's binomtest
    assert c["mcnemar_p"] == pytest.approx(scipy.stats.binomtest(r2w, r2w + w2r, 0.5).pvalue, rel=1e-9)
    assert c["accuracy_delta"] == pytest.approx(accuracy_score(y, new) - accuracy_score(y, old), abs=1e-12)
    for name, d in c["per_class"].items():
        assert d["f1_delta"] == pytest.approx(
            compared["per_class"][name]["f1"]
            - f1_score(y, old, labels=[pair[0].manifest.labels.index(name)], average="macro", zero_division=0),
            abs=1e-12,
        )
    assert c["calibration"]["brier"]["against"] == pytest.approx(
        brier_score_loss(y, probs_b, labels=list(range(probs.shape[1])), scale_by_half=False), abs=1e-9
    )
    for kind in ("right_to_wrong", "wrong_to_right", "wrong_to_other_wrong"):
        for ex in c["examples"][kind]:
            i = ex["index"]
            assert ex["this"]["predicted"] == pair[0].manifest.labels[new[i]]
            assert ex["against"]["predicted"] == pair[0].manifest.labels[old[i]]
            for sp in ex["this"]["spans"] + ex["against"]["spans"]:
                assert tiny_eval[i].text[sp["start"] : sp["end"]] == sp["text"]
    assert c["minimum_detectable_difference"] is not None and 0 < c["minimum_detectable_difference"] <= 1


def test_selective_prediction_follows_its_definition(
    compared: dict[str, Any], pair: tuple[Bundle, Bundle], tiny_eval: list[LabelledText]
) -> None:
    """Coverage = share of texts with confidence ≥ threshold, accuracy = accuracy on them (Geifman &
    El-Yaniv, 2017, §2: selective risk and coverage), recomputed here with NumPy for each point."""
    y, probs, _ = _reference_scores(pair[0], tiny_eval)
    confidence, correct = probs.max(axis=1), probs.argmax(axis=1) == y
    curve = compared["selective"]
    assert curve[-1]["coverage"] == 1.0
    for point in curve:
        kept = confidence >= point["threshold"] - 1e-12
        assert point["coverage"] == pytest.approx(kept.mean())
        assert point["accuracy"] == pytest.approx(correct[kept].mean())
    for row in compared["selective_targets"]:
        if row["threshold"] is None:
            assert all(correct[confidence >= c].mean() < row["target_accuracy"] for c in confidence)
            continue
        kept = confidence >= row["threshold"] - 1e-12
        assert correct[kept].mean() >= row["target_accuracy"]
        # no lower threshold reaches the target: the row keeps as many texts as possible
        lower = confidence[confidence < row["threshold"]]
        assert all(correct[confidence >= c].mean() < row["target_accuracy"] for c in lower)


def test_by_length_and_worst_mistakes(
    compared: dict[str, Any], pair: tuple[Bundle, Bundle], tiny_eval: list[LabelledText]
) -> None:
    p = Predictor.from_bundle(pair[0])
    encoded = [p.encode(e.text) for e in tiny_eval]
    assert sum(b["n"] for b in compared["by_length"]) == len(tiny_eval)
    for band in compared["by_length"]:
        hi = band["max_tokens"] if band["max_tokens"] is not None else 10**9
        rows = [e for e in encoded if band["min_tokens"] <= e.tokens <= hi]
        assert band["truncated_share"] == pytest.approx(np.mean([e.tokens > p.max_length for e in rows]))
        kept = sum(len(e.ids) for e in rows)
        assert band["unknown_rate"] == pytest.approx(sum(e.unknown for e in rows) / kept)
    worst = compared["worst"]
    confidences = [w["confidence"] for w in worst]
    assert confidences == sorted(confidences, reverse=True)
    for w in worst:
        assert w["label"] != w["predicted"]
        for sp in w["spans"]:
            assert w["text"][sp["start"] : sp["end"]] == sp["text"]


def test_report_json_keeps_the_promised_keys(compared: dict[str, Any]) -> None:
    # The keys issue 12 promises scripts (item 7); order_probe comes from an extra section.
    for key in ("model", "version", "evalset_sha256", "n", "labels", "created_at", "notes", "bootstrap"):
        assert key in compared
    for key in ("accuracy", "macro_f1", "ece", "accuracy_ci", "macro_f1_ci", "mce", "brier", "nll"):
        assert key in compared["metrics"]
    assert set(compared["selective"][0]) == {"threshold", "coverage", "accuracy"}
    for key in ("against", "mcnemar_p", "right_to_wrong", "wrong_to_right", "accuracy_delta"):
        assert key in compared["comparison"]
    json.dumps(compared, allow_nan=False)  # strict JSON: no NaN or infinity anywhere


def test_extra_sections_are_computed_rendered_or_noted(
    pair: tuple[Bundle, Bundle], tiny_eval: list[LabelledText]
) -> None:
    def lengths(ctx: Context) -> dict[str, Any]:
        return {"texts": len(ctx.texts), "bands": len(ctx.bands), "has_against": ctx.against is not None}

    def broken(ctx: Context) -> dict[str, Any]:
        raise ValueError("no run folder for this version")

    sections = [
        Section("order_probe", "Word order", lengths, lambda s: f"<p class=probe>{s['texts']} texts</p>"),
        Section("embeddings", "How the embeddings moved", broken, lambda s: "never drawn"),
    ]
    report = build_report(pair[0], tiny_eval, model="tiny", version=1, bootstrap_resamples=50, extra_sections=sections)
    assert report["order_probe"] == {
        "texts": len(tiny_eval),
        "bands": len(build_module.LENGTH_BANDS),
        "has_against": False,
    }
    assert "embeddings" not in report
    assert report["notes"] == [
        "How the embeddings moved: could not be produced (ValueError: no run folder for this version)"
    ]
    html = render_html(report, sections)
    assert f"<p class=probe>{len(tiny_eval)} texts</p>" in html and "never drawn" not in html
    assert "no run folder for this version" in html


def test_a_report_runs_the_graph_on_bounded_chunks_with_the_same_figures(
    pair: tuple[Bundle, Bundle], tiny_eval: list[LabelledText], monkeypatch: pytest.MonkeyPatch
) -> None:
    """The report ran its whole evaluation set through one Predictor.run (and the order probe six
    copies of it), which keeps every filter's window and per-class contributions for every text:
    gigabytes on a large set. Scores, the order probe and the filters now take chunks; the report
    is the same, figure for figure, the worst mistakes' spans too (each text's outputs do not depend
    on what it runs with)."""
    from textsieve.registry import runtime
    from textsieve.registry.report import probes
    from textsieve.registry.report.probe_sections import probe_sections

    def report() -> dict[str, Any]:
        return build_report(
            pair[0],
            tiny_eval,
            model="tiny",
            version=2,
            against=(pair[1], 1),
            bootstrap_resamples=50,
            seed=7,
            extra_sections=probe_sections(),
        )

    whole = report()
    sizes: list[int] = []
    original = Predictor.run

    def counting(self: Predictor, encoded: list[Any], **kwargs: Any) -> Any:
        sizes.append(len(encoded))
        return original(self, encoded, **kwargs)

    monkeypatch.setattr(Predictor, "run", counting)
    monkeypatch.setattr(runtime, "LOGITS_CHUNK", 7)
    monkeypatch.setattr(probes, "LOGITS_CHUNK", 7)
    chunked = report()
    assert max(sizes) <= 7 and len(tiny_eval) > 7
    assert any(m["spans"] for m in whole["worst"])
    for key in ("metrics", "per_class", "worst", "comparison", "order_probe", "filters"):
        assert chunked[key] == whole[key], key


@pytest.mark.parametrize(
    ("rows", "expected_msg"),
    [
        pytest.param([], "the evaluation set is empty", id="empty"),
        pytest.param([("hello", "nonsense")], "labels version 1 does not know: 'nonsense'", id="unknown-label"),
    ],
)
def test_bad_evaluation_sets_are_refused(
    pair: tuple[Bundle, Bundle], rows: list[tuple[str, str]], expected_msg: str
) -> None:
    with pytest.raises(InputError, match=expected_msg):
        build_report(pair[0], [LabelledText(t, y) for t, y in rows], model="tiny", version=1)


def test_comparison_with_other_labels_is_a_note(
    tiny_bundles: dict[str, Path], pair: tuple[Bundle, Bundle], tiny_eval: list[LabelledText]
) -> None:
    other = open_bundle(tiny_bundles["relabelled"])
    report = build_report(pair[0], tiny_eval, model="tiny", version=2, against=(other, 1), bootstrap_resamples=50)
    assert "comparison" not in report
    assert report["notes"] and report["notes"][0].startswith("comparison with version 1: labels differ")
    assert report["metrics"]["accuracy"] > 0  # the rest still stands


@pytest.mark.parametrize(
    ("bound", "html_says"),
    [
        pytest.param(
            "upper", "none: not a fit, the search stopped at its upper bound, T = 20.", id="useless scores: upper bound"
        ),
        pytest.param(
            "lower", "none: not a fit, the search stopped at its lower bound, T = 0.05.", id="ties: lower bound"
        ),
    ],
)
def test_a_refit_temperature_at_the_search_bound_is_not_called_a_choice(
    compared: dict[str, Any], pair: tuple[Bundle, Bundle], bound: str, html_says: str
) -> None:
    logits, targets, edge = BOUND_CASES[bound]
    z, y = np.array(logits), np.array(targets)
    assert reference_minimum(z, y) == pytest.approx(edge, abs=1e-4)  # no minimum inside the bracket
    raw = scipy_softmax(z, axis=1)
    scored = build_module._Scored(Predictor.from_bundle(pair[0]), [], z, raw, raw, raw.argmax(axis=1))
    cal = build_module._calibration(y, scored)
    assert cal["refit_temperature"] == pytest.approx(edge, rel=1e-6)
    assert cal["refit_temperature_bound"] == bound
    page = render_html({**compared, "calibration": cal})
    assert html_says in page and f"would choose: {edge:.4f}" not in page
    # A report stored before the key existed says the same, from its figure alone.
    old = {k: v for k, v in cal.items() if k != "refit_temperature_bound"}
    assert html_says in render_html({**compared, "calibration": old})
    # The tiny model's own evaluation set gives a temperature inside the bracket: a figure, no bound.
    assert compared["calibration"]["refit_temperature_bound"] is None
    inside = f"would choose: {compared['calibration']['refit_temperature']:.4f}."
    assert inside in render_html(compared) and "not a fit" not in render_html(compared)


def test_html_is_self_contained(compared: dict[str, Any]) -> None:
    html = render_html(compared)
    assert "<script" not in html and "http://" not in html.replace("http://www.w3.org/2000/svg", "")
    assert "https://" not in html and 'style="' not in html
    assert html.count('class="plot plot-') >= 6  # bars, heat map, reliability, coverage, length, deltas
    csp = report_csp(html)
    assert "default-src 'none'" in csp and "script-src 'none'" in csp and "'sha256-" in csp


# -- storage and hooks, on SQLite and PostgreSQL ---------------------------------------------------
def test_report_is_stored_once_and_served_back(
    registry: Registry, tiny_bundles: dict[str, Path], tiny_data: Path
) -> None:
    registry.publish(tiny_bundles["a"], "m", evalset=tiny_data / "test.jsonl")  # publishing makes report v1
    first = registry.stored_report("m", 1)
    assert first.against is None and first.path == "/v1/models/m/versions/1/report"
    registry.publish(tiny_bundles["b"], "m")
    with pytest.raises(NotFoundError, match="textsieve evaluate m 2"):
        registry.stored_report("m", 2)
    made = registry.report("m", 2, against=1)
    again = registry.report("m", 2, against=1)
    assert again == made  # stored: the same blobs and time, not computed again
    _, data = registry.report_content("m", 2, "json")
    report = json.loads(data)
    assert report["comparison"]["against"] == 1 and report["evalset_sha256"] == made.evalset_sha256
    _, html = registry.report_content("m", 2, "html")
    assert html.startswith(b"<!doctype html>")
    # garbage collection keeps what reports refer to
    assert registry.reports("m") == [first, made]
    gc = registry.collect_garbage(older_than=0)
    assert not {made.json_sha256, made.html_sha256, first.json_sha256} & set(gc.removed)


def test_every_promotion_attempt_makes_a_report(
    registry: Registry, tiny_bundles: dict[str, Path], tiny_data: Path
) -> None:
    registry.publish(tiny_bundles["a"], "m", evalset=tiny_data / "test.jsonl")
    registry.promote("m", 1, "live", reason="first")
    registry.publish(tiny_bundles["b"], "m")
    result = registry.promote("m", 2, "candidate", reason="trial")
    assert result.report is not None and result.report.against == 1
    promoted = registry.promote("m", 2, "live", reason="better", force=True)
    assert promoted.report == result.report  # the same comparison on the same texts: stored once
    assert [e.kind for e in registry.history("m")][-1] == "promote"


def test_a_report_failure_never_breaks_a_publish(
    registry: Registry, tiny_bundles: dict[str, Path], tiny_data: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    from textsieve.registry.report import files

    def fail(*args: object, **kwargs: object) -> None:
        raise RuntimeError("scoring exploded")

    monkeypatch.setattr(files, "make_report", fail)
    info = registry.publish(tiny_bundles["a"], "m", evalset=tiny_data / "test.jsonl")
    assert info.version == 1
    last = registry.history("m")[-1]
    assert (last.kind, last.version, last.details["error"]) == ("report_failed", 1, "RuntimeError: scoring exploded")


@pytest.mark.parametrize("step", ["publish", "candidate", "live"])
def test_ctrl_c_in_the_report_after_a_commit_says_what_was_saved(
    capsys: pytest.CaptureFixture[str],
    tmp_path: Path,
    tiny_bundles: dict[str, Path],
    tiny_data: Path,
    monkeypatch: pytest.MonkeyPatch,
    step: str,
) -> None:
    """The report runs after the publish or promotion has committed: Ctrl-C there must not read as
    'interrupted' alone (which says nothing was done) but say what stands, and still show it."""
    from textsieve.registry.report import files

    r = ["--registry", str(tmp_path / "reg")]
    evalset = str(tiny_data / "test.jsonl")
    if step != "publish":
        assert _run(capsys, "publish", str(tiny_bundles["a"]), "--model", "m", "--evalset", evalset, *r)[0] == 0
        assert _run(capsys, "promote", "m", "1", "--to", "live", "--reason", "first", *r)[0] == 0
        assert _run(capsys, "publish", str(tiny_bundles["b"]), "--model", "m", *r)[0] == 0

    def pressed(*args: object, **kwargs: object) -> None:
        raise KeyboardInterrupt

    monkeypatch.setattr(files, "make_report", pressed)
    if step == "publish":
        code, out, err = _run(capsys, "publish", str(tiny_bundles["a"]), "--model", "m", "--evalset", evalset, *r)
        assert (code, out) == (130, "1\n")
        assert err.splitlines()[-1] == (
            "textsieve: interrupted after the change was saved: 'm' version 1 is published; its evaluation "
            "report was not made (textsieve evaluate m 1 makes it)"
        )
    else:
        code, out, err = _run(capsys, "promote", "m", "2", "--to", step, "--reason", "x", "--force", *r)
        assert code == 130
        assert out.splitlines()[-1].startswith(f"'m' version 2 is now {step}")
        assert err == (
            f"textsieve: interrupted after the change was saved: 'm' version 2 is now {step}; its evaluation "
            "report was not made (textsieve evaluate m 2 makes it)\n"
        )
    monkeypatch.undo()
    code, out, _ = _run(capsys, "versions", "m", *r)
    state = {"publish": "registered"}.get(step, step)
    assert code == 0 and out.splitlines()[-1].split()[:2] == ["2" if step != "publish" else "1", state]


def test_ctrl_c_inside_a_native_import_is_one_line_and_exit_130(
    capsys: pytest.CaptureFixture[str], monkeypatch: pytest.MonkeyPatch
) -> None:
    """onnxruntime's import turns a Ctrl-C into ImportError('initialization failed')."""
    from textsieve import cli

    def verb(args: object) -> int:
        try:
            raise KeyboardInterrupt
        except KeyboardInterrupt:
            raise ImportError("initialization failed") from None

    monkeypatch.setattr(cli, "run", verb)
    assert cli.main(["models"]) == 130
    assert capsys.readouterr().err == "textsieve: interrupted\n"


def test_published_card_names_the_model_and_links_the_report(
    registry: Registry, tiny_bundles: dict[str, Path], tiny_data: Path
) -> None:
    registry.publish(tiny_bundles["a"], "helpdesk", evalset=tiny_data / "test.jsonl")
    card = registry.card("helpdesk", 1)
    assert card.startswith("# Model card: helpdesk, version 1\n")
    assert "(set on publish)" not in card
    assert "`/v1/models/helpdesk/versions/1/report`" in card
    assert "## Cautions" in card  # the bundle's own card, kept whole
    # the bundle's file itself is untouched (immutable, sha256-checked)
    assert (tiny_bundles["a"] / "card.md").read_text(encoding="utf-8").startswith("# Model card: (set on publish)")


# -- the command -----------------------------------------------------------------------------------
def _run(capsys: pytest.CaptureFixture[str], *argv: str) -> tuple[int, str, str]:
    from textsieve.cli import main

    code = main(list(argv))
    out, err = capsys.readouterr()
    return code, out, err


def test_evaluate_writes_both_files_and_a_summary(
    capsys: pytest.CaptureFixture[str], tmp_path: Path, tiny_bundles: dict[str, Path], tiny_data: Path
) -> None:
    r = ["--registry", str(tmp_path / "reg")]
    evalset = str(tiny_data / "test.jsonl")
    assert _run(capsys, "publish", str(tiny_bundles["a"]), "--model", "m", "--evalset", evalset, *r)[0] == 0
    assert _run(capsys, "promote", "m", "1", "--to", "live", "--reason", "first", *r)[0] == 0
    assert _run(capsys, "publish", str(tiny_bundles["b"]), "--model", "m", *r)[0] == 0
    out_dir = tmp_path / "out"
    code, out, err = _run(capsys, "evaluate", "m", "2", "--against", "live", "--out", str(out_dir), *r)
    assert code == 0, err
    report = json.loads((out_dir / "report.json").read_text(encoding="utf-8"))
    assert (report["version"], report["comparison"]["against"], report["n"]) == (2, 1, 90)
    assert (out_dir / "report.html").read_text(encoding="utf-8").startswith("<!doctype html>")
    assert re.search(r"^accuracy\s+" + f"{report['metrics']['accuracy']:.4f}", out, flags=re.M)
    assert "against version 1:" in out and "McNemar p" in out
    assert sorted(p.name for p in out_dir.iterdir()) == ["report.html", "report.json"]  # no temporary left
    # a file evaluation set other than the registered one is a report of its own
    other = tmp_path / "two.jsonl"
    other.write_text("".join(line + "\n" for line in evalset_lines(tiny_data)[:20]), encoding="utf-8")
    code, out, _ = _run(capsys, "evaluate", "m", "2", "--evalset", str(other), "--out", str(tmp_path / "o2"), *r)
    assert code == 0 and " on 20 texts" in out


def evalset_lines(tiny_data: Path) -> list[str]:
    return (tiny_data / "test.jsonl").read_text(encoding="utf-8").splitlines()


@pytest.mark.parametrize(
    ("argv", "content", "expected_msg"),
    [
        pytest.param(["m", "7"], None, "'m' has no version 7; its versions are 1–1", id="unknown-version"),
        pytest.param(["nobody", "1"], None, "no model 'nobody'", id="unknown-model"),
        pytest.param(["m", "1", "--evalset", "{file}"], "", "the file is empty", id="empty-set"),
        pytest.param(
            ["m", "1", "--evalset", "{file}"],
            '{"text": "hi", "label": "weather"}\n',
            "labels version 1 does not know: 'weather'",
            id="labels-differ",
        ),
        pytest.param(["m", "1", "--against", "live"], None, "'m' has no live version", id="no-live"),
        pytest.param(["m", "1", "--against", "one"], None, "give 'live' or a version number", id="bad-against"),
        pytest.param(["m", "1", "--against", "1"], None, "that is the version under report", id="self"),
        # Flags that work only with another one were ignored, exit 0 (their help says "with --…").
        pytest.param(
            ["m", "1", "--against-run", "{file}"],
            None,
            "--against-run works only with --against; add --against or drop --against-run",
            id="against-run-without-against",
        ),
        pytest.param(["m", "1", "--text-field", "t"], None, "--text-field works only with --evalset", id="text-field"),
        pytest.param(
            ["m", "1", "--label-field", "l"], None, "--label-field works only with --evalset", id="label-field"
        ),
        # A file as --out was found only after the scoring, with its progress lines before the error.
        pytest.param(
            ["m", "1", "--out", "{file}"], "x", "is a file; --out names a folder for report.json", id="out-a-file"
        ),
        # Found only after the scoring before; /sys takes no new folder even from root.
        pytest.param(
            ["m", "1", "--out", "/sys/textsieve-report"],
            None,
            "--out /sys/textsieve-report: cannot make a folder in /sys (Operation not permitted)",
            id="out-not-writable",
        ),
    ],
)
def test_evaluate_bad_input_is_one_line_and_exit_2(
    capsys: pytest.CaptureFixture[str],
    tmp_path: Path,
    tiny_bundles: dict[str, Path],
    tiny_data: Path,
    argv: list[str],
    content: str | None,
    expected_msg: str,
) -> None:
    r = ["--registry", str(tmp_path / "reg")]
    assert (
        _run(capsys, "publish", str(tiny_bundles["a"]), "--model", "m", "--evalset", str(tiny_data / "test.jsonl"), *r)[
            0
        ]
        == 0
    )
    file = tmp_path / "set.jsonl"
    if content is not None:
        file.write_text(content, encoding="utf-8")
    code, out, err = _run(
        capsys, "evaluate", "--out", str(tmp_path / "o"), *[a.replace("{file}", str(file)) for a in argv], *r
    )
    assert code == 2 and out == ""
    assert len(err.strip().splitlines()) == 1 and expected_msg in err, err
    assert not (tmp_path / "o").exists()


def _two_versions(
    capsys: pytest.CaptureFixture[str], tmp_path: Path, tiny_bundles: dict[str, Path], tiny_data: Path
) -> list[str]:
    """Versions 1 (bundle a, with the evaluation set) and 2 (bundle b) of 'm' published; the registry's flags."""
    r = ["--registry", str(tmp_path / "reg")]
    evalset = str(tiny_data / "test.jsonl")
    assert _run(capsys, "publish", str(tiny_bundles["a"]), "--model", "m", "--evalset", evalset, *r)[0] == 0
    assert _run(capsys, "publish", str(tiny_bundles["b"]), "--model", "m", *r)[0] == 0
    return r


@pytest.mark.parametrize(
    ("runs", "refused", "expected_msg"),
    [
        # Trained with other labels: was exit 0, with a note that the versions "share 0 words".
        pytest.param(("relabelled", None), "relabelled", "version 2 (its labels are", id="other-labels"),
        # Swapped: each the other's run (same data, another seed), the embeddings credited to the wrong version.
        pytest.param(("a", "b"), "a", "version 2 (its training seed is 1, the version's 2)", id="swapped"),
        pytest.param(("b", "relabelled"), "relabelled", "version 1 (its labels are", id="other-run-other-labels"),
    ],
)
def test_evaluate_refuses_a_run_folder_of_another_version(
    capsys: pytest.CaptureFixture[str],
    tmp_path: Path,
    tiny_bundles: dict[str, Path],
    tiny_runs: dict[str, Path],
    tiny_data: Path,
    runs: tuple[str, str | None],
    refused: str,
    expected_msg: str,
) -> None:
    r = _two_versions(capsys, tmp_path, tiny_bundles, tiny_data)
    mine, theirs = runs
    argv = ["evaluate", "m", "2", "--against", "1", "--out", str(tmp_path / "o"), "--run", str(tiny_runs[mine])]
    if theirs is not None:
        argv += ["--against-run", str(tiny_runs[theirs])]
    code, out, err = _run(capsys, *argv, *r)
    assert code == 2 and out == ""
    lines = err.strip().splitlines()
    assert len(lines) == 1, err
    assert f"{tiny_runs[refused]}: not the training run of 'm' {expected_msg}" in lines[0], err
    assert not (tmp_path / "o").exists()


def test_evaluate_with_both_run_folders_credits_each_version(
    capsys: pytest.CaptureFixture[str],
    tmp_path: Path,
    tiny_bundles: dict[str, Path],
    tiny_runs: dict[str, Path],
    tiny_data: Path,
) -> None:
    r = _two_versions(capsys, tmp_path, tiny_bundles, tiny_data)
    out_dir = tmp_path / "o"
    code, _, err = _run(capsys, "evaluate", "m", "2", "--against", "1", "--out", str(out_dir),
                        "--run", str(tiny_runs["b"]), "--against-run", str(tiny_runs["a"]), *r)  # fmt: skip
    assert code == 0, err
    section = json.loads((out_dir / "report.json").read_text(encoding="utf-8"))["embeddings"]
    (part,) = [c for c in section["comparisons"] if c["kind"] == "against"]
    assert part["against"] == "version 1" and part["title"].startswith("From version 1 to this version")


def test_evaluate_refuses_to_write_its_report_over_the_evaluation_set(
    capsys: pytest.CaptureFixture[str], tmp_path: Path, tiny_bundles: dict[str, Path], tiny_data: Path
) -> None:
    """An evaluation set kept as OUT/report.json was replaced by the report, exit 0."""
    r = ["--registry", str(tmp_path / "reg")]
    assert _run(capsys, "publish", str(tiny_bundles["a"]), "--model", "m", *r)[0] == 0
    folder = tmp_path / "work"
    folder.mkdir()
    evalset = folder / "report.json"
    evalset.write_text("".join(line + "\n" for line in evalset_lines(tiny_data)[:20]), encoding="utf-8")
    before = evalset.read_bytes()
    code, out, err = _run(capsys, "evaluate", "m", "1", "--evalset", str(evalset), "--out", str(folder), *r)
    assert code == 2 and out == ""
    assert len(err.strip().splitlines()) == 1 and "would replace the evaluation set" in err, err
    assert evalset.read_bytes() == before and sorted(p.name for p in folder.iterdir()) == ["report.json"]


def test_evaluate_refuses_to_rename_its_report_over_a_fifo(
    capsys: pytest.CaptureFixture[str], tmp_path: Path, tiny_bundles: dict[str, Path], tiny_data: Path
) -> None:
    """OUT/report.json as a FIFO (or a device, a socket) was replaced by a regular file, exit 0: the
    atomic write every command shares (textsieve/files.py) refuses it, in one line."""
    r = ["--registry", str(tmp_path / "reg")]
    evalset = str(tiny_data / "test.jsonl")
    assert _run(capsys, "publish", str(tiny_bundles["a"]), "--model", "m", "--evalset", evalset, *r)[0] == 0
    folder = tmp_path / "out"
    folder.mkdir()
    os.mkfifo(folder / "report.json")
    code, out, err = _run(capsys, "evaluate", "m", "1", "--out", str(folder), *r)
    assert code == 2 and out == ""
    # Said before any scoring (no "evaluate: …" progress line), as a place that cannot be written is.
    (line,) = err.strip().splitlines()
    assert line.startswith("textsieve: error: ") and "report.json: is a FIFO (named pipe)" in line, err
    assert stat.S_ISFIFO((folder / "report.json").lstat().st_mode)
    assert sorted(p.name for p in folder.iterdir()) == ["report.json"]
    # --out itself a FIFO: named as what it is, not "a file".
    os.mkfifo(tmp_path / "pipe")
    code, _, err = _run(capsys, "evaluate", "m", "1", "--out", str(tmp_path / "pipe"), *r)
    assert code == 2 and "is a FIFO (named pipe); --out names a folder" in err, err


# -- real data: the UCI sentences ------------------------------------------------------------------
def _uci(tmp: Path) -> Path:
    """UCI Sentiment Labelled Sentences (Kotzias et al., KDD 2015), 3,000 sentences, split 70/10/20."""
    rows = []
    for name in ("amazon", "imdb", "yelp"):
        for item in json.loads((DATA / "sentiment_labelled" / f"{name}.json").read_text(encoding="utf-8")):
            if item["class"] is not None:
                rows.append({"text": item["text"].strip(), "label": "positive" if item["class"] == 1 else "negative"})
    random.Random(2015).shuffle(rows)
    splits = {"train": rows[:2100], "valid": rows[2100:2400], "test": rows[2400:]}
    for split, part in splits.items():
        (tmp / f"{split}.jsonl").write_text("".join(json.dumps(r) + "\n" for r in part), encoding="utf-8")
    return tmp


@pytest.fixture(scope="module")
def uci_bundles(tmp_path_factory: pytest.TempPathFactory) -> tuple[Path, dict[str, Bundle]]:
    from tests.helpers.training import export_tiny, train_tiny

    root = tmp_path_factory.mktemp("uci")
    (root / "data").mkdir()
    data = _uci(root / "data")
    corrupted = root / "corrupted"
    corrupted.mkdir()
    rng = random.Random(11)
    for split in ("train", "valid"):
        lines = []
        for line in (data / f"{split}.jsonl").read_text(encoding="utf-8").splitlines():
            row = json.loads(line)
            if rng.random() < 0.45:  # nearly half the labels flipped: a model no better than a coin
                row["label"] = "positive" if row["label"] == "negative" else "negative"
            lines.append(json.dumps(row))
        (corrupted / f"{split}.jsonl").write_text("\n".join(lines) + "\n", encoding="utf-8")
    runs = {
        "seed1": train_tiny(data, root / "run1", seed=1, epochs=6),
        "seed2": train_tiny(data, root / "run2", seed=2, epochs=6),
        "corrupted": train_tiny(corrupted, root / "run3", seed=1, epochs=6),
    }
    return data, {k: open_bundle(export_tiny(v, root / f"bundle-{k}")) for k, v in runs.items()}


@pytest.mark.slow
def test_real_data_report_seeds_agree_and_corruption_shows(uci_bundles: tuple[Path, dict[str, Bundle]]) -> None:
    data, bundles = uci_bundles
    test = _examples(data / "test.jsonl")
    same = build_report(bundles["seed2"], test, model="uci", version=2, against=(bundles["seed1"], 1))
    assert same["n"] == 600 and same["metrics"]["accuracy"] > 0.6
    lo, hi = same["metrics"]["accuracy_ci"]
    assert lo < same["metrics"]["accuracy"] < hi
    # two seeds of the same recipe: McNemar finds no significant difference at 0.05
    assert same["comparison"]["mcnemar_p"] > 0.05
    lo, hi = same["comparison"]["accuracy_delta_ci"]
    assert lo < 0 < hi
    worse = build_report(bundles["corrupted"], test, model="uci", version=3, against=(bundles["seed1"], 1))
    c = worse["comparison"]
    # trained on nearly coin-flip labels: significantly worse, more right→wrong than wrong→right
    assert c["mcnemar_p"] < 0.01 and c["right_to_wrong"] > c["wrong_to_right"]
    assert c["accuracy_delta_ci"][1] < 0
    print(
        f"\nUCI report: seed 2 accuracy {same['metrics']['accuracy']:.3f}, against seed 1 Δ "
        f"{same['comparison']['accuracy_delta']:+.3f} (McNemar p {same['comparison']['mcnemar_p']:.3f}); "
        f"corrupted Δ {c['accuracy_delta']:+.3f} (p {c['mcnemar_p']:.2g})"
    )


def test_a_reports_texts_show_hidden_and_reordering_characters_as_escapes_with_spans_kept() -> None:
    # A stored text with U+202E RIGHT-TO-LEFT OVERRIDE shows what follows it reversed, U+200B shows
    # nothing ("Trojan Source", Boucher and Anderson 2021, CVE-2021-42574): in a report they are shown
    # as the CLI's tables show them (registry/tables.py one_line), a span still marking its own words,
    # cut by the stored text's offsets. A zero width joiner inside an emoji sequence spells it and stays.
    from textsieve.registry.report.html import highlighted

    text = "refund \u202elate\u202c now \u200b<b>x</b> 👩\u200d💻"
    spans = [{"start": 8, "end": 12, "label": "billing", "weight": 0.5}]
    shown = highlighted(text, spans)
    assert shown == (
        'refund \\u202e<mark title="billing 0.500">late</mark>\\u202c now \\u200b&lt;b&gt;x&lt;/b&gt; 👩\u200d💻'
    )
    assert "\u202e" not in shown and "\u200b" not in shown
    # A span whose edge is the joiner keeps it: it joins two visible characters of the whole text.
    joined = highlighted(text, [{"start": len(text) - 2, "end": len(text), "label": "x", "weight": 1.0}])
    assert joined.endswith('<mark title="x 1.000">\u200d💻</mark>')
