"""Request and response bodies of the HTTP API, kept apart from the registry's own rows.

Unknown request fields are refused (422 naming the field and the allowed ones): a typo such as
``"span": 5`` silently ignored would hand the caller results they did not ask for. Types are
strict (no ``"3"`` for 3, no ``1.0`` for 1, no ``1`` for true), as the OpenAPI schema states.
Every text must hold something to classify: empty and whitespace-only texts are refused, and so
are NUL characters, which no human text contains and which truncate strings in C-based consumers
of the reply.
"""

from __future__ import annotations

import functools
from typing import Any, Literal

from pydantic import BaseModel, ConfigDict, Field, field_validator, model_validator
from pydantic_core import PydanticCustomError

from textsieve.labelled import MAX_LABEL_CHARS
from textsieve.registry import ModelInfo, VersionInfo
from textsieve.registry.names import MAX_ACTOR, MAX_VERSION, MODEL_NAME, MODEL_NAME_RULE
from textsieve.texts import text_refusal

# Bounds the schema states so that no number reaches a database column or a JSON encoder too big
# for it; the service's own limits (max_spans) are far below.
MAX_SPANS_FIELD = 2**31 - 1
NAMED_UNKNOWN = 10  # unknown fields named in a refusal, each cut to NAME_CHARS: it names, it does not echo
NAME_CHARS = 40


@functools.cache
def _field_names(model: type[BaseModel]) -> frozenset[str]:
    """A request model's field names, looked up once (every predict request checks its keys)."""
    return frozenset(model.model_fields)


def shown_name(name: str) -> str:
    """A caller's field name fit for a reply, the same in a problem's ``detail`` and its ``errors``: cut to
    NAME_CHARS, then every character Python's ``repr`` escapes written as its escape (``\\x1b``, ``\\u202e``,
    ``\\x00``, a lone surrogate as ``\\ud800``, a backslash as two), so no name's bytes reach a terminal or
    log reader to obey, and none leaves a reply that UTF-8 cannot hold (a lone surrogate made the
    problem's encoder fail: a 500). The escaped copy used to be only the quoted one: the ``detail``'s
    leading field name carried a real ESC, U+202E or NUL, and a lone surrogate came out escaped twice."""
    cut = name if len(name) <= NAME_CHARS else name[:NAME_CHARS] + "..."
    if cut.isprintable() and "\\" not in cut:
        return cut
    return "".join(c if c.isprintable() and c != "\\" else c.encode("unicode_escape").decode("ascii") for c in cut)


def quoted_name(name: str) -> str:
    """:func:`shown_name` between single quotes, as a message names a field."""
    return f"'{shown_name(name)}'"


class _Request(BaseModel):
    model_config = ConfigDict(extra="forbid", strict=True)

    @model_validator(mode="before")
    @classmethod
    def _known_fields(cls, data: Any) -> Any:
        if isinstance(data, dict) and not data.keys() <= _field_names(cls):
            unknown = sorted(str(k) for k in data if k not in cls.model_fields)
            if unknown:
                named = [shown_name(n) for n in unknown[:NAMED_UNKNOWN]]
                more = f" and {len(unknown) - len(named)} more" if len(unknown) > len(named) else ""
                raise PydanticCustomError(
                    "unknown_field",
                    "unknown field(s) {names}{more}; allowed: {allowed}",
                    {
                        "names": ", ".join(f"'{n}'" for n in named),
                        "more": more,
                        "allowed": ", ".join(cls.model_fields),
                        "fields": named,
                    },
                )
        return data


class PredictRequest(_Request):
    # The schema states the rules that JSON Schema can express; the validators below (and the
    # registry's name check) remain the authority and word the refusals.
    texts: list[str] = Field(
        min_length=1,
        description="texts to classify, each with something besides whitespace and no NUL; limits are service settings",
        json_schema_extra={"items": {"type": "string", "minLength": 1}},
    )
    model: str | None = Field(
        None,
        description=f"model name ({MODEL_NAME_RULE}); optional when one model is served",
        json_schema_extra={"anyOf": [{"type": "string", "pattern": f"^{MODEL_NAME.pattern}$"}, {"type": "null"}]},
    )
    version: int | None = Field(None, ge=1, le=MAX_VERSION, description="pin a version; default: the live one")
    spans: int = Field(3, ge=0, le=MAX_SPANS_FIELD, description="spans per text, strongest first")

    @field_validator("texts")
    @classmethod
    def _valid_texts(cls, texts: list[str]) -> list[str]:
        for i, t in enumerate(texts):
            # keep: each text's UTF-8 form stays on it, so pickling the batch for a worker encodes
            # it no second time; it lives as long as the request's texts (bench/README.md, "A text
            # encoded once on the loop").
            why = text_refusal(t, keep=True)
            if why is not None:
                raise ValueError(f"texts[{i}] {why}")
        return texts


class VerdictRequest(_Request):
    """A reviewer's verdict on one prediction: the text, what the version said, and the right label."""

    model: str = Field(
        description=f"model name ({MODEL_NAME_RULE}), as the prediction's reply named it",
        json_schema_extra={"pattern": f"^{MODEL_NAME.pattern}$"},
    )
    version: int = Field(ge=1, le=MAX_VERSION, description="the version that made the prediction")
    text: str = Field(
        min_length=1,
        description="the text as it was classified; stored so the verdict can become training data",
    )
    predicted_label: str = Field(min_length=1, max_length=MAX_LABEL_CHARS, description="the label the version gave")
    predicted_probability: float = Field(
        ge=0, le=1, allow_inf_nan=False, description="the calibrated probability shown with it"
    )
    verdict_label: str = Field(
        min_length=1,
        max_length=MAX_LABEL_CHARS,
        description="the reviewer's label: the predicted one to confirm it, another of the version's labels to "
        "correct it",
    )
    # Judged by registry/names.py validate_reviewer alone (stripped, then 1–120 characters a name may hold),
    # whose words the reviewer page says at sign-in; pydantic's own length check would refuse first, in
    # other words. The schema still documents the bounds.
    reviewer: str = Field(
        json_schema_extra={"minLength": 1, "maxLength": MAX_ACTOR}, description="who judged: recorded with the verdict"
    )

    # Before pydantic's own string check, which refuses a lone surrogate in its own words: the verdict's
    # text is refused as registry/verdicts.py check_text words it, whichever way the verdict comes in.
    @field_validator("text", mode="before")
    @classmethod
    def _valid_text(cls, text: Any) -> Any:
        from textsieve.errors import InputError
        from textsieve.registry.verdicts import check_text

        if not isinstance(text, str):
            return text  # pydantic names the wrong type
        try:
            return check_text(text)
        except InputError as exc:
            raise ValueError(exc.message) from None


class VerdictReply(BaseModel):
    id: int = Field(description="the verdict's id: 'textsieve verdicts MODEL --delete ID' removes it")
    model: str
    version: int
    predicted_label: str
    verdict_label: str
    agrees: bool = Field(description="true when the reviewer confirmed the predicted label")
    reviewer: str
    at: str = Field(description="when it was recorded (ISO 8601, UTC)")


class PromoteRequest(_Request):
    to: Literal["candidate", "live"]
    reason: str = Field(min_length=1, max_length=2000, description="recorded in the audit trail")
    force: bool = Field(False, description="override refusing gates (recorded)")
    # The actor's rule (1-120 printable characters) is registry/names.py's, refused there in its words.
    actor: str | None = Field(
        None, description="who is acting, 1-120 printable characters; default: admin-api@<client address>"
    )


class RollbackRequest(_Request):
    reason: str = Field(min_length=1, max_length=2000, description="recorded in the audit trail")
    actor: str | None = Field(
        None, description="who is acting, 1-120 printable characters; default: admin-api@<client address>"
    )


class SpanOut(BaseModel):
    start: int = Field(description="character (code point) offset into the text as sent")
    end: int = Field(description="exclusive; text[start:end] == text")
    text: str
    label: str = Field(description="the class this span supports (the predicted one)")
    weight: float = Field(description="summed pooled_f · W[label, f] of the filters whose windows form the span")
    width: int = Field(description="tokens covered")


def _boolean_when_present(schema: dict[str, Any]) -> None:
    # The field is left out rather than sent as null, so the schema says boolean, not boolean-or-null.
    schema.pop("anyOf", None)
    schema.pop("default", None)
    schema["type"] = "boolean"


class ResultOut(BaseModel):
    label: str
    probabilities: dict[str, float] = Field(description="softmax(logits / T), temperature-calibrated")
    spans: list[SpanOut]
    tokens: int = Field(description="tokens in the text before truncation")
    truncated: bool
    unknown: int = Field(description="tokens outside the vocabulary, among those kept")
    needs_review: bool | None = Field(
        None,
        description="present only when the model has a review threshold (textsieve review-threshold): true "
        "when the top probability is below it, so a person should check this result",
        json_schema_extra=_boolean_when_present,
    )


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
    def of(cls, info: VersionInfo) -> VersionView:
        return cls.model_validate({k: getattr(info, k) for k in cls.model_fields})


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
    def of(cls, info: ModelInfo, serving: ServingView) -> ModelView:
        return cls(
            name=info.name,
            live=info.live,
            candidate=info.candidate,
            versions=info.versions,
            updated_at=info.updated_at,
            serving=serving,
        )


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


class Readiness(BaseModel):
    ready: bool
    reason: str = Field(description="one line: what is served, or why not")
    degraded: list[str] = Field(
        description="what works less well while the service still answers, e.g. "
        "an unreachable registry or a new version that failed to load"
    )
    models: dict[str, dict[str, Any]] = Field(
        description="per served model: state, version, and 'failed_version' when a newer one could not be loaded"
    )


class SignalView(BaseModel):
    name: Literal["tokens", "unknown_share", "truncated", "label", "top_probability"]
    psi: float | None = Field(description="population stability index against the baseline; null without one")
    js_distance: float | None = Field(description="Jensen-Shannon distance (natural log), 0 to sqrt(ln 2)")
    band: Literal["stable", "watch", "act"] | None = Field(
        description="PSI < 0.1 stable, 0.1-0.25 watch, > 0.25 act (common practice); null without a "
        "baseline, or while the window holds fewer than min_texts texts"
    )
    min_texts: int | None = Field(
        description="live texts from which the band is more than sampling noise: below it, texts drawn from "
        "the baseline itself would read 'watch' or worse more than 5 times in 100 (Yurdakul, 2018); null when "
        "the baseline is too small for any window"
    )


class BaselineView(BaseModel):
    source: str
    texts: int
    unknown_rate: float
    truncation_rate: float


class VersionDrift(BaseModel):
    version: int
    role: Literal["live", "pinned"]
    texts: int = Field(description="live texts in the window, every replica's")
    window_texts: int = Field(description="the window's size (TEXTSIEVE_DRIFT_WINDOW_TEXTS)")
    declared_window_texts: list[int] = Field(
        default_factory=list,
        description="every window size the replicas sharing the window declare (this one's and those the "
        "stored rows were written under), smallest first; more than one: the replicas are set differently, "
        "each reports the newest texts of its own size, and rows are kept for the largest",
    )
    unknown_rate: float | None
    truncation_rate: float | None
    baseline: BaselineView | None = Field(description="null: the bundle has no baseline (exported before 0006)")
    detail: str
    signals: list[SignalView]


class DriftView(BaseModel):
    model: str
    # "replica" is what releases before the shared window answer (each replica's own window); clients
    # of this release still read their replies.
    scope: Literal["shared", "replica"] = Field(
        "shared",
        description="shared: figures of the window every replica shares through the registry (plus the "
        "answering replica's counts not flushed yet, at most TEXTSIEVE_SHADOW_FLUSH_SECONDS old); "
        "replica: an older release, whose replicas each keep their own window",
    )
    versions: list[VersionDrift]


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


__all__ = [
    "AdminReply",
    "GateView",
    "ModelDetail",
    "ModelView",
    "PredictRequest",
    "PredictResponse",
    "Problem",
    "PromoteRequest",
    "Readiness",
    "ResultOut",
    "RollbackRequest",
    "ServingView",
    "SpanOut",
    "VerdictReply",
    "VerdictRequest",
    "VersionView",
    "quoted_name",
    "shown_name",
]
