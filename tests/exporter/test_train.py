"""`textsieve train` end to end on tiny invented data: the run folder contract, reproducibility,
static vectors, length statistics and a one-line exit-2 error for each bad input."""

from __future__ import annotations

import json
import random
from pathlib import Path

import numpy as np
import pytest
import torch

from textsieve.cli import build_parser, main
from textsieve.errors import InputError
from textsieve.exporter.encode import encode_texts
from textsieve.exporter.fit import evaluate
from textsieve.exporter.run_folder import (
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
from textsieve.registry.tokenizer import TokenizerSpec, Vocabulary

# Small enough to train in about a second on 2 cores.
MODEL = ["--maps", "6", "--batch-size", "16", "--learning-rate", "0.01", "--quiet"]
TINY = [*MODEL, "--embedding-dim", "16", "--epochs", "4"]
_KEYS = {"billing": ["charged", "refund", "invoice", "fee"], "repair": ["broken", "flat", "chain", "brake"]}
_FILLER = ["the", "my", "bike", "today", "please", "again", "at", "dock", "hello", "since", "monday"]


def _rows(n: int, seed: int) -> list[dict[str, str]]:
    """Invented help-desk lines whose label shows in one keyword among filler words."""
    rng = random.Random(seed)
    rows = []
    for i in range(n):
        label = ("billing", "repair")[i % 2]
        words = rng.choices(_FILLER, k=rng.randint(2, 12))
        words.insert(rng.randint(0, len(words)), rng.choice(_KEYS[label]))
        rows.append({"text": " ".join(words).capitalize() + ".", "label": label})
    return rows


def _jsonl(path: Path, rows: list[dict[str, object]]) -> Path:
    path.write_text("".join(json.dumps(r) + "\n" for r in rows), encoding="utf-8")
    return path


@pytest.fixture(scope="module")
def data(tmp_path_factory: pytest.TempPathFactory) -> Path:
    return _jsonl(tmp_path_factory.mktemp("data") / "train.jsonl", _rows(240, seed=5))


@pytest.fixture(scope="module")
def tiny_run(data: Path, tmp_path_factory: pytest.TempPathFactory) -> Path:
    out = tmp_path_factory.mktemp("runs") / "run"
    assert main(["train", str(data), "--out", str(out), *TINY]) == 0
    return out


def test_cli_defaults_are_train_config_defaults() -> None:
    args = build_parser().parse_args(["train", "d.jsonl", "--out", "o"])
    assert TrainConfig.from_args(args) == TrainConfig(data=Path("d.jsonl"), out=Path("o"))


def test_kim_defaults() -> None:
    # Kim (2014), section 3.1: windows 3, 4, 5; 100 maps; dropout 0.5; l2 constraint 3; batch 50.
    c = TrainConfig(data=Path("d"), out=Path("o"))
    assert (c.widths, c.maps, c.dropout, c.max_norm, c.batch_size) == ((3, 4, 5), 100, 0.5, 3.0, 50)


def test_run_folder_follows_the_contract(tiny_run: Path, data: Path) -> None:
    assert sorted(p.name for p in tiny_run.iterdir()) == sorted([MODEL_PT, VOCAB_TXT, VALID_JSONL, RUN_JSON])
    assert [p.name for p in tiny_run.parent.iterdir()] == ["run"], "no temp folders left behind"
    text = (tiny_run / RUN_JSON).read_text(encoding="utf-8")
    on_disk = json.loads(text)
    assert set(on_disk) == {"labels", "tokenizer", "vocabulary", "lengths", "architecture", "training", "tool_version"}
    assert set(on_disk["vocabulary"]) == {"size", "min_count", "max_size"}
    epoch_keys = {"epoch", "train_loss", "valid_loss", "valid_accuracy"}
    assert on_disk["training"]["history"] and all(set(h) == epoch_keys for h in on_disk["training"]["history"])
    run = read_run_info(tiny_run)
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
    valid = [json.loads(line) for line in (tiny_run / VALID_JSONL).read_text(encoding="utf-8").splitlines()]
    assert len(valid) == 24 and sorted(r["label"] for r in valid) == ["billing"] * 12 + ["repair"] * 12
    train_texts = [json.loads(line)["text"] for line in data.read_text(encoding="utf-8").splitlines()]
    assert all(r["text"] in train_texts for r in valid)
    vocab = Vocabulary.load(tiny_run / VOCAB_TXT)
    assert len(vocab) == run.vocabulary.size and {"charged", "brake", "monday"} <= set(vocab.tokens)
    history = run.training.history
    assert [h.epoch for h in history] == list(range(1, training.epochs + 1))
    assert 1 <= training.best_epoch <= training.epochs


def test_run_json_tolerates_unknown_top_level_keys(tiny_run: Path, tmp_path: Path) -> None:
    # Reading never refused extra top-level keys; the typed model keeps it that way.
    run = _copy_run(tiny_run, tmp_path / "r")
    content = json.loads((run / RUN_JSON).read_text(encoding="utf-8"))
    content["note"] = "added by hand"
    (run / RUN_JSON).write_text(json.dumps(content), encoding="utf-8")
    assert read_run_info(run) == RunInfo.model_validate(json.loads((tiny_run / RUN_JSON).read_text(encoding="utf-8")))


def test_the_run_learns_and_keeps_the_best_epoch(tiny_run: Path) -> None:
    model, vocab, run = load_run(tiny_run)
    valid = [json.loads(line) for line in (tiny_run / VALID_JSONL).read_text(encoding="utf-8").splitlines()]
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


def test_summary_is_printed(data: Path, tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    assert main(["train", str(data), "--out", str(tmp_path / "r"), *TINY]) == 0
    captured = capsys.readouterr()
    for fragment in ("run folder", "vocabulary", "max_length", "99th percentile", "best epoch", "validation"):
        assert fragment in captured.out
    assert captured.err.count("epoch ") >= 1  # one summary line per epoch on stderr
    assert not torch.are_deterministic_algorithms_enabled(), "global torch flags are restored"


def test_same_seed_gives_identical_weights(data: Path, tmp_path: Path) -> None:
    runs = []
    for name, seed in (("a", "3"), ("b", "3"), ("c", "4")):
        assert main(["train", str(data), "--out", str(tmp_path / name), "--seed", seed, *TINY]) == 0
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
def test_pretrained_vectors(mode: str, data: Path, tmp_path: Path) -> None:
    vectors_path, vectors = _vectors_file(tmp_path / "vec.txt", dim=6)
    out = tmp_path / "run"
    assert (
        main(
            [
                "train",
                str(data),
                "--out",
                str(out),
                "--vectors",
                str(vectors_path),
                "--vectors-mode",
                mode,
                *MODEL,
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


def test_length_statistics_by_hand(tmp_path: Path) -> None:
    # Texts of 1..100 tokens. numpy's default percentile (Hyndman & Fan, 1996, definition 7)
    # of 1..100 at 90 % is 1 + 0.9 * 99 = 90.1, so max_length = ceil(90.1) = 91 and the 9 texts
    # of 92..100 tokens (9 %) are truncated.
    rows = [{"text": " ".join(["w"] * n), "label": "ab"[n % 2]} for n in range(1, 101)]
    data = _jsonl(tmp_path / "d.jsonl", rows)
    valid = _jsonl(tmp_path / "v.jsonl", rows[:4])
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
                *TINY,
                "--epochs",
                "1",
            ]
        )
        == 0
    )
    lengths = read_run_info(out).lengths
    assert lengths == LengthInfo(max_length=91, min_length=5, percentile=90.0, truncation_rate=0.09)

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
                *TINY,
                "--epochs",
                "1",
            ]
        )
        == 0
    )
    lengths = read_run_info(out2).lengths
    assert (lengths.max_length, lengths.min_length) == (7, 7)
    assert lengths.truncation_rate == pytest.approx(93 / 100)


def test_a_previous_run_is_replaced(data: Path, tmp_path: Path) -> None:
    out = tmp_path / "run"
    assert main(["train", str(data), "--out", str(out), "--seed", "1", *TINY]) == 0
    first = (out / MODEL_PT).read_bytes()
    assert main(["train", str(data), "--out", str(out), "--seed", "2", *TINY]) == 0
    assert (out / MODEL_PT).read_bytes() != first
    assert sorted(p.name for p in tmp_path.iterdir()) == ["run"]


def test_early_stopping_stops_after_patience(data: Path, tmp_path: Path) -> None:
    out = tmp_path / "run"
    assert main(["train", str(data), "--out", str(out), *TINY, "--epochs", "12", "--patience", "1"]) == 0
    training = read_run_info(out).training
    epochs, best = training.epochs, training.best_epoch
    assert epochs == 12 or epochs == best + 1
    losses = [h.valid_loss for h in training.history]
    assert losses[best - 1] == min(losses[:best])


# --- bad input: exit status 2 and one line on stderr --------------------------------------------


def _bad(tmp_path: Path, data: Path) -> dict[str, tuple[list[str], str]]:
    good = data
    (tmp_path / "empty.jsonl").write_text("", encoding="utf-8")
    _jsonl(tmp_path / "nofield.jsonl", [{"body": "a", "label": "x"}])
    _jsonl(tmp_path / "onelabel.jsonl", [{"text": f"t {i}", "label": "x"} for i in range(30)])
    (tmp_path / "latin1.jsonl").write_bytes('{"text": "café", "label": "x"}\n'.encode("latin-1"))
    _jsonl(tmp_path / "emptytext.jsonl", [{"text": "a", "label": "x"}, {"text": " ", "label": "y"}])
    _jsonl(tmp_path / "unseen.jsonl", [{"text": "a", "label": "billing"}, {"text": "b", "label": "shipping"}])
    _jsonl(tmp_path / "few.jsonl", [{"text": "a", "label": "x"}, {"text": "b", "label": "y"}])
    vec, _ = _vectors_file(tmp_path / "vec6.txt", dim=6)
    (tmp_path / "afile").write_text("not a run", encoding="utf-8")
    (tmp_path / "notrun").mkdir()
    (tmp_path / "notrun" / "keep.txt").write_text("precious", encoding="utf-8")
    d, out = str(good), ["--out", str(tmp_path / "out")]
    return {
        "missing": ([str(tmp_path / "nope.jsonl"), *out], "no such file"),
        "empty": ([str(tmp_path / "empty.jsonl"), *out], "the file is empty"),
        "field": ([str(tmp_path / "nofield.jsonl"), *out], "no 'text' field (fields found: 'body', 'label')"),
        "one label": ([str(tmp_path / "onelabel.jsonl"), *out], "1 distinct label ('x')"),
        "utf8": ([str(tmp_path / "latin1.jsonl"), *out], "line 1: byte offset 13 is not valid UTF-8"),
        "empty text": ([str(tmp_path / "emptytext.jsonl"), *out], "line 2: the 'text' field is empty"),
        "unseen": ([d, "--valid", str(tmp_path / "unseen.jsonl"), *out], "labels not in"),
        "too few": ([str(tmp_path / "few.jsonl"), *out], "too few to hold out"),
        "vectors dim": (
            [d, *out, "--vectors", str(vec), "--embedding-dim", "16"],
            "vectors file has dimension 6 but --embedding-dim is 16",
        ),
        "vectors missing": ([d, *out, "--vectors", str(tmp_path / "none.txt")], "no such file"),
        "out file": ([d, "--out", str(tmp_path / "afile")], "is an existing file"),
        "out folder": ([d, "--out", str(tmp_path / "notrun")], "is a folder that is not a previous run"),
        "widths zero": ([d, *out, "--widths", "0,3"], "--widths 0,3: each filter width must be"),
        "widths text": ([d, *out, "--widths", "3,x"], "--widths '3,x': give filter widths as whole numbers"),
        "widths twice": ([d, *out, "--widths", "3,3"], "each filter width must be a different"),
        "maps": ([d, *out, "--maps", "0"], "--maps 0 is out of range; it must be from 1 to 1000"),
        "dropout": ([d, *out, "--dropout", "1"], "--dropout 1.0 is out of range"),
        "negative dropout": ([d, *out, "--dropout", "-0.1"], "--dropout -0.1 is out of range"),
        "batch": ([d, *out, "--batch-size", "0"], "--batch-size 0 is out of range"),
        "percentile": ([d, *out, "--length-percentile", "0"], "--length-percentile 0.0 is out of range"),
        "max-norm": ([d, *out, "--max-norm", "-1"], "--max-norm -1.0 is out of range"),
        "static": ([d, *out, "--vectors-mode", "static"], "--vectors-mode static needs --vectors"),
    }


CASES = [
    "missing",
    "empty",
    "field",
    "one label",
    "utf8",
    "empty text",
    "unseen",
    "too few",
    "vectors dim",
    "vectors missing",
    "out file",
    "out folder",
    "widths zero",
    "widths text",
    "widths twice",
    "maps",
    "dropout",
    "negative dropout",
    "batch",
    "percentile",
    "max-norm",
    "static",
]


@pytest.mark.parametrize("case", CASES)
def test_bad_input_exits_2_with_one_line(
    case: str, data: Path, tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    argv, expected = _bad(tmp_path, data)[case]
    assert main(["train", *TINY, *argv]) == 2  # argv last: its flags win
    err = capsys.readouterr().err
    assert err.count("\n") == 1 and err.startswith("textsieve: error: "), err
    assert expected in err
    assert not (tmp_path / "out").exists(), "nothing written on bad input"
    assert not [p for p in tmp_path.iterdir() if ".tmp-" in p.name]
    assert (tmp_path / "notrun" / "keep.txt").read_text(encoding="utf-8") == "precious"


def test_bad_cases_are_all_run(data: Path, tmp_path: Path) -> None:
    assert sorted(CASES) == sorted(_bad(tmp_path, data))


# --- reading a run back ---------------------------------------------------------------------------


def _copy_run(src: Path, dst: Path) -> Path:
    import shutil

    shutil.copytree(src, dst)
    return dst


def test_load_run_errors_name_the_file(tiny_run: Path, tmp_path: Path) -> None:
    with pytest.raises(InputError, match="no such run folder"):
        load_run(tmp_path / "absent")

    run = _copy_run(tiny_run, tmp_path / "r1")
    (run / RUN_JSON).unlink()
    with pytest.raises(InputError, match=r"r1/run\.json: missing"):
        load_run(run)

    run = _copy_run(tiny_run, tmp_path / "r2")
    content = json.loads((run / RUN_JSON).read_text(encoding="utf-8"))
    del content["lengths"]
    (run / RUN_JSON).write_text(json.dumps(content), encoding="utf-8")
    with pytest.raises(InputError, match=r"r2/run\.json: missing key\(s\) lengths"):
        load_run(run)

    run = _copy_run(tiny_run, tmp_path / "r3")
    content = json.loads((run / RUN_JSON).read_text(encoding="utf-8"))
    content["architecture"]["widths"] = [0]
    (run / RUN_JSON).write_text(json.dumps(content), encoding="utf-8")
    with pytest.raises(InputError, match=r"r3/run\.json: architecture\.widths"):
        load_run(run)

    run = _copy_run(tiny_run, tmp_path / "r4")
    (run / MODEL_PT).write_bytes(b"not a zip")
    with pytest.raises(InputError, match=r"r4/model\.pt: not a readable weights file"):
        load_run(run)

    run = _copy_run(tiny_run, tmp_path / "r5")
    content = json.loads((run / RUN_JSON).read_text(encoding="utf-8"))
    content["architecture"]["maps"] = 7
    (run / RUN_JSON).write_text(json.dumps(content), encoding="utf-8")
    with pytest.raises(InputError, match=r"r5/model\.pt: does not match run\.json"):
        load_run(run)

    run = _copy_run(tiny_run, tmp_path / "r6")
    (run / VOCAB_TXT).write_text("<pad>\n<unk>\nonly\n", encoding="utf-8")
    with pytest.raises(InputError, match=r"r6/vocab\.txt: has 3 tokens but run\.json says"):
        load_run(run)


def test_train_function_returns_the_folder(data: Path, tmp_path: Path) -> None:
    config = TrainConfig(data=data, out=tmp_path / "r", embedding_dim=8, maps=4, epochs=1, quiet=True)
    assert train(config) == tmp_path / "r"
    model, vocab, run = load_run(tmp_path / "r")
    assert model.training is False and len(vocab) == run.vocabulary.size
