"""Worker processes for scoring: one single-thread onnxruntime session per process, one process per
core (two single-thread sessions beat one two-thread session on this graph: design.md's measurements).

A worker loads the bundle folder it is given once, when it starts; the parent has verified that
folder against the registry's sha256 before any worker sees it (see ``_load`` for what the worker
checks again). ``workers=0`` scores in the calling
process instead (tests, tiny files, and machines where forking is not wanted).
"""

from __future__ import annotations

import multiprocessing
import os
import threading
import time
from collections.abc import Sequence
from concurrent.futures import Future, ProcessPoolExecutor
from concurrent.futures.process import BrokenProcessPool
from pathlib import Path
from typing import TYPE_CHECKING

from textsieve.errors import UnavailableError
from textsieve.scoring.rows import Scored, score_texts

if TYPE_CHECKING:
    from textsieve.registry.runtime import Predictor

_PREDICTOR: Predictor | None = None


def _exit_with(parent: int) -> None:
    """End this worker when the scoring process ``parent`` ends. A worker waits on its queue, whose
    write end it holds itself, so it never sees the end of a parent killed outright (SIGKILL, the
    OOM killer): it and the fork server stayed, blocked, for ever."""
    import select

    try:
        fd = os.pidfd_open(parent)
    except (AttributeError, OSError):  # not Linux 5.3+; the parent may be gone already
        if not _alive(parent):
            os._exit(0)

        def watch() -> None:
            while _alive(parent):
                time.sleep(1.0)
            os._exit(0)

    else:

        def watch() -> None:
            select.select([fd], [], [])  # readable once the process has ended
            os._exit(0)

    threading.Thread(target=watch, name="textsieve-parent-watch", daemon=True).start()


def _alive(pid: int) -> bool:
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    except PermissionError:
        return True
    return True


def _load(bundle: str, batch_size: int, parent: int) -> None:
    global _PREDICTOR
    import signal

    _exit_with(parent)

    # Ctrl-C reaches the whole foreground process group: the scoring process decides (it keeps
    # the chunks done and stops the pool); a worker that took it printed a KeyboardInterrupt
    # traceback. SIGTERM keeps its default: the pool stops a broken worker with it, and a worker
    # that ignored it outlived the run, blocked for ever on its queue.
    signal.signal(signal.SIGINT, signal.SIG_IGN)
    from textsieve.registry.bundle import open_bundle
    from textsieve.registry.runtime import Predictor

    # The folder is the registry's verified copy: every file was re-hashed against the version's
    # record before the first row (textsieve/scoring/model.py), and those bytes passed the whole
    # check, graph included, when the version was published. The worker re-hashes the files again
    # but does not repeat the graph check: it imports the onnx package, ~0.75 s a worker, which
    # was a fifth of scoring 100,000 texts (bench/score.py).
    checked = open_bundle(Path(bundle), check_onnx=False)
    _PREDICTOR = Predictor.from_bundle(checked, threads=1, batch_size=batch_size)


def _score(texts: list[str], spans: int) -> Scored:
    assert _PREDICTOR is not None, "the worker's initializer loads the predictor"
    return score_texts(_PREDICTOR, texts, spans)


def default_workers() -> int:
    """One per core this process may run on."""
    try:
        return max(len(os.sched_getaffinity(0)), 1)
    except AttributeError:  # not on Linux
        return max(os.cpu_count() or 1, 1)


class Pool:
    """Scores lists of texts on ``workers`` processes (or in this process when 0), in submission order."""

    def __init__(self, bundle: Path, *, workers: int, batch_size: int = 64) -> None:
        self.workers = workers
        self._executor: ProcessPoolExecutor | None = None
        self._local: Predictor | None = None
        if workers == 0:
            from textsieve.registry.runtime import Predictor

            self._local = Predictor.from_bundle(bundle, threads=1, batch_size=batch_size)
        else:
            # forkserver: workers start from a clean process, not a copy of this one's threads and memory.
            self._executor = ProcessPoolExecutor(
                max_workers=workers,
                mp_context=multiprocessing.get_context("forkserver"),
                initializer=_load,
                initargs=(str(bundle), batch_size, os.getpid()),
            )

    @property
    def parallel(self) -> int:
        return max(self.workers, 1)

    def submit(self, texts: list[str], spans: int) -> Future[Scored]:
        if self._executor is None:
            assert self._local is not None
            done: Future[Scored] = Future()
            done.set_result(score_texts(self._local, texts, spans))
            return done
        try:
            return self._executor.submit(_score, texts, spans)
        except BrokenProcessPool as exc:
            raise _stopped() from exc

    def close(self, *, cancel: bool = False) -> None:
        if self._executor is not None:
            # The results' pipe: this process holds its write end too, for the workers it may still
            # start. A worker killed while writing a result (SIGTERM to the process group) leaves half
            # a message in it, and the executor's thread then reads for the rest for ever, since a
            # write end is still open here; Python's exit joins that thread, so the process hung after
            # its last line. Once no worker is to be started, this copy is closed: the dead workers'
            # copies are gone with them, the read ends, and the executor takes the pool for broken.
            results = getattr(self._executor, "_result_queue", None)
            writer = getattr(results, "_writer", None)
            self._executor.shutdown(wait=not cancel, cancel_futures=cancel)
            if cancel and writer is not None:
                writer.close()

    def result(self, future: Future[Scored]) -> Scored:
        """The future's result; a worker that died becomes one line, not a traceback nor a hang.

        A worker killed while it writes a result (the OOM killer, SIGKILL) leaves half a message in
        the results' pipe, and a result of more than 4,096 bytes (``PIPE_BUF``) is not written at
        once. The executor's thread then reads for the rest for ever: this process and every live
        worker hold the pipe's write end, so the read never ends, and it never looks at the dead
        worker. So the wait looks at the workers once a second (a timed wait on a lock, no work
        meanwhile); a dead one that the executor has not answered for one more look means its
        thread is stuck, and the pool is stopped here (``_unstick``)."""
        try:
            dead = False
            while True:
                try:
                    return future.result(timeout=_LOOK)
                except TimeoutError:
                    if not self._a_worker_died():
                        continue
                    if dead:
                        break
                    dead = True  # the executor sees a dead worker in milliseconds, unless it is stuck
            self._unstick()
            future.result(timeout=_UNSTUCK)
        except (BrokenProcessPool, TimeoutError) as exc:
            raise _stopped() from exc
        raise _stopped()  # its result came in as the workers were stopped: the pool is gone all the same

    def _a_worker_died(self) -> bool:
        """Whether a worker process has ended, read from the sentinels without reaping anything."""
        from multiprocessing.connection import wait

        processes = getattr(self._executor, "_processes", None) or {}
        sentinels = [p.sentinel for p in list(processes.values())]
        return bool(sentinels) and bool(wait(sentinels, timeout=0))

    def _unstick(self) -> None:
        """End the workers and close this process's write end of the results' pipe: the executor's
        read then ends (end of file), and the executor takes the pool for broken, fails the pending
        futures and ends its thread, which Python's exit joins."""
        assert self._executor is not None
        processes = getattr(self._executor, "_processes", None) or {}
        results = getattr(self._executor, "_result_queue", None)
        writer = getattr(results, "_writer", None)
        thread = getattr(self._executor, "_executor_manager_thread", None)
        for process in list(processes.values()):
            process.terminate()  # SIGTERM: the workers keep its default (``_load``)
        for process in list(processes.values()):
            process.join(_UNSTUCK)
        if writer is not None:
            writer.close()
        if thread is not None:
            thread.join(_UNSTUCK)


_LOOK = 1.0  # seconds between looks at the workers while a result is awaited
_UNSTUCK = 10.0  # seconds a stopped worker or the executor's thread may take to end


def _stopped() -> UnavailableError:
    return UnavailableError(
        "a scoring worker process stopped (killed, or out of memory); run the same command with --resume "
        "to continue from the last completed chunk"
    )


def pieces(texts: Sequence[str], parallel: int, minimum: int = 256) -> list[slice]:
    """Split a chunk so every worker gets work and each piece is long enough to sort by length."""
    n = len(texts)
    if n == 0:
        return []
    count = max(1, min(2 * parallel, n // minimum or 1))
    step = -(-n // count)
    return [slice(lo, min(lo + step, n)) for lo in range(0, n, step)]


__all__ = ["Pool", "default_workers", "pieces"]
