"""``textsieve train``: a labelled file in, a run folder out (see /work/notes/run_contract.md).

The recipe is Kim (2014, "Convolutional Neural Networks for Sentence Classification", EMNLP):
word embeddings, filters of several widths, ReLU, max-over-time pooling, dropout, a max-norm
constraint on the output layer, early stopping on validation. Training is seeded and, on one
machine, bit-for-bit reproducible.
"""

from __future__ import annotations

import argparse
import contextlib
import json
import math
import pickle
import time
from collections import Counter
from collections.abc import Iterator, Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np
import torch
from pydantic import ValidationError
from torch.nn import functional as F

from textsieve import __version__
from textsieve.errors import BundleError, InputError
from textsieve.exporter.model import SentenceCNN
from textsieve.exporter.progress import Progress, bar_wanted, say
from textsieve.exporter.vectors import PretrainedVectors, load_vectors
from textsieve.files import atomic_directory, sha256_file
from textsieve.labelled import Example, check_labels, load_examples
from textsieve.registry.manifest import ArchitectureInfo, LengthInfo, TrainingInfo, VectorsInfo
from textsieve.registry.tokenizer import Tokenizer, TokenizerSpec, Vocabulary

RUN_JSON = "run.json"
MODEL_PT = "model.pt"
VOCAB_TXT = "vocab.txt"
VALID_JSONL = "valid.jsonl"
RUN_KEYS = ("labels", "tokenizer", "vocabulary", "lengths", "architecture", "training", "tool_version")

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
# Words without a pretrained vector start from U[-a, a] (Kim, 2014, section 4.3: a chosen so they
# have about the variance of the pretrained ones); a = 0.25 is the value in his released code.
# Section numbers and the 0.25 are from memory.
UNIFORM_INIT = 0.25
VALID_SHARE = 0.1
# Validation loss must fall by more than this to count as better (common practice): otherwise
# a model that already fits keeps training for vanishing gains.
MIN_IMPROVEMENT = 1e-4
_EVAL_BATCH = 512
_BUCKET_BATCHES = 20  # sort by length within shuffled chunks of this many batches


@dataclass(frozen=True)
class TrainConfig:
    """Everything a run depends on; mirrors the flags of ``textsieve train``."""

    data: Path
    out: Path
    valid: Path | None = None
    text_field: str = "text"
    label_field: str = "label"
    vectors: Path | None = None
    vectors_mode: str = "non-static"
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
            ("--learning-rate", self.learning_rate, 0 < self.learning_rate < math.inf, "a positive number"),
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


@dataclass(frozen=True)
class Encoded:
    """Texts as token ids: ``ids[i, :lengths[i]]`` is text i, truncated to max_length."""

    ids: np.ndarray  # int64 [N, max_length], 0 (padding) past each length
    lengths: np.ndarray  # int64 [N]


def encode_tokens(token_lists: Sequence[Sequence[str]], vocabulary: Vocabulary, max_length: int) -> Encoded:
    ids = np.zeros((len(token_lists), max_length), dtype=np.int64)
    lengths = np.zeros(len(token_lists), dtype=np.int64)
    for row, tokens in enumerate(token_lists):
        # Truncation keeps the first max_length tokens.
        encoded = vocabulary.encode(tokens[:max_length])
        ids[row, : len(encoded)] = encoded
        lengths[row] = len(encoded)
    return Encoded(ids, lengths)


def encode_texts(
    texts: Sequence[str], vocabulary: Vocabulary, max_length: int, tokenizer: Tokenizer | None = None
) -> Encoded:
    """The preprocessing the model was trained with: tokenize, look up, truncate."""
    split = (tokenizer or Tokenizer()).split
    return encode_tokens([split(t)[0] for t in texts], vocabulary, max_length)


def pad_batch(encoded: Encoded, rows: np.ndarray, min_length: int) -> tuple[torch.Tensor, torch.Tensor]:
    """Token ids padded to the batch's longest text (at least ``min_length``) and the lengths."""
    lengths = encoded.lengths[rows]
    width = max(int(lengths.max()) if len(rows) else 0, min_length)
    return torch.from_numpy(encoded.ids[rows, :width]), torch.from_numpy(lengths)


# ---------------------------------------------------------------------------------------------
# Preparing the data


@dataclass(frozen=True)
class _Prepared:
    train: list[Example]
    valid: list[Example]
    labels: list[str]
    vocabulary: Vocabulary
    lengths: LengthInfo
    train_encoded: Encoded
    valid_encoded: Encoded
    train_y: np.ndarray
    valid_y: np.ndarray
    vectors: PretrainedVectors | None
    embedding_dim: int


def _prepare(config: TrainConfig) -> _Prepared:
    examples = load_examples(config.data, config.text_field, config.label_field)
    if config.valid is not None:
        train_rows = examples
        valid_rows = load_examples(config.valid, config.text_field, config.label_field)
        labels = check_labels(train_rows, valid_rows, train_name=str(config.data), valid_name=str(config.valid))
    else:
        # The one-label check comes first: a split of one-label data would fail confusingly.
        check_labels(examples, [], train_name=str(config.data))
        train_rows, valid_rows = _split(examples, config.seed, config.data)
        labels = check_labels(train_rows, valid_rows, train_name=str(config.data))

    tokenizer = Tokenizer()
    train_tokens = [tokenizer.split(e.text)[0] for e in train_rows]
    counts = Counter(t for tokens in train_tokens for t in tokens)
    vocabulary = Vocabulary.build(counts, min_count=config.min_count, max_size=config.max_vocab)
    if len(vocabulary) <= 2:
        raise InputError(
            f"{config.data}: no word occurs at least {config.min_count} times in the training "
            "texts; lower --min-count or add data"
        )
    lengths = _length_info(np.array([len(t) for t in train_tokens]), config)

    vectors = None
    embedding_dim = config.embedding_dim
    if config.vectors is not None:
        vectors = load_vectors(config.vectors, vocabulary, tokenizer=tokenizer)
        # argparse cannot tell an explicit 128 from the default, so only another value conflicts.
        if config.embedding_dim not in (DEFAULT_EMBEDDING_DIM, vectors.dim):
            raise InputError(
                f"{config.vectors}: vectors file has dimension {vectors.dim} but --embedding-dim "
                f"is {config.embedding_dim}; drop --embedding-dim or make them equal"
            )
        embedding_dim = vectors.dim

    index = {label: i for i, label in enumerate(labels)}
    return _Prepared(
        train=train_rows,
        valid=valid_rows,
        labels=labels,
        vocabulary=vocabulary,
        lengths=lengths,
        train_encoded=encode_tokens(train_tokens, vocabulary, lengths.max_length),
        valid_encoded=encode_texts([e.text for e in valid_rows], vocabulary, lengths.max_length, tokenizer),
        train_y=np.array([index[e.label] for e in train_rows], dtype=np.int64),
        valid_y=np.array([index[e.label] for e in valid_rows], dtype=np.int64),
        vectors=vectors,
        embedding_dim=embedding_dim,
    )


def _split(examples: list[Example], seed: int, source: Path) -> tuple[list[Example], list[Example]]:
    """A seeded validation split stratified by label, so every validation label is also trained on."""
    rng = np.random.default_rng([seed, 1])
    by_label: dict[str, list[int]] = {}
    for i, example in enumerate(examples):
        by_label.setdefault(example.label, []).append(i)
    held: set[int] = set()
    for label in sorted(by_label):
        rows = np.array(by_label[label])
        rng.shuffle(rows)
        take = min(math.floor(len(rows) * VALID_SHARE + 0.5), len(rows) - 1)
        held.update(int(i) for i in rows[:take])
    if not held:
        raise InputError(
            f"{source}: {len(examples)} rows are too few to hold out a "
            f"{VALID_SHARE:.0%} validation split; add rows or pass --valid FILE"
        )
    train = [e for i, e in enumerate(examples) if i not in held]
    valid = [e for i, e in enumerate(examples) if i in held]
    return train, valid


def _length_info(token_counts: np.ndarray, config: TrainConfig) -> LengthInfo:
    min_length = max(config.widths)
    # numpy's default percentile is Hyndman & Fan (1996) definition 7; the epsilon keeps an
    # exact integer from being pushed up by float rounding.
    at_percentile = float(np.percentile(token_counts, config.length_percentile))
    max_length = max(math.ceil(at_percentile - 1e-9), min_length)
    truncated = float(np.mean(token_counts > max_length))
    return LengthInfo(
        max_length=max_length, min_length=min_length, percentile=config.length_percentile, truncation_rate=truncated
    )


# ---------------------------------------------------------------------------------------------
# Training


@dataclass(frozen=True)
class _Fitted:
    state: dict[str, torch.Tensor]
    history: list[dict[str, float | int]]
    best_epoch: int


@contextlib.contextmanager
def _reproducible(seed: int) -> Iterator[None]:
    """Seeded, deterministic kernels; the caller's RNG state and torch flags are restored after."""
    was_on = torch.are_deterministic_algorithms_enabled()
    was_warn = torch.is_deterministic_algorithms_warn_only_enabled()
    with torch.random.fork_rng(devices=[]):
        torch.manual_seed(seed)
        torch.use_deterministic_algorithms(True)
        try:
            yield
        finally:
            torch.use_deterministic_algorithms(was_on, warn_only=was_warn)


def _build_model(config: TrainConfig, prep: _Prepared) -> SentenceCNN:
    model = SentenceCNN(
        len(prep.vocabulary),
        prep.embedding_dim,
        len(prep.labels),
        widths=config.widths,
        maps=config.maps,
        dropout=config.dropout,
        pad_id=Vocabulary.pad_id,
    )
    generator = torch.Generator().manual_seed(config.seed)
    weight = torch.empty(len(prep.vocabulary), prep.embedding_dim).uniform_(
        -UNIFORM_INIT, UNIFORM_INIT, generator=generator
    )
    if prep.vectors is not None and prep.vectors.found:
        weight[torch.from_numpy(prep.vectors.ids)] = torch.from_numpy(prep.vectors.matrix)
    weight[Vocabulary.pad_id] = 0.0
    with torch.no_grad():
        model.embedding.weight.copy_(weight)
    if config.vectors_mode == "static":
        model.embedding.weight.requires_grad_(False)
    return model


def _batches(lengths: np.ndarray, batch_size: int, rng: np.random.Generator) -> list[np.ndarray]:
    """Shuffled batches of similar length: less padding, still a fresh mix every epoch."""
    order = rng.permutation(len(lengths))
    chunk = batch_size * _BUCKET_BATCHES
    batches: list[np.ndarray] = []
    for start in range(0, len(order), chunk):
        part = order[start : start + chunk]
        part = part[np.argsort(lengths[part], kind="stable")]
        batches.extend(part[i : i + batch_size] for i in range(0, len(part), batch_size))
    return [batches[i] for i in rng.permutation(len(batches))]


@torch.no_grad()
def evaluate(model: SentenceCNN, encoded: Encoded, targets: np.ndarray, min_length: int) -> tuple[float, float]:
    """Mean cross-entropy and accuracy, in eval mode (no dropout)."""
    model.eval()
    order = np.argsort(encoded.lengths, kind="stable")
    total_loss = 0.0
    correct = 0
    for start in range(0, len(order), _EVAL_BATCH):
        rows = order[start : start + _EVAL_BATCH]
        ids, lengths = pad_batch(encoded, rows, min_length)
        logits = model(ids, lengths)
        y = torch.from_numpy(targets[rows])
        total_loss += float(F.cross_entropy(logits, y, reduction="sum"))
        correct += int((logits.argmax(dim=1) == y).sum())
    return total_loss / len(order), correct / len(order)


def _fit(config: TrainConfig, prep: _Prepared) -> _Fitted:
    model = _build_model(config, prep)
    optimizer = torch.optim.Adam([p for p in model.parameters() if p.requires_grad], lr=config.learning_rate)
    rng = np.random.default_rng([config.seed, 2])
    train_x, train_y = prep.train_encoded, torch.from_numpy(prep.train_y)
    min_length = prep.lengths.min_length
    history: list[dict[str, float | int]] = []
    best_loss, best_epoch, best_state, waited = math.inf, 0, None, 0
    for epoch in range(1, config.epochs + 1):
        started = time.perf_counter()
        batches = _batches(train_x.lengths, config.batch_size, rng)
        model.train()
        loss_sum = 0.0
        with Progress(len(batches), f"epoch {epoch}/{config.epochs}", enabled=bar_wanted(config.quiet)) as bar:
            for rows in batches:
                ids, lengths = pad_batch(train_x, rows, min_length)
                loss = F.cross_entropy(model(ids, lengths), train_y[torch.from_numpy(rows)])
                optimizer.zero_grad(set_to_none=True)
                loss.backward()  # type: ignore[no-untyped-call]  # torch's own annotation is missing
                optimizer.step()
                if config.max_norm is not None:
                    model.apply_max_norm(config.max_norm)
                value = float(loss.detach())
                loss_sum += value * len(rows)
                bar.advance(loss=value)
        valid_loss, valid_accuracy = evaluate(model, prep.valid_encoded, prep.valid_y, min_length)
        history.append(
            {
                "epoch": epoch,
                "train_loss": loss_sum / len(prep.train),
                "valid_loss": valid_loss,
                "valid_accuracy": valid_accuracy,
            }
        )
        improved = valid_loss < best_loss - MIN_IMPROVEMENT
        if improved:
            best_loss, best_epoch, waited = valid_loss, epoch, 0
            best_state = {k: v.detach().clone() for k, v in model.state_dict().items()}
        else:
            waited += 1
        say(
            f"epoch {epoch:>2}/{config.epochs}  train loss {history[-1]['train_loss']:.4f}  "
            f"valid loss {valid_loss:.4f}  valid accuracy {valid_accuracy:.3f}  "
            f"{time.perf_counter() - started:.1f}s{'  (best so far)' if improved else ''}"
        )
        if waited >= config.patience:
            say(f"stopping early: validation loss has not improved for {waited} epochs; keeping epoch {best_epoch}")
            break
    if best_state is None:  # every validation loss was nan: keep the last weights rather than none
        best_epoch, best_state = len(history), model.state_dict()
    return _Fitted(best_state, history, best_epoch)


# ---------------------------------------------------------------------------------------------
# The run folder


def is_run_dir(path: Path) -> bool:
    return (path / RUN_JSON).is_file()


def _check_out(out: Path) -> None:
    if out.is_dir():
        if any(out.iterdir()) and not is_run_dir(out):
            raise InputError(
                f"--out {out}: is a folder that is not a previous run (no {RUN_JSON}); "
                "name a new or empty folder, or a previous run folder to replace"
            )
    elif out.exists() or out.is_symlink():
        raise InputError(
            f"--out {out}: is an existing file; name a new or empty folder, or a previous run folder to replace"
        )


def _run_json(config: TrainConfig, prep: _Prepared, fitted: _Fitted) -> dict[str, Any]:
    vectors = None
    if prep.vectors is not None and config.vectors is not None:
        vectors = VectorsInfo(
            file_sha256=sha256_file(config.vectors),
            dim=prep.vectors.dim,
            found=prep.vectors.found,
            mode=config.vectors_mode,  # type: ignore[arg-type]
        )
    architecture = ArchitectureInfo(
        embedding_dim=prep.embedding_dim,
        widths=list(config.widths),
        maps=config.maps,
        dropout=config.dropout,
        max_norm=config.max_norm,
        vectors=vectors,
    )
    training = TrainingInfo(
        data_sha256=sha256_file(config.data),
        valid_sha256=sha256_file(config.valid) if config.valid is not None else None,
        rows=len(prep.train),
        valid_rows=len(prep.valid),
        seed=config.seed,
        epochs=len(fitted.history),
        best_epoch=fitted.best_epoch,
        batch_size=config.batch_size,
        learning_rate=config.learning_rate,
        text_field=config.text_field,
        label_field=config.label_field,
    )
    return {
        "labels": prep.labels,
        "tokenizer": TokenizerSpec().model_dump(),
        "vocabulary": {"size": len(prep.vocabulary), "min_count": config.min_count, "max_size": config.max_vocab},
        "lengths": prep.lengths.model_dump(),
        "architecture": architecture.model_dump(),
        "training": training.model_dump() | {"history": fitted.history},
        "tool_version": __version__,
    }


def _write_run(out: Path, state: dict[str, torch.Tensor], files: dict[str, bytes]) -> None:
    """Build the folder beside ``out`` and rename it into place, so no reader sees half a run."""
    with atomic_directory(out, replace=True) as tmp:
        torch.save(state, tmp / MODEL_PT)
        for name, data in files.items():
            (tmp / name).write_bytes(data)
        _check_out(out)  # again: something may have appeared there while we trained


def train(config: TrainConfig) -> Path:
    """Train a model as configured and write its run folder; returns the folder."""
    config.check()
    _check_out(config.out)
    prep = _prepare(config)
    with _reproducible(config.seed):
        fitted = _fit(config, prep)
    valid_lines = "".join(json.dumps({"text": e.text, "label": e.label}, ensure_ascii=False) + "\n" for e in prep.valid)
    files = {
        VOCAB_TXT: prep.vocabulary.dumps().encode("utf-8"),
        VALID_JSONL: valid_lines.encode("utf-8"),
        RUN_JSON: (json.dumps(_run_json(config, prep, fitted), indent=2, ensure_ascii=False) + "\n").encode("utf-8"),
    }
    try:
        _write_run(config.out, fitted.state, files)
    except OSError as exc:
        raise InputError(f"--out {config.out}: cannot write the run folder ({exc.strerror or exc})") from exc
    return config.out


# ---------------------------------------------------------------------------------------------
# Reading a run back (for the exporter)


def read_run_json(run_dir: Path) -> dict[str, Any]:
    """run.json, checked against the contract; any problem names the file."""
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
    labels = run["labels"]
    if (
        not isinstance(labels, list)
        or len(labels) < 2
        or len(set(map(str, labels))) != len(labels)
        or not all(isinstance(x, str) and x.strip() for x in labels)
    ):
        raise InputError(f"{path}: 'labels' must be a list of at least 2 distinct non-empty strings")
    vocab = run["vocabulary"]
    if not isinstance(vocab, dict) or not isinstance(vocab.get("size"), int):
        raise InputError(f"{path}: 'vocabulary' must be an object with an integer 'size'")
    training = run["training"]
    checks: list[tuple[str, Any, Any]] = [
        ("tokenizer", TokenizerSpec, run["tokenizer"]),
        ("lengths", LengthInfo, run["lengths"]),
        ("architecture", ArchitectureInfo, run["architecture"]),
        (
            "training",
            TrainingInfo,
            {k: v for k, v in training.items() if k != "history"} if isinstance(training, dict) else training,
        ),
    ]
    for key, model, value in checks:
        try:
            model.model_validate(value)
        except ValidationError as exc:
            first = exc.errors()[0]
            where = ".".join(str(p) for p in (key, *first["loc"]))
            raise InputError(f"{path}: {where}: {first['msg']}") from None
    return run


def load_run(run_dir: Path) -> tuple[SentenceCNN, Vocabulary, dict[str, Any]]:
    """The trained model (eval mode), its vocabulary and run.json, from a run folder."""
    run_dir = Path(run_dir)
    run = read_run_json(run_dir)
    vocab_path = run_dir / VOCAB_TXT
    try:
        vocabulary = Vocabulary.load(vocab_path)
    except FileNotFoundError:
        raise InputError(f"{vocab_path}: missing; every run folder has one") from None
    except (OSError, UnicodeDecodeError, BundleError) as exc:
        raise InputError(f"{vocab_path}: not a valid vocabulary ({getattr(exc, 'message', exc)})") from None
    if len(vocabulary) != run["vocabulary"]["size"]:
        raise InputError(f"{vocab_path}: has {len(vocabulary)} tokens but run.json says {run['vocabulary']['size']}")
    arch = ArchitectureInfo.model_validate(run["architecture"])
    model = SentenceCNN(
        len(vocabulary),
        arch.embedding_dim,
        len(run["labels"]),
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
    return model.eval(), vocabulary, run


# ---------------------------------------------------------------------------------------------
# The command


def cli_train(args: argparse.Namespace) -> int:
    config = TrainConfig.from_args(args)
    out = train(config)
    run = read_run_json(out)
    print(summary(run, out))
    return 0


def summary(run: dict[str, Any], out: Path) -> str:
    """A few lines a person reads after training."""
    lengths, training, arch = run["lengths"], run["training"], run["architecture"]
    best = training["history"][training["best_epoch"] - 1]
    lines = [
        f"run folder   {out}",
        f"labels       {len(run['labels'])}: {', '.join(run['labels'])}",
        f"texts        {training['rows']:,} training, {training['valid_rows']:,} validation",
        f"vocabulary   {run['vocabulary']['size']:,} tokens (min count {run['vocabulary']['min_count']})",
        f"max_length   {lengths['max_length']} tokens ({_ordinal(lengths['percentile'])} percentile of training "
        f"lengths); truncates {lengths['truncation_rate']:.1%} of training texts",
    ]
    if arch.get("vectors"):
        v = arch["vectors"]
        lines.append(
            f"vectors      {v['found']:,} of {run['vocabulary']['size'] - 2:,} words found, "
            f"{v['dim']} dimensions, {v['mode']}"
        )
    lines += [
        f"best epoch   {training['best_epoch']} of {training['epochs']} run",
        f"validation   accuracy {best['valid_accuracy']:.3f}, loss {best['valid_loss']:.4f}",
    ]
    return "\n".join(lines)


def _ordinal(p: float) -> str:
    n = int(p) if float(p).is_integer() else p
    if isinstance(n, float):
        return f"{n}th"
    suffix = "th" if 10 <= n % 100 <= 20 else {1: "st", 2: "nd", 3: "rd"}.get(n % 10, "th")
    return f"{n}{suffix}"


__all__ = [
    "DEFAULT_EMBEDDING_DIM",
    "MODEL_PT",
    "RUN_JSON",
    "RUN_KEYS",
    "VALID_JSONL",
    "VOCAB_TXT",
    "Encoded",
    "TrainConfig",
    "cli_train",
    "encode_texts",
    "encode_tokens",
    "evaluate",
    "is_run_dir",
    "load_run",
    "pad_batch",
    "parse_widths",
    "read_run_json",
    "summary",
    "train",
]
