"""Refits with suspect absorbers added, :func:`explain_with_suspects`, each tested by a boundary-aware F test."""

from __future__ import annotations

from collections.abc import Sequence

import numpy as np
from numpy.typing import ArrayLike

from ..errors import AbsolveError
from ..library import NoiseModel
from ._checks import (
    _as_float,
    _check_alpha,
    _check_design,
    _check_grid,
    _check_noise,
    _usable_points,
)
from ._results import SuspectReport
from ._screen import screen_residuals
from ._whitening import _ar_links, _noise_sd, _whiten


def explain_with_suspects(
    wavelengths: ArrayLike,
    measured: ArrayLike,
    design: ArrayLike,
    nonnegative: ArrayLike,
    candidates: ArrayLike,
    candidate_names: Sequence[str],
    noise: NoiseModel,
    *,
    usable: ArrayLike | None = None,
    alpha: float = 0.05,
    smooth_terms: int | None = None,
) -> SuspectReport:
    """Refit each scan with each suspect absorber added, and test whether it explains the residual.

    The fit is done in whitened space (see :func:`prewhiten`, noise level from a
    first unweighted fit), so the residual sums of squares are comparable and
    the extra-sum-of-squares statistic
    ``F = (RSS_0 - RSS_1) / (RSS_1 / (m - rank))`` is a proper nested-model test
    under the correlated, heteroscedastic noise, free of the noise model's
    overall scale. The suspect's amount is constrained to be >= 0, so under the
    null it sits on the boundary half of the time and the null distribution is
    the equal mixture of 0 and F(1, m - rank) (Self & Liang 1987): the p-value is
    ``0.5 * F.sf`` when the amount is positive and 1 when it is zero.

    Parameters
    ----------
    wavelengths : array_like, shape (n_wavelengths,)
        Increasing grid in nm.
    measured : array_like, shape (n_scans, n_wavelengths)
        Measured absorbance (NaN at unusable points).
    design : array_like, shape (n_wavelengths, p) or (n_scans, n_wavelengths, p)
        The library design (absorptivity x path length, baseline columns).
    nonnegative : array_like of bool, shape (p,)
        Which design columns are constrained to be >= 0 (components), the rest
        free (baseline terms).
    candidates : array_like, shape (n_candidates, n_wavelengths)
        Suspect spectra, absorbance per unit amount on this grid (e.g. absorptivity
        x path length, so amounts come out as concentrations).
    candidate_names : sequence of str, length n_candidates
        Their names.
    noise : NoiseModel
        Instrument noise (floor > 0).
    usable : array_like of bool, shape (n_scans, n_wavelengths), optional
        Points to fit.
    alpha : float, default 0.05
        Significance level for naming the best suspect (Bonferroni over suspects)
        and for the screen of what remains.
    smooth_terms : int, optional
        Passed to :func:`screen_residuals` for the remaining-structure screen.

    Returns
    -------
    SuspectReport
    """
    import scipy.optimize  # only for suspects: kept out of the import of every command

    alpha = _check_alpha(alpha)
    grid = _check_grid(wavelengths)
    noise = _check_noise(noise)
    y = _as_float("measured", measured, 2)
    if y.shape[1] != grid.size:
        raise AbsolveError(f"measured has {y.shape[1]} wavelengths, the grid {grid.size}")
    n_scans = y.shape[0]
    x = _check_design(design, n_scans, grid.size)
    p = x.shape[2]
    constrained = np.asarray(nonnegative)
    if constrained.shape != (p,) or constrained.dtype != np.bool_:
        raise AbsolveError(f"nonnegative must be a boolean array with one entry per design column ({p})")
    suspects = _as_float("candidates", candidates, (1, 2))
    suspects = suspects.reshape(1, -1) if suspects.ndim == 1 else suspects
    names = tuple(str(n) for n in candidate_names)
    if suspects.shape[1] != grid.size or len(names) != suspects.shape[0] or len(set(names)) != len(names):
        raise AbsolveError(
            f"candidates {suspects.shape} need {grid.size} wavelengths and one unique name each (got {len(names)})"
        )
    if not np.all(np.isfinite(suspects)):
        raise AbsolveError("candidate spectra hold NaN or infinite values", fix="restrict them to their valid range")
    mask = _usable_points(usable, y.shape, y)
    n_cand = suspects.shape[0]
    lower = np.where(constrained, 0.0, -np.inf)

    # A first unweighted fit only sets the absorbance level the noise sd is evaluated at.
    level = np.empty_like(y)
    for i in range(n_scans):
        rows = mask[i]
        first = scipy.optimize.lsq_linear(x[i, rows], y[i, rows], bounds=(lower, np.inf), method="bvls")
        level[i] = x[i] @ first.x
    rho, previous, _ = _ar_links(grid, mask, noise.correlation_length_nm)
    sd = _noise_sd(noise, level, mask)
    wy = _whiten(y, sd, mask, rho, previous)
    wx = _whiten(x, sd, mask, rho, previous)
    wc = _whiten(np.broadcast_to(suspects.T, (n_scans,) + suspects.T.shape), sd, mask, rho, previous)

    amount = np.full((n_scans, n_cand), np.nan)
    amount_se = np.full((n_scans, n_cand), np.nan)
    f_stat = np.full((n_scans, n_cand), np.nan)
    p_value = np.full((n_scans, n_cand), np.nan)
    coefficients = np.zeros((n_scans, n_cand, p + 1))
    base_coefficients = np.zeros((n_scans, p))
    extended_lower = np.append(lower, 0.0)
    for i in range(n_scans):
        rows = mask[i]
        a, b = wx[i, rows], wy[i, rows]
        base = scipy.optimize.lsq_linear(a, b, bounds=(lower, np.inf), method="bvls")
        base_coefficients[i] = base.x
        rss0 = float(np.sum((a @ base.x - b) ** 2))
        for j in range(n_cand):
            aj = np.column_stack([a, wc[i, rows, j]])
            fit = scipy.optimize.lsq_linear(aj, b, bounds=(extended_lower, np.inf), method="bvls")
            dof = int(rows.sum() - np.linalg.matrix_rank(aj))
            if dof < 1:
                continue
            rss1 = float(np.sum((aj @ fit.x - b) ** 2))
            sigma2 = rss1 / dof
            free = fit.active_mask == 0
            free[-1] = True
            covariance = sigma2 * np.linalg.pinv(aj[:, free].T @ aj[:, free])
            coefficients[i, j] = fit.x
            amount[i, j] = fit.x[-1]
            amount_se[i, j] = float(np.sqrt(covariance[-1, -1]))
            f_stat[i, j] = max(rss0 - rss1, 0.0) / sigma2
            p_value[i, j] = 0.5 * scipy.special.fdtrc(1, dof, f_stat[i, j]) if fit.x[-1] > 0 else 1.0

    with np.errstate(invalid="ignore"):
        top = np.argmax(np.nan_to_num(f_stat, nan=-1.0), axis=1)
    best_p = np.minimum(1.0, n_cand * p_value[np.arange(n_scans), top])
    best = np.where(best_p < alpha, top, -1)
    # What remains: refit with the best suspect (when one is significant) and screen the residual.
    column = np.where((best >= 0)[:, None], suspects[np.maximum(best, 0)], 0.0)
    extended = np.concatenate([x, column[:, :, None]], axis=2)
    chosen = np.where((best >= 0)[:, None], coefficients[np.arange(n_scans), np.maximum(best, 0)], 0.0)
    chosen[:, :p] = np.where((best >= 0)[:, None], chosen[:, :p], base_coefficients)
    fitted = np.einsum("nwp,np->nw", extended, chosen)
    remaining = screen_residuals(
        grid, y - fitted, fitted, extended, noise, usable=mask, alpha=alpha, smooth_terms=smooth_terms
    )
    return SuspectReport(
        candidate_names=names,
        amount=amount,
        amount_se=amount_se,
        f_statistic=f_stat,
        p_value=p_value,
        best=best.astype(np.int64),
        best_p=best_p,
        remaining=remaining,
        alpha=alpha,
    )
