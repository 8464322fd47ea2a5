"""The registry as the service uses it: every call on one dedicated thread.

SQLite connections belong to the thread that opened them, and registry calls block, so the
registry is opened and used on a single worker thread and awaited from the event loop.
"""

from __future__ import annotations

import asyncio
import functools
from collections.abc import Callable
from concurrent.futures import ThreadPoolExecutor
from typing import Any, TypeVar

from textsieve.errors import UnavailableError
from textsieve.service.settings import public_location

T = TypeVar("T")


class RegistryThread:
    def __init__(self, location: str, blobs: str | None = None) -> None:
        self.location = location
        self.label = public_location(location)  # for messages: no database password
        self.blobs = blobs
        self._executor = ThreadPoolExecutor(1, thread_name_prefix="textsieve-registry")
        self._registry: Any = None

    def _open(self) -> Any:
        from textsieve.registry.api import open_registry

        # create=False: a mistyped registry path is reported instead of becoming a new, empty registry.
        return open_registry(self.location, blobs=self.blobs, create=False)

    async def _call(self, fn: Callable[..., T], *args: Any, **kwargs: Any) -> T:
        loop = asyncio.get_running_loop()
        return await loop.run_in_executor(self._executor, functools.partial(fn, *args, **kwargs))

    async def open(self) -> None:
        if self._registry is None:
            self._registry = await self._call(self._open)

    @property
    def is_open(self) -> bool:
        return self._registry is not None

    @property
    def registry(self) -> Any:
        if self._registry is None:
            raise UnavailableError(f"the registry at {self.label} is not open yet")
        return self._registry

    async def call(self, method: str, *args: Any, **kwargs: Any) -> Any:
        """``registry.<method>(*args, **kwargs)`` on the registry thread."""
        return await self._call(getattr(self.registry, method), *args, **kwargs)

    async def close(self) -> None:
        if self._registry is not None:
            reg, self._registry = self._registry, None
            await self._call(reg.close)
        self._executor.shutdown(wait=True)


__all__ = ["RegistryThread"]
