"""A scoring worker that dies halfway through sending a result, as one the OOM killer (or SIGKILL)
ends while it writes into the pool's results' pipe.

``concurrent.futures`` sends a result through a ``multiprocessing`` pipe as one frame: a 4-byte
length, then the pickled result, under a lock the workers share (CPython 3.11,
``multiprocessing/connection.py _send_bytes``, ``multiprocessing/queues.py SimpleQueue.put``). A
write above ``PIPE_BUF`` (4,096 bytes) is not atomic (POSIX ``write``), so a worker killed during it
leaves the length and part of the frame in the pipe, and the lock taken. Made here by hand, so
that a test does not depend on when a signal lands.
"""

from __future__ import annotations

import os
import pickle
import signal
import struct
import sys
from concurrent.futures import process
from multiprocessing.queues import SimpleQueue
from typing import Any

# Set in a ``textsieve score`` command's environment by a test, read by ``install`` in every process
# started from it (``tests/helpers/dying_worker_site/sitecustomize.py``).
AT = "TESTS_SCORING_WORKER_DIES_AT"  # a worker's n-th result (1 = its first)
MARK = "TESTS_SCORING_WORKER_DIES_MARK"  # a file made by the one worker that dies, so one only dies


def _result_queue() -> SimpleQueue[Any]:
    """The results' queue of the pool worker running the caller (``_process_worker``'s argument)."""
    frame = sys._getframe()
    while frame.f_code is not process._process_worker.__code__:
        if frame.f_back is None:
            raise RuntimeError("not called in a concurrent.futures worker")
        frame = frame.f_back
    queue: SimpleQueue[Any] = frame.f_locals["result_queue"]
    return queue


def _die_writing(queue: SimpleQueue[Any], message: bytes) -> None:
    """Take the queue's write lock, write the frame's length and half of ``message``, then SIGKILL."""
    lock = queue._wlock  # type: ignore[attr-defined]
    writer = queue._writer  # type: ignore[attr-defined]
    lock.acquire()
    os.write(writer.fileno(), struct.pack("!i", len(message)) + message[: len(message) // 2])
    os.kill(os.getpid(), signal.SIGKILL)


def die_halfway_through_a_result() -> None:
    """Submitted to a pool's executor: the worker running it dies with a 250 KB result (a piece of
    2,048 texts with spans, bench/README.md) half sent."""
    _die_writing(_result_queue(), pickle.dumps(b"\x01" * 250_000))


def install() -> None:
    """In the process of a worker, the ``AT``-th result it sends is sent halfway and the worker
    killed, once for the whole test: the first worker to create ``MARK`` dies, none after it."""
    at = os.environ.get(AT)
    mark = os.environ.get(MARK)
    if not at or not mark:
        return
    send = process._sendback_result
    sent = 0

    def sendback(result_queue: SimpleQueue[Any], work_id: int, *args: Any, **kwargs: Any) -> None:
        nonlocal sent
        sent += 1
        if sent == int(at):
            try:
                os.close(os.open(mark, os.O_CREAT | os.O_EXCL | os.O_WRONLY))
            except FileExistsError:
                pass
            else:
                item = process._ResultItem(work_id, *args, **kwargs)
                _die_writing(result_queue, pickle.dumps(item, protocol=pickle.HIGHEST_PROTOCOL))
        send(result_queue, work_id, *args, **kwargs)

    process._sendback_result = sendback  # type: ignore[attr-defined]
