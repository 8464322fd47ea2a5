"""POST /v1/predict against outside references: PyTorch for probabilities, NumPy for spans.

- Probabilities: softmax(logits / T) of the run's PyTorch SentenceCNN (temperature scaling,
  Guo et al., 2017, "On Calibration of Modern Neural Networks", §4.2), within 1e-5.
- Spans: a filter's max-over-time value (Kim, 2014, §2) recomputed in NumPy from the PyTorch
  state dict over the span's token window, and checked to be the maximum over all windows.
- Character offsets: text[start:end] == span.text on arbitrary Unicode (hypothesis).
- Batch invariance: a text alone and beside much longer texts gives the same result.
"""

from __future__ import annotations

import asyncio
from pathlib import Path
from typing import Any

import httpx
import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from tests.helpers.jsonl import read_jsonl
from tests.helpers.service import MODEL, serving, settings_for
from textsieve.registry.bundle import open_bundle
from textsieve.registry.runtime import Predictor
from textsieve.registry.tokenizer import nothing_to_classify
from textsieve.service.inference.spans import explain

pytestmark = pytest.mark.anyio


def _texts(data: Path, n: int = 60) -> list[str]:
    return [r["text"] for r in read_jsonl(data / "test.jsonl")[:n]]


# The service refuses empty and whitespace-only texts (422, tests/reliability/test_input.py);
# the Predictor itself still scores them (no tokens: the bias alone), as the warm-up does.
NO_TOKEN_TEXTS = ["", "   "]
EDGE_TEXTS = [
    "ok",
    "qzxv wbbt plonk",  # unknown words only
    "charged twice " * 200,  # longer than any max_length: truncated
    "The tyre is flat 😀 and the café's app won't load… 修理 please",
]


async def test_probabilities_match_pytorch_softmax_over_temperature(
    shared_registry: Path, tiny_runs: dict[str, Path], tiny_bundles: dict[str, Path], tiny_data: Path
) -> None:
    torch = pytest.importorskip("torch")
    from textsieve.exporter.run_folder import load_run

    texts = _texts(tiny_data) + EDGE_TEXTS
    async with serving(settings_for(shared_registry)) as (_, client):
        r = await client.post("/v1/predict", json={"texts": texts, "spans": 0})
    assert r.status_code == 200, r.text
    reply = r.json()
    assert (reply["model"], reply["version"]) == (MODEL, 1)

    model, _, run = load_run(tiny_runs["a"])
    bundle = open_bundle(tiny_bundles["a"])
    temperature = bundle.manifest.calibration.temperature
    p = Predictor.from_bundle(bundle)  # only its tokenizer: the encoding is the bundle's contract
    encoded = [p.encode(t) for t in texts]
    width = max(max(len(e.ids) for e in encoded), run.lengths.min_length)
    ids = torch.zeros((len(texts), width), dtype=torch.long)
    for i, e in enumerate(encoded):
        ids[i, : len(e.ids)] = torch.tensor(e.ids, dtype=torch.long)
    lengths = torch.tensor([len(e.ids) for e in encoded], dtype=torch.long)
    with torch.inference_mode():
        reference = torch.softmax(model(ids, lengths).double() / temperature, dim=1).numpy()

    labels = run.labels
    served = np.array([[res["probabilities"][name] for name in labels] for res in reply["results"]])
    assert np.abs(served - reference).max() <= 1e-5
    assert [res["label"] for res in reply["results"]] == [labels[i] for i in reference.argmax(1)]
    for res, e in zip(reply["results"], encoded, strict=True):
        assert res["tokens"] == e.tokens
        assert res["truncated"] == (e.tokens > run.lengths.max_length)
        assert res["unknown"] == sum(1 for i in e.ids if i == 1)
    truncated = reply["results"][len(texts) - 2]
    assert truncated["truncated"] and truncated["tokens"] == 400


def _numpy_activation(
    state: dict[str, Any], maps: int, widths: list[int], ids: list[int], f: int, start: int
) -> tuple[float, float]:
    """Filter f's ReLU'd activation at window ``start`` and its max over every valid window."""
    emb = state["embedding.weight"]
    which, local = divmod(f, maps)
    w = widths[which]
    kernel = state[f"convs.{which}.weight"][local]  # [D, w]
    bias = float(state[f"convs.{which}.bias"][local])
    n = len(ids)
    x = np.zeros((max(n, w) + w, emb.shape[1]), dtype=np.float64)  # zero padding past the text
    x[:n] = emb[ids]

    def at(s: int) -> float:
        return float(np.sum(x[s : s + w].T * kernel) + bias)

    best = max(at(s) for s in range(max(n - w, 0) + 1))
    return max(at(start), 0.0), max(best, 0.0)


async def test_spans_are_the_filters_pooled_windows_recomputed_with_numpy(
    shared_registry: Path, tiny_runs: dict[str, Path], tiny_bundles: dict[str, Path], tiny_data: Path
) -> None:
    pytest.importorskip("torch")
    from textsieve.exporter.run_folder import load_run

    texts = _texts(tiny_data, 40) + EDGE_TEXTS
    model, _, run = load_run(tiny_runs["a"])
    state = {k: v.detach().double().numpy() for k, v in model.state_dict().items()}
    maps, widths = run.architecture.maps, run.architecture.widths

    p = Predictor.from_bundle(tiny_bundles["a"])
    encoded = [p.encode(t) for t in texts]
    out = p.run(encoded)
    predictions = p.results(encoded, out, spans=5)

    async with serving(settings_for(shared_registry)) as (_, client):
        r = await client.post("/v1/predict", json={"texts": texts, "spans": 5})
    served = r.json()["results"]
    checked = 0
    for row, (pred, res, enc) in enumerate(zip(predictions, served, encoded, strict=True)):
        # The service reports exactly the spans the Predictor finds.
        assert [s.public() for s in pred.spans] == res["spans"]
        for span in pred.spans:
            assert span.label == res["label"] and span.weight > 0
            assert enc.text[span.start : span.end] == span.text
            assert span.filters, "every span comes from at least one filter"
            for f in span.filters:
                start = int(out.positions[row, f])
                assert span.token_start <= start < span.token_end
                value, best = _numpy_activation(state, maps, widths, enc.ids, f, start)
                pooled = float(out.pooled[row, f])
                assert value == pytest.approx(pooled, abs=1e-4, rel=1e-4)
                assert best == pytest.approx(pooled, abs=1e-4, rel=1e-4)  # max-over-time
                checked += 1
    assert checked > 50


def test_vectorised_explain_equals_predictor_results(tiny_bundles: dict[str, Path], tiny_data: Path) -> None:
    """The service's batch bookkeeping gives exactly Predictor.results (same floats, same order)."""
    texts = _texts(tiny_data, 200) + EDGE_TEXTS + NO_TOKEN_TEXTS
    for key in ("a", "b", "relabelled"):
        p = Predictor.from_bundle(tiny_bundles[key])
        encoded = [p.encode(t) for t in texts]
        out = p.run(encoded)
        for k in (0, 1, 2, 5, 50):
            mixed = [(i % (k + 1)) for i in range(len(texts))]
            for ks in ([k] * len(texts), mixed):
                got = explain(p, encoded, out, ks)
                for kk, g, pred in zip(ks, got, p.results(encoded, out, spans=max(ks)), strict=True):
                    want = pred.public()
                    want["spans"] = want["spans"][:kk]  # type: ignore[index]
                    assert g == want


async def test_same_text_alone_and_beside_much_longer_texts(shared_registry: Path) -> None:
    probe = "my card was charged twice for the same ride"
    long_texts = [
        ("the technician fixed the boiler and the invoice was wrong " * 30).strip(),
        ("login rejected again " * 60).strip(),
    ]
    async with serving(settings_for(shared_registry, batch_wait_ms=20)) as (_, client):
        alone = (await client.post("/v1/predict", json={"texts": [probe], "spans": 5})).json()["results"][0]
        inside = (
            await client.post("/v1/predict", json={"texts": [long_texts[0], probe, long_texts[1]], "spans": 5})
        ).json()["results"][1]
        # Across requests: concurrent long requests share batches with the probe.
        replies = await asyncio.gather(
            *[
                client.post("/v1/predict", json={"texts": [probe] if i % 4 == 0 else long_texts, "spans": 5})
                for i in range(16)
            ]
        )
    concurrent = [r.json()["results"][0] for i, r in enumerate(replies) if i % 4 == 0]
    for other in [inside, *concurrent]:
        assert other["label"] == alone["label"]
        for name, prob in alone["probabilities"].items():
            assert other["probabilities"][name] == pytest.approx(prob, abs=1e-5)
        assert [(s["start"], s["end"], s["width"]) for s in other["spans"]] == [
            (s["start"], s["end"], s["width"]) for s in alone["spans"]
        ]
        for a, b in zip(alone["spans"], other["spans"], strict=True):
            assert b["weight"] == pytest.approx(a["weight"], abs=1e-5)


# -- Unicode offsets against a real server -------------------------------------------------------
PIECES = [
    "charged",
    "twice",
    "invoice",
    "repair",
    "login",
    "thanks",
    "great",
    "broken",
    "the",
    "my",
    "😀",
    "👩‍💻",
    "🇫🇷",
    "👍🏽",
    "e\u0301",
    "n\u0303o",
    "a\u0308\u0323",
    "漢字",
    "修理",
    "ありがとう",
    "مرحبا",
    "שלום",
    "\u200f",
    "\u200e",
    "\u202e",
    "\u200b",
    "\u200d",
    "\u200c",
    "\ufeff",
    "\u2060",
    "नमस्ते",
    "don't",
    "café",
    "ﬁx",
    "Ⅻ",
    "１２３",
    "!",
    "?",
    "…",
    "\t",
    "\n",
]
_unicode_text = st.lists(
    st.one_of(st.sampled_from(PIECES), st.text(alphabet=st.characters(exclude_categories=("Cs",)), max_size=6)),
    max_size=30,
).flatmap(
    lambda parts: st.lists(
        st.sampled_from([" ", "", "  ", "\u00a0", "\u3000"]), min_size=len(parts), max_size=len(parts)
    ).map(lambda seps: "".join(p + s for p, s in zip(parts, seps, strict=True)))
)
# What the service accepts as a text: something to classify, and no NUL (see schemas.py).
_unicode_text = _unicode_text.filter(lambda t: nothing_to_classify(t) is None and "\x00" not in t)


def test_offsets_index_the_text_as_sent_for_any_unicode(live_url: str) -> None:
    with httpx.Client(base_url=live_url, timeout=30) as client:

        @settings(max_examples=60, deadline=None, suppress_health_check=[HealthCheck.too_slow])
        @given(st.lists(_unicode_text, min_size=1, max_size=6))
        def check(texts: list[str]) -> None:
            r = client.post("/v1/predict", json={"texts": texts, "spans": 10})
            assert r.status_code == 200, r.text
            for text, res in zip(texts, r.json()["results"], strict=True):
                for span in res["spans"]:
                    assert 0 <= span["start"] < span["end"] <= len(text)
                    assert text[span["start"] : span["end"]] == span["text"]
                    assert span["label"] == res["label"]

        check()
