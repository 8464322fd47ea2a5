"""The run folder ``textsieve train`` writes and ``textsieve export`` reads.

    RUN/
      run.json      RunInfo: labels, tokenizer, vocabulary, lengths, architecture, training, tool_version,
                    and files: the sha256 of model.pt, vocab.txt and valid.jsonl, checked on load
      model.pt      the best epoch's weights (a torch state dict)
      vocab.txt     one token a line, padding and unknown first
      valid.jsonl   the validation rows, for the exporter's parity check and calibration
      embeddings.npz  trained embedding matrix and starting pretrained rows, for the evaluation
                    report (registry/report/embedding_files.py; never copied into a bundle)

The file names and run.json's keys are the format: folders written before :class:`RunInfo`
existed hold exactly these and still load. Reading run.json needs no torch; the weights do.
"""

from __future__ import annotations

import json
import pickle
from pathlib import Path
from typing import TYPE_CHECKING, Any, NamedTuple

from pydantic import BaseModel, ConfigDict, Field, ValidationError

from textsieve.errors import BundleError, InputError
from textsieve.files import atomic_directory, check_out_folder, sha256_file
from textsieve.labelled import Example, label_problem
from textsieve.registry.manifest import ArchitectureInfo, LengthInfo, TrainingInfo
from textsieve.registry.report.embedding_files import EMBEDDINGS_NPZ, embedding_arrays
from textsieve.registry.tokenizer import TokenizerSpec, Vocabulary

if TYPE_CHECKING:
    import torch

    from textsieve.exporter.model import SentenceCNN
    from textsieve.exporter.vectors import PretrainedVectors

RUN_JSON = "run.json"
MODEL_PT = "model.pt"
VOCAB_TXT = "vocab.txt"
VALID_JSONL = "valid.jsonl"
RUN_KEYS = ("labels", "tokenizer", "vocabulary", "lengths", "architecture", "training", "tool_version")
CHECKED_FILES = (MODEL_PT, VOCAB_TXT, VALID_JSONL)  # what the export reads besides run.json


class Epoch(BaseModel):
    """One epoch of the training history."""

    model_config = ConfigDict(extra="forbid", frozen=True)

    epoch: int = Field(ge=1)
    train_loss: float
    valid_loss: float
    valid_accuracy: float


class RunVocabulary(BaseModel):
    """How the vocabulary was built; the tokens themselves are in vocab.txt."""

    model_config = ConfigDict(extra="forbid", frozen=True)

    size: int = Field(ge=2)
    min_count: int = Field(ge=1)
    max_size: int | None = None


class RunTraining(TrainingInfo):
    """The bundle's training record plus the per-epoch history (kept in the run folder only)."""

    history: list[Epoch]

    def record(self) -> TrainingInfo:
        """What the bundle's manifest keeps of it: everything but the history."""
        return TrainingInfo.model_validate(self.model_dump(exclude={"history"}))


class RunInfo(BaseModel):
    """run.json."""

    # Unknown top-level keys were always tolerated; the sections themselves are strict.
    model_config = ConfigDict(extra="ignore", frozen=True)

    labels: list[str]
    tokenizer: TokenizerSpec
    vocabulary: RunVocabulary
    lengths: LengthInfo
    architecture: ArchitectureInfo
    training: RunTraining
    tool_version: str
    # sha256 of the files the export reads (model.pt, vocab.txt, valid.jsonl); folders written before
    # it was recorded have none and load unchecked.
    files: dict[str, str] | None = None

    @property
    def best(self) -> Epoch:
        """The history line of the epoch whose weights were kept."""
        return self.training.history[self.training.best_epoch - 1]


class LoadedRun(NamedTuple):
    """A run read back: the model in eval mode, its vocabulary and run.json."""

    model: SentenceCNN
    vocabulary: Vocabulary
    info: RunInfo


def is_run_dir(path: Path) -> bool:
    return (path / RUN_JSON).is_file()


def check_out(out: Path) -> None:
    """``out`` may become a run folder: absent, empty, or a previous run to replace."""
    check_out_folder(out, kind="run", previous=RUN_JSON)


def write_run(
    out: Path,
    info: RunInfo,
    state: dict[str, torch.Tensor],
    vocabulary: Vocabulary,
    valid: list[Example],
    *,
    start: PretrainedVectors | None = None,
) -> None:
    """Build the folder beside ``out`` and rename it into place, so no reader sees half a run.

    ``start``: the pretrained rows the embedding began from, recorded with the trained matrix
    in embeddings.npz so the evaluation report can show how the vectors moved.
    """
    import numpy as np
    import torch

    valid_lines = "".join(json.dumps({"text": e.text, "label": e.label}, ensure_ascii=False) + "\n" for e in valid)
    files = {VOCAB_TXT: vocabulary.dumps(), VALID_JSONL: valid_lines}
    try:
        with atomic_directory(out, replace=True) as tmp:
            torch.save(state, tmp / MODEL_PT)
            vectors = info.architecture.vectors
            arrays = embedding_arrays(
                state["embedding.weight"].detach().cpu().numpy(),
                None if start is None else start.ids,
                None if start is None else start.matrix,
                "" if vectors is None else vectors.mode,
            )
            np.savez(tmp / EMBEDDINGS_NPZ, allow_pickle=False, **arrays)
            for name, text in files.items():
                (tmp / name).write_bytes(text.encode("utf-8"))
            # run.json last, with the digests of what it describes: an edited, truncated or swapped file is
            # then named by the export instead of becoming a bundle that passes parity with the wrong data.
            digests = {name: sha256_file(tmp / name) for name in CHECKED_FILES}
            run_json = json.dumps(info.model_copy(update={"files": digests}).model_dump(), indent=2, ensure_ascii=False)
            (tmp / RUN_JSON).write_bytes((run_json + "\n").encode("utf-8"))
            check_out(out)  # again: something may have appeared there while we trained
    except OSError as exc:
        raise InputError(f"--out {out}: cannot write the run folder ({exc.strerror or exc})") from exc


def read_run_info(run_dir: Path) -> RunInfo:
    """run.json, checked against the format; any problem names the file."""
    path = Path(run_dir) / RUN_JSON
    if not Path(run_dir).is_dir():
        raise InputError(f"{run_dir}: no such run folder; give the --out folder of 'textsieve train'")
    try:
        run = json.loads(path.read_text(encoding="utf-8"))
    except FileNotFoundError:
        raise InputError(f"{path}: missing; {run_dir} is not a run folder written by 'textsieve train'") from None
    except (OSError, UnicodeDecodeError, json.JSONDecodeError) as exc:
        raise InputError(f"{path}: cannot be read as JSON ({exc})") from None
    if not isinstance(run, dict):
        raise InputError(f"{path}: must hold a JSON object with keys {', '.join(RUN_KEYS)}")
    missing = [k for k in RUN_KEYS if k not in run]
    if missing:
        raise InputError(f"{path}: missing key(s) {', '.join(missing)}; a run.json has {', '.join(RUN_KEYS)}")
    _check_labels(run["labels"], path)
    try:
        return RunInfo.model_validate(run)
    except ValidationError as exc:
        first = exc.errors()[0]
        where = ".".join(str(p) for p in first["loc"])
        raise InputError(f"{path}: {where}: {first['msg']}") from None


def _check_labels(labels: Any, path: Path) -> None:
    if (
        not isinstance(labels, list)
        or len(labels) < 2
        or len(set(map(str, labels))) != len(labels)
        or not all(isinstance(x, str) and x.strip() for x in labels)
    ):
        raise InputError(f"{path}: 'labels' must be a list of at least 2 distinct non-empty strings")
    for label in labels:  # a run trained before labels were held to the whole rule
        problem = label_problem(label)
        if problem is not None:
            raise InputError(f"{path}: the label {label!r} {problem}; train again with the label renamed")


def load_run(run_dir: Path) -> LoadedRun:
    """The trained model (eval mode), its vocabulary and run.json, from a run folder."""
    import torch

    from textsieve.exporter.model import SentenceCNN

    run_dir = Path(run_dir)
    info = read_run_info(run_dir)
    check_run_files(run_dir, info)
    vocabulary = _load_vocabulary(run_dir / VOCAB_TXT, info)
    arch = info.architecture
    model = SentenceCNN(
        len(vocabulary),
        arch.embedding_dim,
        len(info.labels),
        widths=tuple(arch.widths),
        maps=arch.maps,
        dropout=arch.dropout,
        pad_id=Vocabulary.pad_id,
    )
    model_path = run_dir / MODEL_PT
    try:
        state = torch.load(model_path, map_location="cpu", weights_only=True)
    except FileNotFoundError:
        raise InputError(f"{model_path}: missing; every run folder has one") from None
    except (OSError, RuntimeError, pickle.UnpicklingError, EOFError, ValueError) as exc:
        raise InputError(f"{model_path}: not a readable weights file ({str(exc).splitlines()[0]})") from None
    try:
        model.load_state_dict(state, strict=True)
    except (RuntimeError, TypeError, AttributeError) as exc:
        raise InputError(
            f"{model_path}: does not match run.json's architecture and vocabulary ({str(exc).splitlines()[0][:200]})"
        ) from None
    # 'textsieve train' stops before writing such weights, but an older or hand-edited run may hold
    # them, and every probability they give is nan.
    broken = sorted(name for name, tensor in state.items() if not bool(torch.isfinite(tensor).all()))
    if broken:
        shown = ", ".join(broken[:3]) + (f" and {len(broken) - 3} more" if len(broken) > 3 else "")
        raise InputError(
            f"{model_path}: the weights are not finite (nan or inf in {shown}): the training diverged; "
            "train again with a lower --learning-rate"
        )
    return LoadedRun(model.eval(), vocabulary, info)


def check_run_files(run_dir: Path, info: RunInfo) -> None:
    """Each file run.json records a sha256 for is the file training wrote. A vocab.txt with two lines
    swapped, a valid.jsonl cut short by a copy, or model.pt from another run each exported before,
    passed parity (the graph and the reference read the same wrong files) and shipped."""
    for name, recorded in (info.files or {}).items():
        if name not in CHECKED_FILES:
            continue  # a file a later release records; this one does not read it
        path = Path(run_dir) / name
        try:
            actual = sha256_file(path)
        except FileNotFoundError:
            raise InputError(f"{path}: missing; every run folder has one") from None
        except OSError as exc:
            raise InputError(f"{path}: cannot be read ({exc.strerror or exc})") from None
        if actual != recorded:
            raise InputError(
                f"{path}: changed since training (sha256 {actual[:12]}…, run.json records {recorded[:12]}…); "
                "restore the file or train again"
            )


def _load_vocabulary(path: Path, info: RunInfo) -> Vocabulary:
    try:
        vocabulary = Vocabulary.load(path)
    except FileNotFoundError:
        raise InputError(f"{path}: missing; every run folder has one") from None
    except (OSError, UnicodeDecodeError, BundleError) as exc:
        raise InputError(f"{path}: not a valid vocabulary ({getattr(exc, 'message', exc)})") from None
    if len(vocabulary) != info.vocabulary.size:
        raise InputError(f"{path}: has {len(vocabulary)} tokens but run.json says {info.vocabulary.size}")
    return vocabulary


__all__ = [
    "CHECKED_FILES",
    "EMBEDDINGS_NPZ",
    "MODEL_PT",
    "RUN_JSON",
    "RUN_KEYS",
    "VALID_JSONL",
    "VOCAB_TXT",
    "Epoch",
    "LoadedRun",
    "RunInfo",
    "RunTraining",
    "RunVocabulary",
    "check_out",
    "check_run_files",
    "is_run_dir",
    "load_run",
    "read_run_info",
    "write_run",
]
