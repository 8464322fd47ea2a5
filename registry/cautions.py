"""What a model card's cautions must say before a bundle is published.

The project's rules ask every model card to say that predictions are aids for human review,
can carry bias from the training data and need monitoring, and that decisions stay with
accountable people. ``exporter/card.py`` writes that as a ``## Cautions`` section, but a bundle
is a folder anyone can edit and re-hash, so publish checks the card it is given. The check looks
for the section and for each point in its words, not for one sentence, so a team may word the
section its own way (or split it, as Mitchell et al., 2019, "Model Cards for Model Reporting",
do into "Ethical Considerations" and "Caveats and Recommendations").
"""

from __future__ import annotations

import re
from typing import Final

# A heading with one of these words opens a section that counts (case-insensitive).
_HEADING_WORDS: Final = re.compile(r"caution|caveat|ethical consideration|limitation|\blimits?\b|\brisks?\b", re.I)

# Each point the cautions must make: what to say, and the word stems that show it is said.
POINTS: Final = (
    ("that predictions are aids for human review", re.compile(r"\breview|\bhuman|\boversight|\boverrul", re.I)),
    ("that they can carry bias from the training data", re.compile(r"\bbias", re.I)),
    ("that they need monitoring", re.compile(r"\bmonitor", re.I)),
    ("that decisions stay with accountable people", re.compile(r"\baccountab|\bresponsib", re.I)),
)

_ATX = re.compile(r"^ {0,3}(#{1,6})(?:[ \t]+(.*?))?(?:[ \t]+#+)?[ \t]*$")
_SETEXT = re.compile(r"^ {0,3}(=+|-+)[ \t]*$")
_FENCE = re.compile(r"^ {0,3}(`{3,}|~{3,})")
_COMMENT = re.compile(r"<!--.*?(?:-->|\Z)", re.S)


def _lines(card: str) -> list[str]:
    """The card's lines with HTML comments and fenced code blanked: text a reader does not see
    as prose (a commented-out section) says nothing."""
    card = _COMMENT.sub(lambda m: "\n" * m.group(0).count("\n"), card)
    out: list[str] = []
    fence: str | None = None
    for line in card.splitlines():
        opened = _FENCE.match(line)
        if fence is not None:
            if opened and opened.group(1)[0] == fence[0] and len(opened.group(1)) >= len(fence):
                fence = None
            out.append("")
        elif opened:
            fence = opened.group(1)
            out.append("")
        else:
            out.append(line)
    return out


def _headings(lines: list[str]) -> list[tuple[int, int, str]]:
    """(line index, level, text) of every ATX heading and of every setext heading (text underlined)."""
    found = []
    for i, line in enumerate(lines):
        atx = _ATX.match(line)
        if atx:
            found.append((i, len(atx.group(1)), (atx.group(2) or "").strip()))
        elif i > 0 and lines[i - 1].strip() and _SETEXT.match(line) and not _ATX.match(lines[i - 1]):
            found.append((i - 1, 1 if line.strip()[0] == "=" else 2, lines[i - 1].strip()))
    return sorted(found)


def cautions_sections(card: str) -> list[tuple[str, str]]:
    """(heading, body) of each section whose heading names cautions, caveats, limits or risks;
    a body runs to the next heading of the same or a higher level."""
    lines = _lines(card)
    heads = _headings(lines)
    sections = []
    for n, (start, level, text) in enumerate(heads):
        if not _HEADING_WORDS.search(text):
            continue
        end = next((i for i, lv, _ in heads[n + 1 :] if lv <= level), len(lines))
        body_start = start + (2 if start + 1 < len(lines) and _SETEXT.match(lines[start + 1]) else 1)
        sections.append((text, "\n".join(lines[body_start:end])))
    return sections


def missing_points(card: str) -> list[str]:
    """The points of POINTS the card's cautions sections do not make (all of them without a section)."""
    body = "\n".join(b for _, b in cautions_sections(card))
    return [what for what, pattern in POINTS if not pattern.search(body)]


def cautions_problem(card: str) -> str | None:
    """None when the card's cautions make every point in POINTS, else what is missing, in words."""
    sections = cautions_sections(card)
    if not sections:
        return "has no cautions section"
    body = "\n".join(b for _, b in sections)
    missing = [what for what, pattern in POINTS if not pattern.search(body)]
    if not missing:
        return None
    named = ", ".join(repr(h) for h, _ in sections)
    return f"its cautions ({named}) do not say {_and(missing)}"


def _and(items: list[str]) -> str:
    return items[0] if len(items) == 1 else ", ".join(items[:-1]) + " and " + items[-1]


REQUIRED: Final = (
    "the card must say, under a heading such as '## Cautions', that predictions are aids for human review, "
    "can carry bias from the training data and need monitoring, and that decisions stay with accountable people"
)

__all__ = ["POINTS", "REQUIRED", "cautions_problem", "cautions_sections", "missing_points"]
