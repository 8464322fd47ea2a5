"""How a version's word vectors moved: from the pretrained vectors it started from, and against
another version with the same vocabulary.

Movement is the cosine distance between a word's two vectors. Two separately trained versions
have no reason to share axes, so before comparing them the second is rotated onto the first by
orthogonal Procrustes over the shared words (Schönemann, 1966; the alignment Hamilton, Leskovec
and Jurafsky, 2016, "Diachronic Word Embeddings Reveal Statistical Laws of Semantic Change",
use for the same question); a rotation keeps every cosine inside one space, so the neighbour
lists are unaffected. A run fine-tuned from pretrained vectors shares their axes and needs none.

The 2-D map places each moved word twice, before and after, in one t-SNE fit (van der Maaten
and Hinton, 2008) so both positions are on the same map; scikit-learn's TSNE, seeded.
scikit-learn is needed only here, at report time (``pip install .[report]``).
"""

from __future__ import annotations

from pathlib import Path
from typing import Any

import numpy as np
from numpy.typing import NDArray

from textsieve.errors import InputError
from textsieve.registry.report.embedding_files import RunEmbeddings, read_run_embeddings
from textsieve.registry.tokenizer import Vocabulary

TOP = 15
NEIGHBOURS = 5
MAP_SEED = 0
# Distances below this are float rounding, not training (a static run's rows come back bit-equal).
STILL = 1e-6

NO_RUN = (
    "No run folder for this version, so the embedding section is left out: "
    "give the training run's folder (its embeddings.npz) to show how the word vectors moved."
)


def unit_rows(x: NDArray[np.floating]) -> NDArray[np.float64]:
    norms = np.linalg.norm(x, axis=1, keepdims=True)
    return np.asarray(x, dtype=np.float64) / np.where(norms > 0, norms, 1.0)


def cosine_distance_rows(a: NDArray[np.floating], b: NDArray[np.floating]) -> NDArray[np.float64]:
    """1 − cos between a[i] and b[i], clipped to [0, 2] as rounding can step outside it."""
    return np.asarray(np.clip(1.0 - np.sum(unit_rows(a) * unit_rows(b), axis=1), 0.0, 2.0), dtype=np.float64)


def nearest(space: NDArray[np.floating], rows: NDArray[np.int64], k: int) -> NDArray[np.int64]:
    """For each of ``rows``, the k other rows of ``space`` nearest by cosine, nearest first."""
    u = unit_rows(space)
    sims = u[rows] @ u.T
    sims[np.arange(rows.shape[0]), rows] = -np.inf  # a word is not its own neighbour
    k = min(k, space.shape[0] - 1)
    # Stable sort on −similarity: ties go to the lower row, as a full sort would.
    return np.argsort(-sims, axis=1, kind="stable")[:, :k].astype(np.int64)


def procrustes_rotation(source: NDArray[np.floating], target: NDArray[np.floating]) -> NDArray[np.float64]:
    """The orthogonal R minimising ‖source·R − target‖_F (Schönemann, 1966): R = U·Vᵀ from svd(sourceᵀ·target)."""
    u, _, vt = np.linalg.svd(np.asarray(source, np.float64).T @ np.asarray(target, np.float64))
    return np.asarray(u @ vt, dtype=np.float64)


def tsne_map(before: NDArray[np.floating], after: NDArray[np.floating], seed: int = MAP_SEED) -> dict[str, Any]:
    """One seeded t-SNE fit of the before and after vectors together; rows keep their order."""
    from sklearn.manifold import TSNE  # type: ignore[import-untyped]  # scikit-learn ships no type hints

    points = np.vstack([unit_rows(before), unit_rows(after)])
    m = points.shape[0]
    # Perplexity must stay below the number of points; a third of them is a common small-set choice.
    perplexity = float(min(30.0, max(2.0, (m - 1) / 3)))
    coords = TSNE(n_components=2, perplexity=perplexity, init="pca", random_state=seed, method="exact").fit_transform(
        points
    )
    k = before.shape[0]
    return {
        "seed": seed,
        "perplexity": perplexity,
        "before": coords[:k].tolist(),
        "after": coords[k:].tolist(),
    }


def _compare(
    words: list[str],
    before: NDArray[np.float32],
    after: NDArray[np.float32],
    *,
    kind: str,
    title: str,
    top: int,
    neighbours: int,
    seed: int,
) -> dict[str, Any]:
    distance = cosine_distance_rows(before, after)
    moved = np.argsort(-distance, kind="stable")[:top]
    moved = moved[distance[moved] > STILL].astype(np.int64)
    section: dict[str, Any] = {
        "kind": kind,
        "title": title,
        "words": len(words),
        "mean_distance": float(distance.mean()) if words else None,
        "median_distance": float(np.median(distance)) if words else None,
        "still": int((distance <= STILL).sum()),
        "moved": [],
        "map": None,
        "note": None,
    }
    if moved.size == 0:
        section["note"] = "No word vector moved: the vectors were kept fixed during training (static mode)."
        return section
    near_before = nearest(before, moved, neighbours)
    near_after = nearest(after, moved, neighbours)
    section["moved"] = [
        {
            "word": words[i],
            "distance": float(distance[i]),
            "before": [words[j] for j in nb],
            "after": [words[j] for j in na],
        }
        for i, nb, na in zip(moved.tolist(), near_before.tolist(), near_after.tolist(), strict=True)
    ]
    if moved.size >= 3:
        try:
            section["map"] = {
                "words": [words[i] for i in moved.tolist()],
                **tsne_map(before[moved], after[moved], seed),
            }
        except ImportError:
            section["note"] = "The 2-D map needs scikit-learn: pip install '.[report]'."
    return section


def _from_start(run: RunEmbeddings, *, top: int, neighbours: int, seed: int) -> dict[str, Any] | str:
    if run.start_ids.size == 0:
        return "This run started from random vectors (no --vectors), so there is no pretrained start to measure from."
    ids = run.start_ids
    words = [run.vocabulary.tokens[i] for i in ids.tolist()]
    return _compare(
        words,
        run.start,
        run.trained[ids],
        kind="from_start",
        title=f"From the pretrained vectors ({run.vectors_mode or 'unknown'} mode) to the trained ones",
        top=top,
        neighbours=neighbours,
        seed=seed,
    )


def _shared_ids(a: Vocabulary, b: Vocabulary) -> tuple[list[str], NDArray[np.int64], NDArray[np.int64]]:
    reserved = {a.tokens[a.pad_id], a.tokens[a.unk_id]}
    words = [t for t in a.tokens if t in b.index and t not in reserved]
    return (
        words,
        np.array([a.index[t] for t in words], dtype=np.int64),
        np.array([b.index[t] for t in words], dtype=np.int64),
    )


def _capitalised(name: str) -> str:
    """``name`` ("version 2", "the other version") opening a sentence."""
    return name[:1].upper() + name[1:]


def _against(
    run: RunEmbeddings, other: RunEmbeddings, name: str, *, top: int, neighbours: int, seed: int
) -> dict[str, Any] | str:
    if run.trained.shape[1] != other.trained.shape[1]:
        return (
            f"{_capitalised(name)} has {other.trained.shape[1]}-dimensional vectors and this one "
            f"{run.trained.shape[1]}: their embeddings cannot be compared."
        )
    words, ids_a, ids_b = _shared_ids(run.vocabulary, other.vocabulary)
    if len(words) < 2:
        return f"{_capitalised(name)} shares {len(words)} words with this one: too few to compare embeddings."
    before = other.trained[ids_b].astype(np.float64)
    after = run.trained[ids_a].astype(np.float64)
    shared_start = _shared_start(run, other)
    # Runs fine-tuned from the same pretrained rows share their axes: a rotation would only hide
    # part of what training moved. Otherwise the axes are arbitrary and must be aligned first.
    if not shared_start:
        before = before @ procrustes_rotation(before, after)
    section = _compare(
        words,
        before.astype(np.float32),
        after.astype(np.float32),
        kind="against",
        title=(
            f"From {name} to this version" + ("" if shared_start else " (rotated onto it by orthogonal Procrustes)")
        ),
        top=top,
        neighbours=neighbours,
        seed=seed,
    )
    section["against"] = name
    section["shared_words"] = len(words)
    section["shared_start"] = shared_start
    section["aligned"] = not shared_start
    if not shared_start and section["note"] is None:
        section["note"] = (
            "The two versions did not start from the same pretrained vectors: each began from its own random "
            "vectors, so these distances mostly show the different starts, not what training learnt."
        )
    return section


def _shared_start(a: RunEmbeddings, b: RunEmbeddings) -> bool:
    """Both runs began from the same pretrained rows for the words they share (then their axes agree)."""
    if a.start_ids.size == 0 or b.start_ids.size == 0 or a.start.shape[1] != b.start.shape[1]:
        return False
    rows_a = {a.vocabulary.tokens[i]: r for i, r in zip(a.start_ids.tolist(), a.start, strict=True)}
    rows_b = {b.vocabulary.tokens[i]: r for i, r in zip(b.start_ids.tolist(), b.start, strict=True)}
    shared = rows_a.keys() & rows_b.keys()
    return bool(shared) and all(np.array_equal(rows_a[w], rows_b[w]) for w in shared)


def embedding_section(
    run: Path | None,
    *,
    against: Path | None = None,
    against_name: str = "the other version",
    top: int = TOP,
    neighbours: int = NEIGHBOURS,
    seed: int = MAP_SEED,
) -> dict[str, Any]:
    """The words whose vectors moved most, their neighbours before and after, and a 2-D map.

    ``run`` is the version's training run folder; ``against`` another version's run folder.
    Missing pieces give a one-line ``note`` (and the rest where it can), never an exception.
    """
    if run is None:
        return {"available": False, "note": NO_RUN, "comparisons": []}
    try:
        mine = read_run_embeddings(run)
    except InputError as exc:
        return {"available": False, "note": f"Embedding section left out: {exc.message}", "comparisons": []}
    notes: list[str] = []
    comparisons: list[dict[str, Any]] = []
    first = _from_start(mine, top=top, neighbours=neighbours, seed=seed)
    if isinstance(first, dict):
        comparisons.append(first)
    else:
        notes.append(first)
    if against is not None:
        try:
            theirs = read_run_embeddings(against)
        except InputError as exc:
            notes.append(f"No comparison with {against_name}: {exc.message}")
        else:
            second = _against(mine, theirs, against_name, top=top, neighbours=neighbours, seed=seed)
            if isinstance(second, dict):
                comparisons.append(second)
            else:
                notes.append(second)
    return {
        "available": bool(comparisons),
        "note": " ".join(notes) or None,
        "comparisons": comparisons,
        "top": top,
        "neighbours": neighbours,
    }


__all__ = [
    "NO_RUN",
    "cosine_distance_rows",
    "embedding_section",
    "nearest",
    "procrustes_rotation",
    "tsne_map",
    "unit_rows",
]
