"""Reading and checking bundles: the manifest, every file's sha256 and the ONNX graph's contract."""

from __future__ import annotations

import json
from dataclasses import dataclass
from pathlib import Path

from pydantic import ValidationError

from textsieve.errors import BundleError
from textsieve.files import sha256_file
from textsieve.registry.cautions import REQUIRED, cautions_problem
from textsieve.registry.manifest import CARD_FILE, INPUTS, MANIFEST, MODEL_FILE, OUTPUTS, Manifest

_ONNX_DTYPES = {1: "float32", 7: "int64"}


def read_manifest(bundle: Path) -> Manifest:
    path = Path(bundle) / MANIFEST
    if not path.is_file():
        raise BundleError(f"{bundle}: no {MANIFEST}; a bundle is the folder 'textsieve export' writes")
    try:
        return Manifest.model_validate_json(path.read_bytes())
    except ValidationError as exc:
        first = exc.errors()[0]
        where = ".".join(str(p) for p in first["loc"]) or "manifest"
        raise BundleError(f"{path}: {where}: {first['msg']} ({exc.error_count()} problem(s))") from exc


def check_files(bundle: Path, manifest: Manifest) -> None:
    """Every listed file exists with its recorded sha256, and nothing unlisted sits beside them."""
    bundle = Path(bundle)
    for name, digest in manifest.files.items():
        path = bundle / name
        if not path.is_file():
            raise BundleError(f"{bundle}: {name} is listed in the manifest but missing")
        actual = sha256_file(path)
        if actual != digest:
            raise BundleError(f"{bundle}: {name} has sha256 {actual[:12]}…, the manifest says {digest[:12]}…")
    extra = sorted(p.name for p in bundle.iterdir() if p.name != MANIFEST and p.name not in manifest.files)
    if extra:
        raise BundleError(f"{bundle}: files not listed in the manifest: {', '.join(extra)}")


def check_graph(bundle: Path, manifest: Manifest) -> None:
    """The ONNX file passes onnx.checker and its inputs/outputs match the manifest's contract."""
    import onnx

    path = Path(bundle) / MODEL_FILE
    try:
        model = onnx.load(str(path))
        onnx.checker.check_model(model, full_check=False)
    except Exception as exc:  # onnx raises several unrelated types for a bad file
        raise BundleError(f"{path}: not a valid ONNX model: {str(exc).splitlines()[0][:200]}") from exc
    opset = max((o.version for o in model.opset_import if o.domain in ("", "ai.onnx")), default=0)
    if opset != manifest.onnx.opset:
        raise BundleError(f"{path}: opset {opset}, the manifest says {manifest.onnx.opset}")
    for kind, expected, found in (
        ("input", INPUTS, model.graph.input),
        ("output", OUTPUTS, model.graph.output),
    ):
        have = {
            v.name: _ONNX_DTYPES.get(v.type.tensor_type.elem_type, str(v.type.tensor_type.elem_type)) for v in found
        }
        if have != expected:
            raise BundleError(f"{path}: {kind}s are {have}, expected {expected}")
    logits = next(v for v in model.graph.output if v.name == "logits")
    dims = logits.type.tensor_type.shape.dim
    classes = dims[-1].dim_value if len(dims) == 2 and dims[-1].HasField("dim_value") else None
    if classes != len(manifest.labels):
        raise BundleError(
            f"{path}: the graph scores {classes if classes is not None else 'an unknown number of'} classes, "
            f"the manifest names {len(manifest.labels)} labels ({', '.join(manifest.labels)[:200]})"
        )
    listed_in = {t.name: t.dtype for t in manifest.onnx.inputs}
    listed_out = {t.name: t.dtype for t in manifest.onnx.outputs}
    if listed_in != INPUTS or listed_out != OUTPUTS:
        raise BundleError(f"{bundle}: manifest onnx inputs/outputs differ from the graph contract")


def check_parity(manifest: Manifest) -> None:
    p = manifest.parity
    if not p.passed or p.max_abs_prob_diff > p.tolerance or p.label_agreement < 1.0:
        raise BundleError(
            f"parity check failed: max |Δprobability| {p.max_abs_prob_diff:.2e} (tolerance {p.tolerance:.0e}), "
            f"label agreement {p.label_agreement:.2%}; export again and inspect the parity report"
        )


def check_card(bundle: Path) -> None:
    """The model card keeps its cautions (registry/cautions.py). Checked on publish only: a
    version already stored still loads and serves whatever its card says."""
    path = Path(bundle) / CARD_FILE
    try:
        card = path.read_bytes().decode("utf-8")
    except UnicodeDecodeError as exc:
        raise BundleError(f"{path}: not UTF-8 text (byte {exc.start}); a model card is Markdown in UTF-8") from exc
    problem = cautions_problem(card)
    if problem is not None:
        raise BundleError(
            f"{path} {problem}: {REQUIRED}; export the bundle again ('textsieve export RUN --out BUNDLE' writes "
            f"that section) or add it to {CARD_FILE} and record the card's new sha256 in {MANIFEST}"
        )


def check_labels(bundle: Path, labels: list[str]) -> None:
    """Every label obeys the whole rule new labels obey (textsieve/labelled.py label_problem). Checked
    on publish only, as the card is: a manifest read back is held to the rule of its day, so a version
    stored with a format character in a label still loads and serves (the page shows it escaped)."""
    from textsieve.labelled import label_problem

    for label in labels:
        problem = label_problem(label)
        if problem is not None:
            raise BundleError(
                f"{Path(bundle) / MANIFEST}: the label {label!r} {problem}; train again with the label "
                "renamed and export that run"
            )


@dataclass(frozen=True)
class Bundle:
    """A bundle folder whose files have been checked."""

    path: Path
    manifest: Manifest


def open_bundle(bundle: Path, *, check_onnx: bool = True) -> Bundle:
    """Read and fully check a bundle folder; raises BundleError naming the failed check."""
    bundle = Path(bundle)
    if not bundle.is_dir():
        raise BundleError(f"{bundle}: not a folder; pass the folder 'textsieve export --out' wrote")
    manifest = read_manifest(bundle)
    check_files(bundle, manifest)
    if check_onnx:
        check_graph(bundle, manifest)
    check_parity(manifest)
    vocab_lines = (bundle / manifest.vocabulary.file).read_text(encoding="utf-8").count("\n")
    if vocab_lines != manifest.vocabulary.size:
        raise BundleError(f"{bundle}: vocab.txt has {vocab_lines} tokens, the manifest says {manifest.vocabulary.size}")
    return Bundle(bundle, manifest)


def manifest_json(manifest: Manifest) -> str:
    return json.dumps(manifest.model_dump(mode="json"), indent=2, ensure_ascii=False) + "\n"


__all__ = [
    "Bundle",
    "check_card",
    "check_files",
    "check_graph",
    "check_parity",
    "manifest_json",
    "open_bundle",
    "read_manifest",
]
