"""Where the registry and the service are, when a verb's flag does not say: the ``TEXTSIEVE_*`` variables
that verbs outside the service read.

The service's own knobs are pydantic settings (``service/settings.py``), which use the rules below for
the two they share (``TEXTSIEVE_REGISTRY``, ``TEXTSIEVE_BLOBS``). Everything else reads them here, in
the verb that needs them and not while the command line is parsed, so a bad value in a variable that a
verb does not use cannot stop it, and one that it does use stops it with one line naming the variable
and what it may hold (an :class:`InputError`: exit status 2), never with a traceback.

A flag wins over its variable and is passed through as given: the code that uses it reports a bad one
in its own words (``textsieve health --url x`` is "not ready", exit 1, as a probe should be).
"""

from __future__ import annotations

import os
from collections.abc import Callable, Mapping
from dataclasses import dataclass
from typing import TypeVar
from urllib.parse import urlsplit

from textsieve.errors import InputError

DEFAULT_REGISTRY = "./textsieve-registry"
DEFAULT_URL = "http://127.0.0.1:8000"
POSTGRES_SCHEMES = ("postgresql://", "postgres://")
URL_SCHEMES = ("http", "https")

T = TypeVar("T")


# -- rules: each raises ValueError saying what is allowed ---------------------------------------
def check_registry(value: str) -> str:
    """A registry location: a folder path or a ``postgresql://`` URL."""
    if not value.strip():
        raise ValueError("empty; give a registry folder or a postgresql:// URL, or unset it")
    if "://" in value and not value.startswith(POSTGRES_SCHEMES):
        raise ValueError(f"{value.split('://')[0]}:// is not a registry; give a folder or a postgresql:// URL")
    return value


def check_blobs(value: str) -> str:
    """A blob folder (only used with a ``postgresql://`` registry)."""
    if not value.strip():
        raise ValueError("empty; give the blob folder of a postgresql:// registry, or unset it")
    return value


def check_url(value: str) -> str:
    """The address of a running service: ``http://`` or ``https://`` with a host."""
    parts = urlsplit(value)
    if parts.scheme not in URL_SCHEMES or not parts.netloc:
        raise ValueError(f"not an http:// or https:// address with a host, e.g. {DEFAULT_URL}")
    try:
        parts.port  # noqa: B018 - urllib checks the port (a number from 0 to 65535) when it is read
    except ValueError:
        raise ValueError(f"the port is not a number from 1 to 65535, e.g. {DEFAULT_URL}") from None
    return value


# -- resolution ---------------------------------------------------------------------------------
@dataclass(frozen=True)
class RegistryLocation:
    """Where a verb finds the registry: a folder or a ``postgresql://`` URL, and its blob folder."""

    registry: str
    blobs: str | None


def registry_location(
    registry: str | None = None, blobs: str | None = None, *, environ: Mapping[str, str] | None = None
) -> RegistryLocation:
    """``--registry``/``--blobs`` if given, else ``TEXTSIEVE_REGISTRY``/``TEXTSIEVE_BLOBS``, else the defaults."""
    env = os.environ if environ is None else environ
    if registry is None:
        registry = variable("TEXTSIEVE_REGISTRY", check_registry, env) or DEFAULT_REGISTRY
    if blobs is None:
        blobs = variable("TEXTSIEVE_BLOBS", check_blobs, env)
    return RegistryLocation(registry, blobs)


def service_url(url: str | None = None, *, environ: Mapping[str, str] | None = None) -> str:
    """``--url`` if given, else ``TEXTSIEVE_URL``, else the service's default address."""
    if url is not None:
        return url
    return variable("TEXTSIEVE_URL", check_url, os.environ if environ is None else environ) or DEFAULT_URL


def variable(name: str, check: Callable[[str], T], environ: Mapping[str, str]) -> T | None:
    """The checked value of one environment variable, None when it is unset."""
    if name not in environ:
        return None
    raw = environ[name]
    try:
        return check(raw)
    except ValueError as exc:
        # Named, not echoed: a registry URL or a service address can carry a password.
        raise InputError(f"{name}: {exc}") from exc


__all__ = [
    "DEFAULT_REGISTRY",
    "DEFAULT_URL",
    "POSTGRES_SCHEMES",
    "RegistryLocation",
    "check_blobs",
    "check_registry",
    "check_url",
    "registry_location",
    "service_url",
    "variable",
]
