"""The content-addressed blob store: ``<root>/<sha256>``, one file per distinct content.

A blob is written under a temporary name in the same folder, fsync'd and renamed, so a
reader (or a process killed half-way through a write) never sees a partial blob under its
final name. Every read re-hashes the content: the name is the only proof of integrity.
"""

from __future__ import annotations

import contextlib
import errno
import hashlib
import os
import re
import shutil
import tempfile
import time
from collections.abc import Iterator, Mapping
from pathlib import Path

from textsieve.errors import IntegrityError, RegistryError, UnavailableError
from textsieve.files import CHUNK, fsync_dir, sha256_file

_SHA256 = re.compile(r"[0-9a-f]{64}")
_TMP_PREFIX = ".tmp-"
# Names the registry whose blobs these are: two registries sharing one folder would each take the
# other's blobs for garbage (registry/api.py, ``_check_blob_owner``).
OWNER_FILE = ".registry-id"
STALE_TMP_SECONDS = 24 * 3600
# What a folder this user may not write (its mode, an ACL, a read-only mount) raises.
_NOT_WRITABLE = frozenset({errno.EACCES, errno.EPERM, errno.EROFS})


def _check_digest(digest: str) -> str:
    if not _SHA256.fullmatch(digest):
        raise IntegrityError(f"not a sha256 digest: {digest[:80]!r}")
    return digest


def _missing(digest: str, root: Path) -> str:
    return (
        f"blob {digest[:12]}… is missing from {root} (the blob folder: --blobs / TEXTSIEVE_BLOBS, else the "
        "registry folder's blobs/; a version published with another --blobs has its files there)"
    )


class BlobStore:
    """Blobs under one folder, named by the sha256 of their content."""

    def __init__(self, root: Path) -> None:
        self.root = Path(root)

    def ensure(self) -> None:
        try:
            self.root.mkdir(parents=True, exist_ok=True)
        except FileExistsError as exc:
            raise self._not_a_folder() from exc
        except OSError as exc:
            raise RegistryError(f"{self.root}: cannot create the blob folder ({exc.strerror})") from exc

    def exists(self) -> bool:
        """Whether the blob folder is there (a registry with nothing published yet has none)."""
        return self.root.is_dir()

    def _not_a_folder(self) -> RegistryError:
        return RegistryError(
            f"{self.root}: not a folder, but the registry keeps its blobs there; move it aside and put the "
            "blob folder back in its place"
        )

    def _entries(self) -> Iterator[os.DirEntry[str]]:
        """The blob folder's entries; none when the folder is missing."""
        try:
            with os.scandir(self.root) as entries:
                yield from entries
        except FileNotFoundError:
            return
        except NotADirectoryError as exc:
            raise self._not_a_folder() from exc
        except OSError as exc:
            raise RegistryError(f"{self.root}: cannot list the blob folder ({exc.strerror})") from exc

    def path(self, digest: str) -> Path:
        return self.root / _check_digest(digest)

    def _not_writable(self, exc: OSError, what: str) -> OSError | UnavailableError:
        """A folder this user may not write, as one line saying so (the status of a read-only registry
        database); any other OSError as it was."""
        if exc.errno not in _NOT_WRITABLE:
            return exc
        return UnavailableError(
            f"{self.root}: the blob folder is not writable for this user ({exc.strerror}), so {what}; make it "
            "writable for this user, or point --blobs (or TEXTSIEVE_BLOBS) at the registry's writable blob folder"
        )

    def _mkstemp(self) -> tuple[int, str]:
        try:
            return tempfile.mkstemp(prefix=_TMP_PREFIX, dir=self.root)
        except OSError as exc:
            raise self._not_writable(exc, "nothing could be stored and nothing was recorded") from exc

    # -- the owner ------------------------------------------------------------------------
    def owner(self) -> str | None:
        """The id of the registry this folder's blobs belong to (``OWNER_FILE``); None when unmarked."""
        try:
            text = (self.root / OWNER_FILE).read_text(encoding="ascii").strip()
        except (FileNotFoundError, NotADirectoryError):
            return None
        except (OSError, UnicodeDecodeError) as exc:
            raise RegistryError(
                f"{self.root / OWNER_FILE}: cannot be read ({exc}); it names the folder's registry"
            ) from exc
        return text or None

    def claim(self, registry_id: str) -> None:
        """Mark the folder as ``registry_id``'s: written and renamed into place as a blob is, so a
        process killed half-way leaves a temporary file that garbage collection sweeps."""
        self._write(OWNER_FILE, [registry_id.encode("ascii") + b"\n"])

    def has(self, digest: str) -> bool:
        return self.path(digest).is_file()

    # -- writing --------------------------------------------------------------------------
    def put_file(self, source: Path) -> str:
        """Store a file's content; returns its sha256. Existing intact blobs are left alone."""
        with open(source, "rb") as f:
            return self._put_stream(f)

    def put_bytes(self, data: bytes) -> str:
        digest = hashlib.sha256(data).hexdigest()
        if self._intact(digest):
            self._touch(digest)
            return digest
        self._write(digest, [data])
        return digest

    def _put_stream(self, f) -> str:  # type: ignore[no-untyped-def]
        self.ensure()
        h = hashlib.sha256()
        fd, tmp = self._mkstemp()
        try:
            with os.fdopen(fd, "wb") as out:
                while chunk := f.read(CHUNK):
                    h.update(chunk)
                    out.write(chunk)
                out.flush()
                os.fsync(out.fileno())
            digest = h.hexdigest()
            if self._intact(digest):
                os.unlink(tmp)
                self._touch(digest)
            else:
                # A damaged blob of the same name is replaced: the new content is the right one.
                os.replace(tmp, self.root / digest)
                fsync_dir(self.root)
        except BaseException:
            with contextlib.suppress(FileNotFoundError):
                os.unlink(tmp)
            raise
        return digest

    def _write(self, name: str, chunks: list[bytes]) -> None:
        """``chunks`` as the file ``name`` of the folder, through a temporary file renamed into place."""
        self.ensure()
        fd, tmp = self._mkstemp()
        try:
            with os.fdopen(fd, "wb") as out:
                for chunk in chunks:
                    out.write(chunk)
                out.flush()
                os.fsync(out.fileno())
            os.replace(tmp, self.root / name)
        except BaseException:
            with contextlib.suppress(FileNotFoundError):
                os.unlink(tmp)
            raise
        fsync_dir(self.root)

    def _touch(self, digest: str) -> None:
        # A publish that reuses an old unreferenced blob makes it recent, so that garbage
        # collection (which spares recent blobs) cannot remove it before the publish commits.
        with contextlib.suppress(FileNotFoundError):
            os.utime(self.path(digest))

    def stored(self) -> Iterator[tuple[str, float, int]]:
        """(digest, mtime, size) of every blob; temporary files and foreign names are skipped."""
        for entry in self._entries():
            if _SHA256.fullmatch(entry.name) and entry.is_file(follow_symlinks=False):
                with contextlib.suppress(FileNotFoundError):
                    st = entry.stat(follow_symlinks=False)
                    yield entry.name, st.st_mtime, st.st_size

    def remove_if_older(self, digest: str, cutoff: float) -> bool:
        """Remove the blob unless it changed or was reused (touched) after ``cutoff``; True if removed."""
        path = self.path(digest)
        try:
            if path.stat().st_mtime > cutoff:
                return False
            os.unlink(path)
        except FileNotFoundError:
            return False
        except OSError as exc:
            raise self._not_writable(exc, "no blob could be deleted (list them with gc --dry-run)") from exc
        return True

    def _intact(self, digest: str) -> bool:
        try:
            self.verify(digest)
        except IntegrityError:
            return False
        return True

    # -- reading --------------------------------------------------------------------------
    def verify(self, digest: str) -> Path:
        """The blob's path after re-hashing it; IntegrityError when it is missing or altered."""
        path = self.path(digest)
        try:
            actual = sha256_file(path)
        except FileNotFoundError:
            raise IntegrityError(_missing(digest, self.root), digest=digest) from None
        except OSError as exc:
            raise IntegrityError(f"blob {digest[:12]}… cannot be read ({exc.strerror})", digest=digest) from exc
        if actual != digest:
            raise IntegrityError(
                f"blob {digest[:12]}… in {self.root} has been altered (its content hashes to {actual[:12]}…)",
                digest=digest,
            )
        return path

    def read_bytes(self, digest: str) -> bytes:
        """The blob's content, refused unless it hashes to its name."""
        try:
            data = self.path(digest).read_bytes()
        except FileNotFoundError:
            raise IntegrityError(_missing(digest, self.root), digest=digest) from None
        except OSError as exc:
            raise IntegrityError(f"blob {digest[:12]}… cannot be read ({exc.strerror})", digest=digest) from exc
        actual = hashlib.sha256(data).hexdigest()
        if actual != digest:
            raise IntegrityError(
                f"blob {digest[:12]}… in {self.root} has been altered (its content hashes to {actual[:12]}…)",
                digest=digest,
            )
        return data

    def copy_verified(self, digest: str, target: Path) -> None:
        """Copy a blob to ``target`` while hashing it; IntegrityError (and no target) on mismatch."""
        h = hashlib.sha256()
        try:
            with open(self.path(digest), "rb") as src, open(target, "wb") as out:
                while chunk := src.read(CHUNK):
                    h.update(chunk)
                    out.write(chunk)
                out.flush()
                os.fsync(out.fileno())
        except FileNotFoundError:
            with contextlib.suppress(FileNotFoundError):
                os.unlink(target)
            raise IntegrityError(_missing(digest, self.root), digest=digest) from None
        actual = h.hexdigest()
        if actual != digest:
            os.unlink(target)
            raise IntegrityError(
                f"blob {digest[:12]}… in {self.root} has been altered (its content hashes to {actual[:12]}…)",
                digest=digest,
            )

    def sweep_temporary(self, older_than: float = STALE_TMP_SECONDS) -> int:
        """Remove temporary files left by writers that were killed; returns how many."""
        removed = 0
        cutoff = time.time() - older_than
        for entry in self._entries():
            if entry.name.startswith(_TMP_PREFIX):
                with contextlib.suppress(FileNotFoundError):
                    if entry.stat().st_mtime < cutoff:
                        try:
                            os.unlink(entry.path)
                        except OSError as exc:
                            raise self._not_writable(exc, "temporary files left by killed writers stay") from exc
                        removed += 1
        return removed


def materialize(store: BlobStore, files: Mapping[str, str], target: Path) -> Path:
    """Make ``target`` a folder holding exactly ``files`` (name → sha256), every file verified.

    Safe against concurrent callers and earlier crashes: the folder is assembled under a
    temporary name and renamed into place; an existing folder is reused only when every file
    in it hashes right, and is moved aside (not edited) when it does not.
    """
    target = Path(target)
    for digest in files.values():
        store.verify(digest)  # the blobs themselves, every time, even when the copy is intact
    for _attempt in range(5):
        if target.is_dir() and _folder_matches(target, files):
            return target
        if target.exists():
            aside = target.with_name(f".{target.name}.bad-{os.getpid()}-{time.monotonic_ns()}")
            with contextlib.suppress(FileNotFoundError):
                os.rename(target, aside)
            shutil.rmtree(aside, ignore_errors=True)
        target.parent.mkdir(parents=True, exist_ok=True)
        tmp = Path(tempfile.mkdtemp(prefix=f".{target.name}.", suffix=".tmp", dir=target.parent))
        try:
            for name, digest in files.items():
                store.copy_verified(digest, tmp / name)
            fsync_dir(tmp)
            try:
                os.rename(tmp, target)
            except OSError as exc:
                if exc.errno not in (errno.ENOTEMPTY, errno.EEXIST):
                    raise
                continue  # another process got there first: check its copy on the next round
            fsync_dir(target.parent)
            return target
        finally:
            shutil.rmtree(tmp, ignore_errors=True)
    raise RegistryError(f"{target}: could not assemble a verified copy (the folder keeps changing)")


def _folder_matches(folder: Path, files: Mapping[str, str]) -> bool:
    try:
        present = {p.name for p in folder.iterdir()}
    except OSError:
        return False
    if present != set(files):
        return False
    for name, digest in files.items():
        try:
            actual = sha256_file(folder / name)
        except OSError:
            return False
        if actual != digest:
            return False
    return True


__all__ = ["BlobStore", "materialize"]
