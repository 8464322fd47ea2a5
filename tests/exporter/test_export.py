"""The exporter's main job: an ONNX bundle numerically equal to the PyTorch model it came from."""

from __future__ import annotations

import json
import os
import random
import shutil
import stat
from collections.abc import Callable
from pathlib import Path

import numpy as np
import pytest
import torch

from tests.helpers.calibration import BOUND_CASES, reference_minimum
from textsieve.cli import main
from textsieve.errors import ParityError
from textsieve.exporter.card import ordinal, render_card
from textsieve.exporter.export import calibrate, export, temperature_fitted
from textsieve.exporter.run_folder import MODEL_PT, RUN_JSON, VALID_JSONL, VOCAB_TXT, load_run
from textsieve.registry.bundle import open_bundle
from textsieve.registry.manifest import CARD_FILE, MANIFEST, MODEL_FILE, VOCAB_FILE, LengthInfo
from textsieve.registry.measures import nll
from textsieve.registry.runtime import Predictor

DATA = Path(__file__).parents[1] / "data"


def _torch_probs(run: Path, texts: list[str], temperature: float) -> np.ndarray:
    """Reference: the PyTorch model, each text alone, padded to exactly its own length."""
    model, vocab, meta = load_run(run)
    model.eval()
    from textsieve.registry.tokenizer import Tokenizer

    tok = Tokenizer(meta.tokenizer)
    max_len, min_len = meta.lengths.max_length, meta.lengths.min_length
    rows = []
    with torch.inference_mode():
        for text in texts:
            ids = vocab.encode(tok.split(text)[0][:max_len])
            padded = ids + [0] * max(min_len - len(ids), 0)
            logits = model(torch.tensor([padded]), torch.tensor([len(ids)]))
            rows.append(torch.softmax(logits.double() / temperature, dim=1)[0].numpy())
    return np.stack(rows)


def test_bundle_files_and_manifest(tiny_bundles: dict[str, Path]) -> None:
    bundle = open_bundle(tiny_bundles["a"])
    names = sorted(p.name for p in tiny_bundles["a"].iterdir())
    assert names == sorted([CARD_FILE, MANIFEST, MODEL_FILE, VOCAB_FILE])
    m = bundle.manifest
    assert m.parity.passed and m.parity.label_agreement == 1.0
    assert m.lengths.min_length == max(m.architecture.widths)
    assert 0 <= m.lengths.truncation_rate <= 0.05  # 99th percentile → about 1 % truncated
    assert m.calibration.nll_after <= m.calibration.nll_before + 1e-12
    card = (tiny_bundles["a"] / CARD_FILE).read_text(encoding="utf-8")
    assert "aids for human review" in card and "bias" in card and "Monitor" in card


def test_card_states_the_manifests_figures(tiny_bundles: dict[str, Path]) -> None:
    m = open_bundle(tiny_bundles["a"]).manifest
    card = (tiny_bundles["a"] / CARD_FILE).read_text(encoding="utf-8")
    lengths = m.lengths
    assert lengths.max_length > lengths.min_length, "the tiny model's 99th percentile is above its widest filter"
    assert (
        f"texts are truncated to {lengths.max_length} tokens (the 99th percentile of training lengths;\n"
        f"{lengths.truncation_rate:.2%} of training texts were longer)"
    ) in card
    assert f"max-norm {m.architecture.max_norm:g}." in card
    assert f"| {m.metrics.split} | {m.metrics.texts} | {m.metrics.accuracy:.4f} | {m.metrics.macro_f1:.4f} |" in card
    assert f"T = {m.calibration.temperature:.4f}" in card
    # Metrics measured on the texts that chose the epoch and T are not held-out figures (common practice).
    caveat = "These are the validation texts, which also chose the training epoch (early stopping)"
    assert (caveat in card) == (m.metrics.split == "validation")
    held_out = m.model_copy(update={"metrics": m.metrics.model_copy(update={"split": "test:test.jsonl"})})
    on_validation = m.model_copy(update={"metrics": m.metrics.model_copy(update={"split": "validation"})})
    assert caveat not in render_card(held_out) and caveat in render_card(on_validation)


def test_card_says_when_max_length_is_the_widest_filter(tiny_bundles: dict[str, Path]) -> None:
    # prepare.length_info raises max_length to the widest filter when the percentile is shorter: the card
    # said "the 1th percentile of training lengths" for a length no percentile gave.
    m = open_bundle(tiny_bundles["a"]).manifest
    widest = max(m.architecture.widths)
    raised = m.model_copy(
        update={
            "lengths": LengthInfo(max_length=widest, min_length=widest, percentile=1.0, truncation_rate=0.93),
            "architecture": m.architecture.model_copy(update={"max_norm": None}),
        }
    )
    card = render_card(raised)
    assert (
        f"truncated to {widest} tokens (the widest filter, as the 1st percentile of training lengths is no longer;"
    ) in card
    assert "no max-norm constraint" in card and "None" not in card
    one = raised.model_copy(
        update={"lengths": LengthInfo(max_length=1, min_length=1, percentile=30.0, truncation_rate=0.27)}
    )
    assert "texts are truncated to 1 token (the widest filter" in render_card(one)


@pytest.mark.parametrize(
    ("percentile", "words"),
    [
        (1, "1st"),
        (2, "2nd"),
        (3, "3rd"),
        (4, "4th"),
        (11, "11th"),
        (12, "12th"),
        (13, "13th"),
        (21, "21st"),
        (22, "22nd"),
        (99, "99th"),
        (99.5, "99.5th"),
        (100, "100th"),
    ],
)  # English ordinal suffixes (common practice)
def test_ordinal(percentile: float, words: str) -> None:
    assert ordinal(percentile) == words


def test_onnx_matches_pytorch_on_mixed_lengths(
    tiny_bundles: dict[str, Path], tiny_runs: dict[str, Path], tiny_data: Path
) -> None:
    # Reference library: PyTorch's own forward pass; tolerance 1e-5 on probabilities.
    rows = [json.loads(x) for x in (tiny_data / "test.jsonl").read_text(encoding="utf-8").splitlines()]
    texts = [r["text"] for r in rows][:120] + ["ok", "x " * 300, "Thanks! 👍🏽 café 東京"]
    random.Random(0).shuffle(texts)
    predictor = Predictor.from_bundle(tiny_bundles["a"], batch_size=16)
    served = np.array([[p.probabilities[label] for label in predictor.labels] for p in predictor.predict(texts)])
    ref = _torch_probs(tiny_runs["a"], texts, predictor.temperature)
    assert np.abs(served - ref).max() < 1e-5


def test_text_alone_equals_text_in_long_padded_batch(tiny_bundles: dict[str, Path]) -> None:
    predictor = Predictor.from_bundle(tiny_bundles["a"])
    short = predictor.encode("The dock is broken")
    long = predictor.encode(" ".join(["the bike was fine until the chain snapped"] * 20))
    alone = predictor.run([short])
    ids, lengths = predictor.pad([short, long], width=predictor.max_length + 50)
    logits, pooled, positions, _ = predictor.run_arrays(ids, lengths)
    assert np.abs(alone.logits[0] - logits[0]).max() < 1e-5  # common practice float32 tolerance
    assert np.abs(alone.pooled[0] - pooled[0]).max() < 1e-5
    assert (alone.positions[0] == positions[0]).all()


def test_temperature_matches_scipy_minimiser(tiny_bundles: dict[str, Path], tiny_runs: dict[str, Path]) -> None:
    # Outside check: scipy.optimize.minimize_scalar on the validation NLL (Guo et al., 2017, §4.2).
    from scipy.optimize import minimize_scalar

    predictor = Predictor.from_bundle(tiny_bundles["a"])
    rows = [json.loads(x) for x in (tiny_runs["a"] / "valid.jsonl").read_text(encoding="utf-8").splitlines()]
    out = predictor.run([predictor.encode(r["text"]) for r in rows])
    targets = np.array([predictor.labels.index(r["label"]) for r in rows])
    best = minimize_scalar(
        lambda t: nll(out.logits, targets, t), bounds=(0.05, 20), method="bounded", options={"xatol": 1e-8}
    )
    assert predictor.temperature == pytest.approx(best.x, rel=1e-3)


def test_validation_texts_all_told_apart_leave_the_temperature_at_1() -> None:
    # Three texts, each with its own class ahead: the NLL keeps falling as T shrinks, so scipy's bounded
    # minimiser ends at the bound, which is no minimum (Guo et al., 2017, eq. for NLL; scipy as reference).
    from scipy.optimize import minimize_scalar

    logits = np.array([[2.0, -1.0], [0.3, 0.1], [-0.5, 1.5]])
    targets = np.array([0, 0, 1])
    best = minimize_scalar(
        lambda t: nll(logits, targets, t), bounds=(0.05, 20), method="bounded", options={"xatol": 1e-8}
    )
    assert best.x == pytest.approx(0.05, abs=1e-5), "the minimiser stops at the bound"
    grid = np.geomspace(0.05, 20, 50)
    assert np.all(np.diff([nll(logits, targets, t) for t in grid]) > 0), "NLL rises with T: no interior minimum"
    cal = calibrate(logits, targets)
    assert (cal.temperature, cal.nll_after, cal.ece_after) == (1.0, cal.nll_before, cal.ece_before)
    assert not temperature_fitted(cal)
    # One text on the wrong side: a minimum exists, and it is scipy's.
    wrong = np.array([0, 1, 1])
    cal = calibrate(logits, wrong)
    assert temperature_fitted(cal)
    ref = minimize_scalar(lambda t: nll(logits, wrong, t), bounds=(0.05, 20), method="bounded", options={"xatol": 1e-8})
    assert cal.temperature == pytest.approx(ref.x, rel=1e-3)


@pytest.mark.parametrize(
    ("bound", "card_says", "report_says"),
    [
        pytest.param(
            "upper",
            "stopped at the upper\nbound of its search, T = 20",
            "stopped at its upper bound; the model's scores carry little information",
            id="useless scores: upper bound",
        ),
        pytest.param(
            "lower",
            "stopped at the lower\nbound of its search, T = 0.05",
            "stopped at its lower bound; every logit is multiplied by 20",
            id="ties: lower bound",
        ),
    ],
)
def test_a_temperature_at_the_search_bound_is_not_called_fitted(
    tiny_bundles: dict[str, Path], bound: str, card_says: str, report_says: str
) -> None:
    from textsieve.exporter.export import _print_parity
    from textsieve.registry.measures import temperature_bound

    logits, targets, edge = BOUND_CASES[bound]
    z, y = np.array(logits), np.array(targets)
    assert reference_minimum(z, y) == pytest.approx(edge, abs=1e-4)  # no minimum inside the bracket
    cal = calibrate(z, y)
    assert cal.temperature == pytest.approx(edge, rel=1e-6) and temperature_bound(cal.temperature) == bound
    m = open_bundle(tiny_bundles["a"]).manifest
    card = render_card(m.model_copy(update={"calibration": cal}))
    assert card_says in card and "Guo et al., 2017" in card
    assert "fitted on" not in card
    lines: list[str] = []
    _print_parity(m.parity, cal, lines.append)
    assert any(line.lstrip().startswith("temperature") and report_says in line for line in lines), lines
    # A temperature inside the bracket is a fit, and says nothing of bounds.
    assert temperature_bound(m.calibration.temperature) is None
    assert "fitted on" in render_card(m)


def test_card_says_when_the_temperature_was_not_fitted(tiny_bundles: dict[str, Path]) -> None:
    m = open_bundle(tiny_bundles["a"]).manifest
    fitted = render_card(m)
    assert f"fitted on {m.calibration.texts} validation texts: T = {m.calibration.temperature:.4f}" in fitted
    kept = m.calibration.model_copy(
        update={"temperature": 1.0, "nll_after": m.calibration.nll_before, "ece_after": m.calibration.ece_before}
    )
    card = render_card(m.model_copy(update={"calibration": kept}))
    assert f"Not calibrated: the model classifies all {m.calibration.texts} validation texts correctly" in card
    assert "fitted on" not in card


def test_parity_failure_exits_1_and_writes_nothing(
    tiny_runs: dict[str, Path], tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    out = tmp_path / "bundle"
    with pytest.raises(ParityError):
        export(tiny_runs["a"], out, tolerance=1e-15, log=lambda *_: None)
    assert not out.exists() and list(tmp_path.iterdir()) == []
    assert main(["export", str(tiny_runs["a"]), "--out", str(out), "--tolerance", "1e-15"]) == 1
    err = capsys.readouterr().err.strip().splitlines()
    errors = [line for line in err if line.startswith("textsieve: error:")]
    assert len(errors) == 1 and "parity check failed" in errors[0] and errors[0] == err[-1]
    assert not any("Traceback" in line for line in err)


def test_both_layouts_match_pytorch_and_the_manifest_says_which(
    tiny_bundles: dict[str, Path],
    tiny_runs: dict[str, Path],
    tiny_data: Path,
    tmp_path: Path,
    monkeypatch: pytest.MonkeyPatch,
) -> None:
    # The default bundle uses tap tables; --layout convolution exports the Conv graph. Both are
    # held to the PyTorch model (the reference) on the same texts, and to each other.
    import textsieve.exporter.export as export_module

    assert open_bundle(tiny_bundles["a"]).manifest.onnx.layout == "tap-tables"
    conv = tmp_path / "conv"
    assert main(["export", str(tiny_runs["a"]), "--out", str(conv), "--layout", "convolution"]) == 0
    assert open_bundle(conv).manifest.onnx.layout == "convolution"
    rows = [json.loads(x) for x in (tiny_data / "test.jsonl").read_text(encoding="utf-8").splitlines()]
    texts = [r["text"] for r in rows][:60] + ["ok", "x " * 300]
    tables = Predictor.from_bundle(tiny_bundles["a"], batch_size=16)
    convp = Predictor.from_bundle(conv, batch_size=16)
    ref = _torch_probs(tiny_runs["a"], texts, tables.temperature)
    for p in (tables, convp):
        got = np.array([[x.probabilities[label] for label in p.labels] for x in p.predict(texts)])
        assert np.abs(got - ref).max() < 1e-5
    enc = [tables.encode(t) for t in texts]
    assert np.array_equal(tables.run(enc).positions, convp.run(enc).positions)

    # "auto" falls back to the convolution layout when the tables would pass the budget.
    monkeypatch.setattr(export_module, "TAP_TABLE_BUDGET", 1024)
    model, _, _ = load_run(tiny_runs["a"])
    assert export_module.choose_layout(model) == "convolution"
    assert export_module.choose_layout(model, "tap-tables") == "tap-tables"


def test_contributions_are_each_filters_share_of_each_logit(
    tiny_bundles: dict[str, Path], tiny_runs: dict[str, Path], tiny_data: Path
) -> None:
    # The graph's contributions output, held to its definition with NumPy: the pooled features z
    # feed a fully connected softmax layer, y = W·z + b (Kim, 2014, section 2, the output layer
    # at test time; equation numbering from memory), so contribution[b, f, c] = z[b, f] * W[c, f]
    # and Σ_f contribution + b = logits (splitting a linear layer into per-feature terms is
    # common practice). The weights come from the PyTorch run, not from the graph.
    model, _, _ = load_run(tiny_runs["a"])
    weight = model.output.weight.detach().numpy()
    bias = model.output.bias.detach().numpy()
    rows = [json.loads(x) for x in (tiny_data / "test.jsonl").read_text(encoding="utf-8").splitlines()]
    p = Predictor.from_bundle(tiny_bundles["a"])
    out = p.run([p.encode(r["text"]) for r in rows[:50]])
    assert out.contributions.shape == (50, weight.shape[1], weight.shape[0])
    assert np.array_equal(out.contributions, out.pooled[:, :, None] * weight.T[None, :, :])  # the same float32 products
    np.testing.assert_allclose(out.contributions.sum(axis=1) + bias, out.logits, rtol=0, atol=1e-4)


def test_export_bad_run_folder_exits_2(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    assert main(["export", str(tmp_path / "nope"), "--out", str(tmp_path / "b")]) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and err[0].startswith("textsieve: error:")


def _without_digests(run: Path) -> None:
    """A run folder written before run.json recorded its files' sha256 (they load unchecked)."""
    info = json.loads((run / RUN_JSON).read_text(encoding="utf-8"))
    del info["files"]
    (run / RUN_JSON).write_text(json.dumps(info), encoding="utf-8")


def _swap_vocabulary_lines(run: Path) -> None:
    lines = (run / VOCAB_TXT).read_text(encoding="utf-8").split("\n")
    lines[2], lines[3] = lines[3], lines[2]
    (run / VOCAB_TXT).write_text("\n".join(lines), encoding="utf-8")


def _nan_weights(run: Path) -> None:
    _without_digests(run)
    state = torch.load(run / MODEL_PT, weights_only=True)
    state["output.bias"][0] = float("nan")
    torch.save(state, run / MODEL_PT)


def _unknown_valid_label(run: Path) -> None:
    _without_digests(run)
    with open(run / VALID_JSONL, "a", encoding="utf-8") as f:  # a blank line 25, then the row on line 26
        f.write('\n{"text": "the kettle is on", "label": "kitchen"}\n')


# how to break a copy of keyword_run (24 validation rows), the --out ({tmp}: this test's folder, which
# holds a file "afile") -> words of the one-line error
@pytest.mark.parametrize(
    ("damage", "out", "expected_msg"),
    [
        pytest.param(
            _nan_weights,
            "{tmp}/bundle",
            "run/model.pt: the weights are not finite (nan or inf in output.bias): the training diverged",
            id="weights not finite",
        ),
        pytest.param(
            _unknown_valid_label,
            "{tmp}/bundle",
            "run/valid.jsonl: line 26: the label 'kitchen' is not one the model knows (billing, repair)",
            id="validation label unknown to the model",
        ),
        # Two tokens' ids swapped: the graph and the PyTorch reference read the same wrong vocabulary, so
        # parity passed and the bundle scored every text with the two words exchanged.
        pytest.param(
            _swap_vocabulary_lines,
            "{tmp}/bundle",
            "run/vocab.txt: changed since training (sha256 ",
            id="vocabulary edited after training",
        ),
        pytest.param(None, "{tmp}/afile", "--out {tmp}/afile: is an existing file", id="out is a file"),
        pytest.param(
            None,
            "{tmp}/pipe",
            "--out {tmp}/pipe: is a FIFO (named pipe), which textsieve does not write over",
            id="out is a fifo",
        ),
        pytest.param(
            None,
            "/sys/textsieve-test-bundle",
            "--out /sys/textsieve-test-bundle: cannot make a folder in /sys (Operation not permitted)",
            id="out where nothing can be written",
        ),
        pytest.param(
            None,
            "{tmp}/afile/sub",
            "--out {tmp}/afile/sub: {tmp}/afile is an existing file, so no folder can be made inside it",
            id="out inside a file",
        ),
        # What `$'b\xffun'` gives Python on Linux: the byte 0xff as a lone surrogate (PEP 383).
        pytest.param(
            None,
            "{tmp}/b\udcffun",
            "--out {tmp}/b\\xffun: the path is not valid UTF-8; onnxruntime opens the model by its name",
            id="out not UTF-8",
        ),
    ],
)
def test_bad_run_or_out_exits_2_with_one_line(
    damage: Callable[[Path], None] | None,
    out: str,
    expected_msg: str,
    keyword_run: Path,
    tmp_path: Path,
    capsys: pytest.CaptureFixture[str],
) -> None:
    run = tmp_path / "run"
    shutil.copytree(keyword_run, run)
    if damage is not None:
        damage(run)
    (tmp_path / "afile").write_text("not a bundle", encoding="utf-8")
    os.mkfifo(tmp_path / "pipe")
    assert main(["export", str(run), "--out", out.format(tmp=tmp_path)]) == 2
    err = capsys.readouterr().err
    assert err.count("\n") == 1 and err.startswith("textsieve: error: "), err
    assert expected_msg.format(tmp=tmp_path) in err
    assert sorted(p.name for p in tmp_path.iterdir()) == ["afile", "pipe", "run"], "nothing written"
    assert stat.S_ISFIFO((tmp_path / "pipe").lstat().st_mode)
    assert (tmp_path / "afile").read_text(encoding="utf-8") == "not a bundle"


@pytest.mark.parametrize("tolerance", ["0", "-0.5", "nan"])
def test_a_tolerance_that_nothing_can_meet_is_bad_input(
    tolerance: str, tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    assert main(["export", str(tmp_path / "run"), "--out", str(tmp_path / "b"), "--tolerance", tolerance]) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert err == [f"textsieve: error: --tolerance {float(tolerance)}: must be a positive number, e.g. 1e-4"]
    assert not (tmp_path / "b").exists()


def _sentences() -> list[tuple[str, str]]:
    rows: list[tuple[str, str]] = []
    for name in ("amazon", "imdb", "yelp"):
        for item in json.loads((DATA / "sentiment_labelled" / f"{name}.json").read_text(encoding="utf-8")):
            if item["class"] is not None:
                rows.append((item["text"].strip(), "positive" if item["class"] == 1 else "negative"))
    return rows


@pytest.mark.slow
def test_real_data_cnn_close_to_bag_of_words_baseline(tmp_path: Path) -> None:
    """UCI Sentiment Labelled Sentences (Kotzias et al., KDD 2015): 3,000 real sentences.

    Baseline: scikit-learn logistic regression on bag-of-words counts, same split. A
    prototype measured about 83 % for it and 76–78 % for a randomly initialised CNN (2,100
    training sentences favour linear models); we require the exported CNN within 10 points
    and far above chance (50 %).
    """
    from sklearn.feature_extraction.text import CountVectorizer
    from sklearn.linear_model import LogisticRegression

    from textsieve.exporter.train import TrainConfig, train

    rows = _sentences()
    assert len(rows) == 3000
    random.Random(2015).shuffle(rows)
    splits = {"train": rows[:2100], "valid": rows[2100:2400], "test": rows[2400:]}
    for name, part in splits.items():
        (tmp_path / f"{name}.jsonl").write_text(
            "".join(json.dumps({"text": t, "label": y}) + "\n" for t, y in part), encoding="utf-8"
        )

    vec = CountVectorizer()
    x_train = vec.fit_transform([t for t, _ in splits["train"]])
    clf = LogisticRegression(max_iter=2000).fit(x_train, [y for _, y in splits["train"]])
    baseline = clf.score(vec.transform([t for t, _ in splits["test"]]), [y for _, y in splits["test"]])

    run = train(
        TrainConfig(
            data=tmp_path / "train.jsonl", out=tmp_path / "run", valid=tmp_path / "valid.jsonl", seed=5, quiet=True
        )
    )
    manifest = export(run, tmp_path / "bundle", test=tmp_path / "test.jsonl", log=lambda *_: None)
    cnn = manifest.metrics.accuracy
    print(
        f"\nUCI sentiment (600 test sentences): bag-of-words logistic regression {baseline:.3f}, exported CNN {cnn:.3f}"
    )
    assert cnn > 0.65
    assert cnn >= baseline - 0.10


def test_pad_places_each_text_at_the_left_of_its_row(tiny_bundles: dict[str, Path]) -> None:
    # The vectorised padding against the plain per-row loop it replaced.
    from textsieve.registry.runtime import Encoded

    p = Predictor.from_bundle(tiny_bundles["a"])
    rng = random.Random(5)
    for _ in range(50):
        batch = [
            Encoded("", [rng.randrange(2, 50) for _ in range(rng.randrange(0, 12))], [], [], 0, 0)
            for _ in range(rng.randrange(1, 9))
        ]
        for width in (None, p.max_length):
            ids, lengths = p.pad(batch, width=width)
            seq = max(max(len(e.ids) for e in batch), p.min_length) if width is None else max(width, p.min_length)
            want = np.zeros((len(batch), seq), dtype=np.int64)
            for row, e in enumerate(batch):
                want[row, : len(e.ids)] = e.ids
            assert np.array_equal(ids, want) and lengths.tolist() == [len(e.ids) for e in batch]
