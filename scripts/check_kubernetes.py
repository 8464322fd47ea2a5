"""Every manifest in deploy/kubernetes/ is a valid object of the Kubernetes version named below.

Run by scripts/check, offline: kubernetes-validate ships the JSON schemas generated from each
Kubernetes release's OpenAPI document, and its strict schemas also refuse fields the API does not
know (a misspelt ``readinessProbe`` would otherwise be dropped by the API server without a
word). kustomization.yaml is kustomize's own file, not an API object; its resources are among the
files checked. Exit status 0 when every document passes, 1 with one line per fault otherwise.
"""

from __future__ import annotations

import sys
from pathlib import Path
from typing import Any

import kubernetes_validate  # type: ignore[import-untyped]  # ships no type information
import yaml

# The release the manifests are written for; kubernetes-validate 1.37.0 ships its schemas.
KUBERNETES_VERSION = "1.37.0"
FOLDER = Path(__file__).resolve().parents[1] / "deploy" / "kubernetes"
NOT_API_OBJECTS = {"kustomization.yaml"}


def manifests(folder: Path = FOLDER) -> list[tuple[Path, dict[str, Any]]]:
    """(file, document) for every YAML document of every manifest in ``folder``."""
    found = []
    for path in sorted(folder.glob("*.yaml")):
        if path.name in NOT_API_OBJECTS:
            continue
        for doc in yaml.safe_load_all(path.read_text(encoding="utf-8")):
            if doc is not None:
                found.append((path, doc))
    return found


def faults(docs: list[tuple[Path, dict[str, Any]]], version: str = KUBERNETES_VERSION) -> list[str]:
    """One line per document that is not a valid object of Kubernetes ``version``."""
    out = []
    for path, doc in docs:
        meta = doc.get("metadata") or {}
        what = f"{path.name}: {doc.get('kind')} {meta.get('name') or meta.get('generateName') or '(unnamed)'}"
        try:
            kubernetes_validate.validate(doc, version, strict=True)
        except kubernetes_validate.ValidationError as exc:
            where = ".".join(str(p) for p in exc.path) or "(top)"
            out.append(f"{what}: at {where}: {exc.message}")
        except kubernetes_validate.SchemaNotFoundError:
            out.append(f"{what}: Kubernetes {version} has no kind {doc.get('kind')} in {doc.get('apiVersion')}")
    return out


def main() -> int:
    docs = manifests()
    if not docs:
        print(f"no manifests in {FOLDER}", file=sys.stderr)
        return 1
    found = faults(docs)
    for line in found:
        print(line, file=sys.stderr)
    if found:
        return 1
    print(f"{len(docs)} Kubernetes objects valid against Kubernetes {KUBERNETES_VERSION} (strict schemas)")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
