"""Admin over HTTP: disabled without a token, 401/403 for missing/wrong tokens, promote and
rollback through the registry's rules, and the served version following at once."""

from __future__ import annotations

import json
from pathlib import Path

import pytest

from tests.helpers.service import ADMIN_TOKEN, AUTH, MODEL, assert_problem, serving, settings_for
from textsieve.registry import open_registry

pytestmark = pytest.mark.anyio
PROMOTE = f"/v1/models/{MODEL}/versions/2/promote"
ROLLBACK = f"/v1/models/{MODEL}/rollback"


async def test_admin_is_disabled_without_a_token(registry_dir: Path) -> None:
    async with serving(settings_for(registry_dir)) as (_, client):
        r = await client.post(PROMOTE, json={"to": "live", "reason": "x"}, headers=AUTH)
        rb = await client.post(ROLLBACK, json={"reason": "x"})
    body = assert_problem(r, 403, "admin-disabled")
    assert "TEXTSIEVE_ADMIN_TOKEN" in body["detail"]
    assert_problem(rb, 403, "admin-disabled")
    with open_registry(registry_dir) as reg:
        assert reg.live(MODEL).version == 1  # nothing happened


@pytest.mark.parametrize(
    ("headers", "status", "slug"),
    [
        ({}, 401, "unauthorized"),
        ({"Authorization": f"Basic {ADMIN_TOKEN}"}, 401, "unauthorized"),
        ({"Authorization": "Bearer"}, 401, "unauthorized"),
        ({"Authorization": "Bearer " + ADMIN_TOKEN[:-1]}, 403, "forbidden"),
        ({"Authorization": "Bearer " + ADMIN_TOKEN + "x"}, 403, "forbidden"),
    ],
)
async def test_missing_or_wrong_token(registry_dir: Path, headers: dict[str, str], status: int, slug: str) -> None:
    async with serving(settings_for(registry_dir, admin_token=ADMIN_TOKEN)) as (_, client):
        r = await client.post(ROLLBACK, json={"reason": "x"}, headers=headers)
    assert_problem(r, status, slug)
    if status == 401:
        assert r.headers["www-authenticate"].startswith("Bearer")


async def test_an_admin_call_with_a_query_string_is_refused_after_its_token_is_checked(registry_dir: Path) -> None:
    """Every field goes in the body: ?force=true was ignored. The token is still checked first, so a
    caller without it learns nothing but 401."""
    async with serving(settings_for(registry_dir, admin_token=ADMIN_TOKEN)) as (_, client):
        without = await client.post(f"{PROMOTE}?force=true", json={"to": "live", "reason": "x"})
        assert_problem(without, 401, "unauthorized")
        refused = await client.post(f"{PROMOTE}?force=true", json={"to": "live", "reason": "x"}, headers=AUTH)
        problem = assert_problem(refused, 422, "invalid-input")
        assert "reads no query parameters (got 'force'); send every field in the JSON body" in problem["detail"]
    with open_registry(registry_dir) as reg:
        assert reg.live(MODEL).version == 1  # nothing promoted


async def test_promote_and_rollback_swap_the_served_version_at_once(registry_dir: Path) -> None:
    # poll_seconds is long: only the admin call itself can explain the swap.
    async with serving(settings_for(registry_dir, admin_token=ADMIN_TOKEN, poll_seconds=600)) as (_, client):
        before = (await client.post("/v1/predict", json={"texts": ["charged twice"]})).json()
        refused = await client.post(PROMOTE, json={"to": "live", "reason": "try"}, headers=AUTH)
        promoted = await client.post(
            PROMOTE,
            json={"to": "live", "reason": "seed 2 is better", "force": True, "actor": "reviewer-7"},
            headers=AUTH,
        )
        after = (await client.post("/v1/predict", json={"texts": ["charged twice"]})).json()
        again = await client.post(PROMOTE, json={"to": "live", "reason": "twice"}, headers=AUTH)
        rolled = await client.post(ROLLBACK, json={"reason": "back to v1"}, headers=AUTH)
        last = (await client.post("/v1/predict", json={"texts": ["charged twice"]})).json()
    assert before["version"] == 1
    # Without an evaluation set the metric gates refuse; the body lists every gate.
    refusal = assert_problem(refused, 409, "gate-refused")
    assert {g["name"] for g in refusal["gates"]} >= {"parity", "labels"}
    # The override is named as this API's body fields, not as the CLI's flags.
    assert "override it with force and a reason" in refusal["detail"] and "--force" not in refusal["detail"]
    assert promoted.status_code == 200, promoted.text
    reply = promoted.json()
    assert reply["version"]["version"] == 2 and reply["version"]["state"] == "live"
    assert reply["forced"] is True and reply["retired"] == 1
    assert reply["serving"]["version"] == 2 and reply["serving"]["state"] == "ready"
    assert after["version"] == 2
    assert_problem(again, 409, "state-conflict")
    assert rolled.status_code == 200 and rolled.json()["serving"]["version"] == 1
    assert last["version"] == 1
    with open_registry(registry_dir) as reg:
        kinds = [(e.kind, e.actor) for e in reg.history(MODEL)]
    assert ("promote", "reviewer-7") in kinds
    assert any(kind == "rollback" and actor.startswith("admin-api@") for kind, actor in kinds)


async def test_promote_to_candidate_keeps_serving_live(registry_dir: Path) -> None:
    async with serving(settings_for(registry_dir, admin_token=ADMIN_TOKEN)) as (_, client):
        r = await client.post(PROMOTE, json={"to": "candidate", "reason": "shadow it"}, headers=AUTH)
        bad = await client.post(PROMOTE, json={"to": "production", "reason": "x"}, headers=AUTH)
        no_reason = await client.post(ROLLBACK, json={}, headers=AUTH)
        unknown = await client.post(
            f"/v1/models/{MODEL}/versions/9/promote", json={"to": "live", "reason": "x"}, headers=AUTH
        )
    assert r.status_code == 200
    assert r.json()["version"]["state"] == "candidate" and r.json()["serving"]["version"] == 1
    assert_problem(bad, 422, "invalid-input")
    assert_problem(no_reason, 422, "invalid-input")
    assert_problem(unknown, 404, "not-found")


@pytest.mark.parametrize(
    ("path", "content", "words"),
    [
        (PROMOTE, None, 'the body is missing; send a JSON object with the field(s) "to", "reason"'),
        (ROLLBACK, b"[1]", 'the body must be a JSON object with the field(s) "reason"'),
        ("/v1/predict", None, 'the body is missing; send a JSON object such as {"texts": ["..."]}'),
    ],
)
async def test_a_missing_or_non_object_body_is_told_what_this_route_takes(
    registry_dir: Path, path: str, content: bytes | None, words: str
) -> None:
    # Before, every route's refusal showed the predict body as its example.
    async with serving(settings_for(registry_dir, admin_token=ADMIN_TOKEN)) as (_, client):
        r = await client.post(path, content=content, headers={**AUTH, "content-type": "application/json"})
    body = assert_problem(r, 422, "invalid-input")
    assert words in body["detail"], body["detail"]
    with open_registry(registry_dir) as reg:
        assert reg.live(MODEL).version == 1


@pytest.mark.parametrize("route", [PROMOTE, ROLLBACK])
async def test_an_actor_too_long_is_refused_in_the_registrys_words(registry_dir: Path, route: str) -> None:
    # Over HTTP an actor over 120 characters got pydantic's "String should have at most 120 characters",
    # while the CLI and the reviewer's name say how long it is in registry/names.py's words (found by an
    # audit, 2026-12-05). Nothing is promoted or rolled back.
    body = {"to": "live", "reason": "try", "force": True} if route == PROMOTE else {"reason": "try"}
    async with serving(settings_for(registry_dir, admin_token=ADMIN_TOKEN, poll_seconds=600)) as (_, client):
        r = await client.post(route, json=body | {"actor": "a" * 121}, headers=AUTH)
    assert r.status_code == 422 and r.headers["content-type"] == "application/problem+json"
    assert "(121 characters; at most 120)" in r.json()["detail"], r.json()
    with open_registry(registry_dir) as reg:
        assert reg.live(MODEL).version == 1 and [e.kind for e in reg.history(MODEL)].count("rollback") == 0


async def test_an_actor_with_a_lone_surrogate_is_refused_by_the_names_rule(registry_dir: Path) -> None:
    # As a reviewer's name is: the rule registry/names.py applies to every name shown to people.
    content = json.dumps({"to": "live", "reason": "try", "force": True, "actor": "ok \ud800 here"}).encode()
    async with serving(settings_for(registry_dir, admin_token=ADMIN_TOKEN, poll_seconds=600)) as (_, client):
        r = await client.post(PROMOTE, content=content, headers={**AUTH, "Content-Type": "application/json"})
    assert r.status_code == 422 and "bad actor" in r.json()["detail"] and "U+D800" in r.json()["detail"], r.json()
