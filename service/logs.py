"""Structured logging: one JSON object per line on stderr.

Lines are written by a background thread in batches (every ``FLUSH_SECONDS``, or at once for
warnings and errors, and on exit) instead of one write and flush per record: under load the
access log is one line per request, and writing each one from the event loop cost about a
quarter of that thread's time in the benchmark. A process killed with SIGKILL loses at most
the last ``FLUSH_SECONDS`` of lines.
"""

from __future__ import annotations

import atexit
import logging
import math
import sys
import threading
import time
from typing import Any, TextIO

import orjson

ACCESS = "textsieve.access"


# The last whole second formatted, and its text: every line of a busy second shares it.
_second: tuple[int, str] = (-1, "")


def timestamp(created: float) -> str:
    """``created`` (seconds since the epoch) as ``datetime.fromtimestamp(created, UTC)
    .isoformat(timespec="milliseconds")`` writes it, e.g. ``2026-12-03T15:36:24.883+00:00``.

    Made by hand because the log writer makes one per line, one per request under load: the
    datetime object and its UTC offset's formatting cost ~3 µs of interpreter time a line (the
    writer holds the GIL meanwhile), this ~0.6. Microseconds are rounded half to even, as
    ``datetime.fromtimestamp`` rounds them, and milliseconds truncated, as ``isoformat`` does;
    tests/service/test_observability.py compares the two on random and boundary times."""
    global _second
    frac, whole = math.modf(created)
    micros = round(frac * 1e6)
    sec = int(whole)
    if micros >= 1_000_000:
        sec, micros = sec + 1, micros - 1_000_000
    elif micros < 0:  # before 1970 (modf keeps the sign)
        sec, micros = sec - 1, micros + 1_000_000
    cached = _second
    if cached[0] != sec:
        cached = _second = (sec, time.strftime("%Y-%m-%dT%H:%M:%S", time.gmtime(sec)))
    return cached[1] + _MILLIS[micros // 1000]


# ".000+00:00" to ".999+00:00": formatting the milliseconds with "{:03d}" cost ~850 instructions a line.
_MILLIS = tuple(f".{ms:03d}+00:00" for ms in range(1000))
_HEAD_KEYS = frozenset({"ts", "level", "logger"})
_info_prefixes: dict[str, tuple[bytes, bytes]] = {}


def _head(created: float, level: str, name: str) -> dict[str, Any]:
    return {"ts": timestamp(created), "level": level, "logger": name}


def fields_line(created: float, name: str, fields: dict[str, Any]) -> str:
    """The line :class:`JsonFormatter` makes of an INFO record of logger ``name`` carrying ``fields``.

    The writer thread makes one per request under load, holding the GIL. Merging the head into a
    new dict and encoding that (``orjson.dumps(_head(...) | fields)``) cost ~5,000 instructions a
    line, a quarter of them the merge; the head's bytes are joined to the fields' encoding instead,
    which gives the same line when no field shares a head's key (else the merge is made as before).
    """
    if not fields or not fields.keys().isdisjoint(_HEAD_KEYS):
        return orjson.dumps(_head(created, "info", name) | fields, default=str).decode()
    prefix = _info_prefixes.get(name)
    if prefix is None:  # b'{"ts":"' and b'","level":"info","logger":"NAME",' (NAME as orjson escapes it)
        prefix = _info_prefixes.setdefault(
            name, (b'{"ts":"', b'","level":"info","logger":' + orjson.dumps(name) + b",")
        )
    # The timestamp is digits and "-T:.+": nothing in it that JSON escapes.
    return (prefix[0] + timestamp(created).encode() + prefix[1] + orjson.dumps(fields, default=str)[1:]).decode()


def _fields_line_or_note(created: float, name: str, fields: dict[str, Any]) -> str:
    try:
        return fields_line(created, name, fields)
    except Exception as exc:  # noqa: BLE001 - logging must never stop the writer
        return fields_line(created, name, {"event": "unwritable", "error": f"{type(exc).__name__}: {exc}"})


class JsonFormatter(logging.Formatter):
    def format(self, record: logging.LogRecord) -> str:
        entry = _head(record.created, record.levelname.lower(), record.name)
        fields = getattr(record, "fields", None)
        if isinstance(fields, dict):
            entry.update(fields)
        else:
            entry["message"] = record.getMessage()
        if record.exc_info:
            entry["error"] = self.formatException(record.exc_info)
        return orjson.dumps(entry, default=str).decode()


FLUSH_SECONDS = 0.2


class BatchedLineHandler(logging.Handler):
    """Formats on the caller's thread, writes from its own thread in batches."""

    def __init__(self, stream: TextIO, flush_seconds: float = FLUSH_SECONDS) -> None:
        super().__init__()
        self.stream = stream
        self.flush_seconds = flush_seconds
        # Lines, or (time, logger name, fields) to be made into lines by the writer thread.
        self._pending: list[str | tuple[float, str, dict[str, Any]]] = []
        self._write_lock = threading.Lock()
        self._wake = threading.Event()
        self._closed = False
        self._thread = threading.Thread(target=self._run, name="textsieve-log", daemon=True)
        self._thread.start()
        atexit.register(self.flush)

    def emit(self, record: logging.LogRecord) -> None:
        try:
            line = self.format(record)
        except Exception:  # noqa: BLE001 - logging must never break a request
            self.handleError(record)
            return
        self._pending.append(line)  # under self.lock: Handler.handle holds it around emit
        if record.levelno >= logging.WARNING:
            self._wake.set()

    def add_fields(self, name: str, fields: dict[str, Any]) -> None:
        """An INFO line of logger ``name`` carrying ``fields``, made and written by the writer thread:
        what ``logging.getLogger(name).info(..., extra={"fields": fields})`` would write, without a
        LogRecord (nor the caller's stack frame it looks up) made on the caller's thread. The access
        log takes this path for every request (see :func:`line_handler`)."""
        self._pending.append((time.time(), name, fields))  # one append: atomic, as flush swaps the list

    def _run(self) -> None:
        while not self._closed:
            self._wake.wait(self.flush_seconds)
            self._wake.clear()
            self.flush()

    def flush(self) -> None:
        with self._write_lock:
            with self.lock:  # type: ignore[union-attr]
                pending, self._pending = self._pending, []
            if not pending:
                return
            lines = [p if isinstance(p, str) else _fields_line_or_note(*p) for p in pending]
            try:
                self.stream.write("\n".join(lines) + "\n")
                self.stream.flush()
            except (OSError, ValueError):  # stderr closed or gone: nothing left to tell
                pass

    def close(self) -> None:
        self._closed = True
        self._wake.set()
        self.flush()
        super().close()


def line_handler(logger: logging.Logger) -> BatchedLineHandler | None:
    """The handler that an INFO record of ``logger`` would reach, when that is one
    :class:`BatchedLineHandler` with the :class:`JsonFormatter` and nothing filters on the way (as
    :func:`configure` sets things up): the caller may then hand it fields (``add_fields``) instead
    of logging a record. None otherwise (another handler, a filter, a level that drops INFO, a
    test's log capture), and the caller logs as usual."""
    if logger.disabled or logger.filters or not logger.isEnabledFor(logging.INFO):
        return None
    found: BatchedLineHandler | None = None
    node: logging.Logger | None = logger
    while node is not None:
        for h in node.handlers:
            if (
                found is not None
                or not isinstance(h, BatchedLineHandler)
                or type(h.formatter) is not JsonFormatter
                or h.filters
                or h.level > logging.INFO
            ):
                return None
            found = h
        if not node.propagate:
            break
        node = node.parent
    return found


def configure(level: str = "INFO") -> None:
    """Route textsieve's and uvicorn's loggers to stderr as JSON lines (used by ``serve``)."""
    handler = BatchedLineHandler(sys.stderr)
    handler.setFormatter(JsonFormatter())
    for name in ("textsieve", "uvicorn", "uvicorn.error"):
        logger = logging.getLogger(name)
        logger.handlers[:] = [handler]
        logger.setLevel(level)
        logger.propagate = False


__all__ = ["ACCESS", "BatchedLineHandler", "FLUSH_SECONDS", "JsonFormatter", "configure", "fields_line", "line_handler"]
