"""The data made ready to train on: labelled rows split, a vocabulary built, lengths chosen, ids encoded."""

from __future__ import annotations

import itertools
import math
import sys
import time
from collections import Counter
from collections.abc import Iterable, Mapping, Sequence
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from textsieve.errors import InputError
from textsieve.exporter.config import DEFAULT_EMBEDDING_DIM, TrainConfig
from textsieve.exporter.encode import TokenIds, encode_tokens
from textsieve.exporter.progress import Progress, bar_wanted, say
from textsieve.exporter.vectors import PretrainedVectors, load_vectors
from textsieve.labelled import Example, case_twins, check_labels, load_examples
from textsieve.registry.manifest import LengthInfo
from textsieve.registry.tokenizer import Tokenizer, Vocabulary

VALID_SHARE = 0.1


@dataclass(frozen=True)
class Prepared:
    """Everything the training loop reads, and what the run folder records about the data."""

    train: list[Example]
    valid: list[Example]
    labels: list[str]
    vocabulary: Vocabulary
    lengths: LengthInfo
    train_ids: TokenIds
    valid_ids: TokenIds
    train_y: np.ndarray
    valid_y: np.ndarray
    vectors: PretrainedVectors | None
    embedding_dim: int


def prepare(config: TrainConfig) -> Prepared:
    tokenizer = Tokenizer()
    tokens = TokenMemo(tokenizer)
    train_rows, valid_rows, labels = split_examples(config, tokens)
    for twins in case_twins(labels):
        say(
            f"warning: the labels {' and '.join(map(repr, twins))} differ only in case or character width; "
            "they train as separate classes: if they mean one class, write them alike"
        )
    if config.valid is not None:
        _warn_of_overlap(train_rows, valid_rows, tokens, config.valid)
    started = time.perf_counter()
    train_tokens = [tokens[e.text] for e in train_rows]
    valid_tokens = [tokens[e.text] for e in valid_rows]  # split once already: not again to encode them
    tokens.clear()
    vocabulary = build_vocabulary(train_tokens, config)
    lengths = length_info(np.array([len(t) for t in train_tokens]), config)
    built = time.perf_counter()
    rows = len(train_rows) + len(valid_rows)
    shown = bar_wanted(config.quiet)
    with Progress(rows, "encoding", enabled=shown, unit="text") as bar:
        train_ids = encode_tokens(train_tokens, vocabulary, lengths.max_length, bar)
        valid_ids = encode_tokens(valid_tokens, vocabulary, lengths.max_length, bar)
    if shown:
        say(
            f"data: vocabulary of {len(vocabulary):,} words built in {built - started:.1f}s, "
            f"{rows:,} rows encoded in {time.perf_counter() - built:.1f}s"
        )
    vectors = _pretrained(config, vocabulary, tokenizer)
    index = {label: i for i, label in enumerate(labels)}
    return Prepared(
        train=train_rows,
        valid=valid_rows,
        labels=labels,
        vocabulary=vocabulary,
        lengths=lengths,
        train_ids=train_ids,
        valid_ids=valid_ids,
        train_y=np.array([index[e.label] for e in train_rows], dtype=np.int64),
        valid_y=np.array([index[e.label] for e in valid_rows], dtype=np.int64),
        vectors=vectors,
        embedding_dim=config.embedding_dim if vectors is None else vectors.dim,
    )


class TokenMemo(dict[str, list[str]]):
    """A text's tokens, split once however often the split and the encoding ask."""

    def __init__(self, tokenizer: Tokenizer | None = None) -> None:
        super().__init__()
        self._bounds = (tokenizer or Tokenizer()).bounds

    def __missing__(self, text: str) -> list[str]:
        # Tokens only (offsets are for spans), interned: a word the data holds a million times is
        # then one string shared by a million lists, not a million strings.
        tokens = self[text] = list(map(sys.intern, self._bounds(text)[0]))
        return tokens

    def fill(self, texts: Iterable[str], total: int, *, bar: bool) -> None:
        """Tokenize every text now, with a bar over the texts (on a terminal)."""
        step = 4096
        with Progress(total, "tokenizing", enabled=bar, unit="text") as progress:
            for n, text in enumerate(texts, start=1):
                self[text]  # noqa: B018  # __missing__ does the work
                if n % step == 0:
                    progress.advance(step)
            progress.advance(total % step)


def read_examples(path: Path, config: TrainConfig) -> list[Example]:
    """A labelled file's rows, with a bar over its bytes (on a terminal)."""
    try:
        size = path.stat().st_size
    except OSError:
        size = 0  # load_examples says what is wrong with the path
    with Progress(size, f"reading {path.name}", enabled=bar_wanted(config.quiet), unit="B") as bar:
        return load_examples(path, config.text_field, config.label_field, progress=bar.advance)


def _model_input(tokens: Sequence[str]) -> str:
    """One key for texts the model cannot tell apart: the same tokens (case, spacing and NFKC folded)."""
    return "\x1f".join(tokens)


def split_examples(
    config: TrainConfig, tokens: Mapping[str, Sequence[str]] | None = None
) -> tuple[list[Example], list[Example], list[str]]:
    """Training rows, validation rows (``--valid`` or a held-out split) and the labels in output order.

    Given a :class:`TokenMemo`, every row is tokenized into it here. On a terminal a bar shows the
    reading, one the tokenizing and two the split (a 200 MB file is half a minute of the first two,
    a 53 MB file 3-5 s of the split), and a line then says how long each took; a pipe gets no line,
    so a refusal of the data stays the only one."""
    started = time.perf_counter()
    examples = read_examples(config.data, config)
    valid_given = read_examples(config.valid, config) if config.valid is not None else []
    shown = bar_wanted(config.quiet) and isinstance(tokens, TokenMemo)
    times = ""
    if isinstance(tokens, TokenMemo):
        read = time.perf_counter()
        rows = len(examples) + len(valid_given)
        tokens.fill((e.text for e in itertools.chain(examples, valid_given)), rows, bar=shown)
        times = f"data: {rows:,} rows read in {read - started:.1f}s, tokenized in {time.perf_counter() - read:.1f}s"
    if config.valid is not None:
        if shown:
            say(times)
        valid_rows = valid_given
        labels = check_labels(examples, valid_rows, train_name=str(config.data), valid_name=str(config.valid))
        return examples, valid_rows, labels
    # The one-label check comes first: a split of one-label data would fail confusingly.
    check_labels(examples, [], train_name=str(config.data))
    splitting = time.perf_counter()
    train_rows, valid_rows = split_validation(examples, config.seed, config.data, tokens, bar=shown)
    if shown:
        say(f"{times}, validation split off in {time.perf_counter() - splitting:.1f}s")
    labels = check_labels(train_rows, valid_rows, train_name=str(config.data))
    return train_rows, valid_rows, labels


def split_validation(
    examples: list[Example],
    seed: int,
    source: Path,
    tokens: Mapping[str, Sequence[str]] | None = None,
    *,
    bar: bool = False,
) -> tuple[list[Example], list[Example]]:
    """A seeded validation split stratified by label, so every validation label is also trained on.

    Rows the model cannot tell apart (the same tokens) stay on one side: a copy in validation of a
    training row measures memory, not generalisation, yet early stopping, the export's calibration and
    the bundle's metrics would all trust it (data leakage; common practice to split by group).
    """
    tokens = tokens if tokens is not None else TokenMemo()
    rng = np.random.default_rng([seed, 1])
    groups: dict[str, list[int]] = {}  # model input -> its rows, in file order
    with Progress(len(examples), "grouping copies", enabled=bar, unit="text") as progress:
        for i, example in enumerate(progress.tally(examples)):
            groups.setdefault(_model_input(tokens[example.text]), []).append(i)
    by_label: dict[str, list[list[int]]] = {}  # each group is stratified by its first row's label
    for rows in groups.values():
        by_label.setdefault(examples[rows[0]].label, []).append(rows)
    rows_of = Counter(e.label for e in examples)
    trained = rows_of.copy()  # rows of each label left to train on
    held: set[int] = set()
    with Progress(len(examples), "holding out validation", enabled=bar, unit="text") as progress:
        for label in sorted(by_label):
            label_groups = by_label[label]
            order = np.arange(len(label_groups))
            rng.shuffle(order)
            target, taken = _held_out(rows_of[label]), 0
            for g in progress.tally(order, lambda g: len(label_groups[int(g)])):  # noqa: B023  # used in this loop
                rows = label_groups[int(g)]
                if len(rows) == 1:  # most groups: one row of this label, no Counter to build
                    if taken < target and trained[label] > 1:
                        held.add(rows[0])
                        trained[label] -= 1
                        taken += 1
                    continue
                losing = Counter(examples[i].label for i in rows)
                if taken + len(rows) > target or any(trained[k] <= n for k, n in losing.items()):
                    continue
                held.update(rows)
                trained.subtract(losing)
                taken += len(rows)
    if not held:
        raise _too_few_to_hold_out(examples, by_label, source)
    if len(groups) < len(examples):
        say(
            f"note: {len(examples) - len(groups):,} rows repeat the tokens of an earlier row; such copies "
            "are kept on one side of the validation split"
        )
    train = [e for i, e in enumerate(examples) if i not in held]
    valid = [e for i, e in enumerate(examples) if i in held]
    return train, valid


def _too_few_to_hold_out(examples: list[Example], by_label: dict[str, list[list[int]]], source: Path) -> InputError:
    needed = next(n for n in itertools.count(2) if _held_out(n) >= 1)
    rows_of = Counter(e.label for e in examples)
    most = max(rows_of.values())
    advice = "add rows, or pass --valid FILE"
    if sum(len(g) for g in by_label.values()) < len(examples):
        distinct = max(len(g) for g in by_label.values())
        return InputError(
            f"{source}: every label has too few distinct texts to hold out a {VALID_SHARE:.0%} validation split "
            f"({len(rows_of)} labels, at most {most} rows but {distinct} distinct text{'s' if distinct != 1 else ''} "
            f"each; copies of a text stay on one side of the split): {advice}"
        )
    return InputError(
        f"{source}: every label has too few rows to hold out a {VALID_SHARE:.0%} validation split "
        f"({len(rows_of)} labels, at most {most} row{'s' if most != 1 else ''} each); a label needs at "
        f"least {needed} rows to give one to validation and train on the rest: {advice}"
    )


def _warn_of_overlap(
    train: list[Example], valid: list[Example], tokens: Mapping[str, Sequence[str]], valid_path: Path
) -> None:
    """--valid rows the model also trains on make validation loss, early stopping and calibration optimistic."""
    seen = {_model_input(tokens[e.text]) for e in train}
    shared = sum(_model_input(tokens[e.text]) in seen for e in valid)
    if shared:
        say(
            f"warning: {shared:,} of {len(valid):,} rows of {valid_path} ({shared / len(valid):.1%}) have the tokens "
            "of a training row; "
            "validation loss, early stopping and the export's calibration will trust them: remove them from one file"
        )


def _held_out(rows: int) -> int:
    """Rows of a label held out for validation: its rounded share, always leaving one to train on."""
    return min(math.floor(rows * VALID_SHARE + 0.5), rows - 1)


def build_vocabulary(train_tokens: list[list[str]], config: TrainConfig) -> Vocabulary:
    counts = Counter(t for tokens in train_tokens for t in tokens)
    vocabulary = Vocabulary.build(counts, min_count=config.min_count, max_size=config.max_vocab)
    if len(vocabulary) <= 2:
        raise InputError(
            f"{config.data}: no word occurs at least {config.min_count} times in the training "
            "texts; lower --min-count or add data"
        )
    return vocabulary


def length_info(token_counts: np.ndarray, config: TrainConfig) -> LengthInfo:
    min_length = max(config.widths)
    # numpy's default percentile is Hyndman & Fan (1996) definition 7; the epsilon keeps an
    # exact integer from being pushed up by float rounding.
    at_percentile = float(np.percentile(token_counts, config.length_percentile))
    max_length = max(math.ceil(at_percentile - 1e-9), min_length)
    truncated = float(np.mean(token_counts > max_length))
    return LengthInfo(
        max_length=max_length, min_length=min_length, percentile=config.length_percentile, truncation_rate=truncated
    )


def _pretrained(config: TrainConfig, vocabulary: Vocabulary, tokenizer: Tokenizer) -> PretrainedVectors | None:
    if config.vectors is None:
        return None
    vectors = load_vectors(config.vectors, vocabulary, tokenizer=tokenizer)
    # argparse cannot tell an explicit 128 from the default, so only another value conflicts.
    if config.embedding_dim not in (DEFAULT_EMBEDDING_DIM, vectors.dim):
        raise InputError(
            f"{config.vectors}: vectors file has dimension {vectors.dim} but --embedding-dim "
            f"is {config.embedding_dim}; drop --embedding-dim or make them equal"
        )
    return vectors


__all__ = [
    "VALID_SHARE",
    "Prepared",
    "TokenMemo",
    "build_vocabulary",
    "length_info",
    "prepare",
    "read_examples",
    "split_examples",
    "split_validation",
]
