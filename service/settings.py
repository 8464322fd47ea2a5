"""Service settings: ``TEXTSIEVE_*`` environment variables, overridden by CLI flags or arguments.

Built only inside :func:`textsieve.service.web.app.create_app` or the ``serve`` verb, never at import,
so tests construct their own.
"""

from __future__ import annotations

import os
import re
from collections.abc import Mapping
from pathlib import Path
from typing import Annotated, Any, Literal

from pydantic import Field, SecretStr, ValidationInfo, field_validator, model_validator
from pydantic_settings import BaseSettings, NoDecode, SettingsConfigDict

from textsieve.environment import DEFAULT_REGISTRY, POSTGRES_SCHEMES, check_blobs, check_registry
from textsieve.texts import MAX_SPANS

MIN_TOKEN_CHARS = 16


MIB = 1024 * 1024


def memory_bytes() -> int:
    """Memory this process may use: the cgroup v2 limit when one is set (containers), else physical RAM."""
    physical = os.sysconf("SC_PHYS_PAGES") * os.sysconf("SC_PAGE_SIZE")
    try:
        text = Path("/sys/fs/cgroup/memory.max").read_text(encoding="ascii").strip()
    except OSError:
        return int(physical)
    return min(int(physical), int(text)) if text.isdigit() else int(physical)


def _body_budget() -> int:
    # 1/128 of memory for request bodies in flight, between 16 and 256 MiB: 24 GiB gives 192 MiB.
    return max(16 * MIB, min(256 * MIB, memory_bytes() // 128))


def _max_connections() -> int:
    # An open connection holds up to ~64 KiB of unread body in the server (uvicorn's flow-control
    # high-water mark) plus its socket buffers: one per 16 MiB of memory keeps that under 1/200 of
    # memory (24 GiB: 1536 connections), between 64 and 4096, and below the open-file limit.
    import resource

    soft, _ = resource.getrlimit(resource.RLIMIT_NOFILE)
    by_memory = max(64, min(4096, memory_bytes() // (16 * MIB)))
    return max(16, min(by_memory, soft - 64)) if soft > 0 else by_memory


def _cores() -> int:
    return max(1, len(os.sched_getaffinity(0)) if hasattr(os, "sched_getaffinity") else (os.cpu_count() or 1))


_B64TOKEN = re.compile(r"[A-Za-z0-9\-._~+/]+=*")


class Settings(BaseSettings):
    """Every knob of the prediction service; each maps to ``TEXTSIEVE_<NAME>``."""

    model_config = SettingsConfigDict(env_prefix="TEXTSIEVE_", extra="forbid", validate_default=True)

    registry: str = Field(DEFAULT_REGISTRY, description="registry folder or postgresql:// URL")
    blobs: str | None = Field(
        None,
        description="blob folder: required with a postgresql:// registry; a folder registry uses REGISTRY/blobs "
        "unless it is set",
    )
    host: str = "127.0.0.1"
    port: int = Field(8000, ge=0, le=65535)
    models: Annotated[list[str], NoDecode] = Field(
        default_factory=list, description="models to serve (comma-separated); empty: every model with a live version"
    )

    workers: int = Field(
        default_factory=_cores,
        ge=1,
        le=256,
        description="inference workers (default: one per core), each with one single-thread "
        "onnxruntime session per served version",
    )
    inference: Literal["processes", "threads"] = Field(
        "processes",
        description="where workers run: processes (tokenizing and spans outside the server's GIL; "
        "fastest) or threads (one process, less memory)",
    )
    worker_scheduling: Literal["adaptive", "normal", "batch"] = Field(
        "adaptive",
        description="the worker processes' Linux scheduling policy: batch (SCHED_BATCH: a worker woken by a "
        "batch does not take the core from the event loop; more single-text requests/s and shorter tails near "
        "capacity, longer latency at light load), normal, or adaptive: batch while the event loop keeps 60 % "
        "of a core busy, normal once it is below 45 %; while adaptive has them under batch, batches also gather on "
        "the first worker with room (bench/README.md, 'Workers as batch work', 'Gathering batches on one worker')",
    )
    batch_max_texts: int = Field(
        128,
        ge=1,
        le=4096,
        description="most texts a worker takes at once (sorted by length and cut into onnxruntime calls by padding)",
    )
    # Under load the wait for a free worker is what fills batches; this wait only matters while a
    # worker is free (bench/README.md, "The batch wait": on 2026-12-04's code and machine, 32
    # single-text callers 1.22x the requests/s of 0.3 ms with 0.1, at the same CPU a request and
    # the same tails at half load; 0 gave a little worse tails than 0.1 at half load).
    batch_wait_ms: float = Field(
        0.1, ge=0, le=1000, description="longest a text waits for others to fill its batch once a worker is free"
    )

    max_texts: int = Field(256, ge=1, description="most texts in one request")
    max_chars: int = Field(20_000, ge=1, description="most characters in one text")
    max_body_bytes: int = Field(4 * 1024 * 1024, ge=1024, description="largest request body")
    max_spans: int = Field(MAX_SPANS, ge=0, description="most spans a request may ask for per text")

    queue_wait_ms: float = Field(
        250.0,
        gt=0,
        le=60_000,
        description="longest admitted work waits for inference; beyond it a request is refused at once "
        "(503 + Retry-After), sized from the measured rate",
    )
    max_requests: int = Field(
        default_factory=lambda: 32 * _cores(),
        ge=1,
        description="requests inside the app at once to start from (default: 32 per core); the limit then adapts "
        "to keep their mean time under queue_wait_ms, and beyond it requests get 503 + Retry-After",
    )
    body_budget_bytes: int = Field(
        default_factory=_body_budget,
        ge=1024,
        description="request-body bytes buffered across all connections (default: memory/128, 16–256 MiB); "
        "beyond it 503 + Retry-After before the body is read",
    )
    max_connections: int = Field(
        default_factory=_max_connections,
        ge=1,
        description="open connections per replica (default from memory and the open-file limit); "
        "beyond it new connections get 503 + Retry-After and are closed",
    )
    read_timeout_seconds: float = Field(
        15.0,
        gt=0,
        le=3600,
        description="longest a client may take to send one request's headers and body; a slower one is "
        "answered 408 and closed",
    )
    # 64 KiB: nginx's default buffers hold 32 KiB of headers and a browser's cookies fit in 8 (common
    # practice); at least 8 KiB, the common per-line limit of web servers, so ordinary requests always
    # fit; at most 1 MiB, since every open connection may hold this much (and one read more).
    max_head_bytes: int = Field(
        64 * 1024,
        ge=8 * 1024,
        le=1024 * 1024,
        description="largest request line and headers together (8 KiB to 1 MiB); a larger head is answered 431 "
        "and the connection closed",
    )
    keepalive_seconds: int = Field(
        5, ge=1, le=3600, description="an idle keep-alive connection is closed after this long"
    )

    admin_token: SecretStr | None = Field(None, description="bearer token for the admin calls; unset: admin is off")
    review_token: SecretStr | None = Field(
        None,
        description="bearer token reviewers use to record verdicts (POST /v1/verdicts); never accepted for admin "
        "calls; unset: recording verdicts is off",
    )
    poll_seconds: float = Field(2.0, gt=0, le=3600, description="how often the registry's change cursor is read")
    pinned_versions: int = Field(2, ge=0, le=32, description="non-live versions kept loaded for pinned requests")
    access_log: bool = Field(True, description="one JSON line per request on stderr")

    shadow_rate: float = Field(
        0.1,
        ge=0,
        le=1,
        description="share of live requests also scored by the model's candidate version, after the reply "
        "(0: off); the counts go to the registry (textsieve shadow MODEL)",
    )
    shadow_queue_texts: int = Field(
        2048,
        ge=1,
        le=1_000_000,
        description="most texts waiting for shadow scoring; beyond it samples are dropped and counted",
    )
    shadow_flush_seconds: float = Field(
        10.0,
        gt=0,
        le=3600,
        description="how often shadow counts and drift counts are added to the registry "
        "(a crash loses at most this much)",
    )
    shadow_keep_texts: int = Field(
        0,
        ge=0,
        le=100_000,
        description=(
            "keep the newest N texts the candidate labels differently, for review "
            "(0: store none; texts other replicas keep are left to their age limit)"
        ),
    )
    shadow_keep_days: float = Field(7.0, gt=0, le=3650, description="kept texts older than this are deleted")
    drift: bool = Field(True, description="count drift signals of live texts per served version")
    drift_window_texts: int = Field(
        10_000,
        ge=100,
        le=10_000_000,
        description="the rolling window of live texts drift signals are computed over, "
        "shared by every replica of the registry",
    )

    # The same rules as the registry verbs apply to TEXTSIEVE_REGISTRY and TEXTSIEVE_BLOBS.
    @field_validator("registry")
    @classmethod
    def _registry_location(cls, v: str) -> str:
        v = check_registry(v)
        # A file never becomes a registry folder: refused now, not retried by the server for ever.
        if "://" not in v and Path(v).exists() and not Path(v).is_dir():
            raise ValueError(f"{v} is a file; give a registry folder or a postgresql:// URL")
        if v.startswith(POSTGRES_SCHEMES):  # nor is a URL libpq cannot read
            from textsieve.errors import InputError
            from textsieve.registry.api import check_location

            try:
                check_location(v)
            except InputError as exc:
                raise ValueError(exc.message) from None
        return v

    @field_validator("blobs")
    @classmethod
    def _blob_folder(cls, v: str | None) -> str | None:
        return None if v is None else check_blobs(v)

    @field_validator("models", mode="before")
    @classmethod
    def _split_models(cls, v: Any) -> Any:
        if isinstance(v, str):
            return [name.strip() for name in v.split(",") if name.strip()]
        return v

    @field_validator("models")
    @classmethod
    def _unique_models(cls, v: list[str]) -> list[str]:
        from textsieve.errors import InputError
        from textsieve.registry.names import validate_model_name

        for name in v:
            try:
                validate_model_name(name)
            except InputError as exc:  # a name no registry can hold would be retried for ever
                raise ValueError(exc.message) from None
        if len(set(v)) != len(v):
            raise ValueError(f"models are listed twice: {', '.join(sorted({m for m in v if v.count(m) > 1}))}")
        return v

    @field_validator("admin_token", "review_token", mode="before")
    @classmethod
    def _empty_token_is_none(cls, v: Any) -> Any:
        return None if isinstance(v, str) and not v.strip() else v

    @field_validator("admin_token", "review_token")
    @classmethod
    def _long_token(cls, v: SecretStr | None, info: ValidationInfo) -> SecretStr | None:
        # A short shared secret can be guessed over HTTP; refuse it rather than warn.
        which = "admin" if info.field_name == "admin_token" else "review"
        if v is not None and len(v.get_secret_value()) < MIN_TOKEN_CHARS:
            raise ValueError(
                f"the {which} token must be at least {MIN_TOKEN_CHARS} characters "
                "(e.g. python -c 'import secrets; print(secrets.token_urlsafe(32))')"
            )
        # A token outside a Bearer token's characters (RFC 6750 §2.1: letters, digits, -._~+/ and
        # trailing =) can never match what a client sends: a header is not UTF-8 and is trimmed.
        if v is not None and not _B64TOKEN.fullmatch(v.get_secret_value()):
            raise ValueError(
                f"the {which} token may hold only letters, digits and - . _ ~ + / (then = padding), as a "
                "Bearer token is written (RFC 6750 §2.1); no spaces or other characters "
                "(e.g. python -c 'import secrets; print(secrets.token_urlsafe(32))')"
            )
        return v

    @model_validator(mode="after")
    def _separate_tokens(self) -> Settings:
        # One secret for both roles would let every reviewer promote: the roles must stay apart.
        if (
            self.admin_token is not None
            and self.review_token is not None
            and self.admin_token.get_secret_value() == self.review_token.get_secret_value()
        ):
            raise ValueError(
                "review_token equals admin_token: reviewers would hold the admin token; give each role its own token"
            )
        return self

    @model_validator(mode="after")
    def _blobs_for_postgres(self) -> Settings:
        if self.blobs is None and self.registry.startswith(POSTGRES_SCHEMES):
            raise ValueError(
                "a postgresql:// registry needs a blob folder: set TEXTSIEVE_BLOBS (serve --blobs FOLDER) "
                "to the folder its publishers write blobs to"
            )
        return self

    @model_validator(mode="after")
    def _body_fits_one_text(self) -> Settings:
        if self.max_body_bytes < self.max_chars:
            raise ValueError(
                f"max_body_bytes ({self.max_body_bytes}) is smaller than max_chars "
                f"({self.max_chars}): a single text of the allowed size could never be sent"
            )
        if self.body_budget_bytes < self.max_body_bytes:
            raise ValueError(
                f"body_budget_bytes ({self.body_budget_bytes}) is smaller than max_body_bytes "
                f"({self.max_body_bytes}): a request of the allowed size could never be admitted"
            )
        return self

    @property
    def admin_enabled(self) -> bool:
        return self.admin_token is not None

    @property
    def review_enabled(self) -> bool:
        return self.review_token is not None

    @property
    def registry_label(self) -> str:
        """The registry location for logs and replies: a database URL without its password."""
        return public_location(self.registry)


def public_location(location: str) -> str:
    """``location`` fit to show: a postgresql:// URL loses its password, a folder stays as it is."""
    from textsieve.registry.api import public_location as describe

    return describe(location)


def _allowed(name: str) -> str:
    """What a setting may hold, from its type and bounds: 'a whole number from 0 to 32 (what it is)'."""
    import annotated_types as at

    field = Settings.model_fields[name]
    kind = {int: "a whole number", float: "a number", bool: "true or false"}.get(field.annotation)  # type: ignore[arg-type]
    if kind is None:
        return f"it is {field.description}" if field.description else "see the README's settings table"

    def shown(bound: object) -> str:
        v = float(bound)  # type: ignore[arg-type]  # annotated_types types its bounds as protocols
        return f"{int(v):,}" if v.is_integer() else f"{v:g}"

    low = next((shown(m.ge) for m in field.metadata if isinstance(m, at.Ge)), None)
    low = low or next((f"more than {shown(m.gt)}" for m in field.metadata if isinstance(m, at.Gt)), None)
    high = next((shown(m.le) for m in field.metadata if isinstance(m, at.Le)), None)
    if low is not None and high is not None:
        kind += f" from {low} to {high}" if not low.startswith("more") else f", {low} and at most {high}"
    elif low is not None:
        kind += f", {low} or more" if not low.startswith("more") else f", {low}"
    elif high is not None:
        kind += f", at most {high}"
    return f"allowed: {kind}" + (f" ({field.description})" if field.description else "")


def load_settings(*, flags: Mapping[str, str] | None = None, **overrides: Any) -> Settings:
    """Environment plus explicit overrides (None means "not given"); bad values raise InputError.

    ``flags`` maps a setting to the command-line flag that gave its override, so that a bad
    ``--port`` is named as the flag, not as the environment variable it was not read from.
    """
    from pydantic import ValidationError

    from textsieve.errors import InputError

    given = {k: v for k, v in overrides.items() if v is not None}
    try:
        return Settings(**given)
    except ValidationError as exc:
        first = exc.errors()[0]
        name = ".".join(str(p) for p in first["loc"])
        msg = str(first["msg"]).removeprefix("Value error, ")
        if first["type"] != "value_error" and name in Settings.model_fields:
            msg += f"; {_allowed(name)}"  # pydantic's words name neither the form nor the range
        if name in given and flags and name in flags:
            where = flags[name]
        else:
            where = f"setting {name} (TEXTSIEVE_{name.upper()})" if name else "settings"
        raise InputError(f"{where}: {msg}") from exc


__all__ = ["Settings", "load_settings", "public_location"]
