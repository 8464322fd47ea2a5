"""``GET /``: the reviewer's page (one self-contained HTML file, no external assets).

The page's script judges a reviewer's name at sign-in by the service's own rule (registry/names.py
``reviewer_rule``), put into it here, so the page and the service refuse the same names in the same words.

The Content-Security-Policy allows only the page's own inline script and style, by their
sha256 (CSP Level 2 hash sources), and network requests to this service: the browser itself
enforces that nothing is loaded from elsewhere.
"""

from __future__ import annotations

import asyncio
import base64
import hashlib
import json
import re
from functools import cache
from importlib import resources

from fastapi import APIRouter
from fastapi.responses import HTMLResponse

router = APIRouter()


def _hashes(html: str, tag: str) -> str:
    bodies = re.findall(rf"<{tag}>(.*?)</{tag}>", html, flags=re.S)
    return " ".join(f"'sha256-{base64.b64encode(hashlib.sha256(b.encode()).digest()).decode()}'" for b in bodies)


# Where the page's script takes the service's rule for reviewers' names (registry/names.py reviewer_rule).
RULE_SLOT = "/*REVIEWER_RULE*/null"


def _rule_json() -> str:
    from textsieve.registry.names import reviewer_rule

    # ASCII only, and no "<" that could close the script ("</script>"): the names hold none, but a
    # script's content is the one place HTML does not escape.
    return json.dumps(reviewer_rule(), separators=(",", ":"), ensure_ascii=True).replace("<", "\\u003c")


@cache
def page() -> tuple[str, str]:
    html = resources.files("textsieve.service.web").joinpath("static/index.html").read_text(encoding="utf-8")
    html = html.replace(RULE_SLOT, _rule_json(), 1)  # before the hashes: the policy allows the script as served
    csp = (
        f"default-src 'none'; script-src {_hashes(html, 'script')}; style-src {_hashes(html, 'style')}; "
        "connect-src 'self'; base-uri 'none'; form-action 'none'; frame-ancestors 'none'"
    )
    return html, csp


@router.get("/", operation_id="getReviewerPage", response_class=HTMLResponse, include_in_schema=False)
async def index() -> HTMLResponse:
    # On a thread: the first call scans this Python's Unicode tables for the rule (~0.2 s), which would
    # stall every prediction on the event loop meanwhile; later calls return the cached page.
    html, csp = await asyncio.to_thread(page)
    return HTMLResponse(
        html, headers={"Content-Security-Policy": csp, "X-Content-Type-Options": "nosniff", "Cache-Control": "no-cache"}
    )


__all__ = ["page", "router"]
