"""A registered model version, resolved once and verified, loaded for scoring in this process: what
``textsieve.load_model`` hands back, and what ``textsieve score`` resolves before its first row."""

from __future__ import annotations

import os
from collections.abc import Iterable, Mapping
from dataclasses import dataclass
from numbers import Integral
from pathlib import Path
from typing import TYPE_CHECKING, Any

from textsieve.errors import InputError, NotFoundError, StateError
from textsieve.registry.records import State
from textsieve.scoring.rows import article
from textsieve.texts import MAX_SPANS, nothing_to_classify, text_refusal

if TYPE_CHECKING:
    import pandas as pd

    from textsieve.registry.api import Registry
    from textsieve.registry.runtime import Prediction, Predictor


@dataclass(frozen=True)
class Resolved:
    """A version pinned for a whole run, and the verified local copy of its bundle."""

    model: str
    version: int
    bundle_sha256: str  # the sha256 of its manifest, which lists the sha256 of every other file
    labels: tuple[str, ...]
    folder: Path
    files: dict[str, str]

    def describe(self) -> dict[str, object]:
        return {"model": self.model, "version": self.version, "bundle_sha256": self.bundle_sha256}


def resolve(registry: Registry, model: str, version: int | None = None, *, retired: bool = False) -> Resolved:
    """Pin ``version`` (the live one when None) and fetch its bundle, every blob re-hashed.

    A retired version is refused unless ``retired`` is True, as ``POST /v1/predict`` refuses to pin
    one: it was taken out of service, and scoring with it by accident (a stale version number in a
    script) should not pass silently. Reproducing its old results is what ``retired=True`` is for."""
    if not isinstance(retired, bool):
        raise InputError(f"retired must be True or False, not {retired!r}")
    info = registry.version(model, version) if version is not None else registry.live(model)
    if info is None:
        raise NotFoundError(
            f"{model!r} has no live version; promote one (textsieve promote {model} N --to live) or pass --version N"
        )
    if info.state == State.RETIRED and not retired:
        live = registry.live(info.model)
        instead = f"the live version ({live.version})" if live is not None else "the live version"
        raise StateError(
            f"version {info.version} of {info.model!r} is retired and no longer served; use {instead}, a candidate "
            "or a registered version, or ask for the retired one explicitly (load_model(..., retired=True); "
            "textsieve score --retired) to reproduce its results"
        )
    # fetch() with the pinned number, never "live" again: a promotion during the run changes nothing.
    bundle = registry.fetch(info.model, info.version)
    return Resolved(info.model, info.version, info.manifest_sha256, tuple(info.labels), bundle.path, dict(info.files))


def _open(registry: Registry | str | os.PathLike[str], blobs: str | os.PathLike[str] | None) -> tuple[Registry, bool]:
    from textsieve.registry.api import Registry, open_registry

    if isinstance(registry, Registry):
        return registry, False
    return open_registry(registry, blobs=blobs, create=False), True


class Model:
    """A model version loaded for scoring in this process (one onnxruntime session).

    Predictions are aids for human review: they can carry bias from the training data and need
    monitoring; decisions stay with accountable people.
    """

    def __init__(self, resolved: Resolved, *, threads: int = 1) -> None:
        from textsieve.registry.runtime import Predictor

        self._resolved = resolved
        self._threads = threads
        self._predictor: Predictor = Predictor.from_bundle(resolved.folder, threads=threads)

    def __reduce__(self) -> tuple[Any, tuple[Resolved, int]]:
        # The onnxruntime session cannot be pickled (joblib, multiprocessing and Dask pickle what they
        # run): the copy loads the same verified folder again, re-checking it, in the process it lands in.
        return _reload, (self._resolved, self._threads)

    @property
    def name(self) -> str:
        """The model's name in the registry."""
        return self._resolved.model

    @property
    def version(self) -> int:
        """The version number this object scores with (fixed when it was loaded)."""
        return self._resolved.version

    @property
    def bundle_sha256(self) -> str:
        """sha256 of the version's manifest, which lists every other bundle file's sha256."""
        return self._resolved.bundle_sha256

    @property
    def labels(self) -> list[str]:
        """The labels in the model's output order."""
        return list(self._resolved.labels)

    def __repr__(self) -> str:
        return f"Model({self.name!r}, version={self.version})"

    def predict(self, texts: Iterable[str], *, spans: int = 3) -> list[Prediction]:
        """Label, calibrated probabilities and up to ``spans`` n-gram spans for each text, in order."""
        items = _text_list(texts)
        for i, t in enumerate(items):
            if not isinstance(t, str):
                raise InputError(f"texts must be strings; item {i} is {_kind(t)}")
            why = text_refusal(t)  # what the HTTP API answers 422 to, in the same words
            if why is not None:
                raise InputError(f"texts[{i}] {why}")
        return self._predictor.predict(items, spans=_spans(spans))

    def score_frame(self, frame: pd.DataFrame, column: str = "text", *, spans: int = 0) -> pd.DataFrame:
        """``frame`` with the result columns added (``label``, ``probability:LABEL`` each, ``spans`` when
        asked, ``error``), the same columns ``textsieve score`` writes. Rows whose text is missing (None,
        NaN, NA: ``error`` names which), empty, not a string or refused by ``predict`` (a NUL, a lone
        surrogate) get ``error`` set and no label, in the frame's own row order and index; an input column
        that a result column would shadow is renamed ``input:NAME``."""
        import pandas as pd

        from textsieve.scoring.columns import plan
        from textsieve.scoring.rows import output_rows, score_texts, split

        spans = _spans(spans)
        _check_frame(pd, frame, column)
        names = [str(c) for c in frame.columns]
        layout = plan(names, [], self.labels, spans=spans > 0)
        values: list[Any] = frame[column].tolist()
        rows = [
            _missing_row(column, v) if not isinstance(v, str) and _missing(pd, v) else _row(column, v) for v in values
        ]
        part = split(rows, column, strict=False, first_row=0)
        scored = score_texts(self._predictor, part.texts, spans)
        results = pd.DataFrame(output_rows(rows, part, scored, layout), index=frame.index, columns=layout.results)
        renames = plan(names, None, self.labels, spans=spans > 0).renamed
        # Only the labels a result column would shadow change; the rest keep their own (an int stays an int).
        clashing = {c: renames[str(c)] for c in frame.columns if renames[str(c)] != str(c)}
        return pd.concat([frame.rename(columns=clashing), results], axis=1)


def _check_frame(pd: Any, frame: object, column: object) -> None:
    """InputError unless ``frame`` is a pandas DataFrame with exactly one column labelled ``column``."""
    if not isinstance(frame, pd.DataFrame):
        hint = "; convert it with .to_pandas()" if hasattr(frame, "to_pandas") else ""
        raise InputError(f"score_frame takes a pandas DataFrame, not {_kind(frame)}{hint}")
    try:
        count = sum(1 for c in frame.columns if c == column)
    except (TypeError, ValueError):  # an unhashable or array-like label
        count = 0
    if count == 0:
        shown = ", ".join(map(str, frame.columns[:20])) or "none"
        raise InputError(f"no column {column!r} in the frame; it has: {shown}")
    if count > 1:
        raise InputError(f"the frame has {count} columns labelled {column!r}; give the text column a label of its own")


def _missing_row(column: str, value: object) -> dict[str, Any]:
    """A row whose text is pandas' missing value (None, NaN, NA, NaT), named as the frame holds it."""
    from textsieve.scoring.rows import Misshapen

    shown = "None" if value is None else {"nan": "NaN"}.get(str(value), str(value).strip("<>"))
    return Misshapen(
        {column: None},
        f"text field {column!r} is {shown} (a missing value), not a string with something to classify",
    )


def _row(column: str, value: object) -> dict[str, Any]:
    """One input row; a text the HTTP API would refuse (a NUL, a lone surrogate) is not scored."""
    from textsieve.scoring.rows import Misshapen

    # Nothing to classify is split()'s to say, in the words textsieve score writes; the rest is refused here.
    if isinstance(value, str) and nothing_to_classify(value) is None:
        why = text_refusal(value)
        if why is not None:
            return Misshapen({column: value}, f"text field {column!r} {why}")
    return {column: value}


def _reload(resolved: Resolved, threads: int) -> Model:
    """An unpickled :class:`Model`: its bundle folder checked again, manifest first."""
    import hashlib

    from textsieve.errors import BundleError
    from textsieve.registry.manifest import MANIFEST

    manifest = resolved.folder / MANIFEST
    try:
        digest = hashlib.sha256(manifest.read_bytes()).hexdigest()
    except OSError as exc:
        raise BundleError(
            f"{resolved.model} v{resolved.version}: its bundle copy {resolved.folder} cannot be read here "
            f"({exc.strerror or exc}); call load_model in this process instead of passing the model to it"
        ) from exc
    if digest != resolved.bundle_sha256:
        raise BundleError(f"{manifest}: changed since {resolved.model} v{resolved.version} was loaded; load it again")
    return Model(resolved, threads=threads)


def _text_list(texts: object) -> list[Any]:
    """``texts`` as a list, read once (a generator is not emptied by the checks that follow). What
    iterates to something other than texts (a string's characters, a mapping's keys, a frame's column
    names) is refused, not classified."""
    if isinstance(texts, str):
        raise InputError("predict takes a list of texts, not one string: predict([text])")
    if isinstance(texts, bytes | bytearray) or getattr(texts, "ndim", None) == 0:
        one = "a 0-dimensional array" if getattr(texts, "ndim", None) == 0 else _kind(texts)
        raise InputError(f"predict takes a list of texts, not {one}: predict([text])")
    if isinstance(texts, Mapping) or hasattr(texts, "columns"):
        raise InputError(
            f"predict takes a list of texts, not {_kind(texts)} (it would classify its keys or column names); "
            "pass one column (predict(frame['text'])) or use score_frame(frame, 'text')"
        )
    if not isinstance(texts, Iterable):
        raise InputError(f"predict takes a list of texts, not {_kind(texts)}")
    return list(texts)


def _kind(value: object) -> str:
    """What a value is, for a message: "None", "a float (NaN)", "an int", "a bytes (decode it first)"."""
    if value is None:
        return "None"
    name = article(type(value).__name__)
    if isinstance(value, float) and value != value:
        return f"{name} (NaN)"
    if isinstance(value, bytes | bytearray):
        return f"{name} (decode it to a str first)"
    return name


def _spans(spans: object) -> int:
    """``spans`` as an int: a whole number from 0 to MAX_SPANS, the HTTP API's default limit (NumPy's
    integers too); InputError otherwise. 1000 was taken (and 10**30 capped) where the service says 422."""
    if isinstance(spans, bool) or not isinstance(spans, Integral) or spans < 0:
        raise InputError(f"spans must be a whole number, 0 or more, not {spans!r}")
    if int(spans) > MAX_SPANS:
        raise InputError(f"spans {spans} is above the limit of {MAX_SPANS} per text (the HTTP API's too)")
    return int(spans)


def _missing(pd: Any, value: object) -> bool:
    """None, NaN, NaT and pandas' NA stand for a missing text."""
    return value is None or (not isinstance(value, list | tuple | dict) and bool(pd.isna(value)))


def load_model(
    registry: Registry | str | os.PathLike[str],
    name: str,
    version: int | None = None,
    *,
    blobs: str | os.PathLike[str] | None = None,
    threads: int = 1,
    retired: bool = False,
) -> Model:
    """Load ``name``'s live version (or ``version``) from a registry object, folder or postgresql:// URL
    (with ``blobs``), after re-checking the sha256 of every file of its bundle. A retired version is a
    StateError, as the HTTP API refuses to pin one, unless ``retired=True``."""
    count: object = threads  # as passed, which the annotation does not promise
    if isinstance(count, bool) or not isinstance(count, Integral) or count < 1:
        raise InputError(f"threads must be a whole number, 1 or more (onnxruntime threads), not {count!r}")
    reg, owned = _open(registry, blobs)
    try:
        return Model(resolve(reg, name, version, retired=retired), threads=threads)
    finally:
        if owned:
            reg.close()


__all__ = ["Model", "Resolved", "load_model", "resolve"]
