"""The published model card: the bundle's card.md with the model's name and a link to its report.

A bundle's files are immutable and every one is sha256-checked on load, so the card inside it
cannot learn the name it is published under nor the reports made later. The registry renders
the published card on request instead: the stored card.md (verified) with its placeholder title
replaced and an "Evaluation report" section appended. The bundle's bytes never change.
"""

from __future__ import annotations

from textsieve.registry.records import ReportInfo, report_path

PLACEHOLDER = "# Model card: (set on publish)"


def published_card(card: str, model: str, version: int, report: ReportInfo | None) -> str:
    title = f"# Model card: {model}, version {version}"
    lines = card.splitlines()
    if lines and lines[0].startswith("# Model card:"):
        lines[0] = title
    else:
        lines.insert(0, title + "\n")
    path = report_path(model, version)
    if report is None:
        status = (
            f"No evaluation report is stored yet. Make one with `textsieve evaluate {model} {version}`; "
            f"the service then serves it at `{path}`."
        )
    else:
        against = "" if report.against is None else f", compared with version {report.against}"
        status = (
            f"Served at `{path}` (HTML; JSON with `Accept: application/json`): made {report.created_at[:19]}Z "
            f"on the evaluation set with sha256 `{report.evalset_sha256}`{against}."
        )
    return "\n".join(lines).rstrip("\n") + "\n\n## Evaluation report\n\n" + status + "\n"


__all__ = ["PLACEHOLDER", "published_card"]
