"""The training loop (Kim, 2014): Adam, dropout, the max-norm constraint, early stopping on validation.

Seeded and run with deterministic kernels, so on one machine the same data and seed give
bit-identical weights.
"""

from __future__ import annotations

import contextlib
import math
import time
from collections.abc import Iterator
from dataclasses import dataclass

import numpy as np
import torch
from torch.nn import functional as F

from textsieve.errors import InputError
from textsieve.exporter.config import ADAM_LEARNING_RATE, TrainConfig
from textsieve.exporter.encode import TokenIds, pad_batch
from textsieve.exporter.model import SentenceCNN
from textsieve.exporter.prepare import Prepared
from textsieve.exporter.progress import Progress, bar_wanted, say
from textsieve.exporter.run_folder import Epoch
from textsieve.registry.tokenizer import Vocabulary

# Words without a pretrained vector start from U[-a, a] (Kim, 2014, section 4.3: a chosen so they
# have about the variance of the pretrained ones); a = 0.25 is the value in his released code.
# Section numbers and the 0.25 are from memory.
UNIFORM_INIT = 0.25
# Validation loss must fall by more than this to count as better (common practice): otherwise
# a model that already fits keeps training for vanishing gains.
MIN_IMPROVEMENT = 1e-4
_EVAL_BATCH = 512
_BUCKET_BATCHES = 20  # sort by length within shuffled chunks of this many batches


@dataclass(frozen=True)
class Fitted:
    """The best epoch's weights and the history that chose them."""

    state: dict[str, torch.Tensor]
    history: list[Epoch]
    best_epoch: int


def fit(config: TrainConfig, prep: Prepared) -> Fitted:
    """Train seeded and deterministically; the caller's RNG state and torch flags are left as they were."""
    with _reproducible(config.seed):
        return _fit(config, prep)


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


def build_model(config: TrainConfig, prep: Prepared) -> SentenceCNN:
    """The untrained network: seeded uniform embeddings, pretrained rows where found, padding zero."""
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
def evaluate(model: SentenceCNN, encoded: TokenIds, targets: np.ndarray, min_length: int) -> tuple[float, float]:
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


def _train_epoch(
    model: SentenceCNN,
    optimizer: torch.optim.Optimizer,
    batches: list[np.ndarray],
    prep: Prepared,
    config: TrainConfig,
    epoch: int,
) -> float:
    """One pass over the training batches; returns the mean training loss."""
    model.train()
    train_y = torch.from_numpy(prep.train_y)
    loss_sum = 0.0
    with Progress(len(batches), f"epoch {epoch}/{config.epochs}", enabled=bar_wanted(config.quiet)) as bar:
        for rows in batches:
            ids, lengths = pad_batch(prep.train_ids, rows, prep.lengths.min_length)
            loss = F.cross_entropy(model(ids, lengths), train_y[torch.from_numpy(rows)])
            optimizer.zero_grad(set_to_none=True)
            loss.backward()  # type: ignore[no-untyped-call]  # torch's own annotation is missing
            optimizer.step()
            if config.max_norm is not None:
                model.apply_max_norm(config.max_norm)
            value = float(loss.detach())
            _require_finite(value, "training", epoch, config)
            loss_sum += value * len(rows)
            bar.advance(loss=value)
    return loss_sum / len(prep.train)


def _fit(config: TrainConfig, prep: Prepared) -> Fitted:
    model = build_model(config, prep)
    optimizer = torch.optim.Adam([p for p in model.parameters() if p.requires_grad], lr=config.learning_rate)
    rng = np.random.default_rng([config.seed, 2])
    history: list[Epoch] = []
    best_loss, best_epoch, best_state, waited = math.inf, 0, None, 0
    for epoch in range(1, config.epochs + 1):
        started = time.perf_counter()
        batches = _batches(prep.train_ids.lengths, config.batch_size, rng)
        train_loss = _train_epoch(model, optimizer, batches, prep, config, epoch)
        valid_loss, valid_accuracy = evaluate(model, prep.valid_ids, prep.valid_y, prep.lengths.min_length)
        _require_finite(valid_loss, "validation", epoch, config)
        history.append(Epoch(epoch=epoch, train_loss=train_loss, valid_loss=valid_loss, valid_accuracy=valid_accuracy))
        improved = valid_loss < best_loss - MIN_IMPROVEMENT
        if improved:
            best_loss, best_epoch, waited = valid_loss, epoch, 0
            best_state = {k: v.detach().clone() for k, v in model.state_dict().items()}
        else:
            waited += 1
        say(
            f"epoch {epoch:>2}/{config.epochs}  train loss {train_loss:.4f}  "
            f"valid loss {valid_loss:.4f}  valid accuracy {valid_accuracy:.3f}  "
            f"{time.perf_counter() - started:.1f}s{'  (best so far)' if improved else ''}"
        )
        if waited >= config.patience:
            say(f"stopping early: validation loss has not improved for {waited} epochs; keeping epoch {best_epoch}")
            break
    assert best_state is not None  # the first epoch's loss is finite, so it improved on inf
    return Fitted(best_state, history, best_epoch)


def _require_finite(loss: float, which: str, epoch: int, config: TrainConfig) -> None:
    """Stop at the first nan or inf: once the model's values overflow, every later step keeps them so,
    and a run folder of such weights could never be exported."""
    if math.isfinite(loss):
        return
    rate = config.learning_rate
    advice = f"lower --learning-rate (it is {rate:g}" + (
        f"; the default is {ADAM_LEARNING_RATE:g})" if rate > ADAM_LEARNING_RATE else ")"
    )
    if config.vectors is not None:
        advice = f"check {config.vectors} for very large values, or {advice}"
    raise InputError(
        f"training stopped: the {which} loss became {loss} at epoch {epoch} (the model's values overflowed); "
        f"{advice}; no run folder was written"
    )


__all__ = ["MIN_IMPROVEMENT", "UNIFORM_INIT", "Fitted", "build_model", "evaluate", "fit"]
