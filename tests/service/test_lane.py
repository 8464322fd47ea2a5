"""The predict lane (service/web/lane.py) answers exactly as the full app does.

The reference is the same app with the lane off (``create_app(settings, fast_lane=False)``):
every request of the table goes to both, one at a time, and the status, the body's bytes, the
headers in order, the access-log line (but its duration), the HTTP and prediction counters and
the shadow queue's count must agree. Each row also names which path must have answered it in
the app with the lane, so a lane that passed everything on could not pass.
"""

from __future__ import annotations

import asyncio
import logging
import re
from collections.abc import AsyncIterator, Iterator
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import httpx
import orjson
import pytest

from tests.helpers.service import MODEL, make_registry, serving, settings_for
from textsieve.registry import open_registry
from textsieve.service.logs import ACCESS

pytestmark = pytest.mark.anyio
TEXT = "my invoice was charged twice, please refund"  # within max_chars (50)
RID = "lane-test-0001"


@dataclass(frozen=True)
class Case:
    name: str
    body: Any  # bytes as sent, or an object sent as JSON
    status: int
    path: str  # "lane" or "app": which one answers in the app with the lane
    headers: dict[str, str] = field(default_factory=dict)
    content_type: str | None = "application/json"
    request_id: str | None = RID
    over_budget: bool = False

    def content(self) -> bytes:
        return self.body if isinstance(self.body, bytes) else orjson.dumps(self.body)


CASES = [
    Case("one text, default spans", {"texts": [TEXT]}, 200, "lane"),
    Case("one text, no spans", {"texts": [TEXT], "spans": 0}, 200, "lane"),
    Case("two texts, the shadow queue drops them", {"texts": [TEXT, "where is my parcel"], "spans": 2}, 200, "lane"),
    Case("pinned candidate version", {"texts": [TEXT], "version": 2}, 200, "lane"),
    Case("model named", {"texts": [TEXT], "model": MODEL, "version": 1}, 200, "lane"),
    Case("no request id: a new one", {"texts": [TEXT]}, 200, "lane", request_id=None),
    Case("unsafe request id: a new one", {"texts": [TEXT]}, 200, "lane", request_id="no spaces allowed"),
    Case("charset given", {"texts": [TEXT]}, 200, "lane", content_type="application/json; charset=utf-8"),
    Case("a generous deadline", {"texts": [TEXT]}, 200, "lane", headers={"Textsieve-Deadline": "60000"}),
    Case("unknown model", {"texts": [TEXT], "model": "nosuch"}, 404, "lane"),
    Case("unknown version", {"texts": [TEXT], "version": 9}, 404, "lane"),
    Case("deadline passed", {"texts": [TEXT]}, 504, "lane", headers={"Textsieve-Deadline": "0.000001"}),
    Case("bad deadline header", {"texts": [TEXT]}, 422, "app", headers={"Textsieve-Deadline": "soon"}),
    # float() took these (found by probing); a header of milliseconds is digits with a fraction.
    Case("deadline with underscores", {"texts": [TEXT]}, 422, "app", headers={"Textsieve-Deadline": "1_000"}),
    Case("deadline as an exponent", {"texts": [TEXT]}, 422, "app", headers={"Textsieve-Deadline": "6e4"}),
    Case("bad JSON", b'{"texts": ["a",', 422, "app"),
    Case("raw control character in a string", b'{"texts": ["a\tb"]}', 422, "app"),
    Case("unknown field", {"texts": [TEXT], "span": 2}, 422, "app"),
    Case("empty text", {"texts": [" "]}, 422, "app"),
    Case("no texts", {"texts": []}, 422, "app"),
    Case("a string for the version", {"texts": [TEXT], "version": "1"}, 422, "app"),
    Case("too many texts", {"texts": [TEXT[:40]] * 5}, 413, "app"),
    Case("too long a text", {"texts": ["x" * 51]}, 413, "app"),
    Case("too many spans", {"texts": [TEXT], "spans": 6}, 422, "app"),
    Case("body over the limit", {"texts": ["y" * 40] * 60}, 413, "app"),
    Case("over the body budget", {"texts": [TEXT]}, 503, "app", over_budget=True),
    Case("empty body", b"", 422, "app"),
    # RFC 8259 §8.1: JSON between systems is UTF-8; a reader MAY ignore a byte-order mark (here it does).
    Case("a UTF-8 byte-order mark, ignored", b'\xef\xbb\xbf{"texts": ["a b c"]}', 200, "app"),
    Case("UTF-16 with its byte-order mark", '{"texts": ["a b c"]}'.encode("utf-16"), 415, "app"),
    Case("UTF-16BE without a mark", '{"texts": ["a b c"]}'.encode("utf-16-be"), 415, "app"),
    Case("UTF-32LE without a mark", '{"texts": ["a b c"]}'.encode("utf-32-le"), 415, "app"),
    Case("a charset other than UTF-8", {"texts": [TEXT]}, 415, "app", content_type="application/json; charset=utf-16"),
    Case(
        "UTF-8 declared in upper case", {"texts": [TEXT]}, 200, "lane", content_type="application/json; charset=UTF-8"
    ),
    Case("another content type", {"texts": [TEXT]}, 422, "app", content_type="text/plain"),
    Case("no content type", {"texts": [TEXT]}, 422, "app", content_type=None),
]


@dataclass
class Side:
    app: Any
    client: httpx.AsyncClient


@pytest.fixture(scope="module")
def registries(tmp_path_factory: pytest.TempPathFactory, tiny_bundles: dict[str, Path]) -> list[Path]:
    """Two registries alike, one per app (shadow counts are written to them): v1 live, v2 candidate."""
    out = []
    for name in ("lane", "full"):
        folder = make_registry(tmp_path_factory.mktemp(name) / "registry", tiny_bundles)
        with open_registry(folder) as reg:
            reg.promote(MODEL, 2, "candidate", reason="shadow scoring in the lane's tests", actor="tests")
        out.append(folder)
    return out


@pytest.fixture(scope="module")
async def sides(registries: list[Path]) -> AsyncIterator[tuple[Side, Side]]:
    def settings(registry: Path) -> Any:
        return settings_for(
            registry,
            workers=1,
            inference="threads",
            access_log=True,
            max_texts=4,
            max_chars=50,
            max_spans=5,
            max_body_bytes=2048,
            shadow_rate=1.0,  # every live request is offered to the candidate after its reply
            shadow_queue_texts=1,  # so a two-text request is dropped, and counted, at once
        )

    async with (
        serving(settings(registries[0])) as (lane_app, lane_client),
        serving(settings(registries[1]), fast_lane=False) as (full_app, full_client),
    ):
        assert lane_app.lane is not None and full_app.lane is None
        for app in (lane_app, full_app):
            for _ in range(200):  # the candidate loads after readiness
                if MODEL in app.state.models.candidates:
                    break
                await asyncio.sleep(0.05)
            assert MODEL in app.state.models.candidates
        yield Side(lane_app, lane_client), Side(full_app, full_client)


@pytest.fixture
def access_log(caplog: pytest.LogCaptureFixture) -> Iterator[pytest.LogCaptureFixture]:
    with caplog.at_level(logging.INFO, logger=ACCESS):
        yield caplog


def _counters(app: Any, status: int) -> dict[str, float | None]:
    registry = app.state.metrics.registry
    return {
        # A body refused before it is read never reaches the router, but is booked under the route
        # asked for (service/web/bodylimit.py), as every other refusal: never under "unmatched".
        **{
            f"http {route}": registry.get_sample_value(
                "textsieve_http_requests_total", {"method": "POST", "route": route, "status": str(status)}
            )
            for route in ("/v1/predict", "unmatched")
        },
        "predict v1": registry.get_sample_value("textsieve_predict_requests_total", {"model": MODEL, "version": "1"}),
        "predict v2": registry.get_sample_value("textsieve_predict_requests_total", {"model": MODEL, "version": "2"}),
        "shadow dropped": registry.get_sample_value("textsieve_shadow_dropped_texts_total", {"model": MODEL}),
        **{
            f"http seconds {route}": registry.get_sample_value("textsieve_http_request_seconds_count", {"route": route})
            for route in ("/v1/predict", "unmatched")
        },
    }


def _delta(after: dict[str, float | None], before: dict[str, float | None]) -> dict[str, float]:
    return {k: (after[k] or 0.0) - (before[k] or 0.0) for k in after}


async def _exchange(side: Side, case: Case, caplog: pytest.LogCaptureFixture) -> tuple[httpx.Response, Any, Any]:
    headers = dict(case.headers)
    if case.content_type is not None:
        headers["Content-Type"] = case.content_type
    if case.request_id is not None:
        headers["X-Request-Id"] = case.request_id
    budget, guard = side.app.state.budget, side.app.state.guard
    before = _counters(side.app, case.status)
    caplog.clear()
    if case.over_budget:
        budget.used = budget.limit - 10  # other bodies in flight hold all but 10 bytes
    try:
        r = await side.client.post("/v1/predict", content=case.content(), headers=headers)
    finally:
        if case.over_budget:
            budget.used = 0
    await asyncio.sleep(0)  # the last line of a reply's booking runs after the client has it
    lines = [dict(rec.__dict__["fields"]) for rec in caplog.records if rec.name == ACCESS]
    assert budget.used == 0 and guard.inflight == 0
    return r, lines, _delta(_counters(side.app, case.status), before)


def _without_new_ids(r: httpx.Response, lines: list[dict[str, Any]]) -> tuple[bytes, list[Any], list[Any]]:
    """The body, headers and log lines with a request id the server made up replaced by a mark."""
    rid = r.headers["x-request-id"]
    assert re.fullmatch(r"[0-9a-f]{32}", rid)
    headers = [(k, "NEW" if v == rid else v) for k, v in r.headers.multi_items()]
    return r.content.replace(rid.encode(), b"NEW"), headers, [{**f, "request_id": "NEW"} for f in lines]


def _length_out(headers: list[tuple[str, str]]) -> list[tuple[str, str]]:
    return [(k, "N" if k == "content-length" else v) for k, v in headers]


def _comparable(body: bytes, side: Side) -> bytes:
    """``body`` less what differs between the two apps by design: their registry folders, and
    the milliseconds by which a deadline was missed (a timing)."""
    body = body.replace(side.app.state.settings.registry.encode(), b"REGISTRY")
    return re.sub(rb"deadline passed \d+ ms", b"deadline passed N ms", body)


@pytest.mark.parametrize("case", CASES, ids=[c.name for c in CASES])
async def test_the_lane_answers_as_the_full_app_does(
    sides: tuple[Side, Side], case: Case, access_log: pytest.LogCaptureFixture
) -> None:
    lane, full = sides
    taken, passed = lane.app.lane.taken, lane.app.lane.passed
    r_lane, log_lane, counted_lane = await _exchange(lane, case, access_log)
    assert (lane.app.lane.taken - taken, lane.app.lane.passed - passed) == ((1, 0) if case.path == "lane" else (0, 1))
    r_full, log_full, counted_full = await _exchange(full, case, access_log)

    assert r_lane.status_code == r_full.status_code == case.status, r_lane.text
    assert len(log_lane) == len(log_full) == 1
    for line in (*log_lane, *log_full):
        assert line.pop("duration_ms") >= 0
    if case.request_id is not None and case.request_id == RID:
        assert r_lane.headers["x-request-id"] == RID
        body_lane, headers_lane, log_lane = r_lane.content, r_lane.headers.multi_items(), log_lane
        body_full, headers_full = r_full.content, r_full.headers.multi_items()
    else:
        body_lane, headers_lane, log_lane = _without_new_ids(r_lane, log_lane)
        body_full, headers_full, log_full = _without_new_ids(r_full, log_full)
    assert _comparable(body_lane, lane) == _comparable(body_full, full)
    for r in (r_lane, r_full):  # the length is checked here, as the bodies may differ by the masked parts
        assert int(r.headers["content-length"]) == len(r.content)
    assert _length_out(headers_lane) == _length_out(headers_full)
    assert log_lane == log_full
    assert counted_lane == counted_full
    assert (counted_lane["http /v1/predict"], counted_lane["http unmatched"]) == (1, 0)
    assert (counted_lane["http seconds /v1/predict"], counted_lane["http seconds unmatched"]) == (1, 0)
    if case.status == 200 and case.path == "lane":
        assert r_lane.headers["x-model-version"] == f"{MODEL}/{r_lane.json()['version']}"
        assert counted_lane["predict v1"] + counted_lane["predict v2"] == 1
    if case.name.startswith("two texts"):
        assert counted_lane["shadow dropped"] == 2  # offered after the reply, as the route's background task


async def test_a_chunked_body_goes_to_the_full_app(sides: tuple[Side, Side]) -> None:
    lane, _ = sides

    async def chunks() -> AsyncIterator[bytes]:
        yield b'{"texts": ["'
        yield TEXT.encode() + b'"]}'

    passed = lane.app.lane.passed
    r = await lane.client.post("/v1/predict", content=chunks(), headers={"Content-Type": "application/json"})
    assert r.status_code == 200, r.text
    assert r.json()["results"][0]["label"]
    assert lane.app.lane.passed == passed + 1
