"""textsieve: export, version and serve convolutional text classifiers, and score whole files with them.

The Python API (README: "Python API")::

    open_registry(location)             a registry folder, or a postgresql:// URL with blobs=FOLDER
    load_model(registry, name[, version])   → Model: the live (or given) version, every file re-hashed
    Model.predict(texts, spans=3)       → [Prediction(label, probabilities, spans, …)]
    Model.score_frame(frame, column)    → the pandas frame with label and probability columns added
    score_file(registry, name, INPUT, OUTPUT, …)   what ``textsieve score`` runs (Summary)

The names are imported on first use (PEP 562): ``import textsieve`` and the command line stay light.
"""

import importlib as _importlib
import typing as _typing

__version__ = "0.1.0"

if _typing.TYPE_CHECKING:
    from textsieve.registry.api import Registry, open_registry
    from textsieve.registry.runtime import Prediction, Span
    from textsieve.scoring.api import score_file
    from textsieve.scoring.local import Options, Summary
    from textsieve.scoring.model import Model, load_model

# Public name → the module that defines it.
_HOMES = {
    "Registry": "textsieve.registry.api",
    "open_registry": "textsieve.registry.api",
    "Prediction": "textsieve.registry.runtime",
    "Span": "textsieve.registry.runtime",
    "Model": "textsieve.scoring.model",
    "load_model": "textsieve.scoring.model",
    "Options": "textsieve.scoring.local",
    "Summary": "textsieve.scoring.local",
    "score_file": "textsieve.scoring.api",  # checks a Python caller's arguments, then scoring.local's
}

__all__ = [
    "Model",
    "Options",
    "Prediction",
    "Registry",
    "Span",
    "Summary",
    "__version__",
    "load_model",
    "open_registry",
    "score_file",
]


def __getattr__(name: str) -> object:
    home = _HOMES.get(name)
    if home is None:
        raise AttributeError(f"module 'textsieve' has no attribute {name!r}")
    value = getattr(_importlib.import_module(home), name)
    globals()[name] = value  # looked up once; later uses find it in the namespace
    return value


def __dir__() -> list[str]:
    return sorted(__all__)
