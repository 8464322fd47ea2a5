"""Fixtures of the scoring tests: a registry of the session's tiny bundles, the vendored UCI sentences
as input files, and a loopback Dask cluster started with Dask's own commands."""

from __future__ import annotations

import contextlib
import json
import signal
import subprocess
import sys
import time
from collections.abc import Iterator
from dataclasses import dataclass, field
from pathlib import Path

import pytest

from tests.helpers.environment import child_env
from tests.helpers.net import free_port
from tests.helpers.service import make_registry

DATA = Path(__file__).parent.parent / "data" / "sentiment_labelled"
DASK = Path(sys.executable).with_name("dask")
ROOT = Path(__file__).parent.parent.parent


def uci_rows() -> list[dict[str, object]]:
    """The 3,000 UCI sentences (Kotzias et al., KDD 2015) with their source and published class;
    the files' empty sentinel item is left out (tests/data/sentiment_labelled/README.md)."""
    rows: list[dict[str, object]] = []
    for name in ("amazon", "imdb", "yelp"):
        for item in json.loads((DATA / f"{name}.json").read_text(encoding="utf-8")):
            if item.get("class") is not None:
                rows.append({"id": len(rows), "source": name, "text": item["text"], "class": item["class"]})
    return rows


def write_jsonl(path: Path, rows: list[dict[str, object]]) -> Path:
    path.write_text("".join(json.dumps(r, ensure_ascii=False) + "\n" for r in rows), encoding="utf-8")
    return path


@pytest.fixture(scope="module")
def scoring_registry(tiny_bundles: dict[str, Path], tmp_path_factory: pytest.TempPathFactory) -> Path:
    """Model ``support``: v1 = bundle a (live), v2 = bundle b."""
    return make_registry(tmp_path_factory.mktemp("scoring") / "registry", tiny_bundles)


@pytest.fixture(scope="module")
def uci_jsonl(tmp_path_factory: pytest.TempPathFactory) -> Path:
    return write_jsonl(tmp_path_factory.mktemp("uci") / "uci.jsonl", uci_rows())


@dataclass
class DaskCluster:
    address: str
    workers: list[subprocess.Popen[bytes]] = field(default_factory=list)
    scheduler: subprocess.Popen[bytes] | None = None


def _wait_for_workers(address: str, n: int, timeout: float = 90.0) -> None:
    from distributed import Client

    with Client(address, timeout="30s", set_as_default=False) as client:
        client.wait_for_workers(n, timeout=timeout)


def start_worker(address: str, name: str, log: Path) -> subprocess.Popen[bytes]:
    """``dask worker`` without a nanny, so the process started here is the worker a test may kill."""
    with open(log, "ab") as out:
        return subprocess.Popen(
            [str(DASK), "worker", address, "--nthreads", "1", "--no-nanny", "--no-dashboard", "--name", name],
            stdout=out,
            stderr=subprocess.STDOUT,
            env=_dask_env(),
            cwd=ROOT,
        )


def _dask_env() -> dict[str, str]:
    # The workers import textsieve from this checkout, as the client does.
    return child_env() | {"PYTHONPATH": str(ROOT)}


@contextlib.contextmanager
def dask_cluster(tmp: Path, workers: int = 2) -> Iterator[DaskCluster]:
    """A scheduler and ``workers`` worker processes on loopback, started with Dask's own commands."""
    port = free_port()
    address = f"tcp://127.0.0.1:{port}"
    cluster = DaskCluster(address)
    with open(tmp / "scheduler.log", "ab") as out:
        cluster.scheduler = subprocess.Popen(
            [str(DASK), "scheduler", "--host", "127.0.0.1", "--port", str(port), "--no-dashboard"],
            stdout=out,
            stderr=subprocess.STDOUT,
            env=_dask_env(),
            cwd=ROOT,
        )
    try:
        for i in range(workers):
            cluster.workers.append(start_worker(address, f"w{i}", tmp / f"worker-{i}.log"))
        _wait_for_workers(address, workers)
        yield cluster
    finally:
        for proc in [*cluster.workers, cluster.scheduler]:
            if proc is not None and proc.poll() is None:
                proc.send_signal(signal.SIGTERM)
        for proc in [*cluster.workers, cluster.scheduler]:
            if proc is None:
                continue
            try:
                proc.wait(timeout=20)
            except subprocess.TimeoutExpired:
                proc.kill()
                proc.wait()


def wait_until(predicate: object, timeout: float, what: str) -> None:
    deadline = time.monotonic() + timeout
    while time.monotonic() < deadline:
        if predicate():  # type: ignore[operator]
            return
        time.sleep(0.01)
    raise AssertionError(f"timed out after {timeout} s waiting for {what}")


@pytest.fixture(scope="module")
def loopback_cluster(tmp_path_factory: pytest.TempPathFactory) -> Iterator[DaskCluster]:
    with dask_cluster(tmp_path_factory.mktemp("dask")) as cluster:
        yield cluster
