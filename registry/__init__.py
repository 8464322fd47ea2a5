"""textsieve.registry: the bundle format, the tokenizer, onnxruntime scoring, and the versioned
model registry (publish, promote through gates, roll back, audit trail).

Entry point: :func:`open_registry` (a folder for SQLite, or a ``postgresql://`` URL plus a
blob folder). Everything here stays free of torch.
"""

from textsieve.registry.api import Registry, open_registry
from textsieve.registry.bundle import Bundle, open_bundle
from textsieve.registry.gates import GateSettings, Scores
from textsieve.registry.names import validate_model_name
from textsieve.registry.records import (
    STATES,
    EvalsetInfo,
    Event,
    GateResult,
    ModelInfo,
    Promotion,
    State,
    VersionInfo,
)

__all__ = [
    "STATES",
    "Bundle",
    "EvalsetInfo",
    "Event",
    "GateResult",
    "GateSettings",
    "ModelInfo",
    "Promotion",
    "Registry",
    "Scores",
    "State",
    "VersionInfo",
    "open_bundle",
    "open_registry",
    "validate_model_name",
]
