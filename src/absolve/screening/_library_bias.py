"""The batch estimate of the library's fixed absorptivity error, :func:`estimate_library_bias`."""

from __future__ import annotations

import numpy as np
from numpy.typing import ArrayLike

from ..errors import AbsolveError
from ._bulk import _BLOCK
from ._checks import _as_float, _usable_points
from ._results import LibraryBias
from ._subspaces import _RANK_TOL

# The batch estimate of the library's error is not subtracted where its own noise would add more than
# this share of a typical scan's noise variance (it is common to every scan it corrects).
_BIAS_MAX_ADDED_NOISE = 0.25


def _bias_minimum(n_components: int) -> int:
    """Default fewest scans for the batch estimate: 20 plus 5 per component (common practice, no source)."""
    return 20 + 5 * n_components


def estimate_library_bias(
    residuals: ArrayLike,
    coefficients: ArrayLike,
    usable: ArrayLike | None = None,
    *,
    exclude: ArrayLike | None = None,
    min_scans: int | None = None,
) -> LibraryBias:
    """Estimate the library's fixed absorptivity error from a batch's residuals, and remove it.

    A library learned from noisy standards carries absorptivity errors
    ``dK`` that are the same for every scan of a batch. A clean scan's residual
    then holds ``-dK.T @ c_i`` (as far as the fit does not absorb it) besides
    noise: a fixed shape times the scan's concentrations, which the screen
    may take for an interferent. Across the batch, each wavelength's residuals
    are regressed by ordinary least squares on the fitted coefficients plus an
    intercept,

    ``r_i(lam) = a(lam) + b(lam) @ c_i + e_i(lam)``,

    over the scans where the point is usable, and ``b(lam) @ c_i`` is
    subtracted. The intercept ``a`` (what every scan shares whatever its
    concentrations, e.g. a contaminated solvent) is estimated so that it does
    not leak into ``b``, and kept in the residual. Each scan in the estimate
    is corrected with the estimate made without it (the deleted-residual
    identity ``b_(-i) = b - (G^-1 x_i e_i / (1 - h_i))_c``), so a scan's own
    interferent is not subtracted from it through its leverage.

    What it cannot tell apart: an interferent present in many scans in
    proportion to one component (an impure dye lot) has exactly the shape of a
    library error and is removed with it (docs/screening.md measures this).
    Interferents in a minority of scans pull on the estimate; screen the
    corrected residuals, then estimate again with the flagged scans in
    ``exclude`` and screen those residuals (see Examples).

    The correction's own noise is common to the scans it corrects; it is
    left out (``estimated`` False) where it would add more than a quarter
    of a typical scan's noise variance (``added_noise``), which happens
    when the concentrations vary too little across the batch for the
    library's error to be told from a shape common to every scan.

    Parameters
    ----------
    residuals : array_like, shape (n_scans, n_wavelengths)
        ``measured - fitted`` of every scan of the batch (NaN at unused points).
    coefficients : array_like, shape (n_scans, n_components)
        The fitted coefficients of the library's columns in the design (the
        concentrations before any dilution factor). Scans with a non-finite
        coefficient are left out of the estimate and not corrected.
    usable : array_like of bool, shape (n_scans, n_wavelengths), optional
        Points the fit used; NaN residuals are left out as well.
    exclude : array_like of bool, shape (n_scans,), optional
        Scans kept out of the estimate (e.g. flagged by a first screen); they
        are still corrected, with the estimate from the others.
    min_scans : int, optional
        Fewest scans a wavelength's estimate may use; default ``20 + 5 *
        n_components``. Below it the wavelength is left uncorrected; with no
        wavelength left, ``applied`` is False and ``message`` says why.

    Returns
    -------
    LibraryBias

    Examples
    --------
    Two passes around the screen (quantities as for :func:`screen_residuals`):

    >>> import numpy as np
    >>> rng = np.random.default_rng(0)
    >>> grid = np.arange(400.0, 501.0)
    >>> conc = rng.uniform(1.0, 10.0, (60, 2))
    >>> error = np.vstack([np.sin(grid / 9.0), np.cos(grid / 7.0)]).T * 1e-3   # (n_wavelengths, 2)
    >>> residuals = conc @ error.T + 1e-4 * rng.standard_normal((60, grid.size))
    >>> first = estimate_library_bias(residuals, conc)
    >>> bool(np.allclose(first.bias, error, atol=2e-5)), first.applied
    (True, True)
    >>> # flagged = screen_residuals(grid, first.corrected, fitted, design, noise).flagged
    >>> # final = estimate_library_bias(residuals, conc, exclude=flagged).corrected
    """
    resid = _as_float("residuals", residuals, 2)
    coef = _as_float("coefficients", coefficients, 2)
    n_scans, n_wl = resid.shape
    if coef.shape[0] != n_scans or coef.shape[1] < 1:
        raise AbsolveError(
            f"coefficients {coef.shape} must be (n_scans, n_components) with n_scans = {n_scans} (one row per residual)",
            fix="give the fitted coefficients of the library's columns, one row per scan",
        )
    n_comp = coef.shape[1]
    fitted_rows = np.all(np.isfinite(coef), axis=1)
    mask = _usable_points(usable, resid.shape, resid) & fitted_rows[:, None]
    if exclude is None:
        left_out = np.zeros(n_scans, dtype=bool)
    else:
        left_out = np.asarray(exclude)
        if left_out.shape != (n_scans,) or left_out.dtype != np.bool_:
            raise AbsolveError(f"exclude must be a boolean array of shape ({n_scans},), got {left_out.dtype} {left_out.shape}")
    need = _bias_minimum(n_comp) if min_scans is None else min_scans
    if isinstance(need, bool) or not isinstance(need, (int, np.integer)) or need < n_comp + 2:
        raise AbsolveError(
            f"The 'min_scans' parameter of estimate_library_bias must be an integer >= {n_comp + 2}; got {min_scans!r} instead.",
            fix=f"leave it out for the default {_bias_minimum(n_comp)}",
        )
    need = int(need)
    inside = mask & ~left_out[:, None]
    n_used = np.count_nonzero(inside, axis=0)

    # Columns scaled to unit root-mean-square so the Gram matrices are well scaled in any concentration unit.
    values = np.where(fitted_rows[:, None], coef, 0.0)
    in_rows = fitted_rows & ~left_out
    scale = np.sqrt(np.mean(values[in_rows] ** 2, axis=0)) if in_rows.any() else np.ones(n_comp)
    scale = np.where(scale > 0, scale, 1.0)
    x = np.column_stack([np.ones(n_scans), values / scale])
    n_cols = n_comp + 1
    weight = inside.astype(np.float64)
    gram = (weight.T @ (x[:, :, None] * x[:, None, :]).reshape(n_scans, n_cols * n_cols)).reshape(n_wl, n_cols, n_cols)
    moment = np.where(inside, resid, 0.0).T @ x
    # Pseudo-inverse: a component absent from the whole batch (coefficient 0 throughout) gets no bias.
    inverse = np.linalg.pinv(gram, rcond=_RANK_TOL, hermitian=True)
    beta = np.einsum("wpq,wq->wp", inverse, moment)

    corrected = resid.copy()
    added = np.full((n_scans, n_wl), np.nan)
    correction = np.zeros((n_scans, n_wl))
    for start in range(0, n_scans, _BLOCK):
        rows = slice(start, start + _BLOCK)
        xb, inside_b = x[rows], inside[rows]
        projected = np.einsum("wpq,iq->iwp", inverse, xb)  # G^-1 x_i at every wavelength
        leverage = np.einsum("iwp,ip->iw", projected, xb)
        added_b = np.einsum("iwk,ik->iw", projected[:, :, 1:] - inverse[None, :, 1:, 0], xb[:, 1:])
        added[rows] = np.where(inside_b, added_b, np.nan)
        own = resid[rows] - np.einsum("wp,ip->iw", beta, xb)
        with np.errstate(divide="ignore", invalid="ignore"):
            loo = np.einsum("iwk,ik->iw", projected[:, :, 1:], xb[:, 1:]) * own / (1.0 - leverage)
        part = xb[:, 1:] @ beta[:, 1:].T
        # A scan that alone determines a wavelength's estimate (leverage 1) has no leave-one-out estimate there.
        lone = inside_b & ~(leverage < 1.0 - 1e-9)
        correction[rows] = np.where(lone, 0.0, part - np.where(inside_b & ~lone, loo, 0.0))
    typical = np.full(n_wl, np.nan)
    reached = n_used > 0  # a median over no scan would warn
    typical[reached] = np.nanmedian(added[:, reached], axis=0)
    estimated = (n_used >= need) & np.isfinite(typical) & (typical <= _BIAS_MAX_ADDED_NOISE)
    apply = mask & estimated[None, :]
    corrected[apply] = resid[apply] - correction[apply]
    bias = np.where(estimated[:, None], beta[:, 1:] / scale, 0.0)
    common = np.where(estimated, beta[:, 0], 0.0)

    n_in = int(np.count_nonzero(in_rows))
    if estimated.any():
        message = (
            f"library bias estimated from {n_in} scans and removed at {int(estimated.sum())} of {n_wl} wavelengths"
        )
    elif n_used.max(initial=0) < need:
        message = (
            f"library bias not estimated: {int(n_used.max(initial=0))} scans in the estimate at most, "
            f"at least {need} needed for {n_comp} component(s)"
        )
    else:
        message = (
            "library bias not estimated: the concentrations vary too little across the batch to tell "
            "the library's error from a residual common to every scan"
        )
    return LibraryBias(
        bias=bias, common=common, n_used=n_used.astype(np.int64), estimated=estimated,
        added_noise=np.where(estimated, typical, np.nan), corrected=corrected,
        applied=bool(estimated.any()), message=message, min_scans=need,
    )
