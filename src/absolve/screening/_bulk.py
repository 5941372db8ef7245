"""The per-scan energies the tests are made of, computed in bulk.

Scans sharing a design and their usable points share their geometry before whitening
(:class:`_PointGeometry`); the others take the general path of :func:`_subspaces`, a block at a time.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from numpy.typing import NDArray

from .._blas import one_blas_thread
from ..library import NoiseModel
from ._band_scan import _band_scan_statistic
from ._subspaces import _GRAM_TOL, _RANK_TOL, _point_patterns, _Subspaces, _subspaces

# Scans are processed in blocks so the stacked whitened bases stay small in memory.
_BLOCK = 256
# Scans per block of the shared-pattern path: its per-scan arrays are a few times n_wl x 32
# (about 6 MB for 128 scans of 400 points). Measured at 400 points: 128 a quarter faster than 512
# (whose arrays no longer stay in the processor's cache), 64 slower (more steps of Python per scan).
_GROUP_BLOCK = 128


@dataclass(frozen=True)
class _Sums:
    """Per-scan sums the tests are made of, filled block by block.

    ``energy``: whitened residual energy off the design; ``smooth_energy``: its
    share in the smooth subspace; ``dw_numerator``: the Durbin-Watson numerator;
    ``band_largest`` and ``band_length``: the band scan's statistic and curve
    length (:func:`_band_scan_statistic`); ``total_dof``
    and ``smooth_dof``: degrees of freedom off the design and in the smooth subspace.
    """

    energy: NDArray[np.float64]
    smooth_energy: NDArray[np.float64]
    dw_numerator: NDArray[np.float64]
    band_largest: NDArray[np.float64]
    band_length: NDArray[np.float64]
    total_dof: NDArray[np.int64]
    smooth_dof: NDArray[np.int64]

    @classmethod
    def empty(cls, n_scans: int) -> _Sums:
        floats = [np.empty(n_scans) for _ in range(5)]
        return cls(*floats, np.empty(n_scans, dtype=np.int64), np.empty(n_scans, dtype=np.int64))


def _energies(
    grid: NDArray[np.float64],
    resid: NDArray[np.float64],
    fit: NDArray[np.float64],
    x: NDArray[np.float64],
    mask: NDArray[np.bool_],
    basis: NDArray[np.float64],
    noise: NoiseModel,
    extra: NDArray[np.float64] | None,
    shared_design: bool,
    templates: NDArray[np.float64],
) -> _Sums:
    """Whitened residual energies, band scan and degrees of freedom of every scan (see :class:`_Sums`).

    Scans sharing the design and their usable points share every subspace
    before whitening, so those are found once per point pattern
    (:class:`_PointGeometry`); only the whitening differs from scan to scan.
    Per-scan designs, and patterns with too few points, take the general
    path of :func:`_subspaces`.
    """
    n_scans = resid.shape[0]
    sums = _Sums.empty(n_scans)
    general = np.ones(n_scans, dtype=bool)
    if shared_design:
        # One BLAS thread: on a busy machine a second one mostly waits (measured 2-3x slower with two).
        with one_blas_thread():
            _bulk_energies(grid, resid, fit, x[0], mask, basis, noise, extra, templates, sums, general)
    rows = np.flatnonzero(general)
    if rows.size:
        # Stacks of small matrices: BLAS threads only add synchronisation (tens of times slower on a busy machine).
        with one_blas_thread():
            for start in range(0, rows.size, _BLOCK):
                block = rows[start : start + _BLOCK]
                sub = _subspaces(grid, resid[block], fit[block], x[block], mask[block], basis, noise, None if extra is None else extra[block])
                u = sub.residual
                sums.energy[block] = np.einsum("nw,nw->n", u, u)
                sums.smooth_energy[block] = np.einsum("nk,nk->n", sub.coords, sub.coords)
                step = np.where(sub.linked, u - np.take_along_axis(u, sub.previous, axis=1), 0.0)
                sums.dw_numerator[block] = np.einsum("nw,nw->n", step, step)
                sums.total_dof[block] = sub.mask.sum(axis=1) - sub.design_rank
                sums.smooth_dof[block] = sub.smooth_rank
                sums.band_largest[block], sums.band_length[block] = _general_band_scan(sub, x[block], basis, templates)
    return sums


def _general_band_scan(
    sub: _Subspaces, design: NDArray[np.float64], basis: NDArray[np.float64], templates: NDArray[np.float64]
) -> tuple[NDArray[np.float64], NDArray[np.float64]]:
    """The band scan of a block of scans with their own designs or usable points.

    Each template is replaced by its least-squares fit ``D a + S b`` on the
    design and the cosine basis over the scan's usable points (as the bulk
    path's projection on its basis); whitened and projected off the guard, only
    ``S b`` remains, with coordinates ``V^T G b`` in the orthonormal basis of
    :meth:`_Subspaces.smooth_orthonormal` (``G`` the projected Gram matrix,
    ``V`` its scaled eigenvectors).
    """
    mask = sub.mask[:, :, None]
    p = design.shape[2]
    columns = np.where(mask, np.concatenate([design, np.broadcast_to(basis, design.shape[:2] + basis.shape[1:])], axis=2), 0.0)
    smooth_part = np.linalg.pinv(columns)[:, p:, :] @ np.where(mask, templates.T, 0.0)
    tau = np.einsum("nkj,nkt->njt", sub.smooth_gram @ sub.smooth_vectors, smooth_part)
    return _band_scan_statistic(
        np.einsum("nj,njt->nt", sub.coords, tau), np.einsum("njt,njt->nt", tau, tau),
        np.einsum("njt,njt->nt", tau[:, :, :-1], tau[:, :, 1:]),
    )


def _bulk_energies(
    grid: NDArray[np.float64], resid: NDArray[np.float64], fit: NDArray[np.float64], design: NDArray[np.float64],
    mask: NDArray[np.bool_], basis: NDArray[np.float64], noise: NoiseModel, extra: NDArray[np.float64] | None,
    templates: NDArray[np.float64], sums: _Sums, general: NDArray[np.bool_],
) -> None:
    """Fill ``sums`` for the scans the shared-pattern path can take, and clear their ``general`` mark."""
    for points, rows in _point_patterns(mask):
        geometry = _PointGeometry.build(grid, design, basis, points, noise.correlation_length_nm, templates)
        if geometry is None:
            continue
        for start in range(0, rows.size, _GROUP_BLOCK):
            sub = rows[start : start + _GROUP_BLOCK]
            found = geometry.energies(resid[sub], fit[sub], None if extra is None else extra[sub], noise)
            if found is None:
                continue
            sums.energy[sub], sums.smooth_energy[sub], sums.dw_numerator[sub], sums.band_largest[sub], sums.band_length[sub] = found
            sums.total_dof[sub] = geometry.n_points - geometry.design_rank
            sums.smooth_dof[sub] = geometry.smooth_rank
            general[sub] = False


@dataclass(frozen=True)
class _PointGeometry:
    """The subspaces of scans that share a design and their usable points, before whitening.

    ``basis`` is orthonormal and nested: its first ``design_rank`` columns
    span the design, the first ``guard_rank`` the design and its smooth part
    (the guard of :func:`_subspaces`), and all of them add the cosine basis.
    Whitening is an invertible map of the usable points, so it carries these
    spans onto the whitened ones :func:`_subspaces` builds scan by scan; ranks
    are decided here with the same relative tolerances. For one scan, with
    ``A = W basis`` (``W`` its whitening), ``H = A^T A = L L^T`` (Cholesky)
    and ``y = L^-1 A^T w`` for the whitened residual ``w``, the energy in the
    span of the first ``j`` columns is ``sum(y[:j]**2)``: the smooth energy
    is ``sum(y[guard_rank:]**2)``.

    ``W^T W = S^-1 T S^-1`` with ``S`` the point standard deviations and ``T``
    tridiagonal (the AR(1) precision), so every scan's ``H`` is a weighted sum
    of the fixed products ``b_t b_t^T`` and ``b_t b_{t+1}^T + b_{t+1} b_t^T``
    of basis rows: one matrix product for a whole block of scans.

    The band templates of the matched-filter scan enter through their
    coefficients ``c`` on the basis (least squares over the usable points,
    the same template :func:`_general_band_scan` tests). With ``L_ss`` the
    smooth block of ``L``, a template's smooth coordinates are ``L_ss^T c_s``,
    so ``<tau, y_s> = c_s^T (L_ss y_s)`` and
    ``|tau|**2 = c_s^T (H_ss - L_sg L_sg^T) c_s``: again one matrix product
    per block of scans, against fixed products of the coefficients.
    """

    points: NDArray[np.intp] | slice
    n_points: int
    basis: NDArray[np.float64]
    design_rank: int
    guard_rank: int
    smooth_rank: int
    rho: NDArray[np.float64]
    root: NDArray[np.float64]
    precision_diagonal: NDArray[np.float64]
    precision_off: NDArray[np.float64]
    products: NDArray[np.float64]  # (2 n_points - 1, r (r + 1) / 2), lower triangle row by row
    band_coefficients: NDArray[np.float64]  # (k, n_templates): the band templates on the smooth basis columns
    band_squares: NDArray[np.float64]  # (k (k + 1) / 2, n_templates): c_a c_b per smooth lower-triangle pair
    band_neighbours: NDArray[np.float64]  # (k (k + 1) / 2, n_templates - 1): the same for neighbouring templates
    smooth_pairs: NDArray[np.intp]  # positions of the smooth block's lower triangle in the packed Gram matrix

    @classmethod
    def build(
        cls, grid: NDArray[np.float64], design: NDArray[np.float64], basis: NDArray[np.float64], usable: NDArray[np.bool_],
        correlation_length_nm: float, templates: NDArray[np.float64],
    ) -> _PointGeometry | None:
        """The geometry of one point pattern; None when it has too few points for this path."""
        points = np.flatnonzero(usable)
        d, s = design[points], basis[points]
        if points.size <= d.shape[1] + s.shape[1]:
            return None
        # The smooth part of each design column over the usable points, as _smooth_projection.
        smooth = s @ (np.linalg.pinv(s.T @ s, hermitian=True) @ (s.T @ d))
        u_d, sv_d, _ = np.linalg.svd(d, full_matrices=False)
        design_rank = int(np.count_nonzero(sv_d > _RANK_TOL * np.linalg.norm(d)))
        guard = np.hstack([d, smooth])
        guard_rank = int(np.count_nonzero(np.linalg.svd(guard, compute_uv=False) > _RANK_TOL * np.linalg.norm(guard)))
        q_d = u_d[:, :design_rank]
        u_e = np.linalg.svd(smooth - q_d @ (q_d.T @ smooth), full_matrices=False)[0][:, : max(guard_rank - design_rank, 0)]
        q_g = np.hstack([q_d, u_e])
        u_f, sv_f, _ = np.linalg.svd(s - q_g @ (q_g.T @ s), full_matrices=False)
        smooth_rank = int(np.count_nonzero(sv_f**2 > _GRAM_TOL * np.einsum("wk,wk->", s, s)))
        nested = np.hstack([q_g, u_f[:, :smooth_rank]])
        rho = np.zeros(points.size)
        if correlation_length_nm > 0:
            rho[1:] = np.exp(-np.diff(grid[points]) / correlation_length_nm)
        c2 = 1.0 - rho**2
        diagonal = 1.0 / c2
        diagonal[:-1] += rho[1:] ** 2 / c2[1:]
        row, column = np.tril_indices(nested.shape[1])
        products = np.vstack([
            nested[:, row] * nested[:, column],
            nested[:-1, row] * nested[1:, column] + nested[1:, row] * nested[:-1, column],
        ])
        band = nested[:, q_g.shape[1] :].T @ templates[:, points].T
        a, b = np.tril_indices(smooth_rank)
        twice = np.where(a == b, 1.0, 2.0)[:, None]
        squares = twice * band[a] * band[b]
        neighbours = band[a, :-1] * band[b, 1:] + np.where(a == b, 0.0, 1.0)[:, None] * band[b, :-1] * band[a, 1:]
        g = q_g.shape[1]
        smooth_pairs = (a + g) * (a + g + 1) // 2 + b + g
        # A run of consecutive points is taken as a slice: no gathered copy of each block.
        span = slice(int(points[0]), int(points[-1]) + 1) if points[-1] - points[0] == points.size - 1 else points
        return cls(
            span, points.size, nested, design_rank, g, smooth_rank, rho, np.sqrt(c2), diagonal, -rho[1:] / c2[1:], products,
            band, squares, neighbours, smooth_pairs,
        )

    def _whiten(self, values: NDArray[np.float64], sd: NDArray[np.float64]) -> NDArray[np.float64]:
        """Prais-Winsten whitening of rows over the usable points (as :func:`_whiten`)."""
        z = values / sd
        out = np.empty_like(z)
        out[:, 0] = z[:, 0]
        # In place: temporaries of a block's size cost several times the arithmetic (fresh pages).
        linked = out[:, 1:]
        np.multiply(z[:, :-1], self.rho[1:], out=linked)
        np.subtract(z[:, 1:], linked, out=linked)
        linked /= self.root[1:]
        return out

    def energies(
        self, resid: NDArray[np.float64], fit: NDArray[np.float64], extra: NDArray[np.float64] | None, noise: NoiseModel
    ) -> tuple[NDArray[np.float64], ...] | None:
        """Energy off the design, smooth energy, Durbin-Watson numerator, largest band statistic and band-curve
        length (:func:`_band_scan_statistic`) of each scan; None if a Gram matrix is not positive definite.

        The Cholesky factor of ``[[H, g], [g^T, .]]`` with ``g = A^T w`` holds
        ``y = L^-1 g`` as its last row; it is computed for all scans at once,
        one column at a time.
        """
        p = self.points
        sd = noise.standard_deviation(fit[:, p])
        if extra is not None:
            sd = np.sqrt(sd**2 + extra[:, p])
        w = self._whiten(resid[:, p], sd)
        n_scans, n = w.shape
        inverse = 1.0 / sd
        weights = np.empty((n_scans, 2 * n - 1))
        np.square(inverse, out=weights[:, :n])
        weights[:, :n] *= self.precision_diagonal
        weights[:, n:] = self.precision_off * (inverse[:, :-1] * inverse[:, 1:])
        r = self.basis.shape[1]
        row, column = np.tril_indices(r)
        factor = np.zeros((n_scans, r + 1, r + 1))
        gram = weights @ self.products
        factor.reshape(n_scans, -1)[:, row * (r + 1) + column] = gram
        back = w / self.root  # W^T w = S^-1 L^T w, with L the bidiagonal AR(1) whitening
        ahead = self.rho[1:] * w[:, 1:]
        ahead /= self.root[1:]
        back[:, :-1] -= ahead
        factor[:, r, :r] = (back * inverse) @ self.basis
        for j in range(r):
            pivot = factor[:, j, j] - np.einsum("nk,nk->n", factor[:, j, :j], factor[:, j, :j])
            if not np.all(pivot > 0):
                return None
            factor[:, j, j] = np.sqrt(pivot)
            below = factor[:, j + 1 :, j] - np.einsum("nik,nk->ni", factor[:, j + 1 :, :j], factor[:, j, :j])
            factor[:, j + 1 :, j] = below / factor[:, j, j, None]
        y = factor[:, r, :r]
        k = self.design_rank
        if k:
            # Design coefficients of the whitened residual: back-substitution in the leading block.
            coefficients = np.empty((n_scans, k))
            for j in range(k - 1, -1, -1):
                coefficients[:, j] = (y[:, j] - np.einsum("nk,nk->n", factor[:, j + 1 : k, j], coefficients[:, j + 1 :])) / factor[:, j, j]
            w = w - self._whiten(coefficients @ self.basis[:, :k].T, sd)
        step = np.diff(w, axis=1)
        g = self.guard_rank
        smooth = y[:, g:]
        lower_ss = factor[:, g:r, g:r]
        # Smooth block of the Schur complement H / H_gg = L_ss L_ss^T, packed like the coefficient products.
        a, b = np.tril_indices(r - g)
        guard_part = factor[:, g:r, :g]
        schur = gram[:, self.smooth_pairs] - (guard_part @ guard_part.transpose(0, 2, 1))[:, a, b]
        largest, length = _band_scan_statistic(
            np.einsum("nab,nb->na", lower_ss, smooth) @ self.band_coefficients,
            schur @ self.band_squares, schur @ self.band_neighbours,
        )
        return (
            np.einsum("nt,nt->n", w, w), np.einsum("nk,nk->n", smooth, smooth), np.einsum("nt,nt->n", step, step), largest, length,
        )
