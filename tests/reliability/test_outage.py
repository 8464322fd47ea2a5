"""Registry outage: the PostgreSQL behind the registry stops (``pg_ctl stop -m immediate``, as a
crash or a network cut would look) and comes back.

Promised while it is down: predictions keep coming from the versions already loaded; /readyz
stays 200 (the service can answer) and names the registry as degraded; registry views and
admin calls fail fast with 503, a problem+json body and a Retry-After header. When it returns:
the degraded note clears, polling resumes (a promotion made elsewhere is picked up) and admin
calls work again. The database password appears in no log line and no response.

The test runs its own throwaway cluster (the shared one on port 5432 serves other tests).
"""

from __future__ import annotations

import asyncio
import logging
import secrets
import time
from pathlib import Path
from typing import Any

import httpx
import pytest

from tests.helpers.net import readyz_until
from tests.helpers.servers import own_cluster
from tests.helpers.service import ADMIN_TOKEN, AUTH, MODEL, log_text, serving, settings_for
from textsieve.registry import open_registry

pytestmark = pytest.mark.anyio


async def test_predictions_continue_through_a_registry_outage_and_polling_resumes(
    tmp_path: Path, tiny_bundles: dict[str, Path], caplog: pytest.LogCaptureFixture
) -> None:
    password = f"pw-{secrets.token_hex(12)}"
    caplog.set_level(logging.DEBUG)
    seen: list[str] = []  # every response body and header, for the secret check
    with own_cluster(password) as cluster:
        blobs = tmp_path / "blobs"
        with open_registry(cluster.url, blobs=blobs) as reg:
            reg.publish(tiny_bundles["a"], MODEL, actor="tests")
            reg.publish(tiny_bundles["b"], MODEL, actor="tests")
            reg.promote(MODEL, 1, "live", reason="start", actor="tests", force=True)
        settings = settings_for(tmp_path / "unused", poll_seconds=0.2, admin_token=ADMIN_TOKEN, access_log=True)
        settings = settings.model_copy(update={"registry": cluster.url, "blobs": str(blobs)})

        async with serving(settings) as (_, client):

            async def call(method: str, path: str, **kw: Any) -> httpx.Response:
                r = await client.request(method, path, **kw)
                seen.append(r.text + repr(dict(r.headers)))
                return r

            assert (await call("POST", "/v1/predict", json={"texts": ["charged twice"]})).json()["version"] == 1
            assert not (await client.get("/readyz")).json()["degraded"]

            await asyncio.to_thread(cluster.stop, "immediate")
            down = await readyz_until(client, lambda b: b["degraded"], timeout=30, awaiting="the outage note")
            seen.append(repr(down))
            assert down["ready"] is True
            note = " ".join(down["degraded"])
            assert "registry" in note and "unavailable" in note.lower()
            assert f":{cluster.port}" not in note and "127.0.0.1" not in note  # anyone may read /readyz
            assert any(
                "registry poll failed" in r.getMessage() and str(cluster.port) in r.getMessage() for r in caplog.records
            )

            replies = [
                await call("POST", "/v1/predict", json={"texts": ["login fails", "great work"]}) for _ in range(20)
            ]
            assert {r.status_code for r in replies} == {200}
            assert {r.json()["version"] for r in replies} == {1}

            began = time.monotonic()
            admin = await call(
                "POST",
                f"/v1/models/{MODEL}/versions/2/promote",
                headers=AUTH,
                json={"to": "live", "reason": "during the outage", "force": True},
            )
            view = await call("GET", "/v1/models")
            assert time.monotonic() - began < 15, "refusals come fast, not after long timeouts"
            for r in (admin, view):
                assert r.status_code == 503, r.text
                assert r.headers["content-type"] == "application/problem+json"
                assert r.json()["type"] == "/problems/unavailable"
                assert int(r.headers["retry-after"]) > 0
                assert "PostgreSQL unavailable" in r.json()["detail"]

            await asyncio.to_thread(cluster.start)
            await readyz_until(client, lambda b: not b["degraded"], timeout=30, awaiting="the note to clear")
            # Polling resumed: a promotion made by another process is picked up.
            with open_registry(cluster.url, blobs=blobs) as reg:
                reg.promote(MODEL, 2, "live", reason="after the outage", actor="tests", force=True)
            await readyz_until(
                client, lambda b: b["models"][MODEL].get("version") == 2, timeout=30, awaiting="version 2"
            )
            assert (await call("POST", "/v1/predict", json={"texts": ["a"]})).json()["version"] == 2
            back = await call("POST", f"/v1/models/{MODEL}/rollback", headers=AUTH, json={"reason": "works again"})
            assert back.status_code == 200 and back.json()["serving"]["version"] == 1
            seen.append((await client.get("/metrics")).text)

    logged = log_text(caplog)
    assert "PostgreSQL unavailable" in logged, "the outage is logged"
    assert password not in logged, "the database password leaked into the log"
    assert not [s for s in seen if password in s], "the database password leaked into a response"
