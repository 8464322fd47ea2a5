"""Fixtures only the reliability tests use. Shared ones (``registry_dir``, ``spec``, the tiny
bundles) come from tests/helpers/ and tests/conftest.py; the servers these tests start are in
tests/helpers/servers.py."""

from __future__ import annotations

from collections.abc import AsyncIterator
from pathlib import Path

import httpx
import pytest

from tests.helpers.service import ADMIN_TOKEN, MODEL, REVIEW_TOKEN, serving, settings_for
from textsieve.registry import open_registry


@pytest.fixture(scope="module")
def retired_registry(tmp_path_factory: pytest.TempPathFactory, tiny_bundles: dict[str, Path]) -> Path:
    """Model ``support``: version 1 retired, version 2 live (read-only use)."""
    folder = tmp_path_factory.mktemp("catalogue") / "registry"
    with open_registry(folder) as reg:
        reg.publish(tiny_bundles["a"], MODEL, actor="tests")
        reg.publish(tiny_bundles["b"], MODEL, actor="tests")
        reg.promote(MODEL, 1, "live", reason="first", actor="tests", force=True)
        reg.promote(MODEL, 2, "live", reason="second", actor="tests", force=True)
    return folder


@pytest.fixture(scope="module")
async def retired_client(retired_registry: Path) -> AsyncIterator[httpx.AsyncClient]:
    """The app at default limits on ``retired_registry``, admin calls allowed with ``AUTH`` and
    verdicts with ``REVIEW_AUTH``,
    served once per module: the bad-input tables send it requests it refuses, which change
    nothing, so one app answers every row."""
    settings = settings_for(retired_registry, admin_token=ADMIN_TOKEN, review_token=REVIEW_TOKEN)
    async with serving(settings) as (_, client):
        yield client
