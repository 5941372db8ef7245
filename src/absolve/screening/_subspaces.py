"""Whitened geometry of a block of scans: the design, its guard, the smooth cosine subspace.

Also the cosine basis itself and the grouping of scans by their usable points.
"""

from __future__ import annotations

import dataclasses
from dataclasses import dataclass

import numpy as np
from numpy.typing import ArrayLike, NDArray

from ..errors import AbsolveError
from ..library import NoiseModel
from ._checks import _check_grid
from ._whitening import _ar_links, _noise_sd, _whiten

# Singular values below this fraction of a matrix's Frobenius norm count as zero.
_RANK_TOL = 1e-9
# Gram-matrix eigenvalues (squared singular values) below this fraction of the squared norm count as
# zero; well above the rounding of the Gram subtraction (about 1e-16 of the norm squared).
_GRAM_TOL = 1e-12
# Width of the narrowest structure the default cosine basis resolves, in nm.
_SMOOTH_SCALE_NM = 15.0


def smooth_basis(wavelengths: ArrayLike, n_terms: int) -> NDArray[np.float64]:
    """Cosine basis for smooth structure along wavelength, shape (n_wavelengths, n_terms).

    Column k is ``cos(pi * k * x)`` with ``x`` running from 0 to 1 over the grid
    (the discrete cosine transform's basis evaluated at the actual wavelengths),
    so ``n_terms`` terms resolve features down to about ``2 * span / n_terms`` nm
    in period. Cosines have even leverage across the range (high-degree
    polynomials crowd at the ends).
    """
    grid = _check_grid(wavelengths)
    if not (isinstance(n_terms, (int, np.integer)) and n_terms >= 1):
        raise AbsolveError(f"the number of smooth terms must be a positive integer, got {n_terms!r}")
    x = (grid - grid[0]) / (grid[-1] - grid[0])
    return np.cos(np.pi * np.outer(x, np.arange(int(n_terms))))


def _default_terms(grid: NDArray[np.float64], n_columns: int) -> int:
    """Terms resolving features of about ``_SMOOTH_SCALE_NM``, leaving most points for the rough part."""
    by_scale = int(round((grid[-1] - grid[0]) / _SMOOTH_SCALE_NM))
    return min(max(by_scale, 4), 40, max(1, (grid.size - n_columns) // 3))


def _orthonormal_columns(matrix: NDArray[np.float64]) -> tuple[NDArray[np.float64], NDArray[np.int64]]:
    """Orthonormal basis of each stacked matrix's column space; columns beyond the rank are zeroed."""
    u, s, _ = np.linalg.svd(matrix, full_matrices=False)
    keep = s > _RANK_TOL * np.linalg.norm(matrix, axis=(1, 2))[:, None]
    return u * keep[:, None, :], keep.sum(axis=1)


@dataclass(frozen=True)
class _Subspaces:
    """Whitened geometry of a block of scans.

    The smooth subspace is held through the eigen-decomposition of its Gram
    matrix rather than an orthonormal basis: ``coords`` are the residual's
    coordinates in an orthonormal basis of it, which is all the test needs, and
    a k x k eigenproblem per scan is far cheaper than an SVD of the n_wl x k basis.
    """

    mask: NDArray[np.bool_]
    rho: NDArray[np.float64]
    previous: NDArray[np.intp]
    linked: NDArray[np.bool_]
    sd: NDArray[np.float64]
    noise: NoiseModel
    design_basis: NDArray[np.float64]  # (n, n_wl, p) orthonormal, zero columns beyond the rank
    design_rank: NDArray[np.int64]
    projected_smooth: NDArray[np.float64]  # (n, n_wl, k) whitened cosine basis projected off the design and its smooth part
    smooth_gram: NDArray[np.float64]  # (n, k, k) Gram matrix of the whitened cosine basis projected off the guard
    smooth_vectors: NDArray[np.float64]  # (n, k, k) Gram eigenvectors scaled by 1/sqrt(eigenvalue), 0 if dropped
    smooth_rank: NDArray[np.int64]
    residual: NDArray[np.float64]  # (n, n_wl) whitened residual projected off the design
    coords: NDArray[np.float64]  # (n, k) residual coordinates in the smooth subspace

    def one(self, i: int) -> _Subspaces:
        """The subspaces of scan ``i`` of the block alone (views, no copies)."""
        return _Subspaces(**{
            item.name: value if isinstance(value, NoiseModel) else value[i : i + 1]
            for item in dataclasses.fields(self)
            for value in (getattr(self, item.name),)
        })

    def smooth_orthonormal(self) -> NDArray[np.float64]:
        """Orthonormal bases (n, n_wl, k; zero columns beyond the rank) of the scans' smooth subspaces."""
        return self.projected_smooth @ self.smooth_vectors


def _smooth_projection(design: NDArray[np.float64], basis: NDArray[np.float64], mask: NDArray[np.bool_]) -> NDArray[np.float64]:
    """Least-squares projection of every design column onto the smooth basis over each scan's usable points.

    The basis's Gram matrix and its pseudo-inverse depend on the usable points only: made once per pattern.
    """
    projection = np.empty(design.shape)
    for points, rows in _point_patterns(mask):
        # Matrix products: a three-operand einsum does not use BLAS and is many times slower.
        weighted = basis.T * points
        inverse = np.linalg.pinv(weighted @ basis, hermitian=True)
        projection[rows] = basis @ (inverse @ (weighted @ design[rows]))
    return projection


def _subspaces(
    grid: NDArray[np.float64],
    residuals: NDArray[np.float64],
    fitted: NDArray[np.float64],
    design: NDArray[np.float64],
    mask: NDArray[np.bool_],
    basis: NDArray[np.float64],
    noise: NoiseModel,
    extra_variance: NDArray[np.float64] | None = None,
) -> _Subspaces:
    rho, previous, linked = _ar_links(grid, mask, noise.correlation_length_nm)
    sd = _noise_sd(noise, fitted, mask, extra_variance)
    white_design = _whiten(design, sd, mask, rho, previous)
    design_basis, design_rank = _orthonormal_columns(white_design)
    # The smooth subspace is kept clear of the design *and of its smooth part*.
    # A library estimated from noisy standards explains a sample as a noisy
    # version of its true, smooth spectrum; what is left over then lies along
    # the smooth part of the library spectra, and a test looking there would
    # mistake the calibration's noise for an interferent. Interferents shaped
    # like a smoothed library spectrum could not be told from a concentration
    # error anyway, so little power is lost.
    smooth_part = _smooth_projection(design, basis, mask)
    guard_basis, _ = _orthonormal_columns(np.concatenate([white_design, _whiten(smooth_part, sd, mask, rho, previous)], axis=2))
    white_smooth = _whiten(np.broadcast_to(basis, design.shape[:2] + basis.shape[1:]), sd, mask, rho, previous)
    # Gram matrix of the smooth basis after projection off the guard: S'S - (G'S)'(G'S).
    overlap = guard_basis.transpose(0, 2, 1) @ white_smooth
    gram = white_smooth.transpose(0, 2, 1) @ white_smooth - overlap.transpose(0, 2, 1) @ overlap
    values, vectors = np.linalg.eigh(gram)
    keep = values > _GRAM_TOL * np.einsum("nwk,nwk->n", white_smooth, white_smooth)[:, None]
    vectors = vectors * np.where(keep, 1.0 / np.sqrt(np.where(keep, values, 1.0)), 0.0)[:, None, :]
    white_residual = _whiten(residuals, sd, mask, rho, previous)
    along = np.einsum("nwp,nw->np", design_basis, white_residual)
    off_design = white_residual - np.einsum("nwp,np->nw", design_basis, along)
    projected_smooth = white_smooth - guard_basis @ overlap
    coords = np.einsum("nkj,nk->nj", vectors, np.einsum("nwk,nw->nk", projected_smooth, off_design))
    return _Subspaces(
        mask, rho, previous, linked, sd, noise, design_basis, design_rank, projected_smooth, gram, vectors, keep.sum(axis=1),
        off_design, coords,
    )


def _point_patterns(mask: NDArray[np.bool_]) -> list[tuple[NDArray[np.bool_], NDArray[np.intp]]]:
    """Distinct rows of ``mask`` with the scans (row indices, increasing) that have each.

    Rows are packed into 64-bit words and sorted by them: sorting rows as
    byte strings (``np.unique(..., axis=0)``) is many times slower.
    """
    n_rows = mask.shape[0]
    packed = np.packbits(mask, axis=1)
    words = np.zeros((n_rows, -(-packed.shape[1] // 8) * 8), dtype=np.uint8)
    words[:, : packed.shape[1]] = packed
    keys = words.view(np.uint64)
    order = np.lexsort(keys.T[::-1])  # stable: each pattern's rows stay in increasing order
    ordered = keys[order]
    starts = np.flatnonzero(np.concatenate([[True], np.any(ordered[1:] != ordered[:-1], axis=1)]))
    return [(mask[rows[0]], rows) for rows in np.split(order, starts[1:])]
