"""The service's OpenAPI document is valid OpenAPI 3.1 and reads well to client generators.

Run by scripts/check (no server: the app is built with test settings and asked for its document,
as /openapi.json serves it). Validity is judged by openapi-spec-validator against the OpenAPI 3.1
specification's schema; the rest are this project's rules (service/web/openapi.py): every
operation has a unique, explicit operation id (not FastAPI's default ``<name>_<path>_<method>``,
which renames a generated client's method whenever a path changes) and exactly one known tag.
Exit status 0 when all hold, 1 with one line per fault otherwise.
"""

from __future__ import annotations

import re
import sys
import tempfile
from collections import Counter
from typing import Any

from openapi_spec_validator import OpenAPIV31SpecValidator, validate
from openapi_spec_validator.validation.exceptions import OpenAPIValidationError
from referencing.exceptions import Unresolvable

from textsieve.service.settings import Settings
from textsieve.service.web.app import create_app

METHODS = ("get", "put", "post", "delete", "patch", "head", "options", "trace")
# FastAPI's generate_unique_id: the route's name and path with every non-word character as "_",
# then "_" and the method; an explicit id in this project is a camelCase verb phrase instead.
DEFAULT_ID = re.compile(rf"_({'|'.join(METHODS)})$")
EXPLICIT_ID = re.compile(r"[a-z][a-zA-Z0-9]*")


def document() -> dict[str, Any]:
    """The document the service serves, from an app built with throwaway settings."""
    with tempfile.TemporaryDirectory() as folder:
        app = create_app(Settings(registry=folder, workers=1, inference="threads", access_log=False))
        return app.openapi()


def operations(doc: dict[str, Any]) -> list[tuple[str, dict[str, Any]]]:
    """("METHOD /path", operation) for every operation of the document."""
    return [
        (f"{method.upper()} {path}", op)
        for path, item in doc.get("paths", {}).items()
        for method, op in item.items()
        if method in METHODS
    ]


def faults(doc: dict[str, Any]) -> list[str]:
    """What is wrong with ``doc``, one line each; empty when nothing is."""
    found: list[str] = []
    if not str(doc.get("openapi", "")).startswith("3.1."):
        found.append(f"openapi is {doc.get('openapi')!r}, not 3.1.x")
    try:
        validate(doc, cls=OpenAPIV31SpecValidator)
    except OpenAPIValidationError as exc:
        found.append(f"not valid OpenAPI 3.1: {exc.message.splitlines()[0]} (at {list(exc.absolute_path)})")
    except Unresolvable as exc:  # a $ref to nothing: the validator stops at it rather than reporting it
        found.append(f"not valid OpenAPI 3.1: unresolvable reference {exc.ref!r}")
    known = {tag["name"] for tag in doc.get("tags", [])}
    for tag in doc.get("tags", []):
        if not tag.get("description"):
            found.append(f"tag {tag['name']!r} has no description")
    ops = operations(doc)
    if not ops:
        found.append("the document has no operations")
    ids = Counter(op.get("operationId") for _, op in ops)
    for where, op in ops:
        op_id = op.get("operationId")
        if not op_id:
            found.append(f"{where}: no operationId")
        elif DEFAULT_ID.search(op_id) or not EXPLICIT_ID.fullmatch(op_id):
            found.append(f"{where}: operationId {op_id!r} is not an explicit camelCase name (operation_id=...)")
        elif ids[op_id] > 1:
            found.append(f"{where}: operationId {op_id!r} is used {ids[op_id]} times")
        tags = op.get("tags", [])
        if len(tags) != 1 or tags[0] not in known:
            found.append(f"{where}: tags {tags} are not exactly one of {sorted(known)}")
    return found


def main() -> int:
    doc = document()
    found = faults(doc)
    for fault in found:
        print(f"openapi: {fault}", file=sys.stderr)
    if not found:
        print(f"openapi: {len(operations(doc))} operations, valid OpenAPI {doc['openapi']}, ids and tags in order")
    return 1 if found else 0


if __name__ == "__main__":
    sys.exit(main())
