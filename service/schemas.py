"""Request and response bodies of the HTTP API, kept apart from the registry's own rows.

Unknown request fields are refused (422 naming the field and the allowed ones): a typo such as
``"span": 5`` silently ignored would hand the caller results they did not ask for.
"""

from __future__ import annotations

from typing import Any, Literal

from pydantic import BaseModel, ConfigDict, Field, field_validator, model_validator
from pydantic_core import PydanticCustomError

class _Request(BaseModel):
    model_config = ConfigDict(extra="forbid")

    @model_validator(mode="before")
    @classmethod
    def _known_fields(cls, data: Any) -> Any:
        if isinstance(data, dict):
            unknown = sorted(str(k) for k in data if k not in cls.model_fields)
            if unknown:
                raise PydanticCustomError(
                    "unknown_field", "unknown field(s) {names}; allowed: {allowed}",
                    {"names": ", ".join(map(repr, unknown)), "allowed": ", ".join(cls.model_fields),
                     "fields": unknown})
        return data


class PredictRequest(_Request):
    texts: list[str] = Field(min_length=1, description="texts to classify; limits are service settings")
    model: str | None = Field(None, description="model name; optional when one model is served")
    version: int | None = Field(None, ge=1, description="pin a version; default: the live one")
    spans: int = Field(3, ge=0, description="spans per text, strongest first")

    @field_validator("texts")
    @classmethod
    def _valid_unicode(cls, texts: list[str]) -> list[str]:
        # JSON may carry lone surrogates ("\ud800"); they are not text, cannot be encoded in
        # the reply, and would otherwise surface as a server error.
        for i, t in enumerate(texts):
            try:
                t.encode("utf-8")
            except UnicodeEncodeError as exc:
                raise ValueError(f"texts[{i}] contains a lone surrogate (U+{ord(t[exc.start]):04X}) at "
                                 f"character {exc.start}; send valid Unicode") from None
        return texts


class PromoteRequest(_Request):
    to: Literal["candidate", "live"]
    reason: str = Field(min_length=1, max_length=2000, description="recorded in the audit trail")
    force: bool = Field(False, description="override refusing gates (recorded)")
    actor: str | None = Field(None, max_length=120, description="who is acting; default: admin-api@<client address>")


class RollbackRequest(_Request):
    reason: str = Field(min_length=1, max_length=2000, description="recorded in the audit trail")
    actor: str | None = Field(None, max_length=120)


class SpanOut(BaseModel):
    start: int = Field(description="character (code point) offset into the text as sent")
    end: int = Field(description="exclusive; text[start:end] == text")
    text: str
    label: str = Field(description="the class this span supports (the predicted one)")
    weight: float = Field(description="summed pooled_f · W[label, f] of the filters whose windows form the span")
    width: int = Field(description="tokens covered")


class ResultOut(BaseModel):
    label: str
    probabilities: dict[str, float] = Field(description="softmax(logits / T), temperature-calibrated")
    spans: list[SpanOut]
    tokens: int = Field(description="tokens in the text before truncation")
    truncated: bool
    unknown: int = Field(description="tokens outside the vocabulary, among those kept")


class PredictResponse(BaseModel):
    model: str
    version: int
    results: list[ResultOut]


class VersionView(BaseModel):
    model: str
    version: int
    state: str
    labels: list[str]
    created_at: str
    published_by: str
    reason: str | None = None
    manifest_sha256: str
    accuracy: float | None = None
    macro_f1: float | None = None
    parity_passed: bool
    promoted_at: str | None = None
    previous_live: int | None = None

    @classmethod
    def of(cls, info: Any) -> VersionView:
        return cls.model_validate({k: getattr(info, k, None) for k in cls.model_fields})


class ServingView(BaseModel):
    version: int | None = Field(description="the version answering unpinned requests here; None when not served")
    state: str
    detail: str | None = None
    loaded_at: str | None = None


class ModelView(BaseModel):
    name: str
    live: int | None
    candidate: int | None
    versions: int
    updated_at: str | None = None
    serving: ServingView

    @classmethod
    def of(cls, info: Any, serving: ServingView) -> ModelView:
        return cls(name=info.name, live=info.live, candidate=info.candidate, versions=info.versions,
                   updated_at=getattr(info, "updated_at", None), serving=serving)


class ModelDetail(ModelView):
    history: list[dict[str, Any]] = Field(description="audit events, newest first (at most 20)")


class GateView(BaseModel):
    name: str
    passed: bool
    detail: str
    figures: dict[str, Any] = Field(default_factory=dict)


class AdminReply(BaseModel):
    model: str
    version: VersionView = Field(description="the version the call acted on (the live one after a rollback)")
    gates: list[GateView] = Field(default_factory=list)
    forced: bool = False
    retired: int | None = None
    serving: ServingView = Field(description="what this service answers with after the call")


class Problem(BaseModel):
    """RFC 9457 problem details, plus our extension members."""

    model_config = ConfigDict(extra="allow")

    type: str
    title: str
    status: int
    detail: str
    instance: str
    request_id: str | None = None
    errors: list[dict[str, Any]] | None = None


__all__ = ["AdminReply", "GateView", "ModelDetail", "ModelView", "PredictRequest", "PredictResponse",
           "Problem", "PromoteRequest", "ResultOut", "RollbackRequest", "ServingView", "SpanOut", "VersionView"]
