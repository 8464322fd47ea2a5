"""Fixtures only the exporter tests use; the session's tiny bundles are in tests/conftest.py."""

from __future__ import annotations

from pathlib import Path

import pytest

from tests.helpers.jsonl import write_jsonl
from tests.helpers.training import TINY_FLAGS, keyword_rows
from textsieve.cli import main


@pytest.fixture(scope="module")
def keyword_data(tmp_path_factory: pytest.TempPathFactory) -> Path:
    """240 invented lines (tests/helpers/training.py), 120 per label, as train.jsonl."""
    return write_jsonl(tmp_path_factory.mktemp("data") / "train.jsonl", keyword_rows(240, seed=5))


@pytest.fixture(scope="module")
def keyword_run(keyword_data: Path, tmp_path_factory: pytest.TempPathFactory) -> Path:
    """``textsieve train`` on ``keyword_data`` with TINY_FLAGS: widths 3, 4, 5 (the default), 6 maps,
    16-dimensional embeddings, 4 epochs; the run folder is named ``run`` and alone in its parent."""
    out = tmp_path_factory.mktemp("runs") / "run"
    assert main(["train", str(keyword_data), "--out", str(out), *TINY_FLAGS]) == 0
    return out


@pytest.fixture(scope="module")
def demo_rows() -> list[dict[str, str]]:
    """The demo generator's output at its defaults (6,000 rows)."""
    from textsieve.exporter.demo_data import generate

    return generate()
