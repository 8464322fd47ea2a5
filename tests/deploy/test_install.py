"""The serving install: ``pip install -c requirements/lock.txt '.[serve]'`` (README "Scaling
out") into a fresh venv gives a working ``textsieve serve`` and no torch.

One venv for the module (the pip install is the slow part): the project's wheel is built from
a copy of its sources, installed with the serving extras and the lock through the machine's
ordinary pip configuration, then used the way a deployment uses it: serve a published bundle, answer
``/readyz`` and ``/v1/predict``, pass ``textsieve health`` (the Docker image's probe).
The installed size is printed; README "Scaling out" quotes it.
"""

from __future__ import annotations

import json
import os
import re
import shutil
import signal
import subprocess
import sys
import time
import tomllib
from collections.abc import Callable, Iterator
from dataclasses import dataclass
from pathlib import Path

import httpx
import numpy as np
import pytest

from tests.helpers.layout import package_folders
from tests.helpers.net import exited, free_port, wait_ready

ROOT = Path(__file__).resolve().parents[2]
PYPROJECT = tomllib.loads((ROOT / "pyproject.toml").read_text(encoding="utf-8"))
LOCK = ROOT / "requirements" / "lock.txt"
MODEL = "support"
TEXTS = ["I was charged twice for my order", "the app crashes when I open settings", "thanks, all sorted now", "ok"]
# The serving venv measured 249 MB of site-packages (numpy, onnx, onnxruntime, the web stack).
# The CPU build of torch alone is several hundred MB more, so torch sneaking in breaks this budget.
SITE_PACKAGES_BUDGET_MB = 350
START_TIMEOUT_S = 90.0


@dataclass(frozen=True)
class ServeVenv:
    root: Path
    wheel: Path
    install_seconds: float

    @property
    def bin(self) -> Path:
        return self.root / "bin"

    @property
    def site_packages(self) -> Path:
        found = list((self.root / "lib").glob("python3*/site-packages"))
        assert len(found) == 1, found
        return found[0]


def clean_env() -> dict[str, str]:
    """The environment without this project's settings or the dev venv leaking in."""
    drop = ("TEXTSIEVE_", "VIRTUAL_ENV", "PYTHONPATH", "PYTHONHOME")
    return {k: v for k, v in os.environ.items() if not k.startswith(drop)}


def run(cmd: list[str | Path], *, cwd: Path, timeout: float = 120) -> subprocess.CompletedProcess[str]:
    return subprocess.run(
        [str(c) for c in cmd],
        cwd=cwd,
        env=clean_env(),
        capture_output=True,
        text=True,
        timeout=timeout,
        stdin=subprocess.DEVNULL,
    )


def copy_sources(dst: Path) -> Path:
    """What the wheel is built from, copied so the build leaves nothing in the work tree."""
    dst.mkdir(parents=True)
    for name in ("pyproject.toml", PYPROJECT["project"]["readme"]):
        shutil.copy2(ROOT / name, dst / name)
    for folder in package_folders():  # the links in textsieve/ stay links
        shutil.copytree(
            ROOT / folder, dst / folder, symlinks=True, ignore=shutil.ignore_patterns("__pycache__", "*.pyc")
        )
    return dst


@pytest.fixture(scope="module")
def serve_venv(tmp_path_factory: pytest.TempPathFactory) -> ServeVenv:
    base = tmp_path_factory.mktemp("serve-install")
    src = copy_sources(base / "src")
    built = run(
        [sys.executable, "-m", "pip", "wheel", "--no-deps", "--quiet", "--wheel-dir", base / "wheels", src],
        cwd=base,
        timeout=300,
    )
    assert built.returncode == 0, built.stderr[-2000:]
    wheels = list((base / "wheels").glob("textsieve-*.whl"))
    assert len(wheels) == 1, wheels
    # The base interpreter, not the dev venv's: a fresh venv as a user would make it.
    python = getattr(sys, "_base_executable", sys.executable)
    made = run([python, "-m", "venv", base / "venv"], cwd=base)
    assert made.returncode == 0, made.stderr
    started = time.monotonic()
    installed = run(
        [base / "venv" / "bin" / "pip", "install", "--quiet", "-c", LOCK, f"{wheels[0]}[serve]"], cwd=base, timeout=900
    )
    assert installed.returncode == 0, installed.stderr[-3000:]
    return ServeVenv(base / "venv", wheels[0], time.monotonic() - started)


def extra_names(extra: str) -> set[str]:
    """Distribution names of an optional-dependencies group (PEP 508: the name comes first)."""
    names = set()
    for requirement in PYPROJECT["project"]["optional-dependencies"][extra]:
        m = re.match(r"[A-Za-z0-9][A-Za-z0-9._-]*", requirement)
        assert m, requirement
        names.add(m.group(0).lower().replace("_", "-"))
    return names


def dir_size(folder: Path) -> int:
    return sum(p.lstat().st_size for p in folder.rglob("*") if p.is_file() and not p.is_symlink())


def test_serve_install_has_no_torch_nor_any_training_extra(serve_venv: ServeVenv) -> None:
    probe = run([serve_venv.bin / "python", "-c", "import torch"], cwd=serve_venv.root)
    assert probe.returncode != 0 and "No module named 'torch'" in probe.stderr
    listed = run([serve_venv.bin / "pip", "list", "--format", "json"], cwd=serve_venv.root)
    installed = {p["name"].lower().replace("_", "-") for p in json.loads(listed.stdout)}
    train, serve = (extra_names("train"), extra_names("serve"))
    assert not (installed & train), f"training extras in a serving install: {installed & train}"
    assert serve <= installed, f"serving extras missing: {serve - installed}"


def test_serve_install_size_is_small(
    serve_venv: ServeVenv, capsys: pytest.CaptureFixture[str], record_property: Callable[[str, object], None]
) -> None:
    mb = dir_size(serve_venv.site_packages) / 1e6
    record_property("serve_site_packages_mb", round(mb, 1))
    with capsys.disabled():
        print(f"\nserve-only install: site-packages {mb:.0f} MB; pip install took {serve_venv.install_seconds:.0f}s")
    assert mb < SITE_PACKAGES_BUDGET_MB


def test_cli_works_and_training_verbs_say_what_to_install(serve_venv: ServeVenv, tmp_path: Path) -> None:
    helped = run([serve_venv.bin / "textsieve", "--help"], cwd=tmp_path)
    assert helped.returncode == 0 and "serve" in helped.stdout
    (tmp_path / "data.jsonl").write_text('{"text": "a", "label": "x"}\n', encoding="utf-8")
    train = run(
        [serve_venv.bin / "textsieve", "train", tmp_path / "data.jsonl", "--out", tmp_path / "run"], cwd=tmp_path
    )
    assert train.returncode != 0
    assert "Traceback" not in train.stderr and len(train.stderr.strip().splitlines()) == 1, train.stderr
    assert "pip install 'textsieve[train]'" in train.stderr


@pytest.fixture
def served(serve_venv: ServeVenv, tiny_bundles: dict[str, Path], tmp_path: Path) -> Iterator[str]:
    """The serve-only venv's ``textsieve serve`` on a folder registry with one live version."""
    from textsieve.registry import open_registry

    registry = tmp_path / "registry"
    with open_registry(registry) as reg:
        reg.publish(tiny_bundles["a"], MODEL, actor="tests")
        reg.promote(MODEL, 1, "live", reason="serve-only install test", actor="tests")
    sock_port = free_port()
    url = f"http://127.0.0.1:{sock_port}"
    log = tmp_path / "serve.log"
    with open(log, "wb") as out:
        proc = subprocess.Popen(
            [
                str(serve_venv.bin / "textsieve"),
                "serve",
                "--registry",
                str(registry),
                "--host",
                "127.0.0.1",
                "--port",
                str(sock_port),
            ],
            cwd=tmp_path,
            env=clean_env(),
            stdin=subprocess.DEVNULL,
            stdout=out,
            stderr=subprocess.STDOUT,
            start_new_session=True,
        )
    try:
        wait_ready(url, timeout=START_TIMEOUT_S, gone=exited(proc, log))
        yield url
    finally:
        proc.send_signal(signal.SIGTERM)
        try:
            proc.wait(20)
        except subprocess.TimeoutExpired:
            proc.kill()
            proc.wait(20)


def test_serve_only_install_serves_a_published_bundle(
    served: str, serve_venv: ServeVenv, tiny_bundles: dict[str, Path], tmp_path: Path
) -> None:
    ready = httpx.get(f"{served}/readyz", timeout=10)
    assert ready.status_code == 200 and ready.json()["models"][MODEL]["version"] == 1
    health = run([serve_venv.bin / "textsieve", "health", "--url", served], cwd=tmp_path)
    assert health.returncode == 0 and health.stdout.startswith("ready"), health.stdout + health.stderr

    r = httpx.post(f"{served}/v1/predict", json={"texts": TEXTS, "spans": 3}, timeout=30)
    assert r.status_code == 200, r.text
    reply = r.json()
    assert (reply["model"], reply["version"]) == (MODEL, 1)

    # The same answers as onnxruntime on the bundle in the development venv (two installs, one model).
    from textsieve.registry.bundle import open_bundle
    from textsieve.registry.runtime import Predictor

    direct = Predictor.from_bundle(open_bundle(tiny_bundles["a"]), threads=1).predict(TEXTS, spans=3)
    for text, got, own in zip(TEXTS, reply["results"], direct, strict=True):
        want = own.public()
        labels = sorted(want["probabilities"])
        assert got["label"] == want["label"] and sorted(got["probabilities"]) == labels
        np.testing.assert_allclose(
            [got["probabilities"][k] for k in labels], [want["probabilities"][k] for k in labels], atol=1e-5
        )
        # A probability distribution (softmax; Bridle, 1990): non-negative, summing to one.
        assert abs(sum(got["probabilities"].values()) - 1.0) < 1e-5
        for span in got["spans"]:
            assert text[span["start"] : span["end"]] == span["text"]
