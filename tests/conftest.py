"""Shared fixtures: tiny real bundles, trained and exported once per test session.

The data comes from the invented demo generator (not reference data); tests that compare
against outside references use tests/data/ or reference libraries.
"""

from __future__ import annotations

from pathlib import Path

import pytest

from tests.helpers.jsonl import read_jsonl, write_jsonl
from tests.helpers.training import export_tiny, train_tiny

# Fixtures more than one part uses: registry specs on SQLite and PostgreSQL (registry,
# reliability), served apps and a clean environment (service, reliability, all). Fixtures one
# part alone uses live in that part's conftest.py.
pytest_plugins = ["tests.helpers.registry_fixtures", "tests.helpers.service"]


def _relabel(src: Path, dst: Path, mapping: dict[str, str]) -> None:
    dst.mkdir(parents=True, exist_ok=True)
    for name in ("train.jsonl", "valid.jsonl", "test.jsonl"):
        rows = read_jsonl(src / name)
        for row in rows:
            row["label"] = mapping.get(row["label"], row["label"])
        write_jsonl(dst / name, rows)


@pytest.fixture(scope="session")
def tiny_data(tmp_path_factory: pytest.TempPathFactory) -> Path:
    from textsieve.exporter.demo_data import write_splits

    folder = tmp_path_factory.mktemp("tiny-data")
    write_splits(folder, n=900, seed=3)
    return folder


@pytest.fixture(scope="session")
def tiny_runs(tiny_data: Path, tmp_path_factory: pytest.TempPathFactory) -> dict[str, Path]:
    root = tmp_path_factory.mktemp("tiny-runs")
    relabelled = root / "relabelled-data"
    _relabel(tiny_data, relabelled, {"praise": "thanks"})
    return {
        "a": train_tiny(tiny_data, root / "a", seed=1),
        "b": train_tiny(tiny_data, root / "b", seed=2),
        "relabelled": train_tiny(relabelled, root / "relabelled", seed=1),
    }


@pytest.fixture(scope="session")
def tiny_bundles(tiny_runs: dict[str, Path], tmp_path_factory: pytest.TempPathFactory) -> dict[str, Path]:
    root = tmp_path_factory.mktemp("tiny-bundles")
    return {key: export_tiny(run, root / key) for key, run in tiny_runs.items()}
