"""textsieve.service: the HTTP prediction service (FastAPI, no torch).

Public surface: :func:`create_app` and :class:`Settings`. They are imported lazily so that the
``predict``/``health`` clients need only httpx.
"""

from __future__ import annotations

from typing import TYPE_CHECKING, Any

if TYPE_CHECKING:
    from textsieve.service.settings import Settings
    from textsieve.service.web.app import create_app

__all__ = ["Settings", "create_app"]


def __getattr__(name: str) -> Any:
    if name == "create_app":
        from textsieve.service.web.app import create_app

        return create_app
    if name == "Settings":
        from textsieve.service.settings import Settings

        return Settings
    raise AttributeError(f"module 'textsieve.service' has no attribute {name!r}")
