"""Fixtures and helpers shared by the service tests (tests/test_service_*.py).

In-process tests drive the ASGI app through ``httpx.ASGITransport`` with the lifespan run by
hand; a few tests use a real uvicorn on a random free port of 127.0.0.1.
"""

from __future__ import annotations

import asyncio
import contextlib
import os
import socket
import threading
import time
from collections.abc import AsyncIterator, Iterator
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import httpx
import pytest

from textsieve.registry import open_registry
from textsieve.service.settings import Settings
from textsieve.service.web.app import create_app

ADMIN_TOKEN = "test-admin-token-0123456789"
MODEL = "support"


@pytest.fixture
def anyio_backend() -> str:
    return "asyncio"


@pytest.fixture(autouse=True)
def clean_env(monkeypatch: pytest.MonkeyPatch) -> None:
    """Settings read TEXTSIEVE_* variables; a developer's own must not leak into tests.

    TEXTSIEVE_TEST_* name the test services (.test-env), not settings, and are kept.
    """
    for key in list(os.environ):
        if key.startswith("TEXTSIEVE_") and not key.startswith("TEXTSIEVE_TEST_"):
            monkeypatch.delenv(key)


def make_registry(folder: Path, bundles: dict[str, Path], *, live: int | None = 1) -> Path:
    """A registry with model ``support``: v1 = bundle a, v2 = bundle b; ``live`` promoted."""
    with open_registry(folder) as reg:
        reg.publish(bundles["a"], MODEL, actor="tests")
        reg.publish(bundles["b"], MODEL, actor="tests")
        if live is not None:
            reg.promote(MODEL, live, "live", reason="tests start here", actor="tests", force=True)
    return folder


@pytest.fixture
def registry_dir(tmp_path: Path, tiny_bundles: dict[str, Path]) -> Path:
    return make_registry(tmp_path / "registry", tiny_bundles)


@pytest.fixture(scope="module")
def shared_registry(tmp_path_factory: pytest.TempPathFactory, tiny_bundles: dict[str, Path]) -> Path:
    """Read-only use only: one registry for a whole module."""
    return make_registry(tmp_path_factory.mktemp("shared-registry") / "registry", tiny_bundles)


def settings_for(registry: Path, **overrides: Any) -> Settings:
    base: dict[str, Any] = {"registry": str(registry), "workers": 2, "poll_seconds": 0.2, "access_log": False}
    base.update(overrides)
    return Settings(**base)


async def wait_ready(client: httpx.AsyncClient, timeout: float = 60.0) -> dict[str, Any]:
    deadline = time.monotonic() + timeout
    while True:
        r = await client.get("/readyz")
        if r.status_code == 200:
            body: dict[str, Any] = r.json()
            return body
        if time.monotonic() > deadline:
            raise AssertionError(f"service not ready after {timeout}s: {r.text}")
        await asyncio.sleep(0.05)


@contextlib.asynccontextmanager
async def serving(settings: Settings, *, ready: bool = True) -> AsyncIterator[tuple[Any, httpx.AsyncClient]]:
    """The app with its lifespan running, and an in-process client."""
    app = create_app(settings)
    async with app.router.lifespan_context(app):
        transport = httpx.ASGITransport(app=app)
        async with httpx.AsyncClient(transport=transport, base_url="http://service.test", timeout=60) as client:
            if ready:
                await wait_ready(client)
            yield app, client


def free_port() -> int:
    with socket.socket(socket.AF_INET, socket.SOCK_STREAM) as s:
        s.bind(("127.0.0.1", 0))
        port: int = s.getsockname()[1]
        return port


@dataclass
class LiveServer:
    url: str
    app: Any


@contextlib.contextmanager
def uvicorn_server(settings: Settings) -> Iterator[LiveServer]:
    """A real uvicorn on 127.0.0.1 in a background thread; stopped on exit."""
    import uvicorn

    app = create_app(settings)
    config = uvicorn.Config(app, host="127.0.0.1", port=settings.port, log_config=None, access_log=False, lifespan="on")
    server = uvicorn.Server(config)
    thread = threading.Thread(target=server.run, name="uvicorn-under-test", daemon=True)
    thread.start()
    url = f"http://127.0.0.1:{settings.port}"
    try:
        deadline = time.monotonic() + 60
        while True:
            try:
                if httpx.get(f"{url}/readyz", timeout=2).status_code == 200:
                    break
            except httpx.HTTPError:
                pass
            if time.monotonic() > deadline or not thread.is_alive():
                raise AssertionError("uvicorn did not become ready")
            time.sleep(0.05)
        yield LiveServer(url, app)
    finally:
        server.should_exit = True
        thread.join(timeout=20)


PROBLEM = "application/problem+json"
# RFC 9457 §3.1: the standard members; "type" is a URI reference.
MEMBERS = {"type": str, "title": str, "status": int, "detail": str, "instance": str}


def assert_problem(r: httpx.Response, status: int, slug: str) -> dict[str, Any]:
    assert r.status_code == status, r.text
    assert r.headers["content-type"] == PROBLEM
    body: dict[str, Any] = r.json()
    for name, kind in MEMBERS.items():
        assert isinstance(body[name], kind), name
    assert body["status"] == status
    assert body["type"] == f"/problems/{slug}"
    assert body["request_id"] == r.headers["x-request-id"]
    assert body["detail"].strip()
    return body
