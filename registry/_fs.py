"""Atomic file writing: a reader sees the old file, the new file, or nothing; never half of one."""

from __future__ import annotations

import contextlib
import hashlib
import os
import shutil
import tempfile
from collections.abc import Iterator
from pathlib import Path

CHUNK = 1 << 20


def sha256_file(path: Path) -> str:
    h = hashlib.sha256()
    with open(path, "rb") as f:
        while chunk := f.read(CHUNK):
            h.update(chunk)
    return h.hexdigest()


def fsync_dir(path: Path) -> None:
    fd = os.open(path, os.O_RDONLY)
    try:
        os.fsync(fd)
    finally:
        os.close(fd)


def atomic_write_bytes(path: Path, data: bytes) -> None:
    path = Path(path)
    fd, tmp = tempfile.mkstemp(prefix=f".{path.name}.", suffix=".tmp", dir=path.parent)
    try:
        with os.fdopen(fd, "wb") as f:
            f.write(data)
            f.flush()
            os.fsync(f.fileno())
        os.replace(tmp, path)
    except BaseException:
        with contextlib.suppress(FileNotFoundError):
            os.unlink(tmp)
        raise
    fsync_dir(path.parent)


def atomic_write_text(path: Path, text: str) -> None:
    atomic_write_bytes(path, text.encode("utf-8"))


@contextlib.contextmanager
def atomic_directory(target: Path, *, replace: bool = False) -> Iterator[Path]:
    """Yield a temporary sibling folder; on success it is fsync'd and renamed to ``target``.

    With ``replace`` an existing ``target`` is swapped out only after the new one is complete.
    """
    target = Path(target)
    target.parent.mkdir(parents=True, exist_ok=True)
    tmp = Path(tempfile.mkdtemp(prefix=f"{target.name}.tmp-", dir=target.parent))
    try:
        yield tmp
        for child in tmp.iterdir():
            if child.is_file():
                with open(child, "rb") as f:
                    os.fsync(f.fileno())
        fsync_dir(tmp)
        if target.exists():
            if not replace:
                raise FileExistsError(target)
            old = Path(tempfile.mkdtemp(prefix=f"{target.name}.old-", dir=target.parent))
            os.rename(target, old)
            try:
                os.rename(tmp, target)
            except OSError:
                os.rename(old, target)  # put the previous folder back rather than leave none
                raise
            shutil.rmtree(old, ignore_errors=True)
        else:
            os.rename(tmp, target)
        fsync_dir(target.parent)
    except BaseException:
        shutil.rmtree(tmp, ignore_errors=True)
        raise
