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
        logits: Tensor = self.output(self.dropout(pooled))
        return logits

    @torch.no_grad()
    def apply_max_norm(self, limit: float) -> None:
        """Rescale each class's weight vector to an L2 norm of at most ``limit`` (Kim, 2014)."""
        w = self.output.weight
        norms = w.norm(dim=1, keepdim=True).clamp(min=limit)
        w.mul_(limit / norms)


def contributions(pooled: Tensor, weight: Tensor) -> Tensor:
    """``contribution[b, f, c] = pooled[b, f] * W[c, f]``, so that logits = Σ_f contribution + bias.

    Computed as [batch, classes, filters] and transposed: onnxruntime's Mul broadcasting a
    [batch, filters, 1] by a [1, filters, classes] runs a loop per few elements (~230 µs for 128
    texts, 300 filters, 4 classes, 13 % of the whole graph), the transposed layout one long
    vectorised loop per class (~37 µs with the Transpose). The products are the same floats.
    """
    return (pooled.unsqueeze(1) * weight.unsqueeze(0)).transpose(1, 2)


class ExportGraph(nn.Module):
    """The graph written to ONNX: logits plus what span finding needs."""

    def __init__(self, model: SentenceCNN) -> None:
        super().__init__()
        self.model = model

    def forward(self, token_ids: Tensor, lengths: Tensor) -> tuple[Tensor, Tensor, Tensor, Tensor]:
        pooled, positions = self.model.features(token_ids, lengths)
        logits = self.model.output(pooled)
        return logits, pooled, positions, contributions(pooled, self.model.output.weight)


class TapTableGraph(nn.Module):
    """The same function as :class:`ExportGraph`, rearranged for inference.

    A convolution over embeddings is linear in the embeddings, and an embedding lookup picks
    one row of a fixed matrix, so each filter tap's product with each vocabulary word can be
    computed once: ``table[w, k][v] = E[v] · W_w[:, :, k]`` (a [vocab, maps] matrix per tap).
    A window's activation is then ``bias_w + Σ_k table[w, k][id[t + k]]``: w row lookups and
    additions per window instead of w·dim multiply-adds per map.

    Two extra rows per tap table stand in for the masking: ``zero`` (what a masked, padded
    embedding gives) and ``-inf`` (a window that starts past ``max(length - width, 0)``). A
    window is valid exactly when its last tap is inside the text, or when it is the first
    window of a text shorter than the filter; the last tap's lookup picks ``-inf`` otherwise.
    """

    def __init__(self, model: SentenceCNN) -> None:
        super().__init__()
        self.model = model
        self.widths = model.widths
        self.maps = model.maps
        emb = model.embedding.weight.detach()
        vocab = emb.shape[0]
        self.zero_id = vocab
        self.neg_id = vocab + 1
        self.tables = nn.ParameterList()
        for conv in model.convs:
            # SentenceCNN builds every Conv1d with a bias; this narrows the types for the checker.
            assert isinstance(conv, nn.Conv1d) and conv.bias is not None
            w = conv.weight.detach()  # [maps, dim, width]
            bias = conv.bias.detach()
            for k in range(w.shape[2]):
                table = emb @ w[:, :, k].t()  # [vocab, maps]
                # The bias rides on tap 0, also in its zero row (an empty text's only window).
                zero = bias if k == 0 else torch.zeros_like(bias)
                if k == 0:
                    table = table + bias
                neg = torch.full_like(bias, float("-inf")) if k == w.shape[2] - 1 else zero
                rows = torch.stack([zero, neg])
                self.tables.append(nn.Parameter(torch.cat([table, rows]).contiguous(), requires_grad=False))

    def forward(self, token_ids: Tensor, lengths: Tensor) -> tuple[Tensor, Tensor, Tensor, Tensor]:
        seq = token_ids.shape[1]
        steps = torch.arange(seq, device=token_ids.device).unsqueeze(0)
        inside = steps < lengths.unsqueeze(1)
        ids = torch.where(inside, token_ids, torch.full_like(token_ids, self.zero_id))
        pooled: list[Tensor] = []
        positions: list[Tensor] = []
        tap = 0
        for width in self.widths:
            span = seq - width + 1
            acts = nn.functional.embedding(ids[:, 0:span], self.tables[tap])
            for k in range(1, width):
                part = ids[:, k : k + span]
                if k == width - 1:
                    first = steps[:, 0:span] == 0
                    outside = torch.where(
                        first, torch.full_like(part, self.zero_id), torch.full_like(part, self.neg_id)
                    )
                    part = torch.where(inside[:, k : k + span], part, outside)
                acts = acts + nn.functional.embedding(part, self.tables[tap + k])
            tap += width
            value, where = acts.max(dim=1)
            pooled.append(torch.relu(value))
            positions.append(where)
        pooled_all = torch.cat(pooled, dim=1)
        logits = self.model.output(pooled_all)
        return logits, pooled_all, torch.cat(positions, dim=1), contributions(pooled_all, self.model.output.weight)


def tap_table_bytes(model: SentenceCNN) -> int:
    """Bytes of float32 tap tables :class:`TapTableGraph` stores: (vocab + 2) × Σ widths × maps × 4."""
    return (model.embedding.weight.shape[0] + 2) * sum(model.widths) * model.maps * 4
