"""textsieve.registry: the bundle format, the tokenizer, onnxruntime scoring, and the versioned
model registry (publish, promote through gates, roll back, audit trail).

Entry point: :func:`open_registry` (a folder for SQLite, or a ``postgresql://`` URL plus a
blob folder). Everything here stays free of torch.

The public names are imported on first use (PEP 562), as in ``textsieve.service``: the command
line imports ``textsieve.registry.cli`` for every run and every TAB completion, and should not
pay for numpy and the bundle format to print a help page.
"""

import importlib as _importlib
import typing as _typing

if _typing.TYPE_CHECKING:
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
        ReportInfo,
        State,
        VersionInfo,
    )

# Public name → the module that defines it.
_HOMES = {
    "Registry": "api",
    "open_registry": "api",
    "Bundle": "bundle",
    "open_bundle": "bundle",
    "GateSettings": "gates",
    "Scores": "gates",
    "validate_model_name": "names",
    "STATES": "records",
    "EvalsetInfo": "records",
    "Event": "records",
    "GateResult": "records",
    "ModelInfo": "records",
    "Promotion": "records",
    "ReportInfo": "records",
    "State": "records",
    "VersionInfo": "records",
}

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
    "ReportInfo",
    "Scores",
    "State",
    "VersionInfo",
    "open_bundle",
    "open_registry",
    "validate_model_name",
]


def __getattr__(name: str) -> object:
    home = _HOMES.get(name)
    if home is None:
        raise AttributeError(f"module 'textsieve.registry' has no attribute {name!r}")
    value = getattr(_importlib.import_module(f"textsieve.registry.{home}"), name)
    globals()[name] = value  # looked up once; later uses find it in the namespace
    return value
