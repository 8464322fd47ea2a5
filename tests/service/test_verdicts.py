"""POST /v1/verdicts: the reviewer token and only it records a verdict, the admin token and only it
changes what is served, and verdict bodies meet the same limits and problem+json as predictions."""

from __future__ import annotations

import json
from collections.abc import AsyncIterator
from pathlib import Path
from typing import Any

import httpx
import pytest

from tests.helpers.service import (
    ADMIN_TOKEN,
    AUTH,
    MODEL,
    REVIEW_AUTH,
    REVIEW_TOKEN,
    assert_problem,
    make_registry,
    serving,
    settings_for,
)
from textsieve.errors import InputError
from textsieve.registry import open_registry
from textsieve.service.settings import load_settings

pytestmark = pytest.mark.anyio
VERDICT: dict[str, Any] = {
    "model": MODEL,
    "version": 1,
    "text": "I was charged twice for one ride at Station Road.",
    "predicted_label": "billing",
    "predicted_probability": 0.91,
    "verdict_label": "billing",
    "reviewer": "Priya",
}


@pytest.fixture(scope="module")
def review_registry(tmp_path_factory: pytest.TempPathFactory, tiny_bundles: dict[str, Path]) -> Path:
    return make_registry(tmp_path_factory.mktemp("review-registry") / "registry", tiny_bundles)


@pytest.fixture(scope="module")
async def review_client(review_registry: Path) -> AsyncIterator[httpx.AsyncClient]:
    """Both tokens set and small limits (50 characters a text, 2 KiB a body), as for predictions."""
    settings = settings_for(
        review_registry,
        admin_token=ADMIN_TOKEN,
        review_token=REVIEW_TOKEN,
        max_chars=50,
        max_body_bytes=2048,
        poll_seconds=600,
    )
    async with serving(settings) as (_, client):
        yield client


def _stored(registry: Path) -> list[tuple[str, str, str]]:
    with open_registry(registry) as reg:
        return [(v.text, v.verdict_label, v.reviewer) for v in reg.verdicts.of(MODEL)]


async def test_a_reviewer_records_a_correction_and_it_is_in_the_registry(
    review_client: httpx.AsyncClient, review_registry: Path
) -> None:
    before = _stored(review_registry)
    body = {**VERDICT, "text": "My card was refused at the dock.", "verdict_label": "account"}
    r = await review_client.post("/v1/verdicts", json=body, headers=REVIEW_AUTH)
    assert r.status_code == 201, r.text
    reply = r.json()
    assert reply["agrees"] is False and reply["verdict_label"] == "account" and reply["id"] >= 1
    assert _stored(review_registry) == [*before, ("My card was refused at the dock.", "account", "Priya")]


@pytest.mark.parametrize(
    ("method", "path", "headers", "status", "slug"),
    [
        # A reviewer token opens no admin call, and no token is still refused there.
        pytest.param("post", f"/v1/models/{MODEL}/rollback", REVIEW_AUTH, 403, "forbidden", id="reviewer-rollback"),
        pytest.param(
            "post", f"/v1/models/{MODEL}/versions/2/promote", REVIEW_AUTH, 403, "forbidden", id="reviewer-promote"
        ),
        pytest.param("post", f"/v1/models/{MODEL}/rollback", {}, 401, "unauthorized", id="admin-no-token"),
        # The admin token records no verdict, and neither does no token or a wrong one.
        pytest.param("post", "/v1/verdicts", AUTH, 403, "reviewer-forbidden", id="admin-token-verdict"),
        pytest.param("post", "/v1/verdicts", {}, 401, "reviewer-unauthorized", id="no-token-verdict"),
        pytest.param(
            "post",
            "/v1/verdicts",
            {"Authorization": f"Bearer {REVIEW_TOKEN}x"},
            403,
            "reviewer-forbidden",
            id="wrong-token-verdict",
        ),
        pytest.param(
            "post", "/v1/verdicts", {"Authorization": f"Basic {REVIEW_TOKEN}"}, 401, "reviewer-unauthorized", id="basic"
        ),
    ],
)
async def test_the_two_tokens_open_only_their_own_calls(
    review_client: httpx.AsyncClient,
    review_registry: Path,
    method: str,
    path: str,
    headers: dict[str, str],
    status: int,
    slug: str,
) -> None:
    before = _stored(review_registry)
    payload = VERDICT if path == "/v1/verdicts" else {"to": "live", "reason": "try", "force": True}
    r = await review_client.request(method.upper(), path, json=payload, headers=headers)
    body = assert_problem(r, status, slug)
    if status == 401:
        realm = "textsieve-review" if path == "/v1/verdicts" else "textsieve-admin"
        assert r.headers["www-authenticate"] == f'Bearer realm="{realm}"'
    assert REVIEW_TOKEN not in r.text and ADMIN_TOKEN not in r.text and body["detail"]
    assert _stored(review_registry) == before
    with open_registry(review_registry) as reg:
        assert reg.live(MODEL).version == 1  # nothing promoted or rolled back


@pytest.mark.parametrize(
    ("change", "status", "slug", "expected"),
    [
        pytest.param({"text": "x" * 51}, 413, "limit-exceeded", "TEXTSIEVE_MAX_CHARS", id="text-limit"),
        pytest.param({"text": "x" * 3000}, 413, "limit-exceeded", "TEXTSIEVE_MAX_BODY_BYTES", id="body-limit"),
        pytest.param({"verdict_label": "spam"}, 422, "invalid-input", "allowed: account, billing", id="label"),
        pytest.param({"version": 9}, 404, "not-found", "has no version 9", id="version"),
        pytest.param({"model": "nope"}, 404, "not-found", "no model 'nope'", id="model"),
        pytest.param({"text": "   "}, 422, "invalid-input", "text is empty", id="blank-text"),
        pytest.param({"text": "a\x00b"}, 422, "invalid-input", "NUL", id="nul"),
        pytest.param({"predicted_probability": 2}, 422, "invalid-input", "predicted_probability", id="probability"),
        pytest.param({"verdict": "billing"}, 422, "invalid-input", "unknown field(s) 'verdict'", id="unknown-field"),
        # The reviewer's name is judged by registry/names.py alone, whose words the reviewer page says at
        # sign-in (before, pydantic refused "" and 121 characters first: "String should have at most 120").
        pytest.param({"reviewer": ""}, 422, "invalid-input", "a verdict needs the reviewer's name", id="no-reviewer"),
        pytest.param(
            {"reviewer": "P" * 121},
            422,
            "invalid-input",
            f"bad reviewer '{'P' * 40}'… (121 characters; at most 120): 1–120 printable",
            id="long",
        ),
        pytest.param(
            {"reviewer": "Priya\u202e"}, 422, "invalid-input", "(U+202E RIGHT-TO-LEFT OVERRIDE)", id="bidi-reviewer"
        ),
        pytest.param({"version": "1"}, 422, "invalid-input", "version", id="string-version"),
    ],
)
async def test_bad_verdicts_get_the_same_problems_as_predictions(
    review_client: httpx.AsyncClient,
    review_registry: Path,
    change: dict[str, Any],
    status: int,
    slug: str,
    expected: str,
) -> None:
    before = _stored(review_registry)
    r = await review_client.post("/v1/verdicts", json={**VERDICT, **change}, headers=REVIEW_AUTH)
    body = assert_problem(r, status, slug)
    assert expected in body["detail"] or expected in str(body.get("errors")), body
    if status == 413:
        assert body["limit"]["setting"] == expected
    assert _stored(review_registry) == before


async def test_a_probability_that_is_not_a_number_is_named_so(
    review_client: httpx.AsyncClient, review_registry: Path
) -> None:
    # NaN is not JSON (RFC 8259 §6) but Python's and pydantic's readers take it; it was refused as
    # "less than or equal to 1", which it is not either.
    before = _stored(review_registry)
    body = json.dumps(VERDICT).replace('"predicted_probability": 0.91', '"predicted_probability": NaN')
    assert "NaN" in body
    r = await review_client.post(
        "/v1/verdicts", content=body.encode(), headers={**REVIEW_AUTH, "Content-Type": "application/json"}
    )
    assert "predicted_probability: Input should be a finite number" in assert_problem(r, 422, "invalid-input")["detail"]
    assert _stored(review_registry) == before


async def test_malformed_json_is_a_problem_too(review_client: httpx.AsyncClient) -> None:
    r = await review_client.post(
        "/v1/verdicts", content=b'{"model": ', headers={**REVIEW_AUTH, "Content-Type": "application/json"}
    )
    assert "not valid JSON" in assert_problem(r, 422, "invalid-input")["detail"]


async def test_recording_is_off_without_a_reviewer_token(review_registry: Path) -> None:
    async with serving(settings_for(review_registry, admin_token=ADMIN_TOKEN)) as (_, client):
        r = await client.post("/v1/verdicts", json=VERDICT, headers=REVIEW_AUTH)
        admin = await client.post("/v1/verdicts", json=VERDICT, headers=AUTH)
    assert "TEXTSIEVE_REVIEW_TOKEN" in assert_problem(r, 403, "review-disabled")["detail"]
    assert_problem(admin, 403, "review-disabled")


@pytest.mark.parametrize(
    ("given", "expected_msg"),
    [
        pytest.param({"review_token": "short"}, "review token must be at least 16", id="short"),
        pytest.param({"review_token": ADMIN_TOKEN, "admin_token": ADMIN_TOKEN}, "give each role its own", id="same"),
    ],
)
def test_reviewer_tokens_that_would_weaken_the_roles_are_refused(
    tmp_path: Path, given: dict[str, str], expected_msg: str
) -> None:
    with pytest.raises(InputError, match=expected_msg):
        load_settings(registry=str(tmp_path / "reg"), **given)
