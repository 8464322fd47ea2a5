"""scripts/check gives the same verdict whatever a user leaves in the checkout."""

from __future__ import annotations

import shutil
import subprocess
import sys
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[1]


def test_ruff_sorts_imports_the_same_with_output_folders_in_the_checkout(tmp_path: Path) -> None:
    # README "Usage" trains into run/ and exports into bundle/ at the top of the checkout; bench/
    # imports its sibling module `run`, which such a folder must not turn first-party.
    ruff = Path(sys.executable).parent / "ruff"
    if not ruff.exists():
        pytest.skip("ruff is not installed beside this Python (pip install '.[check]')")
    shutil.copy2(ROOT / "pyproject.toml", tmp_path / "pyproject.toml")
    shutil.copytree(ROOT / "bench", tmp_path / "bench", ignore=shutil.ignore_patterns("__pycache__", ".cache"))
    for folder in ("run", "bundle", "data"):
        (tmp_path / folder).mkdir()
        (tmp_path / folder / "run.json").write_text("{}\n", encoding="utf-8")
    done = subprocess.run(
        [ruff, "check", "--no-cache", "--select", "I", "bench"], cwd=tmp_path, capture_output=True, text=True
    )
    assert done.returncode == 0, done.stdout[-2000:]
