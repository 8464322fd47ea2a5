"""The registry's Python API on SQLite and PostgreSQL: publishing (and refusing), the
lifecycle, rollback, the audit trail, verified fetches and change polling."""

from __future__ import annotations

import datetime as dt
import getpass
import hashlib
import json
import shutil
import subprocess
import sys
from collections.abc import Callable
from pathlib import Path

import numpy as np
import onnx
import pytest
from onnx import TensorProto, helper

from tests.helpers.jsonl import read_jsonl, write_jsonl
from tests.helpers.registries import RegistrySpec, edit_manifest, publish_unchecked_labels, recard
from textsieve.errors import BundleError, InputError, IntegrityError, NotFoundError, StateError
from textsieve.registry import Registry, open_registry
from textsieve.registry.blobs import OWNER_FILE
from textsieve.registry.runtime import Predictor


def _sha(path: Path) -> str:
    return hashlib.sha256(path.read_bytes()).hexdigest()


def copy_bundle(src: Path, dst: Path) -> Path:
    shutil.copytree(src, dst)
    return dst


def assert_invariants(reg: Registry, model: str) -> None:
    states = [v.state for v in reg.versions(model)]
    assert states.count("live") <= 1
    assert states.count("candidate") <= 1


def assert_nothing_stored(reg: Registry, spec: RegistrySpec) -> None:
    assert reg.models() == []
    assert reg.cursor() == 0
    blobs = spec.blob_dir
    assert not blobs.exists() or not any(blobs.iterdir())


# -- publishing ---------------------------------------------------------------------------
def test_publish_numbers_versions_per_model_and_stores_blobs_by_sha256(
    registry: Registry, spec: RegistrySpec, tiny_bundles: dict[str, Path]
) -> None:
    a, b = tiny_bundles["a"], tiny_bundles["b"]
    v1 = registry.publish(a, "spam", reason="first cut", actor="alice")
    v2 = registry.publish(b, "spam")
    other = registry.publish(a, "support.triage")
    assert (v1.version, v2.version, other.version) == (1, 2, 1)
    assert v1.state == "registered" and v1.published_by == "alice" and v1.reason == "first cut"
    assert v2.published_by == getpass.getuser()
    manifest = json.loads((a / "manifest.json").read_text())
    assert v1.labels == manifest["labels"]
    assert v1.manifest_sha256 == _sha(a / "manifest.json")
    assert v1.accuracy == manifest["metrics"]["accuracy"] and v1.parity_passed
    assert v1.files == {name: _sha(a / name) for name in ["manifest.json", *manifest["files"]]}
    for digest in set(v1.files.values()) | set(v2.files.values()):
        assert _sha(spec.blob_dir / digest) == digest
    assert registry.version("spam", 2) == v2
    assert [m.name for m in registry.models()] == ["spam", "support.triage"]
    spam = registry.models()[0]
    assert (spam.live, spam.candidate, spam.versions, spam.evalset_texts) == (None, None, 2, None)


def test_the_same_bundle_is_published_once_per_model(registry: Registry, tiny_bundles: dict[str, Path]) -> None:
    registry.publish(tiny_bundles["a"], "spam")
    with pytest.raises(StateError, match="already version 1"):
        registry.publish(tiny_bundles["a"], "spam")
    assert len(registry.versions("spam")) == 1


def _garbage_onnx(bundle: Path) -> None:
    (bundle / "model.onnx").write_bytes(b"\x08\x07this is not a protobuf graph" * 10)


def _renamed_io_onnx(bundle: Path) -> None:
    # A valid graph (passes onnx.checker) whose input is called 'ids' instead of 'token_ids'.
    x = helper.make_tensor_value_info("ids", TensorProto.INT64, ["batch", "seq"])
    n = helper.make_tensor_value_info("lengths", TensorProto.INT64, ["batch"])
    outs = [
        helper.make_tensor_value_info(name, TensorProto.FLOAT, ["batch", "seq"])
        for name in ("logits", "pooled", "contributions")
    ]
    outs.insert(2, helper.make_tensor_value_info("positions", TensorProto.INT64, ["batch"]))
    nodes = [
        helper.make_node("Cast", ["ids"], ["logits"], to=TensorProto.FLOAT),
        helper.make_node("Cast", ["ids"], ["pooled"], to=TensorProto.FLOAT),
        helper.make_node("Identity", ["lengths"], ["positions"]),
        helper.make_node("Cast", ["ids"], ["contributions"], to=TensorProto.FLOAT),
    ]
    graph = helper.make_graph(nodes, "g", [x, n], outs)
    model = helper.make_model(graph, opset_imports=[helper.make_opsetid("", 18)])
    onnx.checker.check_model(model)
    onnx.save(model, str(bundle / "model.onnx"))


# how to break a copy of bundle 'a' -> words the refusal must contain
BAD_BUNDLES = [
    pytest.param(lambda b: (b / "manifest.json").unlink(), "no manifest.json", id="no manifest"),
    pytest.param(lambda b: (b / "manifest.json").write_text("{not json"), "manifest.json", id="manifest not JSON"),
    pytest.param(lambda b: edit_manifest(b, {"surprise": 1}), "surprise", id="schema: unknown field"),
    pytest.param(
        lambda b: edit_manifest(b, {"labels": ["x", "x", "y", "z"]}),
        "labels must be unique",
        id="schema: duplicate labels",
    ),
    pytest.param(
        lambda b: (b / "vocab.txt").write_text("<pad>\n<unk>\nsneaky\n"),
        "vocab.txt has sha256",
        id="file sha256 differs",
    ),
    pytest.param(
        lambda b: (b / "card.md").unlink(), "card.md is listed in the manifest but missing", id="listed file missing"
    ),
    pytest.param(
        lambda b: (b / "extra.bin").write_bytes(b"x"), "not listed in the manifest: extra.bin", id="unlisted file"
    ),
    pytest.param(lambda b: (_garbage_onnx(b), edit_manifest(b, {})), "not a valid ONNX model", id="onnx unreadable"),
    pytest.param(lambda b: (_renamed_io_onnx(b), edit_manifest(b, {})), "inputs are", id="onnx inputs differ"),
    pytest.param(lambda b: edit_manifest(b, {"parity.passed": False}), "parity check failed", id="parity failed"),
    pytest.param(
        lambda b: edit_manifest(b, {"parity.max_abs_prob_diff": 0.5}),
        "parity check failed",
        id="parity beyond tolerance",
    ),
    pytest.param(lambda b: edit_manifest(b, {"vocabulary.size": 3}), "vocab.txt has", id="vocabulary size"),
    pytest.param(
        lambda b: edit_manifest(b, {"labels": ["x", "y", "z"]}),
        "the graph scores 4 classes, the manifest names 3 labels",
        id="labels fewer than the graph's classes",
    ),
    pytest.param(
        lambda b: edit_manifest(b, {"labels": ["a\nb", "c", "d", "e"]}),
        "holds U+000A control character (category Cc: a control character)",
        id="a label with a line break",
    ),
    # A label with a format character was refused by training only when it was a control character:
    # U+202E shows the text after it reversed on the reviewer page, U+200B two labels alike
    # (names of the characters from the Unicode Character Database, UnicodeData.txt).
    pytest.param(
        lambda b: _relabel(b, 0, "\u202e"),
        "\\u202e' holds U+202E RIGHT-TO-LEFT OVERRIDE (category Cf: a format character",
        id="a label with a bidi override",
    ),
    pytest.param(
        lambda b: _relabel(b, 1, "\u200b"),
        "\\u200b' holds U+200B ZERO WIDTH SPACE (category Cf: a format character",
        id="a label with a zero width space",
    ),
    pytest.param(
        lambda b: _relabel(b, 1, "\u2028x"), "holds U+2028 LINE SEPARATOR (category Zl", id="a label with U+2028"
    ),
    pytest.param(
        lambda b: edit_manifest(b, {"metrics.accuracy": float("nan")}),
        "metrics.accuracy: Input should be a finite number",
        id="NaN accuracy",  # it read as 'manifest.json changed while it was being checked' (NaN != NaN)
    ),
    pytest.param(lambda b: edit_manifest(b, {"metrics.macro_f1": 5.0}), "metrics.macro_f1", id="macro-F1 above 1"),
    # A card edited and the manifest re-hashed published whatever it said (found by probing).
    pytest.param(
        lambda b: _recard(b, lambda card: card.split("## Cautions")[0]),
        "card.md has no cautions section",
        id="card without its cautions",
    ),
    pytest.param(
        lambda b: _recard(b, lambda card: card.replace("## Cautions", "<!--\n## Cautions") + "-->\n"),
        "card.md has no cautions section",
        id="cautions commented out",
    ),
    pytest.param(
        lambda b: _recard(b, lambda card: card.split("## Cautions")[0] + "## Cautions\n\nBe careful.\n"),
        "do not say that predictions are aids for human review, that they can carry bias",
        id="cautions heading without substance",
    ),
    pytest.param(
        lambda b: _recard(b, lambda card: card.replace("biases", "quirks")),
        "('Cautions') do not say that they can carry bias from the training data: the card must say",
        id="cautions without the bias point",
    ),
]


def _relabel(bundle: Path, index: int, suffix: str) -> list[str]:
    """Append ``suffix`` to one label of the bundle's manifest and re-hash, as anyone holding the folder can."""
    labels = json.loads((bundle / "manifest.json").read_text(encoding="utf-8"))["labels"]
    labels[index] += suffix
    edit_manifest(bundle, {"labels": labels})
    return list(labels)


def test_a_version_published_before_the_label_rule_still_loads_and_scores(
    registry: Registry, spec: RegistrySpec, tiny_bundles: dict[str, Path], tiny_data: Path, tmp_path: Path
) -> None:
    """Publish now refuses a label with a format character, but a registry written before holds such
    versions: they load (the manifest is held to the rule of its day), score and promote as before."""
    bundle = copy_bundle(tiny_bundles["a"], tmp_path / "old")
    labels = _relabel(bundle, 0, "\u202e")
    with pytest.raises(BundleError, match="U\\+202E RIGHT-TO-LEFT OVERRIDE"):
        registry.publish(bundle, "spam")
    assert_nothing_stored(registry, spec)
    assert publish_unchecked_labels(registry, bundle, "spam") == 1
    fetched = registry.fetch("spam", 1)
    assert fetched.manifest.labels == labels == registry.manifest("spam", 1).labels
    registry.promote("spam", 1, "live", reason="stored before the rule", actor="tests", force=True)
    assert registry.live("spam") is not None
    predictor = Predictor.from_bundle(registry.fetch("spam"))
    assert predictor.labels == labels
    reference = Predictor.from_bundle(tiny_bundles["a"]).predict(["the dock is broken"], spans=0)
    scored = predictor.predict(["the dock is broken"], spans=0)
    # Its evaluation set names the stored labels, and is added and judged on (training alone refuses them).
    rows = read_jsonl(tiny_data / "test.jsonl")
    original = json.loads((tiny_bundles["a"] / "manifest.json").read_text(encoding="utf-8"))["labels"]
    write_jsonl(tmp_path / "eval.jsonl", [{**r, "label": labels[original.index(r["label"])]} for r in rows])
    info = registry.add_evalset("spam", tmp_path / "eval.jsonl", actor="tests")
    assert set(info.labels) <= set(labels) and labels[0] in info.labels
    # The same graph as the bundle it was copied from: the same probabilities, under the stored labels.
    assert list(scored[0].probabilities) == labels
    assert list(scored[0].probabilities.values()) == list(reference[0].probabilities.values())


def _recard(bundle: Path, change: Callable[[str], str]) -> None:
    """Edit the bundle's card and record its new sha256, as anyone holding the folder can."""
    card = bundle / "card.md"
    card.write_text(change(card.read_text(encoding="utf-8")), encoding="utf-8")
    edit_manifest(bundle, {})


@pytest.mark.parametrize(("breaker", "expected_msg"), BAD_BUNDLES)
def test_a_bundle_failing_any_check_is_refused_and_nothing_is_stored(
    breaker: Callable[[Path], object],
    expected_msg: str,
    registry: Registry,
    spec: RegistrySpec,
    tiny_bundles: dict[str, Path],
    tmp_path: Path,
) -> None:
    bundle = copy_bundle(tiny_bundles["a"], tmp_path / "bad")
    breaker(bundle)
    with pytest.raises(BundleError) as info:
        registry.publish(bundle, "spam")
    assert expected_msg in info.value.message
    assert_nothing_stored(registry, spec)


REWORDED_CAUTIONS = """\
Limits and cautions
-------------------

Treat every label as a suggestion a human reviewer checks. Whatever bias the training texts
hold, the model may repeat. Monitor its error rate per month. The team lead stays accountable
for what is done with a text.
"""


def test_a_card_whose_cautions_are_reworded_is_published(
    registry: Registry, tiny_bundles: dict[str, Path], tmp_path: Path
) -> None:
    """The check reads the section's points, not the exporter's sentences: a team may say them its own way."""
    bundle = copy_bundle(tiny_bundles["a"], tmp_path / "reworded")
    _recard(bundle, lambda card: card.split("## Cautions")[0] + REWORDED_CAUTIONS)
    assert registry.publish(bundle, "spam").version == 1


def test_publish_refuses_bad_names_and_paths(
    registry: Registry, spec: RegistrySpec, tiny_bundles: dict[str, Path], tmp_path: Path
) -> None:
    for bad in ("../escape", "Spam", "a..b", "x/y", ""):
        with pytest.raises(InputError, match="bad model name"):
            registry.publish(tiny_bundles["a"], bad)
    with pytest.raises(BundleError, match="not a folder"):
        registry.publish(tmp_path / "nowhere", "spam")
    assert_nothing_stored(registry, spec)


def test_publish_with_an_evalset_checks_its_labels_first(
    registry: Registry, spec: RegistrySpec, tiny_bundles: dict[str, Path], tmp_path: Path
) -> None:
    bad = write_jsonl(tmp_path / "eval.jsonl", [{"text": "hello", "label": "unheard-of"}])
    with pytest.raises(InputError, match="unheard-of"):
        registry.publish(tiny_bundles["a"], "spam", evalset=bad)
    assert_nothing_stored(registry, spec)


# -- evaluation sets ----------------------------------------------------------------------
def test_evalsets_are_normalised_blobs_and_the_newest_wins(
    registry: Registry, spec: RegistrySpec, tiny_bundles: dict[str, Path], tiny_data: Path, tmp_path: Path
) -> None:
    with pytest.raises(NotFoundError, match="no model 'spam'"):
        registry.add_evalset("spam", tiny_data / "test.jsonl")
    registry.publish(tiny_bundles["a"], "spam", evalset=tiny_data / "test.jsonl")
    rows = read_jsonl(tiny_data / "test.jsonl")
    first = registry.evalset("spam")
    assert first is not None and first.texts == len(rows) and first.source == "test.jsonl"
    stored = read_jsonl(spec.blob_dir / first.sha256)
    assert stored == [{"label": r["label"], "text": r["text"]} for r in rows]
    counts: dict[str, int] = {}
    for r in rows:
        counts[r["label"]] = counts.get(r["label"], 0) + 1
    assert first.labels == dict(sorted(counts.items()))
    # the same texts as CSV with other field names give the same blob
    csv = tmp_path / "eval.csv"
    quoted = [(r["text"].replace('"', '""'), r["label"]) for r in rows[:10]]
    csv.write_text("body,tag\n" + "".join(f'"{text}",{label}\n' for text, label in quoted))
    second = registry.add_evalset("spam", csv, text_field="body", label_field="tag", actor="bob")
    assert second.id > first.id and second.texts == 10 and second.added_by == "bob"
    assert registry.evalset("spam") == second
    assert read_jsonl(spec.blob_dir / second.sha256) == stored[:10]
    with pytest.raises(InputError, match="labels not known to version 1"):
        registry.add_evalset("spam", write_jsonl(tmp_path / "x.jsonl", [{"text": "t", "label": "nope"}]))
    with pytest.raises(InputError, match="no such file"):
        registry.add_evalset("spam", tmp_path / "missing.jsonl")


# -- lifecycle ----------------------------------------------------------------------------
def test_lifecycle_one_live_one_candidate_promote_retires_and_rollback_walks_back(
    registry: Registry, tiny_bundles: dict[str, Path], tmp_path: Path
) -> None:
    a, b = tiny_bundles["a"], tiny_bundles["b"]
    registry.publish(a, "m")
    registry.publish(b, "m")
    c = copy_bundle(a, tmp_path / "c")
    recard(c, "Another card, so another bundle.")
    registry.publish(c, "m")

    first = registry.promote("m", 1, "live", reason="first")  # no live: comparison gates pass
    assert first.version.state == "live" and first.retired is None and not first.forced
    assert [g.detail for g in first.gates if g.name in ("labels", "macro_f1", "ece")] == ["no live version"] * 3

    assert registry.promote("m", 2, "candidate", reason="try b").version.state == "candidate"
    assert registry.promote("m", 3, "candidate", reason="try c").version.state == "candidate"
    assert registry.version("m", 2).state == "registered"  # the old candidate steps back
    assert_invariants(registry, "m")
    with pytest.raises(StateError, match="already candidate"):
        registry.promote("m", 3, "candidate", reason="again")
    with pytest.raises(StateError, match="already live"):
        registry.promote("m", 1, "live", reason="again")
    with pytest.raises(StateError, match="is live and cannot become candidate"):
        registry.promote("m", 1, "candidate", reason="demote?")

    # live exists, no evaluation set: refused, unless forced
    three = registry.promote("m", 3, "live", reason="ship c", force=True)
    assert three.forced and three.retired == 1
    assert registry.version("m", 1).state == "retired" and registry.live("m") == three.version
    assert registry.candidate("m") is None  # the candidate became live
    two = registry.promote("m", 2, "live", reason="ship b", force=True)
    assert two.retired == 3 and two.version.previous_live == 3
    assert_invariants(registry, "m")

    assert registry.rollback("m", reason="b misbehaves").version == 3
    assert [v.state for v in registry.versions("m")] == ["retired", "retired", "live"]
    assert registry.rollback("m", reason="c too").version == 1
    # versions 3 and 2 were live after 1 and are retired: "no version was live before it" read as false
    with pytest.raises(StateError, match="version 1 of 'm' is live and was its first live version, so rollback"):
        registry.rollback("m", reason="nothing left")

    # A retired version on trial again, replaced by another candidate, goes back to retired (it has
    # been live): 'registered' would hide that from the versions table.
    assert registry.promote("m", 3, "candidate", reason="c again").version.state == "candidate"
    assert registry.promote("m", 2, "candidate", reason="b instead").version.state == "candidate"
    assert registry.version("m", 3).state == "retired"
    assert_invariants(registry, "m")
    assert registry.live("m").version == 1  # type: ignore[union-attr]
    assert_invariants(registry, "m")


# Model "m" has version 1, registered; nothing is live.
@pytest.mark.parametrize(
    ("call", "error", "expected_msg"),
    [
        pytest.param(
            lambda reg: reg.rollback("m", reason="x"), StateError, "no live version", id="rollback, none live"
        ),
        pytest.param(
            lambda reg: reg.promote("m", 1, "live", reason=" "), InputError, "reason is required", id="blank reason"
        ),
        pytest.param(
            lambda reg: reg.promote("m", 1, "retired", reason="x"),
            InputError,
            "allowed: candidate, live",
            id="promote to retired",
        ),
        pytest.param(
            lambda reg: reg.promote("m", 7, "live", reason="x"),
            NotFoundError,
            "no version 7; its versions are 1–1",
            id="unknown version",
        ),
        pytest.param(lambda reg: reg.versions("nope"), NotFoundError, "no model 'nope'", id="unknown model"),
    ],
)
def test_refused_calls_on_a_model_with_nothing_live(
    call: Callable[[Registry], object],
    error: type[Exception],
    expected_msg: str,
    registry: Registry,
    tiny_bundles: dict[str, Path],
) -> None:
    registry.publish(tiny_bundles["a"], "m")
    with pytest.raises(error, match=expected_msg):
        call(registry)


def test_history_records_every_change_with_actor_utc_time_reason_and_gates(
    registry: Registry, tiny_bundles: dict[str, Path], tiny_data: Path
) -> None:
    registry.publish(tiny_bundles["a"], "m", reason="baseline", evalset=tiny_data / "test.jsonl")
    registry.publish(tiny_bundles["relabelled"], "m", actor="carol")
    registry.promote("m", 1, "live", reason="go", actor="alice")
    with pytest.raises(Exception, match="gate labels refused"):
        registry.promote("m", 2, "live", reason="new labels")
    registry.promote("m", 2, "live", reason="accepted relabel", force=True, actor="dave")
    registry.rollback("m", reason="clients broke", actor="erin")
    events = registry.history("m")
    assert [e.kind for e in events] == ["publish", "evalset", "publish", "promote", "refuse", "promote", "rollback"]
    assert [e.actor for e in events] == [getpass.getuser()] * 2 + ["carol", "alice", getpass.getuser(), "dave", "erin"]
    assert [e.reason for e in events][3:] == ["go", "new labels", "accepted relabel", "clients broke"]
    assert [e.version for e in events] == [1, None, 2, 1, 2, 2, 1]
    for e in events:
        at = dt.datetime.fromisoformat(e.at)
        assert at.utcoffset() == dt.timedelta(0)
    assert [e.id for e in events] == sorted(e.id for e in events)
    refuse, forced = events[4], events[5]
    assert refuse.details["failed"] == ["labels", "macro_f1", "ece"]
    assert {g["name"]: g["passed"] for g in refuse.details["gates"]} == {
        "parity": True,
        "labels": False,
        "cautions": True,
        "macro_f1": False,
        "ece": False,
    }
    assert forced.details["forced"] is True and forced.details["overridden"] == ["labels", "macro_f1", "ece"]
    assert forced.details["retired"] == 1
    assert events[6].details == {"from": 2, "to": 1, "target_was": "retired"}
    assert events[0].details["manifest_sha256"] == registry.version("m", 1).manifest_sha256


# -- fetch and change polling -------------------------------------------------------------
def test_fetch_gives_verified_files_that_predict_like_the_original(
    registry: Registry, tiny_bundles: dict[str, Path], tiny_data: Path
) -> None:
    a = tiny_bundles["a"]
    registry.publish(a, "m")
    with pytest.raises(NotFoundError, match="no live version"):
        registry.fetch("m")
    registry.promote("m", 1, "live", reason="go")
    bundle = registry.fetch("m")
    assert bundle.manifest.labels == registry.version("m", 1).labels
    assert {p.name: _sha(p) for p in bundle.path.iterdir()} == registry.version("m", 1).files
    assert registry.fetch("m", 1).path == bundle.path
    texts = [r["text"] for r in read_jsonl(tiny_data / "test.jsonl")[:40]]
    here = Predictor.from_bundle(bundle).predict(texts, spans=0)
    there = Predictor.from_bundle(a).predict(texts, spans=0)
    np.testing.assert_array_equal(
        [[p.probabilities[k] for k in sorted(p.probabilities)] for p in here],
        [[p.probabilities[k] for k in sorted(p.probabilities)] for p in there],
    )
    with pytest.raises(NotFoundError):
        registry.fetch("m", 2)


def test_every_fetch_rechecks_blobs(registry: Registry, spec: RegistrySpec, tiny_bundles: dict[str, Path]) -> None:
    info = registry.publish(tiny_bundles["a"], "m")
    registry.promote("m", 1, "live", reason="go")
    bundle = registry.fetch("m")
    onnx_blob = spec.blob_dir / info.files["model.onnx"]
    original = onnx_blob.read_bytes()
    # a tampered cached copy is rebuilt from the intact blob
    (bundle.path / "model.onnx").write_bytes(b"tampered copy")
    assert _sha(registry.fetch("m").path / "model.onnx") == info.files["model.onnx"]
    # a tampered blob is refused although the cached copy is still intact
    onnx_blob.write_bytes(original[:-1] + bytes([original[-1] ^ 1]))
    with pytest.raises(IntegrityError, match="altered"):
        registry.fetch("m")
    onnx_blob.unlink()
    with pytest.raises(IntegrityError, match="missing"):
        registry.fetch("m")
    with pytest.raises(IntegrityError, match="missing"):
        registry.fetch("m", 1)
    onnx_blob.write_bytes(original)
    assert registry.fetch("m").path.is_dir()


def test_a_damaged_version_is_never_promoted(
    registry: Registry, spec: RegistrySpec, tiny_bundles: dict[str, Path]
) -> None:
    info = registry.publish(tiny_bundles["a"], "m")
    (spec.blob_dir / info.files["vocab.txt"]).write_text("<pad>\n<unk>\n")
    with pytest.raises(IntegrityError):
        registry.promote("m", 1, "live", reason="go", force=True)
    assert registry.live("m") is None
    # Nor made the candidate, which every replica loads for shadow scoring.
    with pytest.raises(IntegrityError):
        registry.promote("m", 1, "candidate", reason="trial")
    assert registry.version("m", 1).state == "registered"


def test_changes_since_reports_each_event_once(registry: Registry, tiny_bundles: dict[str, Path]) -> None:
    start = registry.cursor()
    assert start == 0 and registry.changes_since(0) == (0, [])
    registry.publish(tiny_bundles["a"], "m")
    registry.promote("m", 1, "live", reason="go")
    cursor, events = registry.changes_since(start)
    assert [e.kind for e in events] == ["publish", "promote"] and cursor == events[-1].id == registry.cursor()
    assert registry.changes_since(cursor) == (cursor, [])
    registry.publish(tiny_bundles["b"], "m")
    registry.promote("m", 2, "live", reason="b", force=True)
    cursor2, events2 = registry.changes_since(cursor)
    assert [(e.kind, e.version) for e in events2] == [("publish", 2), ("promote", 2)]
    assert cursor2 == events2[-1].id > cursor
    assert events2[-1].details["to"] == "live"
    _, limited = registry.changes_since(0, limit=1)
    assert len(limited) == 1
    with pytest.raises(InputError):
        registry.changes_since(-1)


def test_a_second_handle_sees_the_same_registry(spec: RegistrySpec, tiny_bundles: dict[str, Path]) -> None:
    with spec.open() as one, spec.open() as two:
        one.publish(tiny_bundles["a"], "m")
        one.promote("m", 1, "live", reason="go")
        assert two.live("m") == one.live("m")
        assert two.history("m") == one.history("m")


def test_a_blob_folder_holding_none_of_the_registrys_blobs_takes_nothing(
    spec: RegistrySpec, tmp_path: Path, tiny_bundles: dict[str, Path], tiny_data: Path
) -> None:
    """A mistyped --blobs (or a shared volume not mounted) must not get a version whose files no other
    verb or replica will find in the registry's own blob folder."""
    with spec.open() as reg:
        reg.publish(tiny_bundles["a"], "m")
        before = reg.cursor()
    elsewhere = tmp_path / "mistyped-blobs"
    with open_registry(spec.location, blobs=elsewhere) as wrong:
        with pytest.raises(InputError, match="holds none of the .* blobs this registry refers to"):
            wrong.publish(tiny_bundles["b"], "m")
        with pytest.raises(InputError, match="not the registry's blob folder"):
            wrong.add_evalset("m", tiny_data / "valid.jsonl")
        assert not elsewhere.exists()
        assert [v.version for v in wrong.versions("m")] == [1] and wrong.cursor() == before
    with spec.open() as reg:
        assert reg.publish(tiny_bundles["b"], "m").version == 2  # the registry's own folder still takes it


def test_another_registrys_blob_folder_is_neither_written_nor_collected(
    spec: RegistrySpec, tmp_path: Path, tiny_bundles: dict[str, Path]
) -> None:
    """Found by probing: gc on one registry with TEXTSIEVE_BLOBS naming another's folder deleted
    every blob the other referenced (9 of 16, then 'blob … is missing' on promote). A folder now
    names the registry it belongs to, and the others leave it alone."""
    with spec.open() as reg:
        reg.publish(tiny_bundles["a"], "m")
        theirs = {p.name: p.stat().st_mtime for p in spec.blob_dir.iterdir()}
        owner = reg.registry_id
    assert (spec.blob_dir / OWNER_FILE).read_text(encoding="ascii").strip() == owner
    other_location = tmp_path / "other-registry"
    with open_registry(other_location, blobs=spec.blob_dir) as other:
        assert other.registry_id != owner
        with pytest.raises(InputError, match=f"is another registry's blob folder \\(its {OWNER_FILE} names {owner}"):
            other.collect_garbage(older_than=0)
        with pytest.raises(InputError, match="is another registry's blob folder"):
            other.publish(tiny_bundles["b"], "m")
    assert {p.name: p.stat().st_mtime for p in spec.blob_dir.iterdir()} == theirs  # nothing deleted or added
    with spec.open() as reg:
        assert reg.collect_garbage(older_than=0).removed == [] and reg.fetch("m", 1)

    # A folder from before the marks, holding blobs this registry does not refer to, is not taken.
    (spec.blob_dir / OWNER_FILE).unlink()
    with open_registry(tmp_path / "third-registry", blobs=spec.blob_dir) as third:
        with pytest.raises(InputError, match="none this registry refers to, and names no registry"):
            third.collect_garbage(older_than=0)
    with spec.open() as reg:  # its own registry takes it back on the next gc
        assert reg.collect_garbage(older_than=0).removed == []
    assert (spec.blob_dir / OWNER_FILE).read_text(encoding="ascii").strip() == owner


# -- opening ------------------------------------------------------------------------------
def test_open_registry_refuses_what_is_not_a_registry(tmp_path: Path) -> None:
    (tmp_path / "file").write_text("x")
    with pytest.raises(InputError, match="is a file"):
        open_registry(tmp_path / "file")
    (tmp_path / "busy").mkdir()
    (tmp_path / "busy" / "notes.txt").write_text("x")
    with pytest.raises(InputError, match="not empty"):
        open_registry(tmp_path / "busy")
    with pytest.raises(NotFoundError, match="no registry at"):
        open_registry(tmp_path / "absent", create=False)
    assert not (tmp_path / "absent").exists()
    with pytest.raises(InputError, match="unsupported registry URL"):
        open_registry("mysql://x/y")
    with pytest.raises(InputError, match="needs a blob folder"):
        open_registry("postgresql://u:p@127.0.0.1:1/db")
    with open_registry(tmp_path / "new" / "reg") as reg:
        assert reg.models() == []
    with open_registry(tmp_path / "new" / "reg", create=False) as reg:
        assert reg.models() == []


def test_registry_never_imports_torch(tmp_path: Path, tiny_bundles: dict[str, Path], tiny_data: Path) -> None:
    """A serving install has no torch: publishing, gating and fetching must not need it."""
    code = f"""
import sys, pkgutil, importlib
import textsieve.registry as r

for m in pkgutil.iter_modules(r.__path__):
    importlib.import_module("textsieve.registry." + m.name)
reg = r.open_registry({str(tmp_path / "reg")!r})
reg.publish({str(tiny_bundles["a"])!r}, "m", evalset={str(tiny_data / "test.jsonl")!r})
reg.promote("m", 1, "live", reason="go")
reg.fetch("m")
assert "torch" not in sys.modules, "torch was imported"
print("ok")
"""
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, timeout=120)
    assert out.returncode == 0, out.stderr
    assert out.stdout.strip() == "ok"


def test_public_names() -> None:
    """``__all__`` names exactly the package's public objects (HTTPX keeps the same test)."""
    import inspect

    import textsieve.registry as r

    assert sorted(set(r.__all__)) == sorted(r.__all__)
    for name in r.__all__:
        assert hasattr(r, name), name
        assert not name.startswith("_"), f"{name} is private"
        obj = getattr(r, name)
        assert not inspect.ismodule(obj), f"{name} is a module, import it by its path instead"
        home = getattr(obj, "__module__", None) or r.__name__
        assert home.startswith("textsieve.registry") and "._" not in home, f"{name} comes from {home}"
    # Every public object the package namespace holds is listed (submodules are reached by path).
    public = {n for n, v in vars(r).items() if not n.startswith("_") and not inspect.ismodule(v)}
    assert public == set(r.__all__)
    assert r.open_registry is open_registry and r.Registry is Registry
