"""Deployment files: the Dockerfile, compose.yaml and the nginx template agree with the
loopback topology that the tests really run (deploy/loopback.py, deploy/topology.py), and
that topology keeps its promises end to end: PostgreSQL, two ``textsieve serve`` replicas
and nginx on 127.0.0.1.

No Docker engine runs here, so the Docker files are parsed (compose.yaml by PyYAML, the
Dockerfile by the small parser in tests/helpers/dockerfile.py, following the Dockerfile reference's rules for
comments, line continuations and the exec form) and held against what the topology runs.
"""

from __future__ import annotations

import http.server
import inspect
import json
import re
import shlex
import sys
import threading
import tomllib
import urllib.parse
from pathlib import Path
from typing import Any

import httpx
import numpy as np
import pytest
import yaml
from pydantic import ValidationError

from tests.helpers import registries
from tests.helpers.dockerfile import Parsed, Stage, effective, parse_dockerfile
from tests.helpers.jsonl import read_jsonl
from tests.helpers.layout import package_folders
from textsieve.cli import main as textsieve_main
from textsieve.service.settings import Settings

ROOT = Path(__file__).resolve().parents[2]
sys.path.insert(0, str(ROOT / "deploy"))
import loopback  # noqa: E402
import topology  # noqa: E402

DOCKERFILE = ROOT / "Dockerfile"
COMPOSE = ROOT / "compose.yaml"
ENV_EXAMPLE = ROOT / "deploy" / "textsieve.env.example"
DOCKERIGNORE = ROOT / ".dockerignore"
LOCK = ROOT / "requirements" / "lock.txt"
CONTAINER_URL = f"http://127.0.0.1:{loopback.CONTAINER_PORT}"


@pytest.fixture(scope="module")
def dockerfile() -> Parsed:
    return parse_dockerfile(DOCKERFILE.read_text(encoding="utf-8"))


@pytest.fixture(scope="module")
def compose() -> dict[str, Any]:
    data: dict[str, Any] = yaml.safe_load(COMPOSE.read_text(encoding="utf-8"))
    return data


def env_file(path: Path) -> dict[str, str]:
    pairs = {}
    for line in path.read_text(encoding="utf-8").splitlines():
        if line.strip() and not line.lstrip().startswith("#"):
            key, sep, value = line.partition("=")
            assert sep, f"{path}: not KEY=VALUE: {line!r}"
            pairs[key.strip()] = value.strip()
    return pairs


def setting_names() -> set[str]:
    """The environment variables the service reads: TEXTSIEVE_ + each Settings field."""
    return {f"TEXTSIEVE_{name.upper()}" for name in Settings.model_fields}


def replica_services(compose: dict[str, Any]) -> dict[str, dict[str, Any]]:
    return {
        name: svc
        for name, svc in compose["services"].items()
        if svc.get("command") == list(loopback.SERVE_COMMAND) and "admin" not in svc.get("profiles", [])
    }


# -- Dockerfile ---------------------------------------------------------------------------------
def test_dockerfile_stages_are_slim_python_with_serve_as_default(dockerfile: Parsed) -> None:
    _, stages = dockerfile
    names = [s.name for s in stages]
    assert {"build", "runtime", "train", "serve"} <= set(names)
    assert names[-1] == "serve", "a plain 'docker build .' must give the serving image"
    for s in stages:
        assert s.base == "python:3.11-slim" or s.base in names, f"stage {s.name} starts from {s.base}"
    assert effective(stages, "serve").base == effective(stages, "train").base == "python:3.11-slim"
    assert effective(stages, "train").healthcheck == [], "a training job has no service to probe"


def test_images_run_as_a_user_the_image_creates_not_root(dockerfile: Parsed) -> None:
    _, stages = dockerfile
    for target in ("serve", "train"):
        user = effective(stages, target).user
        assert user and user.split(":")[0] not in ("root", "0"), f"{target} runs as {user!r}"
        assert any(re.search(rf"useradd\b.*\b{re.escape(user)}\b", run) for run in effective(stages, target).runs)


def test_dockerfile_serves_with_the_topology_command_port_and_health_check(dockerfile: Parsed) -> None:
    _, stages = dockerfile
    serve = effective(stages, "serve")
    assert serve.cmd == list(loopback.SERVE_COMMAND)
    assert serve.healthcheck == loopback.health_command(CONTAINER_URL)
    assert serve.expose == [str(loopback.CONTAINER_PORT)]
    assert serve.env["TEXTSIEVE_PORT"] == str(loopback.CONTAINER_PORT)
    # Reachable from the other containers: inside its own network namespace it listens on all interfaces.
    assert serve.env["TEXTSIEVE_HOST"] == "0.0.0.0"
    settings = {k for k in serve.env if k.startswith("TEXTSIEVE_")}
    assert settings <= setting_names(), f"not settings of the service: {settings - setting_names()}"
    unset = settings - set(loopback.REPLICA_ENV)
    assert not unset, f"not set by the topology test: {unset}"


def test_serving_image_installs_no_training_extras(dockerfile: Parsed) -> None:
    _, stages = dockerfile
    serve_runs = " ".join(effective(stages, "serve").runs + next(s for s in stages if s.name == "build").runs)
    assert "[serve]" in serve_runs
    assert "[train]" not in serve_runs and "torch" not in serve_runs


def locked_torch() -> str:
    pins = [line.strip() for line in LOCK.read_text(encoding="utf-8").splitlines() if line.startswith("torch==")]
    assert len(pins) == 1, pins
    return pins[0]


def test_training_image_pins_the_cpu_torch_of_the_lock(dockerfile: Parsed) -> None:
    _, stages = dockerfile
    train = next(s for s in stages if s.name == "train")
    pin = locked_torch()
    assert pin.endswith("+cpu"), f"the lock must hold the CPU build of torch (make lock): {pin}"
    runs = " ".join(train.runs)
    assert f'"{pin}"' in runs and "[train]" in runs
    assert "TORCH_INDEX_URL" in train.args and train.args["TORCH_INDEX_URL"].rstrip("/").endswith("/cpu")
    # Only torch comes from that index: everything else from the locked versions.
    from_index = [cmd for cmd in pip_installs(train) if '--index-url "${TORCH_INDEX_URL}"' in cmd]
    assert len(from_index) == 1 and "--no-deps" in from_index[0].split(), from_index


def pip_installs(stage: Stage) -> list[str]:
    """Each ``pip install`` command of a stage's RUN lines (split at ``&&``)."""
    return [cmd.strip() for run in stage.runs for cmd in run.split("&&") if "pip install" in cmd]


def test_both_images_install_the_project_with_the_lock(dockerfile: Parsed) -> None:
    _, stages = dockerfile
    build, train = (next(s for s in stages if s.name == name) for name in ("build", "train"))
    lock = LOCK.relative_to(ROOT).as_posix()
    # The build stage copies the lock to the same relative path (its WORKDIR is where the sources go).
    assert [lock, lock] in build.copies
    from_build = [args for args in train.copies if args[0] == "--from=build" and args[1].endswith(f"/{lock}")]
    assert len(from_build) == 1, train.copies
    for stage, path in ((build, lock), (train, from_build[0][-1])):
        project = [cmd for cmd in pip_installs(stage) if "textsieve-" in cmd]
        assert project, f"{stage.name} installs no wheel of the project"
        for cmd in project:
            words = shlex.split(cmd)
            assert "-c" in words and words[words.index("-c") + 1] == path, f"{stage.name}: {cmd}"


def test_dockerfile_copies_every_package_folder_and_the_context_keeps_them(dockerfile: Parsed) -> None:
    _, stages = dockerfile
    build = next(s for s in stages if s.name == "build")
    sources = {src.rstrip("/") for args in build.copies if not args[0].startswith("--") for src in args[:-1]}
    pyproject = tomllib.loads((ROOT / "pyproject.toml").read_text(encoding="utf-8"))
    needed = set(package_folders()) | {
        "pyproject.toml",
        pyproject["project"]["readme"],
        LOCK.relative_to(ROOT).as_posix(),
    }
    assert needed <= sources, f"the build stage needs {needed - sources}"
    for src in sources:
        assert (ROOT / src).exists(), src
    # .dockerignore: exclude everything, re-include what is copied (the dev venv is GBs).
    patterns = [
        p.strip() for p in DOCKERIGNORE.read_text(encoding="utf-8").splitlines() if p.strip() and not p.startswith("#")
    ]
    assert patterns[0] == "*"
    included = {p[1:].rstrip("/") for p in patterns if p.startswith("!")}
    assert sources <= included, f"excluded from the build context: {sources - included}"


# -- compose.yaml -------------------------------------------------------------------------------
def test_compose_has_postgres_with_a_named_volume_and_a_health_check(compose: dict[str, Any]) -> None:
    pg = compose["services"]["postgres"]
    assert pg["image"].startswith("postgres:")
    mounts = dict(v.split(":", 1) for v in pg["volumes"])
    data_volume = next(src for src, dst in mounts.items() if dst == "/var/lib/postgresql/data")
    assert data_volume in compose["volumes"], "the database lives in a named volume"
    assert "pg_isready" in pg["healthcheck"]["test"]


def test_compose_replicas_share_registry_and_blobs_and_wait_for_postgres(compose: dict[str, Any]) -> None:
    replicas = replica_services(compose)
    assert len(replicas) >= 2
    blob_volumes = set()
    for name, svc in replicas.items():
        env = svc["environment"]
        url = urllib.parse.urlsplit(env["TEXTSIEVE_REGISTRY"])
        assert url.scheme == "postgresql" and url.hostname in compose["services"], name
        assert url.password is None, "the database password belongs in the env file, not compose.yaml"
        mounts = dict(reversed(v.split(":")[:2]) for v in svc["volumes"])
        blob_volumes.add(mounts[env["TEXTSIEVE_BLOBS"]])
        assert svc["depends_on"][url.hostname]["condition"] == "service_healthy"
        assert svc["build"] == {"context": ".", "target": "serve"}
        assert "ports" not in svc, f"{name} is reached through nginx only"
        assert svc["expose"] == [str(loopback.CONTAINER_PORT)]
        # The image's HEALTHCHECK is the probe; an override would have to be the same command.
        assert "healthcheck" not in svc or svc["healthcheck"]["test"][1:] == loopback.health_command(CONTAINER_URL)
    assert len(blob_volumes) == 1 and blob_volumes <= set(compose["volumes"]), "one shared blob volume"


def test_compose_settings_are_the_topology_settings(compose: dict[str, Any], dockerfile: Parsed) -> None:
    example = env_file(ENV_EXAMPLE)
    image_env = {k for k in effective(dockerfile[1], "serve").env if k.startswith("TEXTSIEVE_")}
    for name, svc in replica_services(compose).items():
        assert [e["path"] for e in svc["env_file"]] == ["deploy/textsieve.env"], name
        assert "TEXTSIEVE_ADMIN_TOKEN" not in svc["environment"], "the admin token comes from the env file"
        configured = set(svc["environment"]) | {k for k in example if not k.startswith("POSTGRES_")} | image_env
        assert configured == set(loopback.REPLICA_ENV), name
        textsieve_keys = {k for k in configured if k.startswith("TEXTSIEVE_")}
        assert textsieve_keys <= setting_names(), textsieve_keys - setting_names()


def test_compose_load_balancer_renders_the_topology_template(compose: dict[str, Any]) -> None:
    lb = compose["services"]["lb"]
    replicas = replica_services(compose)
    assert lb["image"].startswith("nginx:")
    assert {name: dep["condition"] for name, dep in lb["depends_on"].items()} == {
        name: "service_healthy" for name in replicas
    }
    template = str(loopback.NGINX_TEMPLATE.relative_to(ROOT))
    assert f"./{template}:/etc/nginx/templates/default.conf.template:ro" in lb["volumes"]
    env = lb["environment"]
    assert set(env) == set(loopback.TEMPLATE_VARS)
    assert {env["TEXTSIEVE_REPLICA_1"], env["TEXTSIEVE_REPLICA_2"]} == {
        f"{name}:{loopback.CONTAINER_PORT}" for name in replicas
    }
    assert env["TEXTSIEVE_LB_LISTEN"] == str(loopback.LB_PORT)
    host, _, container_port = lb["ports"][0].rpartition(":")
    assert container_port == str(loopback.LB_PORT) and host.startswith("127.0.0.1:"), lb["ports"]
    assert f"http://127.0.0.1:{loopback.LB_PORT}{loopback.READINESS_PATH}" in lb["healthcheck"]["test"]


def test_compose_admin_service_is_a_replica_with_bundles_and_no_server(compose: dict[str, Any]) -> None:
    admin = compose["services"]["admin"]
    replica = next(iter(replica_services(compose).values()))
    assert admin["profiles"] == ["admin"], "'docker compose up' must not start it"
    for key in ("image", "environment", "env_file", "depends_on"):
        assert admin[key] == replica[key], key
    assert any(v.endswith(":/bundles:ro") for v in admin["volumes"])
    assert set(replica["volumes"]) <= set(admin["volumes"])


def test_env_example_placeholders_cannot_be_deployed_unchanged() -> None:
    example = env_file(ENV_EXAMPLE)
    assert set(example) == {"TEXTSIEVE_ADMIN_TOKEN", "POSTGRES_PASSWORD", "PGPASSWORD"}
    assert example["PGPASSWORD"] == example["POSTGRES_PASSWORD"]
    # The service refuses the placeholder token, so a copy left unedited does not start.
    with pytest.raises(ValidationError, match="at least"):
        Settings(admin_token=example["TEXTSIEVE_ADMIN_TOKEN"])
    text = COMPOSE.read_text(encoding="utf-8")
    assert example["TEXTSIEVE_ADMIN_TOKEN"] not in text and example["PGPASSWORD"] not in text


# -- the nginx template -----------------------------------------------------------------------
def _directives(text: str) -> str:
    return "\n".join(line.split("#", 1)[0] for line in text.splitlines())


def test_template_placeholders_are_the_ones_filled_in() -> None:
    text = _directives(loopback.NGINX_TEMPLATE.read_text(encoding="utf-8"))
    assert set(re.findall(r"\$\{(\w+)\}", text)) == set(loopback.TEMPLATE_VARS)
    rendered = loopback.render_template(
        loopback.NGINX_TEMPLATE.read_text(encoding="utf-8"), {k: f"value-of-{k}" for k in loopback.TEMPLATE_VARS}
    )
    assert "$remote_addr" in rendered and "$upstream_addr" in rendered, "nginx's variables kept"


def _size(value: str) -> int:
    """nginx sizes: a number with an optional k/m suffix (nginx docs, "Syntax": sizes)."""
    m = re.fullmatch(r"(\d+)([kKmM]?)", value)
    assert m, value
    return int(m.group(1)) * {"": 1, "k": 1024, "m": 1024**2}[m.group(2).lower()]


def test_template_limits_fit_the_service() -> None:
    text = _directives(loopback.NGINX_TEMPLATE.read_text(encoding="utf-8"))
    # The service must see an oversized body itself, to answer with a problem naming its limit.
    body = re.search(r"client_max_body_size\s+(\w+);", text)
    assert body and _size(body.group(1)) > Settings.model_fields["max_body_bytes"].default
    # nginx must drop an idle upstream connection before uvicorn does, or it may reuse one
    # that is being closed (uvicorn's keep-alive default, read from uvicorn itself).
    import uvicorn

    uvicorn_keepalive = inspect.signature(uvicorn.Config).parameters["timeout_keep_alive"].default
    keepalive = re.search(r"keepalive_timeout\s+(\d+)s;", text)
    assert keepalive and int(keepalive.group(1)) < uvicorn_keepalive
    fails = set(re.findall(r"fail_timeout=(\d+)s", text))
    assert fails == {str(int(loopback.FAIL_TIMEOUT_S))}
    # Only the prediction route may be resent after a replica died mid-request.
    blocks = re.findall(r"location\s+(=?\s*\S+)\s*\{([^}]*)\}", text)
    resent = [where for where, block in blocks if "non_idempotent" in block]
    assert resent == ["= /v1/predict"]


# -- `textsieve health`, the probe of the image ------------------------------------------------
@pytest.mark.parametrize(("status", "exit_code"), [(200, 0), (503, 1)])
def test_health_command_probes_the_readiness_endpoint(
    status: int, exit_code: int, capsys: pytest.CaptureFixture[str]
) -> None:
    seen: list[str] = []

    class Handler(http.server.BaseHTTPRequestHandler):
        def do_GET(self) -> None:  # noqa: N802 (the http.server API)
            seen.append(self.path)
            body = json.dumps({"ready": status == 200, "reason": "probe"}).encode()
            self.send_response(status)
            self.send_header("Content-Type", "application/json")
            self.send_header("Content-Length", str(len(body)))
            self.end_headers()
            self.wfile.write(body)

        def log_message(self, *args: object) -> None:
            pass

    with http.server.ThreadingHTTPServer(("127.0.0.1", 0), Handler) as server:
        thread = threading.Thread(target=server.serve_forever, daemon=True)
        thread.start()
        try:
            url = f"http://127.0.0.1:{server.server_address[1]}"
            assert textsieve_main(loopback.health_command(url)[1:]) == exit_code
        finally:
            server.shutdown()
            thread.join(5)
    assert seen == [loopback.READINESS_PATH]
    assert len(capsys.readouterr().out.strip().splitlines()) == 1


def test_topology_default_texts_are_ones_the_service_accepts() -> None:
    # `deploy/topology.py --bundle … --bundle …` as the README runs it sends these; an empty text
    # is a 422 (nothing to classify), which failed the run at its first prediction.
    from textsieve.service.web.schemas import PredictRequest

    PredictRequest(texts=list(topology.DEFAULT_TEXTS))


# -- the topology, end to end -----------------------------------------------------------------
@pytest.fixture(scope="session")
def postgres_url() -> str:
    """TEXTSIEVE_TEST_PG (scripts/test-services.sh): a skip on a developer machine without it,
    a failure in CI, where the server must be there. Asked for before the bundles are trained."""
    return registries.postgres_url()


@pytest.mark.postgres
def test_topology_on_loopback(
    postgres_url: str, tiny_bundles: dict[str, Path], tiny_data: Path, tmp_path: Path
) -> None:
    pg = postgres_url
    texts = [r["text"] for r in read_jsonl(tiny_data / "test.jsonl")[:12]]
    report = topology.run_scenario(
        pg, [tiny_bundles["a"], tiny_bundles["b"]], workdir=tmp_path, texts=texts, poll_seconds=0.5, install_nginx=True
    )
    figures = {k: v for k, v in report.__dict__.items() if not k.endswith("_reply")}
    print(f"\ntopology: {json.dumps(figures)}")

    assert report.not_ready_reason.startswith("not ready")
    # The replica that did not take the admin call follows within one poll plus its load.
    assert report.first_live_lag_s <= 0.5 + report.first_live_load_s + loopback.LAG_SLACK_S
    assert report.swap_lag_s <= 0.5 + report.swap_load_s + loopback.LAG_SLACK_S
    # Requests went on across the swap: answers from both versions, none failed.
    assert report.swap_failed == [] and set(report.swap_versions) == {1, 2}
    assert report.max_probability_delta <= loopback.PROBABILITY_TOLERANCE
    # Stopping and killing a replica under load lost nothing, and nginx really did resend.
    assert report.stop_failed == [] and report.stop_requests >= 100 and report.stop_retried >= 1
    assert report.kill_failed == [] and report.kill_requests >= 100 and report.kill_retried >= 1

    # What nginx answered is what onnxruntime computes from the bundle itself.
    from textsieve.registry.bundle import open_bundle
    from textsieve.registry.runtime import Predictor

    for key, reply in (("a", report.first_reply), ("b", report.swapped_reply)):
        predictor = Predictor.from_bundle(open_bundle(tiny_bundles[key]), threads=1)
        direct = predictor.predict(texts, spans=3)
        for served, own in zip(reply["results"], direct, strict=True):
            public = own.public()
            assert served["label"] == public["label"]
            labels = sorted(public["probabilities"])
            np.testing.assert_allclose(
                [served["probabilities"][k] for k in labels],
                [public["probabilities"][k] for k in labels],
                atol=loopback.PROBABILITY_TOLERANCE,
            )


def test_nginx_hands_the_replicas_the_address_it_saw_not_one_a_client_forged() -> None:
    """The template in real nginx, in front of two plain HTTP servers that note the X-Forwarded-For
    they get. A client's own X-Forwarded-For must not reach a replica: compose trusts every proxy
    (FORWARDED_ALLOW_IPS "*"), where uvicorn takes the list's first entry as the client (CWE-348)."""
    import shutil
    import tempfile

    seen: list[list[str]] = []

    class Handler(http.server.BaseHTTPRequestHandler):
        def do_GET(self) -> None:  # noqa: N802 (the http.server API)
            seen.append(self.headers.get_all("X-Forwarded-For") or [])
            self.send_response(200)
            self.send_header("Content-Length", "0")
            self.end_headers()

        def log_message(self, *args: object) -> None:
            pass

    # nginx runs as `nobody` under root, in a folder it can reach (as the topology's Balancer does).
    folder = Path(tempfile.mkdtemp(prefix="textsieve-nginx-xff-"))
    with (
        http.server.ThreadingHTTPServer(("127.0.0.1", 0), Handler) as one,
        http.server.ThreadingHTTPServer(("127.0.0.1", 0), Handler) as two,
    ):
        for server in (one, two):
            threading.Thread(target=server.serve_forever, daemon=True).start()
        upstreams = [f"127.0.0.1:{s.server_address[1]}" for s in (one, two)]
        balancer = loopback.Balancer(loopback.nginx_executable(), folder, loopback.free_port(), upstreams)
        try:
            balancer.start()
            for forged in ("203.0.113.9", "203.0.113.9, 198.51.100.7"):
                seen.clear()
                r = httpx.get(f"{balancer.url}/healthz", headers={"X-Forwarded-For": forged}, timeout=10)
                assert r.status_code == 200
                assert seen == [["127.0.0.1"]], seen
        finally:
            balancer.stop()
            for server in (one, two):
                server.shutdown()
            shutil.rmtree(folder, ignore_errors=True)
