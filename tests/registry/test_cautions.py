"""registry/cautions.py: what a model card's cautions must say before publish takes the bundle.

The points are the project's own rule (README, "Cautions"); the section names in the
Mitchell-style card are from Mitchell et al., 2019, "Model Cards for Model Reporting" (FAT*),
section 4 ("Ethical Considerations", "Caveats and Recommendations").
"""

from __future__ import annotations

import pytest

from textsieve.exporter.card import CAUTIONS
from textsieve.registry.cautions import cautions_problem, cautions_sections

POINTS = (
    "Predictions support human review. They can carry bias from the training data. "
    "Monitor them. Decisions stay with accountable people."
)


def test_the_exporters_cautions_make_every_point() -> None:
    assert cautions_problem("# Model card: m\n\n## Intended use\n\nSorting.\n\n" + CAUTIONS) is None


@pytest.mark.parametrize(
    "card",
    [
        pytest.param(f"# Card\n\n## Cautions\n\n{POINTS}\n", id="ATX heading"),
        pytest.param(f"# Card\n\n### CAUTION ###\n\n{POINTS}\n", id="closed ATX heading, other level and case"),
        pytest.param(f"Card\n====\n\nCaveats\n-------\n\n{POINTS}\n", id="setext headings"),
        pytest.param(
            "# Card\n\n## Ethical considerations\n\nA human reviewer decides; bias from the training data may show.\n\n"
            "## Caveats and recommendations\n\nMonitor drift. The deploying team is responsible for decisions.\n",
            id="points split over Mitchell et al.'s two sections",
        ),
        pytest.param(f"# Card\n\n## Cautions\n\n### Review\n\n{POINTS}\n", id="points in a subsection"),
    ],
)
def test_cautions_in_other_words_and_layouts_are_accepted(card: str) -> None:
    assert cautions_problem(card) is None


@pytest.mark.parametrize(
    ("card", "expected"),
    [
        pytest.param("# Card\n\n## Intended use\n\n" + POINTS + "\n", "has no cautions section", id="points elsewhere"),
        pytest.param("", "has no cautions section", id="empty card"),
        pytest.param(
            f"# Card\n\n<!--\n## Cautions\n\n{POINTS}\n-->\n", "has no cautions section", id="section commented out"
        ),
        pytest.param(
            f"# Card\n\n```\n## Cautions\n\n{POINTS}\n```\n",
            "has no cautions section",
            id="section inside a code fence",
        ),
        pytest.param(
            f"# Card\n\n## Cautions\n\nBe careful.\n\n## Data\n\n{POINTS}\n",
            "('Cautions') do not say that predictions are aids for human review, that they can carry bias from the "
            "training data, that they need monitoring and that decisions stay with accountable people",
            id="the points under the next section",
        ),
        pytest.param(
            "## Cautions\n\nA human reviews each label. Monitor it. An accountable person decides.\n",
            "('Cautions') do not say that they can carry bias from the training data",
            id="bias missing",
        ),
        pytest.param(
            "## Cautions\n\nA human reviews each label; bias may show; an accountable person decides.\n",
            "('Cautions') do not say that they need monitoring",
            id="monitoring missing",
        ),
    ],
)
def test_cards_missing_a_point_say_which(card: str, expected: str) -> None:
    assert cautions_problem(card) == (expected if expected.startswith("has no") else f"its cautions {expected}")


def test_a_section_ends_at_the_next_heading_of_its_level() -> None:
    sections = cautions_sections("## Cautions\n\none\n\n### Detail\n\ntwo\n\n## Data\n\nthree\n")
    assert [(h, b.split()) for h, b in sections] == [("Cautions", ["one", "###", "Detail", "two"])]
