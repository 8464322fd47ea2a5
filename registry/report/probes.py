"""How a version uses word order, and what its filters look for.

**Order probe.** A CNN with max-over-time pooling sees a text as a set of n-gram windows no
wider than its widest filter; where each window sits does not matter to the pooling. So
reordering whole chunks wider than every filter should change its answers much less than a
full shuffle does, which destroys the n-grams themselves. The probe measures that on the
evaluation set with three reorderings of each text's tokens (the tokens the model sees, after
truncation, as the tokenizer splits them, rejoined with spaces):

- ``random``: a uniform shuffle, one per seed;
- ``alternate``: positions 1, 3, 5, … then 2, 4, 6, … (counting from 1), no randomness;
- ``beyond_width``: the text cut into consecutive windows of ``window`` tokens (one more than
  the widest filter), the windows shuffled, the order inside each window kept.

For each it reports the share of texts whose label changes and the mean absolute change of
the calibrated probability of the originally predicted class, overall and per length band,
and a verdict from the ratio of the beyond-width change to the full-shuffle change.

**Filters** (Jacovi, Sar Shalom and Goldberg, 2018, "Understanding Convolutional Neural
Networks for Text Classification"): each filter with max-over-time pooling acts as an n-gram
detector; the n-gram it reports for a text is the window at its pooled position when the
pooled value is above zero. Counting those n-grams over the evaluation set shows what each
filter looks for; its output-layer weights say which class it pushes towards.
"""

from __future__ import annotations

from collections import Counter
from collections.abc import Sequence
from typing import Any

import numpy as np
from numpy.typing import NDArray

from textsieve.registry.runtime import LOGITS_CHUNK, Encoded, Outputs, Predictor
from textsieve.registry.stats import bootstrap_interval

# Token-count bands (inclusive; the last is open), the same as the report's "by text length"
# (build.LENGTH_BANDS): the caller passes those so both tables line up.
LENGTH_BANDS: tuple[tuple[int, int | None], ...] = ((0, 5), (6, 10), (11, 20), (21, 40), (41, 80), (81, None))
VARIANTS = ("random", "alternate", "beyond_width")
# Verdict thresholds on ratio = mean |Δp| beyond width ÷ mean |Δp| random shuffle. Half is the
# line between "mostly" and not (common practice for the word); below 1 % mean |Δp| under a full
# shuffle the model is taken to ignore order altogether.
MOSTLY = 0.5
ORDER_FREE = 0.01
MIN_ELIGIBLE = 20
RESAMPLES = 1000
BOOTSTRAP_SEED = 0


# -- the reorderings (index arrays: new position i holds old token order[i]) --------------------
def random_order(n: int, rng: np.random.Generator) -> NDArray[np.int64]:
    """A uniform shuffle, redrawn (at most a few times) when it happens to be the identity."""
    order = np.arange(n)
    for _ in range(8):
        order = rng.permutation(n)
        if n < 2 or not np.array_equal(order, np.arange(n)):
            break
    return order.astype(np.int64)


def alternate_order(n: int) -> NDArray[np.int64]:
    """Odd positions then even ones, counting from 1: indices 0, 2, 4, … then 1, 3, 5, …"""
    return np.concatenate([np.arange(0, n, 2), np.arange(1, n, 2)]).astype(np.int64)


def beyond_width_order(n: int, window: int, rng: np.random.Generator) -> NDArray[np.int64]:
    """Consecutive windows of ``window`` tokens (the last may be shorter) in shuffled order."""
    blocks = [np.arange(lo, min(lo + window, n)) for lo in range(0, n, window)]
    order = random_order(len(blocks), rng)
    if not blocks:
        return np.zeros(0, dtype=np.int64)
    return np.concatenate([blocks[i] for i in order]).astype(np.int64)


def intact_share(order: NDArray[np.int64], width: int) -> float:
    """Share of the text's ``width``-grams still contiguous and in order after the reordering."""
    n = order.shape[0]
    if n < width or width == 1:
        return 1.0
    # new positions i, i+1 hold old tokens j, j+1; a width-gram is intact when width-1 such steps run on
    steps = np.concatenate([[0], np.cumsum(np.diff(order) == 1)])
    return float(np.mean(steps[width - 1 :] - steps[: n - width + 1] == width - 1))


def band_name(band: tuple[int, int | None]) -> str:
    lo, hi = band
    return f"{lo}+" if hi is None else f"{lo}–{hi}"


def in_band(lengths: NDArray[np.int64], band: tuple[int, int | None]) -> NDArray[np.bool_]:
    lo, hi = band
    return (lengths >= lo) & (True if hi is None else lengths <= hi)


# -- the probe ------------------------------------------------------------------------------------
def _reordered(enc: Encoded, order: NDArray[np.int64]) -> Encoded:
    ids = enc.ids
    return Encoded(enc.text, [ids[i] for i in order.tolist()], [], [], len(ids), enc.unknown)


def reorder_text(pieces: Sequence[str], order: NDArray[np.int64]) -> str:
    """The words (as written, one per token) in ``order``, rejoined with spaces."""
    return " ".join(pieces[i] for i in order.tolist())


def _figures(changed: NDArray[Any], dp: NDArray[Any]) -> dict[str, float | None]:
    """Share of labels changed (per text: 0/1, or the share over seeds) and mean |Δp|."""
    if changed.size == 0:
        return {"label_change_rate": None, "mean_abs_dp": None}
    return {"label_change_rate": float(changed.mean()), "mean_abs_dp": float(dp.mean())}


def order_probe(
    predictor: Predictor,
    texts: Sequence[str],
    *,
    seeds: Sequence[int] = (0, 1, 2),
    bands: Sequence[tuple[int, int | None]] = LENGTH_BANDS,
    window: int | None = None,
) -> dict[str, Any]:
    """Label changes and mean |Δp| of the predicted class under three reorderings; see the module doc."""
    widths = sorted({int(w) for w in predictor.filter_widths.tolist()})
    window = max(widths) + 1 if window is None else window
    encoded = [predictor.encode(t) for t in texts]
    kept = [e for e in encoded if len(e.ids) >= 2]  # one token has only one order
    lengths = np.array([len(e.ids) for e in kept], dtype=np.int64)
    m = len(kept)

    # Seed s draws the texts' shuffles in order; the window shuffles use their own stream.
    random_rngs = [np.random.default_rng(s) for s in seeds]
    beyond_rng = np.random.default_rng([seeds[0] if seeds else 0, 1])
    orders: dict[str, list[list[NDArray[np.int64]]]] = {
        "random": [[random_order(n, rng) for n in lengths] for rng in random_rngs],
        "alternate": [[alternate_order(n) for n in lengths]],
        "beyond_width": [[beyond_width_order(n, window, beyond_rng) for n in lengths]],
    }
    # The token ids are reordered directly: tokenizing reorder_text's output (the words rejoined
    # with spaces) gives exactly these ids (tests hold them equal), at a fifth of the cost.
    runs: list[Encoded] = list(kept)
    for variant in VARIANTS:
        for draw in orders[variant]:
            runs.extend(_reordered(e, o) for e, o in zip(kept, draw, strict=True))
    # Six runs of every text: logits alone, in chunks (Predictor.logits), not every filter's outputs.
    probs = predictor.probabilities(predictor.logits(runs)) if runs else None

    change: dict[str, list[NDArray[np.bool_]]] = {}
    delta: dict[str, list[NDArray[np.float64]]] = {}
    if probs is not None:
        base = probs[:m]
        label = base.argmax(axis=1)
        rows = np.arange(m)
        at = m
        for variant in VARIANTS:
            change[variant], delta[variant] = [], []
            for _ in orders[variant]:
                p = probs[at : at + m]
                at += m
                change[variant].append(p.argmax(axis=1) != label)
                delta[variant].append(np.abs(p[rows, label] - base[rows, label]))
    else:
        for variant in VARIANTS:
            change[variant] = [np.zeros(0, bool) for _ in orders[variant]]
            delta[variant] = [np.zeros(0) for _ in orders[variant]]

    widest = max(widths)
    result: dict[str, Any] = {
        "n": len(texts),
        "probed": m,
        "skipped_short": len(texts) - m,
        "widths": widths,
        "window": window,
        "seeds": list(seeds),
        "bands": [],
        "rules": {
            "random": f"words shuffled at random ({len(seeds)} seeds)",
            "alternate": "words at positions 1, 3, 5, … first, then 2, 4, 6, …",
            "beyond_width": (
                f"text cut into windows of {window} words (one more than the widest filter, {widest}); "
                "windows shuffled, order inside each kept"
            ),
        },
    }
    for variant in VARIANTS:
        ch = np.mean(np.stack(change[variant]), axis=0) if m else np.zeros(0)
        dp = np.mean(np.stack(delta[variant]), axis=0) if m else np.zeros(0)
        entry: dict[str, Any] = _figures(ch, dp)
        # Averaged over seeds per text, so the rate is the expected share of changed labels.
        entry["intact_ngram_share"] = (
            float(np.mean([intact_share(o, widest) for draw in orders[variant] for o in draw])) if m else None
        )
        if variant == "random":
            entry["per_seed"] = [
                {"seed": int(s), **_figures(c, d)}
                for s, c, d in zip(seeds, change[variant], delta[variant], strict=True)
            ]
        result[variant] = entry
        result[f"_{variant}"] = (ch, dp)  # per-text means, removed below

    for band in bands:
        rows_b = in_band(lengths, band)
        row: dict[str, Any] = {"band": band_name(band), "lowest": band[0], "highest": band[1], "n": int(rows_b.sum())}
        for variant in VARIANTS:
            ch, dp = result[f"_{variant}"]
            row[variant] = _figures(ch[rows_b], dp[rows_b])
        result["bands"].append(row)

    result["verdict"] = _verdict(result, lengths, window)
    for variant in VARIANTS:
        del result[f"_{variant}"]
    return result


def _verdict(result: dict[str, Any], lengths: NDArray[np.int64], window: int) -> dict[str, Any]:
    """Plain words on whether order matters mostly inside the filter widths, from texts of at
    least two windows (shorter ones cannot be reordered beyond the widths at all)."""
    random_dp: NDArray[np.float64] = result["_random"][1]
    beyond_dp: NDArray[np.float64] = result["_beyond_width"][1]
    eligible = np.flatnonzero(lengths >= 2 * window)
    out: dict[str, Any] = {"eligible": int(eligible.size), "min_tokens": 2 * window}
    if eligible.size < MIN_ELIGIBLE:
        out.update(
            finding="too_few",
            ratio=None,
            ratio_interval=None,
            text=(
                f"Too few texts of at least {2 * window} words ({eligible.size}, need {MIN_ELIGIBLE}) to tell "
                "whether the model relies on order inside its filter widths or beyond them."
            ),
        )
        return out
    r, b = random_dp[eligible], beyond_dp[eligible]
    r_mean, b_mean = float(r.mean()), float(b.mean())

    def ratio(idx: NDArray[np.int64]) -> float:
        denom = float(r[idx].mean())
        return float(b[idx].mean()) / denom if denom > 0 else 0.0

    lo, hi = bootstrap_interval(ratio, int(eligible.size), RESAMPLES, BOOTSTRAP_SEED)
    value = b_mean / r_mean if r_mean > 0 else 0.0
    out.update(ratio=value, ratio_interval=[lo, hi], resamples=RESAMPLES, bootstrap_seed=BOOTSTRAP_SEED)
    figures = (
        f"a full shuffle moves the predicted class's probability by {r_mean:.3f} on average, "
        f"reordering whole {window}-word windows by {b_mean:.3f} (ratio {value:.2f}, 95 % interval {lo:.2f}–{hi:.2f}, "
        f"{eligible.size} texts of at least {2 * window} words)"
    )
    if r_mean < ORDER_FREE:
        out.update(
            finding="order_free",
            text=(
                f"Word order hardly matters to this model: {figures}. It acts close to a bag of words, "
                "so the figures cannot show that it relies on order inside its filter widths."
            ),
        )
    elif hi < MOSTLY:
        out.update(
            finding="inside_widths",
            text=(
                f"The model is sensitive mostly to word order inside its filter widths, as max-over-time "
                f"pooling predicts: {figures}."
            ),
        )
    elif lo > MOSTLY:
        out.update(
            finding="beyond_widths",
            text=(
                f"The figures do not show the model relying mostly on order inside its filter widths: {figures}. "
                "Moving whole windows changes its answers nearly as much as a full shuffle."
            ),
        )
    else:
        out.update(
            finding="inconclusive",
            text=(
                "The figures cannot tell whether the model relies mostly on order inside its filter widths: "
                f"{figures}; the interval straddles {MOSTLY}."
            ),
        )
    return out


# -- filters --------------------------------------------------------------------------------------
def output_weights(out: Outputs) -> NDArray[np.float64]:
    """W[c, f] for every filter that fired, recovered from contributions = pooled · W (NaN if never)."""
    filters = out.contributions.shape[1]
    if out.pooled.shape[0] == 0:
        return _weights(np.full(filters, -np.inf), np.zeros((filters, out.contributions.shape[2])))
    best = out.pooled.argmax(axis=0)  # the largest pooled value divides with the least rounding
    return _weights(out.pooled[best, np.arange(filters)], out.contributions[best, np.arange(filters), :])


def _weights(top: NDArray[np.floating], contrib: NDArray[np.floating]) -> NDArray[np.float64]:
    """W[c, f] from each filter's largest pooled value ``top`` [F] and its contributions [F, C]."""
    weights = np.full((contrib.shape[1], contrib.shape[0]), np.nan)
    top64 = top.astype(np.float64)
    fired = top64 > 0
    weights[:, fired] = (contrib[fired].astype(np.float64) / top64[fired, None]).T
    return weights


def triggers(predictor: Predictor, encoded: Sequence[Encoded], out: Outputs) -> list[Counter[tuple[int, ...]]]:
    """Per filter, how often each n-gram (as vocabulary ids) was its max-over-time window with a pooled value > 0."""
    widths = predictor.filter_widths.tolist()
    lengths = np.fromiter((len(e.ids) for e in encoded), dtype=np.int64, count=len(encoded))
    # One id matrix with -1 past each text's end, so every filter's windows are one gather and one
    # np.unique (a 10,000-text set has millions of filter firings: too many for a Python loop).
    ids = np.full((len(encoded), int(lengths.max(initial=0)) + max(widths, default=0)), -1, dtype=np.int64)
    for row, enc in enumerate(encoded):
        ids[row, : len(enc.ids)] = enc.ids
    counts: list[Counter[tuple[int, ...]]] = []
    for f, width in enumerate(widths):
        # An empty text's only window is padding: no n-gram to name.
        rows = np.flatnonzero((out.pooled[:, f] > 0) & (lengths > 0))
        grams = ids[rows[:, None], out.positions[rows, f][:, None] + np.arange(width)]
        found: Counter[tuple[int, ...]] = Counter()
        if rows.size:
            unique, times = np.unique(grams, axis=0, return_counts=True)
            for gram, k in zip(unique.tolist(), times.tolist(), strict=True):
                # A window that runs past a short text's end keeps only the text's tokens.
                found[tuple(i for i in gram if i >= 0)] += k
        counts.append(found)
    return counts


def _filter_outputs(
    predictor: Predictor, encoded: list[Encoded]
) -> tuple[NDArray[np.float32], NDArray[np.float64], list[Counter[tuple[int, ...]]]]:
    """Every text's pooled values, the output weights and each filter's trigger counts, the graph run
    on :data:`~textsieve.registry.runtime.LOGITS_CHUNK` texts at a time: one run of a whole large
    set keeps every filter's window and per-class contributions for every text (gigabytes), where
    only the pooled values are needed for all of them. The same figures as one run: each filter's
    weights come from the first text with its largest pooled value, as ``output_weights`` takes it."""
    filters = len(predictor.filter_widths)
    pooled = np.empty((len(encoded), filters), np.float32)
    counts: list[Counter[tuple[int, ...]]] = [Counter() for _ in range(filters)]
    top = np.full(filters, -np.inf, dtype=np.float32)
    contrib = np.zeros((filters, len(predictor.labels)), np.float32)
    for lo in range(0, len(encoded), LOGITS_CHUNK):
        part = encoded[lo : lo + LOGITS_CHUNK]
        out = predictor.run(part)
        pooled[lo : lo + len(part)] = out.pooled
        for found, more in zip(counts, triggers(predictor, part, out), strict=True):
            found.update(more)
        best = out.pooled.argmax(axis=0)
        value = out.pooled[best, np.arange(filters)]
        higher = value > top  # strictly: an equal value in a later chunk is not the first
        top[higher] = value[higher]
        contrib[higher] = out.contributions[best[higher], np.flatnonzero(higher), :]
    return pooled, _weights(top, contrib), counts


def filter_section(
    predictor: Predictor, texts: Sequence[str], labels: Sequence[str], *, top: int = 5
) -> dict[str, Any]:
    """Each filter's most frequent triggering n-grams, the class it pushes towards, and dead filters."""
    if len(texts) != len(labels):
        raise ValueError(f"{len(texts)} texts but {len(labels)} labels")
    encoded = [predictor.encode(t, offsets=False) for t in texts]
    pooled, weights, counts = _filter_outputs(predictor, encoded)
    names = predictor.labels
    vocab = predictor.vocab.tokens
    gold = np.array([names.index(x) if x in names else -1 for x in labels], dtype=np.int64)
    fires = pooled > 0  # [n, F]
    filters: list[dict[str, Any]] = []
    dead: list[int] = []
    for f, width in enumerate(predictor.filter_widths.tolist()):
        n_fired = int(fires[:, f].sum())
        entry: dict[str, Any] = {"index": f, "width": int(width), "fires": n_fired}
        entry["fire_rate"] = n_fired / len(texts) if texts else 0.0
        if n_fired == 0:
            dead.append(f)
            entry.update(pushes=None, margin=None, weights=None, agreement=None, mean_pooled=None, top=[])
            filters.append(entry)
            continue
        w = weights[:, f]
        order = np.argsort(-w)
        c = int(order[0])
        # How far it favours its class over the runner-up: with two classes ±, with more the gap.
        margin = float(w[c] - w[order[1]]) if w.shape[0] > 1 else float(w[c])
        agree = gold[fires[:, f]] == c
        entry.update(
            pushes=names[c],
            margin=margin,
            weights={names[k]: float(w[k]) for k in range(w.shape[0])},
            # Of the evaluation texts it fires on, the share whose true label is its class.
            agreement=float(agree.mean()),
            mean_pooled=float(pooled[fires[:, f], f].mean()),
            top=[
                {"ngram": " ".join(vocab[i] for i in key), "count": k}
                for key, k in sorted(counts[f].items(), key=lambda kv: (-kv[1], kv[0]))[:top]
            ],
        )
        filters.append(entry)
    return {
        "n": len(texts),
        "filters_total": len(filters),
        "dead": dead,
        "dead_share": len(dead) / len(filters) if filters else 0.0,
        "top": top,
        "filters": filters,
        "by_class": _by_class(filters, names),
    }


def _by_class(filters: list[dict[str, Any]], names: Sequence[str], keep: int = 8) -> dict[str, list[dict[str, Any]]]:
    """For each class, the n-grams that its filters fire on most often, summed over those filters."""
    totals: dict[str, Counter[str]] = {name: Counter() for name in names}
    for entry in filters:
        if entry["pushes"] is None:
            continue
        for t in entry["top"]:
            totals[entry["pushes"]][t["ngram"]] += t["count"]
    return {
        name: [{"ngram": g, "count": k} for g, k in sorted(c.items(), key=lambda kv: (-kv[1], kv[0]))[:keep]]
        for name, c in totals.items()
    }


__all__ = [
    "LENGTH_BANDS",
    "VARIANTS",
    "alternate_order",
    "band_name",
    "in_band",
    "beyond_width_order",
    "filter_section",
    "intact_share",
    "order_probe",
    "output_weights",
    "random_order",
    "reorder_text",
    "triggers",
]
