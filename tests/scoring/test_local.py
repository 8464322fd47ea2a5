"""``textsieve score`` on this machine: the same numbers as the HTTP service, every format read back
with an outside reader, bad rows kept and counted, resume, and bad input refused with nothing written."""

from __future__ import annotations

import csv
import gzip
import json
import os
import signal
import socket
import stat
import subprocess
import sys
from pathlib import Path
from typing import Any

import pytest

from tests.helpers.environment import child_env
from tests.helpers.service import MODEL, serving, settings_for
from tests.scoring.conftest import ROOT, uci_rows, wait_until, write_jsonl
from textsieve.cli import main
from textsieve.scoring.pool import _stopped

TOLERANCE = 1e-6  # the bound; float32 graphs agree to ~1e-7 (DEVELOPERS.md "Numbers")


def score(*argv: object) -> int:
    return main(["score", *map(str, argv)])


def read_jsonl(path: Path) -> list[dict[str, Any]]:
    # split("\n"), not splitlines(): JSON strings may hold U+2028 and other characters it splits on.
    return [json.loads(line) for line in path.read_text(encoding="utf-8").split("\n") if line]


def assert_same_results(got: list[dict[str, Any]], want: list[dict[str, Any]], labels: list[str]) -> None:
    assert len(got) == len(want)
    for g, w in zip(got, want, strict=True):
        assert g["label"] == w["label"], (g, w)
        for x in labels:
            assert abs(float(g[f"probability:{x}"]) - w["probabilities"][x]) <= TOLERANCE


# -- the service as the reference -----------------------------------------------------------------
@pytest.mark.anyio
async def test_local_scoring_equals_the_services_replies_on_the_uci_sentences(
    scoring_registry: Path, uci_jsonl: Path, tmp_path: Path
) -> None:
    out = tmp_path / "scored.jsonl"
    # Two worker processes and small chunks: the pieces a text is batched with differ from the service's.
    assert score(uci_jsonl, "--model", MODEL, "--out", out, "--registry", scoring_registry, "--spans", 3,
                 "--workers", 2, "--chunk-rows", 700) == 0  # fmt: skip
    got = read_jsonl(out)
    texts = [r["text"] for r in uci_rows()]
    replies: list[dict[str, Any]] = []
    async with serving(settings_for(scoring_registry)) as (_, client):
        for lo in range(0, len(texts), 200):
            r = await client.post("/v1/predict", json={"texts": texts[lo : lo + 200], "model": MODEL, "spans": 3})
            assert r.status_code == 200, r.text
            body = r.json()
            assert body["version"] == 1
            replies += body["results"]
    labels = list(replies[0]["probabilities"])
    assert_same_results(got, replies, labels)
    assert [r["text"] for r in got] == texts  # input order kept, columns carried over
    assert [[(s["start"], s["end"], s["text"]) for s in r["spans"]] for r in got] == [
        [(s["start"], s["end"], s["text"]) for s in r["spans"]] for r in replies
    ]
    assert {r["error"] for r in got} == {None}
    meta = json.loads((tmp_path / "scored.jsonl.meta.json").read_text(encoding="utf-8"))
    assert (meta["model"], meta["version"], meta["rows"], meta["errors"]) == (MODEL, 1, 3000, 0)
    assert len(meta["bundle_sha256"]) == 64 and meta["labels"] == labels


# -- formats read back by outside readers ------------------------------------------------------------
def test_parquet_read_by_pyarrow_and_csv_read_by_the_csv_module_match(
    scoring_registry: Path, uci_jsonl: Path, tmp_path: Path
) -> None:
    import pyarrow.parquet as pq

    from textsieve import load_model

    common = ["--model", MODEL, "--version", 2, "--registry", scoring_registry, "--workers", 0, "--chunk-rows", 1000]
    assert score(uci_jsonl, "--out", tmp_path / "s.parquet", *common) == 0
    assert score(uci_jsonl, "--out", tmp_path / "s.csv", *common) == 0
    model = load_model(scoring_registry, MODEL, 2)
    rows = uci_rows()
    want = [p.public() for p in model.predict([str(r["text"]) for r in rows], spans=0)]
    table = pq.read_table(tmp_path / "s.parquet")
    assert pq.ParquetFile(tmp_path / "s.parquet").num_row_groups == 3  # one per chunk
    assert_same_results(table.to_pylist(), want, model.labels)
    assert table.column("id").to_pylist() == [r["id"] for r in rows]
    assert table.column("class").to_pylist() == [r["class"] for r in rows]  # the JSON ints stay int64
    meta = json.loads(pq.read_schema(tmp_path / "s.parquet").metadata[b"textsieve"])
    assert (meta["version"], meta["bundle_sha256"]) == (2, model.bundle_sha256)
    with open(tmp_path / "s.csv", newline="", encoding="utf-8") as f:
        back = list(csv.DictReader(f))
    assert_same_results(back, want, model.labels)
    assert [r["text"] for r in back] == [r["text"] for r in rows]  # quotes, commas and newlines survive


def test_a_tsv_file_is_read_and_written_with_tabs_as_the_csv_module_does(
    scoring_registry: Path, tmp_path: Path
) -> None:
    # As `textsieve train` reads .tsv (textsieve/labelled.py): CSV's quoting rules, a tab between fields.
    from textsieve import load_model

    texts = ["the chain is broken", 'a "quoted"\tword, and a comma', "two\nlines\twith a tab"]
    src = tmp_path / "in.tsv"
    with open(src, "w", newline="", encoding="utf-8") as f:
        w = csv.writer(f, delimiter="\t")
        w.writerow(["id", "text"])
        w.writerows([i, t] for i, t in enumerate(texts))
    assert "\t" in src.read_text(encoding="utf-8").splitlines()[0]
    common = ["--model", MODEL, "--registry", scoring_registry, "--workers", 0]
    assert score(src, "--out", tmp_path / "out.tsv", *common) == 0
    with open(tmp_path / "out.tsv", newline="", encoding="utf-8") as f:
        back = list(csv.DictReader(f, delimiter="\t"))
    assert [r["text"] for r in back] == texts and [r["id"] for r in back] == ["0", "1", "2"]
    model = load_model(scoring_registry, MODEL)
    assert_same_results(back, [p.public() for p in model.predict(texts, spans=0)], model.labels)
    assert json.loads((tmp_path / "out.tsv.meta.json").read_text())["rows"] == 3


def test_a_csv_input_keeps_only_the_asked_columns_and_renames_clashing_ones(
    scoring_registry: Path, tmp_path: Path
) -> None:
    src = tmp_path / "in.csv"
    with open(src, "w", newline="", encoding="utf-8") as f:
        w = csv.writer(f)
        w.writerow(["body", "label", "error", "probability:x", "other"])
        w.writerow(["the chain is broken", "repair", "e", "p", "o"])
        w.writerow(["I was charged twice, refund please", "billing", "e", "p", "o"])
    out = tmp_path / "out.jsonl"
    assert score(src, "--model", MODEL, "--out", out, "--registry", scoring_registry, "--text-field", "body",
                 "--keep", "body,label,error,probability:x", "--workers", 0) == 0  # fmt: skip
    rows = read_jsonl(out)
    assert list(rows[0])[:4] == ["body", "input:label", "input:error", "input:probability:x"]
    assert rows[1]["input:label"] == "billing" and rows[1]["label"] in {"account", "billing", "praise", "repair"}
    assert "other" not in rows[0]


# -- bad rows are kept and counted, or stop the run with --strict ---------------------------------------
BAD_ROWS = [
    ({"text": "the chain is broken"}, None),
    ({"text": ""}, "text field 'text' is empty"),
    ({"text": "   "}, "text field 'text' is empty (only whitespace)"),
    (
        {"text": "\u200b\u200d"},
        "text field 'text' has only whitespace and invisible characters (such as U+200B), no words",
    ),
    ({"other": "x"}, "text field 'text' is missing"),
    ({"text": None}, "text field 'text' is null, not a string"),  # present, unlike the row above
    # JSON's own names for its values (RFC 8259 §3); it said "an int", Python's word.
    ({"text": 42}, "text field 'text' is a number, not a string"),
    ({"text": ["a"]}, "text field 'text' is an array, not a string"),
    ({"text": {"a": 1}}, "text field 'text' is an object, not a string"),
    ({"text": True}, "text field 'text' is a boolean, not a string"),
    ({"text": "refund please"}, None),
]


def test_rows_without_a_text_get_an_error_and_are_counted(
    scoring_registry: Path, tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    src = tmp_path / "in.jsonl"
    lines = [json.dumps(row) for row, _ in BAD_ROWS]
    lines.insert(3, "{not json")
    src.write_text("\n".join(lines) + "\n", encoding="utf-8")
    out = tmp_path / "out.jsonl"
    assert score(src, "--model", MODEL, "--out", out, "--registry", scoring_registry, "--workers", 0) == 0
    rows = read_jsonl(out)
    expected = [e for _, e in BAD_ROWS]
    expected.insert(3, "line 4 is not valid JSON")
    assert [r["error"] for r in rows] == expected
    assert [r["label"] is None for r in rows] == [e is not None for e in expected]
    assert f"{sum(e is not None for e in expected)} row(s) had no text to score" in capsys.readouterr().out

    assert score(src, "--model", MODEL, "--out", out, "--registry", scoring_registry, "--strict") == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert err == ["textsieve: error: row 2: text field 'text' is empty (--strict stops at the first such row)"]
    assert sorted(p.name for p in tmp_path.iterdir()) == ["in.jsonl", "out.jsonl", "out.jsonl.meta.json"]


NUL_TEXTS = ["refund please", "refund\x00 now", "the chain is broken"]


def _nul_input(folder: Path, fmt: str) -> Path:
    """NUL_TEXTS as each format carries a NUL: JSON's \\u0000 escape, a raw NUL byte in a CSV or TSV cell,
    a Parquet string holding \\x00."""
    path = folder / f"in.{fmt}"
    if fmt == "jsonl":
        write_jsonl(path, [{"text": t} for t in NUL_TEXTS])
    elif fmt == "parquet":
        import pyarrow as pa
        import pyarrow.parquet as pq

        pq.write_table(pa.table({"text": NUL_TEXTS}), path)
    else:
        path.write_bytes(("text\n" + "".join(f"{t}\n" for t in NUL_TEXTS)).encode("utf-8"))
    return path


@pytest.mark.parametrize("fmt", ["jsonl", "csv", "tsv", "parquet"])
def test_a_text_holding_a_nul_is_an_error_row_in_score_frames_words_in_every_format(
    fmt: str, scoring_registry: Path, tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    """The HTTP API, predict and score_frame refuse a NUL; file scoring labelled it, error null."""
    import pandas as pd

    import textsieve

    src = _nul_input(tmp_path, fmt)
    out = tmp_path / "out.jsonl"
    common = ["--model", MODEL, "--registry", scoring_registry]
    assert score(src, "--out", out, *common, "--workers", 0) == 0
    rows = read_jsonl(out)
    frame = textsieve.load_model(scoring_registry, MODEL).score_frame(pd.DataFrame({"text": NUL_TEXTS}))
    assert [r["text"] for r in rows] == NUL_TEXTS
    assert [r["error"] for r in rows] == [e if isinstance(e, str) else None for e in frame["error"].tolist()]
    assert rows[1]["error"] == "text field 'text' contains a NUL character (U+0000) at character 6; remove it"
    assert rows[1]["label"] is None and rows[0]["label"] is not None and rows[2]["label"] is not None
    assert "1 row(s) had no text to score" in capsys.readouterr().out

    assert score(src, "--out", tmp_path / "strict.jsonl", *common, "--strict") == 2
    assert capsys.readouterr().err.strip().splitlines() == [
        "textsieve: error: row 2: text field 'text' contains a NUL character (U+0000) at character 6; remove it "
        "(--strict stops at the first such row)"
    ]


@pytest.mark.parametrize("fmt", ["csv", "tsv"])
def test_a_field_longer_than_the_csv_modules_default_limit_is_scored_as_in_jsonl(
    fmt: str, scoring_registry: Path, tmp_path: Path
) -> None:
    """A valid file with a text of 200,000 characters was "not CSV ... (field larger than field limit
    (131072)); ... quoted whole" (Python's csv.field_size_limit default); in JSONL it was scored."""
    long_text = " ".join(["the chain is broken, refund please"] * 5800)
    assert len(long_text) > 131_072 * 1.5
    texts = ["refund please", long_text, "the dock is broken"]
    jsonl = write_jsonl(tmp_path / "in.jsonl", [{"text": t} for t in texts])
    delimited = tmp_path / f"in.{fmt}"
    with open(delimited, "w", encoding="utf-8", newline="") as f:
        writer = csv.writer(f, delimiter="," if fmt == "csv" else "\t")
        writer.writerows([["text"], *([t] for t in texts)])
    common = ["--model", MODEL, "--registry", scoring_registry, "--workers", 0]
    assert score(jsonl, "--out", tmp_path / "from-jsonl.jsonl", *common) == 0
    assert score(delimited, "--out", tmp_path / "from-delimited.jsonl", *common) == 0
    want = read_jsonl(tmp_path / "from-jsonl.jsonl")
    got = read_jsonl(tmp_path / "from-delimited.jsonl")
    assert got == want and got[1]["text"] == long_text and got[1]["error"] is None


def test_an_input_file_name_that_is_not_utf8_is_recorded_with_its_bytes_escaped(
    scoring_registry: Path, tmp_path: Path
) -> None:
    """Linux file names are bytes; Python keeps the bytes that are not UTF-8 as lone surrogates,
    which the UTF-8 metadata cannot hold (the run used to fail after the output was in place)."""
    src = tmp_path / os.fsdecode(b"tickets-\xff.jsonl")
    src.write_text(json.dumps({"text": "the chain is broken"}) + "\n", encoding="utf-8")
    out = tmp_path / "out.jsonl"
    assert score(src, "--model", MODEL, "--out", out, "--registry", scoring_registry, "--workers", 0) == 0
    meta = json.loads((tmp_path / "out.jsonl.meta.json").read_text(encoding="utf-8"))
    assert meta["input"].endswith("tickets-\\xff.jsonl")
    assert sorted(p.name for p in tmp_path.iterdir()) == sorted([src.name, "out.jsonl", "out.jsonl.meta.json"])


# -- bad input: one line, exit 2 (1 for a blob that fails its sha256), nothing written ---------------------
def _tamper(registry: Path) -> None:
    from textsieve.registry import open_registry

    with open_registry(str(registry)) as reg:  # the live version's model.onnx (reports are blobs too)
        live = reg.live(MODEL)
        assert live is not None
        digest = live.files["model.onnx"]
    blob = next(p for p in (registry / "blobs").rglob("*") if p.is_file() and p.name == digest)
    with open(blob, "r+b") as f:
        f.seek(100)
        byte = f.read(1)
        f.seek(100)
        f.write(bytes([byte[0] ^ 1]))


BAD_INPUT = [
    pytest.param(["missing.jsonl", "--out", "o.jsonl"], 2, "missing.jsonl: no such file", id="missing-file"),
    # A URL, which only --cluster reads, was taken for a path: "s3:/bucket/t.jsonl: no such file".
    pytest.param(
        ["s3://bucket/t.jsonl", "--out", "o.jsonl"],
        2,
        "s3://bucket/t.jsonl: a URL is read only with --cluster",
        id="url-without-cluster",
    ),
    pytest.param(
        ["in.jsonl", "--out", "o.jsonl", "--text-field", "body"],
        2,
        "no row among the first 2 has the field 'body'",
        id="wrong-text-field",
    ),  # noqa: E501
    pytest.param(
        ["in.csv", "--out", "o.jsonl", "--text-field", "body"],
        2,
        "the input has no column 'body'",
        id="wrong-csv-column",
    ),  # noqa: E501
    # These said "no row among the first 2 has the field 'text'; fields seen: none; pass --text-field NAME".
    pytest.param(
        ["in.jsonl.gz", "--input-format", "jsonl", "--out", "o.jsonl"],
        2,
        "in.jsonl.gz's line is not JSON (the first starts with b'\\x1f\\x8b\\x08",
        id="gzip-read-as-jsonl",
    ),
    pytest.param(
        ["csv.jsonl", "--out", "o.jsonl"],
        2,
        "none of the first 2 lines of csv.jsonl is JSON (the first starts with b'text,label'); JSON Lines holds one "
        "JSON object a line, in UTF-8",
        id="csv-named-jsonl",
    ),
    pytest.param(["in.jsonl", "--out", "o.jsonl", "--model", "nosuch"], 2, "no model 'nosuch'", id="unknown-model"),
    pytest.param(
        ["in.jsonl", "--out", "o.jsonl", "--version", "9"], 2, "'support' has no version 9", id="unknown-version"
    ),  # noqa: E501
    pytest.param(
        ["in.jsonl", "--out", "outdir"], 2, "outdir: is a folder; --out names the file", id="folder-as-output"
    ),
    pytest.param(["in.jsonl", "--out", "o.txt"], 2, "cannot tell the format from the name", id="unknown-format"),
    # POST /v1/predict answers 422 above TEXTSIEVE_MAX_SPANS (default 20; README: spans 0–20).
    pytest.param(
        ["in.jsonl", "--out", "o.jsonl", "--spans", "1000"],
        2,
        "--spans: at most 20 spans per text (the HTTP API's limit too), not 1000",
        id="spans-above-the-limit",
    ),
    # An atomic write renames a new regular file over OUTPUT: /dev/null became a file (as root), and a
    # FIFO or a socket was replaced the same way, its reader never getting a byte.
    pytest.param(
        ["in.jsonl", "--out", "pipe.jsonl"],
        2,
        "--out pipe.jsonl: is a FIFO (named pipe), which textsieve does not write over; "
        "name a regular file's path or a new path",
        id="output-a-fifo",
    ),
    pytest.param(["in.jsonl", "--out", "sock.csv"], 2, "--out sock.csv: is a socket", id="output-a-socket"),
    pytest.param(
        ["in.jsonl", "--out", "m.jsonl"],
        2,
        "--out m.jsonl: its metadata goes to m.jsonl.meta.json, which is a FIFO (named pipe)",
        id="output-metadata-a-fifo",
    ),
    pytest.param(
        ["in.jsonl", "--out", "pipe.jsonl", "--cluster", "tcp://127.0.0.1:9"],
        2,
        "--out pipe.jsonl: is a FIFO (named pipe), which textsieve does not write over; name a folder",
        id="cluster-output-a-fifo",
    ),
    # /sys takes no new file or folder even from root; this was a PermissionError traceback.
    pytest.param(
        ["in.jsonl", "--out", "/sys/o.jsonl"],
        2,
        "--out /sys/o.jsonl: cannot make a folder in /sys (Operation not permitted)",
        id="output-where-nothing-can-be-written",
    ),
    pytest.param(["in.jsonl", "--out", "in.jsonl"], 2, "--out names the input file itself", id="output-is-the-input"),
    # The input was replaced by the metadata written beside a JSONL, CSV or TSV output.
    pytest.param(
        ["o.jsonl.meta.json", "--input-format", "jsonl", "--out", "o.jsonl"],
        2,
        "o.jsonl: its metadata goes to o.jsonl.meta.json, which is the input file",
        id="output-metadata-is-the-input",
    ),
    pytest.param(
        ["in.jsonl", "--out", "o.jsonl", "--progress-every", "nan"],
        2,
        "--progress-every: must be a number of seconds, 0 or more, not nan",
        id="progress-every-nan",
    ),
    pytest.param(
        ["in.jsonl", "--out", "o.jsonl", "--keep", "nope"],
        2,
        "--keep names column(s) the input does not have: nope",
        id="unknown-keep",
    ),  # noqa: E501
    pytest.param(["in.jsonl", "--out", "o.jsonl", "tamper"], 1, "has been altered", id="tampered-blob"),
    # Every row was an error row ("is an int, not a string"), exit 0. A Parquet BYTE_ARRAY column
    # without the STRING annotation is bytes, not text (Apache Parquet's logical types); pyarrow
    # reads it as binary.
    pytest.param(
        ["numbers.parquet", "--out", "o.jsonl"], 2, "the text column 'text' holds int64 values", id="parquet-int-text"
    ),
    pytest.param(
        ["bytes.parquet", "--out", "o.jsonl"], 2, "the text column 'text' holds binary values", id="parquet-binary-text"
    ),
    # JSON text is UTF-8 (RFC 8259 §8.1): bytes that are not were written as U+FFFD, exit 0.
    pytest.param(
        ["blob.parquet", "--out", "o.jsonl"],
        2,
        "row 2: column 'blob' holds bytes that are not UTF-8 text, which a JSONL file cannot hold",
        id="parquet-bytes-kept-in-jsonl",
    ),
    pytest.param(
        ["open-quote.csv", "--out", "o.jsonl"],
        2,
        "open-quote.csv: not CSV in the row that starts on line 3 (a quote opened there is never closed)",
        id="csv-quote-left-open",
    ),
    # pyarrow writes and reads a schema naming a column twice; it was a KeyError traceback.
    pytest.param(
        ["two-notes.parquet", "--out", "o.jsonl"],
        2,
        "two-notes.parquet: the schema names the column 'note' twice (columns 2 and 3)",
        id="parquet-column-named-twice",
    ),
    # A ';'-separated file named .csv (a spreadsheet's export where ',' is the decimal mark) was told
    # to pass --text-field, which cannot help: RFC 4180 separates fields with commas.
    pytest.param(
        ["semicolons.csv", "--out", "o.jsonl"],
        2,
        "the header holds ';', not the CSV separator: textsieve reads CSV with ',' and TSV with tabs",
        id="semicolon-separated-csv",
    ),
    pytest.param(
        ["two-texts.csv", "--out", "o.jsonl"],
        2,
        "the header names the column 'text' twice (columns 1 and 2)",
        id="csv-column-named-twice",
    ),
]


@pytest.mark.parametrize(("argv", "status", "expected_msg"), BAD_INPUT)
def test_bad_input_is_one_line_and_leaves_nothing(
    argv: list[str], status: int, expected_msg: str, tiny_bundles: dict[str, Path], tmp_path: Path
) -> None:
    from tests.helpers.service import make_registry

    registry = make_registry(tmp_path / "registry", tiny_bundles)
    work = tmp_path / "work"
    work.mkdir()
    write_jsonl(work / "in.jsonl", [{"text": "the chain is broken"}, {"text": "refund please"}])
    (work / "in.csv").write_text("text\nhello\n", encoding="utf-8")
    # A quote opened and never closed would have read every later line into one text.
    (work / "open-quote.csv").write_text('text\nhello\n"the chain\nrefund please\n', encoding="utf-8")
    (work / "two-texts.csv").write_text("text,text\nhello,world\n", encoding="utf-8")
    (work / "semicolons.csv").write_text("id;text\n1;the chain is broken\n", encoding="utf-8")
    write_jsonl(work / "o.jsonl.meta.json", [{"text": "the chain is broken"}])
    import pyarrow as pa
    import pyarrow.parquet as pq

    pq.write_table(pa.table({"text": pa.array([1, 2], pa.int64())}), work / "numbers.parquet")
    notes = [pa.array(["the chain", "refund"]), pa.array(["a", "b"]), pa.array(["c", "d"])]
    pq.write_table(pa.Table.from_arrays(notes, names=["text", "note", "note"]), work / "two-notes.parquet")
    pq.write_table(pa.table({"text": pa.array([b"the chain", b"refund"], pa.binary())}), work / "bytes.parquet")
    pq.write_table(
        pa.table({"text": ["the chain", "refund"], "blob": [b"caf\xc3\xa9", b"\xff\x00"]}), work / "blob.parquet"
    )
    (work / "outdir").mkdir()
    (work / "in.jsonl.gz").write_bytes(gzip.compress((work / "in.jsonl").read_bytes(), mtime=0))
    (work / "csv.jsonl").write_text("text,label\nthe chain is broken,repair\n", encoding="utf-8")
    os.mkfifo(work / "pipe.jsonl")
    os.mkfifo(work / "m.jsonl.meta.json")
    with socket.socket(socket.AF_UNIX) as sock:
        sock.bind(str(work / "sock.csv"))
    if "tamper" in argv:
        argv.remove("tamper")
        _tamper(registry)
    if "--model" not in argv:
        argv += ["--model", MODEL]
    before = sorted(p.name for p in work.iterdir())
    local = [] if "--cluster" in argv else ["--workers", "0"]  # --workers is refused with --cluster
    out = subprocess.run(
        [sys.executable, "-m", "textsieve.cli", "score", *argv, "--registry", str(registry), *local],
        capture_output=True, text=True, timeout=120, cwd=work, env=child_env() | {"PYTHONPATH": str(ROOT)},
    )  # fmt: skip
    assert out.returncode == status, out.stderr
    lines = out.stderr.splitlines()
    assert len(lines) == 1 and lines[0].startswith("textsieve: error: ") and expected_msg in lines[0], out.stderr
    assert sorted(p.name for p in work.iterdir()) == before and not any((work / "outdir").iterdir())
    assert (work / "in.jsonl").read_text(encoding="utf-8").count("\n") == 2  # the input is untouched
    assert stat.S_ISFIFO((work / "pipe.jsonl").lstat().st_mode) and stat.S_ISSOCK((work / "sock.csv").lstat().st_mode)
    assert json.loads((work / "o.jsonl.meta.json").read_text(encoding="utf-8")) == {"text": "the chain is broken"}


@pytest.mark.parametrize("name", ["empty.jsonl", "empty.csv", "empty.tsv", "header.csv", "empty.parquet"])
@pytest.mark.parametrize("out_name", ["out.jsonl", "out.parquet"])
def test_an_empty_input_in_any_format_scores_0_rows_with_a_note(
    name: str, out_name: str, scoring_registry: Path, tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    """An empty JSONL or Parquet file scored 0 rows with exit 0 and no word, an empty CSV was refused:
    all are now scored (a scheduled run on a quiet day is no error) with one line saying so."""
    import pyarrow as pa
    import pyarrow.parquet as pq

    src = tmp_path / name
    if name == "empty.parquet":
        pq.write_table(pa.table({"text": pa.array([], pa.string())}), src)
    else:
        src.write_text("text\n" if name == "header.csv" else "", encoding="utf-8")
    out = tmp_path / out_name
    assert score(src, "--model", MODEL, "--out", out, "--registry", scoring_registry, "--workers", 0) == 0
    captured = capsys.readouterr()
    assert captured.err.strip().splitlines()[0] == f"textsieve: 0 rows scored: {src} is empty", captured.err
    assert "scored 0 rows" in captured.out
    if out_name == "out.parquet":
        table = pq.read_table(out)  # pyarrow reads it: a valid file with the result columns
        assert table.num_rows == 0 and "label" in table.column_names
    else:
        assert out.read_bytes() == b""
        assert json.loads((tmp_path / "out.jsonl.meta.json").read_text(encoding="utf-8"))["rows"] == 0


def test_more_workers_than_four_per_core_is_one_line(
    scoring_registry: Path, tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    """--workers 999 tried to start 999 worker processes, each an onnxruntime session."""
    from textsieve.scoring.pool import default_workers

    src = write_jsonl(tmp_path / "in.jsonl", uci_rows()[:5])
    most = 4 * default_workers()
    common = ["--model", MODEL, "--out", tmp_path / "out.jsonl", "--registry", scoring_registry]
    with pytest.raises(SystemExit) as stopped:  # argparse's refusal, as the command line ends it
        score(src, *common, "--workers", most + 1)
    assert stopped.value.code == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and f"--workers: at most {most} (4 per core this process may use, " in err[0], err
    assert f"not {most + 1}" in err[0] and not (tmp_path / "out.jsonl").exists()
    assert score(src, *common, "--workers", 1) == 0


def test_a_link_as_output_is_replaced_by_the_file_and_its_target_left_alone(
    scoring_registry: Path, tmp_path: Path
) -> None:
    """README "Scoring whole files": OUTPUT is renamed into place, so a symbolic link there becomes the
    file; what it pointed to (here a FIFO, which a write through the link would have blocked on) is not
    touched."""
    src = write_jsonl(tmp_path / "in.jsonl", uci_rows()[:20])
    fifo = tmp_path / "pipe"
    os.mkfifo(fifo)
    out = tmp_path / "out.jsonl"
    out.symlink_to(fifo)
    assert score(src, "--model", MODEL, "--out", out, "--registry", scoring_registry, "--workers", 0) == 0
    assert not out.is_symlink() and len(read_jsonl(out)) == 20
    assert stat.S_ISFIFO(fifo.lstat().st_mode)


# -- interrupted runs ---------------------------------------------------------------------------------
def test_a_killed_run_leaves_no_output_and_resume_gives_the_same_file(scoring_registry: Path, tmp_path: Path) -> None:
    rows = uci_rows() * 4
    src = write_jsonl(tmp_path / "in.jsonl", [{**r, "id": i} for i, r in enumerate(rows)])
    reference = tmp_path / "reference.csv"
    common = ["--model", MODEL, "--registry", scoring_registry, "--workers", 0, "--chunk-rows", 100, "--spans", 2]
    assert score(src, "--out", reference, *common) == 0

    out = tmp_path / "out.csv"
    state = tmp_path / ".out.csv.score-partial" / "state.json"
    cmd = [sys.executable, "-m", "textsieve.cli", "score", str(src), "--out", str(out), *map(str, common)]
    env = child_env() | {"PYTHONPATH": str(ROOT)}
    proc = subprocess.Popen(cmd, env=env, stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)

    def some_chunks_done() -> bool:
        try:
            return json.loads(state.read_text(encoding="utf-8"))["chunks"] >= 5
        except (FileNotFoundError, ValueError):
            return False

    wait_until(some_chunks_done, 120, "five chunks")
    os.kill(proc.pid, signal.SIGKILL)
    proc.wait()
    assert not out.exists()
    done = json.loads(state.read_text(encoding="utf-8"))["rows"]
    assert 0 < done < len(rows)
    # A crash between writing a chunk and recording it leaves bytes the state does not count.
    with open(state.parent / "output.part", "ab") as f:
        f.write(b"half a row,")
    assert score(src, "--out", out, *common, "--resume") == 0
    assert out.read_bytes() == reference.read_bytes()
    assert not state.parent.exists()


def test_resume_refuses_a_changed_input(
    scoring_registry: Path, tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    from textsieve.scoring import formats

    src = write_jsonl(tmp_path / "in.jsonl", uci_rows()[:500])
    out = tmp_path / "out.jsonl"
    common = ["--model", MODEL, "--registry", scoring_registry, "--workers", 0, "--chunk-rows", 100]
    calls = {"n": 0}
    real = formats.JsonlWriter.write

    def interrupted(self: formats.JsonlWriter, rows: Any) -> None:
        calls["n"] += 1
        if calls["n"] == 3:
            raise KeyboardInterrupt
        real(self, rows)

    monkeypatch.setattr(formats.JsonlWriter, "write", interrupted)
    assert score(src, "--out", out, *common) == 130
    monkeypatch.undo()
    assert not out.exists() and (tmp_path / ".out.jsonl.score-partial" / "state.json").is_file()
    write_jsonl(src, uci_rows()[:501])
    assert score(src, "--out", out, *common, "--resume") == 2
    assert not out.exists()


def _interrupt_at_third_chunk(monkeypatch: pytest.MonkeyPatch, out_format: str) -> None:
    """Ctrl-C as the third chunk is written: two chunks are counted in the state."""
    from textsieve.scoring import formats

    calls = {"n": 0}
    if out_format == "parquet":
        real_part = formats.write_part

        def part(path: Path, table: Any, crc32: int = 0) -> int:
            calls["n"] += 1
            if calls["n"] == 3:
                raise KeyboardInterrupt
            return real_part(path, table, crc32)

        monkeypatch.setattr(formats, "write_part", part)
    else:
        real_write = formats.JsonlWriter.write

        def write(self: formats.JsonlWriter, rows: Any) -> None:
            calls["n"] += 1
            if calls["n"] == 3:
                raise KeyboardInterrupt
            real_write(self, rows)

        monkeypatch.setattr(formats.JsonlWriter, "write", write)


def _garble(path: Path) -> None:
    data = bytearray(path.read_bytes())
    data[len(data) // 2] ^= 0x20  # one bit of one byte: same length, same file
    path.write_bytes(bytes(data))


def _edit_state(partial: Path, change: Any) -> None:
    state = json.loads((partial / "state.json").read_text(encoding="utf-8"))
    (partial / "state.json").write_text(json.dumps(change(state)), encoding="utf-8")


# Each was a resume that exited 0 with a wrong OUTPUT (the missing bytes as NULs, garbage spliced in,
# one chunk's rows twice) or a traceback (a Parquet part pyarrow cannot read, a state.json of
# another shape).
DAMAGE = [
    pytest.param("jsonl", lambda p: (p / "output.part").unlink(), "no longer what it wrote", id="output-deleted"),
    pytest.param("jsonl", lambda p: os.truncate(p / "output.part", 100), "no longer what it wrote", id="output-cut"),
    pytest.param("jsonl", lambda p: _garble(p / "output.part"), "no longer what it wrote", id="output-changed"),
    pytest.param("parquet", lambda p: (p / "parts" / "000001.parquet").unlink(), "no longer", id="part-deleted"),
    pytest.param(
        "parquet",
        lambda p: (p / "parts" / "000000.parquet").write_bytes(b"PAR1 garbage"),
        "no longer",
        id="part-garbage",
    ),
    pytest.param(
        "parquet",
        lambda p: (p / "parts" / "000001.parquet").write_bytes((p / "parts" / "000000.parquet").read_bytes()),
        "no longer",
        id="part-replaced",
    ),
    # These said "nothing to resume for .out.jsonl.score-partial", the words for no run at all.
    pytest.param("jsonl", lambda p: (p / "state.json").write_text("[1]"), "is not a state this", id="state-a-list"),
    pytest.param("jsonl", lambda p: (p / "state.json").write_text('{"rows": 2'), "state.json is not JSON", id="cut"),
    pytest.param(
        "jsonl", lambda p: _edit_state(p, lambda s: {**s, "rows": "200"}), "is damaged", id="state-rows-a-string"
    ),
    pytest.param(
        "jsonl",
        lambda p: _edit_state(p, lambda s: {k: v for k, v in s.items() if k != "layout"}),
        "is damaged",
        id="state-without-layout",
    ),
]


@pytest.mark.parametrize(("out_format", "damage", "notice"), DAMAGE)
def test_resume_after_the_partial_folder_was_damaged_starts_over(
    out_format: str,
    damage: Any,
    notice: str,
    scoring_registry: Path,
    tmp_path: Path,
    monkeypatch: pytest.MonkeyPatch,
    capsys: pytest.CaptureFixture[str],
) -> None:
    src = write_jsonl(tmp_path / "in.jsonl", uci_rows()[:500])
    common = ["--model", MODEL, "--registry", scoring_registry, "--workers", 0, "--chunk-rows", 100]
    reference = tmp_path / f"reference.{out_format}"
    assert score(src, "--out", reference, *common) == 0
    out = tmp_path / f"out.{out_format}"
    _interrupt_at_third_chunk(monkeypatch, out_format)
    assert score(src, "--out", out, *common) == 130
    monkeypatch.undo()
    partial = tmp_path / f".out.{out_format}.score-partial"
    assert json.loads((partial / "state.json").read_text(encoding="utf-8"))["rows"] == 200
    damage(partial)
    capsys.readouterr()
    assert score(src, "--out", out, *common, "--resume") == 0
    err = capsys.readouterr().err
    assert notice in err and f"run for {out}" in err and "; starting from the first row" in err, err
    if "state" in notice or "damaged" in notice:
        assert f"the saved state of the unfinished run for {out} is damaged" in err, err
    if out_format == "parquet":
        import pyarrow.parquet as pq

        # pyarrow reads both files; equals() compares every column, not the metadata (its scored_at differs)
        assert pq.read_table(out).equals(pq.read_table(reference))
    else:
        assert out.read_bytes() == reference.read_bytes()
    assert not partial.exists()


def test_the_interrupt_line_says_the_rows_resume_keeps(
    scoring_registry: Path, tmp_path: Path, monkeypatch: pytest.MonkeyPatch, capsys: pytest.CaptureFixture[str]
) -> None:
    """An interrupt while a chunk was being counted (its rows added in memory, state.json not yet
    replaced) said "stopped after 163,840 rows" where --resume kept 155,648."""
    from textsieve.files import atomic_write_text
    from textsieve.scoring import local

    src = write_jsonl(tmp_path / "in.jsonl", uci_rows()[:500])
    out = tmp_path / "out.jsonl"
    common = ["--model", MODEL, "--registry", scoring_registry, "--workers", 0, "--chunk-rows", 100]
    saves = {"n": 0}

    def save(run: Any) -> None:  # the start, then each chunk: the third is the second chunk
        saves["n"] += 1
        if saves["n"] == 3:
            raise KeyboardInterrupt
        atomic_write_text(run.state_path, json.dumps(run.state))
        run.saved_rows = run.state["rows"]

    monkeypatch.setattr(local._Run, "save", save)
    assert score(src, "--out", out, *common) == 130
    monkeypatch.undo()
    kept = json.loads((tmp_path / ".out.jsonl.score-partial" / "state.json").read_text(encoding="utf-8"))["rows"]
    assert kept == 100
    assert "stopped after 100 rows" in capsys.readouterr().err
    assert score(src, "--out", out, *common, "--resume") == 0
    assert "scored 500 rows" in (line := capsys.readouterr().out) and "100 of them from the interrupted run" in line


@pytest.mark.parametrize(
    ("again", "expected_msg"),
    [
        pytest.param(["--spans", "2"], "used other options (--spans 0, now 2); run with the same options", id="spans"),
        pytest.param(
            ["--keep", "id", "--strict"],
            "used other options (every column (no --keep), now --keep id; no --strict, now --strict)",
            id="keep-and-strict",
        ),
        pytest.param(["--chunk-rows", "50"], "used other options (--chunk-rows 100, now 50)", id="chunk-rows"),
        pytest.param(["--output-format", "csv"], "wrote jsonl (now csv); pass --output-format jsonl", id="format"),
    ],
)
def test_resume_refusals_name_what_differs_as_the_command_line_spells_it(
    again: list[str],
    expected_msg: str,
    scoring_registry: Path,
    tmp_path: Path,
    monkeypatch: pytest.MonkeyPatch,
    capsys: pytest.CaptureFixture[str],
) -> None:
    """They printed both runs' options as Python dicts: "used another options ({'text_field': ...}, now {...})"."""
    src = write_jsonl(tmp_path / "in.jsonl", uci_rows()[:500])
    out = tmp_path / "out.jsonl"
    common = ["--model", MODEL, "--registry", scoring_registry, "--workers", 0, "--chunk-rows", 100]
    _interrupt_at_third_chunk(monkeypatch, "jsonl")
    assert score(src, "--out", out, *common) == 130
    monkeypatch.undo()
    capsys.readouterr()
    assert score(src, "--out", out, *common, *again, "--resume") == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and f"--resume: the unfinished run for {out} {expected_msg}" in err[0], err
    assert "{" not in err[0] and "run without --resume to start over" in err[0]


def test_resume_after_a_promotion_says_how_to_continue_with_the_version_it_used(
    tiny_bundles: dict[str, Path], tmp_path: Path, monkeypatch: pytest.MonkeyPatch, capsys: pytest.CaptureFixture[str]
) -> None:
    """The interrupt line says "run the same command with --resume"; after a promotion that pinned the
    new live version and was refused: "used another version (1, now 2)"."""
    from tests.helpers.service import make_registry
    from textsieve.registry import open_registry

    registry = make_registry(tmp_path / "registry", tiny_bundles, live=1)
    src = write_jsonl(tmp_path / "in.jsonl", uci_rows()[:500])
    out = tmp_path / "out.jsonl"
    common = ["--model", MODEL, "--registry", registry, "--workers", 0, "--chunk-rows", 100]
    reference = tmp_path / "reference.jsonl"
    assert score(src, "--out", reference, *common) == 0
    _interrupt_at_third_chunk(monkeypatch, "jsonl")
    assert score(src, "--out", out, *common) == 130
    monkeypatch.undo()
    with open_registry(registry) as reg:
        reg.promote(MODEL, 2, "live", reason="v2 replaces v1", force=True)
    capsys.readouterr()
    assert score(src, "--out", out, *common, "--resume") == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert err == [
        f"textsieve: error: --resume: the unfinished run for {out} used version 1 (now 2); continue it with "
        "--version 1 --retired --resume, or run without --resume to start over"
    ]
    assert score(src, "--out", out, *common, "--version", "1", "--retired", "--resume") == 0
    assert "200 of them from the interrupted run" in capsys.readouterr().out
    assert out.read_bytes() == reference.read_bytes()


@pytest.mark.parametrize(
    ("signum", "status", "last_line"),
    [(signal.SIGINT, 130, "textsieve: interrupted"), (signal.SIGTERM, 143, "textsieve: stopped by SIGTERM")],
)
def test_a_signal_to_the_process_group_stops_cleanly_and_resume_gives_the_same_file(
    signum: int, status: int, last_line: str, scoring_registry: Path, tmp_path: Path
) -> None:
    """Ctrl-C (SIGINT to the foreground process group) and a job runner's SIGTERM to the group reach
    the worker processes too. SIGTERM killed the run where it stood (status -15, multiprocessing's
    leaked-semaphore warning); SIGINT could print a worker's KeyboardInterrupt traceback."""
    rows = uci_rows() * 20  # 600 chunks: the signal comes long before the end
    src = write_jsonl(tmp_path / "in.jsonl", [{**r, "id": i} for i, r in enumerate(rows)])
    reference = tmp_path / "reference.jsonl"
    common = ["--model", MODEL, "--registry", scoring_registry, "--workers", 2, "--chunk-rows", 100]
    assert score(src, "--out", reference, *common) == 0

    out = tmp_path / "out.jsonl"
    state = tmp_path / ".out.jsonl.score-partial" / "state.json"
    cmd = [sys.executable, "-m", "textsieve.cli", "score", str(src), "--out", str(out), *map(str, common)]
    env = child_env() | {"PYTHONPATH": str(ROOT)}
    proc = subprocess.Popen(
        cmd, env=env, stdout=subprocess.DEVNULL, stderr=subprocess.PIPE, text=True, start_new_session=True
    )

    def some_chunks_done() -> bool:
        try:
            return json.loads(state.read_text(encoding="utf-8"))["chunks"] >= 3
        except (FileNotFoundError, ValueError):
            return False

    try:
        wait_until(some_chunks_done, 120, "three chunks")
        os.killpg(proc.pid, signum)
        _, err = proc.communicate(timeout=60)
    finally:
        if proc.poll() is None:
            os.killpg(proc.pid, signal.SIGKILL)
            proc.wait()
    lines = [line for line in err.strip().splitlines() if not line.startswith("scoring ")]  # progress lines
    assert proc.returncode == status, err
    # One line, naming the file not written (it said "OUTPUT was not written", then "textsieve: interrupted"
    # on a second line).
    assert len(lines) == 1 and "Traceback" not in err and "leaked" not in err, err
    assert lines[0].startswith(f"{last_line}; stopped after ") and f"; {out} was not written; " in lines[0], err
    assert lines[0].endswith("run the same command with --resume to continue"), err
    assert not out.exists()
    assert 0 < json.loads(state.read_text(encoding="utf-8"))["rows"] < len(rows)
    assert score(src, "--out", out, *common, "--resume") == 0
    assert out.read_bytes() == reference.read_bytes()


def test_a_worker_killed_while_it_sends_a_result_ends_the_run_and_resume_gives_the_same_file(
    scoring_registry: Path, tmp_path: Path
) -> None:
    """One worker killed (the OOM killer) while it writes a result into the pool's pipe, the other
    alive: the run hung for ever with no message (bench/README.md, "Why it is not kept"). It ends
    with one line saying to resume, keeping the chunks written, and --resume finishes the file."""
    from tests.helpers import dying_worker

    rows = uci_rows() * 4  # 120 chunks
    src = write_jsonl(tmp_path / "in.jsonl", [{**r, "id": i} for i, r in enumerate(rows)])
    reference = tmp_path / "reference.jsonl"
    common = ["--model", MODEL, "--registry", scoring_registry, "--workers", 2, "--chunk-rows", 100, "--spans", 2]
    assert score(src, "--out", reference, *common) == 0

    out = tmp_path / "out.jsonl"
    state = tmp_path / ".out.jsonl.score-partial" / "state.json"
    mark = tmp_path / "a-worker-died"
    cmd = [sys.executable, "-m", "textsieve.cli", "score", str(src), "--out", str(out), *map(str, common)]
    site = Path(dying_worker.__file__).with_name("dying_worker_site")
    env = child_env() | {
        "PYTHONPATH": os.pathsep.join([str(site), str(ROOT)]),
        dying_worker.AT: "10",  # a chunk is one piece here: the run has written some chunks by then
        dying_worker.MARK: str(mark),
    }
    proc = subprocess.Popen(cmd, env=env, stdout=subprocess.DEVNULL, stderr=subprocess.PIPE, text=True)
    try:
        _, err = proc.communicate(timeout=120)
    except subprocess.TimeoutExpired:
        proc.kill()
        _, err = proc.communicate()
        raise AssertionError(f"the run did not end: {err[-2000:]!r}") from None
    lines = [line for line in err.strip().splitlines() if not line.startswith("scoring ")]  # progress lines
    assert mark.exists(), err
    assert proc.returncode == 1, err
    assert lines == ["textsieve: error: " + str(_stopped())], err
    assert not out.exists()
    assert 0 < json.loads(state.read_text(encoding="utf-8"))["rows"] < len(rows)
    assert score(src, "--out", out, *common, "--resume") == 0
    assert out.read_bytes() == reference.read_bytes()


def test_a_jsonl_field_first_seen_after_the_first_chunk_is_refused_or_kept_never_dropped(
    scoring_registry: Path, tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    """JSON Lines rows need not share their fields (RFC 8259 leaves an object's members to each
    object). The output's columns come from the first chunk; a field first seen later was left out
    of every row, exit 0, and --keep refused to name it."""
    rows: list[dict[str, object]] = [{"text": "the chain is broken"}] * 5 + [{"text": "refund please", "ticket": 7}]
    src = write_jsonl(tmp_path / "in.jsonl", rows)
    out = tmp_path / "out.jsonl"
    common = ["--model", MODEL, "--registry", scoring_registry, "--workers", 0, "--chunk-rows", 2]
    assert score(src, "--out", out, *common) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and "row 6 has the field 'ticket', which none of the first 2 rows has" in err[0], err
    assert "--keep text,ticket" in err[0]
    assert sorted(p.name for p in tmp_path.iterdir()) == ["in.jsonl"]

    assert score(src, "--out", out, *common, "--keep", "text,ticket") == 0
    assert "no row among the first 2 has the field(s) 'ticket'" in capsys.readouterr().err
    # the json module reads the input and the output: every row's own value, null where it has none
    assert [r["ticket"] for r in read_jsonl(out)] == [
        r.get("ticket") for r in map(json.loads, src.read_text().split("\n")[:-1])
    ]


# -- start-up and end: what every run pays, whatever its size ------------------------------------------
_THREADS_AFTER = (
    "import os, sys\n"
    "from textsieve.cli import main\n"
    "code = main(sys.argv[1:])\n"
    "print(code, 'numpy' in sys.modules, len(os.listdir('/proc/self/task')))\n"
)


def test_the_scoring_process_starts_no_blas_threads(scoring_registry: Path, tmp_path: Path) -> None:
    """OpenBLAS (NumPy's BLAS) starts a thread per core when it loads, which spins on CPU the run
    needs; nothing in scoring multiplies matrices with it, so ``textsieve score`` asks for none."""
    env = {k: v for k, v in child_env().items() if k != "OPENBLAS_NUM_THREADS"} | {"PYTHONPATH": str(ROOT)}
    control = subprocess.run(
        [sys.executable, "-c", "import os, numpy; print(len(os.listdir('/proc/self/task')))"],
        capture_output=True, text=True, timeout=60, env=env, check=True,
    )  # fmt: skip
    if int(control.stdout) == 1:
        pytest.skip("OpenBLAS starts no thread of its own on one core: nothing to tell apart")
    write_jsonl(tmp_path / "in.jsonl", [{"text": "the chain is broken"}, {"text": "refund please"}])
    argv = ["score", "in.jsonl", "--out", "out.jsonl", "--model", MODEL, "--registry", str(scoring_registry)]
    done = subprocess.run(
        [sys.executable, "-c", _THREADS_AFTER, *argv],
        capture_output=True,
        text=True,
        timeout=120,
        cwd=tmp_path,
        env=env,
    )
    assert done.returncode == 0, done.stderr
    # The run loaded NumPy (its results are arrays) and is left with its main thread alone.
    assert done.stdout.splitlines()[-1].split() == ["0", "True", "1"], (control.stdout, done.stdout)
    assert (tmp_path / "out.jsonl").read_text(encoding="utf-8").count("\n") == 2


_FROZEN_AFTER = (
    "import gc, sys\n"
    "import textsieve.scoring.local as local\n"
    "from textsieve.cli import main\n"
    "seen = []\n"
    "score_file = local.score_file\n"
    "def watched(*args, **kwargs):\n"
    "    seen.append(gc.get_freeze_count())\n"
    "    return score_file(*args, **kwargs)\n"
    "local.score_file = watched\n"
    "code = main(sys.argv[1:])\n"
    "print(code, seen[0] > 0, gc.get_freeze_count() > seen[0])\n"
)
_FROZEN_IN_A_WORKER = (
    "import gc\n"
    "from textsieve.forking import fork_server\n"
    "from textsieve.scoring.cli import PRELOAD\n"
    "if __name__ == '__main__':\n"
    "    with fork_server(PRELOAD).Pool(1) as pool:\n"
    "        print(pool.apply(gc.get_freeze_count) > 0)\n"
)


def test_what_lives_until_the_end_is_left_out_of_the_cycle_collectors_scans(
    scoring_registry: Path, tmp_path: Path
) -> None:
    """A full collection scans every object alive, and Python's exit runs several: the scoring
    process freezes what its imports made before it reads the first row, and what the run made once
    it is done (gc.freeze); the fork server freezes what it imported for its workers. Neither
    process walks them all again during the run or as it ends (bench/README.md, "Scoring a file")."""
    env = child_env() | {"PYTHONPATH": str(ROOT)}
    write_jsonl(tmp_path / "in.jsonl", [{"text": "the chain is broken"}])
    argv = ["score", "in.jsonl", "--out", "out.jsonl", "--model", MODEL, "--registry", str(scoring_registry)]
    done = subprocess.run(
        [sys.executable, "-c", _FROZEN_AFTER, *argv], capture_output=True, text=True, timeout=120, cwd=tmp_path, env=env
    )
    assert done.returncode == 0, done.stderr
    assert done.stdout.splitlines()[-1].split() == ["0", "True", "True"], done.stdout
    worker = subprocess.run(
        [sys.executable, "-c", _FROZEN_IN_A_WORKER], capture_output=True, text=True, timeout=120, cwd=tmp_path, env=env
    )
    assert worker.returncode == 0, worker.stderr
    assert worker.stdout.split() == ["True"], worker.stdout
