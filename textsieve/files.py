"""Files both sides write and check: sha256 digests and atomic writes.

A reader sees the old file, the new file, or nothing; never half of one. New files and folders
get the permissions an ordinary ``open``/``mkdir`` would give under the process's umask, not the
owner-only modes of ``tempfile`` (data and bundles are often read by another user, e.g. a
service account).
"""

from __future__ import annotations

import contextlib
import hashlib
import os
import shutil
import stat
import tempfile
from collections.abc import Iterator
from pathlib import Path

from textsieve.errors import InputError

CHUNK = 1 << 20


def _umask() -> int:
    # os.umask can only be read by setting it; done once, at import, before any thread writes.
    mask = os.umask(0o022)
    os.umask(mask)
    return mask


_UMASK = _umask()
FILE_MODE = 0o666 & ~_UMASK
DIR_MODE = 0o777 & ~_UMASK


def sha256_file(path: Path) -> str:
    """Hex sha256 of a file's bytes, read in chunks."""
    with open(path, "rb") as f:
        return hashlib.file_digest(f, "sha256").hexdigest()


def fsync_dir(path: Path) -> None:
    """Make a rename or a new entry in ``path`` durable."""
    fd = os.open(path, os.O_RDONLY)
    try:
        os.fsync(fd)
    finally:
        os.close(fd)


# What an existing path is when it is not a regular file, a folder or a symbolic link, for a message.
_SPECIAL = (
    (stat.S_ISCHR, "a character device"),
    (stat.S_ISBLK, "a block device"),
    (stat.S_ISFIFO, "a FIFO (named pipe)"),
    (stat.S_ISSOCK, "a socket"),
)


def special_file(path: Path) -> str | None:
    """What ``path`` is when it exists and is neither a regular file, a folder nor a symbolic link
    (a character or block device such as /dev/null, a FIFO, a socket), or None. The path itself is
    looked at, not what a link points to: a link is replaced by the file, its target left alone."""
    try:
        mode = os.lstat(path).st_mode
    except (FileNotFoundError, NotADirectoryError):
        return None
    if stat.S_ISREG(mode) or stat.S_ISDIR(mode) or stat.S_ISLNK(mode):
        return None
    return next((what for test, what in _SPECIAL if test(mode)), "not a regular file")


def check_out_file(path: Path, *, flag: str = "--out", allowed: str = "a regular file's path or a new path") -> None:
    """InputError, one line, when ``path`` (given as ``flag``) is a device, a FIFO or a socket: an
    atomic write renames a new regular file over it (``/dev/null`` became a file, as root), and the
    writes meant for it never reach it. Called before the work, and by every atomic write."""
    what = special_file(path)
    if what is not None:
        named = f"{flag} {path}" if flag else str(path)
        raise InputError(f"{named}: is {what}, which textsieve does not write over; name {allowed}")


def atomic_write_bytes(path: Path, data: bytes) -> None:
    """Write ``data`` to ``path`` through a temporary sibling, fsync'd and renamed into place; an
    existing ``path`` that is a device, a FIFO or a socket is an InputError (:func:`check_out_file`)."""
    path = Path(path)
    check_out_file(path, flag="")
    fd, tmp = tempfile.mkstemp(prefix=f".{path.name}.", suffix=".tmp", dir=path.parent)
    try:
        with os.fdopen(fd, "wb") as f:
            os.fchmod(f.fileno(), FILE_MODE)
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
    """:func:`atomic_write_bytes` of UTF-8 text."""
    atomic_write_bytes(path, text.encode("utf-8"))


def file_in_the_way(path: Path) -> Path | None:
    """The nearest existing ancestor of ``path`` when it is not a folder, so that no folder can be made
    at ``path``; None when the nearest existing ancestor is a folder."""
    for parent in Path(path).parents:
        if parent.is_dir():
            return None
        if parent.exists() or parent.is_symlink():  # a file, or a link to nothing
            return parent
    return None


def check_out_folder(out: Path, *, kind: str, previous: str) -> None:
    """``out`` (a ``--out`` for a ``kind`` folder: "run", "bundle") may become one: absent, empty,
    or a previous one to replace, which holds the file ``previous``; else InputError, one line."""
    if out.is_dir():
        if any(out.iterdir()) and not (out / previous).is_file():
            raise InputError(
                f"--out {out}: is a folder that is not a previous {kind} (no {previous}); "
                f"name a new or empty folder, or a previous {kind} folder to replace"
            )
    elif (what := special_file(out)) is not None:
        raise InputError(
            f"--out {out}: is {what}, which textsieve does not write over; name a new or empty folder, "
            f"or a previous {kind} folder to replace"
        )
    elif out.exists() or out.is_symlink():
        raise InputError(
            f"--out {out}: is an existing file; name a new or empty folder, or a previous {kind} folder to replace"
        )
    elif (blocker := file_in_the_way(out)) is not None:
        raise InputError(
            f"--out {out}: {blocker} is an existing file, so no folder can be made inside it; "
            "name a new folder elsewhere"
        )
    # The folder is written as a sibling and renamed (atomic_directory): where the first new folder
    # goes must take one.
    where = nearest_folder(Path(out).parent)
    if where is not None:
        check_writable(where, out)


def nearest_folder(path: Path) -> Path | None:
    """``path`` when it is a folder, else its nearest ancestor that is; None when none is."""
    return next((p for p in (Path(path).absolute(), *Path(path).absolute().parents) if p.is_dir()), None)


def check_writable(folder: Path, out: Path) -> None:
    """InputError naming ``--out out`` unless a folder can be made in ``folder`` (its outputs are
    written as siblings and renamed): a read-only place or another user's folder is found before
    the work, not after it. The probe folder is removed at once."""
    try:
        os.rmdir(tempfile.mkdtemp(prefix=".textsieve-probe-", dir=folder))
    except OSError as exc:
        raise InputError(
            f"--out {out}: cannot make a folder in {folder} ({exc.strerror or exc}); name a folder you can write to"
        ) from None


@contextlib.contextmanager
def atomic_directory(target: Path, *, replace: bool = False) -> Iterator[Path]:
    """Yield a temporary sibling folder; on success it is fsync'd and renamed to ``target``.

    With ``replace`` an existing ``target`` is swapped out only after the new one is complete.
    """
    target = Path(target)
    target.parent.mkdir(parents=True, exist_ok=True)
    tmp = Path(tempfile.mkdtemp(prefix=f"{target.name}.tmp-", dir=target.parent))
    try:
        os.chmod(tmp, DIR_MODE)
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


__all__ = [
    "CHUNK",
    "DIR_MODE",
    "FILE_MODE",
    "atomic_directory",
    "atomic_write_bytes",
    "atomic_write_text",
    "check_out_file",
    "check_out_folder",
    "check_writable",
    "file_in_the_way",
    "fsync_dir",
    "nearest_folder",
    "sha256_file",
    "special_file",
]
