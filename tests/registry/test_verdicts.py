"""Reviewers' verdicts in the registry, on SQLite and PostgreSQL: stored, shared, summarised,
exported as labelled data and deleted on request."""

from __future__ import annotations

import json
from pathlib import Path

import pytest
import scipy.stats as sps

from tests.helpers.registries import RegistrySpec
from textsieve.errors import InputError, NotFoundError
from textsieve.labelled import load_examples
from textsieve.registry import Registry
from textsieve.registry.verdicts import export_jsonl, utc_cutoff

TEXTS = [
    "I was charged twice for one ride at Market Square.",
    "The chain of bike #12 snapped again.",
    "Zoë cannot log in since Monday.",
    "Thanks, the tandem was perfect!",
    "Line\u2028separator and 自転車 stay one text.",
]


def _publish(registry: Registry, bundles: dict[str, Path]) -> None:
    registry.publish(bundles["a"], "helpdesk", actor="ci")
    registry.publish(bundles["b"], "helpdesk", actor="ci")


def _record(registry: Registry, version: int, text: str, predicted: str, verdict: str, who: str = "ana") -> int:
    info = registry.verdicts.record(
        "helpdesk",
        version,
        text=text,
        predicted_label=predicted,
        predicted_probability=0.8,
        verdict_label=verdict,
        reviewer=who,
    )
    return info.id


def test_verdicts_are_stored_shared_and_summarised_with_a_wilson_interval(
    registry: Registry, spec: RegistrySpec, tiny_bundles: dict[str, Path]
) -> None:
    _publish(registry, tiny_bundles)
    # Version 1: 7 of 9 confirmed; version 2: 1 of 1.
    pairs = [("billing", "billing")] * 7 + [("billing", "repair"), ("praise", "account")]
    for i, (predicted, verdict) in enumerate(pairs):
        _record(registry, 1, TEXTS[i % len(TEXTS)], predicted, verdict)
    # A second handle on the same registry stands for another replica.
    with spec.open() as other:
        _record(other, 2, TEXTS[4], "account", "account", who="Søren")
    # ... and a restart: everything is read back from storage by a fresh handle.
    with spec.open() as fresh:
        rows = fresh.verdicts.of("helpdesk")
        agreement = fresh.verdicts.agreement("helpdesk")
    assert [r.version for r in rows] == [1] * 9 + [2]
    assert rows[-1].text == TEXTS[4] and rows[-1].reviewer == "Søren" and rows[-1].agrees
    assert [r.id for r in rows] == sorted(r.id for r in rows)
    assert [(a.version, a.verdicts, a.agreed) for a in agreement] == [(1, 9, 7), (2, 1, 1)]
    for a in agreement:
        # Reference: scipy.stats.binomtest(...).proportion_ci(method="wilson") (Wilson, 1927).
        ref = sps.binomtest(a.agreed, a.verdicts).proportion_ci(confidence_level=0.95, method="wilson")
        assert a.low == pytest.approx(ref.low, abs=1e-9) and a.high == pytest.approx(ref.high, abs=1e-9)
    assert [r.version for r in registry.verdicts.of("helpdesk", version=2)] == [2]


@pytest.mark.parametrize(
    ("change", "expected_msg"),
    [
        pytest.param({"verdict_label": "spam"}, "verdict label 'spam' is not a label of version 1", id="verdict-label"),
        pytest.param({"predicted_label": "x"}, "predicted label 'x' is not a label", id="predicted-label"),
        pytest.param({"predicted_probability": 1.5}, "a number from 0 to 1", id="probability-high"),
        pytest.param({"predicted_probability": float("nan")}, "a number from 0 to 1", id="probability-nan"),
        pytest.param({"text": "  "}, "text is empty", id="empty-text"),
        pytest.param({"text": "a\x00b"}, "NUL character", id="nul-text"),
        pytest.param({"text": "a\ud800b"}, "lone surrogate", id="surrogate-text"),
        pytest.param({"reviewer": ""}, "reviewer's name", id="no-reviewer"),
        pytest.param({"reviewer": "a\x07b"}, "bad reviewer", id="control-reviewer"),
        pytest.param({"reviewer": "a\u200bna"}, "bad reviewer 'a\\\\u200bna' \\(U\\+200B", id="zero-width-reviewer"),
    ],
)
def test_bad_verdicts_are_refused_and_nothing_is_stored(
    registry: Registry, tiny_bundles: dict[str, Path], change: dict[str, object], expected_msg: str
) -> None:
    registry.publish(tiny_bundles["a"], "helpdesk", actor="ci")
    fields: dict[str, object] = {
        "text": TEXTS[0],
        "predicted_label": "billing",
        "predicted_probability": 0.9,
        "verdict_label": "billing",
        "reviewer": "ana",
    }
    with pytest.raises(InputError, match=expected_msg) as caught:
        registry.verdicts.record("helpdesk", 1, **{**fields, **change})  # type: ignore[arg-type]
    if "label" in expected_msg:
        assert "allowed: account, billing, praise, repair" in caught.value.message
    assert registry.verdicts.of("helpdesk") == []


def test_names_stored_before_the_format_character_rule_still_read_back(
    registry: Registry, tiny_bundles: dict[str, Path], tmp_path: Path
) -> None:
    """Names are refused on input only: a verdict and an audit event written when U+202E and U+200B
    were still accepted are read, listed and exported as stored."""
    registry.publish(tiny_bundles["a"], "helpdesk", actor="ci")
    vid = _record(registry, 1, TEXTS[0], "billing", "billing")
    reviewer, actor = "ana\u202egnp", "o\u200bps"
    with registry.backend.write() as tx:
        tx.run("UPDATE verdicts SET reviewer = ? WHERE id = ?", (reviewer, vid))
        tx.run("UPDATE events SET actor = ? WHERE model = ? AND kind = 'publish'", (actor, "helpdesk"))
    assert [v.reviewer for v in registry.verdicts.of("helpdesk")] == [reviewer]
    assert [e.actor for e in registry.history("helpdesk")] == [actor]
    assert export_jsonl(registry.verdicts.of("helpdesk"), tmp_path / "out.jsonl") == 1
    # A later change by someone else is still recorded next to them.
    registry.verdicts.delete("helpdesk", ids=[vid], actor="dpo", reason="request #7")
    assert [e.actor for e in registry.history("helpdesk")] == [actor, "dpo"]


def test_verdicts_on_unknown_models_or_versions_are_not_found(
    registry: Registry, tiny_bundles: dict[str, Path]
) -> None:
    registry.publish(tiny_bundles["a"], "helpdesk", actor="ci")
    with pytest.raises(NotFoundError, match="has no version 7"):
        _record(registry, 7, TEXTS[0], "billing", "billing")
    with pytest.raises(NotFoundError, match="no model 'other'"):
        registry.verdicts.of("other")


def test_a_deletion_naming_an_unknown_id_deletes_nothing_and_records_nothing(
    registry: Registry, tiny_bundles: dict[str, Path]
) -> None:
    _publish(registry, tiny_bundles)
    registry.publish(tiny_bundles["a"], "other", actor="ci")
    ids = [_record(registry, 1, t, "billing", "billing") for t in TEXTS[:2]]
    elsewhere = registry.verdicts.record(
        "other",
        1,
        text=TEXTS[2],
        predicted_label="billing",
        predicted_probability=0.5,
        verdict_label="repair",
        reviewer="ana",
    ).id
    events_before = len(registry.history("helpdesk"))
    # An id that was never recorded, and one that belongs to another model, with the date too.
    for asked in ([ids[0], 999_999], [ids[1], elsewhere]):
        missing = asked[1]
        with pytest.raises(
            NotFoundError,
            match=rf"^no verdict {missing} on 'helpdesk'; nothing deleted\. "
            r"'textsieve verdicts helpdesk' lists",
        ):
            registry.verdicts.delete("helpdesk", ids=asked, before="2999-01-01", actor="dpo", reason="request #41")
    assert [v.id for v in registry.verdicts.of("helpdesk")] == ids
    assert [v.id for v in registry.verdicts.of("other")] == [elsewhere]
    assert len(registry.history("helpdesk")) == events_before


def test_deletion_by_date_and_by_id_is_audited_without_the_texts(
    registry: Registry, tiny_bundles: dict[str, Path]
) -> None:
    _publish(registry, tiny_bundles)
    ids = [_record(registry, 1, t, "billing", "billing") for t in TEXTS]
    # Make the first two verdicts older, as if recorded last year.
    with registry.backend.write() as tx:
        tx.run("UPDATE verdicts SET at = ? WHERE id IN (?, ?)", ("2025-01-05T10:00:00.000000+00:00", ids[0], ids[1]))
    gone = registry.verdicts.delete("helpdesk", before="2025-06-01", actor="dpo", reason="retention: 12 months")
    assert gone.deleted == ids[:2]
    gone = registry.verdicts.delete("helpdesk", ids=[ids[3]], actor="dpo", reason="request #41")
    assert gone.deleted == [ids[3]]
    assert [v.id for v in registry.verdicts.of("helpdesk")] == [ids[2], ids[4]]
    events = [e for e in registry.history("helpdesk") if e.kind == "verdicts-delete"]
    assert [(e.actor, e.reason, e.details["ids"]) for e in events] == [
        ("dpo", "retention: 12 months", ids[:2]),
        ("dpo", "request #41", [ids[3]]),
    ]
    assert events[0].details["before"] == "2025-06-01T00:00:00.000000+00:00"
    assert not any(t in json.dumps([e.details for e in events], ensure_ascii=False) for t in TEXTS)
    with pytest.raises(InputError, match="a reason is required"):
        registry.verdicts.delete("helpdesk", ids=[ids[2]], reason="")
    with pytest.raises(InputError, match="say which verdicts"):
        registry.verdicts.delete("helpdesk", reason="nothing named")


@pytest.mark.parametrize(
    ("given", "stored"),
    [
        ("2026-11-30", "2026-11-30T00:00:00.000000+00:00"),
        ("2026-11-30T12:30:00Z", "2026-11-30T12:30:00.000000+00:00"),
        ("2026-11-30T13:30:00+01:00", "2026-11-30T12:30:00.000000+00:00"),
        ("2026-11-30T12:30:00", "2026-11-30T12:30:00.000000+00:00"),
    ],
)
def test_cutoffs_are_read_as_utc(given: str, stored: str) -> None:
    assert utc_cutoff(given) == stored


def test_export_is_labelled_data_that_the_reader_and_evalset_add_accept(
    registry: Registry, tiny_bundles: dict[str, Path], tmp_path: Path
) -> None:
    registry.publish(tiny_bundles["a"], "helpdesk", actor="ci")
    verdicts = ["billing", "repair", "account", "praise", "repair"]
    for text, label in zip(TEXTS, verdicts, strict=True):
        _record(registry, 1, text, "billing", label)
    out = tmp_path / "verdicts.jsonl"
    assert export_jsonl(registry.verdicts.of("helpdesk"), out) == len(TEXTS)
    # The project's one reader of labelled files reads the export as is, U+2028 included.
    examples = load_examples(out)
    assert [(e.text, e.label) for e in examples] == list(zip(TEXTS, verdicts, strict=True))
    info = registry.add_evalset("helpdesk", out, actor="ci")
    assert info.texts == len(TEXTS) and info.labels == {"account": 1, "billing": 1, "praise": 1, "repair": 2}
    assert "ana" not in out.read_text(encoding="utf-8")  # reviewers' names stay in the registry
    with pytest.raises(InputError, match="name the file .jsonl"):
        export_jsonl([], tmp_path / "verdicts.csv")
