"""The order probe, filters and embedding sections as report sections (:class:`build.Section`).

``build`` does not import this module (it would be a cycle: this one needs ``build.Section``);
whoever builds a report passes ``probe_sections(...)`` as its extra sections, and the page
drawn from a stored report.json uses the same list (the renderers need no run folder).
"""

from __future__ import annotations

from pathlib import Path

from textsieve.registry.report.build import Context, Section
from textsieve.registry.report.embeddings import embedding_section
from textsieve.registry.report.probe_html import render_embeddings, render_filters, render_order_probe
from textsieve.registry.report.probes import filter_section, order_probe

ORDER_PROBE = "order_probe"
FILTERS = "filters"
EMBEDDINGS = "embeddings"


def probe_sections(
    run: Path | None = None, *, against_run: Path | None = None, against_name: str = "the other version"
) -> list[Section]:
    """The three sections; ``run``/``against_run``: training run folders of the version and the other one."""

    def order(ctx: Context) -> dict[str, object]:
        return order_probe(ctx.predictor, ctx.texts, bands=ctx.bands)

    def filters(ctx: Context) -> dict[str, object]:
        return filter_section(ctx.predictor, ctx.texts, ctx.labels)

    def moved(ctx: Context) -> dict[str, object]:
        return embedding_section(run, against=against_run, against_name=against_name)

    return [
        Section(ORDER_PROBE, "How much it relies on word order", order, render_order_probe),
        Section(FILTERS, "What the filters look for", filters, render_filters),
        Section(EMBEDDINGS, "How the embeddings moved", moved, render_embeddings),
    ]


__all__ = ["EMBEDDINGS", "FILTERS", "ORDER_PROBE", "probe_sections"]
