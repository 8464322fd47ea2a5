"""Starting the scaled-out topology on loopback from Debian's packages: a database of its own
on a PostgreSQL server, ``textsieve serve`` replicas sharing it and one blob folder, and nginx
in front of them with the config rendered from the template compose.yaml uses.

The constants at the top are the contract with the Dockerfile and compose.yaml: the same
commands, ports, settings and health endpoint (tests/deploy/test_deploy.py checks all three agree).
deploy/topology.py runs the checks on what this module starts.
"""

from __future__ import annotations

import contextlib
import os
import re
import secrets
import shutil
import signal
import socket
import subprocess
import sys
import tempfile
import time
import urllib.parse
from collections.abc import Iterator, Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import httpx

DEPLOY = Path(__file__).resolve().parent
NGINX_TEMPLATE = DEPLOY / "nginx" / "textsieve.conf.template"
INSTALL_NGINX = DEPLOY / "install-nginx.sh"

# -- the contract with Dockerfile and compose.yaml (tests/deploy/test_deploy.py checks it) ----------
CONTAINER_PORT = 8000  # the port a replica listens on in its container
LB_PORT = 8080  # the port nginx listens on in its container
SERVE_COMMAND = ("textsieve", "serve")
READINESS_PATH = "/readyz"
LIVENESS_PATH = "/healthz"
TEMPLATE_VARS = ("TEXTSIEVE_REPLICA_1", "TEXTSIEVE_REPLICA_2", "TEXTSIEVE_LB_LISTEN", "TEXTSIEVE_LB_ACCESS_LOG")
# Everything a replica is configured with: the TEXTSIEVE_* settings, libpq's password and
# uvicorn's list of proxies whose X-Forwarded-For it trusts.
REPLICA_ENV = (
    "TEXTSIEVE_HOST",
    "TEXTSIEVE_PORT",
    "TEXTSIEVE_REGISTRY",
    "TEXTSIEVE_BLOBS",
    "TEXTSIEVE_ADMIN_TOKEN",
    "TEXTSIEVE_POLL_SECONDS",
    "TEXTSIEVE_WORKERS",
    "PGPASSWORD",
    "FORWARDED_ALLOW_IPS",
)


def health_command(base_url: str) -> list[str]:
    """The readiness probe: the Dockerfile's HEALTHCHECK with the container's own address."""
    return ["textsieve", "health", "--url", base_url]


MODEL = "helpdesk"
START_TIMEOUT_S = 90.0
STOP_TIMEOUT_S = 20.0
# Beyond the polling interval and the load, what a busy 2-core machine may add before a
# replica's /readyz shows the new version.
LAG_SLACK_S = 2.0
FAIL_TIMEOUT_S = 5.0  # the template's fail_timeout: how long nginx leaves a failed replica alone
PROBABILITY_TOLERANCE = 1e-5  # a text alone vs inside a batch (DEVELOPERS.md, "Numbers to keep in mind")


class CheckFailed(AssertionError):
    """A promise of the topology did not hold; the message says which and with what figures."""


def check(condition: bool, message: str) -> None:
    if not condition:
        raise CheckFailed(message)


def free_port() -> int:
    with socket.socket(socket.AF_INET, socket.SOCK_STREAM) as s:
        s.bind(("127.0.0.1", 0))
        port: int = s.getsockname()[1]
        return port


def textsieve_executable() -> str:
    beside = Path(sys.executable).with_name("textsieve")
    if beside.is_file():
        return str(beside)
    found = shutil.which("textsieve")
    if found is None:
        raise CheckFailed("the textsieve command is not installed (pip install '.[serve]')")
    return found


def nginx_executable(*, install: bool = False) -> str:
    for candidate in (shutil.which("nginx"), "/usr/sbin/nginx"):
        if candidate and os.access(candidate, os.X_OK):
            return candidate
    if install:
        subprocess.run(["bash", str(INSTALL_NGINX)], check=True, stdin=subprocess.DEVNULL)
        return nginx_executable(install=False)
    raise CheckFailed(f"nginx is not installed; run 'bash {INSTALL_NGINX}' (Debian's package)")


def log_tail(path: Path, lines: int = 25) -> str:
    try:
        text = path.read_text(encoding="utf-8", errors="replace")
    except OSError:
        return "(no log)"
    return "\n".join(text.splitlines()[-lines:])


# -- PostgreSQL -------------------------------------------------------------------------------
@dataclass(frozen=True)
class Database:
    """A database of the topology's own: its URL without the password, and the password."""

    url: str
    password: str | None
    name: str


@contextlib.contextmanager
def fresh_database(base_url: str) -> Iterator[Database]:
    """A new, empty database on the server of ``base_url``, dropped afterwards."""
    import psycopg

    name = f"ts_topology_{secrets.token_hex(4)}"
    with psycopg.connect(base_url, autocommit=True, connect_timeout=5) as conn:
        conn.execute(f'CREATE DATABASE "{name}"')
    parts = urllib.parse.urlsplit(base_url)
    user = urllib.parse.unquote(parts.username or "")
    host = parts.hostname or "127.0.0.1"
    netloc = f"{urllib.parse.quote(user)}@{host}" if user else host
    if parts.port:
        netloc += f":{parts.port}"
    # Like compose.yaml: the URL names the server and database, libpq takes PGPASSWORD.
    url = urllib.parse.urlunsplit((parts.scheme, netloc, f"/{name}", parts.query, ""))
    password = urllib.parse.unquote(parts.password) if parts.password else None
    try:
        yield Database(url, password, name)
    finally:
        with psycopg.connect(base_url, autocommit=True, connect_timeout=5) as conn:
            conn.execute(f'DROP DATABASE IF EXISTS "{name}" WITH (FORCE)')


# -- processes --------------------------------------------------------------------------------
@dataclass(eq=False)
class Replica:
    name: str
    port: int
    env: dict[str, str]
    log: Path
    command: list[str]
    proc: subprocess.Popen[bytes] | None = None

    @property
    def url(self) -> str:
        return f"http://127.0.0.1:{self.port}"

    def start(self) -> None:
        with open(self.log, "ab") as out:
            # A session of its own: signals meant for the caller's terminal never reach it.
            self.proc = subprocess.Popen(
                self.command,
                env=self.env,
                stdin=subprocess.DEVNULL,
                stdout=out,
                stderr=subprocess.STDOUT,
                cwd=self.log.parent,
                start_new_session=True,
            )
        deadline = time.monotonic() + START_TIMEOUT_S
        while True:
            with contextlib.suppress(httpx.HTTPError):
                if httpx.get(self.url + LIVENESS_PATH, timeout=2).status_code == 200:
                    return
            if self.proc.poll() is not None:
                raise CheckFailed(f"{self.name} exited with status {self.proc.returncode}:\n{log_tail(self.log)}")
            if time.monotonic() > deadline:
                raise CheckFailed(
                    f"{self.name} did not answer {LIVENESS_PATH} in {START_TIMEOUT_S:.0f}s:\n{log_tail(self.log)}"
                )
            time.sleep(0.1)

    def stop(self, sig: signal.Signals = signal.SIGTERM) -> int | None:
        """Send ``sig`` and wait for the process to end; SIGKILL if it outlives the grace period."""
        proc, self.proc = self.proc, None
        if proc is None:
            return None
        if proc.poll() is None:
            proc.send_signal(sig)
            try:
                proc.wait(STOP_TIMEOUT_S)
            except subprocess.TimeoutExpired:
                proc.kill()
                proc.wait(STOP_TIMEOUT_S)
        return proc.returncode


def render_template(template: str, values: dict[str, str]) -> str:
    """Fill in the ``${NAME}`` placeholders the way nginx's image does, leaving $nginx_variables."""
    missing = [name for name in TEMPLATE_VARS if "${" + name + "}" not in template]
    check(not missing, f"{NGINX_TEMPLATE} lacks the placeholders {missing}")
    out = template
    for name in TEMPLATE_VARS:
        out = out.replace("${" + name + "}", values[name])
    leftover = re.findall(r"\$\{TEXTSIEVE_[A-Z0-9_]+\}", out)
    check(not leftover, f"{NGINX_TEMPLATE}: placeholders without a value: {sorted(set(leftover))}")
    return out


@dataclass(eq=False)
class Balancer:
    """nginx in the foreground, with a main config wrapping the shared template."""

    executable: str
    folder: Path
    port: int
    upstreams: list[str]
    proc: subprocess.Popen[bytes] | None = None

    @property
    def url(self) -> str:
        return f"http://127.0.0.1:{self.port}"

    @property
    def access_log(self) -> Path:
        return self.folder / "access.log"

    @property
    def error_log(self) -> Path:
        return self.folder / "error.log"

    def _args(self) -> list[str]:
        conf = self.folder / "nginx.conf"
        return [self.executable, "-p", f"{self.folder}/", "-c", str(conf), "-e", str(self.error_log)]

    def _as_user(self) -> dict[str, Any]:
        # Run as root, nginx would hand its workers to `nobody`, who may not reach the temp
        # folders; so root runs the whole of it as `nobody`, in a folder `nobody` owns.
        if os.geteuid() != 0:
            return {}
        return {"user": "nobody", "group": "nogroup", "extra_groups": []}

    def write_config(self) -> None:
        values = {
            "TEXTSIEVE_REPLICA_1": self.upstreams[0],
            "TEXTSIEVE_REPLICA_2": self.upstreams[1],
            "TEXTSIEVE_LB_LISTEN": f"127.0.0.1:{self.port}",
            "TEXTSIEVE_LB_ACCESS_LOG": str(self.access_log),
        }
        site = render_template(NGINX_TEMPLATE.read_text(encoding="utf-8"), values)
        (self.folder / "textsieve.conf").write_text(site, encoding="utf-8")
        tmp = self.folder / "tmp"
        temp_paths = "\n".join(
            f"    {kind}_temp_path {tmp / kind};" for kind in ("client_body", "proxy", "fastcgi", "uwsgi", "scgi")
        )
        (self.folder / "nginx.conf").write_text(
            "# Written by deploy/loopback.py: the shared template inside a main config of the test's own.\n"
            "worker_processes 1;\n"
            f"pid {self.folder / 'nginx.pid'};\n"
            f"error_log {self.error_log} notice;\n"
            "events { worker_connections 512; }\n"
            "http {\n"
            f"{temp_paths}\n"
            f"    include {self.folder / 'textsieve.conf'};\n"
            "}\n",
            encoding="utf-8",
        )
        tmp.mkdir(exist_ok=True)
        if os.geteuid() == 0:
            import pwd

            nobody = pwd.getpwnam("nobody")
            for path in [self.folder, *self.folder.rglob("*")]:
                os.chown(path, nobody.pw_uid, nobody.pw_gid)

    def start(self) -> None:
        self.write_config()
        test = subprocess.run(
            [*self._args(), "-t", "-q"], capture_output=True, text=True, stdin=subprocess.DEVNULL, **self._as_user()
        )
        check(test.returncode == 0, f"nginx refused the generated config:\n{test.stderr}")
        self.proc = subprocess.Popen(
            [*self._args(), "-g", "daemon off;"],
            stdin=subprocess.DEVNULL,
            stdout=subprocess.DEVNULL,
            stderr=subprocess.DEVNULL,
            start_new_session=True,
            **self._as_user(),
        )
        deadline = time.monotonic() + 20
        while True:
            with contextlib.suppress(httpx.HTTPError):
                httpx.get(self.url + LIVENESS_PATH, timeout=2)
                return
            if self.proc.poll() is not None:
                raise CheckFailed(f"nginx exited with status {self.proc.returncode}:\n{log_tail(self.error_log)}")
            check(time.monotonic() < deadline, f"nginx did not listen on {self.url}:\n{log_tail(self.error_log)}")
            time.sleep(0.05)

    def stop(self) -> None:
        proc, self.proc = self.proc, None
        if proc is None:
            return
        if proc.poll() is None:
            proc.send_signal(signal.SIGQUIT)  # graceful: finish what is in flight
            try:
                proc.wait(10)
            except subprocess.TimeoutExpired:
                with contextlib.suppress(ProcessLookupError):
                    os.killpg(proc.pid, signal.SIGKILL)  # master and workers: the group it leads
                proc.wait(10)

    def log_offset(self) -> int:
        return self.access_log.stat().st_size if self.access_log.exists() else 0

    def wait_in_rotation(self, upstream: str, texts: Sequence[str], timeout: float) -> float:
        """Seconds until nginx again sends requests to ``upstream`` (after marking it failed,
        it waits out ``fail_timeout`` before trying it again)."""
        started, offset = time.monotonic(), self.log_offset()
        with httpx.Client(timeout=30) as client:
            while True:
                client.post(f"{self.url}/v1/predict", json={"texts": list(texts)[:1], "model": MODEL, "spans": 0})
                with open(self.access_log, "rb") as f:
                    f.seek(offset)
                    fresh = f.read().decode("utf-8", errors="replace")
                if re.search(rf"upstream={re.escape(upstream)} upstream_status=200 ", fresh):
                    return time.monotonic() - started
                check(
                    time.monotonic() - started < timeout,
                    f"nginx sent nothing to {upstream} for {timeout:.0f}s after it came back",
                )
                time.sleep(0.1)

    def retried_requests(self, path: str = "/v1/predict") -> int:
        """Requests nginx sent to more than one replica (``upstream=a, b`` in its log)."""
        count = 0
        for line in self.access_log.read_text(encoding="utf-8", errors="replace").splitlines():
            m = re.search(r'"POST (\S+) [^"]*" \d+ \d+ upstream=([^ ]+(?:, [^ ]+)*) ', line)
            if m and m.group(1) == path and "," in m.group(2):
                count += 1
        return count


@dataclass(eq=False)
class Topology:
    """Replicas and nginx on loopback around one PostgreSQL database and one blob folder."""

    database: Database
    workdir: Path
    poll_seconds: float = 0.5
    workers: int = 1
    nginx: str = "nginx"
    admin_token: str = field(default_factory=lambda: secrets.token_urlsafe(24))
    replicas: list[Replica] = field(default_factory=list)
    balancer: Balancer | None = None

    @property
    def blobs(self) -> Path:
        return self.workdir / "blobs"

    def replica_env(self, port: int) -> dict[str, str]:
        settings = {
            "TEXTSIEVE_HOST": "127.0.0.1",
            "TEXTSIEVE_PORT": str(port),
            "TEXTSIEVE_REGISTRY": self.database.url,
            "TEXTSIEVE_BLOBS": str(self.blobs),
            "TEXTSIEVE_ADMIN_TOKEN": self.admin_token,
            "TEXTSIEVE_POLL_SECONDS": str(self.poll_seconds),
            "TEXTSIEVE_WORKERS": str(self.workers),
            "FORWARDED_ALLOW_IPS": "127.0.0.1",
        }
        if self.database.password is not None:
            settings["PGPASSWORD"] = self.database.password
        # A developer's own TEXTSIEVE_* or PG* variables must not change what is tested.
        inherited = {k: v for k, v in os.environ.items() if not k.startswith(("TEXTSIEVE_", "PG"))}
        return {**inherited, **settings}

    def cli_env(self) -> dict[str, str]:
        """What ``docker compose run --rm admin textsieve ...`` gets: a replica's settings."""
        return self.replica_env(CONTAINER_PORT)

    def start_replicas(self, count: int = 2) -> None:
        self.blobs.mkdir(parents=True, exist_ok=True)
        exe = textsieve_executable()
        for i in range(1, count + 1):
            port = free_port()
            folder = self.workdir / f"textsieve-{i}"
            folder.mkdir(exist_ok=True)
            replica = Replica(
                f"textsieve-{i}", port, self.replica_env(port), folder / "serve.log", [exe, *SERVE_COMMAND[1:]]
            )
            self.replicas.append(replica)
            replica.start()

    def start_balancer(self) -> Balancer:
        folder = Path(tempfile.mkdtemp(prefix="textsieve-nginx-"))
        self.balancer = Balancer(self.nginx, folder, free_port(), [f"127.0.0.1:{r.port}" for r in self.replicas])
        self.balancer.start()
        return self.balancer

    def close(self) -> None:
        errors: list[str] = []
        if self.balancer is not None:
            try:
                self.balancer.stop()
            except Exception as exc:  # keep tearing down the rest
                errors.append(f"nginx: {exc}")
        for r in self.replicas:
            try:
                r.stop()
            except Exception as exc:
                errors.append(f"{r.name}: {exc}")
        if self.balancer is not None:
            shutil.rmtree(self.balancer.folder, ignore_errors=True)
        if errors:
            raise RuntimeError("teardown: " + "; ".join(errors))

    # -- actions ------------------------------------------------------------------------------
    def publish(self, bundle: Path, model: str = MODEL) -> int:
        """``textsieve publish`` against the shared registry, as the compose ``admin`` service runs it."""
        run = subprocess.run(
            [textsieve_executable(), "publish", str(bundle), "--model", model, "--actor", "topology"],
            env=self.cli_env(),
            capture_output=True,
            text=True,
            stdin=subprocess.DEVNULL,
            timeout=120,
        )
        check(run.returncode == 0, f"textsieve publish failed ({run.returncode}): {run.stderr.strip()}")
        return int(run.stdout.strip().splitlines()[-1])

    def promote(
        self, replica: Replica, version: int, *, reason: str, force: bool = False, model: str = MODEL
    ) -> dict[str, Any]:
        r = httpx.post(
            f"{replica.url}/v1/models/{model}/versions/{version}/promote",
            json={"to": "live", "reason": reason, "force": force},
            headers={"Authorization": f"Bearer {self.admin_token}"},
            timeout=120,
        )
        check(r.status_code == 200, f"promote through {replica.name}: HTTP {r.status_code} {r.text[:500]}")
        reply: dict[str, Any] = r.json()
        return reply


def health_exit(url: str) -> tuple[int, str]:
    """Run the image's health command against ``url``."""
    cmd = health_command(url)
    run = subprocess.run(
        [textsieve_executable(), *cmd[1:]], capture_output=True, text=True, timeout=30, stdin=subprocess.DEVNULL
    )
    return run.returncode, run.stdout.strip()


def serving_version(url: str, model: str = MODEL) -> tuple[int | None, float | None]:
    """The version ``/readyz`` says is served for ``model``, and how long it took to load."""
    with contextlib.suppress(httpx.HTTPError, ValueError):
        body = httpx.get(url + READINESS_PATH, timeout=5).json()
        entry = body.get("models", {}).get(model) or {}
        if entry.get("state") == "ready":
            return int(entry["version"]), float(entry.get("load_seconds", 0.0))
    return None, None


def wait_for_version(url: str, version: int, timeout: float, model: str = MODEL) -> tuple[float, float]:
    """Seconds until ``url`` serves ``version`` (polled every 20 ms), and its reported load time."""
    started = time.monotonic()
    while True:
        served, load = serving_version(url, model)
        if served == version:
            return time.monotonic() - started, float(load or 0.0)
        check(time.monotonic() - started < timeout, f"{url} still serves {served}, not {version}, after {timeout:.1f}s")
        time.sleep(0.02)
