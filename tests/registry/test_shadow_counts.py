"""Shadow counts in the registry (registry/shadow.py, shadow_queries.py), on SQLite and PostgreSQL:
replicas add up, kept texts stay bounded, the optional agreement gate, and ``textsieve shadow``."""

from __future__ import annotations

import threading
from pathlib import Path

import pytest
from scipy import stats as sps

from tests.helpers.registries import RegistrySpec
from textsieve.cli import main
from textsieve.registry import GateSettings, Registry
from textsieve.registry.migrations import applied
from textsieve.registry.shadow import KeptText, Tally

MODEL = "support"


def _tally(live: list[str], cand: list[str], delta: float = 0.0) -> Tally:
    t = Tally()
    t.add(live, cand, delta)
    return t


@pytest.fixture
def published(spec: RegistrySpec, tiny_bundles: dict[str, Path]) -> RegistrySpec:
    """``support``: v1 live, v2 candidate (the tiny bundles a and b)."""
    with spec.open() as reg:
        reg.publish(tiny_bundles["a"], MODEL, actor="tests")
        reg.publish(tiny_bundles["b"], MODEL, actor="tests")
        reg.promote(MODEL, 1, "live", reason="start", actor="tests", force=True)
        reg.promote(MODEL, 2, "candidate", reason="trial", actor="tests")
    return spec


def test_the_step_is_recorded(registry: Registry) -> None:
    assert "0006_shadow_counts" in applied(registry.backend)


def test_two_replicas_flushing_at_once_add_up(published: RegistrySpec) -> None:
    # Two registry handles (two replicas' connections) each flush 25 tallies at the same time;
    # the sums must be exactly what was sent: additive UPSERTs never overwrite one another.
    live = ["billing", "bug", "billing", "praise"]
    cand = ["billing", "billing", "billing", "praise"]
    errors: list[BaseException] = []

    def replica() -> None:
        try:
            with published.open() as reg:
                for _ in range(25):
                    reg.add_shadow_counts(MODEL, 1, 2, _tally(live, cand, delta=-0.25))
        except BaseException as exc:  # noqa: BLE001 - reported below
            errors.append(exc)

    threads = [threading.Thread(target=replica) for _ in range(2)]
    for t in threads:
        t.start()
    for t in threads:
        t.join()
    assert not errors
    with published.open() as reg:
        counts = reg.shadow_pair(MODEL, 1, 2)
    assert counts is not None
    assert (counts.texts, counts.agreed, counts.flushes) == (200, 150, 50)
    assert counts.delta_sum == pytest.approx(-12.5)
    assert counts.mean_delta == pytest.approx(-0.0625)
    cells = {(t.live_label, t.candidate_label): t.texts for t in counts.transitions}
    assert cells == {("billing", "billing"): 100, ("bug", "billing"): 50, ("praise", "praise"): 50}
    assert sum(cells.values()) == counts.texts


def test_agreement_interval_is_wilson(published: RegistrySpec) -> None:
    # Reference: scipy.stats.binomtest(...).proportion_ci(method="wilson") (Wilson, 1927).
    with published.open() as reg:
        reg.add_shadow_counts(MODEL, 1, 2, _tally(["a"] * 263, ["a"] * 81 + ["b"] * 182))
        counts = reg.shadow_pair(MODEL, 1, 2)
    assert counts is not None
    ref = sps.binomtest(81, 263).proportion_ci(confidence_level=0.95, method="wilson")
    lo, hi = counts.agreement_interval()
    assert (lo, hi) == (pytest.approx(ref.low, abs=1e-12), pytest.approx(ref.high, abs=1e-12))


def test_texts_are_not_kept_unless_asked(published: RegistrySpec) -> None:
    t = Tally()
    t.add(["a"], ["b"], 0.0, [KeptText("a private text", "a", 0.9, "b", 0.6)], keep_at_most=0)
    assert t.kept == []
    with published.open() as reg:
        reg.add_shadow_counts(MODEL, 1, 2, t, keep_texts=0)
        assert reg.shadow_texts(MODEL, 1, 2) == []


def test_kept_texts_are_bounded_and_aged_out(published: RegistrySpec) -> None:
    def kept(i: int) -> KeptText:
        return KeptText(f"text {i}", "a", 0.9, "b", 0.7)

    with published.open() as reg:
        for start in (0, 4, 8):
            t = Tally()
            t.add(["a"] * 4, ["b"] * 4, 0.0, [kept(start + i) for i in range(4)], keep_at_most=5)
            reg.add_shadow_counts(MODEL, 1, 2, t, keep_texts=5)
        newest = [s.text for s in reg.shadow_texts(MODEL, 1, 2, limit=100)]
        assert newest == ["text 11", "text 10", "text 9", "text 8", "text 7"]  # the newest 5, newest first
        # A retention age of zero deletes every text stored before this flush.
        t = Tally()
        t.add(["a"], ["b"], 0.0, [kept(99)], keep_at_most=5)
        reg.add_shadow_counts(MODEL, 1, 2, t, keep_texts=5, keep_seconds=0.0)
        assert [s.text for s in reg.shadow_texts(MODEL, 1, 2)] == ["text 99"]
        counts = reg.shadow_pair(MODEL, 1, 2)
    assert counts is not None and counts.texts == 13


def test_a_replica_that_keeps_no_texts_leaves_the_others_kept_texts(published: RegistrySpec) -> None:
    """Two replicas, one with TEXTSIEVE_SHADOW_KEEP_TEXTS=5, one at the default 0. The second one's
    flush used to delete every kept text of the model (a count trim to 0), so one replica at the
    default emptied the review list the other kept; now it stores none and trims by age alone."""
    with published.open() as reg:
        t = Tally()
        t.add(["a"] * 3, ["b"] * 3, 0.0, [KeptText(f"text {i}", "a", 0.9, "b", 0.7) for i in range(3)], keep_at_most=5)
        reg.add_shadow_counts(MODEL, 1, 2, t, keep_texts=5)
        other = Tally()
        other.add(["a"], ["b"], 0.0, [], keep_at_most=0)
        reg.add_shadow_counts(MODEL, 1, 2, other, keep_texts=0)
        assert [s.text for s in reg.shadow_texts(MODEL, 1, 2)] == ["text 2", "text 1", "text 0"]
        reg.add_shadow_counts(MODEL, 1, 2, other, keep_texts=0, keep_seconds=0.0)  # the age still applies
        assert reg.shadow_texts(MODEL, 1, 2) == []


def test_failed_flush_merges_back_without_loss() -> None:
    pending = _tally(["a", "b"], ["a", "a"], 0.5)
    pending.dropped = 3
    fresh = _tally(["b"], ["b"], -0.1)
    fresh.merge(pending)
    assert (fresh.texts, fresh.agreed, fresh.dropped) == (3, 2, 3)
    assert fresh.delta_sum == pytest.approx(0.4)
    assert fresh.transitions == {("a", "a"): 1, ("b", "a"): 1, ("b", "b"): 1}


def _shadow_gate(spec: RegistrySpec, **settings: object) -> dict[str, object]:
    with spec.open(settings=GateSettings(**settings)) as reg:  # type: ignore[arg-type]
        gates = {g.name: g for g in reg.check(MODEL, 2)}
    gate = gates["shadow_agreement"]
    return {"passed": gate.passed, "detail": gate.detail, **gate.figures}


def test_shadow_gate_is_off_by_default(published: RegistrySpec) -> None:
    with published.open() as reg:
        assert "shadow_agreement" not in {g.name for g in reg.check(MODEL, 2)}


def test_shadow_gate_needs_enough_texts_then_the_level(published: RegistrySpec) -> None:
    with published.open() as reg:
        reg.add_shadow_counts(MODEL, 1, 2, _tally(["a"] * 50, ["a"] * 46 + ["b"] * 4))
    few = _shadow_gate(published, shadow_agreement_min=0.9, shadow_min_texts=100)
    assert few["passed"] is False and "only 50 live texts" in str(few["detail"])
    ok = _shadow_gate(published, shadow_agreement_min=0.92, shadow_min_texts=50)  # 46/50 = 0.92 exactly
    assert ok["passed"] is True and ok["agreement"] == pytest.approx(0.92)
    low = _shadow_gate(published, shadow_agreement_min=0.95, shadow_min_texts=50)
    assert low["passed"] is False and "required 95.00%" in str(low["detail"])
    ref = sps.binomtest(46, 50).proportion_ci(confidence_level=0.95, method="wilson")
    assert low["interval95"] == [pytest.approx(ref.low), pytest.approx(ref.high)]


def test_cli_shows_the_current_pair(published: RegistrySpec, capsys: pytest.CaptureFixture[str]) -> None:
    with published.open() as reg:
        t = _tally(["billing"] * 6 + ["bug"] * 4, ["billing"] * 5 + ["bug"] * 5, delta=-0.3)
        t.dropped = 7
        reg.add_shadow_counts(MODEL, 1, 2, t)
    assert main(["shadow", MODEL, *published.cli_args()]) == 0
    out = capsys.readouterr().out
    assert "candidate v2 in the shadow of live v1" in out
    assert "texts compared" in out and " 10" in out
    assert "90.00%" in out  # 9 of 10 agree
    lo, hi = sps.binomtest(9, 10).proportion_ci(method="wilson")
    assert f"{lo:.2%} – {hi:.2%}" in out
    assert "-0.0300" in out and "7 sampled texts" in out
    # Drops count a failed batch and a stop's leftovers too (service/liveloop/shadow.py _drop, stop):
    # the line must not send an operator to the queue's size alone.
    assert "7 sampled texts not scored (queue full, scoring failed or service stopped)" in out
    rows = {line.split()[0]: line.split()[1:] for line in out.splitlines() if line.startswith(("billing", "bug"))}
    assert rows == {"billing": ["5", "1"], "bug": ["0", "4"]}  # columns: billing, bug


def test_cli_shows_kept_texts_whole(
    published: RegistrySpec, capsys: pytest.CaptureFixture[str], monkeypatch: pytest.MonkeyPatch
) -> None:
    """A kept text is there for a person to review: before, the table cut it at 80 characters with
    no mark, and turned its line breaks into spaces (every other table shows them as ↵)."""
    text = "The rear light flickers on the way home.\nAlso my invoice lists a repair I never asked for, twice."
    assert len(text) > 80
    t = Tally()
    t.add(["repair"], ["billing"], 0.0, [KeptText(text, "repair", 0.6, "billing", 0.55)], keep_at_most=5)
    with published.open() as reg:
        reg.add_shadow_counts(MODEL, 1, 2, t, keep_texts=5)
    monkeypatch.delenv("COLUMNS", raising=False)  # piped, no width: one row a line with its whole text
    assert main(["shadow", MODEL, "--texts", "5", *published.cli_args()]) == 0
    out = capsys.readouterr().out
    assert text.replace("\n", " ↵ ") in out  # how every table shows a line break (registry/tables.py)


def test_cli_asked_for_texts_says_when_none_are_kept(
    published: RegistrySpec, capsys: pytest.CaptureFixture[str]
) -> None:
    # `shadow NAME --texts 20` with counts but no kept texts printed what plain `shadow NAME` prints.
    t = Tally()
    t.add(["repair"], ["billing"], 0.0, [], keep_at_most=0)
    with published.open() as reg:
        reg.add_shadow_counts(MODEL, 1, 2, t, keep_texts=0)
    assert main(["shadow", MODEL, "--texts", "20", *published.cli_args()]) == 0
    out = capsys.readouterr().out
    assert "no disagreeing texts kept for review" in out and "TEXTSIEVE_SHADOW_KEEP_TEXTS" in out
    assert main(["shadow", MODEL, *published.cli_args()]) == 0
    assert "kept for review" not in capsys.readouterr().out


def test_cli_without_counts_says_how_they_come(published: RegistrySpec, capsys: pytest.CaptureFixture[str]) -> None:
    assert main(["shadow", MODEL, *published.cli_args()]) == 0
    assert "no shadow counts yet" in capsys.readouterr().out
    assert main(["shadow", MODEL, "--all", *published.cli_args()]) == 0
    assert "no shadow counts yet" in capsys.readouterr().out


@pytest.mark.parametrize(
    ("argv", "words"),
    [
        (["--candidate", "99"], "has no version 99"),
        (["--live", "99", "--candidate", "1"], "has no version 99"),
        (["--texts", "9223372036854775808"], "--texts 9223372036854775808: give 0 to 1,000,000"),
        (["--texts", "-1"], "give 0 to"),
        # A version beside itself said "no shadow counts yet", as if some might come.
        (["--live", "1", "--candidate", "1"], "--live and --candidate both name version 1 of"),
        (["--candidate", "1"], "a pair is two versions"),
    ],
)
def test_cli_refuses_versions_it_does_not_have_and_text_counts_out_of_range(
    published: RegistrySpec, capsys: pytest.CaptureFixture[str], argv: list[str], words: str
) -> None:
    """--candidate 99 said 'no shadow counts yet for candidate v99'; a huge --texts was an
    OverflowError from the database (found by probing)."""
    assert main(["shadow", MODEL, *argv, *published.cli_args()]) == 2
    err = capsys.readouterr().err
    assert err.count("\n") == 1 and words in err, err
