"""Shared fixtures: tiny real bundles, trained and exported once per test session.

The data comes from the invented demo generator (not reference data); tests that compare
against outside references use tests/data/ or reference libraries.
"""

from __future__ import annotations

import json
from pathlib import Path

import pytest

# Fixtures every part of the suite uses: registries on SQLite and PostgreSQL, served apps.
pytest_plugins = ["tests.helpers.registry_fixtures", "tests.helpers.service"]

TINY = dict(embedding_dim=16, maps=8, epochs=4, patience=2, batch_size=50)


def _relabel(src: Path, dst: Path, mapping: dict[str, str]) -> None:
    dst.mkdir(parents=True, exist_ok=True)
    for name in ("train.jsonl", "valid.jsonl", "test.jsonl"):
        rows = [json.loads(line) for line in (src / name).read_text(encoding="utf-8").splitlines() if line]
        for row in rows:
            row["label"] = mapping.get(row["label"], row["label"])
        (dst / name).write_text("".join(json.dumps(r, ensure_ascii=False) + "\n" for r in rows), encoding="utf-8")


def train_tiny(data: Path, out: Path, *, seed: int, **overrides: object) -> Path:
    from textsieve.exporter.train import TrainConfig, train

    config = TrainConfig(
        data=data / "train.jsonl", out=out, valid=data / "valid.jsonl", seed=seed, quiet=True, **{**TINY, **overrides}
    )  # type: ignore[arg-type]
    return train(config)


def export_tiny(run: Path, out: Path) -> Path:
    from textsieve.exporter.export import export

    export(run, out, log=lambda *_: None)
    return out


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
