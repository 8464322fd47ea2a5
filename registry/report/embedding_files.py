"""The embedding record a training run leaves in its run folder, read without torch.

``textsieve train`` writes ``embeddings.npz`` beside ``model.pt`` so the evaluation report can
show how word vectors moved without loading the weights file (which needs torch). It holds:

    trained      float32 [vocab, dim]   the kept epoch's embedding matrix, rows in vocab.txt order
    start_ids    int64   [found]        vocabulary ids that started from a pretrained vector
    start        float32 [found, dim]   those starting vectors (only the kept vocabulary's rows)
    vectors_mode str                    "static", "non-static", or "" without pretrained vectors

Only the run folder holds it: the serving bundle stays as it was. It costs two float32 rows per
kept word at most, far less than the vectors file it came from.
"""

from __future__ import annotations

import json
import zipfile
from dataclasses import dataclass
from pathlib import Path
from typing import TYPE_CHECKING, Any

import numpy as np
from numpy.typing import NDArray

from textsieve.errors import BundleError, InputError
from textsieve.registry.tokenizer import Vocabulary

if TYPE_CHECKING:
    from textsieve.registry.bundle import Bundle

EMBEDDINGS_NPZ = "embeddings.npz"
VOCAB_TXT = "vocab.txt"
RUN_JSON = "run.json"  # exporter/run_folder.py's name: read here as plain JSON (the exporter needs torch)


@dataclass(frozen=True)
class RunEmbeddings:
    """One run's vocabulary, trained matrix and (when it had them) starting pretrained vectors."""

    vocabulary: Vocabulary
    trained: NDArray[np.float32]
    start_ids: NDArray[np.int64]
    start: NDArray[np.float32]
    vectors_mode: str


def embedding_arrays(
    trained: NDArray[np.float32], start_ids: NDArray[np.int64] | None, start: NDArray[np.float32] | None, mode: str
) -> dict[str, NDArray[np.generic]]:
    """The arrays ``embeddings.npz`` holds, in the types the reader checks."""
    dim = trained.shape[1]
    return {
        "trained": np.ascontiguousarray(trained, dtype=np.float32),
        "start_ids": np.asarray(start_ids if start_ids is not None else np.zeros(0), dtype=np.int64),
        "start": np.asarray(start if start is not None else np.zeros((0, dim)), dtype=np.float32),
        "vectors_mode": np.array(mode),
    }


def read_run_embeddings(run_dir: Path) -> RunEmbeddings:
    """The record of ``run_dir``; an :class:`InputError` with one line saying what is missing."""
    run_dir = Path(run_dir)
    path = run_dir / EMBEDDINGS_NPZ
    if not path.is_file():
        raise InputError(
            f"{path}: missing; runs trained before the embedding record existed have none (train again to get it)"
        )
    try:
        vocabulary = Vocabulary.load(run_dir / VOCAB_TXT)
        with np.load(path, allow_pickle=False) as npz:
            trained = np.asarray(npz["trained"], dtype=np.float32)
            start_ids = np.asarray(npz["start_ids"], dtype=np.int64)
            start = np.asarray(npz["start"], dtype=np.float32)
            mode = str(npz["vectors_mode"])
    except (OSError, KeyError, ValueError, BundleError, zipfile.BadZipFile) as exc:
        raise InputError(f"{path}: not a readable embedding record ({exc})") from None
    if trained.ndim != 2 or trained.shape[0] != len(vocabulary):
        raise InputError(f"{path}: holds {trained.shape[0]} rows but vocab.txt has {len(vocabulary)} tokens")
    if start.shape != (start_ids.shape[0], trained.shape[1]) or (start_ids.size and start_ids.max() >= len(vocabulary)):
        raise InputError(f"{path}: starting vectors do not match the trained matrix")
    return RunEmbeddings(vocabulary, trained, start_ids, start, mode)


def _listed(items: list[str]) -> str:
    shown = ", ".join(map(repr, items[:5]))
    return shown + (f", … ({len(items):,} in all)" if len(items) > 5 else "")


def run_difference(run_dir: Path, bundle: Bundle) -> str | None:
    """What ``run_dir`` records that differs from the bundle a version holds, or None when they agree.

    Compared: the labels and the training record (data sha256, seed, epochs, …) of run.json with the
    manifest's, which the export copied from it, and the tokens of vocab.txt with the bundle's. What
    the folder lacks is not compared here (the embedding section says it is missing)."""
    manifest = bundle.manifest
    try:
        info: Any = json.loads((Path(run_dir) / RUN_JSON).read_text(encoding="utf-8"))
    except (OSError, ValueError):
        info = None
    if isinstance(info, dict):
        labels = info.get("labels")
        if isinstance(labels, list) and labels != manifest.labels:
            return f"its labels are {_listed(labels)}, the version's {_listed(manifest.labels)}"
        training = info.get("training")
        if isinstance(training, dict):
            recorded = manifest.training.model_dump()
            for key, value in recorded.items():
                if key in training and training[key] != value:
                    return f"its training {key} is {training[key]!r}, the version's {value!r}"
    try:
        tokens = Vocabulary.load(Path(run_dir) / VOCAB_TXT).tokens
        theirs = Vocabulary.load(bundle.path / manifest.vocabulary.file).tokens
    except (OSError, BundleError, ValueError):
        return None
    if tokens != theirs:
        if len(tokens) != len(theirs):
            return f"its vocabulary has {len(tokens):,} tokens, the version's {len(theirs):,}"
        first = next(i for i, (a, b) in enumerate(zip(tokens, theirs, strict=True)) if a != b)
        return f"its vocabulary's token {first} is {tokens[first]!r}, the version's {theirs[first]!r}"
    return None


__all__ = ["EMBEDDINGS_NPZ", "RunEmbeddings", "embedding_arrays", "read_run_embeddings", "run_difference"]
