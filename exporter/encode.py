"""Texts as the model sees them in training: token ids in a padded matrix, and batches cut from it.

The serving side encodes one text at a time (``textsieve.registry.runtime.Encoded``, with
character offsets for spans); training wants every text at once as arrays, hence :class:`TokenIds`.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np
import torch

from textsieve.exporter.progress import Progress
from textsieve.registry.tokenizer import Tokenizer, Vocabulary


@dataclass(frozen=True)
class TokenIds:
    """Texts as token ids: ``ids[i, :lengths[i]]`` is text i, truncated to max_length."""

    ids: np.ndarray  # int64 [N, max_length], 0 (padding) past each length
    lengths: np.ndarray  # int64 [N]


def encode_tokens(
    token_lists: Sequence[Sequence[str]], vocabulary: Vocabulary, max_length: int, bar: Progress | None = None
) -> TokenIds:
    ids = np.zeros((len(token_lists), max_length), dtype=np.int64)
    lengths = np.zeros(len(token_lists), dtype=np.int64)
    for row, tokens in enumerate(bar.tally(token_lists) if bar is not None else token_lists):
        # Truncation keeps the first max_length tokens.
        encoded = vocabulary.encode(tokens[:max_length])
        ids[row, : len(encoded)] = encoded
        lengths[row] = len(encoded)
    return TokenIds(ids, lengths)


def encode_texts(
    texts: Sequence[str],
    vocabulary: Vocabulary,
    max_length: int,
    tokenizer: Tokenizer | None = None,
    bar: Progress | None = None,
) -> TokenIds:
    """The preprocessing the model was trained with: tokenize, look up, truncate (``bar`` counts the tokenizing)."""
    split = (tokenizer or Tokenizer()).split
    return encode_tokens(
        [split(t)[0] for t in (bar.tally(texts) if bar is not None else texts)], vocabulary, max_length
    )


def pad_batch(encoded: TokenIds, rows: np.ndarray, min_length: int) -> tuple[torch.Tensor, torch.Tensor]:
    """Token ids padded to the batch's longest text (at least ``min_length``) and the lengths."""
    lengths = encoded.lengths[rows]
    width = max(int(lengths.max()) if len(rows) else 0, min_length)
    return torch.from_numpy(encoded.ids[rows, :width]), torch.from_numpy(lengths)


__all__ = ["TokenIds", "encode_texts", "encode_tokens", "pad_batch"]
