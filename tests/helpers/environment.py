"""What a test may rely on from its surroundings: the environment children get, and what to do
when a system service a test needs is missing."""

from __future__ import annotations

import os
from typing import NoReturn

import pytest


def skip_or_fail(message: str) -> NoReturn:
    """A skip on a developer machine; a failure in CI (CI=true), where every service must be
    there, so that a missing one cannot hide tests unnoticed."""
    if os.environ.get("CI"):
        pytest.fail(message)
    pytest.skip(message)


def child_env(**settings: object) -> dict[str, str]:
    """This environment without the caller's TEXTSIEVE_* settings, plus ``settings`` as TEXTSIEVE_<NAME>."""
    env = {k: v for k, v in os.environ.items() if not k.startswith("TEXTSIEVE_")}
    env["PYTHONUNBUFFERED"] = "1"
    for name, value in settings.items():
        if value is not None:
            env[f"TEXTSIEVE_{name.upper()}"] = str(value)
    return env


__all__ = ["child_env", "skip_or_fail"]
