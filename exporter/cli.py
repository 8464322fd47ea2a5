"""The exporter's verbs of the ``textsieve`` command, ``train`` and ``export``, with their flags.

torch is imported inside the handlers: this module is imported whenever the command line is built,
also in a serving install that has no torch.
"""

from __future__ import annotations

import argparse
from pathlib import Path


def register(sub: argparse._SubParsersAction[argparse.ArgumentParser]) -> None:
    """Add ``train`` and ``export`` to the ``textsieve`` command."""
    p = sub.add_parser("train", help="train a convolutional text classifier")
    p.add_argument("data", type=Path, help="labelled JSONL or CSV file")
    p.add_argument("--out", type=Path, required=True, help="run folder to write")
    p.add_argument("--valid", type=Path, help="validation file (default: a seeded 10 %% split of DATA)")
    p.add_argument("--text-field", default="text", help="JSONL key or CSV column holding the text")
    p.add_argument("--label-field", default="label", help="JSONL key or CSV column holding the label")
    p.add_argument("--vectors", type=Path, help="pretrained vectors, GloVe/word2vec text format")
    p.add_argument(
        "--vectors-mode",
        choices=["static", "non-static"],
        default="non-static",
        help="keep pretrained vectors fixed (static) or fine-tune them (Kim, 2014)",
    )
    p.add_argument("--embedding-dim", type=int, default=128, help="embedding size without --vectors")
    p.add_argument("--widths", default="3,4,5", help="filter widths, comma separated (Kim, 2014)")
    p.add_argument("--maps", type=int, default=100, help="feature maps per width (Kim, 2014)")
    p.add_argument("--dropout", type=float, default=0.5, help="dropout before the output layer (Kim, 2014)")
    p.add_argument(
        "--max-norm", type=float, default=3.0, help="max L2 norm of each output weight row; 0: none (Kim, 2014)"
    )
    p.add_argument("--batch-size", type=int, default=50, help="texts per training step (Kim, 2014)")
    p.add_argument("--epochs", type=int, default=20, help="upper bound; early stopping on validation")
    p.add_argument("--patience", type=int, default=3, help="epochs without a better validation loss before stopping")
    p.add_argument("--learning-rate", type=float, default=1e-3, help="Adam's learning rate")
    p.add_argument("--min-count", type=int, default=1, help="fewest occurrences for a word to enter the vocabulary")
    p.add_argument("--max-vocab", type=int, default=50000, help="largest vocabulary, padding and unknown included")
    p.add_argument(
        "--length-percentile", type=float, default=99.0, help="truncation length: this percentile of training lengths"
    )
    p.add_argument("--seed", type=int, default=13, help="seed for the split, initial weights and batch order")
    p.add_argument("--quiet", action="store_true", help="no progress bar")
    p.set_defaults(func=_train)

    p = sub.add_parser("export", help="export a run to a parity-checked ONNX bundle")
    p.add_argument("run", type=Path, help="run folder written by 'textsieve train'")
    p.add_argument("--out", type=Path, required=True, help="bundle folder to write")
    p.add_argument("--tolerance", type=float, default=1e-4, help="max |Δprobability| torch vs ONNX")
    p.add_argument("--test", type=Path, help="held-out file for the manifest's metrics (default: validation)")
    p.add_argument(
        "--layout",
        choices=("auto", "tap-tables", "convolution"),
        default="auto",
        help="how the graph computes the convolution: precomputed per-word tap tables "
        "(fast; auto picks it when they fit in 256 MiB) or Conv over embeddings",
    )
    p.set_defaults(func=_export)


def _train(args: argparse.Namespace) -> int:
    from textsieve.exporter.train import cli_train

    return cli_train(args)


def _export(args: argparse.Namespace) -> int:
    from textsieve.exporter.export import cli_export

    return cli_export(args)


__all__ = ["register"]
