"""The model card written into every bundle (after Mitchell et al., 2019, "Model Cards for
Model Reporting", FAT*)."""

from __future__ import annotations

from textsieve.registry.manifest import CalibrationInfo, LengthInfo, Manifest

CAUTIONS = """\
## Cautions

- Predictions are aids for human review, not decisions. Where a label routes, ranks, hides or
  flags what a person wrote, an accountable person must be able to see, question and overrule it.
- The model learns whatever patterns its training data holds, including biases about topics,
  dialects, names or groups of people. Check its errors per group that matters in your setting
  before relying on it.
- Calibrated probabilities hold only for texts like the validation data. Monitor the share of
  unknown tokens, truncation and the label mix in production, and re-evaluate when they drift.
- Highlighted spans show which n-grams drove the score; they explain the model, not the truth.
"""


def ordinal(p: float) -> str:
    """99 → '99th', 1 → '1st', 22 → '22nd', 99.5 → '99.5th'."""
    n = int(p) if float(p).is_integer() else p
    if isinstance(n, float):
        return f"{n}th"
    suffix = "th" if 10 <= n % 100 <= 20 else {1: "st", 2: "nd", 3: "rd"}.get(n % 10, "th")
    return f"{n}{suffix}"


def tokens(n: int) -> str:
    """'1 token', '14 tokens'."""
    return f"{n} token{'' if n == 1 else 's'}"


def truncation_rule(lengths: LengthInfo) -> str:
    """Where max_length came from. It is the percentile of training lengths unless that is shorter
    than the widest filter, which a text must fill (prepare.length_info): then it is the widest filter."""
    percentile = f"the {ordinal(lengths.percentile)} percentile of training lengths"
    if lengths.max_length == lengths.min_length:
        return f"the widest filter, as {percentile} is no longer"
    return percentile


def _metrics_caveat(m: Manifest) -> list[str]:
    """Validation figures are not held-out figures: the same texts chose the epoch and the temperature."""
    if m.metrics.split != "validation":
        return []
    return [
        "",
        "These are the validation texts, which also chose the training epoch (early stopping) and the",
        "temperature, so the figures are optimistic; `textsieve export --test FILE` measures held-out texts.",
    ]


def _calibration(c: CalibrationInfo) -> list[str]:
    from textsieve.exporter.export import temperature_fitted
    from textsieve.registry.measures import TEMPERATURE_BOUNDS, temperature_bound

    bound = temperature_bound(c.temperature) if temperature_fitted(c) else None
    figures = f"(NLL {c.nll_before:.4f} → {c.nll_after:.4f}, ECE {c.ece_before:.4f} → {c.ece_after:.4f})"
    if bound == "upper":
        return [
            f"Not a fit: temperature scaling (Guo et al., 2017) on {c.texts} validation texts stopped at the upper",
            f"bound of its search, T = {TEMPERATURE_BOUNDS[1]:g} {figures}. The loss kept falling as the",
            "probabilities flattened towards uniform: the model's scores carry little information about the",
            "right label of these texts, or the model is badly over-confident (often sure and wrong). Its",
            "probabilities are near uniform and say little. Check the training and validation labels and the",
            "metrics above before serving it; retrain (more or cleaner data, more epochs) rather than trust it.",
        ]
    if bound == "lower":
        return [
            f"Not a fit: temperature scaling (Guo et al., 2017) on {c.texts} validation texts stopped at the lower",
            f"bound of its search, T = {TEMPERATURE_BOUNDS[0]:g} {figures}. The loss kept falling as the",
            "probabilities sharpened, so every logit is multiplied by 20 and probabilities sit near 0 or 1, for",
            "the texts the model gets wrong too: the model looks badly under-confident on these texts, which",
            "are too few or too easy to say how confident it should be. Treat the probabilities as",
            "uncalibrated; a larger or harder validation set (--valid) lets the export fit T.",
        ]
    if temperature_fitted(c):
        return [
            f"Temperature scaling (Guo et al., 2017) fitted on {c.texts} validation texts: T = {c.temperature:.4f};",
            f"NLL {c.nll_before:.4f} → {c.nll_after:.4f}, ECE {c.ece_before:.4f} → {c.ece_after:.4f}.",
        ]
    return [
        f"Not calibrated: the model classifies all {c.texts} validation texts correctly, so temperature scaling",
        "(Guo et al., 2017) has no minimum (a lower T always lowers their loss) and gives no evidence of how",
        "confident the model should be; T = 1, the trained model's own probabilities",
        f"(NLL {c.nll_before:.4f}, ECE {c.ece_before:.4f}). Treat them as uncalibrated; a larger or harder",
        "validation set (--valid) lets the export fit T.",
    ]


def render_card(m: Manifest, *, model_name: str = "(set on publish)") -> str:
    a = m.architecture
    c = m.calibration
    vectors = (
        f"pretrained vectors ({a.vectors.dim}d, {a.vectors.mode}, {a.vectors.found} tokens found)"
        if a.vectors
        else "embeddings learned from scratch"
    )
    max_norm = "no max-norm constraint" if a.max_norm is None else f"max-norm {a.max_norm:g}"
    lines = [
        f"# Model card: {model_name}",
        "",
        "## Intended use",
        "",
        f"Sorting short texts into {len(m.labels)} labels ({', '.join(m.labels)}) to support people who",
        "review them. Not for decisions about people without human review; not for languages,",
        "domains or text lengths far from the training data.",
        "",
        "## Model",
        "",
        f"A convolutional sentence classifier (Kim, 2014): {a.embedding_dim}-dimensional {vectors}; filter",
        f"widths {', '.join(map(str, a.widths))} with {a.maps} feature maps each, ReLU, max-over-time pooling,",
        f"dropout {a.dropout}, {max_norm}. Vocabulary {m.vocabulary.size} tokens;",
        f"texts are truncated to {tokens(m.lengths.max_length)} ({truncation_rule(m.lengths)};",
        f"{m.lengths.truncation_rate:.2%} of training texts were longer).",
        "",
        "## Data",
        "",
        f"{m.training.rows} training and {m.training.valid_rows} validation examples; training data",
        f"sha256 `{m.training.data_sha256}`.",
        "",
        "## Metrics",
        "",
        "| split | texts | accuracy | macro-F1 | ECE (15 bins) | NLL |",
        "| --- | ---: | ---: | ---: | ---: | ---: |",
        f"| {m.metrics.split} | {m.metrics.texts} | {m.metrics.accuracy:.4f} | {m.metrics.macro_f1:.4f} | "
        f"{m.metrics.ece:.4f} | {m.metrics.nll:.4f} |",
        *_metrics_caveat(m),
        "",
        "## Calibration",
        "",
        *_calibration(c),
        "",
        "## Export check",
        "",
        f"onnxruntime against PyTorch on {m.parity.texts} validation texts: max |Δprobability| "
        f"{m.parity.max_abs_prob_diff:.2e} (tolerance {m.parity.tolerance:.0e}), label agreement "
        f"{m.parity.label_agreement:.2%}, argmax-position agreement {m.parity.position_agreement:.2%}; "
        f"a text alone vs padded in a batch differs by at most {m.parity.batch_invariance_max_diff:.2e}.",
        "",
        CAUTIONS,
    ]
    return "\n".join(lines)
