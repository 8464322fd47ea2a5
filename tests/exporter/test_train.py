"""`textsieve train` end to end on tiny invented data: the run folder contract, reproducibility,
static vectors, length statistics and a one-line exit-2 error for each bad input."""

from __future__ import annotations

import io
import json
import os
import re
import shutil
import sys
from collections.abc import Callable
from pathlib import Path
from typing import Any

import numpy as np
import pytest
import torch

from tests.helpers.jsonl import write_jsonl
from tests.helpers.training import MODEL_FLAGS, TINY_FLAGS
from textsieve.cli import build_parser, main
from textsieve.errors import InputError
from textsieve.exporter.encode import encode_texts
from textsieve.exporter.fit import evaluate
from textsieve.exporter.run_folder import (
    EMBEDDINGS_NPZ,
    MODEL_PT,
    RUN_JSON,
    VALID_JSONL,
    VOCAB_TXT,
    RunInfo,
    load_run,
    read_run_info,
)
from textsieve.exporter.train import TrainConfig, train
from textsieve.files import sha256_file
from textsieve.registry.manifest import LengthInfo, TrainingInfo, VectorsInfo
from textsieve.registry.report.embedding_files import read_run_embeddings
from textsieve.registry.tokenizer import TokenizerSpec, Vocabulary


def test_cli_defaults_are_train_config_defaults() -> None:
    args = build_parser().parse_args(["train", "d.jsonl", "--out", "o"])
    assert TrainConfig.from_args(args) == TrainConfig(data=Path("d.jsonl"), out=Path("o"))


def test_kim_defaults() -> None:
    # Kim (2014), section 3.1: windows 3, 4, 5; 100 maps; dropout 0.5; l2 constraint 3; batch 50.
    c = TrainConfig(data=Path("d"), out=Path("o"))
    assert (c.widths, c.maps, c.dropout, c.max_norm, c.batch_size) == ((3, 4, 5), 100, 0.5, 3.0, 50)


def test_run_folder_follows_the_contract(keyword_run: Path, keyword_data: Path) -> None:
    assert sorted(p.name for p in keyword_run.iterdir()) == sorted(
        [MODEL_PT, VOCAB_TXT, VALID_JSONL, RUN_JSON, EMBEDDINGS_NPZ]
    )
    assert [p.name for p in keyword_run.parent.iterdir()] == ["run"], "no temp folders left behind"
    text = (keyword_run / RUN_JSON).read_text(encoding="utf-8")
    on_disk = json.loads(text)
    assert set(on_disk) == {
        "labels",
        "tokenizer",
        "vocabulary",
        "lengths",
        "architecture",
        "training",
        "tool_version",
        "files",
    }
    assert on_disk["files"] == {name: sha256_file(keyword_run / name) for name in (MODEL_PT, VOCAB_TXT, VALID_JSONL)}
    assert set(on_disk["vocabulary"]) == {"size", "min_count", "max_size"}
    epoch_keys = {"epoch", "train_loss", "valid_loss", "valid_accuracy"}
    assert on_disk["training"]["history"] and all(set(h) == epoch_keys for h in on_disk["training"]["history"])
    run = read_run_info(keyword_run)
    # The typed model is the file: reading and writing it back gives the same bytes.
    assert json.dumps(run.model_dump(), indent=2, ensure_ascii=False) + "\n" == text
    assert run.labels == ["billing", "repair"]
    assert run.tokenizer == TokenizerSpec()
    assert LengthInfo.model_validate(on_disk["lengths"]) == run.lengths
    arch = run.architecture
    assert (arch.embedding_dim, arch.widths, arch.maps, arch.vectors) == (16, [3, 4, 5], 6, None)
    training = TrainingInfo.model_validate(run.training.model_dump(exclude={"history"}))
    assert training == run.training.record()
    # Without --valid, a seeded 10 % split stratified by label: 12 of each label's 120 rows.
    assert (training.rows, training.valid_rows) == (216, 24)
    valid = [json.loads(line) for line in (keyword_run / VALID_JSONL).read_text(encoding="utf-8").splitlines()]
    assert len(valid) == 24 and sorted(r["label"] for r in valid) == ["billing"] * 12 + ["repair"] * 12
    train_texts = [json.loads(line)["text"] for line in keyword_data.read_text(encoding="utf-8").splitlines()]
    assert all(r["text"] in train_texts for r in valid)
    vocab = Vocabulary.load(keyword_run / VOCAB_TXT)
    assert len(vocab) == run.vocabulary.size and {"charged", "brake", "monday"} <= set(vocab.tokens)
    history = run.training.history
    assert [h.epoch for h in history] == list(range(1, training.epochs + 1))
    assert 1 <= training.best_epoch <= training.epochs


def test_run_records_its_embedding_matrix_for_the_report(keyword_run: Path) -> None:
    """embeddings.npz holds model.pt's embedding matrix (read back with plain NumPy, no torch) and,
    without --vectors, no starting vectors."""
    with np.load(keyword_run / EMBEDDINGS_NPZ, allow_pickle=False) as npz:
        assert sorted(npz.files) == ["start", "start_ids", "trained", "vectors_mode"]
        trained = npz["trained"]
        assert npz["start_ids"].shape == (0,) and npz["start"].shape == (0, 16) and str(npz["vectors_mode"]) == ""
    state = torch.load(keyword_run / MODEL_PT, weights_only=True)
    np.testing.assert_array_equal(trained, state["embedding.weight"].numpy())
    assert trained.dtype == np.float32


def test_run_json_tolerates_unknown_top_level_keys(keyword_run: Path, tmp_path: Path) -> None:
    # Reading never refused extra top-level keys; the typed model keeps it that way.
    run = tmp_path / "r"
    shutil.copytree(keyword_run, run)
    content = json.loads((run / RUN_JSON).read_text(encoding="utf-8"))
    content["note"] = "added by hand"
    (run / RUN_JSON).write_text(json.dumps(content), encoding="utf-8")
    assert read_run_info(run) == RunInfo.model_validate(
        json.loads((keyword_run / RUN_JSON).read_text(encoding="utf-8"))
    )


def test_export_refuses_a_run_whose_label_a_name_could_not_hold_in_one_line(
    keyword_run: Path, tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    """A run trained before labels were held to names' rule (textsieve/printable.py) exported a
    U+202E label into a bundle (name of the character from the Unicode Character Database)."""
    run = tmp_path / "r"
    shutil.copytree(keyword_run, run)
    content = json.loads((run / RUN_JSON).read_text(encoding="utf-8"))
    content["labels"][0] += "\u202e"
    (run / RUN_JSON).write_text(json.dumps(content), encoding="utf-8")
    assert main(["export", str(run), "--out", str(tmp_path / "bundle")]) == 2
    err = capsys.readouterr().err
    assert len(err.splitlines()) == 1, err
    assert f"the label {content['labels'][0]!r} holds U+202E RIGHT-TO-LEFT OVERRIDE (category Cf" in err
    assert "labels are one line of visible text" in err and "train again with the label renamed" in err
    assert not (tmp_path / "bundle").exists()


def test_the_run_learns_and_keeps_the_best_epoch(keyword_run: Path) -> None:
    model, vocab, run = load_run(keyword_run)
    valid = [json.loads(line) for line in (keyword_run / VALID_JSONL).read_text(encoding="utf-8").splitlines()]
    encoded = encode_texts([r["text"] for r in valid], vocab, run.lengths.max_length)
    targets = np.array([run.labels.index(r["label"]) for r in valid])
    loss, accuracy = evaluate(model, encoded, targets, run.lengths.min_length)
    best = run.training.history[run.training.best_epoch - 1]
    assert best == run.best
    # The saved weights are the best epoch's: they reproduce its recorded validation loss.
    assert loss == pytest.approx(best.valid_loss, abs=1e-5)
    assert accuracy == best.valid_accuracy
    assert accuracy >= 0.9  # one keyword decides the label
    # Kim (2014), section 2.1: output weight rows kept within the l2 limit s = 3.
    assert torch.all(model.output.weight.norm(dim=1) <= 3.0 + 1e-5)


def test_summary_is_printed(keyword_data: Path, tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    assert main(["train", str(keyword_data), "--out", str(tmp_path / "r"), *TINY_FLAGS]) == 0
    captured = capsys.readouterr()
    for fragment in ("run folder", "vocabulary", "max_length", "99th percentile", "best epoch", "validation"):
        assert fragment in captured.out
    assert captured.err.count("epoch ") >= 1  # one summary line per epoch on stderr
    assert not torch.are_deterministic_algorithms_enabled(), "global torch flags are restored"


def test_same_seed_gives_identical_weights(keyword_data: Path, tmp_path: Path) -> None:
    runs = []
    for name, seed in (("a", "3"), ("b", "3"), ("c", "4")):
        assert main(["train", str(keyword_data), "--out", str(tmp_path / name), "--seed", seed, *TINY_FLAGS]) == 0
        runs.append((tmp_path / name / MODEL_PT).read_bytes())
    assert runs[0] == runs[1], "same seed, same machine: bit-identical model.pt"
    assert runs[0] != runs[2], "another seed gives other weights"
    a = torch.load(tmp_path / "a" / MODEL_PT, weights_only=True)
    b = torch.load(tmp_path / "b" / MODEL_PT, weights_only=True)
    assert a.keys() == b.keys() and all(torch.equal(a[k], b[k]) for k in a)


def _vectors_file(path: Path, dim: int) -> tuple[Path, dict[str, np.ndarray]]:
    rng = np.random.default_rng(0)
    words = ["charged", "refund", "broken", "brake", "bike", "notintext"]
    vectors = {w: rng.normal(size=dim).astype(np.float32) for w in words}
    path.write_text(
        "".join(w + " " + " ".join(repr(float(x)) for x in v) + "\n" for w, v in vectors.items()), encoding="utf-8"
    )
    return path, vectors


@pytest.mark.parametrize("mode", ["static", "non-static"])
def test_pretrained_vectors(mode: str, keyword_data: Path, tmp_path: Path) -> None:
    vectors_path, vectors = _vectors_file(tmp_path / "vec.txt", dim=6)
    out = tmp_path / "run"
    assert (
        main(
            [
                "train",
                str(keyword_data),
                "--out",
                str(out),
                "--vectors",
                str(vectors_path),
                "--vectors-mode",
                mode,
                *MODEL_FLAGS,
                "--epochs",
                "4",
            ]
        )
        == 0
    )
    model, vocab, run = load_run(out)
    arch = run.architecture
    assert arch.embedding_dim == 6, "the vectors' dimension wins over the default"
    assert arch.vectors == VectorsInfo(file_sha256=sha256_file(vectors_path), dim=6, found=5, mode=mode)
    weight = model.embedding.weight.detach()
    assert torch.all(weight[Vocabulary.pad_id] == 0)
    same = [
        torch.equal(weight[vocab.index[w]], torch.from_numpy(vectors[w]))
        for w in ("charged", "refund", "broken", "brake", "bike")
    ]
    if mode == "static":
        assert all(same), "static mode never changes the pretrained rows"
    else:
        assert not any(same), "non-static mode fine-tunes them"
    # The run records the starting rows (as the vectors file has them) and the trained matrix for the report.
    record = read_run_embeddings(out)
    assert record.vectors_mode == mode
    assert sorted(record.vocabulary.tokens[i] for i in record.start_ids) == [
        "bike",
        "brake",
        "broken",
        "charged",
        "refund",
    ]
    for i, row in zip(record.start_ids.tolist(), record.start, strict=True):
        np.testing.assert_array_equal(row, vectors[record.vocabulary.tokens[i]])
    np.testing.assert_array_equal(record.trained, weight.numpy())


def test_length_statistics_by_hand(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    # Texts of 1..100 tokens. numpy's default percentile (Hyndman & Fan, 1996, definition 7)
    # of 1..100 at 90 % is 1 + 0.9 * 99 = 90.1, so max_length = ceil(90.1) = 91 and the 9 texts
    # of 92..100 tokens (9 %) are truncated.
    rows = [{"text": " ".join(["w"] * n), "label": "ab"[n % 2]} for n in range(1, 101)]
    data = write_jsonl(tmp_path / "d.jsonl", rows)
    valid = write_jsonl(tmp_path / "v.jsonl", rows[:4])
    out = tmp_path / "run"
    assert (
        main(
            [
                "train",
                str(data),
                "--valid",
                str(valid),
                "--out",
                str(out),
                "--length-percentile",
                "90",
                *TINY_FLAGS,
                "--epochs",
                "1",
            ]
        )
        == 0
    )
    lengths = read_run_info(out).lengths
    assert lengths == LengthInfo(max_length=91, min_length=5, percentile=90.0, truncation_rate=0.09)
    said = capsys.readouterr().out
    assert "max_length   91 tokens (the 90th percentile of training lengths); truncates 9.0% of" in said

    # A low percentile cannot go below the widest filter.
    out2 = tmp_path / "run2"
    assert (
        main(
            [
                "train",
                str(data),
                "--valid",
                str(valid),
                "--out",
                str(out2),
                "--length-percentile",
                "1",
                "--widths",
                "2,7",
                *TINY_FLAGS,
                "--epochs",
                "1",
            ]
        )
        == 0
    )
    lengths = read_run_info(out2).lengths
    assert (lengths.max_length, lengths.min_length) == (7, 7)
    assert lengths.truncation_rate == pytest.approx(93 / 100)
    # The 1st percentile (1.99 tokens) is not what max_length is, and the summary does not say it is.
    said = capsys.readouterr().out
    assert "max_length   7 tokens (the widest filter, as the 1st percentile of training lengths is no longer)" in said


def test_a_previous_run_is_replaced(keyword_data: Path, tmp_path: Path) -> None:
    out = tmp_path / "run"
    assert main(["train", str(keyword_data), "--out", str(out), "--seed", "1", *TINY_FLAGS]) == 0
    first = (out / MODEL_PT).read_bytes()
    assert main(["train", str(keyword_data), "--out", str(out), "--seed", "2", *TINY_FLAGS]) == 0
    assert (out / MODEL_PT).read_bytes() != first
    assert sorted(p.name for p in tmp_path.iterdir()) == ["run"]


def test_early_stopping_stops_after_patience(keyword_data: Path, tmp_path: Path) -> None:
    out = tmp_path / "run"
    assert main(["train", str(keyword_data), "--out", str(out), *TINY_FLAGS, "--epochs", "12", "--patience", "1"]) == 0
    training = read_run_info(out).training
    epochs, best = training.epochs, training.best_epoch
    assert epochs == 12 or epochs == best + 1
    losses = [h.valid_loss for h in training.history]
    assert losses[best - 1] == min(losses[:best])


# --- bad input: exit status 2 and one line on stderr --------------------------------------------


def _bad_files(folder: Path) -> None:
    """The files the bad-input rows name, in this test's folder."""
    (folder / "empty.jsonl").write_text("", encoding="utf-8")
    write_jsonl(folder / "nofield.jsonl", [{"body": "a", "label": "x"}])
    write_jsonl(folder / "onelabel.jsonl", [{"text": f"t {i}", "label": "x"} for i in range(30)])
    (folder / "latin1.jsonl").write_bytes('{"text": "café", "label": "x"}\n'.encode("latin-1"))
    write_jsonl(folder / "emptytext.jsonl", [{"text": "a", "label": "x"}, {"text": " ", "label": "y"}])
    write_jsonl(folder / "unseen.jsonl", [{"text": "a", "label": "billing"}, {"text": "b", "label": "shipping"}])
    write_jsonl(folder / "few.jsonl", [{"text": "a", "label": "x"}, {"text": "b", "label": "y"}])
    write_jsonl(folder / "once.jsonl", [{"text": f"the shed {i}", "label": f"shelf {i}"} for i in range(40)])
    forms = ["caf\u00e9", "cafe\u0301", "repair"]  # one label in two Unicode forms (UAX #15 canonical equivalence)
    write_jsonl(folder / "forms.jsonl", [{"text": f"the counter {i}", "label": forms[i % 3]} for i in range(30)])
    os.mkfifo(folder / "pipe")
    write_jsonl(folder / "samefive.jsonl", [{"text": "the same line", "label": "ab"[i % 2]} for i in range(40)])
    write_jsonl(folder / "fours.jsonl", [{"text": f"the pantry {i}", "label": "ab"[i % 2]} for i in range(8)])
    # Finite float32 values near its largest (3.4e38): the first sums overflow to inf, and inf - inf is nan.
    (folder / "huge16.txt").write_text(
        "".join(f"{w} {' '.join(['3e38'] * 16)}\n" for w in ("charged", "refund", "broken", "brake", "bike", "the")),
        encoding="utf-8",
    )
    _vectors_file(folder / "vec6.txt", dim=6)
    (folder / "afile").write_text("not a run", encoding="utf-8")
    (folder / "notrun").mkdir()
    (folder / "notrun" / "keep.txt").write_text("precious", encoding="utf-8")


OUT = ["--out", "{tmp}/out"]


# the words after "train" ({data}: a good data file, {tmp}: this test's folder) -> words of the one-line error
@pytest.mark.parametrize(
    ("argv", "expected_msg"),
    [
        pytest.param(["{tmp}/nope.jsonl", *OUT], "no such file", id="missing data file"),
        pytest.param(["{tmp}/empty.jsonl", *OUT], "the file is empty", id="empty data file"),
        pytest.param(
            ["{tmp}/nofield.jsonl", *OUT], "no 'text' field (fields found: 'body', 'label')", id="no text field"
        ),
        pytest.param(["{tmp}/onelabel.jsonl", *OUT], "1 distinct label ('x')", id="one label"),
        pytest.param(["{tmp}/latin1.jsonl", *OUT], "line 1: byte offset 13 is not valid UTF-8", id="not UTF-8"),
        pytest.param(
            ["{tmp}/forms.jsonl", *OUT],
            "has labels that are the same text in different Unicode forms: 'cafe\u0301' (cafe<U+0301>, 10 rows)",
            id="one label in two Unicode forms",
        ),
        pytest.param(
            ["{data}", *OUT, "--text-field", "label"],
            "--text-field and --label-field both name 'label'; the model would read the label it is to predict",
            id="text field is the label field",
        ),
        pytest.param(["{tmp}/emptytext.jsonl", *OUT], "line 2: the 'text' field is empty", id="empty text"),
        pytest.param(["{data}", "--valid", "{tmp}/unseen.jsonl", *OUT], "labels not in", id="unseen valid label"),
        pytest.param(
            ["{tmp}/few.jsonl", *OUT],
            "every label has too few rows to hold out a 10% validation split (2 labels, at most 1 row each); "
            "a label needs at least 5 rows",
            id="too few to hold out",
        ),
        # VALID_SHARE 10 % of a label's rows, rounded half up: 0.4 of 4 rows rounds to none, 0.5 of 5 to one.
        pytest.param(
            ["{tmp}/once.jsonl", *OUT], "(40 labels, at most 1 row each); a label needs at least 5", id="labels once"
        ),
        pytest.param(
            ["{tmp}/samefive.jsonl", *OUT],
            "every label has too few distinct texts to hold out a 10% validation split (2 labels, at most 20 rows "
            "but 1 distinct text each; copies of a text stay on one side of the split)",
            id="one text many times",
        ),
        pytest.param(
            ["{tmp}/fours.jsonl", *OUT],
            "(2 labels, at most 4 rows each); a label needs at least 5",
            id="labels 4 times",
        ),
        pytest.param(
            ["{data}", *OUT, "--vectors", "{tmp}/vec6.txt", "--embedding-dim", "16"],
            "vectors file has dimension 6 but --embedding-dim is 16",
            id="vectors dimension",
        ),
        pytest.param(["{data}", *OUT, "--vectors", "{tmp}/none.txt"], "no such file", id="vectors missing"),
        pytest.param(["{data}", "--out", "{tmp}/afile"], "is an existing file", id="out is a file"),
        # A FIFO (as a device or a socket) was told it "is an existing file".
        pytest.param(
            ["{data}", "--out", "{tmp}/pipe"],
            "/pipe: is a FIFO (named pipe), which textsieve does not write over; name a new or empty folder",
            id="out is a fifo",
        ),
        pytest.param(
            ["{data}", "--out", "{tmp}/afile/sub"],
            "/afile is an existing file, so no folder can be made inside it",
            id="out inside a file",
        ),
        # /sys takes no new folder even from root (a read-only place that file modes cannot make here).
        pytest.param(
            ["{data}", "--out", "/sys/textsieve-test/run"],
            "--out /sys/textsieve-test/run: cannot make a folder in /sys (Operation not permitted)",
            id="out where nothing can be written",
        ),
        pytest.param(
            ["{data}", *OUT, "--vectors", "{tmp}/huge16.txt"],
            "training stopped: the training loss became nan at epoch 1",
            id="loss not finite",
        ),
        pytest.param(
            ["{data}", *OUT, "--learning-rate", "1e30"],
            "--learning-rate 1e+30 is out of range; it must be above 0 and at most 1",
            id="learning rate 1e30",
        ),
        pytest.param(
            ["{data}", *OUT, "--learning-rate", "1e308"],
            "--learning-rate 1e+308 is out of range",
            id="learning rate 1e308",
        ),
        pytest.param(
            ["{data}", *OUT, "--learning-rate", "0"], "--learning-rate 0.0 is out of range", id="learning rate 0"
        ),
        pytest.param(
            ["{data}", "--out", "{tmp}/notrun"], "is a folder that is not a previous run", id="out is another folder"
        ),
        pytest.param(["{data}", *OUT, "--widths", "0,3"], "--widths 0,3: each filter width must be", id="width zero"),
        pytest.param(
            ["{data}", *OUT, "--widths", "3,x"],
            "--widths '3,x': give filter widths as whole numbers",
            id="width a letter",
        ),
        pytest.param(["{data}", *OUT, "--widths", "3,3"], "each filter width must be a different", id="width twice"),
        pytest.param(
            ["{data}", *OUT, "--maps", "0"], "--maps 0 is out of range; it must be from 1 to 1000", id="maps 0"
        ),
        pytest.param(["{data}", *OUT, "--dropout", "1"], "--dropout 1.0 is out of range", id="dropout 1"),
        pytest.param(["{data}", *OUT, "--dropout", "-0.1"], "--dropout -0.1 is out of range", id="negative dropout"),
        pytest.param(["{data}", *OUT, "--batch-size", "0"], "--batch-size 0 is out of range", id="batch size 0"),
        pytest.param(
            ["{data}", *OUT, "--length-percentile", "0"],
            "--length-percentile 0.0 is out of range",
            id="length percentile 0",
        ),
        pytest.param(["{data}", *OUT, "--max-norm", "-1"], "--max-norm -1.0 is out of range", id="negative max norm"),
        pytest.param(
            ["{data}", *OUT, "--vectors-mode", "static"],
            "--vectors-mode static needs --vectors",
            id="static mode without vectors",
        ),
    ],
)
def test_bad_input_exits_2_with_one_line(
    argv: list[str], expected_msg: str, keyword_data: Path, tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    _bad_files(tmp_path)
    args = [a.format(tmp=tmp_path, data=keyword_data) for a in argv]
    assert main(["train", *TINY_FLAGS, *args]) == 2  # args last: its flags win
    err = capsys.readouterr().err
    assert err.count("\n") == 1 and err.startswith("textsieve: error: "), err
    assert expected_msg in err
    assert not (tmp_path / "out").exists(), "nothing written on bad input"
    assert not [p for p in tmp_path.iterdir() if ".tmp-" in p.name]
    assert (tmp_path / "notrun" / "keep.txt").read_text(encoding="utf-8") == "precious"


# --- reading a run back ---------------------------------------------------------------------------


def _edit_run_json(run: Path, change: Callable[[dict[str, Any]], object]) -> None:
    content = json.loads((run / RUN_JSON).read_text(encoding="utf-8"))
    change(content)
    (run / RUN_JSON).write_text(json.dumps(content), encoding="utf-8")


def _older_run(damage: Callable[[Path], object]) -> Callable[[Path], None]:
    """``damage`` to a run folder written before run.json recorded its files' sha256: the checks behind
    that one still name what is wrong."""

    def apply(run: Path) -> None:
        _edit_run_json(run, lambda c: c.pop("files"))
        damage(run)

    return apply


def _swap_vocabulary_lines(run: Path) -> None:
    lines = (run / VOCAB_TXT).read_text(encoding="utf-8").split("\n")
    lines[2], lines[3] = lines[3], lines[2]
    (run / VOCAB_TXT).write_text("\n".join(lines), encoding="utf-8")


def _cut_valid(run: Path) -> None:
    lines = (run / VALID_JSONL).read_text(encoding="utf-8").splitlines(keepends=True)
    (run / VALID_JSONL).write_text("".join(lines[:5]), encoding="utf-8")


def _nan_weights(run: Path, name: str) -> None:
    state = torch.load(run / MODEL_PT, weights_only=True)
    state[name].view(-1)[0] = float("nan")
    torch.save(state, run / MODEL_PT)


# how to break a copy of a good run (in a folder named "copied") -> the message, which names the file
@pytest.mark.parametrize(
    ("damage", "expected_msg"),
    [
        pytest.param(shutil.rmtree, "no such run folder", id="no folder"),
        pytest.param(lambda run: (run / RUN_JSON).unlink(), r"copied/run\.json: missing", id="no run.json"),
        pytest.param(
            lambda run: _edit_run_json(run, lambda c: c.pop("lengths")),
            r"copied/run\.json: missing key\(s\) lengths",
            id="run.json without lengths",
        ),
        pytest.param(
            lambda run: _edit_run_json(run, lambda c: c["architecture"].update(widths=[0])),
            r"copied/run\.json: architecture\.widths",
            id="run.json with a bad width",
        ),
        pytest.param(
            _older_run(lambda run: (run / MODEL_PT).write_bytes(b"not a zip")),
            r"copied/model\.pt: not a readable weights file",
            id="weights not a zip",
        ),
        pytest.param(
            lambda run: _edit_run_json(run, lambda c: c["architecture"].update(maps=7)),
            r"copied/model\.pt: does not match run\.json",
            id="weights of another shape",
        ),
        pytest.param(
            _older_run(lambda run: _nan_weights(run, "output.bias")),
            r"copied/model\.pt: the weights are not finite \(nan or inf in output\.bias\)",
            id="weights not finite",
        ),
        pytest.param(
            _older_run(lambda run: (run / VOCAB_TXT).write_text("<pad>\n<unk>\nonly\n", encoding="utf-8")),
            r"copied/vocab\.txt: has 3 tokens but run\.json says",
            id="vocabulary of another size",
        ),
        # Edits the checks above cannot see: same sizes, same shapes, finite weights.
        pytest.param(
            _swap_vocabulary_lines,
            r"copied/vocab\.txt: changed since training \(sha256 [0-9a-f]{12}…, run\.json records [0-9a-f]{12}…\)",
            id="vocabulary lines swapped",
        ),
        pytest.param(_cut_valid, r"copied/valid\.jsonl: changed since training", id="validation rows cut short"),
        pytest.param(
            lambda run: _nan_weights(run, "output.bias"),
            r"copied/model\.pt: changed since training",
            id="weights edited",
        ),
        pytest.param(
            lambda run: (run / VALID_JSONL).unlink(), r"copied/valid\.jsonl: missing", id="validation rows missing"
        ),
    ],
)
def test_load_run_errors_name_the_file(
    damage: Callable[[Path], object], expected_msg: str, keyword_run: Path, tmp_path: Path
) -> None:
    run = tmp_path / "copied"
    shutil.copytree(keyword_run, run)
    damage(run)
    with pytest.raises(InputError, match=expected_msg):
        load_run(run)


def _model_inputs(rows: list[dict[str, str]]) -> set[tuple[str, ...]]:
    from textsieve.registry.tokenizer import Tokenizer

    return {tuple(Tokenizer().split(r["text"])[0]) for r in rows}


def test_copies_of_a_text_stay_on_one_side_of_the_held_out_split(
    keyword_data: Path, tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    # 30 texts, each 8 times (half of the copies re-cased and re-spaced: the same tokens): a row-wise split
    # held out copies of training rows, so validation loss, early stopping and the export's calibration
    # measured memory (data leakage; common practice to split such data by group).
    base = [json.loads(line) for line in keyword_data.read_text(encoding="utf-8").splitlines()[:30]]
    rows = [dict(r, text=r["text"].upper().replace(" ", "  ") if k % 2 else r["text"]) for k in range(8) for r in base]
    data = write_jsonl(tmp_path / "copies.jsonl", rows)
    out = tmp_path / "run"
    assert main(["train", str(data), "--out", str(out), *TINY_FLAGS, "--epochs", "1"]) == 0
    assert "note: 210 rows repeat the tokens of an earlier row" in capsys.readouterr().err
    valid = [json.loads(line) for line in (out / VALID_JSONL).read_text(encoding="utf-8").splitlines()]
    held = _model_inputs(valid)
    assert valid and len(held) < len(valid), "copies held out together"
    copies_of_held = [r for r in rows if _model_inputs([r]) <= held]
    assert len(copies_of_held) == len(valid), "every copy of a held-out text is in validation, none in training"
    info = read_run_info(out)
    assert info.training.rows + info.training.valid_rows == len(rows)
    assert sorted({r["label"] for r in valid}) == info.labels, "still stratified: each label in validation"


def test_a_split_without_copies_is_the_plain_stratified_one(keyword_data: Path, keyword_run: Path) -> None:
    # Each held-out label keeps its rounded 10 % (VALID_SHARE) when every text is distinct.
    rows = [json.loads(line) for line in keyword_data.read_text(encoding="utf-8").splitlines()]
    assert len(_model_inputs(rows)) == len(rows)
    valid = [json.loads(line) for line in (keyword_run / VALID_JSONL).read_text(encoding="utf-8").splitlines()]
    assert sorted(r["label"] for r in valid) == ["billing"] * 12 + ["repair"] * 12


def test_validation_rows_that_are_training_rows_are_named(
    keyword_data: Path, tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    rows = [json.loads(line) for line in keyword_data.read_text(encoding="utf-8").splitlines()]
    valid = write_jsonl(tmp_path / "valid.jsonl", rows[:5] + [{"text": "a brand new line", "label": "billing"}])
    out = tmp_path / "run"
    assert main(["train", str(keyword_data), "--valid", str(valid), "--out", str(out), *TINY_FLAGS]) == 0
    assert f"warning: 5 of 6 rows of {valid} (83.3%) have the tokens of a training row" in capsys.readouterr().err


def test_labels_differing_only_in_case_train_with_a_warning(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    labels = ["Billing", "billing", "repair"]
    rows = [{"text": f"the dock {i} word{i % 7}", "label": labels[i % 3]} for i in range(60)]
    data = write_jsonl(tmp_path / "case.jsonl", rows)
    assert main(["train", str(data), "--out", str(tmp_path / "run"), *TINY_FLAGS, "--epochs", "1"]) == 0
    err = capsys.readouterr().err
    assert "warning: the labels 'Billing' and 'billing' differ only in case" in err
    assert read_run_info(tmp_path / "run").labels == ["Billing", "billing", "repair"], "labels stay as written"


def test_train_function_returns_the_folder(keyword_data: Path, tmp_path: Path) -> None:
    config = TrainConfig(data=keyword_data, out=tmp_path / "r", embedding_dim=8, maps=4, epochs=1, quiet=True)
    assert train(config) == tmp_path / "r"
    model, vocab, run = load_run(tmp_path / "r")
    assert model.training is False and len(vocab) == run.vocabulary.size


class _Terminal(io.StringIO):
    def isatty(self) -> bool:
        return True


@pytest.mark.parametrize("terminal", [True, False], ids=["terminal", "pipe"])
def test_reading_and_tokenizing_show_a_bar_on_a_terminal_and_one_line_after(
    terminal: bool, keyword_data: Path, tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    """A 20 MB file took 2.7 s to read and tokenize with nothing on screen, 200 MB would be ~30 s
    (found by probing): a bar each on a terminal, as an epoch has, then a line saying how long each
    took; a pipe gets neither, so a refusal of the data stays the only line (test_bad_input_exits_2_with_one_line)."""
    from textsieve.exporter.prepare import prepare

    stream = _Terminal() if terminal else io.StringIO()
    monkeypatch.setattr(sys, "stderr", stream)
    prepare(TrainConfig(data=keyword_data, out=tmp_path / "r"))
    err = stream.getvalue()
    size_k = f"{keyword_data.stat().st_size / 1000:.1f}k"
    assert (f"reading train.jsonl:   0%|          | 0.00/{size_k} [" in err) is terminal, err
    assert ("tokenizing:   0%|          | 0/240 [" in err) is terminal, err
    summary = re.search(
        r"(?:^|\r)data: 240 rows read in \d+\.\ds, tokenized in \d+\.\ds, validation split off in \d+\.\ds$", err, re.M
    )
    assert bool(summary) is terminal, err
    assert terminal or err == ""


@pytest.mark.parametrize("terminal", [True, False], ids=["terminal", "pipe"])
@pytest.mark.parametrize("valid", [False, True], ids=["split", "--valid"])
def test_splitting_and_encoding_show_bars_on_a_terminal_and_one_line_after(
    terminal: bool, valid: bool, keyword_data: Path, tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    """After the tokenizing, splitting off validation, building the vocabulary and encoding showed
    nothing: 40 % of preparing a 53 MB file (about 6 s, found by probing). On a terminal the split
    has a bar for each of its two passes and the encoding one, then a line says how long each took;
    a pipe gets none of it, so a refusal of the data stays the only line."""
    from textsieve.exporter.prepare import prepare

    config = TrainConfig(data=keyword_data, out=tmp_path / "r")
    rows = keyword_data.read_text(encoding="utf-8").splitlines(keepends=True)
    if valid:  # the same rows in two files: 200 to train on, 40 to validate with
        (tmp_path / "train.jsonl").write_text("".join(rows[:200]), encoding="utf-8")
        (tmp_path / "valid.jsonl").write_text("".join(rows[200:]), encoding="utf-8")
        config = TrainConfig(data=tmp_path / "train.jsonl", valid=tmp_path / "valid.jsonl", out=tmp_path / "r")
    stream = _Terminal() if terminal else io.StringIO()
    monkeypatch.setattr(sys, "stderr", stream)
    prepared = prepare(config)
    err = stream.getvalue()
    assert len(prepared.train) + len(prepared.valid) == 240
    assert ("grouping copies:   0%|          | 0/240 [" in err) is (terminal and not valid), err
    assert ("holding out validation:   0%|          | 0/240 [" in err) is (terminal and not valid), err
    assert ("encoding:   0%|          | 0/240 [" in err) is terminal, err
    read = re.search(
        r"(?:^|\r)data: 240 rows read in \d+\.\ds, tokenized in \d+\.\ds(, validation split off in \d+\.\ds)?$",
        err,
        re.M,
    )
    assert bool(read) is terminal and (not terminal or bool(read and read.group(1)) is not valid), err
    words = f"{len(prepared.vocabulary):,}"
    encoded = re.search(
        rf"(?:^|\r)data: vocabulary of {words} words built in \d+\.\ds, 240 rows encoded in \d+\.\ds$", err, re.M
    )
    assert bool(encoded) is terminal, err
    assert terminal or err == ""


def test_a_tallied_bar_counts_every_item_by_its_size_and_a_hidden_one_costs_nothing(
    monkeypatch: pytest.MonkeyPatch,
) -> None:
    from textsieve.exporter.progress import Progress

    monkeypatch.setattr(sys, "stderr", _Terminal())
    sizes = [3, 1, 4, 1, 5, 9, 2, 6]
    with Progress(sum(sizes), "counting", enabled=True, unit="text") as progress:
        assert list(progress.tally(sizes, lambda n: n, step=4)) == sizes
        assert progress._bar.n == sum(sizes)  # every item's size, the last partial step included
    items = [1, 2, 3]
    with Progress(3, "hidden", enabled=False) as hidden:
        assert hidden.tally(items) is items  # no generator in the loop when nobody watches


def test_tokens_are_the_tokenizers_and_each_word_is_one_string(keyword_data: Path) -> None:
    """Token lists held a string for every occurrence of a word; now one string per distinct word."""
    from textsieve.exporter.prepare import TokenMemo
    from textsieve.registry.tokenizer import Tokenizer

    texts = [json.loads(line)["text"] for line in keyword_data.read_text(encoding="utf-8").splitlines()]
    memo = TokenMemo()
    memo.fill(texts, len(texts), bar=False)
    reference = Tokenizer()
    assert all(memo[t] == reference.split(t)[0] for t in texts)
    occurrences = [token for t in texts for token in memo[t]]
    assert len({id(token) for token in occurrences}) == len(set(occurrences)) < len(occurrences)
