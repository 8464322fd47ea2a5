"""Digests and atomic writes shared by the exporter and the registry."""

from __future__ import annotations

import hashlib
import os
import socket
import stat
from pathlib import Path
from typing import Any

import pytest

from textsieve.errors import InputError
from textsieve.files import (
    FILE_MODE,
    atomic_directory,
    atomic_write_bytes,
    atomic_write_text,
    check_out_folder,
    sha256_file,
    special_file,
)

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


def _fifo(path: Path) -> None:
    os.mkfifo(path)


def _socket(path: Path) -> None:
    with socket.socket(socket.AF_UNIX) as sock:
        sock.bind(str(path))


def _null_device(path: Path) -> None:
    os.mknod(path, stat.S_IFCHR | 0o666, os.makedev(1, 3))  # Linux's /dev/null (devices.txt: char 1, 3)


SPECIAL = [
    pytest.param(_fifo, "a FIFO (named pipe)", stat.S_ISFIFO, id="fifo"),
    pytest.param(_socket, "a socket", stat.S_ISSOCK, id="socket"),
]
if os.geteuid() == 0:  # only root may make a device node; an audit found /dev/null replaced as root
    SPECIAL.append(pytest.param(_null_device, "a character device", stat.S_ISCHR, id="character-device"))


@pytest.mark.parametrize(("make", "what", "still"), SPECIAL)
def test_an_atomic_write_never_renames_a_file_over_a_device_a_fifo_or_a_socket(
    make: Any, what: str, still: Any, tmp_path: Path
) -> None:
    target = tmp_path / "out.json"
    make(target)
    assert special_file(target) == what
    with pytest.raises(InputError, match=f"out.json: is {what.replace('(', '.').replace(')', '.')}, which"):
        atomic_write_text(target, "{}")
    assert still(target.lstat().st_mode) and sorted(p.name for p in tmp_path.iterdir()) == ["out.json"]
    with pytest.raises(InputError, match=f"--out {target}: is {what.split(' (')[0]}"):
        check_out_folder(target, kind="run", previous="run.json")


def test_an_atomic_write_replaces_a_link_and_leaves_its_target(tmp_path: Path) -> None:
    target = tmp_path / "pipe"
    os.mkfifo(target)
    link = tmp_path / "out.json"
    link.symlink_to(target)
    assert special_file(link) is None and special_file(tmp_path / "absent") is None
    atomic_write_text(link, "{}")
    assert not link.is_symlink() and link.read_text() == "{}" and stat.S_ISFIFO(target.lstat().st_mode)
