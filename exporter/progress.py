"""Progress on stderr: a bar while the data is read, tokenized, split and encoded and while an epoch
runs (terminals only), one summary line after each."""

from __future__ import annotations

import sys
from collections.abc import Callable, Iterable, Iterator
from types import TracebackType
from typing import IO, Any, TypeVar

T = TypeVar("T")


def bar_wanted(quiet: bool, stream: IO[str] | None = None) -> bool:
    """A bar only helps a person watching a terminal; logs and pipes get the summary lines."""
    stream = stream or sys.stderr
    return not quiet and hasattr(stream, "isatty") and stream.isatty()


class Progress:
    """A bar over ``total`` steps, or nothing at all when ``enabled`` is false."""

    def __init__(self, total: int, description: str, *, enabled: bool, unit: str = "batch") -> None:
        self._bar: Any = None
        if enabled:
            from tqdm import tqdm

            # Bytes read as kB/MB/GB; counts (batches, texts) as they are.
            self._bar = tqdm(
                total=total,
                desc=description,
                file=sys.stderr,
                leave=False,
                unit=unit,
                unit_scale=unit == "B",
                unit_divisor=1000,
                dynamic_ncols=True,
            )

    def advance(self, steps: int = 1, **postfix: float) -> None:
        if self._bar is not None:
            if postfix:
                self._bar.set_postfix({k: f"{v:.3f}" for k, v in postfix.items()}, refresh=False)
            self._bar.update(steps)

    def tally(self, items: Iterable[T], size: Callable[[T], int] | None = None, step: int = 4096) -> Iterable[T]:
        """``items``, the bar advancing by each one's ``size`` (1 by default) every ``step`` of it.

        With no bar, ``items`` itself: a loop over 360,000 rows pays nothing when nobody watches."""
        if self._bar is None:
            return items
        return self._tallied(items, size, step)

    def _tallied(self, items: Iterable[T], size: Callable[[T], int] | None, step: int) -> Iterator[T]:
        pending = 0
        for item in items:
            yield item
            pending += 1 if size is None else size(item)
            if pending >= step:
                self.advance(pending)
                pending = 0
        self.advance(pending)

    def close(self) -> None:
        if self._bar is not None:
            self._bar.close()
            self._bar = None

    def __enter__(self) -> Progress:
        return self

    def __exit__(self, kind: type[BaseException] | None, exc: BaseException | None, tb: TracebackType | None) -> None:
        self.close()


def say(line: str) -> None:
    """One line of status on stderr, so stdout stays for the command's result."""
    print(line, file=sys.stderr, flush=True)


__all__ = ["Progress", "bar_wanted", "say"]
