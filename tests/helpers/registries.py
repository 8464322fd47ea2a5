"""Helpers for the registry tests (the fixtures live in registry_fixtures.py; other tests may use
postgres_url for the same skip-or-fail rule)."""

from __future__ import annotations

import hashlib
import json
import os
import shutil
from dataclasses import dataclass
from pathlib import Path

from tests.helpers.environment import skip_or_fail
from textsieve.registry import Registry, open_registry


@dataclass(frozen=True)
class RegistrySpec:
    """Where a test registry lives: enough to open it again, in this process or another."""

    kind: str
    location: str
    blobs: str | None

    def open(self, **kwargs: object) -> Registry:
        return open_registry(self.location, blobs=self.blobs, **kwargs)  # type: ignore[arg-type]

    def cli_args(self) -> list[str]:
        return ["--registry", self.location] + (["--blobs", self.blobs] if self.blobs else [])

    @property
    def blob_dir(self) -> Path:
        return Path(self.blobs) if self.blobs else Path(self.location) / "blobs"


def postgres_url() -> str:
    """TEXTSIEVE_TEST_PG, or a skip (a failure in CI, where the server must be there)."""
    url = os.environ.get("TEXTSIEVE_TEST_PG")
    if not url:
        skip_or_fail(
            "TEXTSIEVE_TEST_PG is not set: run 'bash scripts/test-services.sh' and source .test-env "
            "(make test does both)"
        )
    return url


def edit_manifest(bundle: Path, change: dict[str, object], *, rehash: bool = True) -> None:
    """Change manifest fields (dotted keys), optionally recording the files' current sha256."""
    path = bundle / "manifest.json"
    data = json.loads(path.read_text())
    for key, value in change.items():
        node = data
        *parents, last = key.split(".")
        for p in parents:
            node = node[p]
        node[last] = value
    if rehash:
        data["files"] = {name: hashlib.sha256((bundle / name).read_bytes()).hexdigest() for name in data["files"]}
    path.write_text(json.dumps(data, indent=2))


def publish_unchecked_card(reg: Registry, bundle: Path, model: str, card: str) -> int:
    """Publish ``bundle`` with ``card`` as its card.md the way releases before the cautions check
    (registry/cautions.py) did: the card stored whatever it says. Returns the version."""
    from unittest import mock

    from textsieve.registry import api

    (bundle / "card.md").write_text(card, encoding="utf-8")
    edit_manifest(bundle, {})
    with mock.patch.object(api, "check_card", lambda bundle: None):
        return reg.publish(bundle, model, actor="tests").version


def publish_unchecked_labels(reg: Registry, bundle: Path, model: str) -> int:
    """Publish ``bundle`` as releases before the label rule on format and separator characters did:
    its labels held only to what a manifest read back obeys (no control characters). Returns the version."""
    from unittest import mock

    from textsieve.registry import api

    with mock.patch.object(api, "check_labels", lambda bundle, labels: None):
        return reg.publish(bundle, model, actor="tests").version


def store_evalset_unchecked(reg: Registry, model: str, rows: list[dict[str, str]], source: str) -> str:
    """Store ``rows`` as the model's evaluation set the way releases before the text rules
    (commit 58cc344) did: the JSONL blob and the ``evalsets`` row, no text checked. Written with
    ASCII escapes, as a hand-made blob may be, so a lone surrogate survives. Returns the sha256."""
    from collections import Counter

    from textsieve.registry.api import utc_now
    from textsieve.registry.queries import Queries

    data = "".join(json.dumps({"label": r["label"], "text": r["text"]}, sort_keys=True) + "\n" for r in rows)
    digest = reg.blobs.put_bytes(data.encode("ascii"))
    labels = dict(sorted(Counter(r["label"] for r in rows).items()))
    with reg.backend.write() as tx:
        Queries(tx).add_evalset(
            model=model, sha256=digest, texts=len(rows), labels=labels, source=source, at=utc_now(), by="older release"
        )
    return digest


def recard(bundle: Path, note: str) -> None:
    """Another bundle with the same weights: the card (its cautions kept, as publish requires) gains
    a line, and the manifest records its new sha256."""
    card = bundle / "card.md"
    card.write_text(card.read_text(encoding="utf-8") + f"\n{note}\n", encoding="utf-8")
    edit_manifest(bundle, {})


def card_variants(base: Path, root: Path, n: int) -> list[Path]:
    """``n`` distinct bundles from one real bundle: same weights, each with its own model card."""
    out = []
    for i in range(n):
        dst = root / f"variant-{i}"
        shutil.copytree(base, dst)
        recard(dst, f"Variant {i}: same weights, another card.")
        out.append(dst)
    return out


__all__ = [
    "RegistrySpec",
    "card_variants",
    "edit_manifest",
    "postgres_url",
    "publish_unchecked_card",
    "publish_unchecked_labels",
    "recard",
    "store_evalset_unchecked",
]
