"""The Kubernetes manifests (deploy/kubernetes/) agree with the Dockerfile, compose.yaml and the
service itself: ports, settings names, probe paths, the user, the writable paths a read-only root
filesystem leaves, and the shutdown timing. No cluster runs here: the manifests are parsed with
PyYAML and checked against Kubernetes 1.37's published API schemas (kubernetes-validate ships
them) and against the code they configure.
"""

from __future__ import annotations

import re
import shlex
import tempfile
import urllib.parse
from pathlib import Path
from typing import Any

import pytest
import yaml

from tests.helpers.dockerfile import Parsed, effective, parse_dockerfile
from textsieve.cli import build_parser
from textsieve.registry.api import CACHE_DIR
from textsieve.service.cli import GRACEFUL_SECONDS
from textsieve.service.settings import Settings
from textsieve.service.web.app import create_app

ROOT = Path(__file__).resolve().parents[2]
FOLDER = ROOT / "deploy" / "kubernetes"
DOCKERFILE = ROOT / "Dockerfile"
COMPOSE = ROOT / "compose.yaml"
SETTINGS = {f"TEXTSIEVE_{name.upper()}" for name in Settings.model_fields}


def _load_check_script() -> Any:
    import importlib.util

    spec = importlib.util.spec_from_file_location("check_kubernetes", ROOT / "scripts" / "check_kubernetes.py")
    assert spec is not None and spec.loader is not None
    module = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(module)
    return module


check = _load_check_script()


@pytest.fixture(scope="module")
def objects() -> dict[str, dict[str, Any]]:
    """Every object in deploy/kubernetes/ by kind (each kind appears once)."""
    by_kind: dict[str, dict[str, Any]] = {}
    for _path, doc in check.manifests(FOLDER):
        assert doc["kind"] not in by_kind, f"two objects of kind {doc['kind']}"
        by_kind[doc["kind"]] = doc
    return by_kind


@pytest.fixture(scope="module")
def dockerfile() -> Parsed:
    return parse_dockerfile(DOCKERFILE.read_text(encoding="utf-8"))


@pytest.fixture(scope="module")
def compose() -> dict[str, Any]:
    data: dict[str, Any] = yaml.safe_load(COMPOSE.read_text(encoding="utf-8"))
    return data


def pod(obj: dict[str, Any]) -> dict[str, Any]:
    spec: dict[str, Any] = obj["spec"]["template"]["spec"]
    return spec


def container(obj: dict[str, Any]) -> dict[str, Any]:
    (only,) = pod(obj)["containers"]
    c: dict[str, Any] = only
    return c


def env_names(c: dict[str, Any], objects: dict[str, dict[str, Any]]) -> set[str]:
    """Variables a container gets: its own env and the ConfigMaps it takes whole."""
    names = {e["name"] for e in c.get("env", [])}
    for source in c.get("envFrom", []):
        assert source["configMapRef"]["name"] == objects["ConfigMap"]["metadata"]["name"]
        names |= set(objects["ConfigMap"]["data"])
    return names


def literal_env(c: dict[str, Any], objects: dict[str, dict[str, Any]]) -> dict[str, str]:
    values = dict(objects["ConfigMap"]["data"]) if c.get("envFrom") else {}
    values.update({e["name"]: e["value"] for e in c.get("env", []) if "value" in e})
    return values


def cores(quantity: str) -> float:
    """A CPU quantity ("2", "1500m") in cores (Kubernetes API reference, Quantity)."""
    return int(quantity[:-1]) / 1000 if quantity.endswith("m") else float(quantity)


# -- the schemas ------------------------------------------------------------------------------------
def test_every_manifest_is_a_valid_object_of_the_named_kubernetes_release() -> None:
    docs = check.manifests(FOLDER)
    assert {d["kind"] for _, d in docs} >= {
        "Deployment",
        "Service",
        "PodDisruptionBudget",
        "HorizontalPodAutoscaler",
        "PersistentVolumeClaim",
        "Job",
        "ConfigMap",
    }
    assert check.faults(docs) == []


@pytest.mark.parametrize(
    ("change", "expected"),
    [
        pytest.param(lambda c: c.update(readinessProbes=c.pop("readinessProbe")), "readinessProbes", id="misspelt"),
        pytest.param(lambda c: c["resources"]["limits"].update(cpu=["2"]), "cpu", id="wrong-type"),
        pytest.param(lambda c: c.pop("name"), "name", id="required-missing"),
    ],
)
def test_the_schema_check_refuses_a_broken_deployment(
    objects: dict[str, dict[str, Any]], change: Any, expected: str
) -> None:
    """The check can fail: strict schemas refuse unknown fields, wrong types and missing required ones."""
    broken = yaml.safe_load(yaml.safe_dump(objects["Deployment"]))
    change(container(broken))
    (fault,) = check.faults([(FOLDER / "deployment.yaml", broken)])
    assert expected in fault


def test_kustomization_lists_every_manifest_but_the_one_off_job(objects: dict[str, dict[str, Any]]) -> None:
    kustomization = yaml.safe_load((FOLDER / "kustomization.yaml").read_text(encoding="utf-8"))
    listed = set(kustomization["resources"])
    on_disk = {p.name for p in FOLDER.glob("*.yaml")} - {"kustomization.yaml"}
    assert listed == on_disk - {"publish-job.yaml"}
    # A Job's pod template cannot change once created, so each release creates a new one.
    assert "generateName" in objects["Job"]["metadata"] and "name" not in objects["Job"]["metadata"]


# -- ports and names --------------------------------------------------------------------------------
def test_ports_agree_with_the_dockerfile_and_compose(
    objects: dict[str, dict[str, Any]], dockerfile: Parsed, compose: dict[str, Any]
) -> None:
    image = effective(dockerfile[1], "serve")
    c = container(objects["Deployment"])
    (port,) = c["ports"]
    assert image.expose == [str(port["containerPort"])]
    assert image.env["TEXTSIEVE_PORT"] == literal_env(c, objects)["TEXTSIEVE_PORT"] == str(port["containerPort"])
    for name in ("textsieve-1", "textsieve-2"):
        assert compose["services"][name]["expose"] == [str(port["containerPort"])]
    # The Service and every probe reach the container by the port's name.
    assert objects["Service"]["spec"]["ports"][0]["targetPort"] == port["name"]
    for probe in ("startupProbe", "readinessProbe", "livenessProbe"):
        assert c[probe]["httpGet"]["port"] == port["name"], probe
    # Inside its own network namespace the service must listen on every interface (as in the image).
    assert literal_env(c, objects)["TEXTSIEVE_HOST"] == image.env["TEXTSIEVE_HOST"] == "0.0.0.0"
    assert c["command"] == image.cmd


def test_every_textsieve_variable_is_a_setting_of_the_service(objects: dict[str, dict[str, Any]]) -> None:
    for kind in ("Deployment", "Job"):
        names = {n for n in env_names(container(objects[kind]), objects) if n.startswith("TEXTSIEVE_")}
        assert names <= SETTINGS, f"{kind}: not settings of the service: {names - SETTINGS}"
    # The ConfigMap is what the replicas and the Job share, and holds settings only.
    assert set(objects["ConfigMap"]["data"]) <= SETTINGS


def test_registry_and_blobs_are_set_as_compose_sets_them(
    objects: dict[str, dict[str, Any]], compose: dict[str, Any], dockerfile: Parsed
) -> None:
    data = objects["ConfigMap"]["data"]
    url = urllib.parse.urlsplit(data["TEXTSIEVE_REGISTRY"])
    assert url.scheme == "postgresql" and url.password is None, "the password comes from the Secret, not the URL"
    compose_env = compose["services"]["textsieve-1"]["environment"]
    assert (
        data["TEXTSIEVE_BLOBS"]
        == compose_env["TEXTSIEVE_BLOBS"]
        == effective(dockerfile[1], "serve").env["TEXTSIEVE_BLOBS"]
    )
    assert urllib.parse.urlsplit(compose_env["TEXTSIEVE_REGISTRY"]).path == url.path, "the same database name"


def test_secrets_are_only_referenced(objects: dict[str, dict[str, Any]]) -> None:
    """The admin token and the database password come from a Secret; none is written in a manifest."""
    assert "Secret" not in objects
    for kind, wanted in (("Deployment", {"TEXTSIEVE_ADMIN_TOKEN", "PGPASSWORD"}), ("Job", {"PGPASSWORD"})):
        c = container(objects[kind])
        from_secret = {e["name"] for e in c["env"] if "secretKeyRef" in e.get("valueFrom", {})}
        assert from_secret == wanted, kind
        assert not wanted & set(literal_env(c, objects)), f"{kind}: a secret written as a literal value"
    refs = {
        (e["valueFrom"]["secretKeyRef"]["name"], e["name"], e["valueFrom"]["secretKeyRef"]["key"])
        for kind in ("Deployment", "Job")
        for e in container(objects[kind])["env"]
        if "secretKeyRef" in e.get("valueFrom", {})
    }
    assert len({name for name, _, _ in refs}) == 1, "one Secret, as the README creates it"
    assert len({(var, key) for _, var, key in refs}) == len({var for _, var, _ in refs}), "one key per variable"
    readme = (FOLDER / "README.md").read_text(encoding="utf-8")
    for name, _, key in refs:
        assert name in readme and f"--from-literal={key}=" in readme, f"README.md does not create {name}/{key}"


# -- probes --------------------------------------------------------------------------------------------
@pytest.fixture(scope="module")
def get_paths() -> set[str]:
    """GET paths in the service's OpenAPI document (the app built with test settings, as
    scripts/check_openapi.py builds it)."""
    with tempfile.TemporaryDirectory() as folder:
        app = create_app(Settings(registry=folder, workers=1, inference="threads", access_log=False))
        return {path for path, ops in app.openapi()["paths"].items() if "get" in ops}


def test_probes_use_the_service_health_endpoints(objects: dict[str, dict[str, Any]], get_paths: set[str]) -> None:
    c = container(objects["Deployment"])
    # design.md: /healthz is liveness (the process answers), /readyz readiness (models loaded and warmed).
    assert c["livenessProbe"]["httpGet"]["path"] == "/healthz"
    assert c["readinessProbe"]["httpGet"]["path"] == "/readyz"
    # /healthz answers before the models are in (service/web/app.py), so the startup window that
    # covers a model's load must watch /readyz.
    assert c["startupProbe"]["httpGet"]["path"] == "/readyz"
    for probe in ("startupProbe", "readinessProbe", "livenessProbe"):
        assert c[probe]["httpGet"]["path"] in get_paths, probe


def test_startup_window_covers_a_model_load_many_times(objects: dict[str, dict[str, Any]]) -> None:
    startup = container(objects["Deployment"])["startupProbe"]
    window = startup["periodSeconds"] * startup["failureThreshold"]
    # The load time measured is stated beside the probe, where whoever re-sizes it reads it.
    said = re.search(r"took ([\d.]+) s", (FOLDER / "deployment.yaml").read_text(encoding="utf-8"))
    assert said, "deployment.yaml says how long a model load took"
    measured = float(said.group(1))
    assert window >= 10 * measured, f"{window} s for a load measured at {measured} s"


def test_shutdown_fits_the_grace_period(objects: dict[str, dict[str, Any]]) -> None:
    """preStop pause + uvicorn's graceful shutdown (service/cli.py) end before the kubelet's SIGKILL."""
    spec = pod(objects["Deployment"])
    (_, pause) = container(objects["Deployment"])["lifecycle"]["preStop"]["exec"]["command"]
    assert int(pause) + GRACEFUL_SECONDS < spec["terminationGracePeriodSeconds"]


# -- the user and the file system -----------------------------------------------------------------------
def test_pods_run_as_the_image_user_with_a_read_only_root(
    objects: dict[str, dict[str, Any]], dockerfile: Parsed
) -> None:
    serve = effective(dockerfile[1], "serve")
    useradd = next(r for r in serve.runs if "useradd" in r)
    uid_said = re.search(r"--uid (\d+)", useradd)
    gid_said = re.search(r"groupadd\b.*--gid (\d+)", " ".join(serve.runs))
    assert uid_said and gid_said, "the Dockerfile creates its user and group with fixed ids"
    uid, gid = int(uid_said.group(1)), int(gid_said.group(1))
    assert re.search(rf"--uid {uid}\b.*\b{serve.user}\b", useradd), "the image's USER is that uid"
    for kind in ("Deployment", "Job"):
        sec = pod(objects[kind])["securityContext"]
        assert (sec["runAsUser"], sec["runAsGroup"], sec["fsGroup"]) == (uid, gid, gid), kind
        assert sec["runAsNonRoot"] is True and uid != 0
        c = container(objects[kind])["securityContext"]
        assert c["readOnlyRootFilesystem"] is True and c["allowPrivilegeEscalation"] is False, kind
        assert c["capabilities"]["drop"] == ["ALL"], kind


def test_every_path_the_service_writes_is_a_mounted_volume(objects: dict[str, dict[str, Any]]) -> None:
    """With a read-only root, the blob folder, the registry's cache beside it (registry/api.py) and the
    temporary folder (the worker processes' fork server puts its socket there) must be volumes."""
    for kind in ("Deployment", "Job"):
        c = container(objects[kind])
        blobs = Path(literal_env(c, objects)["TEXTSIEVE_BLOBS"])
        writable = {Path(m["mountPath"]) for m in c["volumeMounts"] if not m.get("readOnly")}
        assert {blobs, blobs.parent / CACHE_DIR, Path(tempfile.gettempdir())} <= writable, kind
        claims = {v["name"]: v for v in pod(objects[kind])["volumes"]}
        (blob_mount,) = (m for m in c["volumeMounts"] if Path(m["mountPath"]) == blobs)
        claim = claims[blob_mount["name"]]["persistentVolumeClaim"]["claimName"]
        assert claim == objects["PersistentVolumeClaim"]["metadata"]["name"], kind
    # Every replica and the Job write blobs at once: the claim must allow many writers on many nodes.
    assert objects["PersistentVolumeClaim"]["spec"]["accessModes"] == ["ReadWriteMany"]


# -- sizing, scaling, disruption -------------------------------------------------------------------------
def test_workers_match_the_cpu_limit_and_requests_equal_limits(objects: dict[str, dict[str, Any]]) -> None:
    c = container(objects["Deployment"])
    res = c["resources"]
    assert res["requests"] == res["limits"], "Guaranteed QoS: requests equal to limits"
    env = literal_env(c, objects)
    assert int(env["TEXTSIEVE_WORKERS"]) == cores(res["limits"]["cpu"])
    # The default max_requests is 32 per core (service/settings.py); the node's count would be wrong here.
    assert int(env["TEXTSIEVE_MAX_REQUESTS"]) == 32 * cores(res["limits"]["cpu"])


def test_replicas_autoscaler_budget_and_service_select_the_same_pods(objects: dict[str, dict[str, Any]]) -> None:
    deployment = objects["Deployment"]
    labels = deployment["spec"]["template"]["metadata"]["labels"]
    assert deployment["spec"]["selector"]["matchLabels"].items() <= labels.items()
    assert objects["Service"]["spec"]["selector"].items() <= labels.items()
    assert objects["PodDisruptionBudget"]["spec"]["selector"]["matchLabels"].items() <= labels.items()
    job_labels = objects["Job"]["spec"]["template"]["metadata"]["labels"]
    assert not objects["Service"]["spec"]["selector"].items() <= job_labels.items(), "the Job gets no traffic"
    hpa = objects["HorizontalPodAutoscaler"]["spec"]
    assert hpa["scaleTargetRef"] == {"apiVersion": "apps/v1", "kind": "Deployment", "name": "textsieve"}
    assert deployment["metadata"]["name"] == "textsieve"
    assert deployment["spec"]["replicas"] >= 2 and hpa["minReplicas"] >= 2
    (metric,) = hpa["metrics"]
    assert metric["resource"]["name"] == "cpu"
    # With maxUnavailable 1 and at least two replicas, a drain always leaves one serving.
    assert objects["PodDisruptionBudget"]["spec"]["maxUnavailable"] == 1
    assert deployment["spec"]["strategy"]["rollingUpdate"]["maxUnavailable"] == 0


def test_the_job_publishes_then_promotes_with_the_cli_verbs(objects: dict[str, dict[str, Any]]) -> None:
    """The Job's shell line calls real verbs with real flags: each command parses with textsieve's parser."""
    c = container(objects["Job"])
    assert c["command"][:2] == ["/bin/sh", "-c"]
    assert pod(objects["Job"])["restartPolicy"] == "Never" and objects["Job"]["spec"]["backoffLimit"] == 0
    env = {e["name"]: e["value"] for e in c["env"] if "value" in e}
    script = c["command"][2].replace("$(", "").replace(")", "")
    commands = []
    for part in script.split(";"):
        words = shlex.split(part.strip().removeprefix("version="))
        if words and words[0] == "textsieve":
            commands.append([env.get(w.strip("$"), w) if w.startswith("$") else w for w in words])
    assert [cmd[1] for cmd in commands] == ["publish", "promote"]
    parser = build_parser()
    publish = parser.parse_args([w.replace("$PUBLISH_BUNDLE", env["PUBLISH_BUNDLE"]) for w in commands[0][1:]])
    promote = parser.parse_args([w.replace("$version", "1") for w in commands[1][1:]])
    assert publish.model == promote.model and promote.to == "live"
    bundles = next(m for m in c["volumeMounts"] if m["mountPath"] == "/bundles")
    assert bundles["readOnly"] is True and str(publish.bundle).startswith("/bundles/")
