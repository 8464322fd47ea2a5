"""The output's columns: the input's kept columns, then ``label``, one ``probability:LABEL`` per
label, ``spans`` when asked, and ``error``.

Why the prefixes. Input files often carry a ``label`` column of their own (an evaluation set does),
and labels are arbitrary strings, so a result column could shadow an input column. Result columns
never move; an input column whose name is one of them, or starts with ``probability:`` or ``input:``,
is written as ``input:NAME`` (prefixed again until it is unique). The mapping is recorded in the
output's metadata, so a reader can always find the original.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass

from textsieve.errors import InputError

LABEL = "label"
SPANS = "spans"
ERROR = "error"
PROBABILITY = "probability:"
INPUT = "input:"


def probability_column(label: str) -> str:
    return f"{PROBABILITY}{label}"


@dataclass(frozen=True)
class Layout:
    """Which input columns are kept, what they are called in the output, and the result columns."""

    kept: tuple[str, ...]
    renamed: dict[str, str]  # input name → output name, for every kept column
    labels: tuple[str, ...]
    spans: bool

    @property
    def results(self) -> list[str]:
        return [LABEL, *(probability_column(x) for x in self.labels), *([SPANS] if self.spans else []), ERROR]

    @property
    def columns(self) -> list[str]:
        return [self.renamed[c] for c in self.kept] + self.results

    def describe(self) -> dict[str, object]:
        """What the metadata records: every output column, and the input columns that were renamed."""
        return {
            "columns": self.columns,
            "renamed": {k: v for k, v in self.renamed.items() if k != v},
        }


def plan(
    input_columns: Sequence[str],
    keep: Sequence[str] | None,
    labels: Sequence[str],
    *,
    spans: bool,
    complete: bool = True,
) -> Layout:
    """The layout for these input columns; ``keep`` None keeps them all, and naming one that is not
    in the input is bad input when ``input_columns`` are all the input has (``complete``: a header,
    or every row of a JSON Lines file; otherwise they are the fields of its first rows only, and a
    later row may have the one ``keep`` names)."""
    if keep is None:
        kept = list(dict.fromkeys(input_columns))
    else:
        present = set(input_columns)
        missing = [c for c in keep if c not in present]
        if missing and complete:
            shown = ", ".join(list(input_columns)[:20]) or "none"
            raise InputError(f"--keep names column(s) the input does not have: {', '.join(missing)}; it has: {shown}")
        kept = list(dict.fromkeys(keep))
    results = set(Layout((), {}, tuple(labels), spans).results)
    taken = set(results)
    renamed: dict[str, str] = {}
    for name in kept:
        if name not in results and not name.startswith((PROBABILITY, INPUT)):
            renamed[name] = name
            taken.add(name)
    for name in kept:
        if name in renamed:
            continue
        out = INPUT + name
        while out in taken or out in kept:
            out = INPUT + out
        renamed[name] = out
        taken.add(out)
    return Layout(tuple(kept), renamed, tuple(labels), spans)


def parse_keep(value: str | None) -> list[str] | None:
    """``--keep a,b,c``: None (keep all) when not given, [] for ``--keep ''``."""
    if value is None:
        return None
    return [c.strip() for c in value.split(",") if c.strip()]


__all__ = ["ERROR", "INPUT", "LABEL", "PROBABILITY", "SPANS", "Layout", "parse_keep", "plan", "probability_column"]
