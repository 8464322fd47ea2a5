"""SentenceCNN checked against convolution arithmetic, NumPy's correlation and Kim's max-norm rule."""

from __future__ import annotations

import numpy as np
import pytest
import torch

from textsieve.exporter.model import SentenceCNN

# Masked and unmasked paths agree to float32 rounding, not bit for bit (common practice float
# tolerance for float32 sums of a few hundred terms).
TOL = 1e-5


def _model(
    seed: int = 0,
    *,
    vocab: int = 50,
    dim: int = 8,
    classes: int = 3,
    widths: tuple[int, ...] = (2, 3, 5),
    maps: int = 4,
) -> SentenceCNN:
    torch.manual_seed(seed)
    return SentenceCNN(vocab, dim, classes, widths=widths, maps=maps, dropout=0.5).eval()


@pytest.mark.parametrize("length", [5, 6, 17, 40])
def test_conv_output_length_is_i_minus_k_plus_1(length: int) -> None:
    # Dumoulin & Visin (2016), "A guide to convolution arithmetic for deep learning",
    # relationship 1: unit stride, no padding, o = (i - k) + 1.
    model = _model(widths=(1, 2, 3, 5))
    x = torch.randn(2, 8, length)
    for conv, k in zip(model.convs, (1, 2, 3, 5), strict=True):
        assert conv.stride == (1,) and conv.padding == (0,)
        assert conv(x).shape == (2, model.maps, length - k + 1)


def test_one_filter_equals_numpy_correlate() -> None:
    # A 1-D convolution layer computes cross-correlation: for filter f,
    # a_f[t] = b_f + sum_d sum_j x_d[t + j] * w_fd[j], i.e. sum over channels of
    # numpy.correlate(x_d, w_fd, 'valid') plus the bias (NumPy's documented definition).
    model = _model(seed=1)
    ids = torch.tensor([[3, 9, 14, 2, 27, 8, 41, 5, 11]])
    lengths = torch.tensor([9])
    x = model.embedding(ids)[0].detach().numpy().T.astype(np.float64)  # [D, T]
    for width, conv in zip(model.widths, model.convs, strict=True):
        w = conv.weight.detach().numpy().astype(np.float64)  # [maps, D, k]
        b = conv.bias.detach().numpy().astype(np.float64)
        torch_acts = conv(model.embedding(ids).transpose(1, 2))[0].detach().numpy()
        for f in range(model.maps):
            expected = sum(np.correlate(x[d], w[f, d], "valid") for d in range(x.shape[0])) + b[f]
            assert expected.shape == (9 - width + 1,)
            np.testing.assert_allclose(torch_acts[f], expected, atol=TOL, rtol=0)

    # And features() pools exactly that series: max-over-time (Kim, 2014, section 2, after eq. 3),
    # with ReLU applied after the max (the same value, as ReLU is monotone), at its argmax.
    pooled, positions = model.features(ids, lengths)
    first = model.convs[0]
    series = sum(
        np.correlate(x[d], first.weight[0, d].detach().numpy().astype(np.float64), "valid") for d in range(x.shape[0])
    ) + float(first.bias[0].detach())
    assert pooled[0, 0].item() == pytest.approx(max(series.max(), 0.0), abs=TOL)
    assert positions[0, 0].item() == int(series.argmax())


def test_padding_in_a_batch_does_not_change_a_text() -> None:
    model = _model(seed=2)
    min_length = max(model.widths)
    texts = [[4, 8, 15, 16, 23, 42, 7], [9, 3], list(range(2, 40))]
    # Each text alone, padded only to the widest filter when shorter than it.
    alone = []
    for t in texts:
        width = max(len(t), min_length)
        ids = torch.tensor([t + [0] * (width - len(t))])
        pooled, pos = model.features(ids, torch.tensor([len(t)]))
        alone.append((pooled[0], pos[0], model(ids, torch.tensor([len(t)]))[0]))
    # The same texts in one batch, zero-padded far beyond the longest.
    seq = 80
    ids = torch.zeros(len(texts), seq, dtype=torch.long)
    for i, t in enumerate(texts):
        ids[i, : len(t)] = torch.tensor(t)
    lengths = torch.tensor([len(t) for t in texts])
    pooled, pos = model.features(ids, lengths)
    logits = model(ids, lengths)
    for i, (p, q, lg) in enumerate(alone):
        assert torch.allclose(pooled[i], p, atol=TOL, rtol=0)
        assert torch.equal(pos[i], q)
        assert torch.allclose(logits[i], lg, atol=TOL, rtol=0)


def test_padding_content_is_ignored() -> None:
    # Whatever ids sit past a text's length (here real words, not padding) must not matter.
    model = _model(seed=3)
    clean = torch.tensor([[5, 6, 7, 8, 9, 0, 0, 0, 0, 0]])
    dirty = torch.tensor([[5, 6, 7, 8, 9, 33, 34, 35, 36, 37]])
    lengths = torch.tensor([5])
    a, pa = model.features(clean, lengths)
    b, pb = model.features(dirty, lengths)
    assert torch.allclose(a, b, atol=TOL, rtol=0) and torch.equal(pa, pb)


def test_max_norm_caps_each_output_row() -> None:
    # Kim (2014), section 2.1: rescale w to ||w||_2 = s whenever ||w||_2 > s after a step.
    model = _model(seed=4)
    with torch.no_grad():
        model.output.weight.copy_(torch.randn_like(model.output.weight) * 10)
        model.output.weight[1] = model.output.weight[1] / model.output.weight[1].norm() * 1.5  # already small
    before = model.output.weight.detach().clone()
    model.apply_max_norm(3.0)
    after = model.output.weight.detach()
    norms = after.norm(dim=1)
    assert torch.all(norms <= 3.0 + 1e-5)
    assert norms[0].item() == pytest.approx(3.0, abs=1e-5)
    assert torch.equal(after[1], before[1])  # rows under the limit are left alone
    cos = torch.nn.functional.cosine_similarity(after[0], before[0], dim=0)
    assert cos.item() == pytest.approx(1.0, abs=1e-6)  # direction kept, only the length changes


@pytest.mark.parametrize("seed", [0, 1, 2])
def test_tap_tables_equal_the_convolution(seed: int) -> None:
    # The exported tap-tables graph against the PyTorch convolution model it was built from
    # (PyTorch as the reference): logits, pooled values and argmax windows, on a batch with
    # texts shorter than the widest filter, an empty text, and texts that fill the batch.
    from textsieve.exporter.model import ExportGraph, TapTableGraph

    model = _model(seed, widths=(2, 3, 5))
    gen = torch.Generator().manual_seed(seed)
    lengths = torch.tensor([0, 1, 2, 4, 5, 9, 12, 12])
    ids = torch.randint(2, 50, (len(lengths), 12), generator=gen)
    ids[torch.arange(12).unsqueeze(0) >= lengths.unsqueeze(1)] = 0  # zero padding, as the runtime sends
    with torch.no_grad():
        want = ExportGraph(model)(ids, lengths)
        got = TapTableGraph(model)(ids, lengths)
    for w, g, name in zip(want, got, ("logits", "pooled", "positions", "contributions"), strict=True):
        if name == "positions":
            assert torch.equal(w, g), name
        else:
            torch.testing.assert_close(g, w, atol=TOL, rtol=0, msg=name)


def test_tap_tables_ignore_what_lies_past_the_length() -> None:
    # Whatever ids sit in the padding, a text's result is unchanged (same promise as the
    # convolution graph's masking).
    from textsieve.exporter.model import TapTableGraph

    graph = TapTableGraph(_model(3))
    ids = torch.tensor([[5, 6, 7, 8, 0, 0, 0], [5, 6, 7, 8, 44, 45, 46]])
    lengths = torch.tensor([4, 4])
    with torch.no_grad():
        logits, pooled, positions, _ = graph(ids, lengths)
    torch.testing.assert_close(logits[0], logits[1], atol=0, rtol=0)
    assert torch.equal(positions[0], positions[1])


def test_tap_table_size_formula() -> None:
    from textsieve.exporter.model import TapTableGraph, tap_table_bytes

    model = _model(4, vocab=50, widths=(2, 3, 5), maps=4)
    graph = TapTableGraph(model)
    stored = sum(t.numel() * t.element_size() for t in graph.tables)
    assert stored == tap_table_bytes(model) == (50 + 2) * (2 + 3 + 5) * 4 * 4
