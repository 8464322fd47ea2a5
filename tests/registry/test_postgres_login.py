"""A PostgreSQL registry whose login is refused or whose database is missing, on the real server
(TEXTSIEVE_TEST_PG): the command line says so with exit status 2 (a setting to fix), the service keeps
its 503 (a replica that cannot log in is not ready), and neither ever shows the password."""

from __future__ import annotations

import secrets
import urllib.parse
from pathlib import Path

import pytest

from tests.helpers.environment import skip_or_fail
from tests.helpers.registries import postgres_url
from tests.registry.test_cli import run
from textsieve.errors import LoginRefusedError, NoDatabaseError, UnavailableError
from textsieve.registry import open_registry

pytestmark = pytest.mark.postgres


def _with_password(url: str, password: str | None) -> str:
    """``url`` with its password replaced (or removed): the same real user, host and database."""
    parts = urllib.parse.urlsplit(url)
    user = parts.username or ""
    host = parts.hostname or "127.0.0.1"
    port = f":{parts.port}" if parts.port else ""
    login = user if password is None else f"{user}:{urllib.parse.quote(password, safe='')}"
    return urllib.parse.urlunsplit((parts.scheme, f"{login}@{host}{port}", parts.path, parts.query, ""))


@pytest.fixture
def wrong_password() -> str:
    return f"wrong-{secrets.token_hex(8)}"


def test_a_wrong_password_in_the_url_is_exit_2_with_one_line_and_no_password(
    capsys: pytest.CaptureFixture[str], tmp_path: Path, wrong_password: str
) -> None:
    url = _with_password(postgres_url(), wrong_password)
    code, out, err = run(capsys, "models", "--registry", url, "--blobs", str(tmp_path / "blobs"))
    assert (code, out) == (2, "")
    assert len(err.strip().splitlines()) == 1, err
    user = urllib.parse.urlsplit(url).username
    assert f'PostgreSQL refused the login (password authentication failed for user "{user}")' in err
    assert "check the user and password" in err and "TEXTSIEVE_REGISTRY" in err and "PGPASSWORD" in err
    assert "unavailable" not in err
    assert wrong_password not in err


def test_a_wrong_or_missing_pgpassword_is_a_refused_login_too(
    capsys: pytest.CaptureFixture[str], tmp_path: Path, wrong_password: str, monkeypatch: pytest.MonkeyPatch
) -> None:
    """The URL without a password, as README's deployment table advises: libpq reads PGPASSWORD."""
    url = _with_password(postgres_url(), None)
    monkeypatch.setenv("PGPASSFILE", str(tmp_path / "no-pgpass"))  # the user's own ~/.pgpass stays out of it
    monkeypatch.setenv("PGPASSWORD", wrong_password)
    code, _, err = run(capsys, "models", "--registry", url, "--blobs", str(tmp_path / "blobs"))
    assert code == 2 and "password authentication failed" in err and wrong_password not in err
    monkeypatch.delenv("PGPASSWORD")
    code, _, err = run(capsys, "models", "--registry", url, "--blobs", str(tmp_path / "blobs"))
    assert code == 2 and "PostgreSQL refused the login (fe_sendauth: no password supplied)" in err


def test_a_refused_login_stays_a_503_for_the_service_and_an_unreachable_server_stays_exit_1(
    capsys: pytest.CaptureFixture[str], tmp_path: Path, wrong_password: str
) -> None:
    from textsieve.service.web.problems import kind_of

    url = _with_password(postgres_url(), wrong_password)
    with pytest.raises(LoginRefusedError) as refused:
        open_registry(url, blobs=tmp_path / "blobs")
    assert isinstance(refused.value, UnavailableError) and refused.value.exit_code == 2
    assert kind_of(refused.value).status == 503 and kind_of(refused.value).slug == "unavailable"
    # Nothing listens on port 1 (a privileged port no test service uses): that is an outage, worth a retry.
    parts = urllib.parse.urlsplit(postgres_url())
    down = parts._replace(netloc=f"{parts.username}@127.0.0.1:1").geturl()
    code, _, err = run(capsys, "models", "--registry", down, "--blobs", str(tmp_path / "blobs"))
    assert code == 1 and "PostgreSQL unavailable" in err and "refused the login" not in err


def test_a_database_the_server_lacks_is_exit_2_with_one_line_and_stays_a_503_for_the_service(
    capsys: pytest.CaptureFixture[str], tmp_path: Path
) -> None:
    from textsieve.service.web.problems import kind_of

    real = urllib.parse.urlsplit(postgres_url())
    name = f"missing_{secrets.token_hex(6)}"
    url = real._replace(path=f"/{name}").geturl()  # the real user and password, a database nobody created
    code, out, err = run(capsys, "models", "--registry", url, "--blobs", str(tmp_path / "blobs"))
    assert (code, out) == (2, "")
    assert len(err.strip().splitlines()) == 1, err
    assert f'PostgreSQL has no such database (database "{name}" does not exist)' in err
    assert "check the database name" in err and "TEXTSIEVE_REGISTRY" in err and "PGDATABASE" in err
    assert "unavailable" not in err
    assert f":{real.password}@" not in err
    with pytest.raises(NoDatabaseError) as missing:
        open_registry(url, blobs=tmp_path / "blobs")
    assert isinstance(missing.value, UnavailableError) and missing.value.exit_code == 2
    assert kind_of(missing.value).status == 503 and kind_of(missing.value).slug == "unavailable"


def test_a_role_the_server_lacks_is_a_refused_login(capsys: pytest.CaptureFixture[str], tmp_path: Path) -> None:
    """Over the local socket, where Debian's pg_hba.conf lets an operating-system user in as the role of
    the same name without a password (peer), the server names a role it does not have; over TCP with a
    password it says only that the password failed (the first test)."""
    import getpass

    import psycopg

    socket_dir = Path("/var/run/postgresql")
    if not (socket_dir / ".s.PGSQL.5432").exists():
        skip_or_fail(f"no PostgreSQL socket in {socket_dir} (scripts/test-services.sh starts Debian's server)")
    user = getpass.getuser()
    with psycopg.connect(postgres_url()) as conn:
        if conn.execute("SELECT 1 FROM pg_roles WHERE rolname = %s", (user,)).fetchone():
            pytest.skip(f"the operating-system user {user!r} has a role of its own here")
    url = f"postgresql://{urllib.parse.quote(user)}@/{urllib.parse.urlsplit(postgres_url()).path[1:]}?host={socket_dir}"
    code, out, err = run(capsys, "models", "--registry", url, "--blobs", str(tmp_path / "blobs"))
    assert (code, out) == (2, "")
    assert len(err.strip().splitlines()) == 1, err
    assert f'PostgreSQL refused the login (role "{user}" does not exist); check the user name' in err
    assert "PGUSER" in err and "unavailable" not in err


@pytest.mark.anyio
async def test_a_service_on_a_database_the_server_lacks_answers_503_and_logs_what_to_check(
    tmp_path: Path, caplog: pytest.LogCaptureFixture
) -> None:
    """Not ready, retrying (the database may yet be created), and /readyz names no host or database."""
    import logging

    from tests.helpers.net import readyz_until
    from tests.helpers.service import serving, settings_for

    caplog.set_level(logging.INFO)
    name = f"missing_{secrets.token_hex(6)}"
    url = urllib.parse.urlsplit(postgres_url())._replace(path=f"/{name}").geturl()
    async with serving(settings_for(url, blobs=str(tmp_path / "blobs")), ready=False) as (_, client):
        await readyz_until(client, lambda b: b["reason"].startswith("startup failed"), timeout=30, awaiting="failure")
        r = await client.get("/readyz")
        assert r.status_code == 503 and name not in r.text and "127.0.0.1" not in r.text, r.text
    assert any(
        f'PostgreSQL has no such database (database "{name}" does not exist)' in rec.getMessage()
        for rec in caplog.records
    )
