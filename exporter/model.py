"""The convolutional sentence classifier (Kim, 2014, "Convolutional Neural Networks for
Sentence Classification", EMNLP): word embeddings, several filter widths, ReLU, max-over-time
pooling, dropout, one linear layer.

Padding never changes a text's result: embeddings past a text's length are zeroed and every
window that starts past ``max(length - width, 0)`` is set to -inf before the max, so the
pooled value only sees the text itself (plus zero padding when the text is shorter than the
filter, as in Kim's zero padding). Batches must be padded to at least the widest filter.
"""

from __future__ import annotations

import torch
from torch import Tensor, nn


class SentenceCNN(nn.Module):
    def __init__(
        self,
        vocab_size: int,
        embedding_dim: int,
        num_classes: int,
        widths: tuple[int, ...] = (3, 4, 5),
        maps: int = 100,
        dropout: float = 0.5,
        pad_id: int = 0,
    ) -> None:
        super().__init__()
        self.widths = tuple(widths)
        self.maps = maps
        self.embedding = nn.Embedding(vocab_size, embedding_dim, padding_idx=pad_id)
        self.convs = nn.ModuleList(nn.Conv1d(embedding_dim, maps, w) for w in self.widths)
        self.dropout = nn.Dropout(dropout)
        self.output = nn.Linear(maps * len(self.widths), num_classes)

    def features(self, token_ids: Tensor, lengths: Tensor) -> tuple[Tensor, Tensor]:
        """Pooled filter values [B, F] (after ReLU) and each filter's argmax window start [B, F]."""
        seq = token_ids.shape[1]
        steps = torch.arange(seq, device=token_ids.device)
        mask = (steps.unsqueeze(0) < lengths.unsqueeze(1)).unsqueeze(2)
        x = (self.embedding(token_ids) * mask).transpose(1, 2)  # [B, D, T]
        pooled: list[Tensor] = []
        positions: list[Tensor] = []
        for width, conv in zip(self.widths, self.convs, strict=True):
            acts = conv(x)  # [B, maps, T - width + 1]
            last_start = torch.clamp(lengths - width, min=0)  # [B]
            starts = torch.arange(acts.shape[2], device=token_ids.device)
            valid = starts.unsqueeze(0) <= last_start.unsqueeze(1)  # [B, T']
            acts = acts.masked_fill(~valid.unsqueeze(1), float("-inf"))
            value, where = acts.max(dim=2)
            pooled.append(torch.relu(value))
            positions.append(where)
        return torch.cat(pooled, dim=1), torch.cat(positions, dim=1)

    def forward(self, token_ids: Tensor, lengths: Tensor) -> Tensor:
        pooled, _ = self.features(token_ids, lengths)
        return self.output(self.dropout(pooled))

    @torch.no_grad()
    def apply_max_norm(self, limit: float) -> None:
        """Rescale each class's weight vector to an L2 norm of at most ``limit`` (Kim, 2014)."""
        w = self.output.weight
        norms = w.norm(dim=1, keepdim=True).clamp(min=limit)
        w.mul_(limit / norms)


class ExportGraph(nn.Module):
    """The graph written to ONNX: logits plus what span finding needs."""

    def __init__(self, model: SentenceCNN) -> None:
        super().__init__()
        self.model = model

    def forward(self, token_ids: Tensor, lengths: Tensor) -> tuple[Tensor, Tensor, Tensor, Tensor]:
        pooled, positions = self.model.features(token_ids, lengths)
        logits = self.model.output(pooled)
        # contribution[b, f, c] = pooled[b, f] * W[c, f]: logits = Σ_f contribution + bias.
        contributions = pooled.unsqueeze(2) * self.model.output.weight.t().unsqueeze(0)
        return logits, pooled, positions, contributions
