"""Inference in worker processes (the default): same answers as threads, and a worker that dies
is replaced without losing the request it was running."""

from __future__ import annotations

import asyncio
import contextlib
import os
import signal
import subprocess
import sys
import time
from collections.abc import AsyncIterator
from concurrent.futures import Future
from pathlib import Path
from typing import Any

import numpy as np
import orjson
import pytest

from tests.helpers.service import serving, settings_for
from textsieve.errors import UnavailableError
from textsieve.registry.runtime import Predictor
from textsieve.service.inference.workers import Message, Outcome, Run

pytestmark = pytest.mark.anyio
TEXTS = [
    "my card was charged twice",
    "the brake repair was quick and great",
    "cannot log in since Monday",
    "Crème brûlée — 12 € at Hauptstraße",
    "谢谢, the jigsaw was fine",
    "x " * 400,
]


async def _predict(settings: object) -> dict:  # type: ignore[type-arg]
    async with serving(settings) as (_, client):  # type: ignore[arg-type]
        r = await client.post("/v1/predict", json={"texts": TEXTS, "spans": 3})
        assert r.status_code == 200, r.text
        return dict(r.json())


async def test_processes_and_threads_answer_the_same(registry_dir: Path, tiny_bundles: dict[str, Path]) -> None:
    procs = await _predict(settings_for(registry_dir, inference="processes"))
    threads = await _predict(settings_for(registry_dir, inference="threads"))
    assert procs == threads  # the same code on the same inputs: equal, not merely close
    # And both equal the in-process runtime (the exporter's own Predictor).
    want = Predictor.from_bundle(tiny_bundles["a"]).predict(TEXTS, spans=3)
    for got, w in zip(procs["results"], want, strict=True):
        assert got["label"] == w.label
        assert np.allclose(
            [got["probabilities"][k] for k in w.probabilities], list(w.probabilities.values()), atol=1e-6
        )
        assert [(s["start"], s["end"]) for s in got["spans"]] == [(s.start, s.end) for s in w.spans]


async def test_a_killed_worker_is_replaced_and_the_request_still_answered(registry_dir: Path) -> None:
    async with serving(settings_for(registry_dir, inference="processes", workers=1)) as (app, client):
        procs = app.state.pool.procs
        first = await client.post("/v1/predict", json={"texts": TEXTS})
        assert first.status_code == 200
        (old_pid,) = procs.pids()
        os.kill(old_pid, signal.SIGKILL)
        again = await client.post("/v1/predict", json={"texts": TEXTS})
        assert again.status_code == 200, again.text
        assert again.json()["results"] == first.json()["results"]
        (new_pid,) = procs.pids()
        assert new_pid != old_pid
        assert (await client.get("/readyz")).status_code == 200


async def test_a_worker_that_keeps_dying_gives_503_not_500(registry_dir: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    async with serving(settings_for(registry_dir, inference="processes", workers=1)) as (app, client):
        worker = app.state.pool.procs.workers[0]
        real = worker.submit

        def dies(
            msg: Message, payload: bytes | None = None, waiter: Any = None, *, wait: bool = True
        ) -> tuple[int, Any]:
            if isinstance(msg, Run):  # the worker dies with the batch in its pipe, every time
                os.kill(worker.proc.pid, signal.SIGKILL)
                worker.proc.join(5)
            return real(msg, payload, waiter, wait=wait)

        monkeypatch.setattr(worker, "submit", dies)
        r = await client.post("/v1/predict", json={"texts": TEXTS[:2]})
        assert r.status_code == 503
        assert r.headers["content-type"].startswith("application/problem+json")
        assert "replaced" in r.json()["detail"]
        monkeypatch.setattr(worker, "submit", real)
        assert (await client.post("/v1/predict", json={"texts": TEXTS[:2]})).status_code == 200


@pytest.mark.skipif(not hasattr(os, "SCHED_BATCH"), reason="SCHED_BATCH is a Linux scheduling policy")
async def test_workers_run_as_batch_work_when_told_to(registry_dir: Path) -> None:
    # The policy the kernel reports for each worker process (sched_getscheduler(2)), after a
    # prediction has gone through it, for TEXTSIEVE_WORKER_SCHEDULING=batch and normal.
    for scheduling, policy in (("batch", os.SCHED_BATCH), ("normal", os.SCHED_OTHER)):
        settings = settings_for(registry_dir, inference="processes", workers=2, worker_scheduling=scheduling)
        async with serving(settings) as (app, client):
            assert (await client.post("/v1/predict", json={"texts": TEXTS[:2]})).status_code == 200
            pids = app.state.pool.procs.pids()
            assert len(pids) == 2
            assert [os.sched_getscheduler(pid) for pid in pids] == [policy, policy], scheduling
    assert os.sched_getscheduler(0) == os.SCHED_OTHER  # the server's own process is left as it was


@pytest.mark.skipif(not hasattr(os, "SCHED_BATCH"), reason="SCHED_BATCH is a Linux scheduling policy")
async def test_adaptive_scheduling_follows_the_event_loops_own_load(
    registry_dir: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    # The default, TEXTSIEVE_WORKER_SCHEDULING=adaptive: the workers go under SCHED_BATCH once the
    # event loop has kept BUSY_ON of a core busy over an interval, and back when it is idle; each
    # worker's policy is read from the kernel, and /metrics says the same. The bounds are lowered
    # (0.6 and 0.45 by default) so that a CI machine busy with other work still sees the spin
    # below as busy and the idle loop as idle. The spin blocks the loop, so the interval that
    # judges it is the whole spin, and its share is what the machine gave the loop's thread: at
    # 0.3 this failed once with a load average of ~6 on 2 cores (a third of a core each).
    # Idle, the loop polls every 10 ms for well under 1 % of a core.
    from textsieve.service.inference import batcher
    from textsieve.service.inference.batcher import ADAPT_SECONDS

    monkeypatch.setattr(batcher, "BUSY_ON", 0.15)
    monkeypatch.setattr(batcher, "BUSY_OFF", 0.05)

    async def until(scheduling: str) -> list[int]:
        for _ in range(200):
            if pool.scheduling == scheduling:
                return [os.sched_getscheduler(pid) for pid in pool.procs.pids()]  # at once, on the loop
            await asyncio.sleep(0.01)
        raise AssertionError(f"the workers never went {scheduling}")

    settings = settings_for(registry_dir, inference="processes", workers=2)
    assert settings.worker_scheduling == "adaptive"
    async with serving(settings) as (app, client):
        assert (await client.post("/v1/predict", json={"texts": TEXTS[:2]})).status_code == 200
        pool = app.state.pool
        await asyncio.sleep(2 * ADAPT_SECONDS)
        assert await until("normal") == [os.SCHED_OTHER] * 2
        end = time.thread_time() + 3 * ADAPT_SECONDS  # the loop's thread busy for three intervals
        while time.thread_time() < end:
            pass
        assert await until("batch") == [os.SCHED_BATCH] * 2
        assert (pool.procs.gather, pool.sharing()) == (True, 1)  # batches gather on one worker
        assert await until("normal") == [os.SCHED_OTHER] * 2  # idle again: the next interval undoes it
        assert (pool.procs.gather, pool.sharing()) == (False, 2)
        assert pool.scheduling_switches == 2
        page = (await client.get("/metrics")).text
        assert "textsieve_worker_scheduling_switches_total 2.0" in page
        assert "textsieve_workers_batch_scheduled 0.0" in page
    # Shutdown (run off the loop, as the lifespan does) stopped the timer on the loop's own thread.
    assert pool._adapting is None and pool._adapt_stopped


@contextlib.asynccontextmanager
async def _loop_always_busy(registry_dir: Path, monkeypatch: pytest.MonkeyPatch) -> AsyncIterator[tuple[Any, Any]]:
    """Two worker processes, with the event loop counted as busy whatever it does (BUSY_ON 0):
    ``adaptive`` has put them under SCHED_BATCH, gathering, once this yields (app, client)."""
    from textsieve.service.inference import batcher

    monkeypatch.setattr(batcher, "BUSY_ON", 0.0)
    monkeypatch.setattr(batcher, "BUSY_OFF", -1.0)
    async with serving(settings_for(registry_dir, inference="processes", workers=2)) as (app, client):
        assert (await client.post("/v1/predict", json={"texts": TEXTS[:2]})).status_code == 200
        while app.state.pool.scheduling != "batch":
            await asyncio.sleep(0.01)
        yield app, client


async def test_while_the_loop_is_busy_batches_gather_on_the_first_worker_with_room(
    registry_dir: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    # The loop counts as busy whatever it does (BUSY_ON 0), so the workers gather: batches fill the
    # first worker's pipeline (PIPELINE batches: one computing, one waiting) before the next worker
    # gets one, and a batch is the whole queue rather than its share per worker. Without gathering,
    # two batches sent back to back go one to each worker. Either way every batch is answered, and
    # with the same bytes.
    from textsieve.service.inference.workers import PIPELINE

    async with _loop_always_busy(registry_dir, monkeypatch) as (app, _):
        pool = app.state.pool
        procs = pool.procs
        assert procs.gather and pool.sharing() == 1
        key = next(iter(app.state.models.live.values())).worker_key

        async def send(batches: int) -> tuple[list[int], list[Any]]:
            futures = [
                procs.run_async(key, TEXTS[:3], [2] * 3, None, drift=False, executor=pool.executor)
                for _ in range(batches)
            ]
            pending = [w.pending for w in procs.workers]  # before the loop runs again: nothing read yet
            return pending, [orjson.dumps((await f)[0]) for f in futures]  # each text's JSON, as served

        gathered, replies = await send(PIPELINE)
        assert gathered == [PIPELINE, 0]
        overflow, replies_overflow = await send(PIPELINE + 1)  # the first is full: the next takes it
        assert overflow == [PIPELINE, 1]
        procs.gather = False
        spread, replies_spread = await send(2)
        assert spread == [1, 1]
        assert len(set(replies + replies_overflow + replies_spread)) == 1
        assert len(orjson.loads(replies[0])) == 3


@pytest.mark.skipif(not hasattr(os, "SCHED_BATCH"), reason="SCHED_BATCH is a Linux scheduling policy")
async def test_a_replaced_worker_is_put_under_the_adaptive_policy(
    registry_dir: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    # The loop counts as busy whatever it does, so the policy stays batch; a worker replaced after
    # the switch is put under it as well, even when it started under the normal policy (a
    # replacement racing the switch: simulated by starting it as "normal").
    async with _loop_always_busy(registry_dir, monkeypatch) as (app, client):
        pool = app.state.pool
        worker = pool.procs.workers[0]
        worker.scheduling = "normal"
        old = worker.proc.pid
        os.kill(old, signal.SIGKILL)
        worker.proc.join(5)
        assert (await client.post("/v1/predict", json={"texts": TEXTS[:2]})).status_code == 200
        assert worker.proc.pid != old
        for _ in range(200):
            if [os.sched_getscheduler(pid) for pid in pool.procs.pids()] == [os.SCHED_BATCH] * 2:
                break
            await asyncio.sleep(0.01)
        else:
            raise AssertionError("the replaced worker was left under the normal policy")
        assert pool.scheduling_switches == 1  # put under it without a switch


def test_unknown_worker_scheduling_is_refused() -> None:
    from pydantic import ValidationError

    from textsieve.service.settings import Settings

    with pytest.raises(ValidationError, match="'adaptive', 'normal' or 'batch'"):
        Settings(registry="x", worker_scheduling="fifo")


def test_unknown_inference_mode_is_refused() -> None:
    from pydantic import ValidationError

    from textsieve.service.settings import Settings

    with pytest.raises(ValidationError, match="processes"):
        Settings(registry="x", inference="fibers")


def test_unloaded_version_is_unavailable_not_a_crash() -> None:
    from textsieve.service.inference.workers import WorkerProcesses

    procs = WorkerProcesses(1)
    try:
        with pytest.raises(UnavailableError, match="not loaded"):
            procs.run(0, ("m", 1, 1), ["text"], [0])
    finally:
        procs.shutdown()


async def test_batches_pipelined_into_one_worker_all_come_back_in_order(registry_dir: Path) -> None:
    # One worker, several requests at once: each reply must reach the request that sent it.
    texts = ["my card was charged" + " again" * n for n in range(40)]  # n + 4 tokens: each reply is told apart
    async with serving(settings_for(registry_dir, inference="processes", workers=1, batch_max_texts=4)) as (_, client):
        replies = await asyncio.gather(*(client.post("/v1/predict", json={"texts": [t]}) for t in texts))
        for text, r in zip(texts, replies, strict=True):
            assert r.status_code == 200
            (result,) = r.json()["results"]
            assert result["tokens"] == len(text.split())
            for span in result["spans"]:
                assert text[span["start"] : span["end"]] == span["text"]


async def test_a_worker_that_cannot_be_restarted_gives_503_then_recovers(
    registry_dir: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    async with serving(settings_for(registry_dir, inference="processes", workers=1)) as (app, client):
        worker = app.state.pool.procs.workers[0]
        real_start = worker.start

        def cannot_start() -> None:
            raise OSError("fork server gone")

        monkeypatch.setattr(worker, "start", cannot_start)
        os.kill(worker.proc.pid, signal.SIGKILL)
        worker.proc.join(5)
        r = await client.post("/v1/predict", json={"texts": TEXTS[:2]})
        assert r.status_code == 503, r.text
        assert "could not be restarted" in r.json()["detail"]
        monkeypatch.setattr(worker, "start", real_start)
        r = await client.post("/v1/predict", json={"texts": TEXTS[:2]})
        assert r.status_code == 200, r.text


async def test_worker_processes_that_cannot_start_make_readyz_say_what_to_do(
    registry_dir: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    from textsieve.service.inference import workers as procs

    def cannot_start(self: object) -> None:
        raise PermissionError("no temporary folder")

    monkeypatch.setattr(procs._Worker, "start", cannot_start)
    async with serving(settings_for(registry_dir, inference="processes"), ready=False) as (_, client):
        for _ in range(100):
            r = await client.get("/readyz")
            if "TEXTSIEVE_INFERENCE=threads" in r.text:
                break
            await asyncio.sleep(0.05)
        assert r.status_code == 503
        assert "cannot start inference worker processes" in r.text and "TEXTSIEVE_INFERENCE=threads" in r.text
        p = await client.post("/v1/predict", json={"texts": ["a text"]})
        assert p.status_code == 503 and p.headers["content-type"].startswith("application/problem+json")


async def test_head_waits_for_the_body_and_both_go_out_back_to_back() -> None:
    # service/web/onewrite.py: the head is held until the first body part, then both are sent.
    from textsieve.service.web.onewrite import HeadWithBodyMiddleware

    sent: list[str] = []

    async def app(scope: dict, receive: object, send: object) -> None:  # type: ignore[type-arg]
        await send({"type": "http.response.start", "status": 200, "headers": []})  # type: ignore[operator]
        sent.append("app: head handed on")
        await send({"type": "http.response.body", "body": b"x"})  # type: ignore[operator]

    async def server_send(message: dict) -> None:  # type: ignore[type-arg]
        sent.append(message["type"])

    await HeadWithBodyMiddleware(app)({"type": "http"}, None, server_send)  # type: ignore[arg-type]
    assert sent == ["app: head handed on", "http.response.start", "http.response.body"]


async def test_batches_go_from_the_event_loop_to_the_worker_with_no_inference_thread(
    registry_dir: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    # The default path hands a batch to a worker process from the event loop; a batch too large to
    # be sure of fitting in the pipe goes from an inference thread instead. Both answer the same.
    from textsieve.service.inference import workers

    async with serving(settings_for(registry_dir, inference="processes", workers=2)) as (app, client):
        executor = app.state.pool.executor
        handed: list[object] = []
        real_submit = executor.submit

        def counting(fn: Any, /, *args: Any, **kwargs: Any) -> Future[Any]:
            handed.append(fn)
            return real_submit(fn, *args, **kwargs)

        monkeypatch.setattr(executor, "submit", counting)
        body = {"texts": TEXTS, "spans": 3}
        from_loop = await client.post("/v1/predict", json=body)
        assert from_loop.status_code == 200, from_loop.text
        assert handed == []  # no inference thread took part
        monkeypatch.setattr(workers, "SEND_FROM_LOOP_MAX_BYTES", 0)
        from_thread = await client.post("/v1/predict", json=body)
        assert from_thread.status_code == 200, from_thread.text
        assert len(handed) == 1
        assert from_thread.json()["results"] == from_loop.json()["results"]


async def test_the_event_loop_reads_the_replies_and_no_reply_thread_runs(registry_dir: Path) -> None:
    import threading

    async with serving(settings_for(registry_dir, inference="processes", workers=2)) as (app, client):
        r = await client.post("/v1/predict", json={"texts": TEXTS[:3]})
        assert r.status_code == 200
        procs = app.state.pool.procs
        assert all(w.replies.watched and not w.replies.by_thread for w in procs.workers)
        assert not [t.name for t in threading.enumerate() if t.name.endswith("-replies")]
        # A blocking call made on the loop's own thread reads its reply itself (the loop cannot).
        models = app.state.models
        in_use = sorted(s.worker_key for s in [*models.live.values(), *models.pinned.values()])
        assert procs.held() == [in_use] * 2


def test_replies_cut_anywhere_or_several_in_one_read_reach_their_callers_in_order() -> None:
    # The framing is multiprocessing's own (Connection.send on the worker's side): cut the bytes
    # at every possible place, and all at once, and every caller gets its own reply.
    import multiprocessing
    import threading

    from textsieve.service.inference.workers import _Replies

    sent = [("ok", {"n": i, "pad": "é" * (i * 37)}) for i in range(12)]
    sent.append(("ok", ["x" * 100_000, 1]))  # larger than a single read of the pipe buffer may give
    a, b = multiprocessing.Pipe(duplex=True)
    writer = threading.Thread(target=lambda: [b.send(m) for m in sent])
    writer.start()
    raw = b""
    while len(raw) < 4 or a.poll(0.5):
        raw += os.read(a.fileno(), 1 << 20)
    writer.join()
    for step in (1, 7, 4096, len(raw)):
        replies = _Replies(a, threading.Lock())
        waiters: list[Future[Any]] = [Future() for _ in sent]
        replies.pending.extend(waiters)
        for at in range(0, len(raw), step):
            replies.feed(raw[at : at + step])
        assert [w.result() for w in waiters] == [(Outcome(s), v) for s, v in sent]
        assert not replies.pending
    a.close()
    b.close()


async def test_a_worker_killed_with_batches_in_flight_answers_every_request(registry_dir: Path) -> None:
    # The loop reads the replies: a worker's end (EOF on its pipe) fails what it held, and each of
    # those batches runs once more on its replacement. No request hangs, none gets a 500.
    texts = [f"my card was charged {n} times" for n in range(24)]
    async with serving(settings_for(registry_dir, inference="processes", workers=1, batch_max_texts=2)) as (
        app,
        client,
    ):
        procs = app.state.pool.procs
        want = (await client.post("/v1/predict", json={"texts": texts})).json()["results"]
        (old_pid,) = procs.pids()
        sent = [asyncio.create_task(client.post("/v1/predict", json={"texts": [t]})) for t in texts]
        while procs.workers[0].pending == 0:
            await asyncio.sleep(0.001)
        os.kill(old_pid, signal.SIGKILL)
        replies = await asyncio.wait_for(asyncio.gather(*sent), 60)
        assert [r.status_code for r in replies] == [200] * len(texts), [r.text for r in replies if r.status_code != 200]
        assert [r.json()["results"][0] for r in replies] == want
        (new_pid,) = procs.pids()
        assert new_pid != old_pid


def test_fork_server_imports_what_this_process_imports(tmp_path: Path) -> None:
    """Workers run this process's textsieve, not one in the working directory (Python 3.11's
    fork server imports its preload with the working directory first on its search path)."""
    decoy = tmp_path / "cwd" / "textsieve"
    decoy.mkdir(parents=True)
    marker = tmp_path / "decoy-imported"
    (decoy / "__init__.py").write_text(f"open({str(marker)!r}, 'w').close()\nraise ImportError('decoy')\n")
    script = tmp_path / "start.py"
    script.write_text(
        "import os\n"
        "from textsieve.service.inference.workers import _fork_context\n"
        "if __name__ == '__main__':\n"
        "    p = _fork_context().Process(target=os.getpid)\n"
        "    p.start()\n"
        "    p.join(60)\n"
        "    raise SystemExit(p.exitcode)\n"
    )
    env = {k: v for k, v in os.environ.items() if k not in ("PYTHONPATH", "PYTHONSAFEPATH")}
    done = subprocess.run([sys.executable, str(script)], cwd=decoy.parent, env=env, timeout=120, capture_output=True)
    assert done.returncode == 0, done.stderr.decode()[-2000:]
    assert not marker.exists(), "the fork server imported the textsieve in the working directory"


_SERVICE_START = "from textsieve.service.inference.workers import _fork_context as start\nargs = ()\n"
_SCORE_START = (
    "from textsieve.forking import fork_server as start\nfrom textsieve.scoring.cli import PRELOAD\nargs = (PRELOAD,)\n"
)


@pytest.mark.parametrize("start", [_SERVICE_START, _SCORE_START], ids=["service", "score"])
def test_workers_inherit_the_scan_of_the_unicode_database_from_the_fork_server(tmp_path: Path, start: str) -> None:
    """The tokenizer's scan of every code point (~0.09 s) is done once by the fork server, not by
    each worker process on its first model (textsieve/registry/prewarm.py)."""
    script = tmp_path / "start.py"
    script.write_text(
        "import sys\n" + start + "def check():\n"
        "    from textsieve.registry import tokenizer\n"
        "    sys.exit(0 if tokenizer._marks_and_formats.cache_info().currsize == 1 else 3)\n"
        "if __name__ == '__main__':\n"
        "    p = start(*args).Process(target=check)\n"
        "    p.start()\n"
        "    p.join(60)\n"
        "    raise SystemExit(p.exitcode)\n"
    )
    done = subprocess.run([sys.executable, str(script)], cwd=tmp_path, timeout=120, capture_output=True)
    assert done.returncode == 0, done.stderr.decode()[-2000:]


def test_a_version_loaded_while_its_worker_is_replaced_reaches_the_new_process(
    tiny_bundles: dict[str, Path], monkeypatch: pytest.MonkeyPatch
) -> None:
    """Found by SIGKILLing workers during hot swaps under load (real serve, pinned requests): one
    request was answered 503 'inference failed: KeyError: ('support', 3, 53)'. A version was loaded
    in a worker that then died, and another caller (a batch that found it dead) replaced the worker
    before the load was booked: the replacement reloaded what was booked, without that version, yet
    the server then counted it as loaded there and sent its batches to a process that never had it.
    Here the same interleaving is made deterministic: the worker is killed and replaced right after
    its Load reply."""
    from textsieve.service.inference.workers import Load, WorkerProcesses, _Worker

    procs = WorkerProcesses(1)
    try:
        first = procs.new_key("m", 1)
        procs.load(first, tiny_bundles["a"], 16)
        second = procs.new_key("m", 2)
        real_call = _Worker.call

        def call_then_die(self: _Worker, msg: Message, *, retry: bool) -> Any:
            value = real_call(self, msg, retry=retry)
            if isinstance(msg, Load) and msg.key == second:
                gen = self.generation
                os.kill(self.proc.pid, signal.SIGKILL)
                self.proc.join(10)
                self._replace(gen)  # what another caller does on finding the worker dead
            return value

        monkeypatch.setattr(_Worker, "call", call_then_die)
        procs.load(second, tiny_bundles["b"], 16)
        monkeypatch.undo()
        assert [sorted(keys) for keys in procs.held()] == [sorted([first, second])]  # what the new process has
        replies = procs.run(0, second, ["my card was charged twice"], [1])
        assert len(replies[0]) == 1
    finally:
        procs.shutdown()


def test_a_batch_sent_while_a_replaced_worker_reloads_waits_for_its_version(
    tiny_bundles: dict[str, Path], monkeypatch: pytest.MonkeyPatch
) -> None:
    """The same probe (workers SIGKILLed during swaps under load) kept answering a few requests 503
    'inference failed: KeyError', unpinned ones too: a replaced worker was visible to batches as soon
    as it started, with every version still booked in it, while its versions were reloaded one by
    one; a batch sent in between reached the process before its version's Load. Here the reload's
    way to the pipe is slowed (a sleep before each Load is sent) to hold that window open."""
    import threading

    from textsieve.service.inference.workers import Load, WorkerProcesses, _Worker

    procs = WorkerProcesses(1)
    try:
        key = procs.new_key("m", 1)
        procs.load(key, tiny_bundles["a"], 16)
        real_submit = _Worker.submit

        def slow_loads(self: _Worker, msg: Message, payload: bytes | None = None, waiter: Any = None) -> Any:
            if isinstance(msg, Load):
                time.sleep(0.5)
            return real_submit(self, msg, payload, waiter)

        monkeypatch.setattr(_Worker, "submit", slow_loads)
        w = procs.workers[0]
        gen = w.generation
        os.kill(w.proc.pid, signal.SIGKILL)
        w.proc.join(10)
        replacing = threading.Thread(target=w._replace, args=(gen,))
        replacing.start()
        while w.generation == gen:  # the new process is there ...
            time.sleep(0.001)
        replies = procs.run(0, key, ["my card was charged twice"], [1])  # ... and a batch is sent to it
        replacing.join(30)
        assert len(replies[0]) == 1
    finally:
        monkeypatch.undo()
        procs.shutdown()


def test_a_batch_is_pickled_as_connection_send_would_and_rebuilt_by_one_call() -> None:
    """The loop pickles each batch itself (``pickled``) and the worker reads it with ``recv``: the
    bytes are ``ForkingPickler.dumps``' own. A Run is rebuilt by one call with its fields, not
    through a frozen dataclass's per-field ``__setstate__`` (pickle's BUILD opcode), which cost the
    loop and the worker Python calls a batch (bench/README.md, "A batch on the pipe")."""
    import pickletools
    from multiprocessing.reduction import ForkingPickler

    from textsieve.service.inference.workers import Drop, Held, Load, Score, pickled

    run = Run(("m", 1, 1), [*TEXTS, "", "\ud800 lone"], list(range(len(TEXTS) + 2)), 0.25, True)
    for msg in (
        run,
        Run(("m", 2, 1), [], []),
        Load(("m", 1, 1), "/b", 16),
        Score(("m", 1, 1), ["a"]),
        Drop(("m", 1, 1)),
        Held(),
    ):
        payload = pickled(msg)
        assert payload == bytes(ForkingPickler.dumps(msg))
        assert ForkingPickler.loads(payload) == msg
    ops = [op.name for op, _, _ in pickletools.genops(pickled(run))]
    assert "BUILD" not in ops and ops[-2:] == ["MEMOIZE", "STOP"] and "REDUCE" in ops
