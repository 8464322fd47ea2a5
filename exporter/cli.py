"""The exporter's verbs, ``textsieve train`` and ``textsieve export``: their flags and their handlers.

Importing this module must stay cheap and torch-free: the top-level parser is built from it in
a serving install too, where these verbs only say which extras to install.
"""

from __future__ import annotations

import argparse
import contextlib
import sys
from collections.abc import Iterator
from pathlib import Path
from typing import TYPE_CHECKING, TypeVar

from textsieve.errors import TextsieveError
from textsieve.labelled import FILE_HELP

if TYPE_CHECKING:
    from textsieve.exporter.run_folder import RunInfo

# Modules that only the training extras install; a missing one means `pip install textsieve[train]`.
_TRAINING_EXTRAS = ("torch", "onnxscript", "tqdm")

# The top-level parser's own subclass; _SubParsersAction is invariant in it, hence a type variable.
_Parser = TypeVar("_Parser", bound=argparse.ArgumentParser)


def register(sub: argparse._SubParsersAction[_Parser]) -> None:
    """Add the ``train`` and ``export`` sub-commands to the top-level parser."""
    _add_train(sub)
    _add_export(sub)


def _add_train(sub: argparse._SubParsersAction[_Parser]) -> None:
    p = sub.add_parser(
        "train",
        help="train a convolutional text classifier",
        description="Train a convolutional text classifier (Kim, 2014) on a labelled file and write a run folder.",
    )
    p.add_argument("data", type=Path, help=FILE_HELP)
    p.add_argument("--out", type=Path, required=True, help="run folder to write (a previous run there is replaced)")
    p.add_argument("--valid", type=Path, help="validation file; without it a seeded 10 %% of DATA is held out")
    p.add_argument("--text-field", default="text", help="the JSON field or CSV/TSV column holding the text")
    p.add_argument("--label-field", default="label", help="the JSON field or CSV/TSV column holding the label")
    p.add_argument("--vectors", type=Path, help="pretrained vectors, GloVe/word2vec text format")
    p.add_argument(
        "--vectors-mode",
        choices=["static", "non-static"],
        default="non-static",
        help="static keeps the pretrained vectors fixed, non-static fine-tunes them (Kim, 2014)",
    )
    p.add_argument(
        "--embedding-dim", type=int, default=128, help="embedding size without --vectors (with them: their dimension)"
    )
    p.add_argument("--widths", default="3,4,5", help="filter widths, comma separated (Kim, 2014)")
    p.add_argument("--maps", type=int, default=100, help="feature maps per width (Kim, 2014)")
    p.add_argument("--dropout", type=float, default=0.5, help="dropout rate on the pooled features (Kim, 2014)")
    p.add_argument(
        "--max-norm", type=float, default=3.0, help="l2 limit on each output weight row, 0 for none (Kim, 2014)"
    )
    p.add_argument("--batch-size", type=int, default=50, help="texts per training batch")
    p.add_argument("--epochs", type=int, default=20, help="upper bound; early stopping on validation")
    p.add_argument(
        "--patience", type=int, default=3, help="epochs without a better validation loss before training stops"
    )
    p.add_argument("--learning-rate", type=float, default=1e-3, help="Adam's step size")
    p.add_argument(
        "--min-count", type=int, default=1, help="times a word must occur in the training texts to get its own id"
    )
    p.add_argument(
        "--max-vocab", type=int, default=50000, help="vocabulary size limit, padding and unknown tokens included"
    )
    p.add_argument(
        "--length-percentile",
        type=float,
        default=99.0,
        help="max_length is this percentile of the training texts' token counts; longer texts are truncated",
    )
    p.add_argument("--seed", type=int, default=13, help="seed of the validation split, the weights and the batch order")
    p.add_argument("--quiet", action="store_true", help="no progress bar")
    p.set_defaults(func=cli_train)


def _add_export(sub: argparse._SubParsersAction[_Parser]) -> None:
    p = sub.add_parser(
        "export",
        help="export a run to a parity-checked ONNX bundle",
        description="Export a run folder to an ONNX bundle, calibrated and checked against PyTorch "
        "(exit status 1 and no bundle when the parity check fails).",
    )
    p.add_argument("run", type=Path, help="run folder written by 'textsieve train'")
    p.add_argument(
        "--out", type=Path, required=True, help="bundle folder to write (a previous bundle there is replaced)"
    )
    p.add_argument("--tolerance", type=float, default=1e-4, help="max |Δprobability| torch vs ONNX")
    p.add_argument(
        "--test",
        type=Path,
        help="held-out labelled file for the manifest's metrics; without it the validation rows are used",
    )
    p.add_argument(
        "--layout",
        choices=("auto", "tap-tables", "convolution"),
        default="auto",
        help="how the graph computes the convolution: precomputed per-word tap tables "
        "(fast; auto picks it when they fit in 256 MiB) or Conv over embeddings",
    )
    p.set_defaults(func=cli_export)


@contextlib.contextmanager
def _training_extras(verb: str) -> Iterator[None]:
    """Turn a missing training dependency into one line saying what to install."""
    try:
        yield
    except ModuleNotFoundError as exc:
        if (exc.name or "").split(".")[0] in _TRAINING_EXTRAS:
            raise TextsieveError(f"'{verb}' needs the training extras: pip install 'textsieve[train]'") from exc
        raise


def cli_train(args: argparse.Namespace) -> int:
    with _training_extras("train"):
        from textsieve.exporter.run_folder import read_run_info
        from textsieve.exporter.train import TrainConfig, train

        out = train(TrainConfig.from_args(args))
        print(summary(read_run_info(out), out))
    return 0


def cli_export(args: argparse.Namespace) -> int:
    def log(msg: str) -> None:
        print(msg, file=sys.stderr if msg.endswith("…") else sys.stdout, flush=True)

    with _training_extras("export"):
        from textsieve.exporter.export import export

        manifest = export(args.run, args.out, tolerance=args.tolerance, test=args.test, layout=args.layout, log=log)
    m = manifest.metrics
    print(f"bundle written to {args.out} ({m.split}: accuracy {m.accuracy:.4f}, macro-F1 {m.macro_f1:.4f})")
    return 0


def summary(info: RunInfo, out: Path) -> str:
    """A few lines a person reads after training."""
    from textsieve.exporter.card import tokens, truncation_rule

    lengths, training, vocabulary = info.lengths, info.training, info.vocabulary
    lines = [
        f"run folder   {out}",
        f"labels       {len(info.labels)}: {', '.join(info.labels)}",
        f"texts        {training.rows:,} training, {training.valid_rows:,} validation",
        f"vocabulary   {vocabulary.size:,} tokens (min count {vocabulary.min_count})",
        f"max_length   {tokens(lengths.max_length)} ({truncation_rule(lengths)}); "
        f"truncates {lengths.truncation_rate:.1%} of training texts",
    ]
    if (v := info.architecture.vectors) is not None:
        lines.append(f"vectors      {v.found:,} of {vocabulary.size - 2:,} words found, {v.dim} dimensions, {v.mode}")
    lines += [
        f"best epoch   {training.best_epoch} of {training.epochs} run",
        f"validation   accuracy {info.best.valid_accuracy:.3f}, loss {info.best.valid_loss:.4f}",
    ]
    return "\n".join(lines)


__all__ = ["cli_export", "cli_train", "register", "summary"]
