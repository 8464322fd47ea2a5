"""Per-model settings: defaults, typed values, every change an audit event with actor and reason,
refusals that name the allowed keys and ranges; on SQLite and PostgreSQL (the ``registry`` fixture)."""

from __future__ import annotations

from pathlib import Path

import pytest

from tests.helpers.registries import RegistrySpec
from textsieve.errors import InputError
from textsieve.registry import GateSettings, Registry
from textsieve.registry.migrations import applied
from textsieve.registry.model_settings import (
    MACRO_F1_DROP,
    MCNEMAR,
    MCNEMAR_P,
    REVIEW_THRESHOLD,
    SETTINGS,
    Group,
    parse_assignment,
)


@pytest.fixture
def model(registry: Registry, tiny_bundles: dict[str, Path]) -> str:
    registry.publish(tiny_bundles["a"], "m", actor="tests")
    return "m"


def test_the_migration_step_is_recorded(registry: Registry) -> None:
    assert "0005_model_settings" in applied(registry.backend)


def test_defaults_are_the_documented_ones(registry: Registry, model: str) -> None:
    s = registry.model_settings(model)
    # The tolerances the gates documented before settings existed (registry/gates.py), the
    # statistical gate off and no review threshold: an untouched model behaves as before.
    assert {k: v.value for k, v in s.values.items()} == {
        "macro_f1_drop": 0.01,
        "ece_rise": 0.02,
        "tolerances": True,
        "mcnemar": False,
        "mcnemar_p": 0.05,
        "shadow_agreement_min": None,  # the shadow-agreement gate off
        "shadow_min_texts": 1000.0,
        "evalset_min_texts": 50.0,  # the size floor of the metric gates (registry/gates.py)
        "evalset_min_per_label": 5.0,
        "review_threshold": None,
    }
    assert all(v.is_default and v.set_by is None for v in s.values.values())
    assert s.get(MCNEMAR) is False and s.get(REVIEW_THRESHOLD) is None


def test_a_change_is_audited_with_actor_reason_and_old_values(registry: Registry, model: str) -> None:
    after, changed = registry.change_settings(
        model, {"mcnemar": True, "mcnemar_p": 0.01, "review_threshold": 0.8}, reason="600 texts", actor="lead"
    )
    assert changed == ["mcnemar", "mcnemar_p", "review_threshold"]
    assert after.get(MCNEMAR) is True and after.get(MCNEMAR_P) == 0.01 and after.get(REVIEW_THRESHOLD) == 0.8
    entry = after.values["mcnemar_p"]
    assert (entry.set_by, entry.reason, entry.default, entry.is_default) == ("lead", "600 texts", 0.05, False)
    assert registry.model_settings(model) == after  # read back from storage, not only returned
    event = registry.history(model)[-1]
    assert (event.kind, event.actor, event.reason, event.version) == ("settings", "lead", "600 texts", None)
    assert event.details["changes"] == {
        "mcnemar": {"from": False, "to": True},
        "mcnemar_p": {"from": 0.05, "to": 0.01},
        "review_threshold": {"from": None, "to": 0.8},
    }
    assert entry.set_at == event.at

    # Back to the default: recorded too, and the row is gone (the default shows again).
    after, changed = registry.change_settings(model, reset=["mcnemar_p"], reason="back", actor="lead")
    assert changed == ["mcnemar_p"] and after.values["mcnemar_p"].is_default and after.get(MCNEMAR_P) == 0.05
    assert registry.history(model)[-1].details["changes"] == {"mcnemar_p": {"from": 0.01, "to": 0.05, "default": True}}


def test_no_change_records_nothing(registry: Registry, model: str) -> None:
    registry.change_settings(model, {"macro_f1_drop": 0.02}, reason="wider", actor="lead")
    events = len(registry.history(model))
    after, changed = registry.change_settings(model, {"macro_f1_drop": 0.02}, reason="again", actor="other")
    assert changed == [] and after.values["macro_f1_drop"].set_by == "lead"
    _, changed = registry.change_settings(model, reset=["ece_rise"], reason="already default")
    assert changed == [] and len(registry.history(model)) == events


def test_setting_the_default_value_is_still_a_recorded_choice(registry: Registry, model: str) -> None:
    # Someone who writes macro_f1_drop=0.01 chose it; a later change of the registry-wide default
    # must not move it, so it is stored (and shown as "set").
    after, changed = registry.change_settings(model, {"macro_f1_drop": 0.01}, reason="pin it", actor="lead")
    assert changed == ["macro_f1_drop"] and not after.values["macro_f1_drop"].is_default


@pytest.mark.parametrize(
    ("values", "reset", "expected_msg"),
    [
        pytest.param({"macro_f1": 0.1}, [], "unknown setting 'macro_f1'; allowed: macro_f1_drop (", id="unknown-key"),
        pytest.param({"macro_f1_drop": 1.5}, [], "bad value 1.5 for macro_f1_drop: a number from 0 to 1", id="range"),
        pytest.param({"macro_f1_drop": -0.01}, [], "bad value -0.01 for macro_f1_drop", id="negative"),
        pytest.param({"macro_f1_drop": float("nan")}, [], "bad value nan for macro_f1_drop", id="nan"),
        pytest.param({"mcnemar_p": 0.0}, [], "mcnemar_p: a number above 0 and at most 0.5", id="zero-level"),
        pytest.param({"mcnemar": 1}, [], "bad value 1 for mcnemar: on or off", id="int-for-switch"),
        pytest.param({"ece_rise": True}, [], "bad value True for ece_rise", id="bool-for-number"),
        pytest.param({"ece_rise": "0.1"}, [], "bad value '0.1' for ece_rise", id="string-for-number"),
        pytest.param(
            {"review_threshold": 0.0}, [], "review_threshold: a number above 0 and at most 1, or none", id="t0"
        ),
        pytest.param({"mcnemar": True}, ["mcnemar"], "mcnemar: set and reset at once", id="set-and-reset"),
        pytest.param({"tolerances": False}, [], "tolerances=off needs mcnemar=on", id="no-gate-left"),
        pytest.param({}, ["nope"], "unknown setting 'nope'", id="reset-unknown"),
    ],
)
def test_bad_changes_are_refused_and_nothing_is_written(
    registry: Registry, model: str, values: dict[str, object], reset: list[str], expected_msg: str
) -> None:
    events = len(registry.history(model))
    with pytest.raises(InputError) as info:
        registry.change_settings(model, values, reset=reset, reason="try")  # type: ignore[arg-type]
    assert expected_msg in info.value.message
    assert len(registry.history(model)) == events
    assert all(v.is_default for v in registry.model_settings(model).values.values())


def test_reason_is_required_and_group_limits_the_keys(registry: Registry, model: str) -> None:
    with pytest.raises(InputError, match="a reason is required"):
        registry.change_settings(model, {"mcnemar": True}, reason="  ")
    with pytest.raises(InputError, match="unknown setting 'review_threshold'; allowed: macro_f1_drop") as info:
        registry.change_settings(model, {"review_threshold": 0.9}, reason="x", group=Group.GATES)
    assert "review_threshold (" not in info.value.message  # only the keys the verb may change are offered


def test_tolerances_off_is_allowed_with_the_statistical_gate_on(registry: Registry, model: str) -> None:
    after, _ = registry.change_settings(model, {"mcnemar": True, "tolerances": False}, reason="statistical only")
    with pytest.raises(InputError, match="tolerances=off needs mcnemar=on"):
        registry.change_settings(model, reset=["mcnemar"], reason="would leave no gate")
    assert registry.model_settings(model) == after


def test_registry_wide_defaults_show_as_defaults(spec: RegistrySpec, tiny_bundles: dict[str, Path]) -> None:
    with spec.open(settings=GateSettings(ece_tolerance=0.5, mcnemar=True)) as reg:
        reg.publish(tiny_bundles["a"], "m")
        s = reg.model_settings("m")
        assert s.values["ece_rise"].value == 0.5 and s.values["ece_rise"].is_default
        assert s.get(MCNEMAR) is True


def test_a_stored_key_this_version_does_not_know_is_ignored(registry: Registry, model: str) -> None:
    # A newer textsieve may store a setting this one has no declaration for; reading must not fail.
    with registry.backend.write() as tx:
        tx.run(
            "INSERT INTO model_settings (model, key, value, set_by, set_at, reason, event_id) "
            "VALUES (?, ?, ?, ?, ?, ?, ?)",
            (model, "from_the_future", "1", "x", "2030-01-01T00:00:00+00:00", "later", 0),
        )
    assert set(registry.model_settings(model).values) == set(SETTINGS)


def test_a_fraction_an_older_release_stored_for_a_count_keeps_the_meaning_it_had(
    registry: Registry, model: str
) -> None:
    """Counts of texts became whole numbers only; a release before that stored shadow_min_texts 2.5 and
    used it as 2 (int). Read back, it was dropped for the default, 1,000, silently; it stays 2."""
    with registry.backend.write() as tx:
        tx.run(
            "INSERT INTO model_settings (model, key, value, set_by, set_at, reason, event_id) "
            "VALUES (?, ?, ?, ?, ?, ?, ?)",
            (model, "shadow_min_texts", "2.5", "x", "2026-12-01T00:00:00+00:00", "older release", 0),
        )
    value = registry.model_settings(model).values["shadow_min_texts"]
    assert value.value == 2.0 and not value.is_default and value.set_by == "x"
    with pytest.raises(InputError, match="a whole number"):
        registry.change_settings(model, {"shadow_min_texts": 2.5}, actor="y", reason="again")


def test_unknown_model_is_not_found(registry: Registry) -> None:
    from textsieve.errors import NotFoundError

    with pytest.raises(NotFoundError, match="no model 'ghost'"):
        registry.change_settings("ghost", {"mcnemar": True}, reason="x")


@pytest.mark.parametrize(
    ("text", "expected"),
    [
        ("macro_f1_drop=0.02", ("macro_f1_drop", 0.02)),
        ("mcnemar=on", ("mcnemar", True)),
        ("mcnemar=OFF", ("mcnemar", False)),
        (" mcnemar_p = 0.01", ("mcnemar_p", 0.01)),
        ("review_threshold=none", ("review_threshold", None)),
        ("review_threshold=0.9", ("review_threshold", 0.9)),
        ("evalset_min_texts=200", ("evalset_min_texts", 200.0)),
        ("evalset_min_per_label=0", ("evalset_min_per_label", 0.0)),
        ("shadow_min_texts= 1000 ", ("shadow_min_texts", 1000.0)),
    ],
)
def test_parse_assignment(text: str, expected: tuple[str, object]) -> None:
    assert parse_assignment(text) == expected


@pytest.mark.parametrize(
    ("text", "expected_msg"),
    [
        pytest.param("mcnemar", "--set 'mcnemar': write KEY=VALUE; allowed: macro_f1_drop", id="no-equals"),
        pytest.param("mcnemar=maybe", "bad value 'maybe' for mcnemar: on or off", id="switch-word"),
        # Before: "yes", "true" and "1" were taken though every message said "on or off".
        pytest.param("mcnemar=yes", "bad value 'yes' for mcnemar: on or off", id="switch-yes"),
        pytest.param("tolerances=true", "bad value 'true' for tolerances: on or off", id="switch-true"),
        pytest.param("mcnemar=1", "bad value '1' for mcnemar: on or off", id="switch-1"),
        pytest.param("macro_f1_drop=1e9", "bad value '1e9' for macro_f1_drop: a number from 0 to 1", id="range"),
        pytest.param("macro_f1_drop=inf", "bad value 'inf' for macro_f1_drop", id="inf"),
        pytest.param("macro_f1_drop=none", "bad value 'none' for macro_f1_drop", id="none-not-optional"),
        # Counts of texts are whole numbers: 2.5 was stored and used as 2.
        pytest.param("shadow_min_texts=2.5", "for shadow_min_texts: a whole number from 1 to", id="fraction"),
        pytest.param("evalset_min_texts=0", "for evalset_min_texts: a whole number from 1 to", id="no-texts"),
        pytest.param("evalset_min_per_label=-1", "for evalset_min_per_label: a whole number from 0", id="negative"),
        pytest.param("evalset_min_per_label=nan", "bad value 'nan' for evalset_min_per_label", id="nan"),
        # Before: float() took these as 1000 (and 5); a count is written as it is shown, in digits.
        pytest.param(
            "evalset_min_texts=1e3",
            "bad value '1e3' for evalset_min_texts: a whole number from 1 to 1,000,000,000, written in plain digits",
            id="exponent",
        ),
        pytest.param("evalset_min_texts=1_000", "bad value '1_000' for evalset_min_texts", id="underscore"),
        pytest.param("evalset_min_per_label=+5", "bad value '+5' for evalset_min_per_label", id="plus-sign"),
        pytest.param("shadow_min_texts=١٠٠٠", "for shadow_min_texts: a whole number", id="arabic-indic-digits"),
    ],
)
def test_parse_assignment_refusals(text: str, expected_msg: str) -> None:
    with pytest.raises(InputError) as info:
        parse_assignment(text, Group.GATES)
    assert expected_msg in info.value.message


def test_declaring_a_setting_is_one_line_and_twice_is_refused() -> None:
    from textsieve.registry.model_settings import Setting, declare

    with pytest.raises(ValueError, match="declared twice"):
        declare(Setting.number(MACRO_F1_DROP.key, 0.5, 0.0, 1.0, Group.GATES, "again"))


def test_minus_zero_is_stored_and_shown_as_zero() -> None:
    """float("-0") is -0.0, which equals 0 and printed as '-0' in the gates table."""
    setting = SETTINGS["macro_f1_drop"]
    value = setting.parse("-0")
    assert value == 0.0 and str(value) == "0.0" and setting.show(value) == "0"
