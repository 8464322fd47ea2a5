"""What a training run depends on: :class:`TrainConfig`, its defaults (Kim, 2014) and their checks.

Kept free of torch and numpy so the settings can be built and checked before anything heavy loads.
"""

from __future__ import annotations

import argparse
import math
from dataclasses import dataclass
from pathlib import Path
from typing import Any, Literal

from textsieve.errors import InputError

VectorsMode = Literal["static", "non-static"]

DEFAULT_EMBEDDING_DIM = 128  # must equal the CLI's --embedding-dim default (tested)
# Kim (2014), section 3.1 "Hyperparameters and Training": filter windows 3, 4, 5 with 100
# feature maps each, dropout rate 0.5, l2 constraint s = 3 on the weight vectors, mini-batch 50.
# Kim trained with Adadelta (Zeiler, 2012); we use Adam (Kingma & Ba, 2015) at 1e-3 instead,
# a default that needs no per-dataset tuning (common practice, not Kim's choice).
KIM_WIDTHS = (3, 4, 5)
KIM_MAPS = 100
KIM_DROPOUT = 0.5
KIM_MAX_NORM = 3.0
KIM_BATCH_SIZE = 50
ADAM_LEARNING_RATE = 1e-3
# Adam moves each weight by at most about the learning rate a step (Kingma & Ba, 2015, section
# 2.1, from memory); the embeddings start within ±0.25, so steps above 1 only wreck the weights,
# and steps near float32's limit overflow them (nan losses, or torch refusing the value outright).
MAX_LEARNING_RATE = 1.0


@dataclass(frozen=True)
class TrainConfig:
    """Everything a run depends on; mirrors the flags of ``textsieve train``."""

    data: Path
    out: Path
    valid: Path | None = None
    text_field: str = "text"
    label_field: str = "label"
    vectors: Path | None = None
    vectors_mode: VectorsMode = "non-static"
    embedding_dim: int = DEFAULT_EMBEDDING_DIM
    widths: tuple[int, ...] = KIM_WIDTHS
    maps: int = KIM_MAPS
    dropout: float = KIM_DROPOUT
    max_norm: float | None = KIM_MAX_NORM
    batch_size: int = KIM_BATCH_SIZE
    epochs: int = 20
    patience: int = 3
    learning_rate: float = ADAM_LEARNING_RATE
    min_count: int = 1
    max_vocab: int | None = 50000
    length_percentile: float = 99.0
    seed: int = 13
    quiet: bool = False

    @classmethod
    def from_args(cls, args: argparse.Namespace) -> TrainConfig:
        return cls(
            data=args.data,
            out=args.out,
            valid=args.valid,
            text_field=args.text_field,
            label_field=args.label_field,
            vectors=args.vectors,
            vectors_mode=args.vectors_mode,
            embedding_dim=args.embedding_dim,
            widths=parse_widths(args.widths),
            maps=args.maps,
            dropout=args.dropout,
            max_norm=None if args.max_norm == 0 else args.max_norm,
            batch_size=args.batch_size,
            epochs=args.epochs,
            patience=args.patience,
            learning_rate=args.learning_rate,
            min_count=args.min_count,
            max_vocab=args.max_vocab,
            length_percentile=args.length_percentile,
            seed=args.seed,
            quiet=args.quiet,
        )

    def check(self) -> None:
        """Refuse values that cannot train, naming the flag and its allowed range."""
        widths = self.widths
        if not widths or any(not 1 <= w <= 20 for w in widths) or len(set(widths)) != len(widths):
            raise InputError(
                f"--widths {','.join(map(str, widths))}: each filter width must be a different "
                "whole number from 1 to 20, e.g. 3,4,5"
            )
        rules: list[tuple[str, Any, bool, str]] = [
            ("--maps", self.maps, 1 <= self.maps <= 1000, "from 1 to 1000"),
            ("--dropout", self.dropout, 0 <= self.dropout < 1, "at least 0 and below 1"),
            (
                "--max-norm",
                self.max_norm,
                self.max_norm is None or 0 < self.max_norm < math.inf,
                "a positive number, or 0 for no constraint",
            ),
            ("--batch-size", self.batch_size, self.batch_size >= 1, "at least 1"),
            ("--epochs", self.epochs, self.epochs >= 1, "at least 1"),
            ("--patience", self.patience, self.patience >= 1, "at least 1"),
            (
                "--learning-rate",
                self.learning_rate,
                0 < self.learning_rate <= MAX_LEARNING_RATE,
                f"above 0 and at most {MAX_LEARNING_RATE:g} (Adam's step size; the default is {ADAM_LEARNING_RATE:g})",
            ),
            ("--min-count", self.min_count, self.min_count >= 1, "at least 1"),
            (
                "--max-vocab",
                self.max_vocab,
                self.max_vocab is None or self.max_vocab >= 3,
                "at least 3 (padding, unknown and one word)",
            ),
            (
                "--length-percentile",
                self.length_percentile,
                0 < self.length_percentile <= 100,
                "above 0 and at most 100",
            ),
            ("--embedding-dim", self.embedding_dim, 1 <= self.embedding_dim <= 2048, "from 1 to 2048"),
            ("--seed", self.seed, 0 <= self.seed < 2**32, "from 0 to 4294967295"),
        ]
        for flag, value, ok, allowed in rules:
            if not ok:
                raise InputError(f"{flag} {value} is out of range; it must be {allowed}")
        if self.text_field == self.label_field:
            # Each text would be its own label: a model that reads the answer (it trained to 100 % before
            # the split grouped copies; now every label is one text, which no split can hold out).
            raise InputError(
                f"--text-field and --label-field both name {self.text_field!r}; the model would read the label "
                "it is to predict: name the field that holds the text with --text-field"
            )
        if self.vectors_mode not in ("static", "non-static"):
            raise InputError(f"--vectors-mode {self.vectors_mode!r}: choose static or non-static")
        if self.vectors_mode == "static" and self.vectors is None:
            raise InputError(
                "--vectors-mode static needs --vectors: random embeddings must be trained (use non-static, the default)"
            )


def parse_widths(text: str) -> tuple[int, ...]:
    try:
        return tuple(int(part) for part in text.split(","))
    except ValueError:
        raise InputError(
            f"--widths {text!r}: give filter widths as whole numbers separated by commas, e.g. 3,4,5"
        ) from None


__all__ = [
    "ADAM_LEARNING_RATE",
    "DEFAULT_EMBEDDING_DIM",
    "KIM_BATCH_SIZE",
    "KIM_DROPOUT",
    "KIM_MAPS",
    "KIM_MAX_NORM",
    "KIM_WIDTHS",
    "MAX_LEARNING_RATE",
    "TrainConfig",
    "VectorsMode",
    "parse_widths",
]
