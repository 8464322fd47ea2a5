"""Progress of a long run on stderr: a bar redrawn in place on a terminal, a plain line every
``every`` seconds otherwise (logs and CI keep every line, so redrawing would only fill them)."""

from __future__ import annotations

import sys
import time
from collections.abc import Callable
from typing import TextIO

BAR = 24


def _clock(seconds: float) -> str:
    s = int(seconds)
    return f"{s // 3600}:{s // 60 % 60:02d}:{s % 60:02d}"


class Progress:
    def __init__(
        self,
        what: str,
        *,
        fraction: Callable[[], float | None],
        stream: TextIO | None = None,
        every: float = 10.0,
        start_count: int = 0,
    ) -> None:
        self.what = what
        self.fraction = fraction
        self.stream = stream or sys.stderr
        self.tty = self.stream.isatty()
        self.every = 0.2 if self.tty else every
        self.started = time.monotonic()
        self.start_count = start_count
        self.count = start_count
        self._last = self.started
        self._drawn = False

    def rate(self) -> float:
        elapsed = time.monotonic() - self.started
        return (self.count - self.start_count) / elapsed if elapsed > 0 else 0.0

    def update(self, count: int, *, force: bool = False) -> None:
        self.count = count
        now = time.monotonic()
        if not force and now - self._last < self.every:
            return
        self._last = now
        line = self.line(now)
        if self.tty:
            self.stream.write("\r" + line + "\033[K")
            self._drawn = True
        else:
            self.stream.write(line + "\n")
        self.stream.flush()

    def line(self, now: float) -> str:
        frac = self.fraction()
        rate = self.rate()
        head = f"{self.what}: {self.count:,} texts, {rate:,.0f} texts/s"
        if frac is None or frac <= 0:
            return head
        elapsed = now - self.started
        # Rows done in this run over the share of the input read in this run: resumed runs start part-way.
        eta = elapsed * (1 - frac) / frac if self.start_count == 0 else None
        if self.tty:
            filled = int(BAR * min(frac, 1.0))
            head = f"[{'#' * filled}{'.' * (BAR - filled)}] {frac:4.0%} " + head
        else:
            head += f", {frac:.0%} of the input"
        return head + (f", ETA {_clock(eta)}" if eta is not None else "")

    def close(self) -> None:
        if self.tty and self._drawn:
            self.stream.write("\n")
            self.stream.flush()


__all__ = ["Progress"]
