"""The registry verbs of the textsieve command: output people read and scripts parse, exit statuses."""

from __future__ import annotations

import json
import os
import re
import shutil
import subprocess
import sys
from pathlib import Path

import pytest

from tests.helpers.environment import child_env
from tests.helpers.jsonl import read_jsonl
from tests.helpers.registries import RegistrySpec, edit_manifest, publish_unchecked_card, store_evalset_unchecked
from textsieve.cli import main
from textsieve.registry.cli import table


def run(capsys: pytest.CaptureFixture[str], *argv: str) -> tuple[int, str, str]:
    code = main(list(argv))
    out, err = capsys.readouterr()
    return code, out, err


def assert_aligned(text: str) -> None:
    """No cell crosses a column boundary: the character before each header column is a space on every line."""
    lines = text.splitlines()
    starts = [m.start() for m in re.finditer(r"(?<=  )\S", lines[0])]
    assert starts
    for line in lines:
        for s in starts:
            if len(line) > s:
                assert line[s - 1] == " ", (lines[0], line)


def test_table_pads_columns_and_right_aligns_numbers() -> None:
    text = table(["NAME", "N"], [["alpha", 1], ["b", 1234], ["c", None]], right=(1,))
    assert text.splitlines() == ["NAME      N", "alpha     1", "b      1234", "c         -"]


def test_control_characters_from_clients_reach_the_terminal_escaped() -> None:
    """A text a client sent (kept by shadow scoring, or in a verdict) printed raw, ESC and all:
    '\x1b[2J' cleared the operator's screen (found by probing)."""
    text = table(["TEXT"], [["\x1b[2J\x1b[31mINJECTED\x07 done\x9b"]])
    assert text.splitlines()[1] == "\\x1b[2J\\x1b[31mINJECTED\\x07 done\\x9b"
    assert "\x1b" not in text and "\x07" not in text


def test_wide_characters_keep_the_columns_in_line() -> None:
    """A reviewer named in Chinese, an emoji in a reason: two terminal columns a character (UAX #11),
    a combining accent none; the next column starts at the same place on every row."""
    text = table(["BY", "N"], [["王小明", 1], ["ana", 22], ["e\u0301mile 👍", 3]], right=(1,))
    lines = text.splitlines()
    assert lines == ["BY         N", "王小明     1", "ana       22", "e\u0301mile 👍   3"]


def test_a_reason_with_line_breaks_stays_on_its_row() -> None:
    """Reasons keep their line breaks in the registry; a table shows each as ↵ so rows stay rows."""
    text = table(["EVENT", "REASON", "BY"], [[1, "first line\nsecond\r\nthird\tend", "ana"], [2, "ok", "bo"]])
    assert text.splitlines() == [
        "EVENT  REASON                           BY",
        "1      first line ↵ second ↵ third end  ana",
        "2      ok                               bo",
    ]


def test_registry_verbs_end_to_end(
    capsys: pytest.CaptureFixture[str], spec: RegistrySpec, tiny_bundles: dict[str, Path], tiny_data: Path
) -> None:
    r = spec.cli_args()
    code, out, err = run(
        capsys,
        "publish",
        str(tiny_bundles["a"]),
        "--model",
        "spam",
        *r,
        "--evalset",
        str(tiny_data / "test.jsonl"),
        "--actor",
        "alice",
        "--reason",
        "baseline",
    )
    assert (code, out) == (0, "1\n")  # scripts read the version number alone on stdout
    assert "published 'spam' version 1" in err
    code, out, _ = run(capsys, "publish", str(tiny_bundles["b"]), "--model", "spam", *r)
    assert (code, out) == (0, "2\n")

    code, out, _ = run(capsys, "models", *r)
    assert code == 0
    header, row = out.splitlines()
    assert header.split() == ["MODEL", "LIVE", "CANDIDATE", "VERSIONS", "EVAL", "TEXTS", "UPDATED"]
    assert row.split()[:4] == ["spam", "-", "-", "2"]
    assert_aligned(out)

    code, out, _ = run(capsys, "promote", "spam", "1", "--to", "live", "--reason", "first", *r)
    assert code == 0 and "'spam' version 1 is now live" in out
    assert re.search(r"^labels\s+pass\s+no live version$", out, re.M)

    code, out, _ = run(capsys, "versions", "spam", *r)
    lines = out.splitlines()
    assert lines[0].split()[:3] == ["VERSION", "STATE", "ACCURACY"]
    assert [ln.split()[:2] for ln in lines[1:]] == [["1", "live"], ["2", "registered"]]
    assert_aligned(out)

    code, out, _ = run(capsys, "show", "spam", *r)
    assert code == 0 and re.search(r"^state\s+live$", out, re.M) and "model.onnx" in out
    code, out, _ = run(capsys, "show", "spam", "2", *r)
    assert code == 0 and re.search(r"^state\s+registered$", out, re.M)

    code, out, _ = run(capsys, "promote", "spam", "2", "--to", "candidate", "--reason", "try", *r)
    assert code == 0 and "'spam' version 2 is now candidate" in out

    code, out, _ = run(capsys, "rollback", "spam", "--reason", "x", *r)
    assert code == 2

    code, out, err = run(
        capsys, "promote", "spam", "2", "--to", "live", "--reason", "hotfix", "--force", *r, "--actor", "bob"
    )
    assert code == 0 and "is now live (version 1 retired)" in out
    code, out, _ = run(capsys, "rollback", "spam", "--reason", "too slow", *r, "--actor", "carol")
    assert (code, out) == (0, "'spam' version 1 is live again (version 2 retired)\n")

    code, out, _ = run(capsys, "history", "spam", *r)
    lines = out.splitlines()
    assert lines[0].split()[:4] == ["EVENT", "TIME", "(UTC)", "KIND"]
    kinds = [ln.split()[3] for ln in lines[1:]]
    assert kinds[:3] == ["publish", "evalset", "publish"] and kinds[-1] == "rollback"
    assert "carol" in lines[-1] and "too slow" in lines[-1]
    assert_aligned(out)

    code, out, _ = run(capsys, "evalset", "add", "spam", str(tiny_data / "valid.jsonl"), *r)
    assert code == 0 and out.startswith("evaluation set for 'spam':")


def test_a_refused_gate_exits_1_naming_the_gate_and_figures(
    capsys: pytest.CaptureFixture[str], tmp_path: Path, tiny_bundles: dict[str, Path], tiny_data: Path
) -> None:
    r = ["--registry", str(tmp_path / "reg")]
    run(capsys, "publish", str(tiny_bundles["a"]), "--model", "m", *r, "--evalset", str(tiny_data / "test.jsonl"))
    run(capsys, "publish", str(tiny_bundles["relabelled"]), "--model", "m", *r)
    run(capsys, "promote", "m", "1", "--to", "live", "--reason", "x", *r)
    code, out, err = run(capsys, "promote", "m", "2", "--to", "live", "--reason", "relabel", *r)
    assert code == 1 and out == ""
    last = err.strip().splitlines()[-1]
    assert last.startswith("textsieve: error: version 2 of 'm' not promoted to live: gate labels refused")
    assert "drops 'praise'" in last and "override it with --force and --reason" in last
    assert re.search(r"^labels\s+FAIL\s+labels differ", err, re.M)  # the gate table with figures


def test_promoting_a_version_whose_card_lacks_its_cautions_exits_1_saying_how_to_fix_it(
    capsys: pytest.CaptureFixture[str], tmp_path: Path, tiny_bundles: dict[str, Path]
) -> None:
    """A version published before publish checked the card's cautions was promoted and served."""
    from textsieve.registry import open_registry

    bundle = tmp_path / "bundle"
    shutil.copytree(tiny_bundles["a"], bundle)
    card = (bundle / "card.md").read_text(encoding="utf-8")
    with open_registry(tmp_path / "reg") as reg:
        publish_unchecked_card(reg, bundle, "m", card.replace("Monitor", "Watch"))
    r = ["--registry", str(tmp_path / "reg")]
    code, out, err = run(capsys, "promote", "m", "1", "--to", "live", "--reason", "x", *r)
    assert code == 1 and out == ""
    assert re.search(r"^cautions\s+FAIL\s+version 1's card.md", err, re.M), err  # the gate table
    last = err.strip().splitlines()[-1]
    assert last.startswith("textsieve: error: version 1 of 'm' not promoted to live: gate cautions refused:")
    assert "do not say that they need monitoring" in last
    assert "'textsieve publish BUNDLE --model m' and promote the new version" in last
    assert "override it with --force and --reason" in last
    code, out, err = run(capsys, "promote", "m", "1", "--to", "live", "--dry-run", *r)
    assert code == 1 and "gate cautions would refuse" in err


# Model "m" has version 1, registered; nothing is live.
@pytest.mark.parametrize(
    ("argv", "expected_msg"),
    [
        pytest.param(["versions", "Bad/Name"], "bad model name 'Bad/Name'", id="bad model name"),
        pytest.param(["versions", "nope"], "no model 'nope'", id="unknown model"),
        pytest.param(["show", "m", "x"], "bad version 'x'", id="version a letter"),
        pytest.param(["show", "m", "0"], "bad version 0", id="version 0"),
        pytest.param(
            ["promote", "m", "9", "--to", "live", "--reason", "x"], "no version 9", id="promote an unknown version"
        ),
        pytest.param(
            ["promote", "m", "1", "--to", "live", "--reason", "  "], "a reason is required", id="blank reason"
        ),
        pytest.param(["history", ".."], "bad model name '..'", id="model name '..'"),
        pytest.param(["publish", "/nonexistent/bundle", "--model", "m"], "not a folder", id="publish no folder"),
        pytest.param(["evalset", "add", "m", "/nonexistent.jsonl"], "no such file", id="evaluation set missing"),
        pytest.param(["rollback", "m", "--reason", "x"], "no live version", id="rollback with nothing live"),
        pytest.param(["gc", "--older-than", "nan"], "--older-than nan: give a number of seconds", id="gc nan"),
        pytest.param(["gc", "--older-than", "inf"], "--older-than inf: give a number of seconds", id="gc inf"),
        pytest.param(["gc", "--older-than", "-1"], "--older-than -1: give a number of seconds", id="gc negative"),
        pytest.param(
            ["gates", "m", "--set", "mcnemar=on", "--set", "mcnemar=off", "--reason", "x"],
            "--set mcnemar given twice ('mcnemar=on', then 'mcnemar=off'); set each key once",
            id="gates --set one key twice",
        ),
        pytest.param(
            ["review-threshold", "m", "--set", "", "--reason", "x"],
            "--set '': give a probability above 0 and at most 1, or clear it with --clear",
            id="review-threshold --set empty (cleared the threshold)",
        ),
        # --reason with no change to record was ignored, exit 0.
        pytest.param(["gates", "m", "--reason", "x"], "--reason works only with --set or --reset", id="gates reason"),
        pytest.param(
            ["review-threshold", "m", "--reason", "x"],
            "--reason works only with --set or --clear",
            id="threshold reason",
        ),
        pytest.param(
            ["verdicts", "m", "--reason", "x"],
            "--reason works only with --delete or --delete-before",
            id="verdicts reason",
        ),
        pytest.param(
            ["promote", "m", "1", "--to", "candidate", "--reason", "ok\x1b[2J"],
            "reason holds a control character (U+001B, character 3)",
            id="reason with an ECMA-48 escape",
        ),
    ],
)
def test_bad_input_exits_2_with_one_line(
    argv: list[str],
    expected_msg: str,
    capsys: pytest.CaptureFixture[str],
    tmp_path: Path,
    tiny_bundles: dict[str, Path],
) -> None:
    r = ["--registry", str(tmp_path / "reg")]
    run(capsys, "publish", str(tiny_bundles["a"]), "--model", "m", *r)
    code, out, err = run(capsys, *argv, *r)
    assert code == 2 and out == ""
    assert len(err.strip().splitlines()) == 1 and err.startswith("textsieve: error: "), err
    assert expected_msg in err, err


@pytest.mark.parametrize(
    ("flags", "expected_msg"),
    [
        (["--registry", ""], "the registry location is empty (''); give a registry folder or a postgresql:// URL"),
        (["--registry", " "], "the registry location is empty (' ')"),
        (["--registry", "reg", "--blobs", ""], "the blob folder is empty (''); give a folder to --blobs"),
    ],
    ids=["--registry ''", "--registry ' '", "--blobs ''"],
)
def test_an_empty_location_flag_is_refused_not_taken_for_this_folder(
    flags: list[str],
    expected_msg: str,
    capsys: pytest.CaptureFixture[str],
    monkeypatch: pytest.MonkeyPatch,
    tmp_path: Path,
    tiny_bundles: dict[str, Path],
) -> None:
    """``--registry "$UNSET"`` made a registry in the current folder (Path('') is '.'), ``' '`` a folder named
    by a space, and ``--blobs ''`` put the blobs in the current folder; the same values in
    TEXTSIEVE_REGISTRY and TEXTSIEVE_BLOBS were refused."""
    monkeypatch.chdir(tmp_path)
    code, out, err = run(capsys, "publish", str(tiny_bundles["a"]), "--model", "m", *flags)
    assert (code, out) == (2, "") and len(err.splitlines()) == 1 and expected_msg in err, err
    assert list(tmp_path.iterdir()) == [], "nothing written here"


def test_publish_refuses_a_card_without_cautions_in_one_line_saying_how_to_fix_it(
    capsys: pytest.CaptureFixture[str], tmp_path: Path, tiny_bundles: dict[str, Path]
) -> None:
    """A card whose cautions were cut and the manifest re-hashed published as version 1 (found by probing)."""
    bundle = tmp_path / "bundle"
    shutil.copytree(tiny_bundles["a"], bundle)
    card = bundle / "card.md"
    card.write_text(card.read_text(encoding="utf-8").split("## Cautions")[0], encoding="utf-8")
    edit_manifest(bundle, {})
    r = ["--registry", str(tmp_path / "reg")]
    code, out, err = run(capsys, "publish", str(bundle), "--model", "m", *r)
    assert (code, out) == (2, "") and len(err.splitlines()) == 1, err
    assert f"{card} has no cautions section: the card must say, under a heading such as '## Cautions'," in err
    assert "export the bundle again ('textsieve export RUN --out BUNDLE'" in err
    assert run(capsys, "models", *r)[1].startswith("no models yet")


def test_publish_refuses_a_label_with_a_format_character_in_one_line(
    capsys: pytest.CaptureFixture[str], tmp_path: Path, tiny_bundles: dict[str, Path]
) -> None:
    """A bundle exported before labels were held to names' rule published a U+200B label, which reads
    as another label without it (name of the character from the Unicode Character Database)."""
    bundle = tmp_path / "bundle"
    shutil.copytree(tiny_bundles["a"], bundle)
    labels = json.loads((bundle / "manifest.json").read_text(encoding="utf-8"))["labels"]
    labels[0] = labels[0][:1] + "\u200b" + labels[0][1:]
    edit_manifest(bundle, {"labels": labels})
    r = ["--registry", str(tmp_path / "reg")]
    code, out, err = run(capsys, "publish", str(bundle), "--model", "m", *r)
    assert (code, out) == (2, "") and len(err.splitlines()) == 1, err
    assert f"the label {labels[0]!r} holds U+200B ZERO WIDTH SPACE (category Cf: a format character" in err
    assert "train again with the label renamed" in err
    assert run(capsys, "models", *r)[1].startswith("no models yet")


def test_evaluate_refuses_a_stored_evalset_with_texts_the_service_refuses_in_one_line(
    capsys: pytest.CaptureFixture[str], tmp_path: Path, tiny_bundles: dict[str, Path], tiny_data: Path
) -> None:
    """A set stored before the text rules (58cc344) with a lone surrogate made `evaluate` a
    UnicodeEncodeError traceback, and one with a NUL was scored as stored (found by probing)."""
    from textsieve.registry import open_registry

    reg_dir = tmp_path / "reg"
    r = ["--registry", str(reg_dir)]
    run(capsys, "publish", str(tiny_bundles["a"]), "--model", "m", *r)
    rows = read_jsonl(tiny_data / "test.jsonl")[:20]
    rows[1]["text"] += "\ud800"
    rows[4]["text"] = "a\x00b"
    with open_registry(reg_dir) as reg:
        store_evalset_unchecked(reg, "m", rows, "old.jsonl")
    code, out, err = run(capsys, "evaluate", "m", "1", "--out", str(tmp_path / "report"), *r)
    assert (code, out) == (2, "") and len(err.splitlines()) == 1, err
    assert "the evaluation set of 'm' ('old.jsonl', sha256 " in err
    assert "cannot be scored: 2 of its 20 texts are ones the service refuses (row 2: the text contains a lone " in err
    assert "row 5: the text contains a NUL character (U+0000) at character 1)" in err
    assert err.rstrip().endswith("in the blob folder), or pass a file: textsieve evaluate m 1 --evalset FILE")
    assert not (tmp_path / "report").exists()


def test_a_device_given_as_a_labelled_file_is_refused_before_it_is_read(
    capsys: pytest.CaptureFixture[str], tmp_path: Path, tiny_bundles: dict[str, Path]
) -> None:
    """/dev/zero under a .jsonl name was read until memory ran out: a MemoryError traceback."""
    r = ["--registry", str(tmp_path / "reg")]
    run(capsys, "publish", str(tiny_bundles["a"]), "--model", "m", *r)
    (tmp_path / "zero.jsonl").symlink_to("/dev/zero")
    code, out, err = run(capsys, "evalset", "add", "m", str(tmp_path / "zero.jsonl"), *r)
    assert (code, out) == (2, "") and len(err.splitlines()) == 1
    assert "zero.jsonl: is a device or socket, not a file; expected a labelled data file" in err


@pytest.mark.parametrize(
    ("argv", "expected_msg"),
    [
        # argparse keeps the last of a repeated flag: a flag appended by a script silently promoted to live.
        pytest.param(
            ["promote", "m", "1", "--to", "candidate", "--reason", "x", "--to", "live"],
            "argument --to: given twice with different values; give it once",
            id="--to twice",
        ),
        pytest.param(
            ["review-threshold", "m", "--set", "0.5", "--reason", "x", "--set", "0.9"],
            "argument --set: given twice with different values; give it once",
            id="review-threshold --set twice",
        ),
    ],
)
def test_a_flag_given_twice_with_two_values_is_refused(
    argv: list[str], expected_msg: str, capsys: pytest.CaptureFixture[str], tmp_path: Path
) -> None:
    with pytest.raises(SystemExit) as info:
        main([*argv, "--registry", str(tmp_path / "reg")])
    err = capsys.readouterr().err
    assert info.value.code == 2 and len(err.splitlines()) == 1 and expected_msg in err, err


@pytest.mark.parametrize(
    "argv",
    [
        ["promote", "m", "1e3", "--to", "live", "--reason", "x"],
        ["verdicts", "m", "--version", "1e3"],
        ["shadow", "m", "--live", "1e3"],
    ],
    ids=["promote VERSION", "verdicts --version", "shadow --live"],
)
def test_a_version_that_is_no_whole_number_is_named_with_the_rule(
    argv: list[str], capsys: pytest.CaptureFixture[str], tmp_path: Path
) -> None:
    """Before: "invalid int value: '1e3'" here, while show and evaluate stated the rule."""
    with pytest.raises(SystemExit) as info:
        main([*argv, "--registry", str(tmp_path / "reg")])
    err = capsys.readouterr().err
    assert info.value.code == 2 and len(err.splitlines()) == 1, err
    assert "bad version '1e3': versions are whole numbers from 1 to 2147483647" in err


def test_a_registry_file_that_is_no_database_says_what_to_do(
    capsys: pytest.CaptureFixture[str], tmp_path: Path
) -> None:
    """Before: SQLite's words alone ('file is not a database'). An SQLite database starts with the 16
    bytes 'SQLite format 3\\x00' (sqlite.org/fileformat.html, 1.3); this file does not."""
    (tmp_path / "reg").mkdir()
    (tmp_path / "reg" / "registry.sqlite3").write_bytes(b"not a database at all\n" * 300)
    code, out, err = run(capsys, "models", "--registry", str(tmp_path / "reg"))
    assert (code, out) == (2, "") and len(err.splitlines()) == 1, err
    assert "not a registry database or is damaged: restore the registry folder from a backup" in err


def test_a_later_location_flag_overrides_an_earlier_one(
    capsys: pytest.CaptureFixture[str], tmp_path: Path, tiny_bundles: dict[str, Path]
) -> None:
    """A wrapper's default --registry, overridden by the caller's: flags that name no change keep last-wins."""
    run(capsys, "publish", str(tiny_bundles["a"]), "--model", "m", "--registry", str(tmp_path / "reg"))
    code, out, _ = run(
        capsys, "versions", "m", "--registry", str(tmp_path / "nowhere"), "--registry", str(tmp_path / "reg")
    )
    assert code == 0 and out.splitlines()[1].split()[:2] == ["1", "registered"]


def test_a_state_outside_the_choices_is_an_argument_error(capsys: pytest.CaptureFixture[str]) -> None:
    with pytest.raises(SystemExit) as info:
        main(["promote", "m", "1", "--to", "retired", "--reason", "x"])
    assert info.value.code == 2
    err = capsys.readouterr().err
    assert len(err.strip().splitlines()) == 1 and "invalid choice: 'retired'" in err


def test_read_verbs_do_not_create_a_registry(capsys: pytest.CaptureFixture[str], tmp_path: Path) -> None:
    code, _, err = run(capsys, "models", "--registry", str(tmp_path / "none"))
    assert code == 2 and "no registry at" in err and not (tmp_path / "none").exists()
    code, _, err = run(capsys, "models", "--registry", "postgresql://u@127.0.0.1:1/x")
    assert code == 2 and "--blobs" in err


def test_an_empty_registry_lists_no_models(capsys: pytest.CaptureFixture[str], tmp_path: Path) -> None:
    from textsieve.registry import open_registry

    open_registry(tmp_path / "reg").close()
    code, out, _ = run(capsys, "models", "--registry", str(tmp_path / "reg"))
    assert code == 0 and "no models yet" in out


def _as_a_user_bound_by_file_modes(path: Path) -> list[str]:
    """A command prefix under which ``path``'s mode binds: as root, setpriv (util-linux) drops the
    capabilities that override file modes (capabilities(7): CAP_DAC_OVERRIDE, CAP_DAC_READ_SEARCH)."""
    prefix: list[str] = []
    if os.geteuid() == 0:
        setpriv = shutil.which("setpriv")
        if setpriv is None:
            pytest.skip("running as root, and setpriv (util-linux) is not there to drop root's override of file modes")
        drop = "-dac_override,-dac_read_search"
        prefix = [setpriv, f"--bounding-set={drop}", f"--inh-caps={drop}"]
    probe = "import os, sys; sys.exit(3 if os.access(sys.argv[1], os.W_OK) else 0)"
    if subprocess.run([*prefix, sys.executable, "-c", probe, str(path)], timeout=60, check=False).returncode:
        pytest.skip(f"{path} stays writable for this user whatever its mode")
    return prefix


def _run_with_read_only(target: Path, reg: Path, argv: list[str]) -> subprocess.CompletedProcess[str]:
    """``textsieve ARGV --registry REG`` as a user bound by file modes, ``target`` read-only meanwhile."""
    mode = target.stat().st_mode
    target.chmod(0o555 if target.is_dir() else 0o444)
    try:
        return subprocess.run(
            [
                *_as_a_user_bound_by_file_modes(target),
                sys.executable,
                "-m",
                "textsieve.cli",
                *argv,
                "--registry",
                str(reg),
            ],
            capture_output=True,
            text=True,
            timeout=120,
            env=child_env(),
            check=False,
        )
    finally:
        target.chmod(mode)


@pytest.mark.parametrize(
    ("read_only", "journal", "argv", "expected_msg"),
    [
        pytest.param(
            ".",
            False,
            ["models"],
            "the registry folder is not writable, and SQLite writes beside the database even to read it "
            "(its lock and journal files registry.sqlite3-shm and registry.sqlite3-wal); make the folder writable "
            "for this user, or copy the registry folder somewhere writable and point --registry",
            id="folder",
        ),
        pytest.param(
            # As in a copy taken while a server had the registry open; SQLite said "unable to open database file".
            ".",
            True,
            ["models"],
            "the registry folder is not writable, and SQLite writes beside the database even to read it",
            id="folder-with-a-journal",
        ),
        pytest.param(
            "registry.sqlite3",
            False,
            ["review-threshold", "m", "--set", "0.5", "--reason", "x"],
            "registry.sqlite3: the registry database file is not writable, so the registry cannot be changed; "
            "make it writable for this user, or copy the registry folder",
            id="database-file",
        ),
    ],
)
def test_a_read_only_registry_is_one_line_saying_what_to_make_writable(
    tmp_path: Path, tiny_bundles: dict[str, Path], read_only: str, journal: bool, argv: list[str], expected_msg: str
) -> None:
    from textsieve.registry import open_registry

    reg = tmp_path / "reg"
    with open_registry(reg) as registry:
        registry.publish(tiny_bundles["a"], "m", actor="tests")
    if journal:
        (reg / "registry.sqlite3-wal").touch()
    done = _run_with_read_only(reg / read_only, reg, argv)
    # UnavailableError's status, as for a registry that cannot be reached (textsieve/errors.py).
    assert (done.returncode, done.stdout) == (1, ""), done.stderr
    assert len(done.stderr.splitlines()) == 1 and done.stderr.startswith("textsieve: error: "), done.stderr
    assert expected_msg in done.stderr, done.stderr


@pytest.mark.parametrize(
    ("argv", "expected_msg"),
    [
        pytest.param(
            ["gc", "--older-than", "0"],
            "the blob folder is not writable for this user (Permission denied), so no blob could be deleted "
            "(list them with gc --dry-run); make it writable for this user, or point --blobs",
            id="gc",
        ),
        pytest.param(
            ["publish", "BUNDLE_B", "--model", "m"],
            "the blob folder is not writable for this user (Permission denied), so nothing could be stored and "
            "nothing was recorded; make it writable",
            id="publish",
        ),
    ],
)
def test_a_read_only_blob_folder_is_one_line_and_changes_nothing(
    tmp_path: Path, tiny_bundles: dict[str, Path], argv: list[str], expected_msg: str
) -> None:
    """A blob folder this user may not write (a read-only volume) was a PermissionError traceback from gc
    (deleting an orphan) and publish (storing a blob)."""
    import time

    from textsieve.registry import open_registry

    reg = tmp_path / "reg"
    with open_registry(reg) as registry:
        registry.publish(tiny_bundles["a"], "m", actor="tests")
        orphan = registry.blobs.put_bytes(b"left by a killed publish")
        os.utime(registry.blobs.path(orphan), (time.time() - 7200,) * 2)
    blobs = reg / "blobs"
    before = sorted(p.name for p in blobs.iterdir())
    argv = [str(tiny_bundles["b"]) if a == "BUNDLE_B" else a for a in argv]
    done = _run_with_read_only(blobs, reg, argv)
    # UnavailableError's status, as for a read-only registry database (textsieve/errors.py).
    assert (done.returncode, done.stdout) == (1, ""), done.stderr
    assert len(done.stderr.splitlines()) == 1 and done.stderr.startswith("textsieve: error: "), done.stderr
    assert expected_msg in done.stderr, done.stderr
    assert sorted(p.name for p in blobs.iterdir()) == before
    with open_registry(reg) as registry:
        assert [v.version for v in registry.versions("m")] == [1]


def test_gc_deletes_old_unreferenced_blobs_and_says_so(tmp_path: Path, tiny_bundles: dict[str, Path]) -> None:
    import os
    import time

    from textsieve.cli import main
    from textsieve.registry import open_registry

    with open_registry(tmp_path / "reg") as reg:
        reg.publish(tiny_bundles["a"], "m", actor="tests")
        orphan = reg.blobs.put_bytes(b"orphan")
        os.utime(reg.blobs.path(orphan), (time.time() - 7200,) * 2)
        young = reg.blobs.put_bytes(b"a publish in progress")
    args = ["gc", "--registry", str(tmp_path / "reg")]
    # NaN compares false with every time, so it once spared nothing; it is refused like a negative age.
    assert main([*args, "--older-than", "nan"]) == 2
    with open_registry(tmp_path / "reg") as reg:
        assert reg.blobs.has(orphan) and reg.blobs.has(young)
    assert main([*args, "--dry-run"]) == 0
    with open_registry(tmp_path / "reg") as reg:
        assert reg.blobs.has(orphan)
    assert main(args) == 0
    with open_registry(tmp_path / "reg") as reg:
        assert not reg.blobs.has(orphan) and reg.blobs.has(young)
        reg.fetch("m", 1)
    assert main([*args, "--older-than", "-1"]) == 2


@pytest.mark.parametrize("dry_run", [[], ["--dry-run"]], ids=["gc", "gc --dry-run"])
def test_gc_on_a_damaged_blob_folder_says_what_is_wrong_in_one_line(
    capsys: pytest.CaptureFixture[str], tmp_path: Path, tiny_bundles: dict[str, Path], dry_run: list[str]
) -> None:
    import shutil

    from textsieve.registry import open_registry

    with open_registry(tmp_path / "reg") as reg:
        referenced = len(reg.publish(tiny_bundles["a"], "m", actor="tests").files)
    blobs = tmp_path / "reg" / "blobs"
    args = ["gc", *dry_run, "--registry", str(tmp_path / "reg")]

    one = blobs / sorted(p.name for p in blobs.iterdir() if not p.name.startswith("."))[0]  # a blob, not the mark
    one.rename(tmp_path / "aside")
    code, out, err = run(capsys, *args)
    assert code == 1 and f"kept {referenced - 1} referenced, 1 referenced missing;" in out
    assert err == (
        f"textsieve: error: 1 of {referenced} referenced blobs are missing from {blobs}; versions that "
        "use them cannot be fetched or served; restore them from a backup\n"
    )

    shutil.rmtree(blobs)
    code, out, err = run(capsys, *args)
    assert code == 1 and f"kept 0 referenced, {referenced} referenced missing;" in out
    assert len(err.splitlines()) == 1, err
    assert f"the blob folder {blobs} is missing, so every referenced blob ({referenced}) is missing" in err

    blobs.write_bytes(b"")  # a file where the folder should be: it once ended in NotADirectoryError's traceback
    code, out, err = run(capsys, *args)
    assert (code, out) == (2, "")
    assert err == (
        f"textsieve: error: {blobs}: not a folder, but the registry keeps its blobs there; move it aside "
        "and put the blob folder back in its place\n"
    )


def test_gates_shows_and_changes_settings_with_a_reason(
    capsys: pytest.CaptureFixture[str], spec: RegistrySpec, tiny_bundles: dict[str, Path]
) -> None:
    r = spec.cli_args()
    run(capsys, "publish", str(tiny_bundles["a"]), "--model", "m", *r)
    code, out, _ = run(capsys, "gates", "m", *r)
    lines = out.splitlines()
    assert code == 0 and lines[0].split() == [
        "SETTING",
        "VALUE",
        "DEFAULT",
        "SOURCE",
        "SET",
        "(UTC)",
        "BY",
        "WHY",
        "ALLOWED",
    ]
    assert_aligned("\n".join(lines[:-1]))
    assert lines[1].split()[:4] == ["macro_f1_drop", "0.01", "0.01", "default"]
    assert lines[-1] == (
        "gates on promotion to live: parity, labels, cautions, macro_f1 (drop ≤ 0.01), ece (rise ≤ 0.02); "
        "the metric gates judge on an evaluation set of at least 50 texts and 5 per label"
    )

    code, out, _ = run(
        capsys,
        "gates",
        "m",
        "--set",
        "mcnemar=on",
        "--set",
        "mcnemar_p=0.01",
        "--reason",
        "600 texts",
        "--actor",
        "lead",
        *r,
    )
    assert code == 0
    rows = {line.split()[0]: line for line in out.splitlines()[1:6]}
    assert rows["mcnemar"].split()[:4] == ["mcnemar", "on", "off", "set"]
    assert "lead" in rows["mcnemar_p"] and "600 texts" in rows["mcnemar_p"]
    assert "mcnemar (refuses when significantly worse: p < 0.01)" in out
    assert out.splitlines()[-1] == "changed: mcnemar, mcnemar_p"

    code, out, _ = run(capsys, "gates", "m", "--reset", "mcnemar_p", "--reason", "back", *r)
    assert code == 0 and out.splitlines()[-1] == "changed: mcnemar_p"

    # The shadow gate, once a level is set, refuses promotions too: the line names it.
    code, out, _ = run(
        capsys, "gates", "m", "--set", "shadow_agreement_min=0.95", "--set", "shadow_min_texts=500", "--reason", "s", *r
    )
    assert code == 0
    assert "shadow_agreement (agreement with live ≥ 0.95 over at least 500 shadow texts)" in out.splitlines()[-2]
    code, out, _ = run(capsys, "history", "m", *r)
    assert "mcnemar off → on; mcnemar_p 0.05 → 0.01" in out and "mcnemar_p 0.01 → 0.05 (default)" in out


def test_review_threshold_verb(
    capsys: pytest.CaptureFixture[str], tmp_path: Path, tiny_bundles: dict[str, Path]
) -> None:
    r = ["--registry", str(tmp_path / "reg")]
    run(capsys, "publish", str(tiny_bundles["a"]), "--model", "m", *r)
    assert (
        run(capsys, "review-threshold", "m", *r)[1] == "m: no review threshold; replies carry no needs_review field\n"
    )
    code, out, _ = run(
        capsys, "review-threshold", "m", "--set", "0.82", "--reason", "calibrated", "--actor", "lead", *r
    )
    assert code == 0 and out.startswith(
        "m: review threshold 0.82; results whose top probability is below it need review"
    )
    assert "by lead: calibrated" in out
    code, out, _ = run(capsys, "review-threshold", "m", "--clear", "--reason", "trial over", *r)
    assert code == 0 and "no review threshold" in out
    code, out, _ = run(capsys, "review-threshold", "m", "--clear", "--reason", "again", *r)
    assert out.splitlines()[-1] == "nothing changed: it was already so"


@pytest.mark.parametrize(
    ("argv", "expected_msg"),
    [
        pytest.param(
            ["gates", "m", "--set", "bogus=1", "--reason", "x"],
            "unknown setting 'bogus'; allowed: macro_f1_drop (a number from 0 to 1); ece_rise",
            id="unknown-key",
        ),
        pytest.param(
            ["gates", "m", "--set", "mcnemar_p=0.7", "--reason", "x"],
            "bad value '0.7' for mcnemar_p: a number above 0 and at most 0.5",
            id="out-of-range",
        ),
        pytest.param(
            ["gates", "m", "--set", "mcnemar=yes please", "--reason", "x"], "for mcnemar: on or off", id="word"
        ),
        pytest.param(["gates", "m", "--set", "mcnemar"], "write KEY=VALUE", id="no-equals"),
        pytest.param(["gates", "m", "--set", "mcnemar=on"], "a reason is required", id="no-reason"),
        pytest.param(
            ["gates", "m", "--set", "review_threshold=0.8", "--reason", "x"], "unknown setting", id="wrong-verb"
        ),
        pytest.param(["gates", "m", "--set", "tolerances=off", "--reason", "x"], "needs mcnemar=on", id="no-gate-left"),
        pytest.param(
            ["gates", "m", "--set", "evalset_min_texts=2.5", "--reason", "x"],
            "bad value '2.5' for evalset_min_texts: a whole number from 1 to 1,000,000,000",
            id="fraction-of-a-text",
        ),
        # Before: accepted, though the message lists "on or off" and counts are shown in digits.
        pytest.param(["gates", "m", "--set", "mcnemar=yes", "--reason", "x"], "'yes' for mcnemar: on or off", id="yes"),
        pytest.param(
            ["gates", "m", "--set", "tolerances=true", "--reason", "x"], "'true' for tolerances: on or off", id="true"
        ),
        pytest.param(
            ["gates", "m", "--set", "evalset_min_texts=1e3", "--reason", "x"],
            "bad value '1e3' for evalset_min_texts: a whole number from 1 to 1,000,000,000, written in plain digits",
            id="count-exponent",
        ),
        pytest.param(
            ["gates", "m", "--set", "evalset_min_texts=1_000", "--reason", "x"], "'1_000' for", id="count-underscore"
        ),
        pytest.param(["gates", "ghost"], "no model 'ghost'", id="unknown-model"),
        pytest.param(["review-threshold", "m", "--set", "1.2", "--reason", "x"], "at most 1, or none", id="t-range"),
        pytest.param(["review-threshold", "m", "--set", "high", "--reason", "x"], "bad value 'high'", id="t-word"),
        pytest.param(["review-threshold", "m", "--set", "0.9"], "a reason is required", id="t-no-reason"),
    ],
)
def test_settings_verbs_bad_input_exits_2_with_one_line(
    argv: list[str],
    expected_msg: str,
    capsys: pytest.CaptureFixture[str],
    tmp_path: Path,
    tiny_bundles: dict[str, Path],
) -> None:
    r = ["--registry", str(tmp_path / "reg")]
    run(capsys, "publish", str(tiny_bundles["a"]), "--model", "m", *r)
    code, out, err = run(capsys, *argv, *r)
    assert code == 2 and out == ""
    assert len(err.strip().splitlines()) == 1 and err.startswith("textsieve: error: "), err
    assert expected_msg in err, err


def test_evalset_add_warns_when_the_gates_would_find_it_too_small(
    capsys: pytest.CaptureFixture[str], tmp_path: Path, tiny_bundles: dict[str, Path], tiny_data: Path
) -> None:
    r = ["--registry", str(tmp_path / "reg")]
    one = tmp_path / "one.jsonl"
    one.write_text((tiny_data / "test.jsonl").read_text().splitlines()[0] + "\n")
    run(capsys, "publish", str(tiny_bundles["a"]), "--model", "m", *r)
    code, out, err = run(capsys, "evalset", "add", "m", str(one), *r)
    assert code == 0 and out.startswith("evaluation set for 'm': 1 texts")
    assert err.startswith("warning: the metric gates will refuse to judge a promotion to live on this set (1 texts")
    assert len(err.splitlines()) == 1 and "textsieve gates m --set evalset_min_texts=N" in err
    code, out, err = run(capsys, "evalset", "add", "m", str(tiny_data / "test.jsonl"), *r)  # 90 texts, 19+ a label
    assert code == 0 and err == ""


@pytest.mark.parametrize(
    ("text", "expected_msg"),
    [
        pytest.param("a\x00b", "contains a NUL character (U+0000) at character 1; remove it", id="NUL"),
        pytest.param("\u200b\u2060", "has only whitespace and invisible characters (such as U+200B)", id="zero-width"),
    ],
)
def test_every_reader_of_labelled_texts_refuses_what_the_service_refuses(
    text: str,
    expected_msg: str,
    capsys: pytest.CaptureFixture[str],
    tmp_path: Path,
    tiny_bundles: dict[str, Path],
    tiny_data: Path,
) -> None:
    """train, evalset add, publish --evalset and evaluate --evalset took such rows (the gates and
    reports then judged versions on texts no caller can send); each now exits 2 naming file and line."""
    import json

    r = ["--registry", str(tmp_path / "reg")]
    run(capsys, "publish", str(tiny_bundles["a"]), "--model", "m", *r)
    rows = [json.loads(line) for line in (tiny_data / "test.jsonl").read_text().splitlines()[:3]]
    rows.insert(1, {"text": text, "label": rows[0]["label"]})
    bad = tmp_path / "bad.jsonl"
    bad.write_text("".join(json.dumps(row) + "\n" for row in rows))
    for argv in (
        ["evalset", "add", "m", str(bad), *r],
        ["publish", str(tiny_bundles["b"]), "--model", "m", "--evalset", str(bad), *r],
        ["evaluate", "m", "1", "--evalset", str(bad), "--out", str(tmp_path / "report"), *r],
        ["train", str(bad), "--out", str(tmp_path / "run")],
    ):
        code, out, err = run(capsys, *argv)
        assert code == 2 and out == "", (argv, err)
        assert err.startswith(f"textsieve: error: {bad}: line 2: the 'text' field {expected_msg}"), (argv, err)
        assert len(err.strip().splitlines()) == 1, err
    assert len(run(capsys, "versions", "m", *r)[1].strip().splitlines()) == 2  # header and version 1: nothing stored
    assert not (tmp_path / "run").exists() and not (tmp_path / "report").exists()


def test_history_says_where_a_replaced_candidate_went(
    capsys: pytest.CaptureFixture[str], spec: RegistrySpec, tiny_bundles: dict[str, Path]
) -> None:
    """A replaced candidate that had been live goes back to retired, and history said "back to
    registered" for it; the event now records the state it went to."""
    r = spec.cli_args()
    for key in ("a", "b", "relabelled"):
        run(capsys, "publish", str(tiny_bundles[key]), "--model", "m", *r)
    run(capsys, "promote", "m", "1", "--to", "live", "--reason", "first", *r)
    run(capsys, "promote", "m", "2", "--to", "live", "--reason", "second", "--force", *r)  # 1 retired
    run(capsys, "promote", "m", "1", "--to", "candidate", "--reason", "retry 1 in the shadow", *r)
    code, out, err = run(capsys, "promote", "m", "3", "--to", "candidate", "--reason", "try 3 instead", *r)
    assert code == 0, err
    run(capsys, "promote", "m", "1", "--to", "candidate", "--reason", "1 again", *r)
    states = {line.split()[0]: line.split()[1] for line in run(capsys, "versions", "m", *r)[1].splitlines()[1:]}
    assert states == {"1": "candidate", "2": "live", "3": "registered"}
    history = run(capsys, "history", "m", *r)[1]
    assert "registered → candidate, candidate 1 back to retired" in history, history
    assert "retired → candidate, candidate 3 back to registered" in history, history


def test_history_last_shows_the_newest_events_and_says_how_many_more_there_are(
    capsys: pytest.CaptureFixture[str], spec: RegistrySpec, tiny_bundles: dict[str, Path]
) -> None:
    """A long audit trail could only be read whole (hundreds of settings changes and promotions): --last N
    shows the N newest, oldest first as the whole history is, and --version one version's events."""
    r = spec.cli_args()
    for key in ("a", "b"):
        run(capsys, "publish", str(tiny_bundles[key]), "--model", "m", *r)
    run(capsys, "promote", "m", "1", "--to", "live", "--reason", "first", *r)
    for i in range(8):
        run(capsys, "review-threshold", "m", "--set", f"0.{i + 1}", "--reason", f"change {i}", *r)
    run(capsys, "promote", "m", "2", "--to", "candidate", "--reason", "try 2", *r)

    def ids(out: str) -> list[int]:
        return [int(line.split()[0]) for line in out.splitlines()[1:]]

    code, whole, err = run(capsys, "history", "m", *r)
    assert code == 0 and err == "" and len(ids(whole)) == 12 and ids(whole) == sorted(ids(whole))
    code, out, err = run(capsys, "history", "m", "--last", "3", *r)
    assert code == 0 and ids(out) == ids(whole)[-3:], out
    assert out.splitlines()[0] == whole.splitlines()[0] and "try 2" in out.splitlines()[-1]
    assert err == f"the last 3 of 12 events (from event {ids(whole)[-3]}); leave out --last for all\n"
    code, out, err = run(capsys, "history", "m", "--last", "500", *r)
    assert (code, out, err) == (0, whole, "")
    code, out, err = run(capsys, "history", "m", "--version", "2", *r)
    assert code == 0 and err == "" and [line.split()[4] for line in out.splitlines()[1:]] == ["2", "2"], out
    code, out, err = run(capsys, "history", "m", "--version", "1", "--last", "1", *r)
    assert code == 0 and len(ids(out)) == 1 and "first" in out and "the last 1 of 2 events" in err


def test_a_version_s_history_holds_the_events_that_retired_it(
    capsys: pytest.CaptureFixture[str], spec: RegistrySpec, tiny_bundles: dict[str, Path]
) -> None:
    """A promotion to live that retires the old live version, and a rollback away from a version, are
    recorded against the version made live: `history --version N` left them out, so a
    retired version's own history did not say how it came to be retired."""
    r = spec.cli_args()
    for key in ("a", "b"):
        run(capsys, "publish", str(tiny_bundles[key]), "--model", "m", *r)
    run(capsys, "promote", "m", "1", "--to", "live", "--reason", "first", *r)
    run(capsys, "promote", "m", "2", "--to", "live", "--reason", "second", "--force", *r)
    code, out, _ = run(capsys, "history", "m", "--version", "1", *r)
    assert code == 0 and "second" in out, out  # version 2's promotion retired version 1
    run(capsys, "rollback", "m", "--reason", "back to one", *r)
    code, out, _ = run(capsys, "history", "m", "--version", "2", *r)
    assert code == 0 and "back to one" in out, out  # the rollback away from version 2
    code, out, err = run(capsys, "history", "m", "--version", "2", "--last", "1", *r)
    assert code == 0 and "back to one" in out and "second" not in out and "the last 1 of 3 events" in err, (out, err)


@pytest.mark.parametrize(
    ("argv", "expected_msg"),
    [
        pytest.param(["--last", "0"], "argument --last: '0': give a whole number of events from 1", id="zero"),
        pytest.param(["--last", "-2"], "argument --last: '-2': give a whole number of events from 1", id="negative"),
        pytest.param(["--last", "2.5"], "argument --last: '2.5': give a whole number of events from 1", id="fraction"),
        pytest.param(["--version", "9"], "'m' has no version 9; its versions are 1–1", id="unknown-version"),
        pytest.param(
            ["--version", "0"],
            "argument --version: bad version 0: versions are whole numbers from 1",
            id="version-zero",
        ),
    ],
)
def test_history_refuses_a_bad_last_or_version_in_one_line(
    capsys: pytest.CaptureFixture[str],
    tmp_path: Path,
    tiny_bundles: dict[str, Path],
    argv: list[str],
    expected_msg: str,
) -> None:
    r = ["--registry", str(tmp_path / "reg")]
    run(capsys, "publish", str(tiny_bundles["a"]), "--model", "m", *r)
    try:
        code, out, err = run(capsys, "history", "m", *argv, *r)
    except SystemExit as exc:  # argparse's usage errors
        code, (out, err) = int(str(exc.code)), capsys.readouterr()
    assert (code, out) == (2, ""), err
    assert len(err.splitlines()) == 1 and err.startswith("textsieve: error: "), err
    assert expected_msg in err, err


def test_evalset_add_reports_repeated_and_contradicting_texts(
    capsys: pytest.CaptureFixture[str], tmp_path: Path, tiny_bundles: dict[str, Path], tiny_data: Path
) -> None:
    """A text twice counts twice in every figure, and a text under two labels is wrong for every version
    on one of them; both were registered without a word. They are kept (two reviewers may disagree on a
    text) but said on stderr and recorded in the evalset event."""
    import json

    r = ["--registry", str(tmp_path / "reg")]
    run(capsys, "publish", str(tiny_bundles["a"]), "--model", "m", *r)
    rows = [json.loads(line) for line in (tiny_data / "test.jsonl").read_text().splitlines()]
    other = next(label for label in ("billing", "repair") if label != rows[0]["label"])
    extra = [rows[1], rows[2], {"text": rows[0]["text"], "label": other}]
    path = tmp_path / "dup.jsonl"
    path.write_text("".join(json.dumps(row) + "\n" for row in rows + extra))
    code, out, err = run(capsys, "evalset", "add", "m", str(path), *r)
    assert code == 0 and out.startswith(f"evaluation set for 'm': {len(rows) + 3} texts")
    assert err.splitlines() == [
        f"warning: 3 of the {len(rows) + 3} rows repeat an earlier row's text (each counts in every figure); "
        "1 texts have more than one label, so every version is wrong on one of them"
    ]
    assert (
        f"dup.jsonl: {len(rows) + 3} texts, 3 repeated, 1 with two labels or more" in run(capsys, "history", "m", *r)[1]
    )
    code, _, err = run(capsys, "evalset", "add", "m", str(tiny_data / "test.jsonl"), *r)
    assert code == 0 and err == ""


def test_promote_dry_run_prints_the_gates_and_changes_nothing(
    capsys: pytest.CaptureFixture[str], spec: RegistrySpec, tiny_bundles: dict[str, Path], tiny_data: Path
) -> None:
    """Seeing whether a promotion would pass needed a real attempt (a refusal recorded, or a change
    made); --dry-run runs the same gates (Registry.check) and writes nothing."""
    r = spec.cli_args()
    run(capsys, "publish", str(tiny_bundles["a"]), "--model", "m", "--evalset", str(tiny_data / "test.jsonl"), *r)
    run(capsys, "publish", str(tiny_bundles["relabelled"]), "--model", "m", *r)
    run(capsys, "publish", str(tiny_bundles["b"]), "--model", "m", *r)
    code, out, err = run(capsys, "promote", "m", "1", "--to", "live", "--dry-run", *r)
    assert code == 0 and out.splitlines()[-1].startswith("'m' version 1 would be promoted to live: every gate passes")
    assert run(capsys, "history", "m", *r)[1].count("promote") == 0  # a dry run is no event
    run(capsys, "promote", "m", "1", "--to", "live", "--reason", "first", *r)
    events = run(capsys, "history", "m", *r)[1]
    code, out, err = run(capsys, "promote", "m", "2", "--to", "live", "--dry-run", *r)
    assert code == 1 and re.search(r"^labels\s+FAIL\s+labels differ", out, re.M)
    assert err.startswith("textsieve: error: version 2 of 'm' would not be promoted to live: gate labels would refuse")
    assert err.strip().endswith("nothing was changed or recorded (dry run)") and len(err.strip().splitlines()) == 1
    assert run(capsys, "history", "m", *r)[1] == events  # no refusal recorded
    assert "2  registered" in run(capsys, "versions", "m", *r)[1]
    for argv, words in (
        (["promote", "m", "1", "--to", "live", "--dry-run"], "version 1 of 'm' is already live"),
        (["promote", "m", "3", "--to", "candidate", "--dry-run"], "--to candidate has none to run"),
        (["promote", "m", "3", "--to", "live", "--dry-run", "--force"], "nothing to force"),
        (["promote", "m", "3", "--to", "live"], "promote needs --reason TEXT"),
    ):
        code, out, err = run(capsys, *argv, *r)
        assert code == 2 and out == "" and words in err and len(err.strip().splitlines()) == 1, (argv, err)
    assert run(capsys, "history", "m", *r)[1] == events
