"""``textsieve verdicts``: the table people read, the export train and evalset add read, and deletion
for data-protection requests, on SQLite and PostgreSQL."""

from __future__ import annotations

import os
import re
import stat
from pathlib import Path

import pytest
import scipy.stats as sps

from tests.helpers.registries import RegistrySpec
from tests.registry.test_cli import assert_aligned, run

TEXTS = [
    ("The chain of the tandem snapped at Old Mill.", "repair", "repair"),
    ("I was billed €12 for a free workshop.", "billing", "billing"),
    ("My membership card stopped working.", "billing", "account"),
    ("Thanks, José fixed the folding bike!", "praise", "praise"),
]


@pytest.fixture
def judged(spec: RegistrySpec, tiny_bundles: dict[str, Path]) -> RegistrySpec:
    with spec.open() as reg:
        reg.publish(tiny_bundles["a"], "helpdesk", actor="ci")
        for text, predicted, verdict in TEXTS:
            reg.verdicts.record(
                "helpdesk",
                1,
                text=text,
                predicted_label=predicted,
                predicted_probability=0.75,
                verdict_label=verdict,
                reviewer="Renée",
            )
    return spec


def test_a_verdict_s_text_is_listed_whole(
    capsys: pytest.CaptureFixture[str], judged: RegistrySpec, tiny_bundles: dict[str, Path]
) -> None:
    """The listing cut texts at 48 characters with "…" (the export had them whole, the README says
    tables keep texts whole): a reviewer could not read what was judged. Piped, each row is one
    line holding the whole text, line breaks shown as ↵."""
    long = "The rear derailleur on the loaner bike skips every third gear change on the hill\nand squeaks."
    with judged.open() as reg:
        reg.verdicts.record(
            "helpdesk",
            1,
            text=long,
            predicted_label="repair",
            predicted_probability=0.9,
            verdict_label="repair",
            reviewer="Bo",
        )
    code, out, _ = run(capsys, "verdicts", "helpdesk", *judged.cli_args())
    assert code == 0
    assert long.replace("\n", " ↵ ") in out and "…" not in out.split("\n\n", 1)[0]


def test_verdicts_table_shows_each_verdict_and_agreement_with_its_interval(
    capsys: pytest.CaptureFixture[str], judged: RegistrySpec
) -> None:
    code, out, err = run(capsys, "verdicts", "helpdesk", *judged.cli_args())
    assert (code, err) == (0, "")
    listing, summary = out.split("\n\n", 1)
    lines = listing.splitlines()
    assert lines[0].split() == ["ID", "TIME", "(UTC)", "VERSION", "REVIEWER", "PREDICTED", "P", "VERDICT", "TEXT"]
    # Columns line up: the text column starts at the same place on every line.
    at = lines[0].index("TEXT")
    assert all(line[at - 2 : at] == "  " and line[at] != " " for line in lines[:-1])
    assert "→ account" in lines[3] and "confirmed" in lines[1] and "Renée" in lines[1]
    table_lines = summary.splitlines()[:2]
    assert_aligned("\n".join(table_lines))  # every cell as wide as its header or aligned under it
    # 3 of 4 confirmed. Reference interval: scipy.stats.binomtest(3, 4).proportion_ci(method="wilson").
    ref = sps.binomtest(3, 4).proportion_ci(confidence_level=0.95, method="wilson")
    row = table_lines[1].split()
    assert row[:4] == ["1", "4", "3", "75.0%"]
    assert row[4] == f"{ref.low:.1%}–{ref.high:.1%}"
    assert "not a random sample" in summary
    # Before: "(4 of 4 shown; --last N for more)" with nothing more to show. Said only when some are not.
    assert "shown" not in out and len(lines) == 5
    code, out, _ = run(capsys, "verdicts", "helpdesk", "--last", "2", *judged.cli_args())
    listing = out.split("\n\n", 1)[0].splitlines()
    assert code == 0 and listing[-1] == "(2 of 4 shown; --last N for more)" and len(listing) == 4


def test_export_feeds_evalset_add_and_the_training_reader(
    capsys: pytest.CaptureFixture[str], judged: RegistrySpec, tmp_path: Path
) -> None:
    out_file = tmp_path / "reviewed.jsonl"
    code, out, _ = run(capsys, "verdicts", "helpdesk", "--export", str(out_file), *judged.cli_args())
    assert code == 0 and "wrote 4 verdicts" in out
    code, out, err = run(capsys, "evalset", "add", "helpdesk", str(out_file), *judged.cli_args())
    assert code == 0 and "4 texts (account 1, billing 1, praise 1, repair 1)" in out
    # registered, with the one line saying the gates will not judge on 4 texts (registry/gates.py)
    assert err.startswith("warning: the metric gates will refuse to judge a promotion to live on this set (4 texts")
    assert len(err.splitlines()) == 1
    # `textsieve train` reads its data through the same splitter; the export needs no conversion.
    from textsieve.exporter.config import TrainConfig
    from textsieve.exporter.prepare import split_examples

    train, valid, labels = split_examples(TrainConfig(data=out_file, valid=out_file, out=tmp_path / "run"))
    assert labels == ["account", "billing", "praise", "repair"]
    assert sorted((e.text, e.label) for e in train) == sorted((t, v) for t, _, v in TEXTS)


def test_a_version_without_verdicts_is_told_apart_from_a_model_without_any(
    capsys: pytest.CaptureFixture[str], judged: RegistrySpec, tiny_bundles: dict[str, Path], tmp_path: Path
) -> None:
    with judged.open() as reg:
        reg.publish(tiny_bundles["b"], "helpdesk", actor="ci")  # version 2: no verdicts; version 1 has 4
    r = judged.cli_args()
    code, out, err = run(capsys, "verdicts", "helpdesk", "--version", "2", *r)
    assert (code, err) == (0, "")
    assert out.startswith("no verdicts on version 2 of 'helpdesk' yet (version 1 has some); reviewers record")
    target = tmp_path / "v2.jsonl"
    code, out, err = run(capsys, "verdicts", "helpdesk", "--version", "2", "--export", str(target), *r)
    assert code == 2 and out == "" and len(err.strip().splitlines()) == 1
    assert "no verdicts on version 2 of 'helpdesk' yet (version 1 has some); nothing written" in err
    assert not target.exists()


def test_deletion_by_id_and_date_is_audited_and_needs_a_reason(
    capsys: pytest.CaptureFixture[str], judged: RegistrySpec
) -> None:
    r = judged.cli_args()
    code, out, err = run(capsys, "verdicts", "helpdesk", "--delete", "2", *r)
    assert code == 2 and out == "" and len(err.strip().splitlines()) == 1 and "a reason is required" in err
    code, out, err = run(capsys, "verdicts", "helpdesk", "--delete", "2", "--delete", "99", "--reason", "request 7", *r)
    assert (code, out) == (2, "") and len(err.strip().splitlines()) == 1
    assert "no verdict 99 on 'helpdesk'; nothing deleted. 'textsieve verdicts helpdesk' lists" in err
    code, out, _ = run(capsys, "verdicts", "helpdesk", "--delete", "2", "--reason", "request 7", *r)
    assert code == 0
    # Before: "deleted 1 verdicts", here and in history.
    assert re.fullmatch(r"deleted 1 verdict of 'helpdesk' \(audit event \d+\)\n", out)
    code, out, _ = run(capsys, "verdicts", "helpdesk", "--delete-before", "2999-01-01", "--reason", "retention", *r)
    assert code == 0 and out.startswith("deleted 3 verdicts")
    code, out, _ = run(capsys, "verdicts", "helpdesk", *r)
    assert code == 0 and out.startswith("no verdicts on 'helpdesk' yet")
    code, out, _ = run(capsys, "history", "helpdesk", *r)
    deletions = [line for line in out.splitlines() if "verdicts-delete" in line]
    assert len(deletions) == 2 and "deleted 1 verdict; ids 2" in deletions[0]
    assert "deleted 3 verdicts recorded before" in deletions[1]
    assert "recorded before 2999-01-01 00:00:00Z" in deletions[1]


@pytest.mark.parametrize(
    ("argv", "expected_msg"),
    [
        pytest.param(["--delete-before", "last tuesday", "--reason", "x"], "bad date 'last tuesday'", id="bad-date"),
        pytest.param(
            ["--delete-before", "9999-12-31T23:00:00-05:00", "--reason", "x"],
            "date '9999-12-31T23:00:00-05:00' is out of range: in UTC it must fall from 0001-01-01T00:00:00Z to "
            "9999-12-31T23:59:59Z",
            id="after-year-9999-in-utc",
        ),
        pytest.param(
            ["--delete-before", "0001-01-01T00:30:00+01:00", "--reason", "x"],
            "date '0001-01-01T00:30:00+01:00' is out of range",
            id="before-year-1-in-utc",
        ),
        pytest.param(["--export", "out.csv"], "name the file .jsonl", id="export-suffix"),
        # Before: "/dev/null: no such folder; create it" (it exists; POSIX has /dev/null everywhere).
        pytest.param(["--export", "/dev/null/x.jsonl"], "/dev/null: not a folder", id="export-under-a-file"),
        pytest.param(
            ["--export", "pipe.jsonl"],
            "--export pipe.jsonl: is a FIFO (named pipe), which textsieve does not write over",
            id="export-to-a-fifo",
        ),
        pytest.param(["--export", "x.jsonl", "--delete", "1", "--reason", "x"], "separate runs", id="both"),
        pytest.param(["--last", "-1"], "--last -1", id="negative-last"),
        pytest.param(["--version", "9"], "has no version 9", id="unknown-version"),
    ],
)
def test_bad_arguments_are_one_line_and_exit_2(
    capsys: pytest.CaptureFixture[str],
    judged: RegistrySpec,
    tmp_path: Path,
    monkeypatch: pytest.MonkeyPatch,
    argv: list[str],
    expected_msg: str,
) -> None:
    monkeypatch.chdir(tmp_path)
    os.mkfifo(tmp_path / "pipe.jsonl")
    code, out, err = run(capsys, "verdicts", "helpdesk", *argv, *judged.cli_args())
    assert code == 2 and out == ""
    assert stat.S_ISFIFO((tmp_path / "pipe.jsonl").lstat().st_mode)
    assert len(err.strip().splitlines()) == 1 and expected_msg in err
    assert not (tmp_path / "out.csv").exists() and not (tmp_path / "x.jsonl").exists()
