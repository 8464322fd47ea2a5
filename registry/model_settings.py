"""Per-model settings: what the promotion gates allow and when the service hands a result to a person.

They belong to the model, not to a version: a bundle is immutable and says what a model *is*,
while how strict its gates are and where its review threshold sits are choices people make and
revisit. So they live in the registry (table ``model_settings``), and every change is an audit
event (kind ``settings``) with the actor, the reason and each key's old and new value.

Adding a setting is one declaration in the list below, e.g.::

    SHADOW_MIN_AGREEMENT = declare(Setting.number("shadow_min_agreement", 0.95, 0.0, 1.0, Group.GATES, "…"))

The registry then stores, validates, audits and shows it (``textsieve gates`` lists every
setting of group ``gates``); the code that uses it reads ``settings.get(SHADOW_MIN_AGREEMENT)``.

A registry-wide default can differ from the declared one (``open_registry(settings=GateSettings(…))``),
and a key this textsieve does not know (written by a newer one) is kept in the table and ignored.
"""

from __future__ import annotations

import json
import math
from collections.abc import Callable, Mapping
from dataclasses import dataclass
from enum import StrEnum
from typing import Any, Generic, TypeVar, cast

from pydantic import BaseModel, ConfigDict, Field

from textsieve.errors import InputError

Value = float | bool | None
T = TypeVar("T")

# A switch takes the two words its message names, nothing else: "yes", "true" and "1" were taken too
# while every message and the README said "on or off".
_ON = ("on",)
_OFF = ("off",)
_NONE = ("none", "off", "")


class Kind(StrEnum):
    NUMBER = "number"
    COUNT = "count"  # a whole number typed as plain digits
    SWITCH = "switch"
    OPTIONAL = "optional"  # a number or none


class Group(StrEnum):
    """Which verb shows a setting: ``textsieve gates`` or ``textsieve review-threshold``."""

    GATES = "gates"
    REVIEW = "review"


@dataclass(frozen=True)
class Setting(Generic[T]):
    """One setting: its key, declared default, group, help line and the values it allows."""

    key: str
    default: T
    group: Group
    help: str
    allowed: str  # what the values may be, in words, for messages and help
    check: Callable[[object], T | None]  # the value as stored, or None when not allowed
    kind: Kind = Kind.NUMBER
    # How a stored value is read back, when that differs from ``check`` (what a new value must pass):
    # a value an older release stored under looser rules keeps the meaning it had there.
    stored: Callable[[object], T | None] | None = None

    @staticmethod
    def number(key: str, default: float, low: float, high: float, group: Group, help: str) -> Setting[float]:
        """A number from ``low`` to ``high`` (both included)."""
        return Setting(
            key, default, group, help, f"a number from {low:g} to {high:g}", _number(low, high, low_open=False)
        )

    @staticmethod
    def count(key: str, default: int, low: int, high: int, group: Group, help: str) -> Setting[float]:
        """A whole number from ``low`` to ``high`` (a number of texts): 2.5 texts is no minimum anyone
        meant, and was taken as 2. Stored as a float, like the other numbers."""
        allowed = f"a whole number from {low:,} to {high:,}"
        return Setting(
            key, float(default), group, help, allowed, _count(low, high), Kind.COUNT, stored=_count_stored(low, high)
        )

    @staticmethod
    def level(key: str, default: float, low: float, high: float, group: Group, help: str) -> Setting[float]:
        """A number above ``low`` and at most ``high`` (a probability level, never 0)."""
        return Setting(key, default, group, help, f"a number above {low:g} and at most {high:g}", _number(low, high))

    @staticmethod
    def switch(key: str, default: bool, group: Group, help: str) -> Setting[bool]:
        return Setting(key, default, group, help, "on or off", _switch, Kind.SWITCH)

    @staticmethod
    def optional(key: str, low: float, high: float, group: Group, help: str) -> Setting[float | None]:
        """A number above ``low`` and at most ``high``, or none (unset, the default)."""
        allowed = f"a number above {low:g} and at most {high:g}, or none"
        return Setting(key, None, group, help, allowed, _optional(_number(low, high)), Kind.OPTIONAL)

    def validate(self, value: object, *, typed: object = None) -> T:
        """``value`` as this setting stores it; InputError naming the key and what is allowed."""
        checked = self.check(value)
        if checked is None and not (self.kind == Kind.OPTIONAL and value is None):
            shown = _shown(value if typed is None else typed)
            raise InputError(f"bad value {shown} for {self.key}: {self.allowed}")
        return cast(T, checked)

    def parse(self, text: str) -> T:
        """A value typed on a command line ("0.05", "on", "none")."""
        word = text.strip().lower()
        value: object = word
        if self.kind == Kind.SWITCH:
            value = True if word in _ON else False if word in _OFF else text
        elif self.kind == Kind.OPTIONAL and word in _NONE:
            value = None
        elif self.kind == Kind.COUNT and not (word.isascii() and word.isdigit()):
            # float() reads "1e3", "1_000" and "+5" too: a count is written in digits, as it is shown.
            raise InputError(f"bad value {_shown(text)} for {self.key}: {self.allowed}, written in plain digits")
        else:  # a number, or a count in digits
            try:
                value = float(word)
            except ValueError:
                value = text
        return self.validate(value, typed=text)

    def show(self, value: object) -> str:
        if isinstance(value, bool):
            return "on" if value else "off"
        if value is None:
            return "none"
        return f"{value:g}" if isinstance(value, float) else str(value)


def _number(low: float, high: float, *, low_open: bool = True) -> Callable[[object], float | None]:
    def check(value: object) -> float | None:
        if isinstance(value, bool) or not isinstance(value, int | float) or not math.isfinite(value):
            return None
        v = float(value) + 0.0  # -0.0 + 0.0 is 0.0: "-0" is stored and shown as 0
        above = v > low if low_open else v >= low
        return v if above and v <= high else None

    return check


def _count(low: int, high: int) -> Callable[[object], float | None]:
    inner = _number(low, high, low_open=False)

    def check(value: object) -> float | None:
        v = inner(value)
        return v if v is not None and v.is_integer() else None

    return check


def _count_stored(low: int, high: int) -> Callable[[object], float | None]:
    """A count as stored: releases before whole numbers were required stored 2.5 and used it as 2
    (``int``); such a value is read as the whole number it acted as, not dropped for the default."""
    inner = _number(low, high, low_open=False)

    def read(value: object) -> float | None:
        v = inner(value)
        return None if v is None else float(int(v))

    return read


def _switch(value: object) -> bool | None:
    return value if isinstance(value, bool) else None


def _optional(inner: Callable[[object], float | None]) -> Callable[[object], float | None]:
    return lambda value: None if value is None else inner(value)


def _shown(value: object) -> str:
    text = repr(value)
    return text if len(text) <= 40 else text[:37] + "..."


# -- the settings -------------------------------------------------------------------------
SETTINGS: dict[str, Setting[Any]] = {}


def declare(setting: Setting[T]) -> Setting[T]:
    if setting.key in SETTINGS:
        raise ValueError(f"setting {setting.key!r} declared twice")
    SETTINGS[setting.key] = setting
    return setting


G, R = Group.GATES, Group.REVIEW
MACRO_F1_DROP = declare(Setting.number("macro_f1_drop", 0.01, 0.0, 1.0, G, "largest macro-F1 drop vs live allowed"))
ECE_RISE = declare(Setting.number("ece_rise", 0.02, 0.0, 1.0, G, "largest ECE rise vs live allowed"))
TOLERANCES = declare(Setting.switch("tolerances", True, G, "enforce the two fixed tolerances above"))
MCNEMAR = declare(Setting.switch("mcnemar", False, G, "refuse a candidate significantly worse than live (McNemar)"))
MCNEMAR_P = declare(Setting.level("mcnemar_p", 0.05, 0.0, 0.5, G, "significance level of the McNemar gate"))
SHADOW_AGREEMENT_MIN = declare(
    Setting.optional(
        "shadow_agreement_min", 0.0, 1.0, G, "least share of live texts the candidate must label as live did (shadow)"
    )
)
SHADOW_MIN_TEXTS = declare(
    Setting.count("shadow_min_texts", 1000, 1, 10**9, G, "live texts scored in the shadow before that share counts")
)
# How small an evaluation set the metric gates judge on (registry/gates.py, "Too small a set").
EVALSET_MIN_TEXTS = declare(
    Setting.count("evalset_min_texts", 50, 1, 10**9, G, "least evaluation-set texts the metric gates judge on")
)
EVALSET_MIN_PER_LABEL = declare(
    Setting.count("evalset_min_per_label", 5, 0, 10**9, G, "least evaluation-set texts of each label of the version")
)
REVIEW_THRESHOLD = declare(
    Setting.optional("review_threshold", 0.0, 1.0, R, "results whose top probability is below it need review")
)


def setting(key: str, group: Group | None = None) -> Setting[Any]:
    """The declared setting ``key`` (of ``group``, when given); InputError naming the allowed keys."""
    found = SETTINGS.get(key)
    if found is None or (group is not None and found.group != group):
        raise InputError(f"unknown setting {_shown(key)}; allowed: {allowed_keys(group)}")
    return found


def allowed_keys(group: Group | None = None) -> str:
    """``key (what it may be)`` for every setting of ``group``, for one-line messages."""
    return "; ".join(f"{s.key} ({s.allowed})" for s in SETTINGS.values() if group is None or s.group == group)


def parse_assignment(text: str, group: Group | None = None) -> tuple[str, Value]:
    """``key=value`` as typed after ``--set``."""
    key, sep, raw = text.partition("=")
    if not sep:
        raise InputError(f"--set {_shown(text)}: write KEY=VALUE; allowed: {allowed_keys(group)}")
    s = setting(key.strip(), group)
    return s.key, s.parse(raw)


# -- what the registry hands back ---------------------------------------------------------
class SettingValue(BaseModel):
    """One setting of one model: the value in force, and who chose it, when and why (None: default)."""

    model_config = ConfigDict(frozen=True)

    key: str
    value: Value
    default: Value = Field(description="the value without a per-model choice")
    set_by: str | None = None
    set_at: str | None = None
    reason: str | None = None

    @property
    def is_default(self) -> bool:
        return self.set_by is None


class ModelSettings(BaseModel):
    """Every declared setting of a model, each with its provenance."""

    model_config = ConfigDict(frozen=True)

    model: str
    values: dict[str, SettingValue]

    def get(self, s: Setting[T]) -> T:
        """The value in force, typed as the setting declares it."""
        entry = self.values.get(s.key)
        return s.default if entry is None else cast(T, entry.value)

    def in_group(self, group: Group) -> list[SettingValue]:
        return [v for k, v in self.values.items() if SETTINGS[k].group == group]

    @classmethod
    def resolve(cls, model: str, rows: list[dict[str, Any]], defaults: Mapping[str, Value]) -> ModelSettings:
        """From stored rows (unknown keys and values that no longer pass a check are ignored)."""
        stored = {r["key"]: r for r in rows}
        values: dict[str, SettingValue] = {}
        for key, s in SETTINGS.items():
            default = defaults.get(key, s.default)
            row = stored.get(key)
            raw = None if row is None else json.loads(row["value"])
            value = (s.stored or s.check)(raw)
            if row is None or (value is None and not (raw is None and s.kind == Kind.OPTIONAL)):
                values[key] = SettingValue(key=key, value=default, default=default)
            else:
                values[key] = SettingValue(
                    key=key,
                    value=value,
                    default=default,
                    set_by=row["set_by"],
                    set_at=row["set_at"],
                    reason=row["reason"],
                )
        return cls(model=model, values=values)


__all__ = [
    "ECE_RISE",
    "EVALSET_MIN_PER_LABEL",
    "EVALSET_MIN_TEXTS",
    "MACRO_F1_DROP",
    "MCNEMAR",
    "MCNEMAR_P",
    "REVIEW_THRESHOLD",
    "SETTINGS",
    "TOLERANCES",
    "Group",
    "Kind",
    "ModelSettings",
    "Setting",
    "SettingValue",
    "Value",
    "allowed_keys",
    "SHADOW_AGREEMENT_MIN",
    "SHADOW_MIN_TEXTS",
    "declare",
    "parse_assignment",
    "setting",
]
