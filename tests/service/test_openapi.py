"""The OpenAPI document as generated clients see it: valid OpenAPI 3.1, every operation with a
stable explicit operation id and exactly one tag (service/web/openapi.py).

Validity is judged by openapi-spec-validator against the OpenAPI 3.1.0 specification, which
also requires operation ids to be unique ("The id MUST be unique among all operations described
in the API", Operation Object). The table below is the contract client generators name methods
after: changing an id renames a method in every generated client, so it changes here on purpose.
"""

from __future__ import annotations

import copy
import re
from pathlib import Path
from typing import Any

import pytest
from openapi_spec_validator import OpenAPIV31SpecValidator, validate
from openapi_spec_validator.validation.exceptions import OpenAPIValidationError

from textsieve.service.settings import Settings
from textsieve.service.web.app import create_app
from textsieve.service.web.openapi import Tag

OPERATIONS = {
    "predict": ("POST /v1/predict", Tag.PREDICTIONS),
    "listModels": ("GET /v1/models", Tag.REGISTRY),
    "getModel": ("GET /v1/models/{name}", Tag.REGISTRY),
    "listVersions": ("GET /v1/models/{name}/versions", Tag.REGISTRY),
    "getVersion": ("GET /v1/models/{name}/versions/{n}", Tag.REGISTRY),
    "getVersionReport": ("GET /v1/models/{name}/versions/{n}/report", Tag.REGISTRY),
    "getVersionCard": ("GET /v1/models/{name}/versions/{n}/card", Tag.REGISTRY),
    "promoteVersion": ("POST /v1/models/{name}/versions/{n}/promote", Tag.ADMIN),
    "rollbackModel": ("POST /v1/models/{name}/rollback", Tag.ADMIN),
    "recordVerdict": ("POST /v1/verdicts", Tag.REVIEWS),
    "getLiveness": ("GET /healthz", Tag.HEALTH),
    "getReadiness": ("GET /readyz", Tag.HEALTH),
    "getMetrics": ("GET /metrics", Tag.HEALTH),
    "getDrift": ("GET /v1/models/{name}/drift", Tag.REGISTRY),
}
METHODS = ("get", "put", "post", "delete", "patch", "head", "options", "trace")


@pytest.fixture(scope="module")
def document(tmp_path_factory: pytest.TempPathFactory) -> dict[str, Any]:
    """What /openapi.json serves, from an app that is built but never started."""
    registry: Path = tmp_path_factory.mktemp("registry")
    app = create_app(Settings(registry=str(registry), workers=1, inference="threads", access_log=False))
    doc: dict[str, Any] = app.openapi()
    return doc


def operations(doc: dict[str, Any]) -> list[tuple[str, dict[str, Any]]]:
    return [
        (f"{method.upper()} {path}", op)
        for path, item in doc["paths"].items()
        for method, op in item.items()
        if method in METHODS
    ]


def test_the_document_is_valid_openapi_3_1(document: dict[str, Any]) -> None:
    assert re.fullmatch(r"3\.1\.\d+", document["openapi"])
    validate(document, cls=OpenAPIV31SpecValidator)


def test_the_validator_refuses_what_the_specification_forbids(document: dict[str, Any]) -> None:
    """The check above can fail: a duplicated operation id and a missing ``info`` are refused."""
    duplicated = copy.deepcopy(document)
    duplicated["paths"]["/healthz"]["get"]["operationId"] = "getReadiness"
    with pytest.raises(OpenAPIValidationError, match="not unique"):
        validate(duplicated, cls=OpenAPIV31SpecValidator)
    headless = copy.deepcopy(document)
    del headless["info"]
    with pytest.raises(OpenAPIValidationError, match="info"):
        validate(headless, cls=OpenAPIV31SpecValidator)


def test_every_operation_has_its_explicit_id_and_one_tag(document: dict[str, Any]) -> None:
    found = {op.get("operationId"): (where, op.get("tags")) for where, op in operations(document)}
    assert len(found) == len(operations(document)), "operation ids are not unique"
    assert found == {op_id: (where, [tag.value]) for op_id, (where, tag) in OPERATIONS.items()}


def test_no_operation_id_is_fastapi_default(document: dict[str, Any]) -> None:
    # FastAPI's generate_unique_id: name and path with "_" for every non-word character, then "_<method>".
    for where, op in operations(document):
        assert not re.search(rf"_({'|'.join(METHODS)})$", op["operationId"]), where
        assert re.fullmatch(r"[a-z][a-zA-Z0-9]*", op["operationId"]), where


def test_the_tags_are_described_and_each_is_used(document: dict[str, Any]) -> None:
    declared = {tag["name"]: tag.get("description", "") for tag in document["tags"]}
    assert set(declared) == {tag.value for tag in Tag}
    assert all(len(description) > 20 for description in declared.values()), declared
    used = {tag for _, op in operations(document) for tag in op["tags"]}
    assert used == set(declared)


def test_the_check_script_finds_nothing_wrong_and_catches_a_default_id(document: dict[str, Any]) -> None:
    """scripts/check_openapi.py (run by scripts/check) agrees with the tests above."""
    import importlib.util

    script = Path(__file__).resolve().parents[2] / "scripts" / "check_openapi.py"
    spec = importlib.util.spec_from_file_location("check_openapi", script)
    assert spec is not None and spec.loader is not None
    module = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(module)
    assert module.faults(document) == []
    broken = copy.deepcopy(document)
    broken["paths"]["/v1/predict"]["post"]["operationId"] = "predict_v1_predict_post"
    broken["paths"]["/healthz"]["get"]["tags"] = ["health", "admin"]
    assert module.faults(broken) == [
        "POST /v1/predict: operationId 'predict_v1_predict_post' is not an explicit camelCase name (operation_id=...)",
        "GET /healthz: tags ['health', 'admin'] are not exactly one of "
        "['admin', 'health', 'predictions', 'registry', 'reviews']",
    ]


def test_every_operation_with_a_body_states_the_refusals_made_before_any_route(document: dict[str, Any]) -> None:
    # BodyLimitMiddleware answers these for every route that takes a body: 413 over the size limit,
    # 415 for a compressed body (service/web/bodylimit.py).
    with_body = [op for ops in document["paths"].values() for op in ops.values() if "requestBody" in op]
    assert with_body
    for op in with_body:
        for code in ("413", "415"):
            assert "application/problem+json" in op["responses"][code]["content"], (op["operationId"], code)


def test_record_verdict_documents_the_idempotency_key_header(document: dict[str, Any]) -> None:
    """draft-ietf-httpapi-idempotency-key-header: ``Idempotency-Key`` is a request header whose value
    is an RFC 8941 String (§3.3.3: printable ASCII in double quotes, only ``"`` and ``\\`` escaped)."""
    op = document["paths"]["/v1/verdicts"]["post"]
    params = [p for p in op.get("parameters", []) if p["in"] == "header" and p["name"] == "Idempotency-Key"]
    assert len(params) == 1 and params[0]["required"] is False and params[0]["description"]
    pattern = re.compile(params[0]["schema"]["pattern"])
    draft_example = '"8e03978e-40d5-43e8-bc93-6894a57f9324"'
    for good in (draft_example, '"a\\"b"', '"a\\\\b"', '" "'):
        assert pattern.fullmatch(good), good
    for bad in ("8e03978e-40d5", '""', '"a\\nb"', '"abc', '"a"b"', '"clé"'):
        assert not pattern.fullmatch(bad), bad
    for code in ("400", "422"):
        assert "application/problem+json" in op["responses"][code]["content"], code
