"""From input rows to output rows: pick each row's text (or say why it has none), score the texts,
and lay the results out in the output's columns. Shared by local runs, Dask workers and the API."""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass
from itertools import chain
from typing import TYPE_CHECKING, Any

from textsieve.errors import InputError
from textsieve.labelled import json_kind
from textsieve.scoring.columns import Layout
from textsieve.texts import nothing_to_classify, text_refusal

if TYPE_CHECKING:
    import numpy as np
    from numpy.typing import NDArray

    from textsieve.registry.runtime import Predictor

Row = dict[str, Any]


class Unreadable(str):
    """A line that holds no row at all (not JSON); its text says why. Stands in for the row."""


class Misshapen(dict[str, Any]):
    """A CSV row whose values do not line up with the header (more or fewer of them), so which
    value is the text cannot be trusted: the values are kept for the output's columns, the row is
    not scored, and ``problem`` says why."""

    __slots__ = ("problem",)

    def __init__(self, values: dict[str, Any], problem: str) -> None:
        super().__init__(values)
        self.problem = problem


@dataclass(slots=True)
class Scored:
    """Results for a list of texts, in their order: best class index, probabilities, spans."""

    best: NDArray[np.int64]
    probabilities: NDArray[np.float64]
    spans: list[list[dict[str, object]]] | None


# Texts handed to one Predictor.run at most. Its outputs hold every filter's pooled value, position
# and contribution to every class for each text (the demo model: 300 filters × 4 classes, ~8 KB a
# text), all alive until the call returns. A Dask partition is a whole row group: at 125,000 rows
# scored in one call, each worker peaked at 2.6 GB and spent twice the CPU of the same texts in
# pieces (bench/README.md, "Where a Dask run's extra time goes"). Pieces of 2,048, as the local
# pool's (scoring/pool.py pieces), cost no more a text than any larger piece measured.
PIECE = 2048


def score_texts(predictor: Predictor, texts: Sequence[str], spans: int) -> Scored:
    """The service's arithmetic (Predictor.run, temperature-scaled softmax, spans) without building
    a Prediction object per text; at most ``PIECE`` texts at a time, whatever ``len(texts)``."""
    if len(texts) <= PIECE:
        return _score_piece(predictor, texts, spans)
    import numpy as np

    done = [_score_piece(predictor, texts[lo : lo + PIECE], spans) for lo in range(0, len(texts), PIECE)]
    found = None if spans <= 0 else list(chain.from_iterable(p.spans or () for p in done))
    return Scored(np.concatenate([p.best for p in done]), np.concatenate([p.probabilities for p in done]), found)


def _score_piece(predictor: Predictor, texts: Sequence[str], spans: int) -> Scored:
    encoded = [predictor.encode(t, offsets=spans > 0) for t in texts]
    out = predictor.run(encoded)
    probs = predictor.probabilities(out.logits)
    best = probs.argmax(axis=1)
    found = None
    if spans > 0:
        import numpy as np

        from textsieve.registry.spans import batch_spans

        # The whole list's spans at once (~50 µs a text fewer than Predictor.spans one by one).
        found = batch_spans(predictor, encoded, out, best, np.full(len(encoded), spans, dtype=np.int64))
    return Scored(best, probs, found)


def article(noun: str) -> str:
    """``noun`` with "a" or "an" before it, by its first letter: "an int", "a float"."""
    return f"{'an' if noun[:1].lower() in 'aeiou' else 'a'} {noun}"


def text_problem(row: Any, field: str) -> str | None:
    """Why this row has no text to score, or None when it has one."""
    if isinstance(row, Unreadable):
        return str(row)
    if isinstance(row, Misshapen):
        return row.problem
    if not isinstance(row, dict):
        return "not a JSON object"
    if field not in row:
        return f"text field {field!r} is missing"
    if row[field] is None:  # JSON's null (RFC 8259 §3), Parquet's and Arrow's null
        return f"text field {field!r} is null, not a string"
    value = row[field]
    if not isinstance(value, str):
        return f"text field {field!r} is {json_kind(value)}, not a string"
    why = nothing_to_classify(value)
    if why is None:
        # A NUL or a lone surrogate: refused by the HTTP API, predict and score_frame, in these words.
        why = text_refusal(value)
    if why is not None:
        return f"text field {field!r} {why}"
    return None


def new_field(rows: Sequence[Any], known: frozenset[str]) -> tuple[int, str] | None:
    """The first row (its index) holding a field not in ``known``, with that field; None when no
    row does. JSON Lines rows need not share their fields: the output's columns are fixed by the
    first rows, and a field that first appears later has no column to go to."""
    dicts = [r for r in rows if type(r) is dict]
    if known.issuperset(chain.from_iterable(dicts)):  # the common case: one pass at C speed
        return None
    for i, row in enumerate(rows):
        if type(row) is dict:
            for name in row:
                if name not in known:
                    return i, name
    return None


def check_fields(rows: Sequence[Any], known: frozenset[str] | None, *, first_row: int, sampled: int) -> None:
    """InputError naming the first row with a field outside ``known`` (None: the columns were
    named by ``--keep``, and other fields are left out on purpose)."""
    if known is None:
        return
    found = new_field(rows, known)
    if found is None:
        return
    i, name = found
    example = ",".join([*sorted(known), name])
    raise InputError(
        f"row {first_row + i + 1:,} has the field {name!r}, which none of the first {sampled:,} rows has, so the "
        f"output has no column for it; name the fields to carry with --keep (e.g. --keep {example}) "
        "or leave them all out with --keep ''"
    )


@dataclass(slots=True)
class Split:
    """A chunk's texts to score, and the rows that have none (row index → why)."""

    texts: list[str]
    scored_rows: list[int]
    problems: dict[int, str]


def split(rows: Sequence[Any], field: str, *, strict: bool, first_row: int) -> Split:
    """Separate scorable rows from bad ones; with ``strict`` the first bad row is an InputError."""
    texts: list[str] = []
    scored: list[int] = []
    problems: dict[int, str] = {}
    for i, row in enumerate(rows):
        # Most rows are a plain object whose text starts with an ASCII character other than whitespace:
        # such a text has something to classify (text_problem says None, after three calls and a
        # strip()), so it is taken here; every other row gets text_problem's own verdict. A NUL in a
        # text taken here is looked for once a chunk, below.
        if type(row) is dict:
            value = row.get(field)
            if type(value) is str and value and value[0].isascii() and not value[0].isspace():
                texts.append(value)
                scored.append(i)
                continue
        problem = text_problem(row, field)
        if problem is None:
            texts.append(row[field])
            scored.append(i)
        elif strict:
            _refuse_nul(rows, field, texts, scored, first_row)  # a NUL in an earlier row is the first
            raise InputError(f"row {first_row + i + 1}: {problem} (--strict stops at the first such row)")
        else:
            problems[i] = problem
    if _has_nul(texts):
        if strict:
            _refuse_nul(rows, field, texts, scored, first_row)
        for text, i in zip(texts, scored, strict=True):
            if "\0" in text:
                why = text_problem(rows[i], field)
                assert why is not None, "text_refusal refuses a NUL"
                problems[i] = why
        scored = [i for text, i in zip(texts, scored, strict=True) if "\0" not in text]
        texts = [text for text in texts if "\0" not in text]
    return Split(texts, scored, problems)


def _has_nul(texts: list[str]) -> bool:
    """Whether any text holds a NUL (U+0000), which the HTTP API, predict and score_frame refuse: one
    join and one scan a chunk, about a third of the instructions of a test a row (bench/README.md,
    "Scoring a file")."""
    return bool(texts) and "\0" in "".join(texts)


def _refuse_nul(rows: Sequence[Any], field: str, texts: list[str], scored: list[int], first_row: int) -> None:
    """With ``--strict``: InputError naming the first of ``texts`` that holds a NUL, if one does."""
    if _has_nul(texts):
        j = next(j for j, text in enumerate(texts) if "\0" in text)
        problem = text_problem(rows[scored[j]], field)
        raise InputError(f"row {first_row + scored[j] + 1}: {problem} (--strict stops at the first such row)")


def output_rows(rows: Sequence[Any], part: Split, results: Scored, layout: Layout) -> list[Row]:
    """The output rows of one chunk, in input order.

    Each row is one ``dict(zip(columns, values))``: the kept values looked up with the row's bound
    ``get`` at C speed, then the results; about half the Python work of filling a dict key by key,
    which the scoring process does for every row it writes (bench/README.md, "Scoring a file")."""
    labels = layout.labels
    columns = layout.columns
    kept = list(layout.kept)
    probs = results.probabilities.tolist()
    best = results.best.tolist()
    found = results.spans if layout.spans else None
    if found is None and layout.spans:
        found = [[] for _ in best]
    out: list[Row] = []
    append = out.append
    missing: list[Any] = [None] * len(kept)
    unscored: list[Any] = [None] * (len(labels) + 1 + (found is not None))
    # Where each row's result is: row i's is result i when every row was scored (no look-up).
    position = {row: j for j, row in enumerate(part.scored_rows)} if part.problems else None
    for i, row in enumerate(rows):
        values: list[Any] = list(map(row.get, kept)) if kept and isinstance(row, dict) else missing[:]
        at = i if position is None else position.get(i)
        if at is None:
            values += unscored
            values.append(part.problems[i])
        else:
            values.append(labels[best[at]])
            values += probs[at]
            if found is not None:
                values.append(found[at])
            values.append(None)
        append(dict(zip(columns, values, strict=True)))
    return out


__all__ = [
    "Misshapen",
    "article",
    "check_fields",
    "new_field",
    "Row",
    "Unreadable",
    "Scored",
    "Split",
    "output_rows",
    "score_texts",
    "split",
    "text_problem",
]
