"""The Python API: the README's example runs as written, ``__all__`` is what the package offers, and
``import textsieve`` stays light."""

from __future__ import annotations

import io
import re
import subprocess
import sys
from pathlib import Path
from typing import TYPE_CHECKING

import pytest

from tests.helpers.environment import child_env
from tests.helpers.service import MODEL
from tests.scoring.conftest import ROOT, uci_rows

if TYPE_CHECKING:
    from textsieve.scoring.model import Model

README = ROOT / "README.md"


def readme_python_example() -> str:
    section = README.read_text(encoding="utf-8").split("### Python API", 1)[1]
    found = re.search(r"```python\n(.*?)```", section, re.S)
    assert found, "README's Python API section has no python block"
    return found.group(1)


def test_the_readme_example_runs_as_written(tiny_bundles: dict[str, Path], tmp_path: Path) -> None:
    import textsieve

    # The model `make demo` publishes, so that the example also runs as written after the demo.
    with textsieve.open_registry(tmp_path / "textsieve-registry") as reg:
        reg.publish(tiny_bundles["a"], "helpdesk", actor="tests")
        reg.promote("helpdesk", 1, "live", reason="tests start here", actor="tests", force=True)
    # Run as a script, as a user runs it: score_file's worker processes re-import it (its main guard).
    (tmp_path / "example.py").write_text(readme_python_example(), encoding="utf-8")
    env = child_env() | {"PYTHONPATH": str(ROOT)}
    done = subprocess.run(
        [sys.executable, "example.py"], capture_output=True, text=True, timeout=300, cwd=tmp_path, env=env
    )
    assert done.returncode == 0, done.stderr
    lines = done.stdout.splitlines()
    assert lines[0] == "helpdesk 1 ['account', 'billing', 'praise', 'repair']"
    assert len(lines) >= 3 and lines[1].split()[0] in {"account", "billing", "praise", "repair"}
    # The frame's second text is missing: it keeps its row, with the reason instead of a label (pandas'
    # string column holds the None as NaN; print cuts the reason at its display width).
    assert "text field 'text' is NaN (a missing value)" in done.stdout
    assert lines[-1].startswith("scored 3 rows"), done.stdout
    assert len((tmp_path / "tickets-scored.jsonl").read_text(encoding="utf-8").splitlines()) == 3


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


@pytest.fixture(scope="module")
def support(scoring_registry: Path) -> Model:
    import textsieve

    return textsieve.load_model(scoring_registry, "support")


def _refusal(call: object) -> str:
    """The InputError message ``call()`` raises (anything else, or nothing, fails the test)."""
    from textsieve.errors import InputError

    with pytest.raises(InputError) as caught:
        call()  # type: ignore[operator]
    return str(caught.value)


def _frame() -> object:
    import pandas as pd

    return pd.DataFrame({"text": ["refund my fee", "the chain came off"]})


@pytest.mark.parametrize(
    "texts,words",
    [
        # Iterating these gives something other than the texts (Python's data model: a dict iterates
        # its keys, bytes its ints; pandas: a DataFrame iterates its column labels), which was classified.
        pytest.param(lambda: {"refund my fee": 1}, "not a dict (it would classify its keys", id="dict"),
        pytest.param(_frame, "not a DataFrame (it would classify its keys or column names)", id="DataFrame"),
        pytest.param(lambda: b"refund my fee", "not a bytes (decode it to a str first)", id="bytes"),
        # Not iterable at all: a TypeError from list() before.
        pytest.param(lambda: None, "not None", id="None"),
        pytest.param(lambda: 7, "not an int", id="int"),
        # NumPy: a 0-d array is one value and cannot be iterated (a TypeError before).
        pytest.param(lambda: __import__("numpy").array("refund my fee"), "not a 0-dimensional array", id="0-d array"),
    ],
)
def test_predict_refuses_what_is_not_a_list_of_texts(support: Model, texts: object, words: str) -> None:
    message = _refusal(lambda: support.predict(texts()))  # type: ignore[operator]
    assert message.startswith("predict takes a list of texts") and words in message


def test_predict_names_a_missing_or_undecoded_item_plainly(support: Model) -> None:
    import numpy as np

    assert _refusal(lambda: support.predict(["ok", None])).endswith("item 1 is None")
    assert _refusal(lambda: support.predict(["ok", float("nan")])).endswith("item 1 is a float (NaN)")
    # numpy.char: an array of b"..." holds numpy.bytes_ items, which are not str.
    assert "item 0 is a bytes_ (decode it to a str first)" in _refusal(
        lambda: support.predict(np.array([b"refund", b"chain"]))
    )


def test_predict_takes_numpy_integers_for_spans_and_refuses_more_than_the_http_apis_limit(support: Model) -> None:
    import numpy as np

    texts = ["I was charged twice this month and want a refund", "the front brake is broken"]
    want = support.predict(texts, spans=2)
    # numpy.int64 is a numbers.Integral (NumPy registers its integer types there): a whole number.
    assert support.predict(texts, spans=np.int64(2)) == want
    assert len(support.predict(texts, spans=20)) == 2  # the HTTP API's default limit (README: spans 0–20)
    # 25 and 10**6 were taken (10**30 capped) where POST /v1/predict answers 422 above TEXTSIEVE_MAX_SPANS.
    for spans in (21, 25, 10**6, 10**30, np.int64(21)):
        assert _refusal(lambda s=spans: support.predict(texts, spans=s)) == (
            f"spans {spans} is above the limit of 20 per text (the HTTP API's too)"
        )
    assert _refusal(lambda: support.score_frame(_frame(), "text", spans=25)) == (
        "spans 25 is above the limit of 20 per text (the HTTP API's too)"
    )


@pytest.mark.parametrize(
    "make,column,words",
    [
        # pandas: selecting a duplicated label gives a DataFrame, which has no .tolist (AttributeError before).
        pytest.param(
            lambda pd: pd.DataFrame([["refund", "chain"]], columns=["text", "text"]),
            "text",
            "the frame has 2 columns labelled 'text'",
            id="duplicate label",
        ),
        pytest.param(lambda pd: pd.Series(["refund"]), "text", "not a Series", id="Series"),
        pytest.param(lambda pd: [{"text": "refund"}], "text", "not a list", id="list of rows"),
        # pyarrow's Table has .columns too: the message printed its arrays as the frame's columns.
        pytest.param(
            lambda pd: __import__("pyarrow").table({"text": ["refund"]}),
            "text",
            "not a Table; convert it with .to_pandas()",
            id="pyarrow Table",
        ),
        # A list is not hashable (Python's data model): a TypeError from `in frame.columns` before.
        pytest.param(lambda pd: pd.DataFrame({"text": ["refund"]}), ["text"], "no column ['text']", id="list label"),
        pytest.param(lambda pd: pd.DataFrame(), "text", "it has: none", id="no columns"),
    ],
)
def test_score_frame_refuses_what_is_not_a_frame_with_one_such_column(
    support: Model, make: object, column: object, words: str
) -> None:
    import pandas as pd

    assert words in _refusal(lambda: support.score_frame(make(pd), column))  # type: ignore[operator, arg-type]


@pytest.mark.parametrize("spans", [-1, 1.5, "2", None, True])
def test_score_frame_checks_spans_as_predict_does(support: Model, spans: object) -> None:
    # -1 was taken as 0 and 1.5 as "some"; "2" and None were TypeErrors from `spans > 0`.
    message = _refusal(lambda: support.score_frame(_frame(), "text", spans=spans))  # type: ignore[arg-type]
    assert message == f"spans must be a whole number, 0 or more, not {spans!r}"


def test_score_frame_marks_a_nul_or_lone_surrogate_row_as_predict_refuses_it(support: Model) -> None:
    import pandas as pd

    texts = ["refund my fee", "refund\x00my fee", "caf\u00e9 \ud800", "the chain came off"]
    # dtype=object: pandas' default string dtype (pyarrow) cannot hold a lone surrogate at all.
    scored = support.score_frame(pd.DataFrame({"text": pd.Series(texts, dtype=object)}), "text")
    errors = scored["error"].tolist()
    assert errors[1] == "text field 'text' contains a NUL character (U+0000) at character 6; remove it"
    assert errors[2] == "text field 'text' contains a lone surrogate (U+D800) at character 5; send valid Unicode"
    assert scored["label"].isna().tolist() == [False, True, True, False]
    want = support.predict([texts[0], texts[3]])
    assert scored["label"].tolist()[::3] == [p.label for p in want]


def test_score_frame_keeps_the_column_labels_no_result_column_shadows(support: Model) -> None:
    import pandas as pd

    frame = pd.DataFrame({0: ["refund my fee"], "0": ["x"], "label": ["billing"]})
    scored = support.score_frame(frame, 0)
    # The int label 0 was renamed "0", beside the string "0": two columns named "0", and scored[0] a KeyError.
    assert list(scored.columns[:3]) == [0, "0", "input:label"]
    assert scored[0].tolist() == ["refund my fee"] and scored["0"].tolist() == ["x"]


def test_score_frame_lines_results_up_with_duplicate_and_multiindex_rows(support: Model) -> None:
    import pandas as pd

    texts = ["refund my fee", "the chain came off", "I cannot log in", "thanks a lot"]
    want = support.predict(texts)
    for index in (
        pd.Index([7, 7, 3, 7]),
        pd.MultiIndex.from_tuples([("a", 1), ("a", 2), ("b", 1), ("a", 1)]),
    ):
        frame = pd.DataFrame({"text": texts}, index=index).iloc[::-1]  # neither sorted nor unique
        scored = support.score_frame(frame, "text")
        assert scored.index.equals(frame.index)  # pandas: the same labels in the same order
        assert scored["text"].tolist() == texts[::-1]
        assert scored["label"].tolist() == [p.label for p in want[::-1]]
        for name in support.labels:
            got = scored[f"probability:{name}"].tolist()
            assert got == pytest.approx([p.probabilities[name] for p in want[::-1]], abs=1e-6)


@pytest.mark.parametrize(
    "call,words",
    [
        # os.fspath(None) and os.fspath(3) are TypeErrors (Python's os module); so was each call here.
        pytest.param(
            lambda ts, reg: ts.open_registry(None),
            "the registry location must be a folder path (str or pathlib.Path) or a postgresql:// URL, not NoneType",
            id="open_registry(None)",
        ),
        pytest.param(lambda ts, reg: ts.open_registry(3, create=False), "not int", id="open_registry(3)"),
        pytest.param(
            lambda ts, reg: ts.open_registry(reg, blobs=5, create=False),
            "the blob folder must be a folder path (str or pathlib.Path), or None, not int",
            id="blobs=5",
        ),
        pytest.param(lambda ts, reg: ts.load_model(None, "support"), "not NoneType", id="load_model(None)"),
        # onnxruntime took threads=-1 and 0 silently and threads="2" was its TypeError.
        pytest.param(
            lambda ts, reg: ts.load_model(reg, "support", threads="2"),
            "threads must be a whole number, 1 or more (onnxruntime threads), not '2'",
            id="threads='2'",
        ),
        pytest.param(lambda ts, reg: ts.load_model(reg, "support", threads=-1), "not -1", id="threads=-1"),
    ],
)
def test_open_registry_and_load_model_refuse_arguments_of_the_wrong_kind(
    scoring_registry: Path, call: object, words: str
) -> None:
    import textsieve

    assert words in _refusal(lambda: call(textsieve, scoring_registry))  # type: ignore[operator]


def test_score_file_takes_str_paths_and_a_registry_folder_as_load_model_does(
    scoring_registry: Path, tmp_path: Path
) -> None:
    import json

    import textsieve

    source = tmp_path / "in.jsonl"
    source.write_text('{"text": "refund my fee"}\n{"text": "the chain came off"}\n', encoding="utf-8")
    # str paths were an AttributeError ('str' object has no attribute 'is_dir'), a registry folder one
    # from resolve() ('str' object has no attribute 'live').
    out = tmp_path / "out.jsonl"
    opts = textsieve.Options(workers=0)
    summary = textsieve.score_file(
        str(scoring_registry), "support", str(source), str(out), options=opts, stream=io.StringIO()
    )
    assert (summary.rows, summary.errors, summary.version) == (2, 0, 1)
    got = [json.loads(line)["label"] for line in out.read_text(encoding="utf-8").splitlines()]
    model = textsieve.load_model(scoring_registry, "support")
    assert got == [p.label for p in model.predict(["refund my fee", "the chain came off"])]


@pytest.mark.parametrize(
    "options,words",
    [
        # What each was before: an AttributeError; scored as 0; a TypeError; a ValueError from the process
        # pool; the columns t, e, x, t; "no row has the field None"; a TypeError.
        ({"workers": 0}, "options must be textsieve.Options(...), not a dict"),
        (dict(workers=0, spans=-1), "spans must be a whole number, 0 or more, not -1"),
        (dict(workers=0, spans="2"), "spans must be a whole number, 0 or more, not '2'"),
        (dict(workers=-1), "workers must be None (one per core), 0 (this process) or more, not -1"),
        (dict(workers=0, spans=21), "spans must be at most 20 per text (the HTTP API's limit too), not 21"),
        (dict(workers=10_000), "workers must be at most"),
        (dict(workers=0, keep="text"), "keep must be None or a list of column names, not 'text'"),
        (dict(workers=0, text_field=None), "text_field must be a non-empty str, not None"),
        (dict(workers=0, chunk_rows=2.5), "chunk_rows must be a whole number, 1 or more, not 2.5"),
    ],
)
def test_score_file_refuses_options_of_the_wrong_kind_before_writing(
    scoring_registry: Path, tmp_path: Path, options: dict[str, object], words: str
) -> None:
    import textsieve

    source = tmp_path / "in.jsonl"
    source.write_text('{"text": "refund my fee"}\n', encoding="utf-8")
    # The first case passes the dict itself, as a caller guessing the keyword might.
    opts = options if words.startswith("options must") else textsieve.Options(**options)  # type: ignore[arg-type]
    out = tmp_path / "out.jsonl"
    message = _refusal(lambda: textsieve.score_file(scoring_registry, "support", source, out, options=opts))  # type: ignore[arg-type]
    assert words in message
    assert sorted(p.name for p in tmp_path.iterdir()) == ["in.jsonl"]  # nothing written


def test_a_model_pickles_for_worker_processes_and_refuses_a_changed_bundle(support: Model, tmp_path: Path) -> None:
    import pickle
    import shutil

    from textsieve.errors import BundleError
    from textsieve.scoring.model import Model, Resolved

    texts = ["refund my fee", "the chain came off", "I cannot log in"]
    # joblib, multiprocessing and Dask pickle what they run; the onnxruntime session made that a TypeError.
    again = pickle.loads(pickle.dumps(support))
    assert (again.name, again.version, again.bundle_sha256) == (support.name, support.version, support.bundle_sha256)
    assert again.predict(texts, spans=2) == support.predict(texts, spans=2)
    copy = tmp_path / "bundle"
    shutil.copytree(support._resolved.folder, copy)
    moved = Model(Resolved(**{**vars(support._resolved), "folder": copy}))
    data = pickle.dumps(moved)
    (copy / "manifest.json").write_bytes((copy / "manifest.json").read_bytes() + b" ")
    with pytest.raises(BundleError, match="changed since support v1 was loaded"):
        pickle.loads(data)
    shutil.rmtree(copy)
    with pytest.raises(BundleError, match="call load_model in this process"):
        pickle.loads(data)


def test_score_frame_names_a_missing_value_as_what_it_is_and_says_what_is_allowed(support: Model) -> None:
    """Before: None, NaN and NA in the text column read "text field 'text' is missing", as if the frame had no
    such column; a JSON null in a file reads "is null, not a string" (RFC 8259 §3's name for it)."""
    import numpy as np
    import pandas as pd

    texts = pd.Series(["refund my fee", None, np.nan, pd.NA, "the chain came off"], dtype=object)
    errors = support.score_frame(pd.DataFrame({"text": texts}), "text")["error"].tolist()
    assert errors[1:4] == [
        f"text field 'text' is {shown} (a missing value), not a string with something to classify"
        for shown in ("None", "NaN", "NA")
    ]
    assert pd.isna(errors[0]) and pd.isna(errors[4])


SCRIPT = """import sys
import textsieve

{call}
"""
CALL = "textsieve.score_file(sys.argv[1], sys.argv[2], sys.argv[3], sys.argv[4], options=textsieve.Options(workers=2))"


@pytest.mark.parametrize(
    ("call", "code", "expected"),
    [
        # Each worker re-imported the script and scored again ("another 'textsieve score' is writing the same
        # output"), and the run ended with "a scoring worker process stopped (killed, or out of memory)".
        pytest.param(CALL, 1, "score_file was called at the top level of {script} (line 4), outside", id="top-level"),
        pytest.param(
            f"def run():\n    {CALL}\n\nrun()", 1, "top level of {script} (line 7), outside", id="in-a-function"
        ),
        pytest.param(f'if __name__ == "__main__":\n    {CALL}', 0, "", id="guarded"),
    ],
)
def test_a_script_that_calls_score_file_outside_the_main_guard_is_told_so(
    call: str, code: int, expected: str, scoring_registry: Path, uci_jsonl: Path, tmp_path: Path
) -> None:
    script = tmp_path / "job.py"
    script.write_text(SCRIPT.format(call=call), encoding="utf-8")
    out = tmp_path / "out.jsonl"
    argv = [sys.executable, str(script), str(scoring_registry), MODEL, str(uci_jsonl), str(out)]
    env = child_env() | {"PYTHONPATH": str(ROOT)}
    done = subprocess.run(argv, capture_output=True, text=True, timeout=300, cwd=tmp_path, env=env)
    assert done.returncode == code, done.stderr
    if code:
        last = done.stderr.strip().splitlines()[-1]
        assert expected.format(script=script) in last, done.stderr
        assert 'put the call under if __name__ == "__main__":' in last
        assert "another 'textsieve score'" not in done.stderr and "worker process stopped" not in done.stderr
        assert not out.exists()
    else:
        assert out.read_bytes().count(b"\n") == 3000  # (some texts hold U+2028, which splitlines() splits at)


def test_a_worker_re_importing_the_script_is_refused_there(
    scoring_registry: Path, uci_jsonl: Path, tmp_path: Path
) -> None:
    """Where the script's source cannot tell (here: run as a worker's re-import does, as ``__mp_main__``)."""
    script = tmp_path / "job.py"
    script.write_text(SCRIPT.format(call=f'if __name__ != "__main__":\n    {CALL}'), encoding="utf-8")
    out = tmp_path / "out.jsonl"
    args = ["job.py", str(scoring_registry), MODEL, str(uci_jsonl), str(out)]
    code = f"import runpy, sys; sys.argv = {args!r}; runpy.run_path({str(script)!r}, run_name='__mp_main__')"
    env = child_env() | {"PYTHONPATH": str(ROOT)}
    done = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, timeout=300, env=env)
    assert done.returncode == 1
    assert f"score_file was called while a worker process re-imported {script}" in done.stderr.strip().splitlines()[-1]
    assert not out.exists()
