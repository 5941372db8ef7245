"""Correlated noise along wavelength: AR(1) covariance products, whitening, effective number of points.

References: the AR(1) autocorrelation exp(-lag / L) between points a lag apart, and its Cholesky
factor as the generator of AR(1) noise (any time-series text, e.g. Box, Jenkins & Reinsel, *Time
Series Analysis*, ch. 3); dense matrices built with numpy are the reference values.
"""

from __future__ import annotations

import numpy as np
import pytest
from scipy import linalg

from absolve.noise import ar1_coefficients, correlated_norm_squared, effective_points, whiten

# An uneven grid with a gap, as left by excluded points.
UNEVEN = np.concatenate([np.arange(400.0, 430.0, 1.0), np.arange(437.0, 470.0, 2.0), [471.5, 473.0]])


def _dense_correlation(grid: np.ndarray, length: float) -> np.ndarray:
    """AR(1) correlation matrix R_ij = exp(-|x_i - x_j| / L), built densely with numpy."""
    return np.exp(-np.abs(grid[:, None] - grid[None, :]) / length)


def test_ar1_coefficients_follow_the_gaps() -> None:
    phi = ar1_coefficients(UNEVEN, 3.0)
    assert phi[0] == 0.0
    np.testing.assert_allclose(phi[1:], np.exp(-np.diff(UNEVEN) / 3.0), rtol=1e-14)
    assert np.all(ar1_coefficients(UNEVEN, 0.0) == 0.0)


@pytest.mark.parametrize("length", [0.0, 0.7, 3.0, 25.0])
def test_correlated_norm_squared_equals_dense_v_r_vt(length: float) -> None:
    rng = np.random.default_rng(11)
    rows = rng.standard_normal((2, 4, UNEVEN.size))
    phi = ar1_coefficients(UNEVEN, length)
    dense = np.eye(UNEVEN.size) if length == 0 else _dense_correlation(UNEVEN, length)
    expected = rows @ dense @ np.swapaxes(rows, -1, -2)  # numpy, dense
    np.testing.assert_allclose(correlated_norm_squared(rows, phi), expected, rtol=1e-10, atol=1e-12)
    assert rows.shape == (2, 4, UNEVEN.size)  # no reshaping of the caller's array


def test_whitening_inverts_the_cholesky_factor_exactly() -> None:
    # x = C e with R = C C^T (numpy Cholesky); the Prais-Winsten transform must return e.
    rng = np.random.default_rng(12)
    length = 4.0
    factor = np.linalg.cholesky(_dense_correlation(UNEVEN, length))
    white = rng.standard_normal((5, UNEVEN.size))
    coloured = white @ factor.T
    kept = coloured.copy()
    np.testing.assert_allclose(whiten(coloured, ar1_coefficients(UNEVEN, length)), white, rtol=1e-9, atol=1e-9)
    np.testing.assert_allclose(linalg.solve_triangular(factor, coloured.T, lower=True).T, white, atol=1e-9)
    assert np.array_equal(coloured, kept)


def test_whitened_simulated_ar1_noise_is_white_with_unit_variance() -> None:
    # AR(1) noise drawn by numpy from the dense covariance, not by the project's own generator.
    rng = np.random.default_rng(13)
    grid = np.arange(400.0, 520.0, 1.0)
    length = 3.0
    samples = rng.multivariate_normal(np.zeros(grid.size), _dense_correlation(grid, length), size=4000)
    lag_one = np.mean(samples[:, 1:] * samples[:, :-1])
    assert lag_one == pytest.approx(np.exp(-1.0 / length), abs=0.02)  # the input really is correlated
    white = whiten(samples, ar1_coefficients(grid, length))
    covariance = np.cov(white, rowvar=False)
    # Sampling error of a covariance entry from 4000 draws is about 1/sqrt(4000) = 0.016.
    np.testing.assert_allclose(np.diag(covariance), 1.0, atol=0.08)
    off_diagonal = covariance[~np.eye(grid.size, dtype=bool)]
    assert np.max(np.abs(off_diagonal)) < 0.08
    assert abs(np.mean(np.diag(covariance, k=1))) < 0.01


@pytest.mark.parametrize("rho", [0.0, 0.3, 0.8])
def test_effective_points_match_the_variance_of_the_mean(rho: float) -> None:
    # For a stationary AR(1) series the mean of n points has variance (1^T R 1) / n^2, i.e. the
    # mean is worth n^2 / (1^T R 1) independent points; for large n that is n (1 - rho) / (1 + rho).
    n = 2000
    grid = np.arange(float(n))
    phi = np.full(n, rho)
    phi[0] = 0.0
    dense = np.eye(n) if rho == 0 else rho ** np.abs(grid[:, None] - grid[None, :])
    reference = n**2 / dense.sum()
    assert effective_points(phi) == pytest.approx(reference, rel=0.01)
    assert effective_points(phi) <= n
