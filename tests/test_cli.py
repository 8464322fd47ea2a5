"""The command line's own behaviour: one-line errors."""

from __future__ import annotations

import pytest

from textsieve.cli import main


def test_unknown_verb_is_one_line_exit_2(capsys: pytest.CaptureFixture[str]) -> None:
    with pytest.raises(SystemExit) as exc:
        main(["frobnicate"])
    assert exc.value.code == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and err[0].startswith("textsieve: error:")
