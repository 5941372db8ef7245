"""The block-wise shortcuts of absolve.screening against straightforward dense computations.

The whitening primitives gather neighbouring points instead of building the
whitening matrix, the smooth projection inverts one Gram matrix per pattern of
usable points, and the diagnosis matches a shape family for a block of scans at
once. Each is checked here against its definition: the whitening matrix is the
inverse of the lower Cholesky factor (scipy) of the AR(1) covariance over the
usable points, the projection is a least-squares fit per scan (numpy), and a
block's matches are those of each scan matched alone. The masks have gaps, cut
ends and a usable point standing alone between two gaps.
"""

from __future__ import annotations

import numpy as np
import pytest
import scipy.linalg

from absolve.library import NoiseModel
from absolve.screening import smooth_basis
from absolve.screening._diagnosis import _NULL_TABLE, _Family, _match
from absolve.screening._subspaces import _smooth_projection
from absolve.screening._whitening import (
    _ar_links,
    _noise_sd,
    _unwhiten,
    _whiten,
    _whiten_adjoint,
)

GRID = np.arange(400.0, 461.0)
# Invented but typical instrument magnitudes (common practice, no source).
NOISE = NoiseModel(0.0015, 0.004, 3.0)


def masks() -> np.ndarray:
    """Usable points of four scans: all, a gap, cut ends, and a lone usable point between two gaps."""
    usable = np.ones((4, GRID.size), dtype=bool)
    usable[1, 20:26] = False
    usable[2, :3] = False
    usable[2, -1] = False
    usable[3, 27:30] = False
    usable[3, 31:34] = False
    return usable


def whitening_matrix(sd: np.ndarray, usable: np.ndarray) -> np.ndarray:
    """Inverse lower Cholesky factor of the AR(1) covariance of one scan's usable points (their rows and columns only)."""
    x, s = GRID[usable], sd[usable]
    covariance = np.outer(s, s) * np.exp(-np.abs(x[:, None] - x[None, :]) / NOISE.correlation_length_nm)
    factor = scipy.linalg.cholesky(covariance, lower=True)
    return scipy.linalg.solve_triangular(factor, np.eye(x.size), lower=True)


def geometry() -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """Usable points, point standard deviations and the AR(1) links of the four scans."""
    usable = masks()
    level = np.random.default_rng(1).uniform(0.0, 1.5, usable.shape)
    rho, previous, linked = _ar_links(GRID, usable, NOISE.correlation_length_nm)
    return usable, _noise_sd(NOISE, level, usable), rho, previous, linked


def test_whitening_of_columns_equals_the_inverse_cholesky_factor() -> None:
    usable, sd, rho, previous, _ = geometry()
    data = np.random.default_rng(2).standard_normal(usable.shape + (5,))
    white = _whiten(data, sd, usable, rho, previous)
    for i, rows in enumerate(usable):
        np.testing.assert_allclose(white[i, rows], whitening_matrix(sd[i], rows) @ data[i, rows], rtol=1e-10, atol=1e-10)
        assert np.all(white[i, ~rows] == 0.0)


def test_adjoint_equals_the_transposed_whitening_matrix() -> None:
    usable, sd, rho, previous, linked = geometry()
    g = np.random.default_rng(3).standard_normal(usable.shape + (4,))
    adjoint = _whiten_adjoint(g, sd, rho, previous, linked, usable)
    for i, rows in enumerate(usable):
        np.testing.assert_allclose(adjoint[i, rows], whitening_matrix(sd[i], rows).T @ g[i, rows], rtol=1e-10, atol=1e-10)
        assert np.all(adjoint[i, ~rows] == 0.0)


def test_unwhitening_solves_the_whitening() -> None:
    usable, sd, rho, previous, _ = geometry()
    values = np.random.default_rng(4).standard_normal(usable.shape)
    white = _whiten(values, sd, usable, rho, previous)
    for i, rows in enumerate(usable):
        back = _unwhiten(white[i], sd[i], rho[i], rows)
        # Reference: the dense triangular solve with the Cholesky factor (scipy).
        np.testing.assert_allclose(back[rows], scipy.linalg.solve(whitening_matrix(sd[i], rows), white[i, rows]), rtol=1e-9)
        np.testing.assert_allclose(back[rows], values[i, rows], rtol=1e-9, atol=1e-12)
        assert np.all(np.isnan(back[~rows]))


def test_smooth_projection_per_pattern_equals_least_squares_per_scan() -> None:
    rng = np.random.default_rng(5)
    usable = masks()[[0, 1, 0, 3, 2, 1]]  # patterns met twice, apart from each other
    design = rng.standard_normal(usable.shape + (3,))
    basis = smooth_basis(GRID, 6)
    projection = _smooth_projection(design, basis, usable)
    for i, rows in enumerate(usable):
        coefficients = np.linalg.lstsq(basis[rows], design[i, rows], rcond=None)[0]
        np.testing.assert_allclose(projection[i], basis @ coefficients, rtol=1e-9, atol=1e-12)


@pytest.mark.parametrize("n_shapes", [1, 7, _NULL_TABLE // 200 + 1])
@pytest.mark.parametrize("positive", [True, False])
def test_block_matches_are_those_of_each_scan_alone(n_shapes: int, positive: bool) -> None:
    rng = np.random.default_rng(6)
    n_scans, k, n_draws = 5, 6, 200
    tau = rng.standard_normal((n_scans, k, n_shapes))
    tau[1, :, 0] = 0.0  # a shape the scan's subspace cannot see
    coords = rng.standard_normal((n_scans, k))
    noise_var = rng.uniform(0.5, 2.0, n_scans)
    null_draws = rng.standard_normal((n_scans, n_draws, k)) * np.sqrt(noise_var)[:, None, None]
    kind = "foreign-band" if positive else "wavelength-shift"
    family = _Family(kind, rng.standard_normal((n_shapes, GRID.size)), {"index": np.arange(n_shapes)}, positive)
    block = _match(family, tau, coords, noise_var, null_draws)
    for i in range(n_scans):
        (alone,) = _match(family, tau[i : i + 1], coords[i : i + 1], noise_var[i : i + 1], null_draws[i : i + 1])
        found = block[i]
        assert (found.explained, found.null_explained, found.amplitude, found.amplitude_se) == (
            alone.explained, alone.null_explained, alone.amplitude, alone.amplitude_se,
        )
        assert found.detail == alone.detail
        assert np.array_equal(found.shape, alone.shape)
        # The definition: the best least-squares amplitude over the shapes, and the mean best of the null draws.
        norm = np.linalg.norm(tau[i], axis=0)
        seen = norm > 0
        z = np.where(seen, coords[i] @ tau[i] / np.where(seen, norm, 1.0), 0.0)
        z_null = np.where(seen, null_draws[i] @ tau[i] / np.where(seen, norm, 1.0), 0.0)
        if positive:
            z, z_null = np.maximum(z, 0.0), np.maximum(z_null, 0.0)
        np.testing.assert_allclose(found.explained, np.max(z**2), rtol=1e-12)
        np.testing.assert_allclose(found.null_explained, np.mean(np.max(z_null**2, axis=1)), rtol=1e-12)
        np.testing.assert_array_equal(found.shape, family.shapes[int(found.detail["index"])])
