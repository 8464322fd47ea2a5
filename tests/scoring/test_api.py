"""The Python API: the README's example runs as written, ``__all__`` is what the package offers, and
``import textsieve`` stays light."""

from __future__ import annotations

import contextlib
import io
import os
import re
import subprocess
import sys
from pathlib import Path

import pytest

from tests.helpers.environment import child_env
from tests.helpers.service import make_registry
from tests.scoring.conftest import ROOT, uci_rows

README = ROOT / "README.md"


def readme_python_example() -> str:
    section = README.read_text(encoding="utf-8").split("### Python API", 1)[1]
    found = re.search(r"```python\n(.*?)```", section, re.S)
    assert found, "README's Python API section has no python block"
    return found.group(1)


def test_the_readme_example_runs_as_written(tiny_bundles: dict[str, Path], tmp_path: Path) -> None:
    make_registry(tmp_path / "textsieve-registry", tiny_bundles)
    code = readme_python_example()
    out = io.StringIO()
    cwd = os.getcwd()
    os.chdir(tmp_path)
    try:
        with contextlib.redirect_stdout(out):
            exec(compile(code, str(README), "exec"), {"__name__": "__readme__"})
    finally:
        os.chdir(cwd)
    lines = out.getvalue().splitlines()
    assert lines[0] == "support 1 ['account', 'billing', 'praise', 'repair']"
    assert len(lines) >= 3 and lines[1].split()[0] in {"account", "billing", "praise", "repair"}
    # The frame's second text is missing: it keeps its row, with the reason instead of a label.
    assert "text field 'text' is missing" in out.getvalue()


def test_predict_and_score_frame_equal_the_runtime_on_the_uci_sentences(scoring_registry: Path) -> None:
    import numpy as np
    import pandas as pd

    import textsieve
    from textsieve.registry.runtime import Predictor

    model = textsieve.load_model(scoring_registry, "support")
    with textsieve.open_registry(scoring_registry, create=False) as reg:
        reference = Predictor.from_bundle(reg.fetch("support", 1))  # the runtime the service uses
    texts = [str(r["text"]) for r in uci_rows()]
    want = reference.predict(texts, spans=2)
    got = model.predict(texts, spans=2)
    assert [p.label for p in got] == [p.label for p in want]
    frame = pd.DataFrame({"text": texts, "label": "x"})
    scored = model.score_frame(frame)
    assert list(scored.columns[:2]) == ["text", "input:label"] and (scored["input:label"] == "x").all()
    assert scored["label"].tolist() == [p.label for p in want]
    for name in model.labels:
        expected = np.array([p.probabilities[name] for p in want])
        assert np.abs(scored[f"probability:{name}"].to_numpy() - expected).max() <= 1e-6


def test_all_lists_exactly_the_public_names_each_documented() -> None:
    import textsieve

    assert sorted(textsieve.__all__) == sorted(
        ["Model", "Options", "Prediction", "Registry", "Span", "Summary", "__version__", "load_model",
         "open_registry", "score_file"]
    )  # fmt: skip
    for name in textsieve.__all__:
        value = getattr(textsieve, name)
        if name != "__version__":
            assert (value.__doc__ or "").strip(), f"{name} has no docstring"
    with pytest.raises(AttributeError):
        textsieve.Predictor  # noqa: B018 - the runtime class stays private to the registry


def test_importing_textsieve_loads_no_heavy_dependency() -> None:
    heavy = ["numpy", "onnxruntime", "onnx", "pandas", "pyarrow", "dask", "distributed", "torch", "pydantic"]
    code = f"import sys, textsieve; print([m for m in {heavy!r} if m in sys.modules])"
    env = child_env() | {"PYTHONPATH": str(ROOT)}
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, timeout=60, env=env)
    assert out.returncode == 0, out.stderr
    assert out.stdout.strip() == "[]"


def test_predict_reads_a_generator_once_and_refuses_what_the_http_api_refuses(scoring_registry: Path) -> None:
    import textsieve
    from textsieve.errors import InputError

    model = textsieve.load_model(scoring_registry, "support")
    texts = ["the chain is broken", "refund please"]
    # A generator was emptied by the type check and gave no predictions at all.
    assert [p.label for p in model.predict(t for t in texts)] == [p.label for p in model.predict(texts)]
    for bad, words in (
        ([""], "texts[0] is empty"),
        (["ok", "  \n"], "texts[1] is empty"),
        (["ok", "\u2060"], "texts[1] has only whitespace and invisible characters (such as U+2060)"),
        (["ok", 3], "an int"),
        (["ok", "a\x00b"], "texts[1] contains a NUL character (U+0000) at character 1"),
        (["caf\u00e9 \ud800"], "texts[0] contains a lone surrogate (U+D800) at character 5"),
    ):
        with pytest.raises(InputError) as caught:
            model.predict(bad)
        assert words in str(caught.value)
    for spans in (-1, 1.5, "2", True, None):
        with pytest.raises(InputError, match="spans must be a whole number, 0 or more"):
            model.predict(texts, spans=spans)  # type: ignore[arg-type]
