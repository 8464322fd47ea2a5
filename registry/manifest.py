"""The bundle manifest: everything a consumer needs to reproduce the model's preprocessing.

A bundle is a directory holding ``manifest.json`` and the files it lists with their sha256:
``model.onnx``, ``vocab.txt`` and ``card.md``.
"""

from __future__ import annotations

from typing import Final, Literal

from pydantic import BaseModel, ConfigDict, Field, field_validator, model_validator

from textsieve.registry.drift import DriftBaseline
from textsieve.registry.tokenizer import TokenizerSpec

FORMAT: Final = "textsieve-bundle"
FORMAT_VERSION: Final = 1
MANIFEST: Final = "manifest.json"
MODEL_FILE: Final = "model.onnx"
VOCAB_FILE: Final = "vocab.txt"
CARD_FILE: Final = "card.md"

# The ONNX graph's contract, checked on publish against the file itself.
INPUTS = {"token_ids": "int64", "lengths": "int64"}
OUTPUTS = {"logits": "float32", "pooled": "float32", "positions": "int64", "contributions": "float32"}

_SHA256 = r"^[0-9a-f]{64}$"


class _Strict(BaseModel):
    # Every number a manifest records is finite: NaN would also never equal itself on re-reading.
    model_config = ConfigDict(extra="forbid", frozen=True, allow_inf_nan=False)


class VocabularyInfo(_Strict):
    file: Literal["vocab.txt"] = VOCAB_FILE
    size: int = Field(ge=2)
    pad_id: Literal[0] = 0
    unk_id: Literal[1] = 1
    min_count: int = Field(ge=1)
    max_size: int | None = None


class LengthInfo(_Strict):
    max_length: int = Field(ge=1, description="tokens kept; longer texts are truncated")
    min_length: int = Field(ge=1, description="batches are padded to at least this many tokens")
    percentile: float = Field(gt=0, le=100)
    truncation_rate: float = Field(ge=0, le=1, description="share of training texts longer than max_length")

    @model_validator(mode="after")
    def _order(self) -> LengthInfo:
        if self.min_length > self.max_length:
            raise ValueError("min_length must not exceed max_length")
        return self


class VectorsInfo(_Strict):
    file_sha256: str = Field(pattern=_SHA256)
    dim: int
    found: int = Field(ge=0, description="vocabulary tokens that had a pretrained vector")
    mode: Literal["static", "non-static"]


class ArchitectureInfo(_Strict):
    kind: Literal["cnn-multiwidth"] = "cnn-multiwidth"
    embedding_dim: int = Field(ge=1)
    widths: list[int] = Field(min_length=1)
    maps: int = Field(ge=1, description="feature maps per width")
    activation: Literal["relu"] = "relu"
    pooling: Literal["max-over-time"] = "max-over-time"
    dropout: float = Field(ge=0, lt=1)
    max_norm: float | None = None
    vectors: VectorsInfo | None = None

    @field_validator("widths")
    @classmethod
    def _positive(cls, v: list[int]) -> list[int]:
        if any(w < 1 for w in v):
            raise ValueError("filter widths must be positive")
        return v

    def filter_widths(self) -> list[int]:
        """Width of each filter, in the graph's filter order."""
        return [w for w in self.widths for _ in range(self.maps)]


class TensorInfo(_Strict):
    name: str
    dtype: str
    shape: list[str | int]


class OnnxInfo(_Strict):
    file: Literal["model.onnx"] = MODEL_FILE
    opset: int = Field(ge=18)
    # How the graph computes the convolution (same function, checked for parity either way):
    # "convolution" runs Conv over embeddings; "tap-tables" looks up each word's precomputed
    # product with every filter tap (see exporter/model.py). Bundles from before 0.2 lack it.
    layout: Literal["convolution", "tap-tables"] = "convolution"
    inputs: list[TensorInfo]
    outputs: list[TensorInfo]


class CalibrationInfo(_Strict):
    method: Literal["temperature"] = "temperature"
    temperature: float = Field(gt=0)
    nll_before: float
    nll_after: float
    ece_before: float
    ece_after: float
    bins: int = 15
    texts: int


class ParityReport(_Strict):
    texts: int = Field(ge=1)
    max_abs_prob_diff: float = Field(ge=0)
    label_agreement: float = Field(ge=0, le=1)
    position_agreement: float = Field(ge=0, le=1)
    batch_invariance_max_diff: float = Field(ge=0)
    tolerance: float = Field(gt=0)
    passed: bool


class Metrics(_Strict):
    split: str
    texts: int = Field(ge=0)
    accuracy: float = Field(ge=0, le=1)
    macro_f1: float = Field(ge=0, le=1)
    ece: float = Field(ge=0, le=1)
    nll: float = Field(ge=0)


class TrainingInfo(_Strict):
    data_sha256: str = Field(pattern=_SHA256)
    valid_sha256: str | None = None
    rows: int
    valid_rows: int
    seed: int
    epochs: int
    best_epoch: int
    batch_size: int
    learning_rate: float
    text_field: str
    label_field: str


class Manifest(_Strict):
    format: Literal["textsieve-bundle"] = FORMAT
    format_version: Literal[1] = FORMAT_VERSION
    labels: list[str] = Field(min_length=2)
    tokenizer: TokenizerSpec
    vocabulary: VocabularyInfo
    lengths: LengthInfo
    architecture: ArchitectureInfo
    onnx: OnnxInfo
    calibration: CalibrationInfo
    parity: ParityReport
    metrics: Metrics
    training: TrainingInfo
    tool_version: str
    created_at: str
    files: dict[str, str] = Field(description="file name → sha256 of every other file in the bundle")
    # Optional: bundles exported before drift signals existed have none, and load as before.
    drift: DriftBaseline | None = Field(None, description="the validation texts' drift signals, recorded at export")

    @field_validator("labels")
    @classmethod
    def _unique_labels(cls, v: list[str]) -> list[str]:
        if len(set(v)) != len(v):
            raise ValueError("labels must be unique")
        if any(not label.strip() for label in v):
            raise ValueError("labels must be non-empty")
        from textsieve.labelled import label_problem

        # The rules a manifest read back obeys: a version published before labels were held to the
        # rule on format and separator characters keeps loading (export and publish apply the whole rule).
        for label in v:
            problem = label_problem(label, stored=True)
            if problem is not None:
                raise ValueError(f"label {label!r} {problem}")
        return v

    @field_validator("files")
    @classmethod
    def _file_names(cls, v: dict[str, str]) -> dict[str, str]:
        import re

        for name, digest in v.items():
            # Flat names only: a bundle never refers outside its own directory.
            if "/" in name or "\\" in name or name in ("", ".", "..") or name == MANIFEST:
                raise ValueError(f"bad file name in manifest: {name!r}")
            if not re.fullmatch(_SHA256, digest):
                raise ValueError(f"bad sha256 for {name!r}")
        for required in (MODEL_FILE, VOCAB_FILE, CARD_FILE):
            if required not in v:
                raise ValueError(f"manifest files must list {required}")
        return v

    @model_validator(mode="after")
    def _consistent(self) -> Manifest:
        if self.lengths.min_length < max(self.architecture.widths):
            raise ValueError("min_length must be at least the widest filter")
        return self


__all__ = [
    "CARD_FILE",
    "FORMAT",
    "FORMAT_VERSION",
    "INPUTS",
    "MANIFEST",
    "MODEL_FILE",
    "OUTPUTS",
    "VOCAB_FILE",
    "ArchitectureInfo",
    "CalibrationInfo",
    "LengthInfo",
    "Manifest",
    "Metrics",
    "OnnxInfo",
    "ParityReport",
    "TensorInfo",
    "TrainingInfo",
    "VectorsInfo",
    "VocabularyInfo",
]
