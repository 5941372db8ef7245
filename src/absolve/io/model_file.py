"""Model files: a trained :class:`~absolve.inverse.InverseModel` as versioned JSON.

Layout (``"format": "absolve-pls-model"``, ``"version": 1``)::

    {
      "format": "absolve-pls-model", "version": 1,
      "provenance": {"created": ISO time (UTC), "tool": "absolve", "tool_version": ...,
                     "inputs": [{"file": name, "sha256": hex}, ...], "training_source": ...},
      "settings": {"derivative", "window", "max_components", "folds", "alpha", "wavelength_range"},
      "unit": "mg/L", "components": [names],
      "wavelengths_nm": [n_wavelengths], "x_mean": [n_wavelengths],
      "training": {"scan_names": [n_training]},
      "models": [{"component", "latent_variables", "intercept", "coefficients": [n_wavelengths],
                  "x_weights" | "x_loadings" | "x_rotations": [A rows of n_wavelengths],
                  "y_loadings": [A], "score_sum_squares": [A], "rmsec", "rmsecv",
                  "training_range": [low, high]}, ...],
      "cross_validation": {"folds", "rule", "fold_of_scan": [n_training],
                           "rmsecv" | "mse_standard_error": [n_components rows of max_latent + 1],
                           "chosen": [n_components]},
      "diagnostics": {"alpha", "n_training", "loadings": [A rows of n_wavelengths],
                      "eigenvalues": [A], "residual_eigenvalues": [m], "q_limit", "t2_limit"}
    }

Everything needed to predict is stored; nothing is pickled. Floats are
written with Python's shortest round-trip representation, so a loaded model
predicts exactly what the saved one did. Loading checks every key, array
length and number, and names the file and the key in any error.
"""

from __future__ import annotations

import json
import os
from collections.abc import Sequence
from datetime import UTC, datetime
from pathlib import Path
from typing import Any

import numpy as np
from numpy.typing import NDArray

from .. import __version__
from ..errors import AbsolveError
from ..inverse import ComponentModel, CrossValidation, InverseModel, SpectralCheck
from ..units import check_unit
from .files import atomic_write, file_sha256
from .json_document import load_json_document

__all__ = ["FORMAT", "VERSION", "model_to_json", "read_model", "write_model"]

FORMAT = "absolve-pls-model"
VERSION = 1
_REBUILD = "the file is damaged or was edited by hand; train the model again with 'absolve train'"


def _rows(array: NDArray[np.float64]) -> list[list[float]]:
    """A (n_wavelengths, A) matrix as A rows of n_wavelengths numbers."""
    return np.asarray(array).T.tolist()


def model_to_json(model: InverseModel, *, inputs: Sequence[str | os.PathLike[str]] = ()) -> str:
    """The model as JSON text.

    Parameters
    ----------
    model : InverseModel
        A trained model.
    inputs : sequence of path-like
        Files the model was trained from; their names and SHA-256 digests go
        into the provenance record.
    """
    if not hasattr(model, "component_models_"):
        raise AbsolveError("this InverseModel has not been trained", fix="call fit() before saving it")
    settings = model.get_params()
    provenance = {
        "created": datetime.now(UTC).isoformat(timespec="seconds"),
        "tool": "absolve",
        "tool_version": __version__,
        "inputs": [{"file": Path(path).name, "sha256": file_sha256(path)} for path in inputs],
        "training_source": model.provenance_.get("training_source"),
    }
    cv, check = model.cv_, model.diagnostics_
    document = {
        "format": FORMAT,
        "version": VERSION,
        "provenance": provenance,
        "settings": {
            **settings,
            "wavelength_range": None if settings["wavelength_range"] is None else [float(v) for v in settings["wavelength_range"]],
        },
        "unit": model.unit_,
        "components": list(model.components_),
        "wavelengths_nm": model.wavelengths_.tolist(),
        "x_mean": model.x_mean_.tolist(),
        "training": {"scan_names": list(model.training_names_)},
        "models": [
            {
                "component": m.name,
                "latent_variables": m.latent_variables,
                "intercept": m.intercept,
                "coefficients": m.coefficients.tolist(),
                "x_weights": _rows(m.x_weights),
                "x_loadings": _rows(m.x_loadings),
                "x_rotations": _rows(m.x_rotations),
                "y_loadings": m.y_loadings.tolist(),
                "score_sum_squares": m.score_sum_squares.tolist(),
                "rmsec": m.rmsec,
                "rmsecv": m.rmsecv,
                "training_range": list(m.training_range),
            }
            for m in model.component_models_
        ],
        "cross_validation": {
            "folds": cv.folds,
            "rule": "venetian blinds over standards; fewest latent variables within one standard error of the minimum",
            "fold_of_scan": cv.fold_of_scan.tolist(),
            "rmsecv": cv.rmsecv.tolist(),
            "mse_standard_error": cv.mse_standard_error.tolist(),
            "chosen": cv.chosen.tolist(),
        },
        "diagnostics": {
            "alpha": check.alpha,
            "n_training": check.n_training,
            "loadings": _rows(check.loadings),
            "eigenvalues": check.eigenvalues.tolist(),
            "residual_eigenvalues": check.residual_eigenvalues.tolist(),
            "q_limit": check.q_limit,
            "t2_limit": check.t2_limit,
        },
    }
    return json.dumps(document, indent=1, allow_nan=False) + "\n"


def write_model(model: InverseModel, path: str | os.PathLike[str], *, inputs: Sequence[str | os.PathLike[str]] = ()) -> None:
    """Write ``model`` to ``path`` as JSON, whole or not at all (see :func:`model_to_json`)."""
    atomic_write(path, model_to_json(model, inputs=inputs))


class _Checker:
    """Reads keys of the parsed document, raising one clear error per problem."""

    def __init__(self, file: str) -> None:
        self.file = file

    def fail(self, key: str, problem: str, fix: str = _REBUILD) -> AbsolveError:
        return AbsolveError(f"model key {key!r}: {problem}", fix=fix, file=self.file)

    def get(self, mapping: Any, key: str, where: str = "") -> Any:
        name = f"{where}.{key}" if where else key
        if not isinstance(mapping, dict):
            raise self.fail(where or "(top level)", "is not a JSON object")
        if key not in mapping:
            raise self.fail(name, "is missing")
        return mapping[key]

    def number(self, mapping: Any, key: str, where: str = "", *, integer: bool = False, minimum: float | None = None) -> float:
        name = f"{where}.{key}" if where else key
        value = self.get(mapping, key, where)
        kinds = (int,) if integer else (int, float)
        if isinstance(value, bool) or not isinstance(value, kinds) or not np.isfinite(value):
            raise self.fail(name, f"must be a finite {'integer' if integer else 'number'}; got {value!r}")
        if minimum is not None and value < minimum:
            raise self.fail(name, f"must be at least {minimum:g}; got {value!r}")
        return value

    def texts(self, mapping: Any, key: str, where: str = "", *, length: int | None = None) -> tuple[str, ...]:
        name = f"{where}.{key}" if where else key
        value = self.get(mapping, key, where)
        if not isinstance(value, list) or not all(isinstance(v, str) for v in value):
            raise self.fail(name, "must be a list of names")
        if length is not None and len(value) != length:
            raise self.fail(name, f"has {len(value)} names, expected {length}")
        return tuple(value)

    def array(self, mapping: Any, key: str, where: str, shape: tuple[int, ...]) -> NDArray[np.float64]:
        """A numeric array of exactly ``shape`` (-1 accepts any length), all finite."""
        name = f"{where}.{key}" if where else key
        value = self.get(mapping, key, where)
        try:
            array = np.array(value, dtype=np.float64)
        except (TypeError, ValueError):
            raise self.fail(name, "must be a (nested) list of numbers") from None
        expected = "x".join("any" if s < 0 else str(s) for s in shape)
        if array.ndim != len(shape) or any(s >= 0 and s != got for s, got in zip(shape, array.shape)):
            raise self.fail(name, f"has shape {'x'.join(map(str, array.shape))}, expected {expected}")
        if not np.all(np.isfinite(array)):
            raise self.fail(name, "holds a non-finite number (NaN or infinity)")
        if _has_bool(value):
            raise self.fail(name, "holds true/false where numbers belong")
        return array


    def counts(self, mapping: Any, key: str, where: str, shape: tuple[int, ...]) -> NDArray[np.int64]:
        """Like :meth:`array`, for whole numbers below 2^31 in size (counts and indices)."""
        array = self.array(mapping, key, where, shape)
        if np.any(array != np.round(array)) or np.any(np.abs(array) >= 2**31):
            raise self.fail(f"{where}.{key}", "must hold whole numbers")
        return array.astype(np.int64)


def _has_bool(value: Any) -> bool:
    if isinstance(value, list):
        return any(_has_bool(v) for v in value)
    return isinstance(value, bool)


def read_model(path: str | os.PathLike[str]) -> InverseModel:
    """Load a model written by :func:`write_model`, checking every key.

    Raises
    ------
    AbsolveError
        When the file is not a model file, is from a newer version, is
        truncated, or has a missing key, a wrong array length or a
        non-finite number; the message names the file and the key.
    """
    file = str(path)
    document = load_json_document(path, what="model file", maker="absolve train")
    return _model_from_document(document, _Checker(file))


def _model_from_document(document: Any, check: _Checker) -> InverseModel:
    if not isinstance(document, dict) or document.get("format") != FORMAT:
        found = document.get("format") if isinstance(document, dict) else type(document).__name__
        raise check.fail("format", f"expected {FORMAT!r}, found {found!r}", fix="give a model file written by 'absolve train'")
    version = check.number(document, "version", integer=True)
    if version != VERSION:
        raise check.fail(
            "version",
            f"format version {version} is not known to absolve {__version__} (it reads version {VERSION})",
            fix="use the absolve release that wrote the file, or train the model again",
        )
    settings = check.get(document, "settings")
    window_range = check.get(settings, "wavelength_range", "settings")
    max_components = check.get(settings, "max_components", "settings")
    model = InverseModel(
        derivative=check.get(settings, "derivative", "settings"),
        window=int(check.number(settings, "window", "settings", integer=True)),
        max_components=None if max_components is None else int(check.number(settings, "max_components", "settings", integer=True)),
        folds=int(check.number(settings, "folds", "settings", integer=True)),
        alpha=float(check.number(settings, "alpha", "settings")),
        wavelength_range=None if window_range is None else tuple(check.array(settings, "wavelength_range", "settings", (2,)).tolist()),
    )
    try:
        model._check_settings()
    except AbsolveError as error:
        raise check.fail("settings", error.problem) from None

    try:
        unit = check_unit(check.get(document, "unit"))
    except AbsolveError as error:
        raise check.fail("unit", error.problem) from None
    components = check.texts(document, "components")
    if not components or len(set(components)) != len(components):
        raise check.fail("components", "must list unique component names")
    grid = check.array(document, "wavelengths_nm", "", (-1,))
    if grid.size < 2 or not np.all(np.diff(grid) > 0):
        raise check.fail("wavelengths_nm", "must hold at least two strictly increasing wavelengths")
    n_wl = grid.size
    x_mean = check.array(document, "x_mean", "", (n_wl,))
    training = check.get(document, "training")
    scan_names = check.texts(training, "scan_names", "training")
    n_train = len(scan_names)

    entries = check.get(document, "models")
    if not isinstance(entries, list) or len(entries) != len(components):
        raise check.fail("models", f"must hold one model per component ({len(components)})")
    component_models = tuple(_component_model(entry, f"models[{j}]", components[j], n_wl, check) for j, entry in enumerate(entries))

    cv_doc = check.get(document, "cross_validation")
    curve = check.array(cv_doc, "rmsecv", "cross_validation", (len(components), -1))
    width = curve.shape[1]
    chosen = check.counts(cv_doc, "chosen", "cross_validation", (len(components),))
    if chosen.tolist() != [m.latent_variables for m in component_models]:
        raise check.fail("cross_validation.chosen", "does not match the models' latent_variables")
    folds = int(check.number(cv_doc, "folds", "cross_validation", integer=True, minimum=2))
    fold_of_scan = check.counts(cv_doc, "fold_of_scan", "cross_validation", (n_train,))
    if fold_of_scan.size and (fold_of_scan.min() < 0 or fold_of_scan.max() >= folds):
        raise check.fail("cross_validation.fold_of_scan", f"must hold fold numbers 0 to {folds - 1}")
    cross_validation = CrossValidation(
        folds=folds,
        fold_of_scan=fold_of_scan,
        rmsecv=curve,
        mse_standard_error=check.array(cv_doc, "mse_standard_error", "cross_validation", (len(components), width)),
        chosen=chosen,
    )

    diag = check.get(document, "diagnostics")
    n_check = int(check.number(diag, "n_training", "diagnostics", integer=True, minimum=2))
    if n_check != n_train:
        raise check.fail("diagnostics.n_training", f"is {n_check} but {n_train} training scans are named")
    loadings = check.array(diag, "loadings", "diagnostics", (-1, n_wl))
    eigenvalues = check.array(diag, "eigenvalues", "diagnostics", (loadings.shape[0],))
    if np.any(eigenvalues <= 0):
        raise check.fail("diagnostics.eigenvalues", "must all be positive")
    spectral = SpectralCheck(
        loadings=loadings.T.copy(),
        eigenvalues=eigenvalues,
        residual_eigenvalues=check.array(diag, "residual_eigenvalues", "diagnostics", (-1,)),
        alpha=float(check.number(diag, "alpha", "diagnostics")),
        n_training=n_check,
        q_limit=float(check.number(diag, "q_limit", "diagnostics", minimum=0)),
        t2_limit=float(check.number(diag, "t2_limit", "diagnostics", minimum=0)),
    )
    provenance = check.get(document, "provenance")
    if not isinstance(provenance, dict):
        raise check.fail("provenance", "is not a JSON object")

    model.wavelengths_ = grid
    model.x_mean_ = x_mean
    model.component_models_ = component_models
    model.cv_ = cross_validation
    model.diagnostics_ = spectral
    model.components_ = components
    model.unit_ = unit
    model.training_names_ = scan_names
    model.provenance_ = {**provenance, "model_file": check.file}
    return model


def _component_model(entry: Any, where: str, name: str, n_wl: int, check: _Checker) -> ComponentModel:
    found = check.get(entry, "component", where)
    if found != name:
        raise check.fail(f"{where}.component", f"is {found!r} but the components list says {name!r}")
    latent = int(check.number(entry, "latent_variables", where, integer=True, minimum=1))
    score_ss = check.array(entry, "score_sum_squares", where, (latent,))
    if np.any(score_ss <= 0):
        raise check.fail(f"{where}.score_sum_squares", "must all be positive")
    low, high = check.array(entry, "training_range", where, (2,)).tolist()
    return ComponentModel(
        name=name,
        latent_variables=latent,
        coefficients=check.array(entry, "coefficients", where, (n_wl,)),
        intercept=float(check.number(entry, "intercept", where)),
        x_weights=check.array(entry, "x_weights", where, (latent, n_wl)).T.copy(),
        x_loadings=check.array(entry, "x_loadings", where, (latent, n_wl)).T.copy(),
        x_rotations=check.array(entry, "x_rotations", where, (latent, n_wl)).T.copy(),
        y_loadings=check.array(entry, "y_loadings", where, (latent,)),
        score_sum_squares=score_ss,
        rmsec=float(check.number(entry, "rmsec", where, minimum=0)),
        rmsecv=float(check.number(entry, "rmsecv", where, minimum=0)),
        training_range=(low, high),
    )
