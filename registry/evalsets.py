"""Evaluation sets: a model's labelled texts for the promotion gates, stored as one normalised blob.

The file is read with the exporter's torch-free reader (JSONL, JSON array, CSV or TSV with
named text and label fields) and stored as JSONL with exactly the keys ``text`` and
``label``, so the same texts always give the same blob whatever the source format was.
"""

from __future__ import annotations

import json
from collections import Counter
from dataclasses import dataclass
from pathlib import Path

from textsieve.errors import InputError, IntegrityError


@dataclass(frozen=True, slots=True)
class LabelledText:
    text: str
    label: str


@dataclass(frozen=True)
class NormalisedEvalset:
    data: bytes
    examples: list[LabelledText]
    labels: dict[str, int]


def load_evalset(path: Path, *, text_field: str = "text", label_field: str = "label") -> NormalisedEvalset:
    from textsieve.labelled import load_examples

    examples = [LabelledText(e.text, e.label) for e in load_examples(Path(path), text_field, label_field)]
    return normalise(examples)


def normalise(examples: list[LabelledText]) -> NormalisedEvalset:
    if not examples:
        raise InputError("an evaluation set needs at least one labelled text")
    data = "".join(
        json.dumps({"label": e.label, "text": e.text}, ensure_ascii=False, sort_keys=True) + "\n" for e in examples
    ).encode("utf-8")
    return NormalisedEvalset(data, examples, dict(sorted(Counter(e.label for e in examples).items())))


def parse_stored(data: bytes) -> list[LabelledText]:
    """Read back a stored (already verified) evaluation-set blob."""
    try:
        rows = [json.loads(line) for line in data.decode("utf-8").split("\n") if line]
        return [LabelledText(r["text"], r["label"]) for r in rows]
    except (UnicodeDecodeError, json.JSONDecodeError, KeyError, TypeError) as exc:
        raise IntegrityError(f"stored evaluation set cannot be read ({exc})") from exc


def unknown_labels(evalset_labels: dict[str, int] | list[str], model_labels: list[str]) -> list[str]:
    return sorted(set(evalset_labels) - set(model_labels))


__all__ = ["LabelledText", "NormalisedEvalset", "load_evalset", "normalise", "parse_stored", "unknown_labels"]
