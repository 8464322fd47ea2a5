"""The content-addressed blob store: names are sha256 (hashlib), writes are atomic, reads re-hash."""

from __future__ import annotations

import hashlib
import os
import threading
import time
from pathlib import Path

import pytest

from textsieve.errors import IntegrityError
from textsieve.registry.blobs import BlobStore, materialize


def _sha(data: bytes) -> str:
    return hashlib.sha256(data).hexdigest()


def test_put_names_blobs_by_sha256_and_is_idempotent(tmp_path: Path) -> None:
    store = BlobStore(tmp_path / "blobs")
    src = tmp_path / "f.bin"
    data = os.urandom(3 * (1 << 20) + 17)  # several read chunks
    src.write_bytes(data)
    digest = store.put_file(src)
    assert digest == _sha(data)
    assert (tmp_path / "blobs" / digest).read_bytes() == data
    assert store.put_file(src) == digest
    assert store.put_bytes(b"hello") == _sha(b"hello")
    assert sorted(p.name for p in (tmp_path / "blobs").iterdir()) == sorted([digest, _sha(b"hello")])  # no temp files


def test_verify_refuses_altered_and_missing_blobs(tmp_path: Path) -> None:
    store = BlobStore(tmp_path)
    digest = store.put_bytes(b"model bytes")
    assert store.verify(digest) == tmp_path / digest
    (tmp_path / digest).write_bytes(b"model bytez")
    with pytest.raises(IntegrityError, match="altered"):
        store.verify(digest)
    with pytest.raises(IntegrityError, match="altered"):
        store.read_bytes(digest)
    os.unlink(tmp_path / digest)
    with pytest.raises(IntegrityError, match="missing"):
        store.verify(digest)
    with pytest.raises(IntegrityError, match="missing"):
        store.read_bytes(digest)


def test_put_repairs_a_damaged_blob(tmp_path: Path) -> None:
    store = BlobStore(tmp_path)
    digest = store.put_bytes(b"content")
    (tmp_path / digest).write_bytes(b"garbage")
    assert store.put_bytes(b"content") == digest
    assert store.read_bytes(digest) == b"content"


@pytest.mark.parametrize("bad", ["../../etc/passwd", "ABC", "0" * 63, "g" * 64, ""])
def test_digest_must_look_like_sha256(tmp_path: Path, bad: str) -> None:
    with pytest.raises(IntegrityError, match="not a sha256"):
        BlobStore(tmp_path).path(bad)


def test_materialize_builds_verified_folder_and_repairs_the_copy(tmp_path: Path) -> None:
    store = BlobStore(tmp_path / "blobs")
    files = {"a.txt": store.put_bytes(b"alpha"), "b.txt": store.put_bytes(b"beta")}
    target = tmp_path / "cache" / "m" / "1"
    assert materialize(store, files, target) == target
    assert (target / "a.txt").read_bytes() == b"alpha"
    # a tampered copy (not blob) is replaced from the intact blob
    (target / "a.txt").write_bytes(b"ALPHA")
    materialize(store, files, target)
    assert (target / "a.txt").read_bytes() == b"alpha"
    # an extra file makes the copy not match either
    (target / "extra").write_bytes(b"x")
    materialize(store, files, target)
    assert sorted(p.name for p in target.iterdir()) == ["a.txt", "b.txt"]
    assert not [p for p in target.parent.iterdir() if p.name.startswith(".")]  # no leftovers


def test_materialize_refuses_when_a_blob_is_altered_even_if_the_copy_is_intact(tmp_path: Path) -> None:
    store = BlobStore(tmp_path / "blobs")
    files = {"a.txt": store.put_bytes(b"alpha")}
    target = tmp_path / "cache" / "1"
    materialize(store, files, target)
    (tmp_path / "blobs" / files["a.txt"]).write_bytes(b"evil")
    with pytest.raises(IntegrityError, match="altered"):
        materialize(store, files, target)
    fresh = tmp_path / "cache" / "2"
    with pytest.raises(IntegrityError):
        materialize(store, files, fresh)
    assert not fresh.exists()


def test_concurrent_materialize_all_succeed(tmp_path: Path) -> None:
    store = BlobStore(tmp_path / "blobs")
    files = {f"f{i}": store.put_bytes(os.urandom(200_000)) for i in range(4)}
    target = tmp_path / "cache" / "v"
    errors: list[BaseException] = []

    def work() -> None:
        try:
            for _ in range(5):
                materialize(store, files, target)
        except BaseException as exc:  # reported below
            errors.append(exc)

    threads = [threading.Thread(target=work) for _ in range(4)]
    for t in threads:
        t.start()
    for t in threads:
        t.join()
    assert not errors
    assert {p.name: _sha(p.read_bytes()) for p in target.iterdir()} == files


def test_sweep_removes_only_stale_temporary_files(tmp_path: Path) -> None:
    store = BlobStore(tmp_path)
    digest = store.put_bytes(b"keep")
    old = tmp_path / ".tmp-old"
    new = tmp_path / ".tmp-new"
    old.write_bytes(b"half")
    new.write_bytes(b"half")
    past = time.time() - 3 * 24 * 3600
    os.utime(old, (past, past))
    assert store.sweep_temporary() == 1
    assert not old.exists() and new.exists() and (tmp_path / digest).exists()


# -- garbage collection ---------------------------------------------------------------------------
def test_garbage_collection_removes_only_old_unreferenced_blobs(tmp_path: Path, tiny_bundles: dict[str, Path]) -> None:
    import os
    import time

    from textsieve.registry import open_registry

    with open_registry(tmp_path / "reg") as reg:
        info = reg.publish(tiny_bundles["a"], "m", actor="tests", evalset=None)
        referenced = set(info.files.values())
        orphan_old = reg.blobs.put_bytes(b"left by a killed publish")
        orphan_new = reg.blobs.put_bytes(b"a publish in progress")
        past = time.time() - 7200
        os.utime(reg.blobs.path(orphan_old), (past, past))
        dry = reg.collect_garbage(dry_run=True)
        assert dry.removed == [orphan_old] and reg.blobs.has(orphan_old)
        report = reg.collect_garbage()  # default grace: an hour
        assert report.removed == [orphan_old] and report.spared_recent == 1
        assert report.removed_bytes == len(b"left by a killed publish")
        assert not reg.blobs.has(orphan_old) and reg.blobs.has(orphan_new)
        assert {d for d, _, _ in reg.blobs.stored()} == referenced | {orphan_new}
        assert reg.collect_garbage(older_than=0).removed == [orphan_new]
        for digest in referenced:  # every referenced blob is still there and intact
            reg.blobs.verify(digest)
        reg.fetch("m", 1)


@pytest.mark.parametrize("older_than", [float("nan"), float("inf"), -1.0])
def test_garbage_collection_refuses_an_age_that_is_not_a_finite_number_of_seconds(
    tmp_path: Path, older_than: float
) -> None:
    from textsieve.errors import InputError
    from textsieve.registry import open_registry

    with open_registry(tmp_path / "reg") as reg:
        young = reg.blobs.put_bytes(b"a publish in progress")
        with pytest.raises(InputError, match="give a finite number of seconds, 0 or more"):
            reg.collect_garbage(older_than=older_than)
        assert reg.blobs.has(young)


def test_reusing_an_old_orphan_makes_it_recent(tmp_path: Path) -> None:
    import os
    import time

    from textsieve.registry import open_registry

    with open_registry(tmp_path / "reg") as reg:
        digest = reg.blobs.put_bytes(b"content a publish will reuse")
        past = time.time() - 7200
        os.utime(reg.blobs.path(digest), (past, past))
        assert reg.blobs.put_bytes(b"content a publish will reuse") == digest  # a new publish stores it again
        assert reg.collect_garbage().removed == []
