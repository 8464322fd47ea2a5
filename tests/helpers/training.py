"""How the suite trains tiny models: small enough to train in about a second on 2 cores.

``train_tiny``/``export_tiny`` (the session bundles in tests/conftest.py) go through the Python
API; the ``*_FLAGS`` lists are the same kind of settings for ``textsieve train`` on the command
line (tests/exporter). ``keyword_rows`` is invented data whose label shows in one keyword.
"""

from __future__ import annotations

import random
from pathlib import Path

# TrainConfig overrides for the session's tiny models.
TINY_CONFIG = dict(embedding_dim=16, maps=8, epochs=4, patience=2, batch_size=50)

# `textsieve train` flags: the model's shape and optimiser, then the same plus a small
# embedding and few epochs.
MODEL_FLAGS = ["--maps", "6", "--batch-size", "16", "--learning-rate", "0.01", "--quiet"]
TINY_FLAGS = [*MODEL_FLAGS, "--embedding-dim", "16", "--epochs", "4"]

_KEYS = {"billing": ["charged", "refund", "invoice", "fee"], "repair": ["broken", "flat", "chain", "brake"]}
_FILLER = ["the", "my", "bike", "today", "please", "again", "at", "dock", "hello", "since", "monday"]


def keyword_rows(n: int, seed: int) -> list[dict[str, str]]:
    """Invented help-desk lines, labels alternating, whose label shows in one keyword among filler words."""
    rng = random.Random(seed)
    rows = []
    for i in range(n):
        label = ("billing", "repair")[i % 2]
        words = rng.choices(_FILLER, k=rng.randint(2, 12))
        words.insert(rng.randint(0, len(words)), rng.choice(_KEYS[label]))
        rows.append({"text": " ".join(words).capitalize() + ".", "label": label})
    return rows


def train_tiny(data: Path, out: Path, *, seed: int, **overrides: object) -> Path:
    from textsieve.exporter.train import TrainConfig, train

    config = TrainConfig(
        data=data / "train.jsonl",
        out=out,
        valid=data / "valid.jsonl",
        seed=seed,
        quiet=True,
        **{**TINY_CONFIG, **overrides},  # type: ignore[arg-type]
    )
    return train(config)


def export_tiny(run: Path, out: Path) -> Path:
    from textsieve.exporter.export import export

    export(run, out, log=lambda *_: None)
    return out


__all__ = ["MODEL_FLAGS", "TINY_CONFIG", "TINY_FLAGS", "export_tiny", "keyword_rows", "train_tiny"]
