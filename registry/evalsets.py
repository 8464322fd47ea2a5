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
    # Texts that occur more than once count once per row in every figure, and a text given two labels
    # is wrong for every version on one of them: both are kept (two reviewers may disagree) but reported.
    repeated: int = 0  # rows whose text an earlier row has
    conflicting: tuple[str, ...] = ()  # texts given more than one label


def load_evalset(path: Path, *, text_field: str = "text", label_field: str = "label") -> NormalisedEvalset:
    from textsieve.labelled import load_examples

    # Stored labels' rule: a set names the labels of published versions, some published before the
    # whole rule on labels (textsieve/labelled.py label_problem); a label no version has is refused anyway.
    found = load_examples(Path(path), text_field, label_field, stored_labels=True)
    examples = [LabelledText(e.text, e.label) for e in found]
    return normalise(examples)


def normalise(examples: list[LabelledText]) -> NormalisedEvalset:
    if not examples:
        raise InputError("an evaluation set needs at least one labelled text")
    data = "".join(
        json.dumps({"label": e.label, "text": e.text}, ensure_ascii=False, sort_keys=True) + "\n" for e in examples
    ).encode("utf-8")
    seen: dict[str, set[str]] = {}
    for e in examples:
        seen.setdefault(e.text, set()).add(e.label)
    conflicting = tuple(text for text, labels in seen.items() if len(labels) > 1)
    labels = dict(sorted(Counter(e.label for e in examples).items()))
    return NormalisedEvalset(data, examples, labels, len(examples) - len(seen), conflicting)


def repeats_warning(repeated: int, conflicting: int, texts: int) -> str | None:
    """One line about repeated and contradicting texts in an evaluation set, or None."""
    if not repeated:
        return None
    line = f"warning: {repeated} of the {texts} rows repeat an earlier row's text (each counts in every figure)"
    if conflicting:
        line += f"; {conflicting} texts have more than one label, so every version is wrong on one of them"
    return line


def parse_stored(data: bytes) -> list[LabelledText]:
    """Read back a stored (already verified) evaluation-set blob."""
    try:
        rows = [json.loads(line) for line in data.decode("utf-8").split("\n") if line]
        return [LabelledText(r["text"], r["label"]) for r in rows]
    except (UnicodeDecodeError, json.JSONDecodeError, KeyError, TypeError) as exc:
        raise IntegrityError(f"stored evaluation set cannot be read ({exc})") from exc


def refused_rows(examples: list[LabelledText]) -> list[tuple[int, str]]:
    """(row, why) of each text the service would refuse (textsieve/texts.py), rows counted from 1.

    Sets registered before labelled files obeyed those rules may hold such texts (a NUL, only
    zero-width characters); and a blob written by hand may hold a lone surrogate."""
    from textsieve.texts import text_refusal

    out = []
    for row, e in enumerate(examples, 1):
        why = text_refusal(e.text)
        if why is not None:
            out.append((row, why))
    return out


def refused_summary(refused: list[tuple[int, str]], texts: int, *, shown: int = 3) -> str:
    """'2 of its 60 texts are ones the service refuses (row 4: text contains …; row 8: text has …)'."""
    rows = "; ".join(f"row {row}: the text {why.split(';')[0]}" for row, why in refused[:shown])
    more = f"; and {len(refused) - shown} more" if len(refused) > shown else ""
    verb = "is one" if len(refused) == 1 else "are ones"
    return f"{len(refused)} of its {texts} texts {verb} the service refuses ({rows}{more})"


def unknown_labels(evalset_labels: dict[str, int] | list[str], model_labels: list[str]) -> list[str]:
    return sorted(set(evalset_labels) - set(model_labels))


__all__ = [
    "LabelledText",
    "NormalisedEvalset",
    "load_evalset",
    "normalise",
    "parse_stored",
    "refused_rows",
    "refused_summary",
    "repeats_warning",
    "unknown_labels",
]
