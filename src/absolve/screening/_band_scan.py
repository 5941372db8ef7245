"""The matched-filter band scan: Gaussian templates, the largest normalised projection, its p-value."""

from __future__ import annotations

import numpy as np
import scipy.special
from numpy.typing import NDArray

from ._subspaces import _GRAM_TOL

# Spacing of neighbouring band centres in the matched-filter band scan, as a fraction of the band
# width: neighbours then correlate above 0.97, so the largest statistic on the grid is within about
# 1 % of the maximum over continuous centres.
_SCAN_STEP = 1.0 / 3.0


def _band_templates(grid: NDArray[np.float64], n_terms: int) -> NDArray[np.float64]:
    """Gaussian bands (n_templates, n_wl) with centres across the grid, a third of a width apart.

    The width (standard deviation) is the smooth subspace's resolution, the
    span per cosine term (15 nm by default): the test looks at the residual
    in that subspace only, where a narrower band looks like one of this width,
    and one width is one curve of templates, for which the p-value bound of
    :func:`_band_scan_p` is nearly exact (several widths would be joined by
    Bonferroni's inequality, measured to cost more power than the mismatch of
    broader bands does).
    """
    span = grid[-1] - grid[0]
    width = span / n_terms
    centres = np.linspace(grid[0], grid[-1], int(np.ceil(span / (_SCAN_STEP * width))) + 1)
    return np.exp(-0.5 * ((grid[None, :] - centres[:, None]) / width) ** 2)


def _band_scan_statistic(
    numerator: NDArray[np.float64], norm2: NDArray[np.float64], cross: NDArray[np.float64]
) -> tuple[NDArray[np.float64], NDArray[np.float64]]:
    """Largest normalised band projection of each scan, and the length of the curve of templates.

    With ``tau_t`` the coordinates of template ``t`` (whitened, projected like
    the residual) and ``y`` the residual's, all in one orthonormal basis of the
    scan's smooth subspace: ``numerator = <tau_t, y>``, ``norm2 = |tau_t|**2``
    and ``cross = <tau_t, tau_t+1>``, each (n_scans, n_templates[-1]). The
    statistic is ``max_t <tau_t, y> / |tau_t|``, N(0, 1) for each ``t`` under
    white noise; the curve's length is that of the piecewise great-circle path
    through the normalised templates, ``sum arccos(<u_t, u_t+1>)``. The
    largest statistic over the templates is at most the maximum over that path,
    so the bound of :func:`_band_scan_p` holds for it. A template the design
    absorbs entirely is left out, and the path through it counted at the
    longest (pi).
    """
    valid = norm2 > _GRAM_TOL * np.max(norm2, axis=1, initial=0.0)[:, None]
    scale = np.where(valid, 1.0 / np.sqrt(np.where(valid, norm2, 1.0)), 0.0)
    largest = np.max(np.where(valid, numerator * scale, -np.inf), axis=1, initial=-np.inf)
    cosine = np.where(valid[:, :-1] & valid[:, 1:], cross * scale[:, :-1] * scale[:, 1:], -1.0)
    return largest, np.sum(np.arccos(np.clip(cosine, -1.0, 1.0)), axis=1)


def _band_scan_p(
    largest: NDArray[np.float64], length: NDArray[np.float64], rough_dof: NDArray[np.int64]
) -> NDArray[np.float64]:
    """p-value of the largest Studentised band statistic: Rice's upcrossing bound.

    For a curve of unit-norm templates ``u(s)`` in a subspace where the
    residual coordinates ``y`` are independent N(0, sigma**2),
    ``X(s) = <u(s), y> / sigma`` is a unit-variance Gaussian process and, by
    Rice's formula, ``P(max X > c) <= P(X(s_0) > c) + E[upcrossings of c]
    = Phi(-c) + kappa / (2 pi) exp(-c**2 / 2)`` with ``kappa`` the curve's
    length on the unit sphere (Rice 1944; Hotelling 1939; Davies 1977, 1987;
    Knowles & Siegmund 1989): the look-elsewhere cost of scanning the band
    centre. ``sigma`` is estimated from the rough part, independent of ``y``,
    with ``nu`` degrees of freedom; averaging the bound over that estimate
    (``sigma_hat**2 / sigma**2 ~ chi2(nu) / nu``) gives exactly
    ``P(t_nu > c) + kappa / (2 pi) (1 + c**2 / nu) ** (-nu / 2)`` (the
    chi-square moment generating function).
    """
    nu = np.maximum(rough_dof, 1).astype(np.float64)
    c = np.maximum(largest, 0.0)
    crossings = length / (2.0 * np.pi) * np.exp(-0.5 * nu * np.log1p(c**2 / nu))
    return np.minimum(1.0, scipy.special.stdtr(nu, -c) + crossings)
