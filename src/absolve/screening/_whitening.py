"""Whitening by the noise model: heteroscedastic scaling, then the Prais-Winsten AR(1) transform.

Also its inverse (one scan at a time) and its adjoint (template coordinates for the diagnosis).
"""

from __future__ import annotations

import numpy as np
import scipy.linalg
from numpy.typing import ArrayLike, NDArray

from ..errors import AbsolveError
from ..library import NoiseModel
from ._checks import _as_float, _check_grid, _check_noise, _usable_points

(_gbsv,) = scipy.linalg.get_lapack_funcs(("gbsv",), dtype=np.float64)


def _ar_links(
    grid: NDArray[np.float64], usable: NDArray[np.bool_], correlation_length_nm: float
) -> tuple[NDArray[np.float64], NDArray[np.intp], NDArray[np.bool_]]:
    """AR(1) coefficient linking each usable point to the previous usable one, that point's index,
    and whether such a previous point exists."""
    index = np.arange(grid.size)
    last = np.maximum.accumulate(np.where(usable, index, -1), axis=1)
    previous = np.full_like(last, -1)
    previous[:, 1:] = last[:, :-1]
    linked = usable & (previous >= 0)
    previous = np.maximum(previous, 0)
    if correlation_length_nm <= 0:
        return np.zeros(usable.shape), previous, linked
    gap = grid[None, :] - grid[previous]
    return np.where(linked, np.exp(-gap / correlation_length_nm), 0.0), previous, linked


def prewhiten(
    wavelengths: ArrayLike,
    values: ArrayLike,
    level: ArrayLike,
    noise: NoiseModel,
    *,
    usable: ArrayLike | None = None,
) -> NDArray[np.float64]:
    """Transform residual-like values so that modelled noise becomes independent unit-variance noise.

    Each point is divided by the noise standard deviation at absorbance
    ``level`` (heteroscedastic scaling), then the AR(1) correlation along
    wavelength is removed with the Prais-Winsten transform
    ``w_j = (z_j - rho_j z_{j-1}) / sqrt(1 - rho_j**2)``, ``rho_j = exp(-gap_j / L)``,
    linking each usable point to the previous usable one. This is the inverse
    Cholesky factor of the noise covariance: if ``v = D e`` with ``e`` AR(1),
    the output is independent N(0, 1). Unusable points come out as 0 so they
    drop out of every sum of squares.

    Parameters
    ----------
    wavelengths : array_like, shape (n_wavelengths,)
        Increasing grid in nm.
    values : array_like, shape (n_scans, n_wavelengths) or (n_scans, n_wavelengths, n_columns)
        Residuals, or design columns to transform the same way.
    level : array_like, shape (n_scans, n_wavelengths)
        Absorbance the noise standard deviation is evaluated at (the fitted absorbance).
    noise : NoiseModel
        Instrument noise model (floor must be > 0).
    usable : array_like of bool, shape (n_scans, n_wavelengths), optional
        Points to use; non-finite ``level`` points are unusable too.

    Returns
    -------
    ndarray, same shape as ``values``
        Whitened values (0 at unusable points).

    Examples
    --------
    >>> from absolve.library import NoiseModel
    >>> w = prewhiten([400, 401, 402], [[0.002, 0.002, 0.002]], [[0.0, 0.0, 0.0]], NoiseModel(0.002, 0.0, 0.0))
    >>> w.round(6).tolist()
    [[1.0, 1.0, 1.0]]
    """
    grid = _check_grid(wavelengths)
    noise = _check_noise(noise)
    data = _as_float("values", values, (2, 3))
    lev = _as_float("level", level, 2)
    if lev.shape[1] != grid.size or data.shape[:2] != lev.shape:
        raise AbsolveError(
            f"values {data.shape} and level {lev.shape} do not match {grid.size} wavelengths",
            fix="give one row per scan on the wavelength grid",
        )
    mask = _usable_points(usable, lev.shape, lev)
    rho, previous, _ = _ar_links(grid, mask, noise.correlation_length_nm)
    return _whiten(data, _noise_sd(noise, lev, mask), mask, rho, previous)


def _noise_sd(
    noise: NoiseModel, level: NDArray[np.float64], mask: NDArray[np.bool_], extra_variance: NDArray[np.float64] | None = None
) -> NDArray[np.float64]:
    """Noise standard deviation at each point: the model at ``level``, plus any extra variance."""
    sd = noise.standard_deviation(np.where(mask, level, 0.0))
    if extra_variance is None:
        return sd
    return np.sqrt(sd**2 + np.where(mask, extra_variance, 0.0))


def _whiten(
    data: NDArray[np.float64],
    sd: NDArray[np.float64],
    mask: NDArray[np.bool_],
    rho: NDArray[np.float64],
    previous: NDArray[np.intp],
) -> NDArray[np.float64]:
    """Prais-Winsten whitening of (n, n_wl) or (n, n_wl, q) values with point standard deviations ``sd``; 0 at unusable points."""
    scans = np.arange(data.shape[0])[:, None]
    if data.ndim == 3:
        sd, rho, mask = sd[..., None], rho[..., None], mask[..., None]
    z = np.where(mask, data, 0.0)
    z /= sd
    # In place: temporaries of a block's size cost several times the arithmetic (fresh pages). The
    # previous points are gathered by (scan, point) pairs, whole rows of q at a time: an index array
    # of the data's full size (take_along_axis) costs more than the arithmetic.
    out = z[scans, previous]
    out *= rho
    np.subtract(z, out, out=out)
    out /= np.sqrt(1.0 - rho**2)
    np.copyto(out, 0.0, where=~mask)
    return out


def _unwhiten(
    whitened: NDArray[np.float64], sd: NDArray[np.float64], rho: NDArray[np.float64], mask: NDArray[np.bool_]
) -> NDArray[np.float64]:
    """Invert :func:`_whiten` for one scan (NaN at unusable points)."""
    rows = np.flatnonzero(mask)
    s, r, w = sd[rows], rho[rows], whitened[rows]
    root = np.sqrt(1.0 - r**2)
    # The whitening matrix is lower bidiagonal over the usable points; in LAPACK's band storage the first
    # row is room for the fill-in of pivoting. Solved by LAPACK directly, as scipy.linalg.solve_banded
    # does: its checks and wrapping cost some 50 times the solve of a few hundred points.
    banded = np.zeros((3, rows.size))
    banded[1] = 1.0 / (s * root)
    banded[2, :-1] = -r[1:] / (s[:-1] * root[1:])
    _, _, solution, info = _gbsv(1, 0, banded, w, overwrite_ab=True)
    if info != 0:
        raise np.linalg.LinAlgError("singular whitening matrix")
    out = np.full(sd.shape, np.nan)
    out[rows] = solution
    return out


def _whiten_adjoint(
    g: NDArray[np.float64], sd: NDArray[np.float64], rho: NDArray[np.float64], previous: NDArray[np.intp],
    linked: NDArray[np.bool_], mask: NDArray[np.bool_],
) -> NDArray[np.float64]:
    """``W.T @ g`` for each scan's whitening matrix W, g of shape (n, n_wl, k).

    Whitening many templates ``t`` and taking coordinates ``G.T @ W @ t`` is the
    same as ``(W.T @ G).T @ t``: one pass over the k basis vectors instead of one
    per template.
    """
    root = np.sqrt(1.0 - rho**2)
    out = np.where(mask[..., None], g / (sd * root)[..., None], 0.0)
    scans = np.arange(g.shape[0])[:, None]
    # Row j of W is 1 / (sd_j root_j) at j and -rho_j / (root_j sd_b) at the usable point b before it,
    # so point b also takes a share of g at the point linked back to it, its successor (at most one).
    # Gathered by (scan, point) pairs, whole rows of k at a time: scattering into out costs more.
    scan, j = np.nonzero(linked)
    successor = np.zeros(previous.shape, dtype=np.intp)
    successor[scan, previous[scan, j]] = j
    followed = np.zeros(previous.shape, dtype=bool)
    followed[scan, previous[scan, j]] = True
    weight = rho / (root * sd[scans, previous])
    share = weight[scans, successor][..., None] * g[scans, successor]
    np.subtract(out, share, out=out, where=followed[..., None])
    return out
