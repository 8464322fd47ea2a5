"""The evaluation report's order probe, filter n-grams and embedding movement
(registry/report/probes.py, registry/report/embeddings.py), checked against outside references:
a plain NumPy forward pass of the trained weights (convolution, max-over-time pooling, the output
layer; Kim, 2014) for the bundles' tap-table graph, scikit-learn's cosine_distances,
NearestNeighbors and TSNE, SciPy's orthogonal_procrustes, and the GloVe excerpt in tests/data.
"""

from __future__ import annotations

import html.parser
import json
from collections import Counter
from pathlib import Path
from typing import Any

import numpy as np
import pytest
import scipy.linalg
import scipy.special
import scipy.stats
import sklearn.manifold
import sklearn.metrics.pairwise
import sklearn.neighbors

from textsieve.registry.report import embedding_files, embeddings, probes
from textsieve.registry.runtime import Predictor
from textsieve.registry.tokenizer import Tokenizer, Vocabulary

TOL = 1e-5  # float32 tap tables against a float64 convolution (DEVELOPERS.md "Numbers to keep in mind")
GLOVE = Path(__file__).resolve().parents[1] / "data" / "glove_excerpt_100d.txt"


# -- the outside reference: the trained weights run through NumPy, one text at a time --------------
class NumpyCNN:
    """Kim (2014)'s forward pass written out in NumPy from the run folder's weights: embeddings
    (zero rows for padding), each filter correlated over the text as a plain convolution (texts
    shorter than a filter padded with zeros to its width, so they have one window), ReLU of the
    max over windows, the output layer, then softmax(logits / T) (Guo et al., 2017)."""

    def __init__(self, run: Path, temperature: float) -> None:
        import torch

        state = torch.load(run / "model.pt", map_location="cpu", weights_only=True)
        info = json.loads((run / "run.json").read_text(encoding="utf-8"))
        self.widths = info["architecture"]["widths"]
        self.embedding = state["embedding.weight"].double().numpy()
        self.convs = [
            (state[f"convs.{i}.weight"].double().numpy(), state[f"convs.{i}.bias"].double().numpy())
            for i in range(len(self.widths))
        ]
        self.out_w = state["output.weight"].double().numpy()
        self.out_b = state["output.bias"].double().numpy()
        self.temperature = temperature

    def features(self, ids: list[int]) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """Pooled values, argmax window starts, and each filter's window activations (max first) sorted."""
        x = self.embedding[ids] if ids else np.zeros((0, self.embedding.shape[1]))
        pooled, where, gaps = [], [], []
        for width, (w, b) in zip(self.widths, self.convs, strict=True):
            padded = np.vstack([x, np.zeros((max(width - len(ids), 0), x.shape[1]))])
            windows = np.lib.stride_tricks.sliding_window_view(padded, width, axis=0)  # [T', D, width]
            acts = np.einsum("tdk,mdk->tm", windows, w) + b  # [T', maps]
            top = np.sort(acts, axis=0)
            pooled.append(np.maximum(acts.max(axis=0), 0.0))
            where.append(acts.argmax(axis=0))
            gaps.append(top[-1] - top[-2] if acts.shape[0] > 1 else np.full(acts.shape[1], np.inf))
        return np.concatenate(pooled), np.concatenate(where), np.concatenate(gaps)

    def near_max_starts(self, ids: list[int], f: int, tol: float) -> list[int]:
        """Filter ``f``'s window starts whose activation is within ``tol`` of its largest (a near tie:
        float32 in the graph may pick any of them)."""
        x = self.embedding[ids] if ids else np.zeros((0, self.embedding.shape[1]))
        for width, (w, b) in zip(self.widths, self.convs, strict=True):
            if f < len(b):
                padded = np.vstack([x, np.zeros((max(width - len(ids), 0), x.shape[1]))])
                windows = np.lib.stride_tricks.sliding_window_view(padded, width, axis=0)
                acts = np.einsum("tdk,dk->t", windows, w[f]) + b[f]
                return np.flatnonzero(acts >= acts.max() - tol).tolist()
            f -= len(b)
        raise IndexError(f)

    def probabilities(self, ids: list[int]) -> np.ndarray:
        pooled, _, _ = self.features(ids)
        logits = self.out_w @ pooled + self.out_b
        return np.asarray(scipy.special.softmax(logits / self.temperature))


@pytest.fixture(scope="module")
def eval_rows(tiny_data: Path) -> list[dict[str, str]]:
    lines = (tiny_data / "test.jsonl").read_text(encoding="utf-8").splitlines()
    return [json.loads(line) for line in lines if line.strip()]


@pytest.fixture(scope="module")
def predictor(tiny_bundles: dict[str, Path]) -> Predictor:
    return Predictor.from_bundle(tiny_bundles["a"])


@pytest.fixture(scope="module")
def reference(tiny_runs: dict[str, Path], predictor: Predictor) -> NumpyCNN:
    return NumpyCNN(tiny_runs["a"], predictor.temperature)


# -- the reorderings ----------------------------------------------------------------------------------
@pytest.mark.parametrize("n", [0, 1, 2, 3, 5, 6, 7, 12, 13, 40])
def test_every_reordering_is_a_permutation(n: int) -> None:
    for seed in range(5):
        rng = np.random.default_rng(seed)
        for order in (probes.random_order(n, rng), probes.alternate_order(n), probes.beyond_width_order(n, 6, rng)):
            assert sorted(order.tolist()) == list(range(n))
        if n >= 2:
            assert probes.random_order(n, rng).tolist() != list(range(n)), "a shuffle of 2+ words moves something"


def test_alternate_takes_odd_positions_then_even() -> None:
    # Worked by hand: positions 1..7 (from 1) → 1, 3, 5, 7, then 2, 4, 6; as indices from 0:
    assert probes.alternate_order(7).tolist() == [0, 2, 4, 6, 1, 3, 5]
    assert probes.alternate_order(4).tolist() == [0, 2, 1, 3]


@pytest.mark.parametrize("n", [7, 12, 13, 25, 40])
@pytest.mark.parametrize("window", [4, 6])
def test_beyond_width_moves_whole_windows_only(n: int, window: int) -> None:
    blocks = [list(range(lo, min(lo + window, n))) for lo in range(0, n, window)]
    for seed in range(5):
        order = probes.beyond_width_order(n, window, np.random.default_rng(seed)).tolist()
        # Read the result back block by block: each piece must be one original window, intact.
        pieces, at = [], 0
        while at < n:
            start = order[at]
            assert start % window == 0, "every piece starts at a window boundary"
            size = len(blocks[start // window])
            pieces.append(order[at : at + size])
            at += size
        assert sorted(pieces) == blocks
        assert pieces != blocks, "two or more windows are put in another order"


@pytest.mark.parametrize("width", [1, 2, 3, 5])
def test_intact_share_counts_surviving_ngrams(width: int) -> None:
    rng = np.random.default_rng(width)
    for n in (3, 8, 20):
        for order in (rng.permutation(n), probes.alternate_order(n), probes.beyond_width_order(n, 6, rng)):
            seq = order.tolist()
            windows = [seq[i : i + width] for i in range(n - width + 1)]
            if not windows:
                continue
            direct = sum(all(w[k + 1] == w[k] + 1 for k in range(width - 1)) for w in windows) / len(windows)
            assert probes.intact_share(np.asarray(order), width) == pytest.approx(direct)


def test_reordered_text_tokenizes_to_the_reordered_tokens(eval_rows: list[dict[str, str]]) -> None:
    tok = Tokenizer()
    rng = np.random.default_rng(0)
    texts = [r["text"] for r in eval_rows[:40]] + ["Don't   panic — it's 3.5 km!", "naïve café’s déjà-vu"]
    for text in texts:
        tokens, offsets = tok.split(text)
        order = rng.permutation(len(tokens))
        again, _ = tok.split(probes.reorder_text([text[s:e] for s, e in offsets], order))
        assert again == [tokens[i] for i in order]


# -- the probe's figures against the NumPy forward pass -------------------------------------------
def _direct_figures(
    model: NumpyCNN, p: Predictor, texts: list[str], orders: list[np.ndarray]
) -> tuple[np.ndarray, np.ndarray]:
    changed, dps = [], []
    for text, order in zip(texts, orders, strict=True):
        tokens, _ = p.tokenizer.split(text)
        ids = p.vocab.encode(tokens[: p.max_length])
        before = model.probabilities(ids)
        after = model.probabilities([ids[i] for i in order])
        c = int(before.argmax())
        changed.append(int(after.argmax()) != c)
        dps.append(abs(after[c] - before[c]))
    return np.array(changed), np.array(dps)


def test_order_probe_matches_a_numpy_recomputation(
    predictor: Predictor, reference: NumpyCNN, eval_rows: list[dict[str, str]]
) -> None:
    texts = [r["text"] for r in eval_rows]
    seeds = (0, 1)
    result = probes.order_probe(predictor, texts, seeds=seeds)
    lengths = [min(len(predictor.tokenizer.split(t)[0]), predictor.max_length) for t in texts]
    kept = [t for t, n in zip(texts, lengths, strict=True) if n >= 2]
    ns = [n for n in lengths if n >= 2]
    assert result["probed"] == len(kept) and result["n"] == len(texts)
    window = max(predictor.filter_widths.tolist()) + 1
    assert result["window"] == window
    # The same seeded draws the probe documents: seed s shuffles the texts in order, the
    # window shuffles come from default_rng([first seed, 1]).
    rngs = [np.random.default_rng(s) for s in seeds]
    beyond = np.random.default_rng([seeds[0], 1])
    draws = {
        "random": [[probes.random_order(n, rng) for n in ns] for rng in rngs],
        "alternate": [[probes.alternate_order(n) for n in ns]],
        "beyond_width": [[probes.beyond_width_order(n, window, beyond) for n in ns]],
    }
    per_text: dict[str, tuple[np.ndarray, np.ndarray]] = {}
    for variant, runs in draws.items():
        figures = [_direct_figures(reference, predictor, kept, orders) for orders in runs]
        changed = np.mean([f[0] for f in figures], axis=0)
        dp = np.mean([f[1] for f in figures], axis=0)
        per_text[variant] = (changed, dp)
        # A label flip needs the two top probabilities to cross: float32 against float64 can
        # only disagree on a near tie, so allow one text's worth of difference.
        assert result[variant]["label_change_rate"] == pytest.approx(changed.mean(), abs=1.0 / len(kept) + 1e-12)
        assert result[variant]["mean_abs_dp"] == pytest.approx(dp.mean(), abs=TOL)
    for seed, row, figures in zip(seeds, result["random"]["per_seed"], draws["random"], strict=True):
        assert row["seed"] == seed
        _, dp = _direct_figures(reference, predictor, kept, figures)
        assert row["mean_abs_dp"] == pytest.approx(dp.mean(), abs=TOL)
    # Per band: the same per-text figures, grouped by the documented edges.
    edges = [(0, 5), (6, 10), (11, 20), (21, 40), (41, 80), (81, 10**9)]
    assert [b["band"] for b in result["bands"]] == ["0–5", "6–10", "11–20", "21–40", "41–80", "81+"]
    for band, (lo, hi) in zip(result["bands"], edges, strict=True):
        rows = np.array([lo <= n <= hi for n in ns])
        assert band["n"] == int(rows.sum())
        for variant in probes.VARIANTS:
            if rows.any():
                assert band[variant]["mean_abs_dp"] == pytest.approx(per_text[variant][1][rows].mean(), abs=TOL)
            else:
                assert band[variant]["mean_abs_dp"] is None
    verdict = result["verdict"]
    assert verdict["finding"] in {"inside_widths", "beyond_widths", "order_free", "inconclusive", "too_few"}
    eligible = np.array([n >= 2 * window for n in ns])
    assert verdict["eligible"] == int(eligible.sum())
    if verdict["ratio"] is not None:
        ratio = per_text["beyond_width"][1][eligible].mean() / per_text["random"][1][eligible].mean()
        assert verdict["ratio"] == pytest.approx(ratio, abs=1e-4)
        lo, hi = verdict["ratio_interval"]
        assert lo <= verdict["ratio"] <= hi


def _probe_with(ratio_dp: tuple[float, float], n: int = 60) -> dict[str, Any]:
    lengths = np.full(n, 30, dtype=np.int64)
    rng = np.random.default_rng(0)
    random_dp = np.clip(rng.normal(ratio_dp[0], 0.01, n), 0, 1)
    beyond_dp = np.clip(rng.normal(ratio_dp[1], 0.01, n), 0, 1)
    fake = {"_random": (None, random_dp), "_beyond_width": (None, beyond_dp)}
    return probes._verdict(fake, lengths, 6)


@pytest.mark.parametrize(
    ("random_dp", "beyond_dp", "finding", "says"),
    [
        pytest.param(0.30, 0.05, "inside_widths", "sensitive mostly to word order inside", id="inside"),
        pytest.param(0.30, 0.28, "beyond_widths", "do not show the model relying mostly", id="opposite"),
        pytest.param(0.004, 0.003, "order_free", "hardly matters", id="bag of words"),
        pytest.param(0.30, 0.15, "inconclusive", "cannot tell", id="straddles"),
    ],
)
def test_verdict_says_what_the_figures_show(random_dp: float, beyond_dp: float, finding: str, says: str) -> None:
    verdict = _probe_with((random_dp, beyond_dp))
    assert verdict["finding"] == finding
    assert says in verdict["text"]


def test_verdict_needs_enough_long_texts() -> None:
    verdict = probes._verdict({"_random": (None, np.ones(5)), "_beyond_width": (None, np.ones(5))}, np.full(5, 30), 6)
    assert verdict["finding"] == "too_few" and verdict["ratio"] is None


def test_order_probe_on_no_reorderable_text(predictor: Predictor) -> None:
    result = probes.order_probe(predictor, ["Hi", ""])
    assert result["probed"] == 0 and result["skipped_short"] == 2
    assert result["random"]["label_change_rate"] is None and result["verdict"]["finding"] == "too_few"


# -- filters against the NumPy convolution ---------------------------------------------------------
def test_filter_triggers_match_a_numpy_convolution(
    predictor: Predictor, reference: NumpyCNN, eval_rows: list[dict[str, str]]
) -> None:
    texts = [r["text"] for r in eval_rows]
    labels = [r["label"] for r in eval_rows]
    section = probes.filter_section(predictor, texts, labels, top=3)
    filters = len(predictor.filter_widths)
    expected: list[Counter[str]] = [Counter() for _ in range(filters)]
    tied: list[Counter[str]] = [Counter() for _ in range(filters)]  # texts where the n-gram may be the window
    fired = np.zeros((len(texts), filters), dtype=bool)
    for row, text in enumerate(texts):
        ids = predictor.encode(text).ids
        pooled, where, gaps = reference.features(ids)
        fired[row] = pooled > 0
        for f in np.flatnonzero(pooled > 0):
            width = predictor.filter_widths[f]

            def ngram(s: int, width: int = width, ids: list[int] = ids) -> str:
                return " ".join(predictor.vocab.tokens[i] for i in ids[s : min(s + width, len(ids))])

            if gaps[f] < 1e-4:  # a near tie between windows: float32 may pick any of them
                for g in {ngram(s) for s in reference.near_max_starts(ids, int(f), 1e-4)}:
                    tied[f][g] += 1
                continue
            expected[f][ngram(int(where[f]))] += 1
    by_index = {e["index"]: e for e in section["filters"]}
    assert section["dead"] == [f for f in range(filters) if not fired[:, f].any()]
    for f in range(filters):
        entry = by_index[f]
        assert entry["fires"] == int(fired[:, f].sum())
        assert entry["width"] == int(predictor.filter_widths[f])
        for t in entry["top"]:
            # every listed n-gram was that filter's window in the texts the reference says it was,
            # plus at most the near ties it was one of (a text repeating "i use the app" ties exactly)
            assert expected[f][t["ngram"]] <= t["count"] <= expected[f][t["ngram"]] + tied[f][t["ngram"]]
        if expected[f]:
            most = expected[f].most_common(1)[0][1]
            assert entry["top"][0]["count"] >= most
        if entry["pushes"] is not None:
            # the class with the largest output weight for this filter (Kim, 2014's output layer)
            assert entry["pushes"] == predictor.labels[int(reference.out_w[:, f].argmax())]
            assert entry["weights"] == pytest.approx(
                dict(zip(predictor.labels, reference.out_w[:, f].tolist(), strict=True)), abs=1e-4
            )
            gold = np.array(labels)[fired[:, f]]
            assert entry["agreement"] == pytest.approx(float(np.mean(gold == entry["pushes"])), abs=1.0 / len(texts))


def test_dead_filters_are_listed(predictor: Predictor) -> None:
    # An empty text has one all-padding window per filter, whose value is the filter's bias:
    # with one such text, exactly the filters with a bias ≤ 0 never fire (common practice: ReLU).
    section = probes.filter_section(predictor, [""], [predictor.labels[0]])
    encoded = predictor.encode("")
    out = predictor.run([encoded])
    assert section["dead"] == np.flatnonzero(out.pooled[0] <= 0).tolist()
    assert all(e["top"] == [] for e in section["filters"]), "an empty text has no n-gram to count"


def test_filter_section_refuses_mismatched_labels(predictor: Predictor) -> None:
    with pytest.raises(ValueError, match="2 texts but 1 labels"):
        probes.filter_section(predictor, ["a", "b"], ["x"])


# -- embeddings --------------------------------------------------------------------------------------
def _glove(n: int) -> tuple[list[str], np.ndarray]:
    words, rows = [], []
    with GLOVE.open(encoding="utf-8") as fh:
        for line in fh:
            parts = line.rstrip("\n").split(" ")
            if parts[0].isalpha():
                words.append(parts[0])
                rows.append(np.array(parts[1:], dtype=np.float32))
            if len(words) == n:
                break
    return words, np.stack(rows)


def _fake_run(folder: Path, words: list[str], trained: np.ndarray, start: np.ndarray | None, mode: str) -> Path:
    """A run folder's embedding record, written as `textsieve train` writes it (run_folder.write_run)."""
    folder.mkdir(parents=True)
    vocab = Vocabulary(["<pad>", "<unk>", *words])
    (folder / "vocab.txt").write_text(vocab.dumps(), encoding="utf-8")
    full = np.vstack([np.zeros((2, trained.shape[1]), np.float32), trained])
    ids = None if start is None else np.arange(2, 2 + len(words))
    np.savez(folder / embedding_files.EMBEDDINGS_NPZ, **embedding_files.embedding_arrays(full, ids, start, mode))
    return folder


def test_moved_words_and_neighbours_match_scikit_learn(tmp_path: Path) -> None:
    words, start = _glove(300)
    rng = np.random.default_rng(7)
    trained = start + rng.normal(0, 0.02, start.shape).astype(np.float32)
    movers = rng.choice(len(words), 12, replace=False)
    trained[movers] += rng.normal(0, 3.0, (12, start.shape[1])).astype(np.float32)
    run = _fake_run(tmp_path / "run", words, trained, start, "non-static")
    section = embeddings.embedding_section(run, top=12, neighbours=5, seed=3)
    assert section["available"] and section["note"] is None
    (part,) = section["comparisons"]
    assert part["kind"] == "from_start" and part["words"] == 300
    # paired cosine distances: scikit-learn's cosine_distances, diagonal
    reference = np.diag(sklearn.metrics.pairwise.cosine_distances(start, trained))
    assert part["mean_distance"] == pytest.approx(reference.mean(), abs=1e-6)
    assert {m["word"] for m in part["moved"]} == {words[i] for i in movers}
    for m in part["moved"]:
        assert m["distance"] == pytest.approx(reference[words.index(m["word"])], abs=1e-6)
    assert [m["distance"] for m in part["moved"]] == sorted((m["distance"] for m in part["moved"]), reverse=True)
    # neighbours: scikit-learn's brute-force NearestNeighbors with the cosine metric
    for space, key in ((start, "before"), (trained, "after")):
        nn = sklearn.neighbors.NearestNeighbors(n_neighbors=6, metric="cosine", algorithm="brute").fit(space)
        for m in part["moved"]:
            _, idx = nn.kneighbors(space[[words.index(m["word"])]])
            assert m[key] == [words[j] for j in idx[0] if words[j] != m["word"]][:5]
    # the map: one seeded scikit-learn TSNE over before and after together, reproducible
    mapped = part["map"]
    assert mapped["words"] == [m["word"] for m in part["moved"]] and mapped["seed"] == 3
    again = embeddings.embedding_section(run, top=12, neighbours=5, seed=3)["comparisons"][0]["map"]
    assert again == mapped
    rows = [words.index(w) for w in mapped["words"]]
    both = np.vstack([embeddings.unit_rows(start[rows]), embeddings.unit_rows(trained[rows])])
    direct = sklearn.manifold.TSNE(
        n_components=2, perplexity=mapped["perplexity"], init="pca", random_state=3, method="exact"
    ).fit_transform(both)
    np.testing.assert_allclose(np.array(mapped["before"] + mapped["after"]), direct, atol=1e-6)


def test_procrustes_matches_scipy_and_recovers_a_rotation(tmp_path: Path) -> None:
    words, vectors = _glove(200)
    rotation = scipy.stats.ortho_group.rvs(vectors.shape[1], random_state=1)
    r = embeddings.procrustes_rotation(vectors, vectors @ rotation)
    expected, _ = scipy.linalg.orthogonal_procrustes(vectors, vectors @ rotation)
    np.testing.assert_allclose(r, expected, atol=1e-8)
    # A version that is this one rotated has moved nothing once aligned.
    a = _fake_run(tmp_path / "a", words, vectors, None, "")
    b = _fake_run(tmp_path / "b", words, (vectors @ rotation).astype(np.float32), None, "")
    section = embeddings.embedding_section(b, against=a, against_name="version 1")
    (part,) = section["comparisons"]
    assert part["kind"] == "against" and part["aligned"] and not part["shared_start"]
    assert part["mean_distance"] < 1e-5 and part["moved"] == []
    assert "random vectors" in section["note"], "no pretrained start: no distance from one"


def test_versions_from_the_same_start_are_compared_unrotated(tmp_path: Path) -> None:
    words, start = _glove(100)
    rng = np.random.default_rng(2)
    one = start + rng.normal(0, 0.01, start.shape).astype(np.float32)
    two = one.copy()
    two[5] = -two[5]  # a word that turned around
    a = _fake_run(tmp_path / "a", words, one, start, "non-static")
    b = _fake_run(tmp_path / "b", words, two, start, "non-static")
    part = embeddings.embedding_section(b, against=a, against_name="version 1", top=1)["comparisons"][1]
    assert part["shared_start"] and not part["aligned"] and part["note"] is None
    assert part["moved"][0]["word"] == words[5]
    assert part["moved"][0]["distance"] == pytest.approx(2.0, abs=1e-6)  # cos = −1 (common practice)


def test_embedding_section_on_the_tiny_runs(tiny_runs: dict[str, Path]) -> None:
    section = embeddings.embedding_section(tiny_runs["a"], against=tiny_runs["b"], against_name="version 2", top=5)
    (part,) = section["comparisons"]
    assert part["against"] == "version 2" and len(part["moved"]) == 5
    assert section["note"].startswith("This run started from random vectors")
    vocab = Vocabulary.load(tiny_runs["a"] / "vocab.txt")
    assert part["shared_words"] == len(vocab) - 2  # same data, same vocabulary


@pytest.mark.parametrize(("name", "opening"), [("the other version", "The other version"), ("version 1", "Version 1")])
def test_a_note_about_the_other_version_names_it_once(name: str, opening: str, tmp_path: Path) -> None:
    """The note read "Version the other version shares 0 words …" (and "Version version 1 …")."""
    words, vectors = _glove(40)
    a = _fake_run(tmp_path / "a", words[:20], vectors[:20], None, "")
    b = _fake_run(tmp_path / "b", words[20:], vectors[20:], None, "")
    note = embeddings.embedding_section(b, against=a, against_name=name)["note"]
    assert f" {opening} shares 0 words with this one: too few to compare embeddings." in note


@pytest.mark.parametrize(
    ("case", "expected"),
    [
        pytest.param("none", "No run folder for this version", id="no run folder"),
        pytest.param("empty", "embeddings.npz: missing", id="run without record"),
        pytest.param("broken", "not a readable embedding record", id="unreadable record"),
    ],
)
def test_embedding_section_notes_instead_of_failing(case: str, expected: str, tmp_path: Path) -> None:
    run: Path | None = None
    if case != "none":
        run = tmp_path / "run"
        run.mkdir()
        (run / "vocab.txt").write_text("<pad>\n<unk>\nword\n", encoding="utf-8")
        if case == "broken":
            (run / embedding_files.EMBEDDINGS_NPZ).write_bytes(b"not a zip")
    section = embeddings.embedding_section(run)
    assert not section["available"] and expected in section["note"] and "\n" not in section["note"]


def test_static_run_reports_no_movement(tmp_path: Path) -> None:
    words, start = _glove(50)
    run = _fake_run(tmp_path / "run", words, start.copy(), start, "static")
    (part,) = embeddings.embedding_section(run)["comparisons"]
    assert part["moved"] == [] and part["still"] == 50 and "static" in part["note"]


# -- the sections in a report, and their HTML ------------------------------------------------------
class _Page(html.parser.HTMLParser):
    """Python's own HTML parser as the check that fragments nest: every element closed in order."""

    VOID = {"br", "meta", "input", "img", "hr"}

    def __init__(self) -> None:
        super().__init__()
        self.stack: list[str] = []
        self.tags: Counter[str] = Counter()
        self.attrs: list[str] = []
        self.text: list[str] = []

    def handle_starttag(self, tag: str, attrs: list[tuple[str, str | None]]) -> None:
        self.tags[tag] += 1
        self.attrs.extend(name for name, _ in attrs)
        if tag not in self.VOID:
            self.stack.append(tag)

    def handle_startendtag(self, tag: str, attrs: list[tuple[str, str | None]]) -> None:
        self.tags[tag] += 1
        self.attrs.extend(name for name, _ in attrs)

    def handle_endtag(self, tag: str) -> None:
        assert self.stack and self.stack[-1] == tag, f"</{tag}> closes <{self.stack[-1] if self.stack else None}>"
        self.stack.pop()

    def handle_data(self, data: str) -> None:
        self.text.append(data)


def _parse(fragment: str) -> _Page:
    page = _Page()
    page.feed(fragment)
    page.close()
    assert page.stack == [], f"unclosed elements: {page.stack}"
    # The report's Content-Security-Policy allows no script and no style attribute (CSP Level 2).
    assert page.tags["script"] == 0 and "style" not in page.attrs and not any(a.startswith("on") for a in page.attrs)
    return page


def test_sections_in_a_built_report(tiny_bundles: dict[str, Path], tiny_runs: dict[str, Path], tiny_data: Path) -> None:
    from textsieve.labelled import load_examples
    from textsieve.registry.bundle import open_bundle
    from textsieve.registry.report import build
    from textsieve.registry.report.html import render_html
    from textsieve.registry.report.probe_sections import probe_sections

    assert probes.LENGTH_BANDS == build.LENGTH_BANDS, "the probe's bands line up with the by-length table"
    sections = probe_sections(tiny_runs["a"], against_run=tiny_runs["b"], against_name="version 2")
    examples = load_examples(tiny_data / "test.jsonl")
    report = build.build_report(
        open_bundle(tiny_bundles["a"]), examples, model="m", version=1, extra_sections=sections, bootstrap_resamples=20
    )
    assert report["notes"] == []
    stored = json.loads(json.dumps(report, allow_nan=False))  # what report.json keeps, and all the pages get
    for variant in probes.VARIANTS:  # issue 12's keys scripts rely on
        assert 0.0 <= stored["order_probe"][variant]["label_change_rate"] <= 1.0
    assert stored["filters"]["filters_total"] == len(Predictor.from_bundle(tiny_bundles["a"]).filter_widths)
    assert stored["embeddings"]["comparisons"][0]["against"] == "version 2"
    page = _parse(render_html(stored, sections))
    assert page.tags["svg"] >= 4  # two order-probe charts, the filter widths, the embedding map


def test_fragments_escape_what_they_show() -> None:
    hostile = "<script>alert(1)</script>"
    order = {
        "probed": 3,
        "skipped_short": 1,
        "widths": [3],
        "rules": {"random": hostile},
        "random": {"label_change_rate": 0.5, "mean_abs_dp": 0.1, "intact_ngram_share": 0.0, "per_seed": []},
        "alternate": {"label_change_rate": None, "mean_abs_dp": None, "intact_ngram_share": None},
        "beyond_width": {"label_change_rate": 0.0, "mean_abs_dp": 0.0, "intact_ngram_share": 1.0},
        "bands": [
            {"band": "0–5", "n": 3, **{v: {"label_change_rate": 0.5, "mean_abs_dp": 0.1} for v in probes.VARIANTS}}
        ],
        "verdict": {"finding": "too_few", "text": hostile},
    }
    filters = {
        "filters_total": 2,
        "dead": [1],
        "by_class": {hostile: [{"ngram": hostile, "count": 2}]},
        "filters": [
            {
                "index": 0,
                "width": 3,
                "fires": 2,
                "fire_rate": 1.0,
                "pushes": hostile,
                "margin": 0.5,
                "agreement": 1.0,
                "top": [{"ngram": hostile, "count": 2}],
            },
            {
                "index": 1,
                "width": 3,
                "fires": 0,
                "fire_rate": 0.0,
                "pushes": None,
                "margin": None,
                "agreement": None,
                "top": [],
            },
        ],
    }
    moved = {
        "note": None,
        "comparisons": [
            {
                "title": hostile,
                "words": 3,
                "mean_distance": 0.5,
                "median_distance": 0.5,
                "still": 0,
                "note": hostile,
                "moved": [{"word": hostile, "distance": 1.0, "before": [hostile], "after": ["b"]}] * 3,
                "map": {
                    "words": [hostile, "b", "c"],
                    "seed": 0,
                    "perplexity": 2.0,
                    "before": [[0, 0], [1, 1], [2, 0]],
                    "after": [[0, 1], [1, 2], [2, 1]],
                },
            }
        ],
    }
    from textsieve.registry.report.probe_html import render_embeddings, render_filters, render_order_probe

    for fragment in (render_order_probe(order), render_filters(filters), render_embeddings(moved)):
        page = _parse(fragment)
        assert hostile in "".join(page.text), "shown as text"
    assert "#1" in render_filters(filters) and "Dead filters" in render_filters(filters)
    note = render_embeddings(embeddings.embedding_section(None))
    shown = _parse(note)
    assert shown.tags["p"] == 1 and "".join(shown.text) == embeddings.NO_RUN, "without a run folder: one line instead"
