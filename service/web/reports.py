"""``GET /v1/models/{name}/versions/{n}/report``: a version's stored evaluation report; ``…/card``:
its model card as published (named, linking the report).

HTML by default (the self-contained page, with a Content-Security-Policy that allows only its
own inline style: it runs no script and loads nothing), report.json with
``Accept: application/json``. The service only serves what the registry stored
(``textsieve evaluate``, publishing with an evaluation set, promotion attempts): it never
scores an evaluation set on the request path.
"""

from __future__ import annotations

from typing import Any

from fastapi import APIRouter, Path, Request
from fastapi.responses import HTMLResponse, PlainTextResponse, Response

from textsieve.registry.names import validate_version
from textsieve.registry.report.html import report_csp
from textsieve.service.web.deps import RegistryDep
from textsieve.service.web.openapi import Tag
from textsieve.service.web.problems import MEDIA_TYPE
from textsieve.service.web.schemas import Problem

router = APIRouter(prefix="/v1/models")
_RESPONSES: dict[int | str, dict[str, Any]] = {
    200: {
        "description": "the report: report.html, or report.json when the request accepts application/json",
        "content": {"text/html": {"schema": {"type": "string"}}, "application/json": {"schema": {"type": "object"}}},
    },
    404: {"model": Problem, "content": {MEDIA_TYPE: {}}},
    503: {"model": Problem, "content": {MEDIA_TYPE: {}}},
}


def wants_json(request: Request) -> bool:
    """JSON when the Accept header prefers application/json to text/html (RFC 9110 §12.5.1: each
    type takes the quality of its most specific matching range, q=0 meaning not acceptable); on a
    tie, when it names application/json before text/html, or names only the former; else HTML."""
    ranges: list[tuple[str, float]] = []
    for part in request.headers.get("accept", "").lower().split(","):
        kind, *params = (p.strip() for p in part.split(";"))
        q = 1.0
        for param in params:
            name, _, value = param.partition("=")
            if name.strip() == "q":
                try:
                    q = min(max(float(value), 0.0), 1.0)
                except ValueError:
                    q = 0.0
                q = q if q == q else 0.0  # NaN
        if kind:
            ranges.append((kind, q))
    json_q, html_q = _quality(ranges, "application/json"), _quality(ranges, "text/html")
    if json_q != html_q:
        return json_q > html_q
    kinds = [k for k, _ in ranges]
    if json_q == 0 or "application/json" not in kinds:  # a tie through */*: the page
        return False
    return "text/html" not in kinds or kinds.index("application/json") < kinds.index("text/html")


def _quality(ranges: list[tuple[str, float]], media: str) -> float:
    """The q of the most specific range matching ``media`` (exact, then type/*, then */*), 0 if none."""
    major = media.split("/", 1)[0] + "/*"
    for wanted in (media, major, "*/*"):
        found = [q for kind, q in ranges if kind == wanted]
        if found:
            return max(found)
    return 0.0


@router.get(
    "/{name}/versions/{n}/report",
    operation_id="getVersionReport",
    tags=[Tag.REGISTRY],
    response_class=Response,
    responses=_RESPONSES,
    summary="A version's evaluation report (HTML, or JSON with Accept: application/json)",
)
async def get_report(
    name: str, request: Request, store: RegistryDep, n: str = Path(description="version number")
) -> Response:
    as_json = wants_json(request)
    _, data = await store.report_content(name, validate_version(n), "json" if as_json else "html")
    headers = {"X-Content-Type-Options": "nosniff", "Cache-Control": "no-cache", "Vary": "Accept"}
    if as_json:
        return Response(data, media_type="application/json", headers=headers)
    html = data.decode("utf-8")
    return HTMLResponse(html, headers={**headers, "Content-Security-Policy": report_csp(html)})


@router.get(
    "/{name}/versions/{n}/card",
    operation_id="getVersionCard",
    tags=[Tag.REGISTRY],
    response_class=PlainTextResponse,
    responses={
        200: {"description": "the model card (Markdown)", "content": {"text/markdown": {"schema": {"type": "string"}}}},
        404: _RESPONSES[404],
        503: _RESPONSES[503],
    },
    summary="A version's model card as published: named, and linking its evaluation report",
)
async def get_card(name: str, store: RegistryDep, n: str = Path(description="version number")) -> PlainTextResponse:
    text = await store.card(name, validate_version(n))
    return PlainTextResponse(
        text, media_type="text/markdown; charset=utf-8", headers={"X-Content-Type-Options": "nosniff"}
    )


__all__ = ["router", "wants_json"]
