"""Structured logging: one JSON object per line on stderr."""

from __future__ import annotations

import datetime as dt
import logging
import sys
from typing import Any

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


def configure(level: str = "INFO") -> None:
    """Route textsieve's and uvicorn's loggers to stderr as JSON lines (used by ``serve``)."""
    handler = logging.StreamHandler(sys.stderr)
    handler.setFormatter(JsonFormatter())
    for name in ("textsieve", "uvicorn", "uvicorn.error"):
        logger = logging.getLogger(name)
        logger.handlers[:] = [handler]
        logger.setLevel(level)
        logger.propagate = False


__all__ = ["ACCESS", "JsonFormatter", "configure"]
