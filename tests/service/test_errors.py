"""Limits and client mistakes: 413/422/404 problem+json bodies (RFC 9457 §3), never a 500."""

from __future__ import annotations

import json
from pathlib import Path
from typing import Any

import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from tests.helpers.service import MODEL, PROBLEM, assert_problem, serving, settings_for

pytestmark = pytest.mark.anyio


@pytest.fixture
def limits(shared_registry: Path) -> Any:
    return settings_for(shared_registry, max_texts=4, max_chars=50, max_body_bytes=2048, max_spans=5)


async def test_too_many_texts_is_413_naming_the_limit(limits: Any) -> None:
    async with serving(limits) as (_, client):
        r = await client.post("/v1/predict", json={"texts": ["a"] * 5})
    body = assert_problem(r, 413, "limit-exceeded")
    assert body["limit"] == {"name": "max_texts", "setting": "TEXTSIEVE_MAX_TEXTS", "value": 4, "got": 5}
    assert "TEXTSIEVE_MAX_TEXTS" in body["detail"] and "4" in body["detail"]


async def test_too_long_text_is_413_naming_index_and_limit(limits: Any) -> None:
    async with serving(limits) as (_, client):
        r = await client.post("/v1/predict", json={"texts": ["fine", "x" * 51]})
        ok = await client.post("/v1/predict", json={"texts": ["x" * 50]})
    body = assert_problem(r, 413, "limit-exceeded")
    assert body["limit"]["name"] == "max_chars" and body["limit"]["index"] == 1 and body["limit"]["got"] == 51
    assert "texts[1]" in body["detail"]
    assert ok.status_code == 200


async def test_body_over_max_bytes_is_413_declared_or_chunked(limits: Any) -> None:
    big = json.dumps({"texts": ["y" * 40] * 60}).encode()
    assert len(big) > 2048

    async def chunks() -> Any:
        for i in range(0, len(big), 500):
            yield big[i : i + 500]

    async with serving(limits) as (_, client):
        declared = await client.post("/v1/predict", content=big, headers={"content-type": "application/json"})
        chunked = await client.post("/v1/predict", content=chunks(), headers={"content-type": "application/json"})
        small_chunked = await client.post(
            "/v1/predict", content=_aiter(b'{"texts": ["a b"]}'), headers={"content-type": "application/json"}
        )
    body = assert_problem(declared, 413, "limit-exceeded")
    assert body["limit"]["name"] == "max_body_bytes" and body["limit"]["got"] == len(big)
    assert_problem(chunked, 413, "limit-exceeded")
    assert small_chunked.status_code == 200, small_chunked.text


async def _aiter(data: bytes) -> Any:
    yield data


@pytest.mark.parametrize(
    ("content", "field", "needle"),
    [
        (b'{"texts": ["a",', "body", "not valid JSON"),
        (b'["a", "b"]', "body", "JSON object"),
        (b"{}", "texts", "Field required"),
        (b'{"texts": []}', "texts", "at least 1"),
        (b'{"texts": "one string"}', "texts", "list"),
        (b'{"texts": [1, 2]}', "texts.0", "string"),
        (b'{"texts": ["a"], "span": 3}', "span", "allowed: texts, model, version, spans"),
        (b'{"texts": ["a"], "version": 0}', "version", "greater than or equal to 1"),
        (b'{"texts": ["a"], "version": "two"}', "version", "integer"),
        (b'{"texts": ["a"], "spans": -1}', "spans", "greater than or equal to 0"),
        (b'{"texts": ["ok", "\\ud800 lone"]}', "texts", "lone surrogate"),
        (b"", "body", "body is missing"),
    ],
)
async def test_malformed_requests_are_422_with_field_errors(
    shared_registry: Path, content: bytes, field: str, needle: str
) -> None:
    async with serving(settings_for(shared_registry)) as (_, client):
        r = await client.post("/v1/predict", content=content, headers={"content-type": "application/json"})
    body = assert_problem(r, 422, "invalid-input")
    assert body["errors"], body
    assert body["errors"][0]["field"] == field
    assert needle in body["errors"][0]["message"]
    assert body["detail"].startswith(field)


async def test_spans_above_the_limit_is_422_naming_it(limits: Any) -> None:
    async with serving(limits) as (_, client):
        r = await client.post("/v1/predict", json={"texts": ["a"], "spans": 6})
    body = assert_problem(r, 422, "invalid-input")
    assert body["limit"]["setting"] == "TEXTSIEVE_MAX_SPANS"


async def test_unknown_model_version_and_path_are_404(shared_registry: Path) -> None:
    async with serving(settings_for(shared_registry)) as (_, client):
        model = await client.post("/v1/predict", json={"texts": ["a"], "model": "nosuch"})
        bad_name = await client.post("/v1/predict", json={"texts": ["a"], "model": "Bad Name!"})
        version = await client.post("/v1/predict", json={"texts": ["a"], "model": MODEL, "version": 99})
        path = await client.get("/v2/predict")
        method = await client.get("/v1/predict")
        view = await client.get("/v1/models/nosuch")
        view_version = await client.get(f"/v1/models/{MODEL}/versions/99")
        view_bad = await client.get(f"/v1/models/{MODEL}/versions/zero")
    assert "nosuch" in assert_problem(model, 404, "not-found")["detail"]
    assert "bad model name" in assert_problem(bad_name, 422, "invalid-input")["detail"]
    assert "no version 99" in assert_problem(version, 404, "not-found")["detail"]
    assert_problem(path, 404, "not-found")
    assert_problem(method, 405, "method-not-allowed")
    assert_problem(view, 404, "not-found")
    assert_problem(view_version, 404, "not-found")
    assert_problem(view_bad, 422, "invalid-input")


async def test_problem_types_resolve_to_explanations(shared_registry: Path) -> None:
    async with serving(settings_for(shared_registry)) as (_, client):
        r = await client.post("/v1/predict", json={"texts": []})
        explained = await client.get(r.json()["type"])
        unknown = await client.get("/problems/nope")
    assert explained.status_code == 200 and "HTTP 422" in explained.text
    assert unknown.status_code == 404


_json_values = st.recursive(
    st.none() | st.booleans() | st.integers(-5, 10**12) | st.floats(allow_nan=False) | st.text(max_size=20),
    lambda inner: st.lists(inner, max_size=4) | st.dictionaries(st.text(max_size=8), inner, max_size=4),
    max_leaves=12,
)
_bodies = st.one_of(
    _json_values.map(lambda v: json.dumps(v).encode()),
    st.fixed_dictionaries(
        {"texts": _json_values}, optional={"model": _json_values, "version": _json_values, "spans": _json_values}
    ).map(lambda v: json.dumps(v).encode()),
    st.binary(max_size=64),
)


async def test_no_client_mistake_is_a_500(shared_registry: Path) -> None:
    async with serving(settings_for(shared_registry, max_texts=8)) as (_, client):
        seen: list[tuple[bytes, int]] = []

        @settings(max_examples=150, deadline=None, suppress_health_check=[HealthCheck.too_slow])
        @given(_bodies)
        def collect(body: bytes) -> None:
            seen.append((body, 0))

        collect()
        for body, _ in seen:
            r = await client.post("/v1/predict", content=body, headers={"content-type": "application/json"})
            assert r.status_code in (200, 404, 413, 422), (body, r.status_code, r.text)
            if r.status_code != 200:
                assert r.headers["content-type"] == PROBLEM


# The class → status table, checked against the error tree of textsieve/errors.py: each class
# keeps its status, CLI exit code and place (UnavailableError reports worker crashes and
# shutdown too, so it is not a RegistryError, yet still a 503 with Retry-After and exit 1).
@pytest.mark.parametrize(
    ("error", "status", "slug", "exit_code", "registry_error"),
    [
        ("UnavailableError", 503, "unavailable", 1, False),
        ("IntegrityError", 503, "integrity", 1, True),
        ("NotFoundError", 404, "not-found", 2, True),
        ("StateError", 409, "state-conflict", 2, True),
        ("GateRefusedError", 409, "gate-refused", 1, True),
    ],
)
def test_error_classes_map_to_their_status_and_exit_code(
    error: str, status: int, slug: str, exit_code: int, registry_error: bool
) -> None:
    from textsieve import errors
    from textsieve.service.web.problems import render

    exc = getattr(errors, error)("something is off")
    assert isinstance(exc, errors.RegistryError) is registry_error
    assert isinstance(exc, errors.TextsieveError) and exc.exit_code == exit_code
    r = render(exc, {"type": "http", "path": "/v1/models"})
    body = json.loads(bytes(r.body))
    assert r.status_code == status and body["type"] == f"/problems/{slug}"
    assert ("retry-after" in r.headers) is (status == 503)
