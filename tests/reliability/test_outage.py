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
import threading
import time
from pathlib import Path
from typing import Any

import httpx
import pytest

from tests.helpers.net import poll_readyz, readyz_until
from tests.helpers.servers import ServerProcess, own_cluster, running_server
from tests.helpers.service import ADMIN_TOKEN, AUTH, MODEL, log_text, serving, settings_for
from textsieve.registry import open_registry


@pytest.mark.anyio
async def test_predictions_continue_through_a_registry_outage_and_polling_resumes(
    tmp_path: Path, tiny_bundles: dict[str, Path], caplog: pytest.LogCaptureFixture
) -> None:
    password = f"pw-{secrets.token_hex(12)}"
    caplog.set_level(logging.DEBUG)
    seen: list[str] = []  # every response body and header, for the secret check
    with own_cluster(password) as cluster:
        blobs = _two_versions_first_live(cluster.url, tmp_path / "blobs", tiny_bundles)
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
                detail = r.json()["detail"]
                assert "registry's database cannot be reached" in detail and "log says why" in detail, detail
                # Views need no token: the reply names no database, user, host or port (DEVELOPERS.md).
                for private in (str(cluster.port), "127.0.0.1", "postgres", "PostgreSQL unavailable"):
                    assert private not in detail, (private, detail)

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


def _predict_forever(url: str, stop: threading.Event, replies: list[tuple[int, int | None]]) -> None:
    with httpx.Client(base_url=url, timeout=30) as client:
        while not stop.is_set():
            try:
                r = client.post("/v1/predict", json={"texts": ["login fails", "charged twice"]})
                replies.append((r.status_code, r.json().get("version") if r.status_code == 200 else None))
            except httpx.HTTPError as exc:
                replies.append((0, None))
                stop.set()
                raise AssertionError(f"a prediction failed at the transport: {exc!r}") from exc


def _two_versions_first_live(url: str, blobs: Path, bundles: dict[str, Path]) -> Path:
    """Versions 1 and 2 of MODEL published to the registry at ``url``, 1 live; the blob folder."""
    with open_registry(url, blobs=blobs) as reg:
        reg.publish(bundles["a"], MODEL, actor="tests")
        reg.publish(bundles["b"], MODEL, actor="tests")
        reg.promote(MODEL, 1, "live", reason="start", actor="tests", force=True)
    return blobs


def test_a_real_server_with_worker_processes_rides_out_an_outage_under_load_and_names_no_database(
    tmp_path: Path, tiny_bundles: dict[str, Path]
) -> None:
    """textsieve serve (uvicorn, worker processes) while its PostgreSQL is stopped and started under a
    steady stream of predictions. Before, every reply that met the outage (a view, an admin call, a
    prediction pinned to a version not in memory) carried the registry's words to any caller:
    'postgresql://postgres@127.0.0.1:PORT/postgres: PostgreSQL unavailable: connection to server at
    "127.0.0.1", port PORT failed', the database's user, host, port and name."""
    password = f"pw-{secrets.token_hex(12)}"
    with own_cluster(password) as cluster:
        blobs = tmp_path / "blobs"
        with open_registry(cluster.url, blobs=blobs) as reg:
            for key in ("a", "b", "relabelled"):
                reg.publish(tiny_bundles[key], MODEL, actor="tests")
            reg.promote(MODEL, 1, "live", reason="start", actor="tests", force=True)
        with running_server(
            cluster.url, tmp_path / "serve.log", blobs=str(blobs), admin_token=ADMIN_TOKEN, poll_seconds=0.2
        ) as server:
            stop, replies = threading.Event(), []
            load = [threading.Thread(target=_predict_forever, args=(server.url, stop, replies)) for _ in range(2)]
            for t in load:
                t.start()
            try:
                cluster.stop("immediate")
                down = poll_readyz(
                    server.url, lambda r: bool(r.json()["degraded"]), timeout=30, awaiting="the outage note"
                ).json()
                assert down["ready"] is True
                assert httpx.get(f"{server.url}/healthz", timeout=10).status_code == 200
                answers = [
                    httpx.post(f"{server.url}/v1/predict", json={"texts": ["a"], "version": 3}, timeout=30),
                    httpx.get(f"{server.url}/v1/models", timeout=30),
                    httpx.get(f"{server.url}/v1/models/{MODEL}/versions/2", timeout=30),
                    httpx.post(
                        f"{server.url}/v1/models/{MODEL}/rollback", headers=AUTH, json={"reason": "x"}, timeout=30
                    ),
                ]
                for r in answers:
                    assert r.status_code == 503 and int(r.headers["retry-after"]) > 0, r.text
                    assert r.headers["content-type"] == "application/problem+json"
                    detail = r.json()["detail"]
                    for private in (str(cluster.port), "127.0.0.1", "postgres"):
                        assert private not in detail, (r.request.url, private, detail)
                during = len(replies)
                cluster.start()
                poll_readyz(server.url, lambda r: not r.json()["degraded"], timeout=30, awaiting="the note to clear")
                with open_registry(cluster.url, blobs=blobs) as reg:
                    reg.promote(MODEL, 2, "live", reason="after the outage", actor="tests", force=True)
                poll_readyz(
                    server.url, lambda r: r.json()["models"][MODEL].get("version") == 2, timeout=30, awaiting="v2"
                )
                pinned = httpx.post(f"{server.url}/v1/predict", json={"texts": ["a"], "version": 3}, timeout=30)
                assert pinned.status_code == 200 and pinned.json()["version"] == 3, pinned.text
                time.sleep(0.5)
            finally:
                stop.set()
                for t in load:
                    t.join()
            log = server.output()
    assert during > 0 and {status for status, _ in replies} == {200}, sorted(set(replies))
    assert {version for _, version in replies} == {1, 2}
    # The operator's log keeps the registry's own words, without the password.
    assert "PostgreSQL unavailable" in log and str(cluster.port) in log
    assert password not in log


def test_a_server_started_while_its_database_is_down_says_so_and_serves_once_it_is_up(
    tmp_path: Path, tiny_bundles: dict[str, Path]
) -> None:
    """textsieve serve (uvicorn, worker processes) started while its PostgreSQL is stopped. Before,
    a prediction naming no model told the caller 'no model is served yet: publish and promote one'
    (nothing was wrong with the registry's contents), and one naming its model or pinning a version,
    and the views, answered 'the registry at postgresql://postgres@127.0.0.1:PORT/postgres is not open
    yet' to callers who hold no token."""
    password = f"pw-{secrets.token_hex(12)}"
    with own_cluster(password) as cluster:
        blobs = _two_versions_first_live(cluster.url, tmp_path / "blobs", tiny_bundles)
        cluster.stop("immediate")
        server = ServerProcess.start(cluster.url, tmp_path / "serve.log", blobs=str(blobs), poll_seconds=0.2)
        try:
            poll_readyz(
                server.url,
                lambda r: r.status_code == 503 and "startup failed" in r.json()["reason"],
                timeout=60,
                awaiting="the startup failure",
                gone=server.gone,
            )
            assert httpx.get(f"{server.url}/healthz", timeout=10).status_code == 200  # alive, not ready
            answers = [
                httpx.post(f"{server.url}/v1/predict", json=body, timeout=30)
                for body in ({"texts": ["a"]}, {"texts": ["a"], "model": MODEL}, {"texts": ["a"], "version": 2})
            ]
            answers.append(httpx.get(f"{server.url}/v1/models", timeout=30))
            for r in answers:
                assert r.status_code == 503 and int(r.headers["retry-after"]) > 0, r.text
                detail = r.json()["detail"]
                assert "publish" not in detail and "registry" in detail and "log" in detail, detail
                for private in (str(cluster.port), "127.0.0.1", "postgres"):
                    assert private not in detail, (r.request.url, private, detail)
            cluster.start()
            poll_readyz(server.url, timeout=60, awaiting="ready once the database is up", gone=server.gone)
            for body in ({"texts": ["a"]}, {"texts": ["a"], "version": 2}):
                r = httpx.post(f"{server.url}/v1/predict", json=body, timeout=30)
                assert r.status_code == 200, r.text
        finally:
            server.stop()


@pytest.mark.parametrize("mode", ["fast", "immediate"])
def test_the_first_registry_calls_after_the_database_restarted_succeed(
    tmp_path: Path, tiny_bundles: dict[str, Path], mode: str
) -> None:
    """The registry keeps one connection; a restarted PostgreSQL closes it, which shows only when it is
    next used. Before, that first use failed: with the database up again, a view and an admin call on a
    real textsieve serve were each answered 503 'unavailable' once (its poller, here slower than the
    calls, had not yet hit the dead connection). Now a transaction that fails at its BEGIN on a kept
    connection is begun once more on a fresh one (nothing had run in it)."""
    password = f"pw-{secrets.token_hex(12)}"
    with own_cluster(password) as cluster:
        blobs = _two_versions_first_live(cluster.url, tmp_path / "blobs", tiny_bundles)
        with running_server(
            cluster.url, tmp_path / "serve.log", blobs=str(blobs), admin_token=ADMIN_TOKEN, poll_seconds=60
        ) as server:
            assert httpx.get(f"{server.url}/v1/models", timeout=10).status_code == 200
            cluster.stop(mode)
            cluster.start()
            view = httpx.get(f"{server.url}/v1/models/{MODEL}/versions", timeout=30)
            assert view.status_code == 200, view.text
            cluster.stop(mode)
            cluster.start()
            promote = httpx.post(
                f"{server.url}/v1/models/{MODEL}/versions/2/promote",
                headers=AUTH,
                json={"to": "live", "reason": "after a restart", "force": True},
                timeout=30,
            )
            assert promote.status_code == 200 and promote.json()["serving"]["version"] == 2, promote.text
        # The CLI's handle is the same backend: a registry opened before the restart reads after it.
        with open_registry(cluster.url, blobs=blobs) as reg:
            assert reg.live(MODEL) is not None
            cluster.stop(mode)
            cluster.start()
            live = reg.live(MODEL)
            assert live is not None and live.version == 2


def test_a_table_lock_held_elsewhere_is_a_prompt_503_and_a_degraded_note_not_a_hang(
    tmp_path: Path, tiny_bundles: dict[str, Path]
) -> None:
    """Another session holds an ACCESS EXCLUSIVE lock on the registry's tables (LOCK TABLE here; a
    schema change, VACUUM FULL or a session left open do the same). Before, every read waited for it
    without limit on a real textsieve serve: a view and a pinned prediction were still unanswered
    after 15 s, the poller hung and /readyz reported nothing degraded. Now reads give up after the
    registry's read lock timeout (5 s): a 503 with Retry-After, the degraded note, predictions from
    loaded versions throughout, and everything back once the lock is released."""
    import psycopg

    password = f"pw-{secrets.token_hex(12)}"
    with own_cluster(password) as cluster:
        blobs = _two_versions_first_live(cluster.url, tmp_path / "blobs", tiny_bundles)
        with running_server(cluster.url, tmp_path / "serve.log", blobs=str(blobs), poll_seconds=0.2) as server:
            with psycopg.connect(cluster.url, autocommit=False) as locker:
                locker.execute("LOCK TABLE events, versions IN ACCESS EXCLUSIVE MODE")
                began = time.monotonic()
                view = httpx.get(f"{server.url}/v1/models", timeout=30)
                pinned = httpx.post(f"{server.url}/v1/predict", json={"texts": ["a"], "version": 2}, timeout=30)
                for r in (view, pinned):
                    assert r.status_code == 503 and int(r.headers["retry-after"]) > 0, r.text
                    assert "postgres" not in r.json()["detail"] and str(cluster.port) not in r.json()["detail"]
                assert time.monotonic() - began < 20  # two bounded waits, not a hang
                down = poll_readyz(server.url, lambda r: bool(r.json()["degraded"]), timeout=20, awaiting="the note")
                assert down.status_code == 200
                live = httpx.post(f"{server.url}/v1/predict", json={"texts": ["a"]}, timeout=30)
                assert live.status_code == 200 and live.json()["version"] == 1
                locker.rollback()
            poll_readyz(server.url, lambda r: not r.json()["degraded"], timeout=30, awaiting="the note to clear")
            assert httpx.get(f"{server.url}/v1/models", timeout=30).status_code == 200
            r = httpx.post(f"{server.url}/v1/predict", json={"texts": ["a"], "version": 2}, timeout=30)
            assert r.status_code == 200 and r.json()["version"] == 2
        log = server.output()
    assert "stayed locked by another session" in log
