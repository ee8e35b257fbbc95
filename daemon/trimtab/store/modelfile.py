"""The model-state file: one sensor's model (and how it was fitted) as a JSON document.

Layout::

    {"format": "trimtab-model-state", "version": 1, "sensor": "no2-07" | null,
     "model": {...RidgeModel.to_dict()...}, "fit": {...FitReport.to_dict()...} | null}

Written atomically (temp file, fsync, rename, directory fsync) with mode 0600.
"""

from __future__ import annotations

import json
import os
from collections.abc import Mapping
from pathlib import Path
from typing import Any

from trimtab.errors import DataError
from trimtab.model.closedform import FitReport
from trimtab.model.online import RidgeModel
from trimtab.store.privatefile import write_private

FORMAT = "trimtab-model-state"
VERSION = 1
_KEYS = frozenset({"format", "version", "sensor", "model", "fit"})


def model_document(
    model: RidgeModel,
    sensor: str | None = None,
    fit: FitReport | Mapping[str, Any] | None = None,
) -> dict[str, Any]:
    """The JSON document for a model (what :func:`save_model_file` writes)."""
    fit_dict = fit.to_dict() if isinstance(fit, FitReport) else (None if fit is None else dict(fit))
    return {
        "format": FORMAT,
        "version": VERSION,
        "sensor": sensor,
        "model": model.to_dict(),
        "fit": fit_dict,
    }


def save_model_file(
    path: str | os.PathLike[str],
    model: RidgeModel,
    sensor: str | None = None,
    fit: FitReport | Mapping[str, Any] | None = None,
) -> None:
    """Write the model-state file atomically, readable by its owner only."""
    target = Path(path)
    try:
        text = json.dumps(model_document(model, sensor, fit), indent=2, allow_nan=False) + "\n"
    except ValueError as exc:
        raise DataError(f"{target}: the fit report holds a non-finite number ({exc})") from exc
    try:
        write_private(target, text)
    except OSError as exc:
        raise DataError(f"{target}: cannot write there ({exc.strerror})") from exc


def load_model_file(path: str | os.PathLike[str]) -> tuple[RidgeModel, dict[str, Any]]:
    """Read a model-state file: the model and the whole document (``sensor``, ``fit`` …)."""
    where = str(path)
    try:
        text = Path(path).read_text(encoding="utf-8")
    except OSError as exc:
        raise DataError(f"{where}: cannot read ({exc.strerror})") from exc
    except UnicodeDecodeError as exc:
        raise DataError(f"{where}: not UTF-8 text ({exc.reason})") from exc
    try:
        doc = json.loads(text, parse_constant=_no_constant)
    except json.JSONDecodeError as exc:
        raise DataError(f"{where}:{exc.lineno}: not valid JSON ({exc.msg})") from exc
    except (DataError, ValueError) as exc:  # a refused constant, or digits past the limit
        raise DataError(f"{where}: {exc}") from exc
    return document_model(doc, where), doc


def document_model(doc: Any, where: str = "model file") -> RidgeModel:
    """Check a parsed model-state document and build its model; DataError naming the key."""
    if not isinstance(doc, dict):
        raise DataError(f"{where}: expected a JSON object at the top")
    missing = sorted(_KEYS - set(doc))
    if missing:
        raise DataError(f"{where}: missing key {missing[0]!r}")
    extra = sorted(set(doc) - _KEYS)
    if extra:
        raise DataError(f"{where}: unknown key {extra[0]!r}")
    if doc["format"] != FORMAT:
        raise DataError(f"{where}: key 'format' is {doc['format']!r}, expected {FORMAT!r}")
    if doc["version"] != VERSION or isinstance(doc["version"], bool):
        raise DataError(f"{where}: key 'version' is {doc['version']!r}; this build reads {VERSION}")
    if doc["sensor"] is not None and not isinstance(doc["sensor"], str):
        raise DataError(f"{where}: key 'sensor' must be a string or null")
    if doc["fit"] is not None and not isinstance(doc["fit"], dict):
        raise DataError(f"{where}: key 'fit' must be an object or null")
    try:
        return RidgeModel.from_dict(doc["model"])
    except DataError as exc:
        raise DataError(f"{where}: key 'model': {exc}") from exc


def _no_constant(name: str) -> Any:
    raise DataError(f"{name} is not allowed in a model file")
