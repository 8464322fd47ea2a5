"""Promotion gates: what each one checks, its figures (cross-checked with scikit-learn), the
tolerance edges, forcing, and re-judging when the live version changes while gates run."""

from __future__ import annotations

import dataclasses
import shutil
from pathlib import Path

import numpy as np
import pytest
import sklearn.metrics

from tests.helpers.jsonl import read_jsonl, write_jsonl
from tests.helpers.registries import RegistrySpec, publish_unchecked_card, recard, store_evalset_unchecked
from textsieve.errors import GateRefusedError
from textsieve.registry import GateSettings, Registry
from textsieve.registry import gates as gates_module
from textsieve.registry.bundle import open_bundle
from textsieve.registry.evalsets import LabelledText
from textsieve.registry.gates import Scores, Side, cautions_gate, labels_gate, metric_gates, parity_gate
from textsieve.registry.runtime import Predictor


def _texts(tiny_data: Path) -> list[str]:
    return [r["text"] for name in ("test.jsonl", "valid.jsonl") for r in read_jsonl(tiny_data / name)]


def _predicted(bundle: Path, texts: list[str]) -> tuple[list[str], np.ndarray]:
    p = Predictor.from_bundle(bundle)
    preds = p.predict(texts, spans=0)
    probs = np.array([[pr.probabilities[label] for label in p.labels] for pr in preds])
    return [pr.label for pr in preds], probs


def _evalset_favouring(winner: Path, loser: Path, tiny_data: Path, path: Path) -> tuple[Path, list[int]]:
    """Texts labelled with ``winner``'s own predictions, half of them where ``loser`` disagrees."""
    texts = _texts(tiny_data)
    win, _ = _predicted(winner, texts)
    lose, _ = _predicted(loser, texts)
    differ = [i for i in range(len(texts)) if win[i] != lose[i]]
    same = [i for i in range(len(texts)) if win[i] == lose[i]]
    assert len(differ) >= 5, "the two tiny models should disagree on some texts"
    chosen = differ[:60] + same[:60]
    write_jsonl(path, [{"text": texts[i], "label": win[i]} for i in chosen])
    return path, chosen


def test_metric_gate_refuses_a_worse_candidate_with_figures_matching_scikit_learn(
    registry: Registry, tiny_bundles: dict[str, Path], tiny_data: Path, tmp_path: Path
) -> None:
    a, b = tiny_bundles["a"], tiny_bundles["b"]
    evalset, chosen = _evalset_favouring(a, b, tiny_data, tmp_path / "eval.jsonl")
    registry.publish(a, "m", evalset=evalset)
    registry.publish(b, "m")
    registry.promote("m", 1, "live", reason="baseline")
    with pytest.raises(GateRefusedError) as info:
        registry.promote("m", 2, "live", reason="seed 2")
    assert "gate macro_f1 refused" in info.value.message
    gates = {g["name"]: g for g in info.value.context["gates"]}
    assert gates["parity"]["passed"] and gates["labels"]["passed"]
    f1 = gates["macro_f1"]
    assert not f1["passed"]
    rows = read_jsonl(evalset)
    truth = [r["label"] for r in rows]
    texts = [r["text"] for r in rows]
    b_pred, _ = _predicted(b, texts)
    # figures against scikit-learn on the same predictions
    assert f1["figures"]["live"]["macro_f1"] == pytest.approx(1.0)
    assert f1["figures"]["candidate"]["macro_f1"] == pytest.approx(
        sklearn.metrics.f1_score(truth, b_pred, average="macro", zero_division=0), abs=1e-12
    )
    assert f1["figures"]["candidate"]["accuracy"] == pytest.approx(sklearn.metrics.accuracy_score(truth, b_pred))
    assert f1["figures"]["texts"] == len(chosen)
    assert f1["figures"]["change"] == pytest.approx(f1["figures"]["candidate"]["macro_f1"] - 1.0)
    # nothing moved, and the refusal is on record with its figures
    assert registry.live("m").version == 1  # type: ignore[union-attr]
    assert registry.version("m", 2).state == "registered"
    last = registry.history("m")[-1]
    assert last.kind == "refuse" and last.details["gates"] == info.value.context["gates"]
    # a dry run gives the same verdict and records nothing
    dry = registry.check("m", 2)
    assert [g.model_dump() for g in dry] == info.value.context["gates"]
    assert registry.history("m")[-1] == last


def test_metric_gate_passes_a_better_candidate(
    spec: RegistrySpec, tiny_bundles: dict[str, Path], tiny_data: Path, tmp_path: Path
) -> None:
    a, b = tiny_bundles["a"], tiny_bundles["b"]
    evalset, _ = _evalset_favouring(b, a, tiny_data, tmp_path / "eval.jsonl")
    # isolate the macro-F1 gate: the ECE gate is judged in its own test; b predicts no 'praise', so the
    # set it labelled has none, which the size floor would refuse first
    with spec.open(settings=GateSettings(ece_tolerance=1.0, evalset_min_per_label=0)) as reg:
        reg.publish(a, "m", evalset=evalset)
        reg.publish(b, "m")
        reg.promote("m", 1, "live", reason="baseline")
        result = reg.promote("m", 2, "live", reason="better on the set")
    f1 = next(g for g in result.gates if g.name == "macro_f1")
    assert f1.passed and f1.figures["candidate"]["macro_f1"] == pytest.approx(1.0)
    assert f1.figures["live"]["macro_f1"] < 1.0
    assert not result.forced and result.retired == 1


def _labels(n: int = 3) -> list[str]:
    return [f"l{i}" for i in range(n)]


def _sides(live: Scores, cand: Scores, monkeypatch: pytest.MonkeyPatch) -> tuple[Side, Side]:
    """(candidate, live) sides whose load() hands their scores straight to a stubbed score()."""
    monkeypatch.setattr(gates_module, "score", lambda loaded, examples: loaded)
    return Side(2, _labels(), lambda: cand), Side(1, _labels(), lambda: live)  # type: ignore[arg-type,return-value]


EXAMPLES = [LabelledText("t", "l0")] * 10
# The unit tables below judge stubbed scores on a few one-label texts: the size floor
# (test_a_too_small_evalset_*) would refuse them before the figure under test is looked at.
ANY_SIZE = GateSettings(evalset_min_texts=1, evalset_min_per_label=0)


@pytest.mark.parametrize(
    ("f1_live", "f1_cand", "passed"),
    [
        (0.80, 0.80, True),
        (0.80, 0.95, True),
        (0.80, 0.79, True),  # a drop of exactly the tolerance passes
        (0.80, 0.7899, False),
        (0.50, 0.30, False),
    ],
)
def test_macro_f1_tolerance_edge(f1_live: float, f1_cand: float, passed: bool, monkeypatch: pytest.MonkeyPatch) -> None:
    candidate, live = _sides(Scores(10, 0.9, f1_live, 0.05), Scores(10, 0.9, f1_cand, 0.05), monkeypatch)
    result = metric_gates("m", candidate, live, EXAMPLES, "0" * 64, ANY_SIZE)
    by_name = {g.name: g for g in result}
    assert by_name["macro_f1"].passed is passed
    assert by_name["ece"].passed
    assert by_name["macro_f1"].figures["macro_f1_tolerance"] == 0.01


@pytest.mark.parametrize(
    ("ece_live", "ece_cand", "passed"),
    [
        (0.05, 0.05, True),
        (0.05, 0.01, True),
        (0.05, 0.07, True),
        (0.05, 0.0701, False),
        (0.0, 0.3, False),
    ],
)
def test_ece_tolerance_edge(ece_live: float, ece_cand: float, passed: bool, monkeypatch: pytest.MonkeyPatch) -> None:
    candidate, live = _sides(Scores(10, 0.9, 0.8, ece_live), Scores(10, 0.9, 0.8, ece_cand), monkeypatch)
    by_name = {g.name: g for g in metric_gates("m", candidate, live, EXAMPLES, "0" * 64, ANY_SIZE)}
    assert by_name["ece"].passed is passed and by_name["macro_f1"].passed
    assert by_name["ece"].figures["change"] == pytest.approx(ece_cand - ece_live)


def test_no_live_version_passes_with_that_detail_and_no_evalset_with_live_fails_with_advice() -> None:
    side = Side(1, _labels(), lambda: None)  # type: ignore[arg-type,return-value]
    alone = metric_gates("m", side, None, None, None, GateSettings())
    assert [(g.passed, g.detail) for g in alone] == [(True, "no live version")] * 2
    blind = metric_gates("m", side, Side(0, _labels(), lambda: None), None, None, GateSettings())  # type: ignore[arg-type,return-value]
    assert [g.passed for g in blind] == [False, False]
    assert "textsieve evalset add m FILE" in blind[0].detail


def test_a_refused_evalset_scores_no_version_and_fails_only_against_live() -> None:
    side = Side(1, _labels(), lambda: pytest.fail("a refused set must not be scored"))  # type: ignore[arg-type,return-value]
    refused = "the evaluation set of 'm' (…) cannot be scored: 1 of its 2 texts is one the service refuses (…)"
    examples = [LabelledText("a\x00b", "l0"), LabelledText("fine", "l1")]
    alone = metric_gates("m", side, None, examples, "0" * 64, GateSettings(), refused)
    assert [(g.passed, g.detail) for g in alone] == [
        (True, f"no live version (the candidate was not scored: {refused})")
    ] * 2
    judged = metric_gates("m", side, Side(0, _labels(), side.load), examples, "0" * 64, GateSettings(), refused)
    assert [(g.name, g.passed, g.detail) for g in judged] == [("macro_f1", False, refused), ("ece", False, refused)]
    assert "candidate" not in judged[0].figures


def test_labels_gate() -> None:
    assert labels_gate(["a", "b"], None, None).detail == "no live version"
    same = labels_gate(["b", "a"], ["a", "b"], 3)
    assert same.passed and "different output order" in same.detail
    differ = labels_gate(["a", "c"], ["a", "b"], 3)
    assert not differ.passed and differ.figures["added"] == ["c"] and differ.figures["removed"] == ["b"]
    assert "adds 'c'; drops 'b'" in differ.detail


def test_parity_gate_reads_the_stored_report(tiny_bundles: dict[str, Path]) -> None:
    m = open_bundle(tiny_bundles["a"]).manifest
    ok = parity_gate(m)
    assert ok.passed and ok.figures["max_abs_prob_diff"] == m.parity.max_abs_prob_diff
    bad = parity_gate(m.model_copy(update={"parity": m.parity.model_copy(update={"max_abs_prob_diff": 1.0})}))
    assert not bad.passed and "parity failed" in bad.detail


# The four points are the project's rule for every model card, as Mitchell et al. (2019), "Model Cards
# for Model Reporting", ask for ethical considerations and caveats; registry/cautions.py words them.
ALL_POINTS = [
    "that predictions are aids for human review",
    "that they can carry bias from the training data",
    "that they need monitoring",
    "that decisions stay with accountable people",
]


def test_cautions_gate_names_what_a_card_lacks_and_how_to_fix_it(tiny_bundles: dict[str, Path]) -> None:
    card = (tiny_bundles["a"] / "card.md").read_text(encoding="utf-8")
    ok = cautions_gate("m", 3, card.encode())
    assert ok.passed and ok.figures == {"sections": ["Cautions"], "missing": []}
    assert ok.detail == "the card's cautions ('Cautions') make all 4 points"
    cut = cautions_gate("m", 3, card.split("## Cautions")[0].encode())
    assert not cut.passed and cut.figures == {"sections": [], "missing": ALL_POINTS}
    assert cut.detail.startswith("version 3's card.md has no cautions section: the card must say, under a heading")
    assert "'textsieve publish BUNDLE --model m' and promote the new version" in cut.detail
    no_bias = cautions_gate("m", 3, card.replace("biases", "quirks").encode())
    assert not no_bias.passed and no_bias.figures["missing"] == [ALL_POINTS[1]]
    assert "do not say that they can carry bias from the training data" in no_bias.detail
    latin1 = cautions_gate("m", 3, "Café\n## Cautions\n".encode("latin-1"))
    assert not latin1.passed and "card.md is not UTF-8 text (byte 3)" in latin1.detail


def test_a_version_published_before_the_cautions_check_is_refused_live_unless_forced(
    registry: Registry, tiny_bundles: dict[str, Path], tmp_path: Path
) -> None:
    """Publish refuses a card without its cautions, but a version published before that check could
    still be promoted to live and served with such a card."""
    old = tmp_path / "old"
    shutil.copytree(tiny_bundles["a"], old)
    card = (old / "card.md").read_text(encoding="utf-8")
    assert publish_unchecked_card(registry, old, "m", card.split("## Cautions")[0]) == 1
    with pytest.raises(GateRefusedError, match=r"gate cautions refused.*version 1's card.md has no cautions") as info:
        registry.promote("m", 1, "live", reason="stored before the check")
    gates = {g["name"]: g for g in info.value.context["gates"]}
    assert gates["cautions"]["figures"]["missing"] == ALL_POINTS and gates["parity"]["passed"]
    assert registry.live("m") is None
    assert not registry.check("m", 1)[2].passed  # promote --dry-run says the same
    # The fix the detail names: the card with its section, published as a new version, passes.
    assert registry.publish(tiny_bundles["a"], "m").version == 2
    promoted = registry.promote("m", 2, "live", reason="the card has its cautions")
    assert {g.name: g.passed for g in promoted.gates}["cautions"] is True
    # And --force with a reason still overrides, recorded as ever.
    forced = registry.promote("m", 1, "live", reason="the card is being rewritten", force=True)
    assert forced.forced and "cautions" in registry.history("m")[-1].details["overridden"]


def test_labels_gate_refuses_a_relabelled_model_unless_forced(
    registry: Registry, tiny_bundles: dict[str, Path], tiny_data: Path
) -> None:
    registry.publish(tiny_bundles["a"], "m", evalset=tiny_data / "test.jsonl")
    registry.publish(tiny_bundles["relabelled"], "m")
    registry.promote("m", 1, "live", reason="baseline")
    with pytest.raises(GateRefusedError, match=r"gate labels refused.*drops 'praise'") as info:
        registry.promote("m", 2, "live", reason="relabel")
    metric = {g["name"]: g for g in info.value.context["gates"]}["macro_f1"]
    assert "labels this version does not know: 'praise'" in metric["detail"]
    forced = registry.promote("m", 2, "live", reason="relabel agreed with the clients", force=True)
    assert forced.forced and forced.version.state == "live"
    event = registry.history("m")[-1]
    assert event.details["forced"] and "labels" in event.details["overridden"]
    assert event.reason == "relabel agreed with the clients"


def test_gates_are_judged_again_when_live_changes_meanwhile(
    spec: RegistrySpec, tiny_bundles: dict[str, Path], tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    c = tmp_path / "c"
    shutil.copytree(tiny_bundles["a"], c)
    recard(c, "c")
    with spec.open() as reg, spec.open() as other:
        for bundle in (tiny_bundles["a"], tiny_bundles["b"], c):
            reg.publish(bundle, "m")
        reg.promote("m", 1, "live", reason="baseline")
        original = Registry._gates
        seen: list[int | None] = []

        def racing(self: Registry, model, target, live, evalset, settings):  # type: ignore[no-untyped-def]
            if self is reg:
                seen.append(None if live is None else live.version)
                if len(seen) == 1:  # another replica promotes version 3 while our gates run
                    other.promote("m", 3, "live", reason="meanwhile", force=True)
            return original(self, model, target, live, evalset, settings)

        monkeypatch.setattr(Registry, "_gates", racing)
        result = reg.promote("m", 2, "live", reason="mine", force=True)
    assert seen == [1, 3]
    assert result.retired == 3 and result.version.previous_live == 3
    with spec.open() as reg:
        assert [v.state for v in reg.versions("m")] == ["retired", "live", "retired"]
        promotes = [e for e in reg.history("m") if e.kind == "promote"]
        assert [(e.version, e.details["retired"]) for e in promotes] == [(1, None), (3, 1), (2, 3)]


def test_under_constant_contention_the_last_round_is_judged_under_the_lock(
    spec: RegistrySpec, tiny_bundles: dict[str, Path], tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    bundles = []
    for i in range(5):
        d = tmp_path / f"v{i}"
        shutil.copytree(tiny_bundles["a"], d)
        recard(d, f"variant {i}")
        bundles.append(d)
    with spec.open() as reg, spec.open() as other:
        for bundle in bundles:
            reg.publish(bundle, "m")
        reg.promote("m", 1, "live", reason="baseline")
        original = Registry._gates
        seen: list[tuple[int | None, bool]] = []

        def racing(self: Registry, model, target, live, evalset, settings):  # type: ignore[no-untyped-def]
            if self is reg:
                in_transaction = bool(reg.backend._depth)  # type: ignore[attr-defined]
                seen.append((None if live is None else live.version, in_transaction))
                if len(seen) <= 3:  # someone else wins the race every optimistic round
                    other.promote("m", 2 + len(seen), "live", reason="meanwhile", force=True)
            return original(self, model, target, live, evalset, settings)

        monkeypatch.setattr(Registry, "_gates", racing)
        result = reg.promote("m", 2, "live", reason="mine", force=True)
    assert seen == [(1, False), (3, False), (4, False), (5, True)]
    assert result.retired == 5 and result.version.state == "live"


# -- the statistical gate (McNemar) --------------------------------------------------------
def _graded_sides(
    live_correct: list[bool], cand_correct: list[bool], monkeypatch: pytest.MonkeyPatch
) -> tuple[Side, Side]:
    """(candidate, live) sides whose grade() hands back the given right/wrong per text."""

    def graded(correct: list[bool]) -> gates_module.Graded:
        acc = sum(correct) / len(correct)
        return gates_module.Graded(Scores(len(correct), acc, acc, 0.05), np.array(correct, dtype=bool))

    monkeypatch.setattr(gates_module, "grade", lambda loaded, examples: loaded)
    live, cand = graded(live_correct), graded(cand_correct)
    return Side(2, _labels(), lambda: cand), Side(1, _labels(), lambda: live)  # type: ignore[arg-type,return-value]


def _pairs(both: int, right_to_wrong: int, wrong_to_right: int, neither: int) -> tuple[list[bool], list[bool]]:
    """(live, candidate) right/wrong per text with the given 2×2 counts."""
    live = [True] * both + [True] * right_to_wrong + [False] * wrong_to_right + [False] * neither
    cand = [True] * both + [False] * right_to_wrong + [True] * wrong_to_right + [False] * neither
    return live, cand


MCNEMAR_ON = GateSettings(mcnemar=True, evalset_min_texts=1, evalset_min_per_label=0)


@pytest.mark.parametrize(
    ("b", "c"),
    [(1, 7), (7, 1), (10, 10), (30, 12), (12, 30), (0, 6), (6, 0), (104, 52), (0, 0)],
)
def test_mcnemar_gate_p_equals_scipy_binomtest(b: int, c: int, monkeypatch: pytest.MonkeyPatch) -> None:
    """The exact McNemar p is the two-sided binomial p of b in b + c at 1/2 (McNemar, 1947;
    Dietterich, 1998, §3.2); reference: scipy.stats.binomtest(b, b + c, 0.5).pvalue."""
    import scipy.stats

    live, cand = _pairs(50, b, c, 9)
    candidate, live_side = _graded_sides(live, cand, monkeypatch)
    gate = metric_gates("m", candidate, live_side, [LabelledText("t", "l0")] * len(live), "0" * 64, MCNEMAR_ON)[0]
    assert gate.name == "mcnemar"
    f = gate.figures
    assert (f["n"], f["right_to_wrong"], f["wrong_to_right"]) == (len(live), b, c)
    ref = 1.0 if b + c == 0 else scipy.stats.binomtest(b, b + c, 0.5).pvalue
    assert f["mcnemar_p"] == pytest.approx(ref, rel=1e-9)
    assert f["accuracy_delta"] == pytest.approx((c - b) / len(live))
    # refused exactly when significantly worse: p below the level and more right→wrong
    assert gate.passed is not (ref < 0.05 and b > c)


def test_mcnemar_published_worked_example(monkeypatch: pytest.MonkeyPatch) -> None:
    """Fagerland, Lydersen & Laake (2013), "The McNemar test for binary matched-pairs data",
    BMC Medical Research Methodology 13:91, example of Bentur et al. (2009): 21 patients,
    airway hyper-responsiveness before/after transplantation, discordant pairs 1 and 7; exact
    conditional p = 0.070 (values from memory; 2 · 9/256 = 0.0703 by hand)."""
    live, cand = _pairs(1, 1, 7, 12)
    candidate, live_side = _graded_sides(live, cand, monkeypatch)
    gate = metric_gates("m", candidate, live_side, [LabelledText("t", "l0")] * 21, "0" * 64, MCNEMAR_ON)[0]
    assert gate.figures["n"] == 21
    assert round(gate.figures["mcnemar_p"], 3) == 0.070
    assert gate.passed  # 0.070 is not below 0.05, and the candidate gained more than it lost
    strict = GateSettings(mcnemar=True, mcnemar_p=0.1, evalset_min_texts=1, evalset_min_per_label=0)
    reversed_live, reversed_cand = _pairs(1, 7, 1, 12)  # the same table the other way: worse at the 0.1 level
    candidate, live_side = _graded_sides(reversed_live, reversed_cand, monkeypatch)
    gate = metric_gates("m", candidate, live_side, [LabelledText("t", "l0")] * 21, "0" * 64, strict)[0]
    assert not gate.passed and "p = 0.0703" in gate.detail


def test_mcnemar_refusal_names_figures_report_and_command(monkeypatch: pytest.MonkeyPatch) -> None:
    live, cand = _pairs(100, 30, 10, 20)
    candidate, live_side = _graded_sides(live, cand, monkeypatch)
    gate = metric_gates("model-x", candidate, live_side, [LabelledText("t", "l0")] * 160, "0" * 64, MCNEMAR_ON)[0]
    assert not gate.passed
    for part in (
        "30 texts right→wrong vs 10 wrong→right",
        "live version 1",
        "on 160 texts",
        "p = 0.00222",  # scipy.stats.binomtest(30, 40).pvalue = 0.002221...
        "accuracy -0.1250",
        "/v1/models/model-x/versions/2/report",
        "textsieve evaluate model-x 2 --against live",
    ):
        assert part in gate.detail
    assert gate.figures["report"] == "/v1/models/model-x/versions/2/report"


def test_tolerances_off_leaves_only_the_statistical_gate(monkeypatch: pytest.MonkeyPatch) -> None:
    live, cand = _pairs(100, 3, 1, 20)  # macro-F1 and accuracy drop 0.0161: beyond the 0.01 tolerance
    settings = GateSettings(mcnemar=True, tolerances=False, evalset_min_texts=1, evalset_min_per_label=0)
    candidate, live_side = _graded_sides(live, cand, monkeypatch)
    result = metric_gates("m", candidate, live_side, [LabelledText("t", "l0")] * 124, "0" * 64, settings)
    assert [(g.name, g.passed) for g in result] == [("mcnemar", True)]
    both = metric_gates("m", candidate, live_side, [LabelledText("t", "l0")] * 124, "0" * 64, MCNEMAR_ON)
    assert [(g.name, g.passed) for g in both] == [("mcnemar", True), ("macro_f1", False), ("ece", True)]


def test_mcnemar_without_live_or_evalset() -> None:
    side = Side(1, _labels(), lambda: None)  # type: ignore[arg-type,return-value]
    alone = metric_gates("m", side, None, None, None, MCNEMAR_ON)
    assert [(g.name, g.passed, g.detail) for g in alone][0] == ("mcnemar", True, "no live version")
    blind = metric_gates("m", side, Side(0, _labels(), lambda: None), None, None, MCNEMAR_ON)  # type: ignore[arg-type,return-value]
    assert [g.passed for g in blind] == [False, False, False]


def test_per_model_settings_drive_promotion(
    registry: Registry, tiny_bundles: dict[str, Path], tiny_data: Path, tmp_path: Path
) -> None:
    """On real bundles: the statistical gate refuses a candidate that is right on none of the texts
    where live is right and it differs, and the refusal names the figures; a setting changed in
    the registry is what the next promotion uses."""
    import scipy.stats

    a, b = tiny_bundles["a"], tiny_bundles["b"]
    evalset, chosen = _evalset_favouring(a, b, tiny_data, tmp_path / "eval.jsonl")
    registry.publish(a, "m", evalset=evalset)
    registry.publish(b, "m")
    registry.promote("m", 1, "live", reason="baseline")
    registry.change_settings("m", {"mcnemar": True, "tolerances": False}, reason="statistical gate", actor="lead")
    with pytest.raises(GateRefusedError) as info:
        registry.promote("m", 2, "live", reason="seed 2")
    message = info.value.message
    assert "gate mcnemar refused: significantly worse" in message
    gates = {g["name"]: g for g in info.value.context["gates"]}
    assert set(gates) == {"parity", "labels", "cautions", "mcnemar"}
    f = gates["mcnemar"]["figures"]
    rows = read_jsonl(evalset)
    b_pred, _ = _predicted(b, [r["text"] for r in rows])
    # live (a) labelled the set itself, so it is right on every text; b is wrong where it differs
    differ = sum(p != r["label"] for p, r in zip(b_pred, rows, strict=True))
    assert (f["n"], f["right_to_wrong"], f["wrong_to_right"]) == (len(chosen), differ, 0)
    assert f["mcnemar_p"] == pytest.approx(scipy.stats.binomtest(differ, differ, 0.5).pvalue, rel=1e-9)
    assert "/v1/models/m/versions/2/report" in message and f"{differ} texts right→wrong" in message

    # With the level set below this p the same candidate passes: promotion reads the settings
    # the registry holds at that moment.
    registry.change_settings("m", {"mcnemar_p": f["mcnemar_p"] / 2}, reason="stricter evidence", actor="lead")
    result = registry.promote("m", 2, "live", reason="seed 2 again")
    assert [g.name for g in result.gates] == ["parity", "labels", "cautions", "mcnemar"] and not result.forced


# -- too small an evaluation set --------------------------------------------------------------
def _set(counts: dict[str, int]) -> list[LabelledText]:
    return [LabelledText(f"text {label} {i}", label) for label, n in counts.items() for i in range(n)]


@pytest.mark.parametrize(
    ("counts", "settings", "expected_msg"),
    [
        pytest.param({"l0": 1}, GateSettings(), "1 texts, need at least 50 (evalset_min_texts)", id="one-text"),
        pytest.param(
            {"l0": 60},
            GateSettings(),
            "labels with fewer than 5 texts (evalset_min_per_label): 'l1' 0, 'l2' 0",
            id="one-label",
        ),
        pytest.param(
            {"l0": 30, "l1": 26, "l2": 4}, GateSettings(), "(evalset_min_per_label): 'l2' 4;", id="one-label-short"
        ),
        pytest.param(
            {"l0": 40, "l1": 40, "l2": 40},
            GateSettings(evalset_min_texts=200),
            "120 texts, need at least 200",
            id="raised-floor",
        ),
    ],
)
def test_a_too_small_evalset_is_refused_by_every_metric_gate_saying_what_is_needed(
    counts: dict[str, int], settings: GateSettings, expected_msg: str, monkeypatch: pytest.MonkeyPatch
) -> None:
    """A 1-text or one-label set passed "on 1 texts"; with a live version it is now refused, before
    anything is scored, naming the shortfall, the settings to lower and how to add texts."""
    candidate, live = _sides(Scores(1, 1.0, 1.0, 0.0), Scores(1, 1.0, 1.0, 0.0), monkeypatch)
    on = dataclasses.replace(settings, mcnemar=True)
    result = metric_gates("m", candidate, live, _set(counts), "0" * 64, on)
    assert [(g.name, g.passed) for g in result] == [("mcnemar", False), ("macro_f1", False), ("ece", False)]
    for gate in result:
        assert gate.detail.startswith("the evaluation set is too small to judge against live version 1: ")
        assert expected_msg in gate.detail
        assert "textsieve evalset add m FILE" in gate.detail
        assert "textsieve gates m --set evalset_min_texts=N --set evalset_min_per_label=N --reason" in gate.detail
        assert gate.figures["label_counts"] == counts
        assert (gate.figures["evalset_min_texts"], gate.figures["evalset_min_per_label"]) == (
            settings.evalset_min_texts,
            settings.evalset_min_per_label,
        )


def test_an_evalset_at_the_floor_is_judged_and_without_live_nothing_is_refused(monkeypatch: pytest.MonkeyPatch) -> None:
    candidate, live = _sides(Scores(50, 0.9, 0.8, 0.05), Scores(50, 0.9, 0.8, 0.05), monkeypatch)
    at_floor = _set({"l0": 40, "l1": 5, "l2": 5})  # exactly 50 texts and 5 of the rarest label
    judged = metric_gates("m", candidate, live, at_floor, "0" * 64, GateSettings())
    assert [(g.name, g.passed) for g in judged] == [("macro_f1", True), ("ece", True)]
    assert "on 50 texts" in judged[0].detail
    assert "(change +0.0000," in judged[0].detail  # equal scores read +0.0000, not -0.0000 (-(0.0) is -0.0)
    # With no live version nothing is compared, so a small set refuses nothing (as before).
    alone = metric_gates("m", candidate, None, _set({"l0": 1}), "0" * 64, GateSettings())
    assert all(g.passed and g.detail.startswith("no live version") for g in alone)
    # Labels a version does not know are named first: that is what to fix.
    other = Side(1, ["x", "y"], live.load)
    unknown = metric_gates("m", candidate, other, _set({"l0": 1}), "0" * 64, GateSettings())
    assert "labels this version does not know: 'l0'" in unknown[0].detail


def test_a_one_text_evalset_refuses_promotion_until_forced_or_the_floor_is_lowered(
    registry: Registry, tiny_bundles: dict[str, Path], tiny_data: Path, tmp_path: Path
) -> None:
    one = tmp_path / "one.jsonl"
    write_jsonl(one, read_jsonl(tiny_data / "test.jsonl")[:1])
    registry.publish(tiny_bundles["a"], "m", evalset=one)
    registry.publish(tiny_bundles["b"], "m")
    registry.promote("m", 1, "live", reason="first: nothing to compare with")
    with pytest.raises(GateRefusedError, match=r"gate macro_f1 refused: the evaluation set is too small") as info:
        registry.promote("m", 2, "live", reason="seed 2")
    assert "1 texts, need at least 50" in info.value.message and "(and 1 more: ece)" in info.value.message
    refused = registry.history("m")[-1]
    assert refused.kind == "refuse" and refused.details["failed"] == ["macro_f1", "ece"]
    assert registry.live("m").version == 1  # type: ignore[union-attr]

    # --force with a reason still overrides, and says so in the audit trail
    forced = registry.promote("m", 2, "live", reason="hotfix, set too small to judge", force=True)
    assert forced.forced and forced.version.state == "live"
    event = registry.history("m")[-1]
    assert event.details["overridden"] == ["macro_f1", "ece"] and event.reason == "hotfix, set too small to judge"

    # lowering the floor is an audited settings change, and the gates then judge on the one text
    registry.rollback("m", reason="back to 1")
    registry.change_settings(  # (tolerances wide open: which of a and b gets the one text right is not the point)
        "m",
        {"evalset_min_texts": 1, "evalset_min_per_label": 0, "macro_f1_drop": 1.0, "ece_rise": 1.0},
        reason="a smoke test set on purpose",
    )
    result = registry.promote("m", 2, "live", reason="judged on the one text")
    metric = {g.name: g for g in result.gates}["macro_f1"]
    assert not result.forced and metric.passed
    assert metric.detail.endswith("on 1 texts") and metric.figures["evalset_min_texts"] == 1


def test_grading_a_large_set_runs_the_graph_on_bounded_chunks_with_the_same_scores(
    tiny_bundles: dict[str, Path], tiny_data: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    """The gates ran a whole evaluation set through one Predictor.run, which keeps every filter's
    outputs for every text (gigabytes on a large set) where the gates need only the logits; the
    figures are those of the whole set at once, checked with scikit-learn."""
    rows = read_jsonl(tiny_data / "test.jsonl") + read_jsonl(tiny_data / "valid.jsonl")
    examples = [LabelledText(r["text"], r["label"]) for r in rows]
    bundle = open_bundle(tiny_bundles["a"])
    sizes: list[int] = []
    original = Predictor.run

    def counting(self: Predictor, encoded: list, **kwargs: object) -> object:  # type: ignore[type-arg]
        sizes.append(len(encoded))
        return original(self, encoded, **kwargs)  # type: ignore[arg-type]

    monkeypatch.setattr(Predictor, "run", counting)
    monkeypatch.setattr(gates_module, "GRADE_CHUNK", 64)
    graded = gates_module.grade(bundle, examples)
    assert max(sizes) <= 64 and sum(sizes) == len(examples)
    truth = [e.label for e in examples]
    predicted, _ = _predicted(tiny_bundles["a"], [e.text for e in examples])
    assert graded.scores.accuracy == pytest.approx(sklearn.metrics.accuracy_score(truth, predicted))
    assert graded.scores.macro_f1 == pytest.approx(sklearn.metrics.f1_score(truth, predicted, average="macro"))
    assert graded.correct.tolist() == [p == t for p, t in zip(predicted, truth, strict=True)]


def test_a_stored_evalset_with_texts_the_service_refuses_fails_the_metric_gates_naming_its_rows(
    registry: Registry, tiny_bundles: dict[str, Path], tiny_data: Path, tmp_path: Path
) -> None:
    """A set registered before labelled files obeyed the service's text rules (58cc344) was scored as
    stored: the NUL and zero-width rows counted (the latter as the model's prior) and the gates passed;
    a lone surrogate made `evaluate` a traceback (found by probing)."""
    registry.publish(tiny_bundles["a"], "m")
    registry.publish(tiny_bundles["b"], "m")
    registry.promote("m", 1, "live", reason="baseline")
    rows = read_jsonl(tiny_data / "test.jsonl")[:60]
    rows[3]["text"] = "refund\x00 please"
    rows[7]["text"] = "\u200b\u200b"
    rows[11]["text"] += "\ud800"
    digest = store_evalset_unchecked(registry, "m", rows, "old-set.jsonl")
    with pytest.raises(GateRefusedError) as info:
        registry.promote("m", 2, "live", reason="seed 2")
    gates = {g["name"]: g for g in info.value.context["gates"]}
    detail = gates["macro_f1"]["detail"]
    assert detail.startswith(f"the evaluation set of 'm' ('old-set.jsonl', sha256 {digest[:12]}…, added ")
    assert (
        "cannot be scored: 3 of its 60 texts are ones the service refuses (row 4: the text contains a NUL character "
        "(U+0000) at character 6; row 8: the text has only whitespace and invisible characters (such as U+200B), no "
        "words; row 12: the text contains a lone surrogate (U+D800) at character "
    ) in detail
    assert detail.endswith(
        f"register a cleaned set with 'textsieve evalset add m FILE' (the stored rows, in order, "
        f"are the JSONL blob {digest} in the blob folder)"
    )
    assert gates["ece"]["detail"] == detail and "candidate" not in gates["macro_f1"]["figures"]
    assert registry.live("m").version == 1  # type: ignore[union-attr]
    # The advice works: a cleaned set is judged (whatever it says of seed 2, it says it on scores).
    clean = write_jsonl(tmp_path / "clean.jsonl", [r for i, r in enumerate(rows) if i not in (3, 7, 11)])
    registry.add_evalset("m", clean)
    judged = {g.name: g for g in registry.check("m", 2)}
    assert "on 57 texts" in judged["macro_f1"].detail and "candidate" in judged["macro_f1"].figures
