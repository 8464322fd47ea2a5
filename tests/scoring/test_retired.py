"""A retired version: the Python API and ``textsieve score`` refuse it as ``POST /v1/predict`` refuses to
pin it, unless asked for it by name (``retired=True``, ``--retired``) to reproduce its results."""

from __future__ import annotations

import io
from pathlib import Path

import pytest

from tests.helpers.service import MODEL, assert_problem, make_registry, serving, settings_for
from textsieve.cli import main
from textsieve.errors import InputError, StateError
from textsieve.registry import open_registry
from textsieve.registry.runtime import Predictor


@pytest.fixture
def retired_v1(tmp_path: Path, tiny_bundles: dict[str, Path]) -> Path:
    """``support``: v1 (bundle a) was live and is retired, v2 (bundle b) is live."""
    folder = make_registry(tmp_path / "registry", tiny_bundles, live=1)
    with open_registry(folder) as reg:
        reg.promote(MODEL, 2, "live", reason="v2 replaces v1", force=True)
        assert reg.version(MODEL, 1).state == "retired"
    return folder


TEXTS = ["I was charged twice this month", "the front brake is broken"]


@pytest.mark.anyio
async def test_http_and_load_model_both_refuse_a_retired_version(retired_v1: Path) -> None:
    import textsieve

    async with serving(settings_for(retired_v1, inference="threads", workers=1)) as (_, client):
        r = await client.post("/v1/predict", json={"texts": TEXTS, "model": MODEL, "version": 1})
    http = assert_problem(r, 409, "state-conflict")
    assert "retired and no longer served" in http["detail"]

    # load_model loaded it silently (a stale version number in a script scored with a withdrawn model);
    # it is the same error class, which the HTTP API answers 409 with
    with pytest.raises(StateError) as info:
        textsieve.load_model(retired_v1, MODEL, 1)
    message = info.value.message
    assert message.startswith("version 1 of 'support' is retired and no longer served; use the live version (2)")
    assert "load_model(..., retired=True)" in message
    assert textsieve.load_model(retired_v1, MODEL).version == 2  # live and registered ones load as before


def test_a_retired_version_loads_when_asked_for_and_predicts_as_its_bundle(
    retired_v1: Path, tiny_bundles: dict[str, Path]
) -> None:
    import textsieve

    model = textsieve.load_model(retired_v1, MODEL, 1, retired=True)
    assert model.version == 1
    reference = Predictor.from_bundle(tiny_bundles["a"]).predict(TEXTS, spans=0)  # the bundle v1 was made from
    for got, want in zip(model.predict(TEXTS, spans=0), reference, strict=True):
        assert got.label == want.label and got.probabilities == pytest.approx(want.probabilities, abs=1e-6)
    with pytest.raises(InputError, match="retired must be True or False, not 'yes'"):
        textsieve.load_model(retired_v1, MODEL, 1, retired="yes")  # type: ignore[arg-type]


def test_score_refuses_a_retired_version_in_one_line_unless_retired_is_given(
    retired_v1: Path, tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    import textsieve

    source = tmp_path / "in.jsonl"
    source.write_text('{"text": "refund my fee"}\n', encoding="utf-8")
    out = tmp_path / "out.jsonl"
    argv = ["score", str(source), "--model", MODEL, "--version", "1", "--out", str(out), "--workers", "0"]
    code = main([*argv, "--registry", str(retired_v1)])
    _, err = capsys.readouterr()
    assert code == 2 and len(err.strip().splitlines()) == 1 and "is retired and no longer served" in err, err
    assert not out.exists()
    assert main([*argv, "--registry", str(retired_v1), "--retired"]) == 0
    assert out.exists()
    with pytest.raises(StateError, match="is retired"):
        textsieve.score_file(retired_v1, MODEL, source, tmp_path / "o2.jsonl", version=1, stream=io.StringIO())


@pytest.mark.parametrize(
    ("extra", "expected_msg"),
    [
        # Both ran and exited 0 with the flag ignored; their help says "with --version", "with --cluster".
        pytest.param(
            ["--retired"], "--retired works only with --version; add --version or drop --retired", id="retired"
        ),
        pytest.param(
            ["--partition-mb", "8"],
            "--partition-mb works only with --cluster; add --cluster or drop --partition-mb",
            id="partition-mb",
        ),
    ],
)
def test_a_flag_without_the_flag_it_works_with_is_refused(
    extra: list[str], expected_msg: str, retired_v1: Path, tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    source = tmp_path / "in.jsonl"
    source.write_text('{"text": "refund my fee"}\n', encoding="utf-8")
    out = tmp_path / "out.jsonl"
    argv = ["score", str(source), "--model", MODEL, "--out", str(out), "--workers", "0", "--registry", str(retired_v1)]
    code = main([*argv, *extra])
    _, err = capsys.readouterr()
    assert code == 2 and err.strip().splitlines() == [f"textsieve: error: {expected_msg}"], err
    assert not out.exists()


@pytest.mark.parametrize("extra", [["--workers", "2"], ["--chunk-rows", "100"]], ids=["workers", "chunk-rows"])
def test_a_local_sizing_flag_with_cluster_is_refused(
    extra: list[str], retired_v1: Path, tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    # Both were ignored with --cluster (its workers score a partition at a time), exit 0 (found by an audit).
    source = tmp_path / "in.jsonl"
    source.write_text('{"text": "refund my fee"}\n', encoding="utf-8")
    out = tmp_path / "out"
    argv = ["score", str(source), "--model", MODEL, "--out", str(out), "--registry", str(retired_v1)]
    code = main([*argv, "--cluster", "tcp://127.0.0.1:9", *extra])  # refused before any connection
    _, err = capsys.readouterr()
    (line,) = err.strip().splitlines()
    assert code == 2 and line.startswith(f"textsieve: error: {extra[0]} sizes a run on this machine"), err
    assert "dask worker --nthreads" in line and not out.exists()
