"""Inference in worker processes: tokenizing, the graph and spans outside the server's GIL.

With threads (``TEXTSIEVE_INFERENCE=threads``) onnxruntime computes in parallel, but
tokenizing, padding and building replies are Python and take turns on one GIL with the event
loop; on the 2-core benchmark machine that capped the server at about 1.25 busy cores. With
processes (the default) the event loop puts each batch into the pipe of the least busy worker
process (while the loop is busy, of the first with room: :attr:`WorkerProcesses.gather`;
:meth:`WorkerProcesses.run_async`); the worker encodes, runs its single-thread session,
explains, and sends back each text's reply already serialised as JSON, which the server embeds
as it is (``orjson.Fragment``); the event loop reads each worker's pipe itself when it becomes
readable (``loop.add_reader``) and settles the batch's future there (without a loop, for instance
a ``WorkerProcesses`` made outside the server, a reader thread per worker does).
Blocking calls (loading, dropping, shadow scoring, a batch too large for the pipe, the
retry after a worker died) go through :meth:`_Worker.call` from a thread.

Workers are forked from a fork server started once per server process, which has already
imported the inference modules, so starting or replacing a worker takes milliseconds. Every
version a worker serves is loaded and warmed in it (:class:`Load`) before requests can reach
it; :class:`Drop` frees it. A worker that dies is replaced on the spot and given the versions it
had; the batch it was running is tried once more on the new worker, then fails with 503.

The messages on the pipe are the small classes below, imported by both ends, so a misspelt
operation is a type error rather than an "unknown operation" reply; the worker answers each
with an :class:`Outcome` and a value.
"""

from __future__ import annotations

import asyncio
import atexit
import contextlib
import gc
import io
import itertools
import logging
import multiprocessing
import multiprocessing.connection
import os
import select
import struct
import threading
from collections import deque
from concurrent.futures import Executor, Future
from dataclasses import dataclass, field
from enum import StrEnum
from multiprocessing.reduction import ForkingPickler
from pathlib import Path
from typing import TYPE_CHECKING, Any

import numpy as np
import orjson

from textsieve.errors import BundleError, UnavailableError
from textsieve.forking import fork_server

if TYPE_CHECKING:
    from textsieve.registry.drift import Layout
    from textsieve.registry.runtime import Predictor

log = logging.getLogger("textsieve.service")
Key = tuple[str, int, int]  # model, version, load number (a version may be loaded twice)


@dataclass(frozen=True, slots=True)
class Load:
    """Load and warm a version's bundle under ``key``; replies None."""

    key: Key
    bundle: str
    batch_size: int


@dataclass(frozen=True, slots=True)
class Run:
    """Score ``texts`` with ``key``, ``ks[i]`` spans for text i; replies a :data:`RunReply`.

    With ``drift`` the worker also counts the batch's drift signals (a few vectorised NumPy calls).
    """

    key: Key
    texts: list[str]
    ks: list[int]
    review: float | None = None  # the model's review threshold: results below it get needs_review
    drift: bool = False

    def __reduce__(self) -> tuple[type[Run], tuple[Key, list[str], list[int], float | None, bool]]:
        """Pickled as one call with the fields: a frozen dataclass with slots otherwise pickles
        through its Python ``__getstate__`` and ``__setstate__``, field by field, on the event loop
        for every batch and again in the worker (bench/README.md, "A batch on the pipe")."""
        return (Run, (self.key, self.texts, self.ks, self.review, self.drift))


@dataclass(frozen=True, slots=True)
class Score:
    """Only the calibrated probabilities of ``texts`` (shadow scoring: no spans, no JSON); replies an array."""

    key: Key
    texts: list[str]


@dataclass(frozen=True, slots=True)
class Drop:
    """Forget ``key`` and free its memory; replies None."""

    key: Key


@dataclass(frozen=True, slots=True)
class Held:
    """Which keys the worker has loaded; replies a sorted list."""


Message = Load | Run | Score | Drop | Held  # what the server sends a worker (None asks it to end)
# JSON replies, tokens, unknown, truncated, each text's label index and its probability, drift counts
RunReply = tuple[list[Any], int, int, int, Any, Any, Any]


class Outcome(StrEnum):
    """How the worker ended a request; the reply's value depends on it."""

    OK = "ok"  # the value is the request's result
    BUNDLE = "bundle"  # the bundle failed a check: the value is the BundleError's message
    ERROR = "error"  # anything else went wrong: the value says what


@dataclass
class Loaded:
    """What a worker needs to (re)load a version."""

    bundle: Path
    batch_size: int


def _run(p: Predictor, layout: Layout, msg: Run) -> tuple[Any, ...]:
    """A :class:`Run` in the worker: encode, run, explain; each text's reply serialised here, once
    (the server embeds the bytes as they are). Arrays travel as raw bytes, never as pickled NumPy
    objects: the server unpickles nothing but plain data from a worker
    (tests/reliability/test_security.py)."""
    from textsieve.registry.drift import count
    from textsieve.service.inference.packing import run_packed
    from textsieve.service.inference.spans import replies

    # Offsets only for the texts that get spans (only spans read them).
    encoded = [p.encode(t, offsets=k > 0) for t, k in zip(msg.texts, msg.ks, strict=True)]
    out = run_packed(p, encoded)
    probs = p.probabilities(out.logits)
    best = probs.argmax(axis=1)
    top = probs.max(axis=1)
    n = len(encoded)
    kept = np.fromiter((len(e.ids) for e in encoded), dtype=np.int64, count=n)
    unknown = np.fromiter((e.unknown for e in encoded), dtype=np.int64, count=n)
    tokens = np.fromiter((e.tokens for e in encoded), dtype=np.int64, count=n)  # before truncation
    # count_encoded's vector, from the arrays already at hand
    counts = count(layout, tokens, kept, unknown, best, top) if msg.drift else None
    return (
        replies(p, encoded, out, msg.ks, probs, msg.review),
        int(kept.sum()),
        int(unknown.sum()),
        int((tokens > kept).sum()),
        best.astype(np.int32).tobytes(),
        top.astype(np.float64).tobytes(),
        None if counts is None else counts.astype(np.int64).tobytes(),
    )


def _send(conn: multiprocessing.connection.Connection, obj: Any) -> None:
    """``conn.send(obj)`` in one write. ``Connection.send`` writes a message over 16 KiB (a batch's
    replies) as its 4-byte length and then its body, two system calls that each wake whoever reads
    the pipe (the server's event loop); the reader sees the same bytes either way."""
    body = ForkingPickler.dumps(obj)
    if len(body) > 0x7FFFFFFF:
        conn.send_bytes(body)
        return
    data = memoryview(struct.pack("!i", len(body)) + body)
    fd = conn.fileno()
    while data:
        data = data[os.write(fd, data) :]


def _place(pid: int, policy: str) -> None:
    """Put process ``pid`` (a worker) under Linux's SCHED_BATCH policy (``policy`` "batch") or the
    normal one; where there is no such policy, or the system refuses it, the process stays as it
    was: only speed differs. A process may move its own children between the two unprivileged.

    A worker under SCHED_BATCH that is woken by a batch does not preempt the event loop that sent
    it (the kernel treats it as CPU-bound, non-interactive work): the loop goes on reading and
    answering requests and the worker computes on what the loop leaves. Its CPU share is
    unchanged: it is not a lower priority (nice). It helps near capacity and costs latency at
    light load (the woken worker waits for the loop), so by default
    (``TEXTSIEVE_WORKER_SCHEDULING=adaptive``) the server moves the workers under it only while its
    event loop is busy (``InferencePool._adapt``); ``batch`` keeps them under it from the start.
    The measurements are in bench/README.md, "Workers as batch work"."""
    linux = getattr(os, "SCHED_BATCH" if policy == "batch" else "SCHED_OTHER", None)
    if linux is not None:
        with contextlib.suppress(OSError):
            os.sched_setscheduler(pid, linux, os.sched_param(0))


def _serve(conn: multiprocessing.connection.Connection) -> None:
    """The worker's loop: one request, one reply, until told to stop or the pipe closes."""
    import signal

    # Ctrl-C (and a SIGTERM sent to the whole process group) must not end a worker in the middle
    # of a batch: the server finishes its requests, then stops the workers; if the server dies,
    # the pipe closes and the worker ends on its own.
    signal.signal(signal.SIGINT, signal.SIG_IGN)
    signal.signal(signal.SIGTERM, signal.SIG_IGN)
    from textsieve.registry.bundle import open_bundle
    from textsieve.registry.drift import Layout
    from textsieve.registry.runtime import Predictor
    from textsieve.service.inference.memory import release_freed_memory
    from textsieve.service.inference.packing import run_packed
    from textsieve.service.modelset.loader import warm_and_check

    predictors: dict[Key, Predictor] = {}
    layouts: dict[Key, Layout] = {}
    # What the forkserver imported and this worker inherited lives as long as the worker: out of
    # the cycle collector's scans, a full collection no longer holds up a batch (see service/cli.py).
    gc.freeze()
    while True:
        try:
            msg = conn.recv()
        except (EOFError, OSError):
            return
        if msg is None:
            return
        try:
            if isinstance(msg, Run):
                _send(conn, (Outcome.OK.value, _run(predictors[msg.key], layouts[msg.key], msg)))
            elif isinstance(msg, Score):
                p = predictors[msg.key]
                out = run_packed(p, [p.encode(t, offsets=False) for t in msg.texts])
                probs = p.probabilities(out.logits).astype(np.float64)
                _send(conn, (Outcome.OK.value, (probs.shape[1], probs.tobytes())))
            elif isinstance(msg, Load):
                # The server ran the whole check on this folder (service/modelset/loader.py); the
                # files are re-hashed here, the graph check is not repeated.
                checked = open_bundle(Path(msg.bundle), check_onnx=False)
                p = Predictor.from_bundle(checked, threads=1, batch_size=msg.batch_size)
                warm_and_check(p, list(checked.manifest.labels))
                predictors[msg.key] = p
                layouts[msg.key] = Layout.of(len(checked.manifest.labels), checked.manifest.drift)
                _send(conn, (Outcome.OK.value, None))
            elif isinstance(msg, Held):
                _send(conn, (Outcome.OK.value, sorted(predictors)))
            elif isinstance(msg, Drop):
                layouts.pop(msg.key, None)
                if predictors.pop(msg.key, None) is not None:
                    release_freed_memory()
                _send(conn, (Outcome.OK.value, None))
            else:
                _send(conn, (Outcome.ERROR.value, f"unknown request {msg!r}"))
        except BundleError as exc:
            _send(conn, (Outcome.BUNDLE.value, exc.message))
        except Exception as exc:  # noqa: BLE001 - reported to the server, which decides
            _send(conn, (Outcome.ERROR.value, f"{type(exc).__name__}: {exc}"))


# A batch is put into a worker's pipe from the event loop only when it surely fits in the
# socket's buffer (Linux gives a Unix socket pair at least 200 KiB): a full pipe would block the
# loop until the worker drained it. Larger batches (long texts) are sent from a thread.
SEND_FROM_LOOP_MAX_BYTES = 64 * 1024
PIPELINE = 2  # batches in flight per worker process: one computing, the next waiting in its pipe


class _MessagePickler(ForkingPickler):
    """``ForkingPickler`` without the copy of copyreg's whole dispatch table each one makes (about a
    third of a batch's pickling on the event loop): a message holds nothing that needs its reducers."""

    def __init__(self, file: io.BytesIO) -> None:
        super(ForkingPickler, self).__init__(file)  # pickle.Pickler's own, at ForkingPickler.dumps' protocol


def pickled(msg: Message) -> bytes:
    """``msg`` as ``Connection.send`` would put it on the pipe, byte for byte."""
    buf = io.BytesIO()
    _MessagePickler(buf).dump(msg)
    return buf.getvalue()


def _value(status: Outcome | str, value: Any) -> Any:
    """A worker's reply as a value, or the error it stands for."""
    if status == Outcome.OK:
        return value
    if status == Outcome.BUNDLE:
        raise BundleError(value)
    raise UnavailableError(f"inference failed: {value}")


def _unpack(value: Any) -> RunReply:
    """A :class:`Run` reply as the batcher uses it: each text's JSON as an ``orjson.Fragment``, arrays from bytes."""
    replies, tokens, unknown, truncated, best, top, counts = value
    return (
        [orjson.Fragment(r) for r in replies],
        tokens,
        unknown,
        truncated,
        np.frombuffer(best, dtype=np.int32),
        np.frombuffer(top, dtype=np.float64),
        None if counts is None else np.frombuffer(counts, dtype=np.int64),
    )


def _copy_outcome(src: asyncio.Future[RunReply], dst: asyncio.Future[RunReply]) -> None:
    """When ``src`` ends, end ``dst`` the same way (unless it was cancelled meanwhile)."""

    def copy(f: asyncio.Future[RunReply]) -> None:
        if dst.done():
            return
        if f.cancelled():
            dst.cancel()
        elif (exc := f.exception()) is not None:
            dst.set_exception(exc)
        else:
            dst.set_result(f.result())

    src.add_done_callback(copy)


_context_lock = threading.Lock()
_context: Any = None


def _fork_context() -> Any:
    """A forkserver context whose server has the inference modules imported (one per process)."""
    global _context
    with _context_lock:
        if _context is None:
            _context = fork_server(
                [
                    "textsieve.service.inference.workers",
                    "textsieve.registry.runtime",
                    "textsieve.registry.drift",
                    "textsieve.service.inference.spans",
                    "textsieve.registry.spans",
                    "textsieve.service.inference.packing",
                    "textsieve.service.modelset.loader",
                    "onnxruntime",
                    "textsieve.registry.prewarm",
                ]
            )
        return _context


class _Died(Exception):
    """The worker process ended (or its pipe closed) before replying."""


class _Busy(Exception):
    """Another thread is putting a batch into the worker's pipe (``submit(..., wait=False)``)."""


Waiter = Future[tuple[Outcome, Any]] | asyncio.Future[tuple[Outcome, Any]]
# multiprocessing.Connection's framing: a 4-byte big-endian length, or -1 and an 8-byte length.
_SHORT = struct.Struct("!i")
_LONG = struct.Struct("!Q")
READ_BYTES = 256 * 1024


def _on_thread_of(loop: asyncio.AbstractEventLoop) -> bool:
    try:
        return asyncio.get_running_loop() is loop
    except RuntimeError:
        return False


class _Replies:
    """One pipe's replies, each handed to the oldest request still waiting on it (the worker
    answers in order). Whoever reads the pipe (the event loop, or a reader thread when there is
    none) feeds the bytes here; a reply may arrive in several reads, several in one."""

    def __init__(self, conn: multiprocessing.connection.Connection, lock: threading.Lock) -> None:
        self.conn = conn
        self.fd = conn.fileno()
        self.lock = lock  # the worker's send_lock: ``pending`` is appended to under it
        self.pending: deque[Waiter] = deque()
        self.closed = threading.Event()
        self.watched = False  # the event loop reads it (add_reader)
        self.by_thread = False  # a reader thread reads it
        self._buf = bytearray()

    def feed(self, data: bytes) -> None:
        buf = self._buf
        buf += data
        at = 0
        while len(buf) - at >= 4:
            (size,) = _SHORT.unpack_from(buf, at)
            head = 4
            if size == -1:
                if len(buf) - at < 12:
                    break
                (size,) = _LONG.unpack_from(buf, at + 4)
                head = 12
            end = at + head + size
            if len(buf) < end:
                break
            # The status crosses the pipe as a plain string: the server unpickles no class of ours.
            status, value = ForkingPickler.loads(bytes(buf[at + head : end]))
            at = end
            with self.lock:
                waiter = self.pending.popleft()
            if not waiter.done():
                waiter.set_result((Outcome(status), value))
        if at:
            del buf[:at]

    def close(self) -> None:
        """The pipe is done with: what still waits on it fails with _Died; closes the connection."""
        if self.closed.is_set():
            return
        self.closed.set()
        with self.lock:
            left = list(self.pending)
            self.pending.clear()
        for waiter in left:
            try:
                if not waiter.done():
                    waiter.set_exception(_Died())
            except RuntimeError:  # an event loop that has closed meanwhile: nobody waits any more
                pass
        self.conn.close()


@dataclass(eq=False)
class _Worker:
    """One worker process. Requests are pipelined: several callers may have one in its pipe at
    once (the worker answers in order), so it starts the next batch the moment it sends a reply
    instead of idling while the server hands out more work. With an event loop (the server's),
    the loop itself reads the pipe when it becomes readable (``add_reader``) and settles each
    reply's future there, so a reply reaches its requests without a thread hand-over (each one
    waits its turn for the GIL behind whatever the loop runs: bench/README.md); without one, a
    reader thread does."""

    index: int
    loop: asyncio.AbstractEventLoop | None = None
    scheduling: str = "normal"  # or "batch": SCHED_BATCH (see _place)
    proc: Any = None
    conn: multiprocessing.connection.Connection | None = None
    replies: _Replies | None = None
    generation: int = 0
    send_lock: threading.Lock = field(default_factory=threading.Lock)
    replace_lock: threading.Lock = field(default_factory=threading.Lock)
    loaded: dict[Key, Loaded] = field(default_factory=dict)
    reader: threading.Thread | None = None

    @property
    def pending(self) -> int:
        """Requests in the worker's pipe."""
        replies = self.replies
        return 0 if replies is None else len(replies.pending)

    def start(self, first: list[Message] | None = None) -> list[Future[tuple[Outcome, Any]]]:
        """Start the process; ``first`` goes into its pipe before any other caller can send to it
        (their futures are returned)."""
        ctx = _fork_context()
        parent, child = ctx.Pipe(duplex=True)
        proc = ctx.Process(target=_serve, args=(child,), name=f"textsieve-worker-{self.index}", daemon=True)
        proc.start()
        child.close()
        if self.scheduling != "normal":  # a new process starts under the normal policy
            _place(proc.pid, self.scheduling)
        replies = _Replies(parent, self.send_lock)
        waiters: list[Future[tuple[Outcome, Any]]] = []
        with self.send_lock:
            self.proc, self.conn, self.replies = proc, parent, replies
            self.generation += 1
            for msg in first or ():
                fut: Future[tuple[Outcome, Any]] = Future()
                replies.pending.append(fut)
                try:
                    parent.send(msg)
                except (OSError, ValueError):
                    replies.pending.remove(fut)
                    fut.set_exception(_Died())
                waiters.append(fut)
        if self.loop is None or not self._on_loop(self._watch, replies):
            replies.by_thread = True
            self.reader = threading.Thread(
                target=self._read, args=(replies,), name=f"textsieve-worker-{self.index}-replies", daemon=True
            )
            self.reader.start()
        return waiters

    def _on_loop(self, fn: Any, *args: Any) -> bool:
        """Run ``fn`` on the event loop: now when called on it, else as soon as it can; False when it has closed."""
        loop = self.loop
        assert loop is not None
        if _on_thread_of(loop):
            fn(*args)
            return True
        try:
            loop.call_soon_threadsafe(fn, *args)
        except RuntimeError:
            return False
        return True

    def _watch(self, replies: _Replies) -> None:  # on the loop
        if not replies.closed.is_set():
            assert self.loop is not None
            # uvloop's add_reader (the server's loop) makes the socket non-blocking (libuv's uv_poll_init
            # does, and libuv may report it readable when it is not); asyncio's leaves it blocking.
            # Reads and writes here work either way (_read_once, _write).
            self.loop.add_reader(replies.fd, self._readable, replies)
            replies.watched = True

    def _readable(self, replies: _Replies) -> None:  # on the loop, when the pipe has bytes (or is closed)
        if not self._read_once(replies):
            self._detach(replies)

    def _read_once(self, replies: _Replies) -> bool:
        """One read of the pipe (it blocks only when nothing is there yet); False once it is done with."""
        try:
            data = os.read(replies.fd, READ_BYTES)
        except (InterruptedError, BlockingIOError):  # a non-blocking pipe with nothing yet
            return True
        except OSError:
            return False
        if not data:
            return False
        try:
            replies.feed(data)
        except Exception as exc:  # noqa: BLE001 - a reply that cannot be read ends this pipe, not the server
            log.error("inference worker %s sent an unreadable reply: %s", self.index, exc)
            return False
        return True

    def _detach(self, replies: _Replies) -> None:  # on the loop (or once it has closed)
        if replies.closed.is_set():
            return
        if replies.watched and self.loop is not None:
            try:
                self.loop.remove_reader(replies.fd)
            except (RuntimeError, ValueError, OSError):
                pass  # the loop has closed: nothing is registered any more
        replies.close()

    def _read(self, replies: _Replies) -> None:
        """The reader thread, when there is no event loop: replies in order until the pipe closes."""
        try:
            while self._read_once(replies):
                pass
        finally:
            replies.close()

    def submit(
        self, msg: Message, payload: bytes | None = None, waiter: Waiter | None = None, *, wait: bool = True
    ) -> tuple[int, Waiter]:
        """Put ``msg`` in the worker's pipe (as ``payload`` when the caller has pickled it already);
        its reply settles ``waiter`` (a new thread-safe future unless given). With ``wait`` False it
        raises :class:`_Busy` rather than wait for another sender."""
        fut: Waiter = Future() if waiter is None else waiter
        if not self.send_lock.acquire(blocking=wait):
            raise _Busy()
        try:
            gen = self.generation
            replies = self.replies
            if self.conn is None or replies is None or replies.closed.is_set():
                raise _Died()
            replies.pending.append(fut)
            try:
                body = payload if payload is not None else bytes(ForkingPickler.dumps(msg))
                self._write(_SHORT.pack(len(body)) + body, replies, on_loop=not wait)
            except _Busy:
                replies.pending.remove(fut)
                raise
            except (OSError, ValueError) as exc:
                replies.pending.remove(fut)
                raise _Died() from exc
        finally:
            self.send_lock.release()
        return gen, fut

    def _write(self, message: bytes, replies: _Replies, *, on_loop: bool) -> None:
        """Write one framed message whole, the pipe blocking or not (uvloop makes it non-blocking).
        A full pipe is waited for: from a thread until the worker reads; on the event loop, which
        must never wait for a worker that may itself wait for the loop to read its reply, the
        message goes to a thread instead (:class:`_Busy`) when none of it was written, and otherwise
        the loop reads the worker's replies while it waits to write the rest."""
        assert self.conn is not None
        fd = self.conn.fileno()
        data = memoryview(message)
        while data:
            try:
                data = data[os.write(fd, data) :]
            except BlockingIOError:
                if on_loop and len(data) == len(message):
                    raise _Busy() from None
                readable, _, _ = select.select([fd] if on_loop else [], [fd], [])
                if readable and not self._read_once(replies):
                    raise _Died() from None

    def _wait(self, fut: Future[tuple[Outcome, Any]]) -> tuple[Outcome, Any]:
        """The reply to a blocking call. Called on the event loop's own thread (a test, a diagnostic),
        it reads the pipe itself: the loop cannot while it waits here."""
        replies = self.replies
        if self.loop is not None and replies is not None and not replies.by_thread and _on_thread_of(self.loop):
            while not fut.done() and not replies.closed.is_set():
                select.select([replies.fd], [], [])  # the pipe may be non-blocking (see _watch)
                if not self._read_once(replies):
                    self._detach(replies)
        return fut.result()

    def call(self, msg: Message, *, retry: bool) -> Any:
        """Send one request and wait for its reply; replace the worker if it died on the way."""
        for attempt in (1, 2):
            gen = self.generation
            try:
                gen, fut = self.submit(msg)
                assert isinstance(fut, Future)
                status, value = self._wait(fut)
            except _Died as exc:
                self._replace(gen)
                if retry and attempt == 1:
                    continue
                raise UnavailableError(
                    "an inference worker stopped while running this request; it has been replaced: retry"
                ) from exc
            return _value(status, value)
        raise AssertionError("unreachable")

    def _replace(self, gen: int) -> None:
        """Start a new worker and reload the versions the old one had; once per death."""
        with self.replace_lock:
            if self.generation != gen:
                return  # another thread has replaced it already
            code = self.proc.exitcode if self.proc is not None else None
            log.error("inference worker %s stopped (exit code %s); starting a new one", self.index, code)
            self.stop(timeout=0.5)
            # Every version it had goes into the new pipe before anyone else can send there: a batch
            # sent to the new worker while it reloads then waits behind its version's Load (the
            # worker answers in order) instead of reaching a process without it (KeyError, 503).
            items = list(self.loaded.items())
            try:
                waiters = self.start([Load(key, str(item.bundle), item.batch_size) for key, item in items])
            except Exception as exc:  # noqa: BLE001 - e.g. the fork server is gone; the next call tries again
                log.error("inference worker %s could not be restarted: %s", self.index, exc)
                raise UnavailableError(
                    f"inference worker {self.index} could not be restarted ({exc}); retry shortly"
                ) from exc
            for (key, _item), fut in zip(items, waiters, strict=True):
                try:
                    status, value = self._wait(fut)
                except _Died:
                    status, value = Outcome.ERROR, "the new worker stopped too"
                if status != Outcome.OK:
                    log.error("inference worker %s: reloading %s v%s failed: %s", self.index, key[0], key[1], value)
                    self.loaded.pop(key, None)

    def stop(self, timeout: float = 5.0) -> None:
        """Ask the worker to end (it finishes what is in its pipe first), then make sure it has; the
        replies it sent before ending still reach their requests."""
        with self.send_lock:
            conn, self.conn = self.conn, None
            if conn is not None:
                try:
                    conn.send(None)
                except (OSError, ValueError):
                    pass
        if self.proc is not None:
            self.proc.join(timeout)
            if self.proc.is_alive():
                self.proc.kill()
                self.proc.join(timeout)
            self.proc = None
        replies = self.replies
        if self.reader is not None:
            self.reader.join(timeout)  # it sees the pipe close, fails what was left, closes it
            self.reader = None
        elif replies is not None and not replies.by_thread and self.loop is not None:
            if _on_thread_of(self.loop):  # the process has ended: read what it left, up to the end
                while self._read_once(replies):
                    pass
                self._detach(replies)
            elif not self.loop.is_running():  # no loop will read it (stopped before the shutdown ran)
                replies.close()
            elif not replies.closed.wait(timeout):  # the loop reads up to the end and closes it
                if not self._on_loop(self._detach, replies):
                    replies.close()  # the loop has closed


class WorkerProcesses:
    """``count`` worker processes; inference thread i talks to worker ``i % count``."""

    def __init__(
        self, count: int, loop: asyncio.AbstractEventLoop | None = None, *, scheduling: str = "normal"
    ) -> None:
        """``loop``: the event loop that reads the workers' replies (without one, a thread per worker does);
        ``scheduling``: "batch" runs the workers under SCHED_BATCH (:func:`_place`),
        "normal" and "adaptive" start them under the normal policy (:meth:`set_scheduling` moves them)."""
        self.workers = [_Worker(i, loop, "normal" if scheduling == "adaptive" else scheduling) for i in range(count)]
        # True: a batch goes to the first worker with a free place in its pipeline, the others only
        # taking what it cannot (set by the pool while its event loop is busy: InferencePool._adapt);
        # False: to the least busy worker.
        self.gather = False
        self._started = False
        self._start_lock = threading.Lock()
        self._loads = itertools.count(1)
        if threading.current_thread() is threading.main_thread():
            # The fork server is started here, where it can be started with SIGINT ignored (a Ctrl-C
            # during its imports printed their traceback: textsieve/forking.py); the workers come on
            # the first load, off the event loop. Its imports overlap the registry's meanwhile.
            try:
                _fork_context()
            except Exception:  # noqa: BLE001, S110 - _ensure_started tries again and says what failed
                pass

    def _ensure_started(self) -> None:
        # Started on the first load (off the event loop), not in the constructor.
        with self._start_lock:
            if not self._started:
                try:
                    for w in self.workers:
                        if w.proc is None:
                            w.start()
                except Exception as exc:  # noqa: BLE001 - e.g. no writable temp folder for the fork server
                    raise UnavailableError(
                        f"cannot start inference worker processes ({type(exc).__name__}: {exc}); "
                        "fix that, or set TEXTSIEVE_INFERENCE=threads to run inference in the server process"
                    ) from exc
                self._started = True
                # Workers ignore SIGTERM (a signal to the process group must not cut a batch), so
                # multiprocessing's exit hook, which terminates daemon children and then joins
                # them, would wait for ever on a server stopped before its shutdown ran (a SIGTERM
                # while it was still loading models). This hook runs first and stops them.
                atexit.register(self.shutdown)

    def set_scheduling(self, policy: str) -> None:
        """Put every running worker (and any that replaces one) under ``policy``: "normal" or "batch"."""
        for w in self.workers:
            w.scheduling = policy
            proc = w.proc
            if proc is not None and proc.pid is not None:
                _place(proc.pid, policy)

    def new_key(self, name: str, version: int) -> Key:
        return (name, version, next(self._loads))

    def load(self, key: Key, bundle: Path, batch_size: int) -> None:
        """Blocking: load and warm ``key`` in every worker; on failure none keeps it."""
        self._ensure_started()
        item = Loaded(Path(bundle), batch_size)
        done: list[_Worker] = []
        try:
            for w in self.workers:
                # Booked before it is sent: if the worker dies once it has loaded and another caller
                # replaces it before this returns, the replacement loads this version too. Booked after,
                # the new process never had it while batches were sent there (KeyError, 503). No batch
                # can name the key before this load returns, so booking it early sends none too soon.
                w.loaded[key] = item
                done.append(w)
                w.call(Load(key, str(item.bundle), batch_size), retry=True)
        except BaseException:
            for w in done:
                self._drop_one(w, key)
            raise

    def drop(self, key: Key) -> None:
        for w in self.workers:
            self._drop_one(w, key)

    def _drop_one(self, w: _Worker, key: Key) -> None:
        if w.loaded.pop(key, None) is None:
            return
        try:
            w.call(Drop(key), retry=False)
        except UnavailableError:
            pass  # a worker that died has nothing left to free

    def run(
        self,
        index: int,
        key: Key,
        texts: list[str],
        ks: list[int],
        review: float | None = None,
        *,
        drift: bool = False,
    ) -> RunReply:
        """Reply per text as an ``orjson.Fragment`` (JSON made by the worker), batch counts, each
        text's label index and probability, and (with ``drift``) the batch's drift counts. Results
        whose top probability is below ``review`` are marked needs_review."""
        return _unpack(self._worker(index, key).call(Run(key, texts, ks, review, drift), retry=True))

    def run_async(
        self,
        key: Key,
        texts: list[str],
        ks: list[int],
        review: float | None,
        *,
        drift: bool,
        executor: Executor,
    ) -> asyncio.Future[RunReply]:
        """:meth:`run` from the event loop, with no thread in between: the batch goes into the least
        busy worker's pipe from here (with :attr:`gather`, the first one with room in its pipeline),
        and the loop reads the reply off the pipe. Each hand-over
        between threads waits its turn for the GIL behind whatever the loop is running, so the
        threaded path's three per batch cost single-text requests most of their latency
        (bench/README.md). A batch too large to be sure of fitting in
        the pipe, and the retry after a worker died, run on ``executor`` instead (both block)."""
        loop = asyncio.get_running_loop()
        msg = Run(key, texts, ks, review, drift)
        holding = self._holding(key)
        first_free = next((h for h in holding if h.pending < PIPELINE), None) if self.gather else None
        w = first_free if first_free is not None else min(holding, key=lambda w: w.pending)
        payload = pickled(msg)
        if len(payload) > SEND_FROM_LOOP_MAX_BYTES:
            return loop.run_in_executor(executor, lambda: _unpack(w.call(msg, retry=True)))
        # With the loop reading the pipe, the reply settles an asyncio future right here on the loop.
        waiter: Waiter | None = loop.create_future() if w.loop is loop else None
        try:
            # Never wait on the loop for a thread that is putting a large batch into this pipe: the
            # pipe may be full until the worker reads, and the worker may wait for the loop to read
            # its reply first. The batch goes from a thread too, behind that one.
            gen, fut = w.submit(msg, payload, waiter, wait=False)
        except _Busy:
            return loop.run_in_executor(executor, lambda: _unpack(w.call(msg, retry=True)))
        except _Died:  # the worker was already gone: replace it and run the batch there
            return loop.run_in_executor(executor, self._run_again, w, w.generation, msg)
        result: asyncio.Future[RunReply] = loop.create_future()

        def settle(f: Waiter) -> None:  # on the loop
            if result.done():
                return
            exc = f.exception()
            if isinstance(exc, _Died):  # as call(): replace the worker, try once more on the new one
                _copy_outcome(loop.run_in_executor(executor, self._run_again, w, gen, msg), result)
                return
            try:
                if exc is not None:
                    raise exc
                result.set_result(_unpack(_value(*f.result())))
            except Exception as error:  # noqa: BLE001 - whatever it is, the batch's requests get it, never hang
                result.set_exception(error)

        if waiter is not None:
            waiter.add_done_callback(settle)
        else:  # a reader thread settles it
            fut.add_done_callback(lambda f: loop.call_soon_threadsafe(settle, f))
        return result

    def _run_again(self, w: _Worker, gen: int, msg: Run) -> RunReply:
        """Blocking: replace worker ``w`` (dead since generation ``gen``) and run ``msg`` on it once more."""
        w._replace(gen)
        return _unpack(w.call(msg, retry=False))

    def score(self, index: int, key: Key, texts: list[str]) -> Any:
        """Calibrated probabilities of ``texts`` (rows in order, columns in the version's label order)."""
        columns, raw = self._worker(index, key).call(Score(key, texts), retry=True)
        return np.frombuffer(raw, dtype=np.float64).reshape(-1, columns)

    def _worker(self, index: int, key: Key) -> _Worker:
        w = self.workers[index % len(self.workers)]
        if key not in w.loaded:
            raise UnavailableError(f"model {key[0]} version {key[1]} is not loaded in inference worker {index}")
        return w

    def _holding(self, key: Key) -> list[_Worker]:
        held = [w for w in self.workers if key in w.loaded]
        if not held:
            raise UnavailableError(f"model {key[0]} version {key[1]} is not loaded in any inference worker")
        return held

    def held(self) -> list[list[Key]]:
        """What each worker process itself says it has loaded (for tests and diagnostics)."""
        return [list(map(tuple, w.call(Held(), retry=False))) for w in self.workers]

    def holds(self, key: Key) -> bool:
        """Whether every worker has ``key`` loaded."""
        return all(key in w.loaded for w in self.workers)

    def pids(self) -> list[int]:
        return [pid for _, pid in self.processes()]

    def processes(self) -> list[tuple[int, int]]:
        """(index, pid) of each running worker process (the metrics page reads their /proc)."""
        out = []
        for w in self.workers:
            proc = w.proc  # read once: a replacement may swap it meanwhile
            if proc is not None and proc.pid is not None:
                out.append((w.index, int(proc.pid)))
        return out

    def shutdown(self) -> None:
        atexit.unregister(self.shutdown)
        for w in self.workers:
            with w.replace_lock:
                w.stop()
        self._started = False


__all__ = ["Drop", "Held", "Load", "Message", "Outcome", "Run", "WorkerProcesses"]
