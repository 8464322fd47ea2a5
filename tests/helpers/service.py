"""Fixtures and helpers for tests that serve the app: the service and reliability tests.

In-process tests drive the ASGI app through ``httpx.ASGITransport`` with the lifespan run by
hand; a few tests use a real uvicorn on a random free port of 127.0.0.1. Loaded for the whole
suite by ``pytest_plugins`` in tests/conftest.py (``clean_env`` guards every test).
"""

from __future__ import annotations

import contextlib
import os
import threading
from collections.abc import AsyncIterator, Iterator
from dataclasses import dataclass
from pathlib import Path
from typing import Any, Literal

import httpx
import pytest

from tests.helpers.net import wait_ready, wait_ready_async
from tests.helpers.registries import RegistrySpec
from textsieve.registry import open_registry
from textsieve.service.settings import Settings
from textsieve.service.web.app import create_app

ADMIN_TOKEN = "test-admin-token-0123456789"
AUTH = {"Authorization": f"Bearer {ADMIN_TOKEN}"}
REVIEW_TOKEN = "test-review-token-9876543210"
REVIEW_AUTH = {"Authorization": f"Bearer {REVIEW_TOKEN}"}
MODEL = "support"


@pytest.fixture(scope="module")
def anyio_backend() -> str:
    """Module scope, as anyio's own default has it, so a module may share one served app."""
    return "asyncio"


@pytest.fixture(autouse=True, scope="session")
def clean_env() -> Iterator[None]:
    """Settings read TEXTSIEVE_* variables; a developer's own must not leak into tests.

    Session scope, so they are gone before any fixture builds settings, module-scoped servers included.
    TEXTSIEVE_TEST_* name the test services (.test-env), not settings, and are kept. COLUMNS goes too:
    the CLI's tables fit it (registry/tables.py), and a developer's terminal must not rewrap the
    tables tests read; the tests that fit a width set it themselves.
    """
    with pytest.MonkeyPatch.context() as mp:
        for key in list(os.environ):
            if key.startswith("TEXTSIEVE_") and not key.startswith("TEXTSIEVE_TEST_"):
                mp.delenv(key)
        mp.delenv("COLUMNS", raising=False)
        yield


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


@pytest.fixture
def live_spec(spec: RegistrySpec, tiny_bundles: dict[str, Path]) -> RegistrySpec:
    """``spec`` (a registry on SQLite, then on PostgreSQL) with MODEL v1, the tiny bundle a, live."""
    with spec.open() as reg:
        reg.publish(tiny_bundles["a"], MODEL, actor="tests")
        reg.promote(MODEL, 1, "live", reason="tests start here", actor="tests", force=True)
    return spec


def settings_for(registry: Path, **overrides: Any) -> Settings:
    base: dict[str, Any] = {"registry": str(registry), "workers": 2, "poll_seconds": 0.2, "access_log": False}
    base.update(overrides)
    return Settings(**base)


@contextlib.asynccontextmanager
async def serving(
    settings: Settings, *, ready: bool = True, fast_lane: bool = True
) -> AsyncIterator[tuple[Any, httpx.AsyncClient]]:
    """The app with its lifespan running, and an in-process client."""
    app = create_app(settings, fast_lane=fast_lane)
    async with app.router.lifespan_context(app):
        transport = httpx.ASGITransport(app=app)
        async with httpx.AsyncClient(transport=transport, base_url="http://service.test", timeout=60) as client:
            if ready:
                await wait_ready_async(client)
            yield app, client


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
        wait_ready(url, gone=lambda: None if thread.is_alive() else "uvicorn's thread ended")
        yield LiveServer(url, app)
    finally:
        server.should_exit = True
        thread.join(timeout=20)


@contextlib.contextmanager
def guarded_uvicorn(guard: Any, app: Any, *, lifespan: Literal["on", "off"] = "off") -> Iterator[tuple[str, int]]:
    """A real uvicorn on loopback with ``guard``'s protocol (``ConnectionGuard.protocol()``,
    service/web/transport.py) in front of the ASGI ``app``, on the loop ``textsieve serve`` gets
    (uvloop when installed); yields its address. ``lifespan="on"`` for a whole textsieve app
    (``create_app``, its guard ``app.state.guard``), which then loads its models (wait for /readyz)."""
    import socket
    import time

    import uvicorn

    sock = socket.socket()
    sock.bind(("127.0.0.1", 0))
    config = uvicorn.Config(app, http=guard.protocol(), ws="none", lifespan=lifespan, log_level="critical")
    server = uvicorn.Server(config)
    thread = threading.Thread(target=server.run, kwargs={"sockets": [sock]}, daemon=True)
    thread.start()
    try:
        deadline = time.monotonic() + 10
        while not server.started and time.monotonic() < deadline:
            time.sleep(0.01)
        yield sock.getsockname()
    finally:
        server.should_exit = True
        thread.join(10)
        sock.close()


def log_text(caplog: pytest.LogCaptureFixture) -> str:
    """Every captured log record as one line: message, structured fields and traceback, for
    checks that a secret appears nowhere in them."""
    return "\n".join(f"{r.getMessage()} {r.__dict__.get('fields', '')} {r.exc_text or ''}" for r in caplog.records)


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
