"""The exporter's verbs as the top-level parser sees them: every flag explained, cheap to import."""

from __future__ import annotations

import argparse
import subprocess
import sys
from pathlib import Path

import pytest

from textsieve.cli import build_parser
from textsieve.errors import TextsieveError
from textsieve.exporter import cli as exporter_cli

ROOT = Path(__file__).resolve().parents[2]


def _verb(name: str) -> argparse.ArgumentParser:
    parser = build_parser()
    sub = next(a for a in parser._actions if isinstance(a, argparse._SubParsersAction))
    chosen: argparse.ArgumentParser = sub.choices[name]
    return chosen


@pytest.mark.parametrize("verb", ["train", "export"])
def test_every_option_says_what_it_does_and_the_formatter_adds_the_default(
    verb: str, capsys: pytest.CaptureFixture[str]
) -> None:
    parser = _verb(verb)
    for action in parser._actions:
        if isinstance(action, argparse._HelpAction):
            continue
        assert action.help, f"{verb} {action.dest}: no help line"
        assert "default" not in action.help.lower(), f"{verb} {action.dest}: the formatter writes the default"
    with pytest.raises(SystemExit):
        build_parser().parse_args([verb, "--help"])
    shown = " ".join(capsys.readouterr().out.split())
    # argparse.ArgumentDefaultsHelpFormatter appends "(default: …)" to options with a default.
    assert ("(default: 50)" if verb == "train" else "(default: 0.0001)") in shown


def test_flags_and_handlers_are_the_exporters() -> None:
    train = build_parser().parse_args(["train", "d.jsonl", "--out", "o"])
    export = build_parser().parse_args(["export", "r", "--out", "b"])
    assert train.func is exporter_cli.cli_train and export.func is exporter_cli.cli_export
    assert (train.vectors_mode, train.widths, train.max_vocab, train.seed) == ("non-static", "3,4,5", 50000, 13)
    assert (export.tolerance, export.layout, export.test) == (1e-4, "auto", None)
    with pytest.raises(SystemExit):
        build_parser().parse_args(["export", "r", "--out", "b", "--layout", "sideways"])


def test_building_the_parser_loads_neither_torch_nor_numpy_nor_onnx() -> None:
    # A serving install has no torch; the parser (and so `textsieve --help`) must not need it.
    probe = (
        "import sys; from textsieve.cli import build_parser; build_parser(); "
        "print(sorted(m for m in ('torch', 'numpy', 'onnx', 'onnxruntime') if m in sys.modules))"
    )
    done = subprocess.run(
        [sys.executable, "-c", probe], cwd=ROOT, capture_output=True, text=True, timeout=60, check=True
    )
    assert done.stdout.strip() == "[]"


@pytest.mark.parametrize("missing", ["torch", "torch._C", "onnxscript", "tqdm"])
def test_a_missing_training_extra_names_what_to_install(missing: str) -> None:
    with pytest.raises(TextsieveError, match=r"^'export' needs the training extras: pip install 'textsieve\[train\]'$"):
        with exporter_cli._training_extras("export"):
            raise ModuleNotFoundError(f"No module named {missing!r}", name=missing)


def test_other_missing_modules_are_not_blamed_on_the_extras() -> None:
    with pytest.raises(ModuleNotFoundError):
        with exporter_cli._training_extras("train"):
            raise ModuleNotFoundError("No module named 'torchvision'", name="torchvision")
