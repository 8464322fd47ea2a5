"""Schema fuzzing: schemathesis (Hypothesis strategies derived from the OpenAPI document the
service serves at /openapi.json) sends over 2 000 generated requests to a running
``textsieve serve`` across every operation: valid requests (positive mode), requests that break
the schema (negative mode), and requests aimed at the served model's real name and versions so
that views and admin calls go past "not found". Half carry the admin token.

Promised for every request: no 5xx; the status code, the content type and the body are the
ones the document states for that operation (problem+json with the Problem schema for errors);
a request that breaks the schema is refused with a 4xx. Nothing the server logs is an
unhandled error.
"""

from __future__ import annotations

import collections
import time
from pathlib import Path
from typing import Any

import requests
import schemathesis  # the dev extra (pyproject.toml); missing, this module fails rather than skips
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from schemathesis import GenerationMode
from schemathesis.checks import not_a_server_error
from schemathesis.specs.openapi import checks as openapi_checks

from tests.helpers.servers import running_server
from tests.helpers.service import ADMIN_TOKEN, AUTH, MODEL, make_registry

REQUESTS = 5000


def _with_deadline(case: Any) -> bool:
    return any(k.lower() == "textsieve-deadline" for k in (case.headers or {}))


def no_server_error(ctx: Any, response: Any, case: Any) -> bool | None:
    """Any 5xx fails, except 504 for a request that set its own (generated, often tiny) deadline."""
    if response.status_code == 504 and _with_deadline(case):
        return None
    return not_a_server_error(ctx, response, case)  # type: ignore[no-any-return]


CHECKS = [
    no_server_error,
    openapi_checks.status_code_conformance,
    openapi_checks.content_type_conformance,
    openapi_checks.response_headers_conformance,
    openapi_checks.response_schema_conformance,
    openapi_checks.negative_data_rejection,
]


def test_generated_requests_get_documented_answers_and_no_server_error(
    tmp_path: Path, tiny_bundles: dict[str, Path]
) -> None:
    registry = make_registry(tmp_path / "registry", tiny_bundles, live=1)
    with running_server(
        str(registry),
        tmp_path / "server.log",
        admin_token=ADMIN_TOKEN,
        poll_seconds=0.5,
        access_log="false",
        max_texts=64,
    ) as server:
        schema = schemathesis.openapi.from_url(f"{server.url}/openapi.json")
        operations = [result.ok() for result in schema.get_all_operations()]
        named = [op for op in operations if "{name}" in op.path]
        aimed = [
            op.as_strategy(path_parameters={"name": MODEL, **({"n": n} if "{n}" in op.path else {})})
            for op in named
            for n in ("1", "2", "3")
        ]
        predict = schema["/v1/predict"]["POST"].as_strategy(GenerationMode.POSITIVE)
        # Roughly: a fifth each of anything valid, anything invalid, aimed at the real model,
        # and (twice) valid predictions, the call other applications make all day.
        cases = st.one_of(
            schema.as_strategy(GenerationMode.POSITIVE),
            schema.as_strategy(GenerationMode.NEGATIVE),
            st.one_of(aimed),
            predict,
            predict,
        )
        sent: collections.Counter[str] = collections.Counter()
        statuses: collections.Counter[tuple[str, int]] = collections.Counter()
        session = requests.Session()
        began = time.perf_counter()

        @settings(max_examples=REQUESTS, deadline=None, database=None, suppress_health_check=list(HealthCheck))
        @given(case=cases, admin=st.booleans())
        def fuzz(case: Any, admin: bool) -> None:
            headers = AUTH if admin else None
            response = case.call(base_url=server.url, session=session, headers=headers, timeout=60)
            sent[case.operation.label] += 1
            deadline_passed = response.status_code == 504 and _with_deadline(case)
            statuses[(case.operation.label, 0 if deadline_passed else response.status_code)] += 1
            case.validate_response(response, checks=CHECKS, headers=headers)

        fuzz()
        elapsed = time.perf_counter() - began
        log = server.output()

    total = sum(sent.values())
    assert total >= REQUESTS * 0.95, sent
    assert set(sent) == {op.label for op in operations}, "every operation was exercised"
    assert not [key for key in statuses if key[1] >= 500], statuses
    assert "unhandled error" not in log, log[-3000:]
    by_status = collections.Counter(code for (_, code), n in statuses.items() for _ in range(n))
    print(
        f"\n{total} generated requests in {elapsed:.0f}s over {len(sent)} operations; "
        f"statuses: {dict(sorted(by_status.items()))}"
    )
    for label, n in sent.most_common():
        print(f"  {n:5d}  {label}")
