"""``textsieve score --cluster``: a real Dask scheduler and worker processes, started with Dask's own
commands on loopback, score partitions that equal local scoring, also when a worker is SIGKILLed."""

from __future__ import annotations

import importlib.util
import json
import os
import re
import signal
import subprocess
import sys
from pathlib import Path

import pytest

from tests.helpers.environment import child_env
from tests.helpers.service import MODEL
from tests.scoring.conftest import ROOT, DaskCluster, dask_cluster, uci_rows, write_jsonl
from textsieve.cli import main

TOLERANCE = 1e-6  # the bound (labels identical, probabilities within 1e-6)


def _parquet(path: Path, rows: list[dict[str, object]], group: int) -> Path:
    import pyarrow as pa
    import pyarrow.parquet as pq

    pq.write_table(pa.Table.from_pylist(rows), path, row_group_size=group)
    return path


def _assert_equal_tables(got: object, want: object) -> None:
    import numpy as np
    import pyarrow as pa

    assert isinstance(got, pa.Table) and isinstance(want, pa.Table)
    assert got.num_rows == want.num_rows
    assert got.column("id").to_pylist() == want.column("id").to_pylist()  # input order kept
    assert got.column("label").to_pylist() == want.column("label").to_pylist()
    for name in want.column_names:
        if name.startswith("probability:"):
            diff = np.abs(np.asarray(got.column(name)) - np.asarray(want.column(name)))
            assert diff.max() <= TOLERANCE, name


def _local(src: Path, out: Path, registry: Path, *extra: object) -> object:
    import pyarrow.parquet as pq

    argv = ["score", str(src), "--model", MODEL, "--out", str(out), "--registry", str(registry), "--workers", "0"]
    assert main([*argv, *map(str, extra)]) == 0
    return pq.read_table(out)


def _dataset(folder: Path) -> object:
    import pyarrow.dataset as ds

    # Part files are named part-NNNNN in partition order; the dataset reads them in name order.
    return ds.dataset(folder, format="parquet").to_table()


def test_a_multi_partition_parquet_file_scored_on_two_workers_equals_local_scoring(
    loopback_cluster: DaskCluster, scoring_registry: Path, tmp_path: Path
) -> None:
    import json

    rows = uci_rows()
    src = _parquet(tmp_path / "uci.parquet", rows, group=400)  # 8 row groups → 8 partitions
    want = _local(src, tmp_path / "local.parquet", scoring_registry, "--spans", 2)
    out = tmp_path / "dataset"
    assert main(["score", str(src), "--model", MODEL, "--out", str(out), "--registry", str(scoring_registry),
                 "--cluster", loopback_cluster.address, "--spans", "2"]) == 0  # fmt: skip
    parts = sorted(p.name for p in out.iterdir())
    assert parts == ["_textsieve.json", *(f"part-{i:05d}.parquet" for i in range(8))]
    got = _dataset(out)
    _assert_equal_tables(got, want)
    assert got.column("spans").to_pylist() == want.column("spans").to_pylist()  # type: ignore[attr-defined]
    meta = json.loads((out / "_textsieve.json").read_text(encoding="utf-8"))
    assert (meta["model"], meta["version"], meta["rows"], meta["partitions"]) == (MODEL, 1, 3000, 8)


def test_a_worker_checks_the_bundle_s_files_but_not_its_graph_again(
    loopback_cluster: DaskCluster, scoring_registry: Path, tmp_path: Path
) -> None:
    """As the local pool's workers: onnx's checker passed the version when it was published, and its
    import cost each Dask worker ~0.5 s of its first partition (bench/README.md)."""
    from distributed import Client

    src = _parquet(tmp_path / "uci.parquet", uci_rows()[:500], group=250)
    out = tmp_path / "dataset"
    assert main(["score", str(src), "--model", MODEL, "--out", str(out), "--registry", str(scoring_registry),
                 "--cluster", loopback_cluster.address]) == 0  # fmt: skip
    with Client(loopback_cluster.address, timeout="30s", set_as_default=False) as client:
        seen = client.run(lambda: sorted(m for m in ("onnx", "onnxruntime") if m in sys.modules))
    assert list(seen.values()) == [["onnxruntime"]] * 2  # both workers scored, neither imported onnx


def test_the_sample_of_a_parquet_file_is_its_first_rows(tmp_path: Path) -> None:
    """Only the first 1,000 rows of the first row group are read for the sample (they fix the output's
    layout), not the whole row group."""
    import pyarrow.parquet as pq

    from textsieve.scoring.cluster import SAMPLE_ROWS, _sample, partitions

    rows = uci_rows()
    for group in (3000, 2500, 400):  # the first row group longer or shorter than the sample
        src = _parquet(tmp_path / f"g{group}.parquet", rows, group=group)
        parts, _ = partitions(str(src), "parquet", 1 << 20)
        sample = _sample(parts)
        assert len(sample) == min(SAMPLE_ROWS, group)
        assert sample == pq.read_table(src).to_pylist()[: len(sample)]
    small = _parquet(tmp_path / "small.parquet", rows[:7], group=10)
    assert _sample(partitions(str(small), "parquet", 1 << 20)[0]) == pq.read_table(small).to_pylist()


def test_jsonl_split_at_byte_offsets_loses_and_repeats_no_line(
    loopback_cluster: DaskCluster, scoring_registry: Path, tmp_path: Path
) -> None:
    from textsieve.registry import open_registry
    from textsieve.scoring.cluster import score_on_cluster

    src = write_jsonl(tmp_path / "uci.jsonl", uci_rows())
    want = _local(src, tmp_path / "local.parquet", scoring_registry)
    out = tmp_path / "dataset"
    with open_registry(scoring_registry, create=False) as reg:
        # 37,000 bytes: boundaries fall inside lines, and inside multi-byte characters.
        summary = score_on_cluster(reg, MODEL, str(src), out, cluster=loopback_cluster.address, partition_bytes=37_000)
    assert summary.rows == 3000 and len(list(out.glob("part-*.parquet"))) > 5
    _assert_equal_tables(_dataset(out), want)


def test_a_worker_killed_mid_run_is_retried_and_the_output_is_complete(scoring_registry: Path, tmp_path: Path) -> None:
    rows = [{**r, "id": i} for i, r in enumerate(uci_rows() * 4)]
    src = _parquet(tmp_path / "uci.parquet", rows, group=300)  # 40 partitions
    want = _local(src, tmp_path / "local.parquet", scoring_registry)
    out = tmp_path / "dataset"
    with dask_cluster(tmp_path, workers=2) as cluster:
        victim = cluster.workers[0]
        cmd = [sys.executable, "-m", "textsieve.cli", "score", str(src), "--model", MODEL, "--out", str(out),
               "--registry", str(scoring_registry), "--cluster", cluster.address, "--progress-every", "0"]  # fmt: skip
        proc = subprocess.Popen(
            cmd, env=child_env() | {"PYTHONPATH": str(ROOT)}, stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True
        )
        assert proc.stderr is not None
        first = proc.stderr.readline()  # the first partition written: both workers hold work now
        assert "texts" in first, first
        os.kill(victim.pid, signal.SIGKILL)
        stdout, stderr = proc.communicate(timeout=300)
        assert victim.wait() == -signal.SIGKILL
    assert proc.returncode == 0, stderr
    assert "scored 12,000 rows" in stdout
    _assert_equal_tables(_dataset(out), want)


@pytest.mark.parametrize(
    ("argv", "expected_msg"),
    [
        pytest.param(["in.csv"], "--cluster reads Parquet or JSONL", id="csv-input"),
        pytest.param(["missing.parquet"], "missing.parquet: no such file", id="missing-file"),
        # A URL whose fsspec filesystem is missing or unknown was a traceback (ImportError, ValueError).
        pytest.param(
            ["s3://bucket/in.parquet"],
            "s3://bucket/in.parquet: Install s3fs to access S3, here and on every worker",
            id="url-filesystem-not-installed",
            marks=pytest.mark.skipif(importlib.util.find_spec("s3fs") is not None, reason="s3fs is installed"),
        ),
        pytest.param(["nosuch://x/in.parquet"], "nosuch://x/in.parquet: Protocol not known: nosuch", id="url-unknown"),
        pytest.param(["in.parquet", "--text-field", "body"], "the input has no column 'body'", id="wrong-field"),
        pytest.param(["ints.parquet"], "the text column 'text' holds int64 values", id="parquet-int-text"),
        pytest.param(["two.parquet"], "the schema names the column 'text' twice", id="parquet-column-named-twice"),
        # As the local reader (test_formats.py): a \r alone ends no JSON Lines line (RFC 8259 §2 makes
        # it whitespace), so the whole file read as one line that is not JSON.
        pytest.param(
            ["cr.jsonl"], "cr.jsonl: line 1 holds several JSON values separated by a lone \\r", id="cr-only-jsonl"
        ),
        pytest.param(
            ["in.parquet", "--out", "/sys/ds"],
            "--out /sys/ds: cannot make a folder in /sys (Operation not permitted)",
            id="output-where-nothing-can-be-written",
        ),
    ],
)
def test_cluster_bad_input_is_one_line_exit_2(
    argv: list[str], expected_msg: str, scoring_registry: Path, tmp_path: Path
) -> None:
    _parquet(tmp_path / "in.parquet", [{"text": "hello"}], group=10)
    _parquet(tmp_path / "ints.parquet", [{"text": 7}], group=10)
    import pyarrow as pa
    import pyarrow.parquet as pq

    pq.write_table(
        pa.Table.from_arrays([pa.array(["a"]), pa.array(["b"])], names=["text", "text"]), tmp_path / "two.parquet"
    )
    (tmp_path / "in.csv").write_text("text\nhello\n", encoding="utf-8")
    (tmp_path / "cr.jsonl").write_bytes(b'{"text": "a"}\r{"text": "b"}\r')
    out = subprocess.run(
        [sys.executable, "-m", "textsieve.cli", "score", "--out", "ds", *argv, "--model", MODEL,
         "--registry", str(scoring_registry), "--cluster", "tcp://127.0.0.1:9"],
        capture_output=True, text=True, timeout=120, cwd=tmp_path, env=child_env() | {"PYTHONPATH": str(ROOT)},
    )  # fmt: skip
    assert out.returncode == 2, out.stderr
    lines = out.stderr.splitlines()
    assert len(lines) == 1 and expected_msg in lines[0], out.stderr
    assert not (tmp_path / "ds").exists()


def test_a_jsonl_field_first_seen_after_the_sample_stops_the_run(
    loopback_cluster: DaskCluster, scoring_registry: Path, tmp_path: Path
) -> None:
    """The columns come from the first 1,000 rows; a field first seen after them was dropped from
    every row of the dataset (JSON Lines rows need not share their fields, RFC 8259 §4)."""
    from textsieve.errors import InputError
    from textsieve.registry import open_registry
    from textsieve.scoring.cluster import score_on_cluster

    rows: list[dict[str, object]] = [{"text": r["text"]} for r in uci_rows()[:1100]]
    rows[1049] = {**rows[1049], "ticket": 7}
    src = write_jsonl(tmp_path / "in.jsonl", rows)
    out = tmp_path / "dataset"
    with open_registry(scoring_registry, create=False) as reg, pytest.raises(InputError) as caught:
        score_on_cluster(reg, MODEL, str(src), out, cluster=loopback_cluster.address)
    # The first partition of a JSONL file numbers its rows as the file's: the message is local scoring's.
    assert caught.value.message.startswith("row 1,050 has the field 'ticket', which none of the first 1,000 rows has")
    assert not out.exists() and sorted(p.name for p in tmp_path.iterdir()) == ["in.jsonl"]


def test_resume_scores_a_damaged_part_again(
    loopback_cluster: DaskCluster, scoring_registry: Path, tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    """A part file of the unfinished run that is no longer Parquet was a pyarrow traceback on --resume."""
    from textsieve.registry import open_registry
    from textsieve.scoring import formats
    from textsieve.scoring.cluster import score_on_cluster

    src = _parquet(tmp_path / "uci.parquet", [{**r, "id": i} for i, r in enumerate(uci_rows())], group=500)
    want = _local(src, tmp_path / "local.parquet", scoring_registry)
    out = tmp_path / "dataset"
    real = formats.write_part
    calls = {"n": 0}

    def write_part(path: Path, table: object, crc32: int = 0) -> int:
        calls["n"] += 1
        if calls["n"] == 3:
            raise KeyboardInterrupt
        return real(path, table, crc32)

    monkeypatch.setattr(formats, "write_part", write_part)
    with open_registry(scoring_registry, create=False) as reg, pytest.raises(KeyboardInterrupt) as caught:
        score_on_cluster(reg, MODEL, str(src), out, cluster=loopback_cluster.address)
    monkeypatch.undo()
    written = sorted((tmp_path / ".dataset.score-partial" / "dataset").glob("part-*.parquet"))
    assert len(written) == 2
    # What the CLI's one line for Ctrl-C or SIGTERM says (it said only "interrupted"), as a local run's.
    work = tmp_path / ".dataset.score-partial"
    assert caught.value.__notes__ == [
        f"stopped after 2 of 6 partitions (1,000 rows) were written; they are kept in {work}; {out} was not written; "
        "run the same command with --resume to continue"
    ]
    written[0].write_bytes(b"PAR1 not a Parquet file")
    with open_registry(scoring_registry, create=False) as reg:
        summary = score_on_cluster(reg, MODEL, str(src), out, cluster=loopback_cluster.address, resume=True)
    assert summary.rows == 3000
    _assert_equal_tables(_dataset(out), want)


def _cli(argv: list[str], cwd: Path, code: str = "") -> subprocess.CompletedProcess[str]:
    """``textsieve`` in a process of its own (what it leaves on stderr at exit is part of the check);
    ``code`` runs first, to stand in for what a test cannot arrange on a loopback cluster."""
    main_call = f"from textsieve.cli import main; raise SystemExit(main({argv!r}))"
    return subprocess.run(
        [sys.executable, "-c", f"{code}\n{main_call}"],
        capture_output=True, text=True, timeout=300, cwd=cwd, env=child_env() | {"PYTHONPATH": str(ROOT)},
    )  # fmt: skip


def test_a_relative_input_path_reaches_the_workers_as_an_absolute_one(
    loopback_cluster: DaskCluster, scoring_registry: Path, tmp_path: Path
) -> None:
    """The workers run in another folder (the checkout) than this process (tmp_path): the relative
    path was opened there, a FileNotFoundError traceback from score_partition."""
    _parquet(tmp_path / "in.parquet", [{"text": r["text"]} for r in uci_rows()[:300]], group=100)
    (tmp_path / "rel").mkdir()
    out = _cli(["score", "in.parquet", "--model", MODEL, "--out", "rel/ds", "--registry", str(scoring_registry),
                "--cluster", loopback_cluster.address], cwd=tmp_path)  # fmt: skip
    assert out.returncode == 0, out.stderr
    assert "scored 300 rows" in out.stdout
    assert len(list((tmp_path / "rel" / "ds").glob("part-*.parquet"))) == 3
    assert "Traceback" not in out.stderr and "Exception ignored" not in out.stderr


# Stand-ins for a worker that sees another file than this process: the partitions this process read
# (and sampled) point elsewhere when they are sent.
_ELSEWHERE = """
import dataclasses, textsieve.scoring.cluster as c
_real = c._run
def _run(client, payload, todo, *rest):
    return _real(client, payload, [dataclasses.replace(p, **{changes}) for p in todo], *rest)
c._run = _run
"""


@pytest.mark.parametrize(
    ("changes", "code", "expected_msg"),
    [
        pytest.param(
            "{'url': p.url + '.elsewhere'}",
            2,
            "in.parquet.elsewhere: a Dask worker cannot read it (no such file); the workers must see the same path "
            "as this process (a shared filesystem)",
            id="file-the-workers-cannot-see",
        ),
        pytest.param(
            "{'url': p.url.replace('in.parquet', 'notes.txt')}",
            1,
            "partition 0 of ",
            id="any-other-error-on-a-worker",
        ),
    ],
)
def test_an_error_on_a_worker_is_one_line_and_leaves_nothing(
    changes: str, code: int, expected_msg: str, loopback_cluster: DaskCluster, scoring_registry: Path, tmp_path: Path
) -> None:
    _parquet(tmp_path / "in.parquet", [{"text": "hello"}], group=10)
    (tmp_path / "notes.txt").write_text("not a Parquet file\n", encoding="utf-8")
    argv = ["score", "in.parquet", "--model", MODEL, "--out", "ds", "--registry", str(scoring_registry),
            "--cluster", loopback_cluster.address]  # fmt: skip
    out = _cli(argv, cwd=tmp_path, code=_ELSEWHERE.format(changes=changes))
    assert out.returncode == code, out.stderr
    lines = out.stderr.splitlines()
    assert len(lines) == 1 and lines[0].startswith("textsieve: error: ") and expected_msg in lines[0], out.stderr
    assert sorted(p.name for p in tmp_path.iterdir()) == ["in.parquet", "notes.txt"]


def test_an_unreachable_scheduler_leaves_no_unfinished_run(scoring_registry: Path, tmp_path: Path) -> None:
    _parquet(tmp_path / "in.parquet", [{"text": "hello"}], group=10)
    out = _cli(["score", "in.parquet", "--model", MODEL, "--out", "u", "--registry", str(scoring_registry),
                "--cluster", "tcp://127.0.0.1:9"], cwd=tmp_path)  # fmt: skip
    assert out.returncode == 1, out.stderr
    lines = out.stderr.splitlines()
    assert len(lines) == 1 and "cannot reach the Dask scheduler at tcp://127.0.0.1:9" in lines[0], out.stderr
    assert sorted(p.name for p in tmp_path.iterdir()) == ["in.parquet"]


def test_error_cells_and_strict_stops_name_the_line_or_row_as_local_scoring_does(
    loopback_cluster: DaskCluster, scoring_registry: Path, tmp_path: Path
) -> None:
    """A Parquet partition numbers its rows as the file's (its row groups' counts are in the footer), and
    so does a JSONL file's first partition; a later JSONL partition does not know how many lines come
    before it, and says which partition and byte its line numbers count from."""
    import pyarrow.parquet as pq

    from textsieve.errors import InputError
    from textsieve.registry import open_registry
    from textsieve.scoring.cluster import score_on_cluster
    from textsieve.scoring.local import Options

    rows: list[dict[str, object]] = [{"text": r["text"]} for r in uci_rows()[:1000]]
    lines = [json.dumps(r) for r in rows]
    lines[4] = lines[904] = "{not json"
    src = tmp_path / "in.jsonl"
    src.write_text("\n".join(lines) + "\n", encoding="utf-8")
    local = tmp_path / "local.parquet"
    _local(src, local, scoring_registry)
    want = [e for e in pq.read_table(local).column("error").to_pylist() if e]
    assert want == ["line 5 is not valid JSON", "line 905 is not valid JSON"]
    out = tmp_path / "ds"
    with open_registry(scoring_registry, create=False) as reg:
        score_on_cluster(reg, MODEL, str(src), out, cluster=loopback_cluster.address, partition_bytes=40_000)
    got = [e for e in _dataset(out).column("error").to_pylist() if e]  # type: ignore[attr-defined]
    assert got[0] == want[0]
    start = len("\n".join(lines[:904])) + 1  # where line 905 starts; its partition starts before
    match = re.fullmatch(r"line (\d+) of partition (\d+) \(the lines from byte ([\d,]+)\) is not valid JSON", got[1])
    assert match, got[1]
    first = int(match[3].replace(",", ""))
    assert first == 40_000 * int(match[2]) and first <= start
    # The line number within the partition: its first line is the first that starts in its range.
    assert int(match[1]) == (src.read_bytes()[first - 1 : start].count(b"\n"))

    both = rows + rows
    both[1208] = {"text": ""}  # in the fourth row group
    pq_src = _parquet(tmp_path / "in.parquet", both, group=400)
    want_msg = subprocess.run(
        [sys.executable, "-m", "textsieve.cli", "score", str(pq_src), "--model", MODEL, "--out", "l.parquet",
         "--registry", str(scoring_registry), "--strict", "--workers", "0"],
        capture_output=True, text=True, cwd=tmp_path, env=child_env() | {"PYTHONPATH": str(ROOT)},
    ).stderr.strip().removeprefix("textsieve: error: ")  # fmt: skip
    assert want_msg.startswith("row 1209: ")
    with open_registry(scoring_registry, create=False) as reg, pytest.raises(InputError) as caught:
        score_on_cluster(reg, MODEL, str(pq_src), tmp_path / "ds2", cluster=loopback_cluster.address,
                         options=Options(strict=True))  # fmt: skip
    assert caught.value.message == want_msg
