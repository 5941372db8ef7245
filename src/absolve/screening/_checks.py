"""Validation of the screen's inputs at the boundary: arrays, grid, noise model, design, usable points."""

from __future__ import annotations

import numpy as np
from numpy.typing import ArrayLike, NDArray

from ..errors import AbsolveError
from ..library import NoiseModel


def _check_alpha(alpha: float) -> float:
    if not (isinstance(alpha, (int, float)) and 0.0 < float(alpha) < 1.0):
        raise AbsolveError(f"alpha must be a number between 0 and 1, got {alpha!r}", fix="use e.g. alpha=0.05")
    return float(alpha)


def _as_float(name: str, value: ArrayLike, ndim: int | tuple[int, ...]) -> NDArray[np.float64]:
    array = np.array(value, dtype=np.float64)
    allowed = (ndim,) if isinstance(ndim, int) else ndim
    if array.ndim not in allowed:
        raise AbsolveError(
            f"{name} must be a {' or '.join(f'{d}-D' for d in allowed)} array, got shape {array.shape}"
        )
    return array


def _check_grid(wavelengths: ArrayLike) -> NDArray[np.float64]:
    grid = _as_float("wavelengths", wavelengths, 1)
    if grid.size < 3 or not np.all(np.isfinite(grid)) or not np.all(np.diff(grid) > 0):
        raise AbsolveError("wavelengths must be at least three finite values, strictly increasing (nm)")
    return grid


def _check_noise(noise: NoiseModel) -> NoiseModel:
    if not isinstance(noise, NoiseModel):
        raise AbsolveError(
            f"noise must be a NoiseModel, got {type(noise).__name__}",
            fix="calibrate a library from standards, or give NoiseModel(floor, proportional, correlation_length_nm)",
        )
    if noise.floor <= 0:
        raise AbsolveError(
            "screening needs a noise model with floor > 0 (zero noise at zero absorbance gives infinite weight)",
            fix="set the noise floor to the instrument's baseline noise",
        )
    return noise


def _check_design(design: ArrayLike, n_scans: int, n_wl: int) -> NDArray[np.float64]:
    x = _as_float("design", design, (2, 3))
    if x.ndim == 2:
        x = x[None]
    if x.shape[1] != n_wl or x.shape[0] not in (1, n_scans) or x.shape[2] < 1:
        raise AbsolveError(
            f"design of shape {np.shape(design)} does not fit {n_scans} scans x {n_wl} wavelengths",
            fix="give the fit's design matrix as (n_wavelengths, n_columns) or (n_scans, n_wavelengths, n_columns)",
        )
    if not np.all(np.isfinite(x)):
        raise AbsolveError("design matrix holds NaN or infinite values", fix="build it from finite absorptivities")
    return np.broadcast_to(x, (n_scans, n_wl, x.shape[2]))


def _usable_points(
    usable: ArrayLike | None, shape: tuple[int, int], *arrays: NDArray[np.float64]
) -> NDArray[np.bool_]:
    """Points to use: the caller's mask, minus any non-finite value (NaN marks an unusable point)."""
    mask = np.ones(shape, dtype=bool)
    if usable is not None:
        given = np.asarray(usable)
        if given.shape != shape or given.dtype != np.bool_:
            raise AbsolveError(f"usable must be a boolean array of shape {shape}, got {given.dtype} {given.shape}")
        mask &= given
    for array in arrays:
        mask &= np.isfinite(array)
    return mask
