"""Reference library files: versioned JSON, validated on load, never pickle.

Layout (format ``absolve-library``, version 1)::

    {"format": "absolve-library", "version": 1, "unit": "mg/L",
     "wavelengths_nm": [...],
     "components": [{"name": ..., "molar_mass": ..., "absorptivity": [...], "std_error": [...],
                     "calibration": {...}}],
     "linear_limit_absorbance": 1.2, "residual_dof": 14, "stray_light_fraction": 0.0,
     "noise_model": {"floor": ..., "proportional": ..., "correlation_length_nm": ...} | null,
     "provenance": {...}}
"""

from __future__ import annotations

import json
import math
import os
from pathlib import Path
from typing import Any

import numpy as np

from ..errors import AbsolveError
from ..library import ComponentCalibration, NoiseModel, ReferenceLibrary
from .files import atomic_write
from .json_document import load_json_document

__all__ = ["FORMAT_NAME", "FORMAT_VERSION", "library_to_json", "read_library", "write_library"]

FORMAT_NAME = "absolve-library"
FORMAT_VERSION = 1

# Plausibility limits, far beyond any real library, that keep absurd hand-edited numbers out of the
# linear algebra (where 1e300 overflows and a singular value decomposition of infinities never returns).
# The strongest absorbers reach a few 1e5 L mol^-1 cm^-1 (from memory), and mol/L gives the largest
# numbers of the units offered; noise above 10 absorbance units is no measurement; a correlation
# length of 10 um along wavelength makes neighbouring points identical within round-off.
MAX_ABSORPTIVITY = 1e7
_NOISE_LIMITS = {"floor": 10.0, "proportional": 10.0, "correlation_length_nm": 1e4}

_CALIBRATION_FIELDS = (
    "peak_wavelength_nm",
    "levels",
    "concentration_range",
    "r_squared",
    "intercept",
    "intercept_se",
    "intercept_p",
    "curvature_p",
    "lack_of_fit_p",
    "linear_limit_absorbance",
    "warnings",
)


def _finite_or_none(value: float | None) -> float | None:
    if value is None:
        return None
    number = float(value)
    return number if math.isfinite(number) else None


def library_to_json(library: ReferenceLibrary) -> str:
    """Serialise ``library`` to the versioned JSON text (stable key order, no timestamps but provenance's)."""
    components = []
    for row, info in enumerate(library.components):
        calibration: dict[str, Any] = {}
        for name in _CALIBRATION_FIELDS:
            value = getattr(info, name)
            if name == "concentration_range":
                value = None if value is None else [float(value[0]), float(value[1])]
            elif name == "warnings":
                value = list(value)
            elif name == "levels":
                value = int(value)
            else:
                value = _finite_or_none(value)
            calibration[name] = value
        components.append(
            {
                "name": info.name,
                "molar_mass": _finite_or_none(info.molar_mass),
                "absorptivity": [float(v) for v in library.absorptivity[row]],
                "std_error": [float(v) for v in library.std_error[row]],
                "calibration": calibration,
            }
        )
    noise = library.noise
    document = {
        "format": FORMAT_NAME,
        "version": FORMAT_VERSION,
        "unit": library.unit,
        "wavelengths_nm": [float(v) for v in library.wavelengths],
        "linear_limit_absorbance": _finite_or_none(library.linear_limit_absorbance),
        "residual_dof": int(library.residual_dof),
        "stray_light_fraction": float(library.stray_light),
        "screening_null_scale": float(library.screening_scale),
        "noise_model": None
        if noise is None
        else {"floor": noise.floor, "proportional": noise.proportional, "correlation_length_nm": noise.correlation_length_nm},
        "components": components,
        "provenance": dict(library.provenance),
    }
    return json.dumps(document, indent=1, allow_nan=False) + "\n"


def write_library(library: ReferenceLibrary, path: str | os.PathLike[str]) -> None:
    """Write ``library`` to ``path`` atomically."""
    atomic_write(path, library_to_json(library))


class _Reader:
    """Typed access to a parsed JSON document with messages naming the key."""

    def __init__(self, file: Path) -> None:
        self.file = file

    def fail(self, key: str, problem: str) -> AbsolveError:
        return AbsolveError(
            f"{key}: {problem}",
            fix="the library file is damaged or was edited by hand; rebuild it with 'absolve calibrate'",
            file=self.file,
        )

    def get(self, mapping: Any, key: str, where: str) -> Any:
        if not isinstance(mapping, dict) or key not in mapping:
            raise self.fail(where + key, "missing")
        return mapping[key]

    def number(self, value: Any, key: str, *, optional: bool = False, positive: bool = False, limit: float = math.inf) -> float | None:
        if value is None and optional:
            return None
        if isinstance(value, bool) or not isinstance(value, (int, float)) or not math.isfinite(value):
            raise self.fail(key, f"expected a finite number, found {value!r}"[:120])
        if positive and value <= 0:
            raise self.fail(key, f"must be positive, found {value!r}")
        if abs(value) > limit:
            raise self.fail(key, f"{value!r} is beyond any plausible value (at most {limit:g})")
        return float(value)

    def numbers(self, value: Any, key: str, length: int | None, *, limit: float = math.inf) -> np.ndarray:
        if not isinstance(value, list):
            raise self.fail(key, "expected a list of numbers")
        if length is not None and len(value) != length:
            raise self.fail(key, f"holds {len(value)} values for {length} wavelengths")
        try:
            array = np.array(value, dtype=np.float64)
        except (TypeError, ValueError):
            raise self.fail(key, "holds something that is not a number") from None
        if array.ndim != 1 or not np.all(np.isfinite(array)):
            raise self.fail(key, "must hold finite numbers only")
        if array.size and np.max(np.abs(array)) > limit:
            raise self.fail(key, f"holds {np.max(np.abs(array)):g}, beyond any plausible value (at most {limit:g})")
        return array


def read_library(path: str | os.PathLike[str]) -> ReferenceLibrary:
    """Read and validate a library file written by :func:`write_library`."""
    file = Path(path)
    document = load_json_document(file, what="library file", maker="absolve calibrate")
    read = _Reader(file)
    if not isinstance(document, dict) or document.get("format") != FORMAT_NAME:
        found = document.get("format") if isinstance(document, dict) else type(document).__name__
        raise AbsolveError(
            f"not an absolve library (format {found!r})",
            fix="pass a file written by 'absolve calibrate' (a PLS model goes to --model)",
            file=file,
        )
    version = document.get("version")
    if version != FORMAT_VERSION or isinstance(version, bool):
        raise AbsolveError(
            f"library format version {version!r} is not supported (this absolve reads version {FORMAT_VERSION})",
            fix="rebuild the library with this version of absolve, or upgrade absolve",
            file=file,
        )
    grid = read.numbers(read.get(document, "wavelengths_nm", ""), "wavelengths_nm", None)
    if grid.size < 2 or not np.all(np.diff(grid) > 0):
        raise read.fail("wavelengths_nm", "must hold at least two strictly increasing wavelengths")
    entries = read.get(document, "components", "")
    if not isinstance(entries, list) or not entries:
        raise read.fail("components", "expected a non-empty list")
    absorptivity, std_error, components = [], [], []
    for index, entry in enumerate(entries):
        where = f"components[{index}]."
        name = read.get(entry, "name", where)
        if not isinstance(name, str) or not name:
            raise read.fail(where + "name", "expected a non-empty text")
        absorptivity.append(read.numbers(read.get(entry, "absorptivity", where), where + "absorptivity", grid.size, limit=MAX_ABSORPTIVITY))
        errors = read.numbers(read.get(entry, "std_error", where), where + "std_error", grid.size, limit=MAX_ABSORPTIVITY)
        if np.any(errors < 0):
            raise read.fail(where + "std_error", "standard errors cannot be negative")
        std_error.append(errors)
        calibration = entry.get("calibration") or {}
        if not isinstance(calibration, dict):
            raise read.fail(where + "calibration", "expected an object")
        components.append(_component_from(read, name, entry, calibration, where))
    limit = read.number(document.get("linear_limit_absorbance"), "linear_limit_absorbance", optional=True, positive=True)
    noise_doc = document.get("noise_model")
    noise = None
    if noise_doc is not None:
        values = {key: read.number(read.get(noise_doc, key, "noise_model."), "noise_model." + key, limit=limit) for key, limit in _NOISE_LIMITS.items()}
        try:
            noise = NoiseModel(**values)  # type: ignore[arg-type]
        except AbsolveError as error:
            raise read.fail("noise_model", error.problem) from None
    dof = document.get("residual_dof", 0)
    if not isinstance(dof, int) or isinstance(dof, bool) or dof < 0:
        raise read.fail("residual_dof", f"expected a whole number >= 0, found {dof!r}")
    stray = read.number(document.get("stray_light_fraction", 0.0), "stray_light_fraction")
    screening_scale = read.number(document.get("screening_null_scale", 1.0), "screening_null_scale")
    provenance = document.get("provenance") or {}
    if not isinstance(provenance, dict):
        raise read.fail("provenance", "expected an object")
    try:
        return ReferenceLibrary(
            wavelengths=grid,
            absorptivity=np.vstack(absorptivity),
            std_error=np.vstack(std_error),
            unit=read.get(document, "unit", ""),
            components=tuple(components),
            linear_limit_absorbance=limit,
            noise=noise,
            stray_light=stray,  # type: ignore[arg-type]
            screening_scale=screening_scale,  # type: ignore[arg-type]
            residual_dof=dof,
            provenance=provenance,
        )
    except AbsolveError as error:
        raise error.located(file) from None


def _component_from(read: _Reader, name: str, entry: dict, calibration: dict, where: str) -> ComponentCalibration:
    values: dict[str, Any] = {}
    for key in ("peak_wavelength_nm", "r_squared", "intercept", "intercept_se", "intercept_p", "curvature_p", "lack_of_fit_p"):
        values[key] = read.number(calibration.get(key), where + "calibration." + key, optional=True)
    if values["peak_wavelength_nm"] is None:
        values["peak_wavelength_nm"] = float("nan")
    values["linear_limit_absorbance"] = read.number(
        calibration.get("linear_limit_absorbance"), where + "calibration.linear_limit_absorbance", optional=True, positive=True
    )
    levels = calibration.get("levels", 0)
    if not isinstance(levels, int) or isinstance(levels, bool) or levels < 0:
        raise read.fail(where + "calibration.levels", f"expected a whole number >= 0, found {levels!r}")
    span = calibration.get("concentration_range")
    if span is not None:
        if not isinstance(span, list) or len(span) != 2:
            raise read.fail(where + "calibration.concentration_range", "expected [low, high]")
        low = read.number(span[0], where + "calibration.concentration_range")
        high = read.number(span[1], where + "calibration.concentration_range")
        if not 0 <= low <= high:  # type: ignore[operator]
            raise read.fail(where + "calibration.concentration_range", "expected 0 <= low <= high")
        span = (low, high)
    warnings = calibration.get("warnings", [])
    if not isinstance(warnings, list) or not all(isinstance(w, str) for w in warnings):
        raise read.fail(where + "calibration.warnings", "expected a list of texts")
    return ComponentCalibration(
        name=name,
        molar_mass=read.number(entry.get("molar_mass"), where + "molar_mass", optional=True, positive=True),
        levels=levels,
        concentration_range=span,
        warnings=tuple(warnings),
        **values,
    )
