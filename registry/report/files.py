"""A report as the bytes the registry stores and ``textsieve evaluate`` writes: report.json and report.html."""

from __future__ import annotations

import json
from collections.abc import Callable, Sequence
from pathlib import Path
from typing import Any

from textsieve.registry.bundle import Bundle
from textsieve.registry.evalsets import LabelledText
from textsieve.registry.report.build import build_report, default_sections
from textsieve.registry.report.html import render_html

JSON_FILE = "report.json"
HTML_FILE = "report.html"


def dump_json(report: dict[str, Any]) -> bytes:
    # allow_nan=False: build_report already turned NaN into null; a NaN here is a bug, not data
    return (json.dumps(report, ensure_ascii=False, indent=1, allow_nan=False) + "\n").encode("utf-8")


def make_report(
    bundle: Bundle,
    examples: Sequence[LabelledText],
    *,
    model: str,
    version: int,
    against: tuple[Bundle, int] | None = None,
    progress: Callable[[str], None] | None = None,
    run: Path | None = None,
    against_run: Path | None = None,
) -> tuple[dict[str, Any], bytes, bytes]:
    """(report, report.json bytes, report.html bytes) for one version on one evaluation set;
    ``run``/``against_run``: the training run folders, for how the embeddings moved."""
    sections = default_sections(run, against_run, "the other version" if against is None else f"version {against[1]}")
    report = build_report(
        bundle, examples, model=model, version=version, against=against, progress=progress, extra_sections=sections
    )
    return report, dump_json(report), render_html(report, sections).encode("utf-8")


__all__ = ["HTML_FILE", "JSON_FILE", "dump_json", "make_report"]
