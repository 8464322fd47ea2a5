"""Fixtures only the service tests use. Shared ones (``registry_dir``, ``clean_env``, the tiny
bundles) come from tests/helpers/service.py and tests/conftest.py."""

from __future__ import annotations

import os
import shutil
from collections.abc import AsyncIterator, Iterator
from pathlib import Path
from typing import Any

import httpx
import pytest

from tests.helpers.environment import skip_or_fail
from tests.helpers.net import free_port
from tests.helpers.service import make_registry, serving, settings_for, uvicorn_server

CHROMIUM = "/usr/bin/chromium"
CHROMEDRIVER = "/usr/bin/chromedriver"


@pytest.fixture(scope="module")
def shared_registry(tmp_path_factory: pytest.TempPathFactory, tiny_bundles: dict[str, Path]) -> Path:
    """Read-only use only: one registry for a whole module."""
    return make_registry(tmp_path_factory.mktemp("shared-registry") / "registry", tiny_bundles)


@pytest.fixture(scope="module")
async def shared_client(shared_registry: Path) -> AsyncIterator[httpx.AsyncClient]:
    """The app on ``shared_registry`` with default settings, served once per module: for
    requests that change nothing (refusals, reads), so a table of cases need not start an app
    per row."""
    async with serving(settings_for(shared_registry)) as (_, client):
        yield client


@pytest.fixture(scope="module")
async def small_limits_client(shared_registry: Path) -> AsyncIterator[httpx.AsyncClient]:
    """Like ``shared_client`` with small limits: 4 texts of 50 characters, 2 KiB bodies, 5 spans."""
    settings = settings_for(shared_registry, max_texts=4, max_chars=50, max_body_bytes=2048, max_spans=5)
    async with serving(settings) as (_, client):
        yield client


@pytest.fixture(scope="module")
def live_url(shared_registry: Path) -> Iterator[str]:
    """A real uvicorn on a free port of 127.0.0.1 serving ``shared_registry`` (read-only use)."""
    with uvicorn_server(settings_for(shared_registry, port=free_port())) as server:
        yield server.url


@pytest.fixture
def browser(tmp_path: Path) -> Iterator[Any]:
    """Headless Chromium driven by ChromeDriver (selenium), with a throwaway profile."""
    if not (os.access(CHROMIUM, os.X_OK) and os.access(CHROMEDRIVER, os.X_OK)):
        skip_or_fail("Chromium/ChromeDriver not installed (scripts/test-services.sh installs them)")
    from selenium import webdriver
    from selenium.webdriver.chrome.service import Service

    opts = webdriver.ChromeOptions()
    opts.binary_location = CHROMIUM
    # Flags from this machine's notes: no sandbox as root, and no background traffic to the
    # closed network.
    for flag in (
        "--headless=new",
        "--no-sandbox",
        "--disable-gpu",
        "--disable-quic",
        "--no-first-run",
        "--disable-background-networking",
        "--disable-component-update",
        "--disable-sync",
        "--window-size=1200,1400",
        f"--user-data-dir={tmp_path / 'profile'}",
    ):
        opts.add_argument(flag)
    opts.set_capability("goog:loggingPrefs", {"browser": "ALL"})
    driver = webdriver.Chrome(service=Service(CHROMEDRIVER), options=opts)
    try:
        yield driver
    finally:
        driver.quit()
        shutil.rmtree(tmp_path / "profile", ignore_errors=True)
