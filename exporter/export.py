"""``textsieve export``: a trained run → a parity-checked, calibrated ONNX bundle.

read the run → write the graph → PyTorch reference → calibrate → parity check
→ held-out metrics → card and manifest; all in a temporary folder renamed into place at the end
"""

from __future__ import annotations

import datetime as dt
import os
from dataclasses import dataclass
from pathlib import Path
from typing import Any, Literal

import numpy as np

from textsieve import __version__
from textsieve.errors import InputError, ParityError
from textsieve.exporter.run_folder import VALID_JSONL, LoadedRun, RunInfo, load_run
from textsieve.files import atomic_directory, atomic_write_text, check_out_folder, sha256_file
from textsieve.labelled import Example, load_examples, name_unknown
from textsieve.registry import measures
from textsieve.registry.bundle import check_graph, manifest_json
from textsieve.registry.drift import DriftBaseline, Layout, baseline, count_encoded
from textsieve.registry.manifest import (
    CARD_FILE,
    INPUTS,
    MANIFEST,
    MODEL_FILE,
    OUTPUTS,
    VOCAB_FILE,
    CalibrationInfo,
    Manifest,
    Metrics,
    OnnxInfo,
    ParityReport,
    TensorInfo,
    VocabularyInfo,
)
from textsieve.registry.runtime import Encoded, Outputs, Predictor
from textsieve.registry.tokenizer import Tokenizer, Vocabulary

OPSET = 18  # the lowest opset torch's dynamo exporter writes
INVARIANCE_TEXTS = 64


LAYOUTS = ("auto", "tap-tables", "convolution")
TAP_TABLE_BUDGET = 256 * 2**20  # bytes; "auto" falls back to convolution above this


GraphLayout = Literal["tap-tables", "convolution"]


def choose_layout(model: Any, requested: str = "auto") -> GraphLayout:
    """``tap-tables`` unless asked otherwise or its tables would exceed :data:`TAP_TABLE_BUDGET`."""
    from textsieve.exporter.model import tap_table_bytes

    if requested not in LAYOUTS:
        raise InputError(f"unknown layout {requested!r}; allowed: {', '.join(LAYOUTS)}")
    if requested == "tap-tables" or (requested == "auto" and tap_table_bytes(model) <= TAP_TABLE_BUDGET):
        return "tap-tables"
    return "convolution"


def export_onnx(model: Any, path: Path, min_length: int, layout: str = "tap-tables") -> None:
    """Write the graph with dynamic batch and sequence axes as one self-contained file."""
    import torch

    from textsieve.exporter.model import ExportGraph, TapTableGraph

    graph = (TapTableGraph(model) if layout == "tap-tables" else ExportGraph(model)).eval()
    seq = max(min_length, 8)
    ids = torch.ones((2, seq), dtype=torch.long)
    lengths = torch.tensor([seq, 1], dtype=torch.long)
    batch = torch.export.Dim("batch")
    steps = torch.export.Dim("seq", min=min_length)
    import logging
    import warnings

    logging.getLogger("torch.onnx").setLevel(logging.ERROR)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        program = torch.onnx.export(
            graph,
            (ids, lengths),
            dynamo=True,
            external_data=False,
            opset_version=OPSET,
            input_names=list(INPUTS),
            output_names=list(OUTPUTS),
            dynamic_shapes={"token_ids": {0: batch, 1: steps}, "lengths": {0: batch}},
            verbose=False,
        )
    assert program is not None
    program.save(str(path), external_data=False)


def torch_logits(model: Any, encoded: list[Encoded], width: int, batch_size: int = 50) -> tuple[np.ndarray, np.ndarray]:
    """The reference: PyTorch on batches in file order, all padded to one fixed width."""
    import torch

    from textsieve.exporter.model import ExportGraph

    graph = ExportGraph(model).eval()
    logits, positions = [], []
    with torch.inference_mode():
        for lo in range(0, len(encoded), batch_size):
            chunk = encoded[lo : lo + batch_size]
            ids = torch.zeros((len(chunk), width), dtype=torch.long)
            for i, e in enumerate(chunk):
                ids[i, : len(e.ids)] = torch.tensor(e.ids, dtype=torch.long)
            lengths = torch.tensor([len(e.ids) for e in chunk], dtype=torch.long)
            lg, _, pos, _ = graph(ids, lengths)
            logits.append(lg.numpy())
            positions.append(pos.numpy())
    return np.concatenate(logits).astype(np.float64), np.concatenate(positions)


def _predictor(model_path: Path, info: RunInfo, vocab: Vocabulary, temperature: float = 1.0) -> Predictor:
    return Predictor(
        model_path,
        labels=info.labels,
        temperature=temperature,
        tokenizer=Tokenizer(info.tokenizer),
        vocab=vocab,
        max_length=info.lengths.max_length,
        min_length=info.lengths.min_length,
        filter_widths=info.architecture.filter_widths(),
    )


def export(
    run_dir: Path,
    out: Path,
    *,
    tolerance: float = 1e-4,
    test: Path | None = None,
    layout: str = "auto",
    log: Any = print,
) -> Manifest:
    """Write ``out``, a bundle of ``run_dir``'s model; nothing is written when parity fails."""
    if not tolerance > 0:  # 0, negative or NaN: no graph could pass, so it is a mistyped flag
        raise InputError(f"--tolerance {tolerance}: must be a positive number, e.g. 1e-4")
    sources = read_sources(run_dir, test)
    _check_out(out)
    run = sources.run
    chosen = choose_layout(run.model, layout)
    with atomic_directory(out, replace=True) as tmp:
        log(f"exporting to ONNX ({chosen} layout) …")
        ort = write_graph(tmp, run, chosen)
        valid = [ort.encode(e.text) for e in sources.valid]
        targets = _targets(sources.valid, run.info.labels)
        log(f"checking parity and calibrating on {len(valid)} validation texts …")
        ref_logits, ref_positions = torch_logits(run.model, valid, run.info.lengths.max_length)
        calibration = calibrate(ref_logits, targets)
        ort.temperature = calibration.temperature
        parity, got = check_parity(ort, valid, ref_logits, ref_positions, tolerance)
        _print_parity(parity, calibration, log)
        _require_parity(parity)
        metrics = held_out_metrics(ort, sources, targets, got.logits)
        draft = describe_bundle(run, chosen, calibration, parity, metrics)
        draft = draft.model_copy(update={"drift": drift_baseline(ort, valid, got.logits)})
        manifest = write_manifest(tmp, draft)
    return manifest


@dataclass(frozen=True)
class Sources:
    """What an export reads: the run, its validation rows and the held-out rows for the metrics."""

    run: LoadedRun
    valid: list[Example]
    test: Path | None
    held_out: list[Example]  # the validation rows unless a test file was given


def read_sources(run_dir: Path, test: Path | None) -> Sources:
    run = load_run(run_dir)
    labels = run.info.labels
    valid_path = Path(run_dir) / VALID_JSONL
    valid = load_examples(valid_path)
    _check_valid_labels(valid, labels, valid_path)
    if test is None:
        return Sources(run, valid, None, valid)
    held_out = load_examples(test, run.info.training.text_field, run.info.training.label_field)
    unseen = sorted({e.label for e in held_out} - set(labels))
    if unseen:
        raise InputError(
            f"{test}: labels not known to the model: {', '.join(name_unknown(x, labels) for x in unseen)}; "
            f"allowed: {', '.join(labels)}"
        )
    return Sources(run, valid, Path(test), held_out)


def _check_valid_labels(valid: list[Example], labels: list[str], path: Path) -> None:
    """Every validation row's label is one of the model's: calibration and parity score them all."""
    known = set(labels)
    row = next((i for i, e in enumerate(valid) if e.label not in known), None)
    if row is None:
        return
    # load_examples gives one example for each non-blank line of a JSON Lines file, in order.
    lines = [n for n, line in enumerate(path.read_text(encoding="utf-8").split("\n"), start=1) if line.strip()]
    raise InputError(
        f"{path}: line {lines[row]}: the label {name_unknown(valid[row].label, labels)} is not one the model knows "
        f"({', '.join(labels)}); remove the row, or train again on data that has the label"
    )


def _check_out(out: Path) -> None:
    """``out`` may become a bundle folder: absent, empty, or a previous bundle to replace."""
    try:
        str(out).encode("utf-8")
    except UnicodeEncodeError:
        shown = os.fsencode(out).decode("utf-8", "backslashreplace")
        raise InputError(
            f"--out {shown}: the path is not valid UTF-8; onnxruntime opens the model by its name, "
            "which must be UTF-8 text: name the bundle folder in UTF-8"
        ) from None
    check_out_folder(out, kind="bundle", previous=MANIFEST)


def _targets(examples: list[Example], labels: list[str]) -> np.ndarray:
    index = {name: i for i, name in enumerate(labels)}
    return np.array([index[e.label] for e in examples], dtype=np.int64)


def write_graph(folder: Path, run: LoadedRun, layout: GraphLayout) -> Predictor:
    """model.onnx and vocab.txt into ``folder``; returns onnxruntime on that graph (temperature 1)."""
    export_onnx(run.model, folder / MODEL_FILE, run.info.lengths.min_length, layout)
    atomic_write_text(folder / VOCAB_FILE, run.vocabulary.dumps())
    return _predictor(folder / MODEL_FILE, run.info, run.vocabulary)


def calibrate(logits: np.ndarray, targets: np.ndarray) -> CalibrationInfo:
    """Temperature scaling on validation (Guo et al., 2017): T minimises the NLL of softmax(z / T).

    When every validation text's own class has the strictly largest logit, the NLL falls towards 0 as
    T → 0 and has no minimum: the search stopped at its bound, T = 0.05, which multiplied every logit
    by 20 and served probabilities near 1 for the texts the model gets wrong too (3 easy validation
    texts were enough). Such a set says nothing about how confident the model should be, so T stays 1:
    the trained model's own probabilities (:func:`temperature_fitted` tells the two apart).
    """
    temperature = 1.0 if separated(logits, targets) else measures.fit_temperature(logits, targets)
    return CalibrationInfo(
        temperature=temperature,
        texts=len(targets),
        nll_before=measures.nll(logits, targets),
        nll_after=measures.nll(logits, targets, temperature),
        ece_before=measures.expected_calibration_error(measures.softmax(logits), targets),
        ece_after=measures.expected_calibration_error(measures.softmax(logits, temperature), targets),
    )


def separated(logits: np.ndarray, targets: np.ndarray) -> bool:
    """Whether each row's target logit is strictly above all its others (then NLL(T) → 0 as T → 0)."""
    rows = np.arange(len(targets))
    own = logits[rows, targets]
    others = logits.copy()
    others[rows, targets] = -np.inf
    return bool(len(targets)) and bool((own > others.max(axis=1)).all())


def temperature_fitted(calibration: CalibrationInfo) -> bool:
    """False when :func:`calibrate` kept T = 1 because the validation texts were all told apart."""
    return not (calibration.temperature == 1.0 and calibration.nll_after == calibration.nll_before)


def check_parity(
    ort: Predictor, encoded: list[Encoded], ref_logits: np.ndarray, ref_positions: np.ndarray, tolerance: float
) -> tuple[ParityReport, Outputs]:
    """onnxruntime on length-sorted batches padded to their own longest, against PyTorch on
    file-order batches padded to max_length; and a text alone against the same text in a batch."""
    ref_probs = measures.softmax(ref_logits, ort.temperature)
    got = ort.run(encoded)
    probs = ort.probabilities(got.logits)
    alone_diff = 0.0
    for e, row in zip(encoded[:INVARIANCE_TEXTS], range(INVARIANCE_TEXTS), strict=False):
        single = ort.run([e])
        alone_diff = max(alone_diff, float(np.abs(ort.probabilities(single.logits)[0] - probs[row]).max()))
    max_diff = float(np.abs(probs - ref_probs).max())
    label_agree = float((probs.argmax(1) == ref_probs.argmax(1)).mean())
    parity = ParityReport(
        texts=len(encoded),
        max_abs_prob_diff=max_diff,
        label_agreement=label_agree,
        position_agreement=float((got.positions == ref_positions).mean()),
        batch_invariance_max_diff=alone_diff,
        tolerance=tolerance,
        passed=bool(max_diff <= tolerance and label_agree == 1.0 and alone_diff <= tolerance),
    )
    return parity, got


def drift_baseline(ort: Predictor, encoded: list[Encoded], logits: np.ndarray) -> DriftBaseline:
    """The validation texts' drift signals, counted exactly as a serving replica counts live texts."""
    layout = Layout.of(len(ort.labels))
    return baseline(layout, count_encoded(layout, encoded, ort.probabilities(logits)), source="validation")


def _require_parity(parity: ParityReport) -> None:
    if not parity.passed:
        raise ParityError(
            f"parity check failed: max |Δprobability| {parity.max_abs_prob_diff:.2e} "
            f"(tolerance {parity.tolerance:.0e}), label agreement {parity.label_agreement:.2%}, "
            f"alone-vs-batched {parity.batch_invariance_max_diff:.2e}; no bundle written"
        )


def held_out_metrics(ort: Predictor, sources: Sources, valid_targets: np.ndarray, valid_logits: np.ndarray) -> Metrics:
    """Accuracy, macro-F1, ECE and NLL from the exported graph with calibrated probabilities."""
    if sources.test is None:
        split, targets, logits = "validation", valid_targets, valid_logits
    else:
        split = f"test:{sources.test.name}"
        targets = _targets(sources.held_out, sources.run.info.labels)
        logits = ort.run([ort.encode(e.text) for e in sources.held_out]).logits
    probs = ort.probabilities(logits)
    predicted = probs.argmax(1)
    return Metrics(
        split=split,
        texts=len(sources.held_out),
        accuracy=measures.accuracy(targets, predicted),
        macro_f1=measures.macro_f1(targets, predicted, len(sources.run.info.labels)),
        ece=measures.expected_calibration_error(probs, targets),
        nll=measures.nll(logits, targets, ort.temperature),
    )


_PLACEHOLDER_FILES = {MODEL_FILE: "0" * 64, VOCAB_FILE: "0" * 64, CARD_FILE: "0" * 64}


def describe_bundle(
    run: LoadedRun, layout: GraphLayout, calibration: CalibrationInfo, parity: ParityReport, metrics: Metrics
) -> Manifest:
    """The manifest with placeholder file hashes (the card is rendered from it before they are known)."""
    info, labels = run.info, run.info.labels
    return Manifest(
        labels=labels,
        tokenizer=info.tokenizer,
        vocabulary=VocabularyInfo(
            size=len(run.vocabulary), min_count=info.vocabulary.min_count, max_size=info.vocabulary.max_size
        ),
        lengths=info.lengths,
        architecture=info.architecture,
        onnx=OnnxInfo(
            opset=OPSET,
            layout=layout,
            inputs=[
                TensorInfo(name="token_ids", dtype="int64", shape=["batch", "seq"]),
                TensorInfo(name="lengths", dtype="int64", shape=["batch"]),
            ],
            outputs=[
                TensorInfo(name="logits", dtype="float32", shape=["batch", len(labels)]),
                TensorInfo(name="pooled", dtype="float32", shape=["batch", "filters"]),
                TensorInfo(name="positions", dtype="int64", shape=["batch", "filters"]),
                TensorInfo(name="contributions", dtype="float32", shape=["batch", "filters", len(labels)]),
            ],
        ),
        calibration=calibration,
        parity=parity,
        metrics=metrics,
        training=info.training.record(),
        tool_version=__version__,
        created_at=dt.datetime.now(dt.UTC).replace(microsecond=0).isoformat(),
        files=_PLACEHOLDER_FILES,
        drift=None,  # added by export() once the validation texts are scored
    )


def write_manifest(folder: Path, draft: Manifest) -> Manifest:
    """card.md from the draft, then manifest.json with every file's sha256, after the graph's own check."""
    from textsieve.exporter.card import render_card

    atomic_write_text(folder / CARD_FILE, render_card(draft))
    files = {name: sha256_file(folder / name) for name in (MODEL_FILE, VOCAB_FILE, CARD_FILE)}
    manifest = Manifest.model_validate(draft.model_dump() | {"files": files})
    check_graph(folder, manifest)
    atomic_write_text(folder / MANIFEST, manifest_json(manifest))
    return manifest


def _temperature_note(cal: CalibrationInfo) -> str:
    if not temperature_fitted(cal):
        return "  (not fitted: every validation text is classified correctly)"
    bound = measures.temperature_bound(cal.temperature)
    if bound == "upper":
        return (
            "  (not a fit: the search stopped at its upper bound; the model's scores carry little information "
            "about the labels of these texts, so its probabilities are near uniform: see the card's Calibration)"
        )
    if bound == "lower":
        return (
            "  (not a fit: the search stopped at its lower bound; every logit is multiplied by 20 and "
            "probabilities sit near 0 or 1: see the card's Calibration)"
        )
    return ""


def _print_parity(parity: ParityReport, cal: CalibrationInfo, log: Any) -> None:
    rows = [
        ("texts compared", f"{parity.texts}"),
        (
            "max |Δprobability| (torch vs onnxruntime)",
            f"{parity.max_abs_prob_diff:.2e}  (tolerance {parity.tolerance:.0e})",
        ),
        ("label agreement", f"{parity.label_agreement:.2%}"),
        ("argmax-position agreement", f"{parity.position_agreement:.2%}"),
        ("alone vs batched, max |Δprobability|", f"{parity.batch_invariance_max_diff:.2e}"),
        ("temperature", f"{cal.temperature:.4f}" + _temperature_note(cal)),
        ("NLL before → after", f"{cal.nll_before:.4f} → {cal.nll_after:.4f}"),
        ("ECE before → after", f"{cal.ece_before:.4f} → {cal.ece_after:.4f}"),
        ("parity", "PASSED" if parity.passed else "FAILED"),
    ]
    width = max(len(r[0]) for r in rows)
    log("parity report")
    for name, value in rows:
        log(f"  {name:<{width}}  {value}")
