"""Ports and readiness for tests that serve over HTTP: one way to pick a port, one way to wait.

Every server under test (in-process app, uvicorn in a thread, ``textsieve serve`` in a
subprocess) says when it can take requests on ``GET /readyz`` (200 when ready, 503 with a
reason otherwise). Tests wait on that, never on a fixed sleep; a test that gives up says what
it waited for and shows the last reply, so a slow start and a broken one read differently.
"""

from __future__ import annotations

import asyncio
import socket
import subprocess
import time
from collections.abc import Callable
from pathlib import Path
from typing import Any

import httpx

READY_TIMEOUT_S = 60.0
INTERVAL_S = 0.05

Check = Callable[[httpx.Response], bool]
Gone = Callable[[], str | None]


def free_port() -> int:
    """A TCP port of 127.0.0.1 that nothing listened on a moment ago (the kernel's choice for port 0)."""
    with socket.socket(socket.AF_INET, socket.SOCK_STREAM) as s:
        s.bind(("127.0.0.1", 0))
        port: int = s.getsockname()[1]
        return port


def is_ready(reply: httpx.Response) -> bool:
    return reply.status_code == 200


def exited(proc: subprocess.Popen[Any], log: Path | None = None) -> Gone:
    """For ``gone=``: says so once ``proc`` has exited, with the end of its ``log`` when there is one."""

    def gone() -> str | None:
        if proc.poll() is None:
            return None
        tail = log.read_text(encoding="utf-8", errors="replace")[-3000:] if log is not None else ""
        return f"the server exited with status {proc.returncode}" + (f":\n{tail}" if tail else "")

    return gone


def _describe(reply: httpx.Response) -> str:
    return f"HTTP {reply.status_code} {reply.text[:2000]}"


def _give_up(awaiting: str, timeout: float, last: str) -> AssertionError:
    return AssertionError(f"gave up after {timeout:g} s waiting for {awaiting}; last /readyz reply: {last}")


def poll_readyz(
    url: str,
    until: Check = is_ready,
    *,
    timeout: float = READY_TIMEOUT_S,
    awaiting: str = "the service to be ready",
    gone: Gone | None = None,
) -> httpx.Response:
    """``GET {url}/readyz`` until ``until(reply)`` holds, and return that reply.

    AssertionError after ``timeout`` seconds, or at once when ``gone()`` returns a reason (a
    server process that exited will never answer).
    """
    deadline = time.monotonic() + timeout
    last = "none yet"
    while True:
        if gone is not None and (reason := gone()) is not None:
            raise AssertionError(f"{reason}\n(while waiting for {awaiting}; last /readyz reply: {last})")
        try:
            reply = httpx.get(f"{url}/readyz", timeout=2)
        except httpx.HTTPError as exc:
            last = repr(exc)
        else:
            if until(reply):
                return reply
            last = _describe(reply)
        if time.monotonic() > deadline:
            raise _give_up(awaiting, timeout, last)
        time.sleep(INTERVAL_S)


async def poll_readyz_async(
    client: httpx.AsyncClient,
    until: Check = is_ready,
    *,
    timeout: float = READY_TIMEOUT_S,
    awaiting: str = "the service to be ready",
) -> httpx.Response:
    """:func:`poll_readyz` through an async client (base URL set), e.g. on ``httpx.ASGITransport``."""
    deadline = time.monotonic() + timeout
    while True:
        reply = await client.get("/readyz")
        if until(reply):
            return reply
        if time.monotonic() > deadline:
            raise _give_up(awaiting, timeout, _describe(reply))
        await asyncio.sleep(INTERVAL_S)


async def readyz_until(
    client: httpx.AsyncClient,
    check: Callable[[dict[str, Any]], bool],
    *,
    timeout: float = READY_TIMEOUT_S,
    awaiting: str = "the readiness report to change",
) -> dict[str, Any]:
    """The /readyz body (200 or 503 alike) once ``check(body)`` holds."""
    reply = await poll_readyz_async(client, lambda r: check(r.json()), timeout=timeout, awaiting=awaiting)
    body: dict[str, Any] = reply.json()
    return body


def wait_ready(url: str, *, timeout: float = READY_TIMEOUT_S, gone: Gone | None = None) -> dict[str, Any]:
    """The /readyz body once the service at ``url`` answers 200."""
    body: dict[str, Any] = poll_readyz(url, timeout=timeout, gone=gone).json()
    return body


async def wait_ready_async(client: httpx.AsyncClient, *, timeout: float = READY_TIMEOUT_S) -> dict[str, Any]:
    """The /readyz body once the service behind ``client`` answers 200."""
    body: dict[str, Any] = (await poll_readyz_async(client, timeout=timeout)).json()
    return body


__all__ = [
    "exited",
    "free_port",
    "is_ready",
    "poll_readyz",
    "poll_readyz_async",
    "readyz_until",
    "wait_ready",
    "wait_ready_async",
]
