"""/metrics in the Prometheus text format, request ids and the JSON access log.

The format rules checked here are those of the Prometheus documentation, "Exposition formats"
(text format 0.0.4): HELP/TYPE lines before a family's samples, label values escaped with
backslashes, histogram buckets cumulative in ``le`` and ending at ``+Inf`` equal to ``_count``.
"""

from __future__ import annotations

import json
import logging
import math
import re
from collections import defaultdict
from pathlib import Path

import pytest

from tests.helpers.service import MODEL, serving, settings_for
from textsieve.service.logs import JsonFormatter
from textsieve.service.telemetry import Registry

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


def check_histograms(types: dict[str, str], samples: dict) -> int:  # type: ignore[type-arg]
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


async def test_metrics_count_what_was_served(shared_registry: Path) -> None:
    texts = ["charged twice qzxv", "login fails wbbt plonk", "great " * 400, "ok"]
    async with serving(settings_for(shared_registry)) as (_, client):
        reply = (await client.post("/v1/predict", json={"texts": texts})).json()
        await client.post("/v1/predict", json={"texts": []})
        r = await client.get("/metrics")
    assert r.headers["content-type"] == "text/plain; version=0.0.4; charset=utf-8"
    types, samples = parse(r.text)
    assert check_histograms(types, samples) >= 4
    mv = (("model", MODEL), ("version", "1"))
    assert samples[("textsieve_texts_total", mv)] == len(texts)
    assert samples[("textsieve_predict_requests_total", mv)] == 1
    assert samples[("textsieve_unknown_tokens_total", mv)] == sum(x["unknown"] for x in reply["results"]) >= 4
    assert samples[("textsieve_truncated_texts_total", mv)] == 1
    assert samples[("textsieve_queue_wait_seconds_count", mv)] == len(texts)  # one observation per text
    assert samples[("textsieve_batch_texts_sum", mv)] == len(texts)
    assert samples[("textsieve_served_version", (("model", MODEL),))] == 1
    assert samples[("textsieve_ready", ())] == 1
    key = (("method", "POST"), ("route", "/v1/predict"), ("status", "422"))
    assert samples[("textsieve_http_requests_total", key)] == 1


def test_label_values_are_escaped() -> None:
    reg = Registry()
    c = reg.counter("x_total", "help with \\ and\nnewline", ("what",))
    c.inc(('a "quoted" \\ back\nslash',), 2)
    h = reg.histogram("y_seconds", "h", (), (0.1, 1.0))
    h.observe_many((), [0.05, 0.1, 0.5, 3.0])
    text = reg.render()
    assert 'x_total{what="a \\"quoted\\" \\\\ back\\nslash"} 2' in text
    assert "# HELP x_total help with \\\\ and\\nnewline" in text
    types, samples = parse(text)
    assert samples[("y_seconds_bucket", (("le", "0.1"),))] == 2  # "le" is inclusive
    assert samples[("y_seconds_bucket", (("le", "+Inf"),))] == 4
    assert samples[("y_seconds_sum", ())] == pytest.approx(3.65)
    with pytest.raises(ValueError):
        c.inc(("a",), -1)


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
