"""Settings: TEXTSIEVE_* environment variables, overrides, and refusals that name the setting."""

from __future__ import annotations

import pytest

from tests.helpers.service import ADMIN_TOKEN
from textsieve.errors import InputError
from textsieve.service.settings import Settings, load_settings


def test_environment_and_overrides(monkeypatch: pytest.MonkeyPatch) -> None:
    monkeypatch.setenv("TEXTSIEVE_MAX_TEXTS", "10")
    monkeypatch.setenv("TEXTSIEVE_MODELS", "support, triage ,")
    monkeypatch.setenv("TEXTSIEVE_ADMIN_TOKEN", ADMIN_TOKEN)
    s = load_settings(port=9001, workers=None)
    assert s.max_texts == 10 and s.models == ["support", "triage"] and s.port == 9001
    assert s.admin_enabled and s.admin_token is not None
    assert ADMIN_TOKEN not in repr(s)  # a secret never shows in logs or tracebacks
    assert load_settings(max_texts=3).max_texts == 3  # an explicit value beats the environment


def test_defaults_are_sane() -> None:
    s = Settings()
    assert s.host == "127.0.0.1" and s.workers >= 1 and not s.admin_enabled and s.models == []
    assert s.max_body_bytes >= s.max_chars


@pytest.mark.parametrize(
    ("overrides", "needle"),
    [
        ({"admin_token": "short"}, "at least 16 characters"),
        # Found by probing: accepted, then no Authorization header could ever match them.
        ({"admin_token": "pässwörd-0123456789abc"}, r"letters, digits and - \. _ ~ \+ /"),
        ({"review_token": "abcdefghijklmnop0123  "}, r"the review token may hold only"),
        ({"workers": 0}, "TEXTSIEVE_WORKERS"),
        ({"max_texts": 0}, "TEXTSIEVE_MAX_TEXTS"),
        ({"models": "a,a"}, "listed twice"),
        ({"max_body_bytes": 2000, "max_chars": 5000}, "smaller than max_chars"),
        ({"batch_wait_ms": -1}, "TEXTSIEVE_BATCH_WAIT_MS"),
        # Below a web server's common 8 KiB line limit an ordinary request would not fit; above 1 MiB
        # a connection could hold that much in an unfinished head.
        (
            {"max_head_bytes": 4096},
            r"^setting max_head_bytes \(TEXTSIEVE_MAX_HEAD_BYTES\): .*greater than or equal to 8192; "
            r"allowed: a whole number from 8,192 to 1,048,576 \(largest request line",
        ),
        (
            {"max_head_bytes": 2**20 + 1},
            r"\(TEXTSIEVE_MAX_HEAD_BYTES\): Input should be less than or equal to 1048576; allowed: ",
        ),
        ({"max_head_bytes": "64k"}, r"\(TEXTSIEVE_MAX_HEAD_BYTES\): Input should be a valid integer"),
        # The registry verbs' rules (textsieve/environment.py), so serve and they agree.
        ({"registry": " "}, r"\(TEXTSIEVE_REGISTRY\): empty"),
        ({"registry": "https://h/r"}, "https:// is not a registry"),
        ({"blobs": ""}, r"\(TEXTSIEVE_BLOBS\): empty"),
        # Values the server would otherwise retry for ever (found by probing).
        ({"models": "triage,Support!"}, r"\(TEXTSIEVE_MODELS\): bad model name 'Support!'"),
        ({"registry": "postgresql://u@h/db"}, "a postgresql:// registry needs a blob folder"),
        ({"registry": __file__}, "is a file; give a registry folder"),
    ],
)
def test_bad_values_are_refused_naming_the_setting(overrides: dict[str, object], needle: str) -> None:
    with pytest.raises(InputError, match=needle):
        load_settings(**overrides)


@pytest.mark.parametrize(
    ("overrides", "allowed"),
    [
        ({"pinned_versions": "m=0"}, "allowed: a whole number from 0 to 32 (non-live versions kept loaded"),
        ({"drift": "maybe"}, "allowed: true or false (count drift signals"),
        ({"queue_wait_ms": 0}, "allowed: a number, more than 0 and at most 60,000 (longest admitted work"),
    ],
)
def test_a_value_of_the_wrong_form_or_range_is_told_what_is_allowed(overrides: dict[str, object], allowed: str) -> None:
    """pydantic's own words ('Input should be a valid integer') named neither the range nor what the
    setting is for; the one line now states both, from the setting's type, bounds and description."""
    with pytest.raises(InputError) as info:
        load_settings(**overrides)
    assert info.value.message.endswith(")") and allowed in info.value.message, info.value.message


def test_a_bad_flag_is_named_as_the_flag_not_the_variable() -> None:
    flags = {"port": "--port", "workers": "--workers"}
    with pytest.raises(InputError, match=r"^--port: Input should be greater than or equal to 0; allowed: a whole"):
        load_settings(flags=flags, port=-5)
    with pytest.raises(InputError, match=r"^setting max_texts \(TEXTSIEVE_MAX_TEXTS\)"):
        load_settings(flags=flags, max_texts=0)  # no flag gave it


def test_blank_token_means_admin_off(monkeypatch: pytest.MonkeyPatch) -> None:
    monkeypatch.setenv("TEXTSIEVE_ADMIN_TOKEN", "  ")
    assert not load_settings().admin_enabled


def test_public_surface_is_what_all_claims() -> None:
    import textsieve.service as service

    assert sorted(service.__all__) == ["Settings", "create_app"]
    for name in service.__all__:
        assert getattr(service, name).__name__ == name
    with pytest.raises(AttributeError):
        service.nothing_here  # noqa: B018


def _readme_settings() -> list[tuple[list[str], str]]:
    """The README's Settings section: each table row's TEXTSIEVE_* names with its default cell."""
    import re
    from pathlib import Path

    readme = (Path(__file__).resolve().parents[2] / "README.md").read_text(encoding="utf-8")
    section = readme.split("\n### Settings\n", 1)[1].split("\n### ", 1)[0]
    rows: list[tuple[list[str], str]] = []
    at = -1
    for line in section.splitlines():
        if not line.startswith("|") or line.startswith("| ---"):
            at = -1 if not line.startswith("|") else at
            continue
        cells = [c.strip() for c in line.strip("|").split(" | ")]
        if cells[0] == "variable":
            at = cells.index("default")
            continue
        rows.append((re.findall(r"`(TEXTSIEVE_[A-Z_]+)`", cells[0]), cells[at]))
    return rows


def test_the_readme_settings_tables_name_every_setting_with_its_default() -> None:
    """Before: TEXTSIEVE_MAX_SPANS (named in a 422's detail) and TEXTSIEVE_ACCESS_LOG were in no table.
    Each field of Settings is a TEXTSIEVE_ variable the README lists, and each it lists is a field; a
    default written as one literal is the field's."""
    rows = _readme_settings()
    documented = {name for names, _ in rows for name in names}
    fields = {f"TEXTSIEVE_{name.upper()}": field for name, field in Settings.model_fields.items()}
    assert documented == set(fields), (sorted(set(fields) - documented), sorted(documented - set(fields)))
    checked = 0
    for names, cell in rows:
        literal = cell.split("`")[1] if len(names) == 1 and cell.startswith("`") else None
        default = fields[names[0]].default if names else None
        if literal is None or fields[names[0]].default_factory is not None:
            continue
        if isinstance(default, bool):
            assert literal == str(default).lower(), names
        elif isinstance(default, int | float):
            assert float(literal) == default, names
        else:
            assert literal == default, names
        checked += 1
    assert checked >= 15  # most rows give their default as one literal
