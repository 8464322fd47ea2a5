"""Digests and atomic writes shared by the exporter and the registry."""

from __future__ import annotations

import hashlib
import os
import stat
from pathlib import Path

import pytest

from textsieve.files import FILE_MODE, atomic_directory, atomic_write_bytes, atomic_write_text, sha256_file

DATA = Path(__file__).parent / "data"


def test_sha256_file_matches_the_published_digest() -> None:
    # The sha256 listed for amazon.json in tests/data/sentiment_labelled/README.md.
    assert sha256_file(DATA / "sentiment_labelled" / "amazon.json") == (
        "bc5eb0cac49fc45987301f1dc2d02cf5ca356ba6c882be179dce77d74e666ed9"
    )


def test_sha256_file_equals_hashlib(tmp_path: Path) -> None:
    f = tmp_path / "big.bin"
    f.write_bytes(bytes(range(256)) * 9000)  # more than one read block
    assert sha256_file(f) == hashlib.sha256(f.read_bytes()).hexdigest()


def test_atomic_files_get_the_mode_an_ordinary_write_would(tmp_path: Path) -> None:
    # One mode for every writer (tempfile's owner-only 0600 hid demo data and bundles from other users).
    plain = tmp_path / "plain.txt"
    plain.write_text("x")
    atomic_write_text(tmp_path / "atomic.txt", "x")
    assert stat.S_IMODE((tmp_path / "atomic.txt").stat().st_mode) == stat.S_IMODE(plain.stat().st_mode) == FILE_MODE
    with atomic_directory(tmp_path / "folder") as tmp:
        (tmp / "f").write_text("y")
    (tmp_path / "made").mkdir()
    assert stat.S_IMODE((tmp_path / "folder").stat().st_mode) == stat.S_IMODE((tmp_path / "made").stat().st_mode)


def test_a_failed_write_leaves_the_old_file_and_no_temporary(tmp_path: Path) -> None:
    target = tmp_path / "t.bin"
    atomic_write_bytes(target, b"old")

    with pytest.raises(TypeError):
        atomic_write_bytes(target, object())  # type: ignore[arg-type]
    assert target.read_bytes() == b"old"
    assert sorted(os.listdir(tmp_path)) == ["t.bin"]


def test_atomic_directory_refuses_to_replace_unless_asked(tmp_path: Path) -> None:
    target = tmp_path / "bundle"
    with atomic_directory(target) as tmp:
        (tmp / "a").write_text("1")
    with pytest.raises(FileExistsError), atomic_directory(target) as tmp:
        (tmp / "a").write_text("2")
    assert (target / "a").read_text() == "1"
    with atomic_directory(target, replace=True) as tmp:
        (tmp / "a").write_text("3")
    assert (target / "a").read_text() == "3"
    assert sorted(os.listdir(tmp_path)) == ["bundle"]
