"""``textsieve export``: a trained run → a parity-checked, calibrated ONNX bundle."""

from __future__ import annotations

import argparse
import datetime as dt
import sys
from pathlib import Path
from typing import Any

import numpy as np

from textsieve import __version__
from textsieve.errors import InputError, ParityError
from textsieve.files import atomic_directory, atomic_write_text, sha256_file
from textsieve.registry import measures
from textsieve.registry.bundle import check_graph, manifest_json
from textsieve.registry.manifest import (
    CARD_FILE,
    INPUTS,
    MANIFEST,
    MODEL_FILE,
    OUTPUTS,
    VOCAB_FILE,
    Manifest,
    TensorInfo,
)
from textsieve.registry.runtime import Encoded, Predictor
from textsieve.registry.tokenizer import Tokenizer, Vocabulary

OPSET = 18  # the lowest opset torch's dynamo exporter writes
INVARIANCE_TEXTS = 64


LAYOUTS = ("auto", "tap-tables", "convolution")
TAP_TABLE_BUDGET = 256 * 2**20  # bytes; "auto" falls back to convolution above this


def choose_layout(model: Any, requested: str = "auto") -> str:
    """``tap-tables`` unless asked otherwise or its tables would exceed :data:`TAP_TABLE_BUDGET`."""
    from textsieve.exporter.model import tap_table_bytes

    if requested not in LAYOUTS:
        raise InputError(f"unknown layout {requested!r}; allowed: {', '.join(LAYOUTS)}")
    if requested != "auto":
        return requested
    return "tap-tables" if tap_table_bytes(model) <= TAP_TABLE_BUDGET else "convolution"


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


def _predictor(model_path: Path, run: dict[str, Any], vocab: Vocabulary, temperature: float = 1.0) -> Predictor:
    from textsieve.registry.manifest import ArchitectureInfo
    from textsieve.registry.tokenizer import TokenizerSpec

    arch = ArchitectureInfo.model_validate(run["architecture"])
    return Predictor(
        model_path,
        labels=run["labels"],
        temperature=temperature,
        tokenizer=Tokenizer(TokenizerSpec.model_validate(run["tokenizer"])),
        vocab=vocab,
        max_length=run["lengths"]["max_length"],
        min_length=run["lengths"]["min_length"],
        filter_widths=arch.filter_widths(),
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
    from textsieve.exporter.train import load_run
    from textsieve.labelled import load_examples

    model, vocab, run = load_run(run_dir)
    model.eval()
    labels: list[str] = run["labels"]
    label_index = {name: i for i, name in enumerate(labels)}
    valid = load_examples(Path(run_dir) / "valid.jsonl")
    if test is not None:
        held_out = load_examples(test, run["training"]["text_field"], run["training"]["label_field"])
        unseen = sorted({e.label for e in held_out} - set(labels))
        if unseen:
            raise InputError(
                f"{test}: labels not known to the model: {', '.join(unseen)}; allowed: {', '.join(labels)}"
            )
    else:
        held_out = valid
    if out.exists() and not (out / MANIFEST).is_file() and any(out.iterdir()):
        raise InputError(f"{out}: exists and is not a bundle; choose an empty or new folder")

    layout = choose_layout(model, layout)
    with atomic_directory(out, replace=True) as tmp:
        log(f"exporting to ONNX ({layout} layout) …")
        export_onnx(model, tmp / MODEL_FILE, run["lengths"]["min_length"], layout)
        atomic_write_text(tmp / VOCAB_FILE, vocab.dumps())
        ort = _predictor(tmp / MODEL_FILE, run, vocab)
        enc_valid = [ort.encode(e.text) for e in valid]
        targets = np.array([label_index[e.label] for e in valid], dtype=np.int64)

        # Calibration on validation (Guo et al., 2017): T minimises NLL of softmax(z / T).
        log(f"checking parity and calibrating on {len(valid)} validation texts …")
        ref_logits, ref_pos = torch_logits(model, enc_valid, run["lengths"]["max_length"])
        temperature = measures.fit_temperature(ref_logits, targets)
        p_before = measures.softmax(ref_logits)
        ref_probs = measures.softmax(ref_logits, temperature)
        calibration = {
            "temperature": temperature,
            "texts": len(valid),
            "nll_before": measures.nll(ref_logits, targets),
            "nll_after": measures.nll(ref_logits, targets, temperature),
            "ece_before": measures.expected_calibration_error(p_before, targets),
            "ece_after": measures.expected_calibration_error(ref_probs, targets),
        }

        # Parity: onnxruntime on length-sorted batches padded to their own longest, against
        # PyTorch on file-order batches padded to max_length.
        ort.temperature = temperature
        got = ort.run(enc_valid)
        probs = ort.probabilities(got.logits)
        alone_diff = 0.0
        for e, row in zip(enc_valid[:INVARIANCE_TEXTS], range(INVARIANCE_TEXTS), strict=False):
            single = ort.run([e])
            alone_diff = max(alone_diff, float(np.abs(ort.probabilities(single.logits)[0] - probs[row]).max()))
        max_diff = float(np.abs(probs - ref_probs).max())
        label_agree = float((probs.argmax(1) == ref_probs.argmax(1)).mean())
        pos_agree = float((got.positions == ref_pos).mean())
        parity = {
            "texts": len(valid),
            "max_abs_prob_diff": max_diff,
            "label_agreement": label_agree,
            "position_agreement": pos_agree,
            "batch_invariance_max_diff": alone_diff,
            "tolerance": tolerance,
            "passed": bool(max_diff <= tolerance and label_agree == 1.0 and alone_diff <= tolerance),
        }
        _print_parity(parity, calibration, log)
        if not parity["passed"]:
            raise ParityError(
                f"parity check failed: max |Δprobability| {max_diff:.2e} (tolerance {tolerance:.0e}), "
                f"label agreement {label_agree:.2%}, alone-vs-batched {alone_diff:.2e}; no bundle written"
            )

        # Held-out metrics, from the exported graph with calibrated probabilities.
        enc_held = enc_valid if test is None else [ort.encode(e.text) for e in held_out]
        held_targets = targets if test is None else np.array([label_index[e.label] for e in held_out])
        held_logits = got.logits if test is None else ort.run(enc_held).logits
        held_probs = ort.probabilities(held_logits)
        predicted = held_probs.argmax(1)
        metric_block = {
            "split": "validation" if test is None else f"test:{Path(test).name}",
            "texts": len(held_out),
            "accuracy": measures.accuracy(held_targets, predicted),
            "macro_f1": measures.macro_f1(held_targets, predicted, len(labels)),
            "ece": measures.expected_calibration_error(held_probs, held_targets),
            "nll": measures.nll(held_logits, held_targets, temperature),
        }

        draft: dict[str, Any] = {
            "labels": labels,
            "tokenizer": run["tokenizer"],
            "vocabulary": {"size": len(vocab), **{k: v for k, v in run["vocabulary"].items() if k != "size"}},
            "lengths": run["lengths"],
            "architecture": run["architecture"],
            "onnx": {
                "opset": OPSET,
                "layout": layout,
                "inputs": [
                    TensorInfo(name="token_ids", dtype="int64", shape=["batch", "seq"]),
                    TensorInfo(name="lengths", dtype="int64", shape=["batch"]),
                ],
                "outputs": [
                    TensorInfo(name="logits", dtype="float32", shape=["batch", len(labels)]),
                    TensorInfo(name="pooled", dtype="float32", shape=["batch", "filters"]),
                    TensorInfo(name="positions", dtype="int64", shape=["batch", "filters"]),
                    TensorInfo(name="contributions", dtype="float32", shape=["batch", "filters", len(labels)]),
                ],
            },
            "calibration": calibration,
            "parity": parity,
            "metrics": metric_block,
            "training": {k: v for k, v in run["training"].items() if k != "history"},
            "tool_version": __version__,
            "created_at": dt.datetime.now(dt.UTC).replace(microsecond=0).isoformat(),
        }
        placeholder = {MODEL_FILE: "0" * 64, VOCAB_FILE: "0" * 64, CARD_FILE: "0" * 64}
        from textsieve.exporter.card import render_card

        card = render_card(Manifest.model_validate({**draft, "files": placeholder}))
        atomic_write_text(tmp / CARD_FILE, card)
        files = {name: sha256_file(tmp / name) for name in (MODEL_FILE, VOCAB_FILE, CARD_FILE)}
        manifest = Manifest.model_validate({**draft, "files": files})
        check_graph(tmp, manifest)
        atomic_write_text(tmp / MANIFEST, manifest_json(manifest))
    return manifest


def _print_parity(parity: dict[str, Any], cal: dict[str, Any], log: Any) -> None:
    rows = [
        ("texts compared", f"{parity['texts']}"),
        (
            "max |Δprobability| (torch vs onnxruntime)",
            f"{parity['max_abs_prob_diff']:.2e}  (tolerance {parity['tolerance']:.0e})",
        ),
        ("label agreement", f"{parity['label_agreement']:.2%}"),
        ("argmax-position agreement", f"{parity['position_agreement']:.2%}"),
        ("alone vs batched, max |Δprobability|", f"{parity['batch_invariance_max_diff']:.2e}"),
        ("temperature", f"{cal['temperature']:.4f}"),
        ("NLL before → after", f"{cal['nll_before']:.4f} → {cal['nll_after']:.4f}"),
        ("ECE before → after", f"{cal['ece_before']:.4f} → {cal['ece_after']:.4f}"),
        ("parity", "PASSED" if parity["passed"] else "FAILED"),
    ]
    width = max(len(r[0]) for r in rows)
    log("parity report")
    for name, value in rows:
        log(f"  {name:<{width}}  {value}")


def cli_export(args: argparse.Namespace) -> int:
    def log(msg: str) -> None:
        print(msg, file=sys.stderr if msg.endswith("…") else sys.stdout, flush=True)

    manifest = export(args.run, args.out, tolerance=args.tolerance, test=args.test, layout=args.layout, log=log)
    m = manifest.metrics
    print(f"bundle written to {args.out} ({m.split}: accuracy {m.accuracy:.4f}, macro-F1 {m.macro_f1:.4f})")
    return 0
