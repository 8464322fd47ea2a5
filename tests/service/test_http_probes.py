"""What real clients and attackers send, answered by a real uvicorn on loopback.

Each case here was found by probing a running ``textsieve serve`` with raw sockets and httpx;
the probes that were already answered well are listed in SECURITY.md ("Probed on the wire").
The references are the RFCs each test names.
"""

from __future__ import annotations

import json
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import httpx
import pytest

from tests.helpers.net import free_port
from tests.helpers.service import (
    ADMIN_TOKEN,
    AUTH,
    MODEL,
    REVIEW_AUTH,
    REVIEW_TOKEN,
    assert_problem,
    make_registry,
    settings_for,
    uvicorn_server,
)
from textsieve.registry import open_registry


@pytest.fixture(scope="module")
def probed(tmp_path_factory: pytest.TempPathFactory, tiny_bundles: dict[str, Path]) -> Iterator[tuple[str, Path]]:
    """A real uvicorn with admin and reviewer tokens on a registry of its own (v1 live, v2 registered)."""
    registry = make_registry(tmp_path_factory.mktemp("probed") / "registry", tiny_bundles)
    settings = settings_for(registry, port=free_port(), admin_token=ADMIN_TOKEN, review_token=REVIEW_TOKEN)
    with uvicorn_server(settings) as server:
        yield server.url, registry


JSON = {"Content-Type": "application/json"}
_VERDICT = (
    b'{"model": "support", "version": 1, "text": "my card was charged twice", "predicted_label": "repair", '
    b'"predicted_probability": 0.5, "reviewer": "ann", '
)
# RFC 8259 §4: "The names within an object SHOULD be unique", and when they are not, "the behavior
# of software that receives such an object is unpredictable": one reader takes the first, another
# the last. A gateway, audit filter or log that reads the first "to" saw a promotion to candidate
# while the service (the last one wins in Python's and pydantic's readers) promoted to live.
DUPLICATES = [
    pytest.param(
        "/v1/predict",
        {},
        b'{"texts": ["my card was charged twice"], "texts": ["the brake is broken"]}',
        "texts",
        id="predict: texts twice",
    ),
    pytest.param(
        "/v1/predict",
        {},
        b'{"texts": ["my card was charged twice"], "spans": 1, "sp\\u0061ns": 0}',
        "spans",
        id="predict: spans twice, once written with an escape",
    ),
    pytest.param(
        f"/v1/models/{MODEL}/versions/2/promote",
        AUTH,
        b'{"to": "candidate", "reason": "probe", "to": "live", "force": true}',
        "to",
        id="promote: to twice",
    ),
    pytest.param(
        f"/v1/models/{MODEL}/rollback",
        AUTH,
        b'{"reason": "first", "reason": "second"}',
        "reason",
        id="rollback: reason twice",
    ),
    pytest.param(
        "/v1/verdicts",
        REVIEW_AUTH,
        _VERDICT + b'"verdict_label": "billing", "verdict_label": "repair"}',
        "verdict_label",
        id="verdicts: verdict_label twice",
    ),
]


def _states(registry: Path) -> list[tuple[int, str]]:
    with open_registry(registry) as reg:
        return [(v.version, v.state) for v in reg.versions(MODEL)]


def _verdicts(registry: Path) -> int:
    with open_registry(registry) as reg:
        return len(reg.verdicts.of(MODEL))


@pytest.mark.parametrize("chunked", [False, True], ids=["Content-Length", "chunked"])
@pytest.mark.parametrize(("path", "auth", "body", "name"), DUPLICATES)
def test_a_member_name_given_twice_is_refused_naming_it_and_changes_nothing(
    probed: tuple[str, Path], path: str, auth: dict[str, str], body: bytes, name: str, chunked: bool
) -> None:
    url, registry = probed
    before = (_states(registry), _verdicts(registry))
    content: Any = iter([body[:10], body[10:]]) if chunked else body
    r = httpx.post(url + path, content=content, headers={**JSON, **auth}, timeout=30)
    problem = assert_problem(r, 422, "invalid-input")
    assert problem["errors"][0] == {
        "field": name,
        "message": problem["errors"][0]["message"],
        "type": "json_duplicate_name",
    }
    assert f"'{name}' more than once" in problem["detail"] and "once" in problem["errors"][0]["message"]
    assert (_states(registry), _verdicts(registry)) == before


def test_names_and_escapes_inside_texts_are_not_taken_for_repeated_members(probed: tuple[str, Path]) -> None:
    """The fast lane hands a body that may repeat a name to the full app; texts that hold a member
    name in quotes, or an escaped letter, are still answered, as the same texts sent plainly are."""
    url, _ = probed
    texts = ['"texts" and "model" in quotes', "model", "an escaped letter: \\u0061", "spans"]
    tricky = json.dumps({"texts": texts, "model": MODEL, "spans": 2}).encode()
    assert tricky.count(b'"model"') == 2 and b"\\\\u0061" in tricky
    escaped = b'{"texts": ["my card was charged twice"], "m\\u006fdel": "support"}'
    with httpx.Client(base_url=url, headers=JSON, timeout=30) as client:
        r = client.post("/v1/predict", content=tricky)
        assert r.status_code == 200, r.text
        assert [len(x["spans"]) <= 2 for x in r.json()["results"]] == [True] * 4
        alone = [client.post("/v1/predict", json={"texts": [t], "spans": 2}).json()["results"][0] for t in texts]
        assert r.json()["results"] == alone
        r = client.post("/v1/predict", content=escaped)
        assert r.status_code == 200, r.text
        assert r.json()["model"] == MODEL
