"""Correlated, absorbance-dependent noise along wavelength: covariance and whitening.

Residual noise of a spectrophotometer is modelled as heteroscedastic
first-order autoregressive (AR(1)) along the used wavelengths: standard
deviation ``sigma_t`` per point and correlation ``phi_t`` between point
``t - 1`` and ``t``, ``phi_t = exp(-gap_t / L)`` for a gap of ``gap_t`` nm
and correlation length ``L`` (gaps left by excluded points are handled
exactly). With ``R`` the AR(1) correlation matrix and ``R = C C^T`` its
Cholesky factor, ``x = C e`` turns white noise ``e`` into AR(1) noise; the
inverse is the Prais-Winsten transform. Both are O(n) recursions, so a
batch of scans never forms an n x n matrix.
"""

from __future__ import annotations

import numpy as np
import scipy.linalg
from numpy.typing import NDArray

__all__ = ["ar1_coefficients", "whiten", "correlated_norm_squared", "correlated_squared_norms", "correlated_weighted_norms", "effective_points"]

# From this many rows on, the recursion over wavelength beats a banded solve (16 ms against 46 ms
# for 8192 rows of 400 points; 0.5 ms against 0.3 ms for 16 rows).
_LOOP_ROWS = 256


def ar1_coefficients(wavelengths: NDArray[np.float64], correlation_length_nm: float) -> NDArray[np.float64]:
    """Lag-one correlation ``phi_t`` between consecutive points (``phi_0 = 0``), shape (n,)."""
    phi = np.zeros(wavelengths.size)
    if correlation_length_nm > 0 and wavelengths.size > 1:
        phi[1:] = np.exp(-np.diff(wavelengths) / correlation_length_nm)
    return np.minimum(phi, 0.999)


def whiten(standardised: NDArray[np.float64], phi: NDArray[np.float64]) -> NDArray[np.float64]:
    """Prais-Winsten transform of AR(1) rows (last axis): returns white, unit-variance rows.

    ``standardised`` holds values already divided by their standard deviation.
    """
    out = np.empty_like(standardised)
    out[..., 0] = standardised[..., 0]
    scale = np.sqrt(1.0 - phi[1:] ** 2)
    out[..., 1:] = (standardised[..., 1:] - phi[1:] * standardised[..., :-1]) / scale
    return out


def correlated_norm_squared(rows: NDArray[np.float64], phi: NDArray[np.float64]) -> NDArray[np.float64]:
    """Inner products ``v R w^T`` for all pairs of rows along the second-to-last axis.

    ``rows`` has shape (..., m, n); the result (..., m, m) is ``rows R rows^T``
    with ``R`` the AR(1) correlation matrix of ``phi``. Computed as
    ``(rows C)(rows C)^T`` where ``rows C`` is a backward recursion.
    """
    transformed = _cholesky_product(rows, phi)
    return np.einsum("...it,...jt->...ij", transformed, transformed)


def correlated_squared_norms(rows: NDArray[np.float64], phi: NDArray[np.float64]) -> NDArray[np.float64]:
    """``v R v^T`` for every row: the diagonal of :func:`correlated_norm_squared`, shape (..., m)."""
    transformed = _cholesky_product(rows, phi)
    return np.einsum("...t,...t->...", transformed, transformed)


def correlated_weighted_norms(rows: NDArray[np.float64], weights: NDArray[np.float64], phi: NDArray[np.float64]) -> NDArray[np.float64]:
    """``v R v^T`` for every product ``v = weights[i] * rows[j]``: shape (n_weights, n_rows).

    ``rows`` (q, n) and ``weights`` (m, n), e.g. pseudo-inverse rows and each
    scan's noise standard deviations. The products are laid out
    wavelength-major from the start, so the recursion of
    :func:`correlated_squared_norms` reads contiguous memory and no
    transposed copy is made.
    """
    n = rows.shape[-1]
    if weights.shape[0] * rows.shape[0] < _LOOP_ROWS:
        return correlated_squared_norms(weights[:, None, :] * rows[None, :, :], phi)
    accumulated = weights.T[:, :, None] * rows.T[:, None, :]
    for t in range(n - 2, -1, -1):
        accumulated[t] += phi[t + 1] * accumulated[t + 1]
    factor = np.ones(n)
    factor[1:] = np.sqrt(1.0 - phi[1:] ** 2)
    accumulated *= factor[:, None, None]
    return np.einsum("tij,tij->ij", accumulated, accumulated)


def _cholesky_product(rows: NDArray[np.float64], phi: NDArray[np.float64]) -> NDArray[np.float64]:
    """``rows C`` with ``R = C C^T``, same shape as ``rows``.

    The backward recursion ``a_t = v_t + phi_{t+1} a_{t+1}`` runs over
    wavelength with all rows at once, on a wavelength-major copy so that each
    step reads contiguous memory; for a few rows, where the Python step per
    wavelength would dominate, LAPACK solves the same unit upper-bidiagonal
    system (the same operations in the same order).
    """
    n = rows.shape[-1]
    flat = np.reshape(rows, (-1, n))
    if flat.shape[0] == 0:
        return np.zeros(rows.shape)
    if flat.shape[0] < _LOOP_ROWS:
        bands = np.ones((2, n))
        bands[0, 0] = 0.0
        bands[0, 1:] = -phi[1:]
        accumulated = scipy.linalg.solve_banded((0, 1), bands, flat.T, check_finite=False)
    else:
        accumulated = np.array(flat.T, order="C")
        for t in range(n - 2, -1, -1):
            accumulated[t] += phi[t + 1] * accumulated[t + 1]
    factor = np.ones(n)
    factor[1:] = np.sqrt(1.0 - phi[1:] ** 2)
    return np.reshape(accumulated.T * factor, rows.shape)


def effective_points(phi: NDArray[np.float64]) -> float:
    """Number of independent points the correlated ones are worth: sum of (1 - phi)/(1 + phi)."""
    return float(1.0 + np.sum((1.0 - phi[1:]) / (1.0 + phi[1:])))
