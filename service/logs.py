"""Structured logging: one JSON object per line on stderr.

Lines are written by a background thread in batches (every ``FLUSH_SECONDS``, or at once for
warnings and errors, and on exit) instead of one write and flush per record: under load the
access log is one line per request, and writing each one from the event loop cost about a
quarter of that thread's time in the benchmark. A process killed with SIGKILL loses at most
the last ``FLUSH_SECONDS`` of lines.
"""

from __future__ import annotations

import atexit
import datetime as dt
import logging
import sys
import threading
from typing import Any, TextIO

import orjson

ACCESS = "textsieve.access"


class JsonFormatter(logging.Formatter):
    def format(self, record: logging.LogRecord) -> str:
        entry: dict[str, Any] = {
            "ts": dt.datetime.fromtimestamp(record.created, dt.UTC).isoformat(timespec="milliseconds"),
            "level": record.levelname.lower(),
            "logger": record.name,
        }
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
        self._pending: list[str] = []
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

    def _run(self) -> None:
        while not self._closed:
            self._wake.wait(self.flush_seconds)
            self._wake.clear()
            self.flush()

    def flush(self) -> None:
        with self._write_lock:
            with self.lock:  # type: ignore[union-attr]
                lines, self._pending = self._pending, []
            if not lines:
                return
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


def configure(level: str = "INFO") -> None:
    """Route textsieve's and uvicorn's loggers to stderr as JSON lines (used by ``serve``)."""
    handler = BatchedLineHandler(sys.stderr)
    handler.setFormatter(JsonFormatter())
    for name in ("textsieve", "uvicorn", "uvicorn.error"):
        logger = logging.getLogger(name)
        logger.handlers[:] = [handler]
        logger.setLevel(level)
        logger.propagate = False


__all__ = ["ACCESS", "BatchedLineHandler", "FLUSH_SECONDS", "JsonFormatter", "configure"]
