"""/metrics in the Prometheus text format, request ids and the JSON access log.

The format rules checked here are those of the Prometheus documentation, "Exposition formats"
(text format 0.0.4): HELP/TYPE lines before a family's samples, label values escaped with
backslashes, histogram buckets cumulative in ``le`` and ending at ``+Inf`` equal to ``_count``.
Each page is read twice: by the strict parser below, and by prometheus_client's own parser
(``text_string_to_metric_families``), a reader written outside this project.
"""

from __future__ import annotations

import asyncio
import datetime as dt
import json
import logging
import math
import os
import re
import time
from collections import defaultdict
from pathlib import Path
from typing import Any

import pytest
from prometheus_client import CollectorRegistry, Counter, Histogram, generate_latest
from prometheus_client.parser import text_string_to_metric_families

from tests.helpers.service import MODEL, serving, settings_for
from textsieve.registry import open_registry
from textsieve.service.logs import JsonFormatter
from textsieve.service.telemetry import CountedHistogram, PlainCounter, ServiceMetrics

# Every series name the service exposes besides the library's process_* ones: the contract
# dashboards are built on (README "Metrics"). A rename here is a breaking change.
EXPOSED = {
    "textsieve_http_requests_total",
    *(
        f"textsieve_{h}_{s}"
        for h in ("http_request_seconds", "batch_texts", "queue_wait_seconds", "inference_seconds")
        for s in ("bucket", "sum", "count")
    ),
    "textsieve_predict_requests_total",
    "textsieve_texts_total",
    "textsieve_tokens_total",
    "textsieve_unknown_tokens_total",
    "textsieve_truncated_texts_total",
    "textsieve_served_version",
    "textsieve_served_model_info",
    "textsieve_ready",
    "textsieve_swaps_total",
    "textsieve_worker_resident_memory_bytes",
    "textsieve_worker_shared_memory_bytes",
    "textsieve_worker_cpu_seconds_total",
    "textsieve_worker_start_time_seconds",
    "textsieve_workers_batch_scheduled",
    "textsieve_worker_scheduling_switches_total",
    # The overload bounds (service/web/transport.py, bodylimit.py, inference/admission.py).
    "textsieve_overload_refusals_total",
    "textsieve_connections_open",
    "textsieve_requests_limit",
    "textsieve_connections_timed_out_total",
    "textsieve_connections_malformed_total",
    "textsieve_body_bytes_in_flight",
    "textsieve_queue_texts",
    "textsieve_queue_limit_texts",
    "textsieve_queue_abandoned_requests_total",
    # The live loop (service/liveloop/): the shadow queue, and drift of the live texts per version.
    "textsieve_shadow_queue_texts",
    "textsieve_drift_window_texts",
    "textsieve_drift_psi",
    "textsieve_drift_js_distance",
}
Samples = dict[tuple[str, tuple[tuple[str, str], ...]], float]

pytestmark = pytest.mark.anyio

_NAME = r"[a-zA-Z_:][a-zA-Z0-9_:]*"
_LABEL = r'[a-zA-Z_][a-zA-Z0-9_]*="(?:[^"\\\n]|\\\\|\\"|\\n)*"'
_SAMPLE = re.compile(rf"^({_NAME})(\{{(?:{_LABEL})(?:,{_LABEL})*\}})? (\S+)$")
_LABELS = re.compile(r'([a-zA-Z_][a-zA-Z0-9_]*)="((?:[^"\\]|\\.)*)"')


def parse(text: str) -> tuple[dict[str, str], dict[tuple[str, tuple[tuple[str, str], ...]], float]]:
    """Strict parse: returns family types and samples; fails on any line the format forbids."""
    assert text.endswith("\n")
    types: dict[str, str] = {}
    helped: set[str] = set()
    samples: dict[tuple[str, tuple[tuple[str, str], ...]], float] = {}
    for line in text.splitlines():
        if line.startswith("# HELP "):
            helped.add(line.split(" ")[2])
        elif line.startswith("# TYPE "):
            _, _, name, kind = line.split(" ")
            assert kind in ("counter", "gauge", "histogram", "summary", "untyped")
            assert name in helped and name not in types
            types[name] = kind
        else:
            m = _SAMPLE.match(line)
            assert m, f"not a valid sample line: {line!r}"
            name, labels, value = m.group(1), m.group(2) or "", m.group(3)
            family = re.sub(r"_(bucket|sum|count)$", "", name) if name not in types else name
            assert family in types, f"sample {name} before its TYPE line"
            key = (name, tuple(sorted(_LABELS.findall(labels))))
            assert key not in samples, f"duplicate sample {key}"
            samples[key] = float(value.replace("+Inf", "inf"))
    return types, samples


def check_histograms(types: dict[str, str], samples: Samples) -> int:
    checked = 0
    for family, kind in types.items():
        if kind != "histogram":
            continue
        series: dict[tuple, list[tuple[float, float]]] = defaultdict(list)  # type: ignore[type-arg]
        for (name, labels), value in samples.items():
            if name == family + "_bucket":
                rest = tuple(kv for kv in labels if kv[0] != "le")
                le = dict(labels)["le"]
                series[rest].append((math.inf if le == "+Inf" else float(le), value))
        for rest, buckets in series.items():
            buckets.sort()
            counts = [c for _, c in buckets]
            assert counts == sorted(counts), "buckets must be cumulative"
            assert buckets[-1][0] == math.inf
            assert samples[(family + "_count", rest)] == counts[-1]
            assert (family + "_sum", rest) in samples
            checked += 1
    return checked


def outside(text: str) -> Samples:
    """Every sample as prometheus_client's parser reads it (label values unescaped)."""
    return {
        (s.name, tuple(sorted(s.labels.items()))): s.value
        for family in text_string_to_metric_families(text)
        for s in family.samples
    }


def manifest_sha256(registry: Path, version: int) -> str:
    with open_registry(registry) as reg:
        return str(reg.version(MODEL, version).manifest_sha256)


def test_the_readme_metrics_table_lists_every_exposed_series() -> None:
    # The table is where dashboard authors read the contract; a series missing there is undocumented.
    readme = (Path(__file__).resolve().parents[2] / "README.md").read_text(encoding="utf-8")
    section = readme.split("### Metrics", 1)[1].split("\n### ", 1)[0]
    rows = set(re.findall(r"^\| `(textsieve_[a-z_]+)` \|", section, re.M))
    families = {re.sub(r"_(bucket|sum|count)$", "", name) for name in EXPOSED}
    assert families <= rows, f"README's Metrics table lacks {sorted(families - rows)}"


async def test_metrics_count_what_was_served(shared_registry: Path) -> None:
    texts = ["charged twice qzxv", "login fails wbbt plonk", "great " * 400, "ok"]
    async with serving(settings_for(shared_registry)) as (_, client):
        reply = (await client.post("/v1/predict", json={"texts": texts})).json()
        await client.post("/v1/predict", json={"texts": []})
        r = await client.get("/metrics")
    assert r.headers["content-type"] == "text/plain; version=0.0.4; charset=utf-8"
    types, samples = parse(r.text)
    assert outside(r.text) == samples  # two independent readers agree on every sample
    assert {name for name, _ in samples if not name.startswith("process_")} == EXPOSED
    assert check_histograms(types, samples) >= 4
    mv = (("model", MODEL), ("version", "1"))
    assert samples[("textsieve_texts_total", mv)] == len(texts)
    assert samples[("textsieve_predict_requests_total", mv)] == 1
    assert samples[("textsieve_unknown_tokens_total", mv)] == sum(x["unknown"] for x in reply["results"]) >= 4
    assert samples[("textsieve_truncated_texts_total", mv)] == 1
    assert samples[("textsieve_queue_wait_seconds_count", mv)] == len(texts)  # one observation per text
    assert samples[("textsieve_batch_texts_sum", mv)] == len(texts)
    assert samples[("textsieve_served_version", (("model", MODEL),))] == 1
    info = (("manifest_sha256", manifest_sha256(shared_registry, 1)), *mv)
    assert samples[("textsieve_served_model_info", info)] == 1
    assert samples[("textsieve_ready", ())] == 1
    key = (("method", "POST"), ("route", "/v1/predict"), ("status", "422"))
    assert samples[("textsieve_http_requests_total", key)] == 1
    assert samples[("process_resident_memory_bytes", ())] > 0  # the server process's own
    assert samples[("process_cpu_seconds_total", ())] > 0


async def test_a_client_gone_mid_body_is_booked_499_not_500(shared_registry: Path) -> None:
    # A chunked body whose client goes away (or whose framing the connection layer refuses with
    # 400) reaches the app as a disconnect; it was booked as a 500, a server error nobody made.
    async with serving(settings_for(shared_registry)) as (app, client):
        messages = [{"type": "http.request", "body": b'{"texts"', "more_body": True}, {"type": "http.disconnect"}]
        sent: list[Any] = []

        async def receive() -> Any:
            return messages.pop(0)

        async def send(message: Any) -> None:
            sent.append(message)

        headers = [(b"host", b"t"), (b"content-type", b"application/json"), (b"transfer-encoding", b"chunked")]
        scope = {"type": "http", "asgi": {"version": "3.0"}, "http_version": "1.1", "method": "POST", "scheme": "http"}
        scope |= {"path": "/v1/predict", "raw_path": b"/v1/predict", "query_string": b"", "headers": headers}
        await app(scope, receive, send)
        samples = outside((await client.get("/metrics")).text)
    assert sent == []
    key = (("method", "POST"), ("route", "unmatched"), ("status", "499"))
    assert samples[("textsieve_http_requests_total", key)] == 1
    assert not [k for k in samples if k[0] == "textsieve_http_requests_total" and ("status", "500") in k[1]]


async def test_the_openapi_document_is_booked_under_its_own_route(shared_registry: Path) -> None:
    # FastAPI serves /openapi.json through a plain Starlette route, which names no route on the request:
    # its fetches were booked under "unmatched", with the 404s (found probing, 2026-12-05).
    async with serving(settings_for(shared_registry)) as (_, client):
        assert (await client.get("/openapi.json")).status_code == 200
        assert (await client.head("/openapi.json")).status_code == 200
        assert (await client.get("/no-such-path")).status_code == 404
        # Its 405s too: the plain route refused other methods before it could name itself (2026-12-05).
        assert (await client.post("/openapi.json", json={})).status_code == 405
        samples = outside((await client.get("/metrics")).text)
    booked = (("GET", "/openapi.json", "200"), ("HEAD", "/openapi.json", "200"), ("POST", "/openapi.json", "405"))
    for method, route, status in booked:
        key = (("method", method), ("route", route), ("status", status))
        assert samples[("textsieve_http_requests_total", key)] == 1, key
    for method, status in (("GET", "200"), ("POST", "405")):
        unmatched = (("method", method), ("route", "unmatched"), ("status", status))
        assert ("textsieve_http_requests_total", unmatched) not in samples


async def test_options_star_is_booked_under_its_target(shared_registry: Path) -> None:
    # "OPTIONS *" (RFC 9112 §3.2.4, the server as a whole) matches no route and is answered 204 with the
    # server's methods: it was booked under "unmatched", with the 404s (found reviewing, 2026-12-05).
    async with serving(settings_for(shared_registry)) as (app, client):
        sent: list[Any] = []

        async def receive() -> Any:
            return {"type": "http.request", "body": b"", "more_body": False}

        async def send(message: Any) -> None:
            sent.append(message)

        scope = {"type": "http", "asgi": {"version": "3.0"}, "http_version": "1.1", "method": "OPTIONS"}
        scope |= {"scheme": "http", "path": "*", "raw_path": b"*", "query_string": b"", "headers": [(b"host", b"t")]}
        await app(scope, receive, send)
        samples = outside((await client.get("/metrics")).text)
    assert sent[0]["status"] == 204 and (b"allow", b"GET, HEAD, POST, OPTIONS") in sent[0]["headers"]
    key = (("method", "OPTIONS"), ("route", "*"), ("status", "204"))
    assert samples[("textsieve_http_requests_total", key)] == 1
    unmatched = [k for k in samples if k[0] == "textsieve_http_requests_total" and ("route", "unmatched") in k[1]]
    assert unmatched == []


async def _body_chunks(size: int) -> Any:
    for _ in range(size // 65536 + 1):
        yield b"x" * 65536


# Refused by the body middleware before routing (service/web/bodylimit.py): each was booked under
# "unmatched", with the 404s, while other refusals of the same path were booked under it (found by
# an audit of the HTTP API, 2026-12-05). (method, path, headers, body size or "chunked", status, route)
BEFORE_ROUTING = [
    pytest.param(
        "POST", "/v1/predict", [("Content-Encoding", "gzip")], 20, 415, "/v1/predict", id="predict, gzip body"
    ),
    pytest.param("POST", "/v1/predict", [], 5 * 1024 * 1024, 413, "/v1/predict", id="predict, 5 MB body"),
    pytest.param("POST", "/v1/predict", [], "chunked", 413, "/v1/predict", id="predict, 5 MB chunked body"),
    pytest.param(
        "POST",
        "/v1/predict",
        [("Content-Type", "application/json"), ("Content-Type", "text/plain")],
        20,
        422,
        "/v1/predict",
        id="predict, two Content-Type lines",
    ),
    pytest.param("POST", "/v1/verdicts", [], 20, 401, "/v1/verdicts", id="verdicts, no token"),
    pytest.param(
        "POST",
        f"/v1/models/{MODEL}/versions/1/promote",
        [("Content-Encoding", "gzip")],
        20,
        401,
        "/v1/models/{name}/versions/{n}/promote",
        id="promote, no token",
    ),
    # The router would have answered 405 there: booked as its 405 would have been.
    pytest.param("POST", "/healthz", [("Content-Encoding", "br")], 20, 415, "/healthz", id="healthz, brotli body"),
    pytest.param("POST", "/no-such-path", [("Content-Encoding", "gzip")], 20, 415, "unmatched", id="unknown path"),
]


@pytest.mark.parametrize("fast_lane", [True, False], ids=["lane", "no lane"])
@pytest.mark.parametrize(("method", "path", "headers", "size", "status", "route"), BEFORE_ROUTING)
async def test_a_refusal_before_routing_is_booked_under_the_route_asked_for(
    shared_registry: Path,
    caplog: pytest.LogCaptureFixture,
    fast_lane: bool,
    method: str,
    path: str,
    headers: list[tuple[str, str]],
    size: int | str,
    status: int,
    route: str,
) -> None:
    caplog.set_level(logging.INFO, logger="textsieve.access")
    settings = settings_for(
        shared_registry, workers=1, inference="threads", access_log=True, review_token="r" * 24, admin_token="a" * 24
    )
    async with serving(settings, fast_lane=fast_lane) as (_, client):
        caplog.clear()
        content: Any = _body_chunks(5 * 1024 * 1024) if size == "chunked" else b"x" * int(size)
        given = [("Content-Type", "application/json")] if not any(k == "Content-Type" for k, _ in headers) else []
        r = await client.request(method, path, content=content, headers=[*given, *headers])
        assert r.status_code == status, r.text
        await asyncio.sleep(0)  # the booking's last line runs after the client has the reply
        lines = [r.__dict__["fields"] for r in caplog.records if r.name == "textsieve.access"]
        samples = outside((await client.get("/metrics")).text)
    assert [(line["path"], line["route"], line["status"]) for line in lines] == [(path, route, status)]
    key = (("method", method), ("route", route), ("status", str(status)))
    assert samples[("textsieve_http_requests_total", key)] == 1
    booked = [k for k in samples if k[0] == "textsieve_http_requests_total" and ("status", str(status)) in k[1]]
    assert booked == [("textsieve_http_requests_total", key)]


def _logged_request(log: Path, rid: str, timeout: float = 5.0) -> dict[str, Any]:
    """The access-log line of request ``rid`` in a server's JSON log (written within a flush or two)."""
    end = time.monotonic() + timeout
    while True:
        for line in log.read_text(encoding="utf-8", errors="replace").splitlines():
            if line.startswith("{"):
                entry = json.loads(line)
                if entry.get("event") == "request" and entry.get("request_id") == rid:
                    return dict(entry)
        assert time.monotonic() < end, f"no access-log line for {rid}"
        time.sleep(0.1)


# Bodies the client starts and the connection layer answers (service/web/transport.py): a body that
# stalls past the read deadline is 408 (RFC 9110 §15.5.9); a chunk whose size is not hexadecimal
# breaks the chunked framing (RFC 9112 §7.1), 400. Each goes to predict and to a token-guarded route
# (with its token), whose bodies the app reads at different layers.
_STARTED_BODIES = [
    pytest.param("/v1/predict", "Content-Length: 100", b'{"texts": [', 408, id="predict, body stalls"),
    pytest.param("/v1/predict", "Transfer-Encoding: chunked", b'b\r\n{"texts": [\r\n', 408, id="predict, chunks stall"),
    pytest.param(
        "/v1/predict", "Transfer-Encoding: chunked", b'b\r\n{"texts": [\r\nzz\r\n', 400, id="predict, bad chunk"
    ),
    pytest.param("/v1/verdicts", "Content-Length: 100", b'{"model": ', 408, id="verdicts, body stalls"),
    pytest.param("/v1/verdicts", "Transfer-Encoding: chunked", b'3\r\n{"m\r\nzz\r\n', 400, id="verdicts, bad chunk"),
]


def test_the_access_log_and_metrics_book_what_the_connection_layer_answered_a_started_body(
    shared_registry: Path, tmp_path: Path
) -> None:
    """Before, the app saw these as a client gone mid-body and booked 499 while the client had got a
    408 or a 400 (the connection layer's own counters had them). Now the log line and
    textsieve_http_requests_total carry the status that went out, once."""
    import socket

    import httpx

    from tests.helpers.servers import running_server
    from tests.helpers.service import REVIEW_TOKEN

    log = tmp_path / "serve.log"
    with running_server(
        str(shared_registry), log, workers=1, inference="threads", read_timeout_seconds=1, review_token=REVIEW_TOKEN
    ) as server:
        for i, param in enumerate(_STARTED_BODIES):
            path, framing, body, status = param.values
            rid = f"started-body-{i}"
            head = (
                f"POST {path} HTTP/1.1\r\nHost: t\r\nContent-Type: application/json\r\n{framing}\r\n"
                f"X-Request-Id: {rid}\r\nAuthorization: Bearer {REVIEW_TOKEN}\r\n\r\n"
            )
            with socket.create_connection(("127.0.0.1", server.port), timeout=5) as s:
                s.sendall(head.encode() + body)
                reply = s.recv(65536)
            assert reply.startswith(f"HTTP/1.1 {status} ".encode()), (param.id, reply[:200])
            entry = _logged_request(log, rid)
            assert entry["status"] == status, (param.id, entry)
            assert entry["path"] == path
        # A client that goes away mid-body got nothing: 499, not the 422 the app then made of the
        # missing body (before, that was booked for a declared length).
        for i, path in enumerate(("/v1/predict", "/v1/verdicts")):
            rid = f"gone-mid-body-{i}"
            head = (
                f"POST {path} HTTP/1.1\r\nHost: t\r\nContent-Type: application/json\r\nContent-Length: 100\r\n"
                f"X-Request-Id: {rid}\r\nAuthorization: Bearer {REVIEW_TOKEN}\r\n\r\n"
            )
            with socket.create_connection(("127.0.0.1", server.port), timeout=5) as s:
                s.sendall(head.encode() + b'{"texts": [')
                time.sleep(0.2)
            entry = _logged_request(log, rid)
            assert entry["status"] == 499, entry
        samples = outside(httpx.get(f"{server.url}/metrics", timeout=10).text)
    booked = defaultdict(float)
    for (name, labels), value in samples.items():
        if name == "textsieve_http_requests_total" and ("method", "POST") in labels:
            booked[dict(labels)["status"]] += value
    assert booked["408"] == 3 and booked["400"] == 2, dict(booked)
    assert booked["499"] == 2 and booked["422"] == 0, dict(booked)


def test_label_values_and_help_are_escaped() -> None:
    metrics = ServiceMetrics()
    weird = 'a "quoted" \\ back\nslash'
    metrics.swaps.labels(weird, "failed").inc(2)
    c = Counter("x_total", "help with \\ and\nnewline", ("what",), registry=metrics.registry)
    c.labels("a").inc()
    text = metrics.render().decode()
    assert 'textsieve_swaps_total{model="a \\"quoted\\" \\\\ back\\nslash",outcome="failed"} 2.0' in text
    assert "# HELP x_total help with \\\\ and\\nnewline" in text
    parse(text)
    assert outside(text)[("textsieve_swaps_total", (("model", weird), ("outcome", "failed")))] == 2
    with pytest.raises(ValueError):
        c.labels("a").inc(-1)


def test_counted_histogram_equals_the_library_histogram_observed_one_by_one() -> None:
    counted = CountedHistogram("y_seconds", "h", ("what",), (0.1, 1.0))
    reference = CollectorRegistry()  # prometheus_client's own Histogram is the reference
    one_by_one = Histogram("y_seconds", "h", ("what",), buckets=(0.1, 1.0), registry=reference)
    for value in (0.05, 0.1, 0.5, 3.0):
        counted.labels("a").observe(value)
    registry = CollectorRegistry()
    registry.register(counted)
    first = outside(generate_latest(registry).decode())
    a = (("what", "a"),)
    assert first[("y_seconds_bucket", (("le", "0.1"), *a))] == 2  # "le" is inclusive
    assert first[("y_seconds_bucket", (("le", "+Inf"), *a))] == 4
    assert first[("y_seconds_sum", a)] == pytest.approx(3.65)
    for value, times in ((0.2, 3), (0.1, 0), (7.5, 2)):
        counted.labels("b").observe(value, times)
    for what, value, times in (
        ("a", 0.05, 1),
        ("a", 0.1, 1),
        ("a", 0.5, 1),
        ("a", 3.0, 1),
        ("b", 0.2, 3),
        ("b", 7.5, 2),
    ):
        for _ in range(times):
            one_by_one.labels(what).observe(value)
    ours = outside(generate_latest(registry).decode())
    theirs = {k: v for k, v in outside(generate_latest(reference).decode()).items() if "_created" not in k[0]}
    assert ours.keys() == theirs.keys()  # same series, same "le" spellings
    assert all(ours[k] == pytest.approx(theirs[k]) for k in ours)
    with pytest.raises(ValueError):
        counted.labels("a").observe(0.1, -1)


def test_plain_counter_equals_the_library_counter() -> None:
    # prometheus_client's own Counter is the reference: the same increments must be written as the
    # same series (its _created series aside, which the service never exposed).
    ours = PlainCounter("z_total", "c", ("what", "code"))
    reference = CollectorRegistry()
    theirs = Counter("z_total", "c", ("what", "code"), registry=reference)
    for what, code, amount in (("a", "200", 1), ("b", "503", 2.5), ("a", "200", 3), ("c", "200", 0)):
        ours.labels(what, code).inc(amount)
        theirs.labels(what, code).inc(amount)
    registry = CollectorRegistry()
    registry.register(ours)
    written = generate_latest(registry).decode()
    expected = "".join(
        line + "\n" for line in generate_latest(reference).decode().splitlines() if "_created" not in line
    )
    assert written == expected
    assert outside(written)[("z_total", (("code", "200"), ("what", "a")))] == 4
    with pytest.raises(ValueError):
        ours.labels("a", "200").inc(-1)
    with pytest.raises(ValueError):
        PlainCounter("z", "c", ())


def _vmrss_bytes(pid: int) -> float:
    status = Path(f"/proc/{pid}/status").read_text()
    kb = re.search(r"^VmRSS:\s+(\d+) kB$", status, re.MULTILINE)
    assert kb, status
    return int(kb.group(1)) * 1024.0


def _schedstat_seconds(pid: int) -> float:
    return int(Path(f"/proc/{pid}/schedstat").read_text().split()[0]) / 1e9


@pytest.mark.skipif(not Path("/proc/self/schedstat").exists(), reason="needs Linux /proc with schedstat")
async def test_each_worker_process_reports_memory_and_cpu(shared_registry: Path) -> None:
    started = time.time()
    async with serving(settings_for(shared_registry, inference="processes", workers=2)) as (app, client):
        # Enough work for the workers' CPU to show in clock ticks (10 ms): they now start with the
        # tokenizer's warm-up done by their fork server, so loading a tiny model may take less.
        for _ in range(20):
            assert (await client.post("/v1/predict", json={"texts": ["charged twice"] * 50})).status_code == 200
        text = (await client.get("/metrics")).text
        pids = dict(app.state.pool.procs.processes())
        # proc(5): status's VmRSS and schedstat's run time are the kernel's other reports of the
        # same figures (stat's utime + stime are scaled to the scheduler's run time, in ticks).
        rss = {i: _vmrss_bytes(pid) for i, pid in pids.items()}
        ran = {i: _schedstat_seconds(pid) for i, pid in pids.items()}
    parse(text)
    samples = outside(text)
    assert sorted(pids) == [0, 1] and os.getpid() not in pids.values()
    assert sum(samples[("textsieve_worker_cpu_seconds_total", (("worker", str(i)),))] for i in pids) > 0
    for i in pids:
        w = (("worker", str(i)),)
        resident = samples[("textsieve_worker_resident_memory_bytes", w)]
        assert resident == pytest.approx(rss[i], rel=0.05)  # idle workers: no change between the reads
        assert 0 < samples[("textsieve_worker_shared_memory_bytes", w)] <= resident
        cpu = samples[("textsieve_worker_cpu_seconds_total", w)]
        assert cpu == pytest.approx(ran[i], abs=0.05)
        assert started - 2 <= samples[("textsieve_worker_start_time_seconds", w)] <= time.time() + 1
    assert {labels for name, labels in samples if name == "textsieve_worker_cpu_seconds_total"} == {
        (("worker", "0"),),
        (("worker", "1"),),
    }

    async with serving(settings_for(shared_registry, inference="threads", workers=2)) as (_, client):
        threads = outside((await client.get("/metrics")).text)
    assert not [name for name, _ in threads if name.startswith("textsieve_worker_")]  # no worker processes


async def test_served_model_info_follows_a_swap(registry_dir: Path) -> None:
    sha = {v: manifest_sha256(registry_dir, v) for v in (1, 2)}
    assert sha[1] != sha[2]

    def info(samples: Samples) -> dict[tuple[tuple[str, str], ...], float]:
        return {labels: value for (name, labels), value in samples.items() if name == "textsieve_served_model_info"}

    def served(version: int) -> dict[tuple[tuple[str, str], ...], float]:
        return {(("manifest_sha256", sha[version]), ("model", MODEL), ("version", str(version))): 1.0}

    def change(call: str, *args: object, **kwargs: object) -> None:
        with open_registry(registry_dir) as reg:
            getattr(reg, call)(MODEL, *args, actor="tests", **kwargs)

    async with serving(settings_for(registry_dir, poll_seconds=600, inference="threads")) as (app, client):
        before = outside((await client.get("/metrics")).text)
        await asyncio.to_thread(change, "promote", 2, "live", reason="info test", force=True)
        await app.state.models.refresh(MODEL, why="test")
        after = outside((await client.get("/metrics")).text)
        await asyncio.to_thread(change, "rollback", reason="and back")
        await app.state.models.refresh(MODEL, why="test")
        back = outside((await client.get("/metrics")).text)
    assert info(before) == served(1)
    assert info(after) == served(2)  # the old version's series is gone, not left beside the new one
    assert info(back) == served(1)
    assert after[("textsieve_served_version", (("model", MODEL),))] == 2  # the gauge stays beside the info
    assert back[("textsieve_swaps_total", (("model", MODEL), ("outcome", "swapped")))] == 2


async def test_request_ids_and_one_json_log_line_per_request(
    shared_registry: Path, caplog: pytest.LogCaptureFixture
) -> None:
    caplog.set_level(logging.INFO, logger="textsieve.access")
    async with serving(settings_for(shared_registry, access_log=True)) as (_, client):
        caplog.clear()
        fresh = await client.post("/v1/predict", json={"texts": ["a", "b"]})
        given = await client.get("/healthz", headers={"X-Request-Id": "deploy-42.a:b"})
        unsafe = await client.get("/healthz", headers={"X-Request-Id": "no spaces allowed"})
        problem = await client.post("/v1/predict", json={"texts": []})
    assert re.fullmatch(r"[0-9a-f]{32}", fresh.headers["x-request-id"])
    assert given.headers["x-request-id"] == "deploy-42.a:b"
    assert re.fullmatch(r"[0-9a-f]{32}", unsafe.headers["x-request-id"])
    assert problem.json()["request_id"] == problem.headers["x-request-id"]
    records = [r for r in caplog.records if r.name == "textsieve.access"]
    assert len(records) == 4
    lines = [json.loads(JsonFormatter().format(r)) for r in records]
    first = lines[0]
    assert first["request_id"] == fresh.headers["x-request-id"]
    assert (first["status"], first["route"], first["model"], first["version"], first["texts"]) == (
        200,
        "/v1/predict",
        MODEL,
        1,
        2,
    )
    assert first["duration_ms"] > 0 and first["method"] == "POST"
    assert [line["status"] for line in lines] == [200, 200, 200, 422]
    assert all("\n" not in JsonFormatter().format(r) for r in records)


def test_log_timestamps_equal_what_datetime_writes() -> None:
    # Reference: the standard library's datetime.fromtimestamp(t, UTC).isoformat(timespec=
    # "milliseconds"), which the log lines used to call. Random times, and times just below and
    # above whole seconds and milliseconds, where its microsecond rounding (half to even) and
    # millisecond truncation decide the digits; also before 1970 and lines of one second in turn.
    import random

    from textsieve.service.logs import timestamp

    rng = random.Random(20261203)
    times = [rng.uniform(0, 4e9) for _ in range(20_000)]
    times += [
        s + f
        for s in (0, 1_764_777_384, 4_102_444_799)
        for f in (0.0, 0.0005, 0.0009995, 0.9994999, 0.9995, 0.9999994, 0.9999995, 0.9999996)
    ]
    times += [1_764_777_384 + k / 1e6 for k in range(-1500, 1500)]
    times += [-1.5, -0.0000004, -86_400.9999996]
    for t in times:
        assert timestamp(t) == dt.datetime.fromtimestamp(t, dt.UTC).isoformat(timespec="milliseconds"), t


async def test_access_lines_handed_to_the_line_writer_equal_what_logging_writes(
    shared_registry: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    # As `textsieve serve` sets logging up (logs.configure), the access log hands each request's
    # fields to the line writer without a LogRecord; the line must be the one logging would write.
    import io

    from textsieve.service.logs import ACCESS, BatchedLineHandler, line_handler

    stream = io.StringIO()
    handler = BatchedLineHandler(stream, flush_seconds=60)
    handler.setFormatter(JsonFormatter())
    textsieve_logger = logging.getLogger("textsieve")
    monkeypatch.setattr(textsieve_logger, "handlers", [handler])
    monkeypatch.setattr(textsieve_logger, "propagate", False)
    old_level = textsieve_logger.level
    textsieve_logger.setLevel(logging.INFO)  # setLevel, not setattr: it clears the loggers' level caches
    access = logging.getLogger(ACCESS)
    try:
        assert line_handler(access) is handler
        # A filter on the way (or any other handler) sends lines through logging instead.
        keep_all = logging.Filter()
        handler.addFilter(keep_all)
        assert line_handler(access) is None
        handler.removeFilter(keep_all)
        assert line_handler(access) is handler
        async with serving(settings_for(shared_registry, access_log=True)) as (_, client):
            handler.flush()
            stream.seek(0)
            stream.truncate()
            r = await client.post("/v1/predict", json={"texts": ["a", "b"]}, headers={"X-Request-Id": "fast-1"})
            # The same fields through logging (the path taken when another handler is set up).
            fields = {"event": "request", "request_id": "through-logging", "status": 200}
            access.info("request", extra={"fields": fields})
            handler.add_fields(ACCESS, dict(fields))
            handler.flush()
    finally:
        handler.close()
        textsieve_logger.setLevel(old_level)
    assert r.status_code == 200
    lines = [json.loads(line) for line in stream.getvalue().splitlines()]
    fast = [x for x in lines if x.get("request_id") == "fast-1"]
    assert len(fast) == 1
    assert {k: v for k, v in fast[0].items() if k not in ("ts", "duration_ms")} == {
        "level": "info",
        "logger": ACCESS,
        "event": "request",
        "request_id": "fast-1",
        "method": "POST",
        "path": "/v1/predict",
        "route": "/v1/predict",
        "status": 200,
        "client": fast[0]["client"],
        "model": MODEL,
        "version": 1,
        "texts": 2,
    }
    logged, handed = [x for x in lines if x.get("request_id") == "through-logging"]
    apart = dt.datetime.fromisoformat(handed["ts"]) - dt.datetime.fromisoformat(logged["ts"])
    assert set(logged) == set(handed) and abs(apart.total_seconds()) < 1
    assert {k: v for k, v in logged.items() if k != "ts"} == {k: v for k, v in handed.items() if k != "ts"}


class _Odd:
    def __str__(self) -> str:
        return 'odd "value"'


@pytest.mark.parametrize(
    "fields",
    [
        {
            "event": "request",
            "request_id": "r1",
            "method": "POST",
            "path": "/v1/predict",
            "status": 200,
            "duration_ms": 1.234,
            "client": "127.0.0.1",
            "model": "m",
            "version": 3,
            "texts": 1,
        },
        {"event": 'quote " backslash \\ tab \t nul \x00 line\nbreak', "ünï": "çødé ✓ 𝄞", "n": None, "f": 1e300},
        {"odd": _Odd(), "list": [1, "a", {"b": 2.5}]},  # encoded through default=str
        {"ts": "caller's own", "level": "x", "extra": 1},  # a field shares the head's keys: merge semantics
        {"logger": "other"},
        {},
    ],
)
def test_written_fields_lines_equal_the_formatters_line(fields: dict[str, Any]) -> None:
    # The writer thread splices the head's bytes onto the fields' encoding (logs.fields_line); the
    # line must be byte for byte the one JsonFormatter makes of a LogRecord carrying the same fields,
    # and read back by the standard library's json (an outside reader) with the head's keys first.
    from textsieve.service.logs import ACCESS, fields_line

    created = 1_764_777_384.8837
    record = logging.LogRecord(ACCESS, logging.INFO, __file__, 1, "request", None, None)
    record.created = created
    record.fields = fields
    line = fields_line(created, ACCESS, fields)
    assert line == JsonFormatter().format(record)
    parsed = json.loads(line)
    assert list(parsed)[:3] == ["ts", "level", "logger"]
    assert parsed["ts"] == fields.get(
        "ts", dt.datetime.fromtimestamp(created, dt.UTC).isoformat(timespec="milliseconds")
    )
    assert len(parsed) == len({"ts", "level", "logger"} | set(fields))


def test_a_fields_line_with_a_key_json_cannot_hold_is_refused_as_before() -> None:
    # orjson refuses non-string keys (TypeError); the writer then writes an "unwritable" note.
    from textsieve.service.logs import _fields_line_or_note

    line = json.loads(_fields_line_or_note(0.0, "textsieve.access", {1: "x"}))  # type: ignore[dict-item]
    assert line["event"] == "unwritable" and line["error"].startswith("TypeError")
