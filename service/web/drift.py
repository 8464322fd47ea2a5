"""``GET /v1/models/{name}/drift``: how the live texts compare with each version's baseline.

The window is shared by replicas (service/liveloop/drift.py): it is read from the registry for
the answer, plus what this replica counted and has not flushed yet, so every replica gives the
same figures once all have flushed."""

from __future__ import annotations

from typing import Any

from fastapi import APIRouter

from textsieve.registry.drift import DriftReport
from textsieve.service.web.deps import ModelsDep, RegistryDep, SettingsDep
from textsieve.service.web.openapi import Tag
from textsieve.service.web.problems import MEDIA_TYPE
from textsieve.service.web.schemas import BaselineView, DriftView, Problem, SignalView, VersionDrift

router = APIRouter(prefix="/v1/models")
_PROBLEM: dict[int | str, dict[str, Any]] = {
    404: {"model": Problem, "content": {MEDIA_TYPE: {}}},
    503: {"model": Problem, "content": {MEDIA_TYPE: {}}},
}


_SEVERITY = {"stable": 1, "watch": 2, "act": 3}  # registry/stats.py's bands


def _detail(report: DriftReport) -> str:
    if report.baseline is None:
        return "no baseline: this bundle was exported without drift signals; export it again to get them"
    if report.texts == 0:
        return "no live texts in the window yet"
    measured = [s for s in report.signals if s.psi is not None]
    if not measured:
        return "nothing to compare"
    # The headline is the signal whose band matters most ("act" over "watch" over "stable", then the
    # larger PSI); a larger PSI on a signal too few texts to judge yet is named after it, as such.
    # Before, the largest raw PSI led even when it had no band and a smaller one said "act".
    judged = [s for s in measured if s.band is not None]
    if judged:
        worst = max(judged, key=lambda s: (_SEVERITY.get(s.band or "", 0), s.psi or 0.0))
        said = f"largest drift: {worst.name} PSI {worst.psi:.3f} ({worst.band}) over {report.texts} live texts"
        larger = max((s for s in measured if s.band is None), key=lambda s: s.psi or 0.0, default=None)
        if larger is not None and (larger.psi or 0.0) > (worst.psi or 0.0):
            said += f"; {larger.name} reads PSI {larger.psi:.3f}, not yet judged"
    else:
        worst = max(measured, key=lambda s: s.psi or 0.0)
        said = f"largest PSI: {worst.name} {worst.psi:.3f} over {report.texts} live texts"
    unjudged = [s for s in measured if s.band is None]
    never = [s.name for s in unjudged if s.min_texts is None]
    if never:
        return (
            f"{said}; the baseline's {report.baseline.texts:,} texts are too few to judge {', '.join(never)} at any "
            "window size: export with a larger validation set"
        )
    if unjudged:
        most = max(s.min_texts or 0 for s in unjudged)
        return f"{said}; too few to tell drift from sampling noise: bands from {most:,} texts"
    return said


def _disagreement(sizes: list[int], own: int) -> str:
    if len(sizes) < 2:
        return ""
    others = ", ".join(f"{n:,}" for n in sizes if n != own)
    return (
        f"; replicas disagree on TEXTSIEVE_DRIFT_WINDOW_TEXTS ({own:,} here, {others} elsewhere): each reports "
        "the newest texts of its own size, and rows are kept for the largest; set it the same on every replica"
    )


@router.get(
    "/{name}/drift",
    operation_id="getDrift",
    tags=[Tag.REGISTRY],
    response_model=DriftView,
    responses=_PROBLEM,
    summary="Drift signals of the live texts every replica answered, against each served version's baseline",
)
async def get_drift(name: str, store: RegistryDep, models: ModelsDep, settings: SettingsDep) -> DriftView:
    if models.drift is not None:
        await models.drift.refresh(name)  # a registry outage leaves the last window read: still an answer
    reports = models.drift_reports(name)
    if not reports:
        await store.live(name)  # NotFoundError (404) for a model the registry does not know
    live = models.live.get(name)
    versions = []
    for _, version, report in reports:
        base = report.baseline
        window = None if models.drift is None else models.drift.windows.get((name, version))
        sizes = [settings.drift_window_texts] if window is None else list(window.sizes())
        versions.append(
            VersionDrift(
                version=version,
                role="live" if live is not None and live.version == version else "pinned",
                texts=report.texts,
                window_texts=settings.drift_window_texts,
                declared_window_texts=sizes,
                unknown_rate=report.unknown_rate,
                truncation_rate=report.truncation_rate,
                baseline=None
                if base is None
                else BaselineView(
                    source=base.source,
                    texts=base.texts,
                    unknown_rate=base.unknown_rate,
                    truncation_rate=base.truncation_rate,
                ),
                detail=_detail(report) + _disagreement(sizes, settings.drift_window_texts),
                signals=[
                    SignalView.model_validate(
                        {
                            "name": s.name,
                            "psi": s.psi,
                            "js_distance": s.js_distance,
                            "band": s.band,
                            "min_texts": s.min_texts,
                        }
                    )
                    for s in report.signals
                ],
            )
        )
    return DriftView(model=name, scope="shared", versions=versions)


__all__ = ["router"]
