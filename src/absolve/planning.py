"""Choosing analytical wavelengths: which few wavelengths measure a mixture best.

A fixed-wavelength photometer (or a filter instrument, or a quick method on a
scanning instrument) reads the mixture at ``K`` wavelengths and solves the
``K x n_components`` Beer-Lambert system. Which ``K`` wavelengths to read is an
optimal-design problem: the rows of the design are the library's absorptivity
spectra at the chosen wavelengths and the least-squares covariance of the
concentrations is ``sigma^2 (K_S^T K_S)^-1``.

Criteria (optimal-design names from Atkinson, Donev & Tobias, *Optimum
Experimental Designs, with SAS*, Oxford University Press 2007, ch. 10-11):

``"worst-relative"`` (default)
    Minimise ``max_j sqrt([(K_S^T K_S)^-1]_jj) / c_j``: the largest relative
    standard uncertainty of a component at its expected concentration ``c_j``,
    per unit of absorbance noise. It is a minimax criterion on the diagonal of
    the covariance of the scaled parameters: with ``X = K diag(c)`` it is
    ``max_j [(X^T X)^-1]_jj``, which lies between the A-criterion's mean of the
    diagonal (``tr((X^T X)^-1) / m``) and the E-criterion's largest eigenvalue
    of ``(X^T X)^-1``, which bounds every diagonal element.
``"condition"``
    Minimise the 2-norm condition number of ``K_S`` with its columns scaled
    to unit length (the scaled condition number of Belsley, Kuh & Welsch,
    *Regression Diagnostics*, Wiley 1980, ch. 3): how much relative errors in
    the absorbances can be amplified in the concentrations.
``"d-optimal"``
    Maximise ``det(K_S^T K_S)`` (D-optimality: the smallest volume of the
    joint confidence ellipsoid).

Every chosen wavelength must keep the expected mixture's absorbance
``sum_j K[lambda, j] c_j`` (1 cm) at or below a ceiling, and chosen wavelengths
may be required to lie at least some distance apart.

Search
------
For ``K <= 4`` (among at most 600 candidates, or any ``K`` with
``search="exact"``) the planner returns a proven optimum by branch and bound over
index sets taken in a fixed order (candidates sorted by falling leverage in
the full scan, so that the candidates left to complete a late partial set
are poor). It starts from a greedy plus exchange plan (the incumbent) and
discards a partial set, or a complete one before computing its criterion,
when it fails a *screen*: linear inequalities on the Gram matrix ``M = X_S^T
X_S`` that every set beating the incumbent must satisfy. ``M`` is a sum over
the set's rows, so a test on a complete set costs two additions and a
comparison, and a partial set is tested against the largest sum that ``r``
later candidates can add. The inequalities are exact for any vectors used
and are tight near the incumbent, whose vectors they use:

* worst-relative: ``[M^-1]_jj >= u_j^2 / (u^T M u)`` for any ``u``
  (Cauchy-Schwarz), so beating ``best`` needs ``u^T M u >= max_j u_j^2 / best``;
* d-optimal: ``det M <= det Q (tr(Q^-1 M) / m)^m`` for positive definite ``Q``
  (arithmetic-geometric mean of the eigenvalues of ``Q^-1 M``);
* condition: the scaled matrix ``C = D M D`` has trace ``m``, so ``kappa^2 >=
  (m - lambda_min) / ((m - 1) lambda_min)`` and beating ``best`` needs
  ``lambda_min(C) >= m / ((m - 1) best + 1)``, while ``lambda_min(C) <= (w^T M
  w) / (w^T diag(M) w)`` for any ``w``; by interlacing every correlation of
  ``C`` must also stay within ``(best - 1) / (best + 1)``.

Sets that pass get the criterion in closed form (determinants and cofactors
of the small Gram matrices, vectorised over blocks of sets; for the
condition criterion the eigenvalues of the correlation matrix, in closed
form up to three components). The last two wavelengths of every surviving
partial set are enumerated from precomputed pair sums. Every step is an
exact inequality or an exact evaluation, so the result is the optimum, up to
a relative rounding margin of 1e-9; the tests check it against brute force.
Measured on one core for ``K = 4`` over 300 candidates: about 1 s for the
default criterion; the condition criterion is flat (many sets come within a
fraction of a percent of the best), so little can be pruned and it takes up
to about 10 s.

Otherwise (or with ``search="greedy"``) the planner runs a greedy forward
selection followed by exchange in the manner of Fedorov (*Theory of Optimal
Experiments*, 1972): swap one chosen wavelength for one unchosen while the
criterion improves. It states how far from optimal
the result can be: ``gap_bound`` is the plan's criterion divided by a lower
bound on the criterion of *every* plan of ``K`` wavelengths, from the
inequalities above applied to the best ``K`` candidates per direction, with
directions from Frank-Wolfe iterations on the continuous relaxation (weights
in [0, 1] summing to ``K``); for d-optimal, the optimum's determinant is at
most ``gap_bound`` times the plan's. For the condition criterion the bound is
often the trivial ``kappa >= 1``.

Window mode plans the best contiguous scan range(s) of a given width for a
scanning instrument: every grid point in the window is used.
"""

from __future__ import annotations

import math
from collections.abc import Callable, Mapping
from dataclasses import dataclass
from typing import Any, Literal, get_args

import numpy as np
from numpy.typing import NDArray

from .errors import AbsolveError
from .library import ReferenceLibrary

__all__ = ["CRITERIA", "SEARCH_METHODS", "Criterion", "SearchMethod", "WavelengthPlan", "plan_wavelengths"]

Criterion = Literal["worst-relative", "condition", "d-optimal"]
SearchMethod = Literal["auto", "exact", "greedy"]
CRITERIA: tuple[str, ...] = get_args(Criterion)
SEARCH_METHODS: tuple[str, ...] = get_args(SearchMethod)

# Up to this many wavelengths, among at most this many candidates, the default search is
# the exact branch and bound (its time grows like candidates^4: about 1-3 s at 300
# candidates and 20-50 s at 600 on one core); beyond, greedy plus exchange with a gap bound.
_EXACT_LIMIT = 4
_EXACT_CANDIDATES = 600
# At most this many scan windows are planned at once (exhaustive enumeration).
_WINDOW_LIMIT = 3
# A design whose unit-diagonal (correlation-scaled) Gram matrix has a determinant
# below this is treated as singular: the components cannot be told apart there.
_SINGULAR = 1e-12
# Partial sets are discarded only when their bound exceeds the incumbent by this
# relative margin, which absorbs rounding in the bound so no better plan is lost.
_PRUNE_MARGIN = 1e-9
# A new plan replaces the incumbent only when better by more than rounding.
_IMPROVEMENT = 1e-12
# Leaves (complete sets) evaluated per vectorised block.
_LEAF_BLOCK = 1 << 18
# Partial sets bounded per vectorised block.
_NODE_BLOCK = 2048


@dataclass(frozen=True, eq=False)
class WavelengthPlan:
    """The chosen wavelengths and what they promise.

    Attributes
    ----------
    wavelengths_nm : ndarray, shape (n_chosen,)
        Chosen wavelengths in nm, increasing (in window mode: every grid point of the window(s)).
    criterion : str
        ``"worst-relative"``, ``"condition"`` or ``"d-optimal"``.
    objective : float
        The criterion's value for the plan: the worst relative standard uncertainty per
        unit absorbance noise, the scaled condition number, or ``det(K_S^T K_S)``.
    component_names : tuple of str
        Component names, in library order.
    unit : str
        Concentration unit of the library.
    expected_concentration : ndarray, shape (n_components,)
        Concentrations the plan was made for.
    relative_uncertainty : ndarray, shape (n_components,)
        ``sqrt([(K_S^T K_S)^-1]_jj) / c_j`` with a 1 cm path: relative standard
        uncertainty of each component per unit (1 absorbance unit) of noise standard deviation.
    predicted_std_uncertainty : ndarray, shape (n_components,), or None
        Standard uncertainty in ``unit`` predicted from the library's noise model
        (weighted least squares with the noise standard deviation at each wavelength's
        expected absorbance, independent readings: ``sqrt(diag((K_S^T W K_S)^-1))`` with
        ``W = diag(1 / sd^2)``), or None when the library has no noise model.
    correlated_std_uncertainty : ndarray, shape (n_components,), or None
        The same weighted fit's standard uncertainty when the readings share the noise
        model's correlation along wavelength (one scan on the calibrating instrument):
        ``(K^T W K)^-1 K^T W S W K (K^T W K)^-1`` with ``S`` the AR(1) covariance. It differs
        from ``predicted_std_uncertainty`` only for closely spaced wavelengths (windows).
        None without a noise model or when the model has no correlation.
    condition_number : float
        2-norm condition number of ``K_S`` with unit-length columns.
    expected_absorbance : ndarray, shape (n_chosen,)
        Expected mixture absorbance at each chosen wavelength (1 cm).
    full_scan_objective : float
        The criterion using every candidate wavelength (within the range and the ceiling).
    full_scan_relative_uncertainty : ndarray, shape (n_components,)
        ``relative_uncertainty`` of the full scan.
    precision_ratio : float
        Worst relative uncertainty of the plan divided by that of the full scan
        (>= 1: how many times less precise the plan is than reading every candidate).
    optimal : bool
        True when the plan is proven optimal (exhaustive or branch-and-bound search).
    gap_bound : float
        Proven factor: the plan's criterion is within this factor of the optimum
        (1.0 when ``optimal``). For minimised criteria ``objective <= gap_bound *
        optimum``; for d-optimal ``optimum <= gap_bound * objective``.
    search : str
        ``"exact"``, ``"greedy"`` or ``"window"``.
    sets_evaluated : int
        Complete sets (or windows) whose criterion was computed.
    windows_nm : tuple of (float, float), or None
        First and last wavelength of each window in window mode.
    range_nm : (float, float)
        Wavelength range the candidates came from.
    max_absorbance : float
        Ceiling on the expected absorbance.
    min_separation_nm : float
        Least distance between chosen wavelengths.
    n_candidates : int
        Wavelengths within the range and under the ceiling.
    """

    wavelengths_nm: NDArray[np.float64]
    criterion: str
    objective: float
    component_names: tuple[str, ...]
    unit: str
    expected_concentration: NDArray[np.float64]
    relative_uncertainty: NDArray[np.float64]
    predicted_std_uncertainty: NDArray[np.float64] | None
    condition_number: float
    expected_absorbance: NDArray[np.float64]
    full_scan_objective: float
    full_scan_relative_uncertainty: NDArray[np.float64]
    precision_ratio: float
    optimal: bool
    gap_bound: float
    search: str
    sets_evaluated: int
    windows_nm: tuple[tuple[float, float], ...] | None
    range_nm: tuple[float, float]
    max_absorbance: float
    min_separation_nm: float
    n_candidates: int
    correlated_std_uncertainty: NDArray[np.float64] | None = None

    def __post_init__(self) -> None:
        for name in (
            "wavelengths_nm",
            "expected_concentration",
            "relative_uncertainty",
            "predicted_std_uncertainty",
            "correlated_std_uncertainty",
            "expected_absorbance",
            "full_scan_relative_uncertainty",
        ):
            value = getattr(self, name)
            if value is not None:
                array = np.array(value, dtype=np.float64)
                array.flags.writeable = False
                object.__setattr__(self, name, array)

    def summary(self) -> dict[str, Any]:
        """JSON-safe dictionary of the plan (plain floats, lists and dicts)."""
        names = self.component_names

        def per_component(values: NDArray[np.float64] | None) -> dict[str, float | None] | None:
            return None if values is None else {name: _json_float(v) for name, v in zip(names, values)}

        return {
            "criterion": self.criterion,
            "wavelengths_nm": [float(v) for v in self.wavelengths_nm],
            "objective": _json_float(self.objective),
            "relative_uncertainty": per_component(self.relative_uncertainty),
            "predicted_std_uncertainty": per_component(self.predicted_std_uncertainty),
            "unit": self.unit,
            "expected_concentration": per_component(self.expected_concentration),
            "condition_number": _json_float(self.condition_number),
            "expected_absorbance": [float(v) for v in self.expected_absorbance],
            "full_scan_objective": _json_float(self.full_scan_objective),
            "full_scan_relative_uncertainty": per_component(self.full_scan_relative_uncertainty),
            "precision_ratio": _json_float(self.precision_ratio),
            "optimal": bool(self.optimal),
            "gap_bound": _json_float(self.gap_bound),
            "search": self.search,
            "sets_evaluated": int(self.sets_evaluated),
            "windows_nm": None if self.windows_nm is None else [[float(a), float(b)] for a, b in self.windows_nm],
            "range_nm": [float(self.range_nm[0]), float(self.range_nm[1])],
            "max_absorbance": float(self.max_absorbance),
            "min_separation_nm": float(self.min_separation_nm),
            "n_candidates": int(self.n_candidates),
            "correlated_std_uncertainty": per_component(self.correlated_std_uncertainty),
        }

    def report(self) -> str:
        """Readable table of the plan, its predicted precision and how it compares with the full scan."""
        lines = []
        if self.windows_nm is not None:
            spans = ", ".join(f"{a:g}-{b:g} nm" for a, b in self.windows_nm)
            lines.append(f"Scan window plan: {spans} ({self.wavelengths_nm.size} grid points), criterion {self.criterion}")
        else:
            lines.append(f"Wavelength plan: {self.wavelengths_nm.size} wavelengths, criterion {self.criterion}")
        if self.optimal:
            what = "windows" if self.windows_nm is not None else "sets"
            lines.append(f"Optimality: proven optimal ({self.search} search, {self.sets_evaluated} {what} evaluated)")
        else:
            relation = (
                "the best plan's determinant is at most" if self.criterion == "d-optimal" else "the plan's criterion is at most"
            )
            other = "times this plan's" if self.criterion == "d-optimal" else "times the optimum"
            lines.append(f"Optimality: not proven ({self.search} search); {relation} {self.gap_bound:.4g} {other}")
        lines.append(
            f"Candidates: {self.n_candidates} wavelengths in {self.range_nm[0]:g}-{self.range_nm[1]:g} nm with expected "
            f"absorbance <= {self.max_absorbance:g}"
            + (f", chosen at least {self.min_separation_nm:g} nm apart" if self.min_separation_nm > 0 else "")
        )
        if self.windows_nm is None:
            lines.append("")
            lines.append(f"{'wavelength_nm':>14}  {'expected_absorbance':>19}")
            for wl, a in zip(self.wavelengths_nm, self.expected_absorbance):
                lines.append(f"{wl:>14.6g}  {a:>19.4f}")
        else:
            lines.append(
                f"Expected absorbance in the window(s): {self.expected_absorbance.min():.4f} to {self.expected_absorbance.max():.4f}"
            )
        lines.append("")
        width = max(9, *(len(n) for n in self.component_names))
        header = f"{'component':<{width}}  {'expected (' + self.unit + ')':>16}  {'rel. unc. per unit noise':>24}"
        if self.predicted_std_uncertainty is not None:
            header += f"  {'predicted u (' + self.unit + ')':>20}  {'relative':>9}"
        # The correlated-noise column only when it says something new (closely spaced wavelengths).
        correlated = self.correlated_std_uncertainty
        if correlated is not None and self.predicted_std_uncertainty is not None:
            if np.allclose(correlated, self.predicted_std_uncertainty, rtol=1e-3, atol=0.0):
                correlated = None
        if correlated is not None:
            header += f"  {'u, correlated noise':>19}"
        lines.append(header)
        for j, name in enumerate(self.component_names):
            row = f"{name:<{width}}  {self.expected_concentration[j]:>16.6g}  {self.relative_uncertainty[j]:>24.6g}"
            if self.predicted_std_uncertainty is not None:
                u = self.predicted_std_uncertainty[j]
                row += f"  {u:>20.4g}  {u / self.expected_concentration[j]:>9.2%}"
            if correlated is not None:
                row += f"  {correlated[j]:>19.4g}"
            lines.append(row)
        lines.append("")
        lines.append(f"Criterion value: {_format_objective(self.criterion, self.objective)}")
        lines.append(f"Full scan ({self.n_candidates} wavelengths): {_format_objective(self.criterion, self.full_scan_objective)}")
        lines.append(
            f"Precision given up: the worst relative uncertainty is {self.precision_ratio:.3g} times the full scan's"
        )
        lines.append(f"Condition number (columns scaled to unit length): {self.condition_number:.4g}")
        if self.predicted_std_uncertainty is None:
            lines.append("No noise model in the library: uncertainties are per unit absorbance noise (multiply by its sd).")
        return "\n".join(lines)


def _json_float(value: float) -> float | None:
    """A float for JSON: infinite or NaN values (e.g. an unbounded gap) become None."""
    number = float(value)
    return number if math.isfinite(number) else None


def _format_objective(criterion: str, value: float) -> str:
    if criterion == "worst-relative":
        return f"worst relative uncertainty per unit noise {value:.6g}"
    if criterion == "condition":
        return f"scaled condition number {value:.6g}"
    return f"det(K^T K) {value:.6g}"


# --------------------------------------------------------------------------------------------
# Criterion values on batches of Gram matrices
# --------------------------------------------------------------------------------------------
#
# Internally every criterion is a "loss", positive and smaller-is-better, computed from the
# Gram matrix M = X_S^T X_S of the scaled design X = K diag(c):
#   worst-relative: max_j [M^-1]_jj            (the objective is its square root)
#   d-optimal:      det(M)^(-1/m)              (monotone in det, scale-free margins)
#   condition:      kappa^2 of D M D, D = diag(M_jj)^-1/2
# Scaling the columns by c changes neither the d-optimal argmax nor the condition number.


_Entry = Callable[[int, int], NDArray[np.float64]]
"""Accessor of a batch of symmetric matrices: ``entry(i, j)`` is the (i, j) element of every matrix."""


def _full(entry: _Entry, m: int) -> NDArray[np.float64]:
    """The (..., m, m) array of a batch given by an accessor."""
    return np.stack([np.stack([entry(min(i, j), max(i, j)) for j in range(m)], axis=-1) for i in range(m)], axis=-2)


def _cofactor_diagonal(entry: _Entry, m: int) -> tuple[NDArray[np.float64], NDArray[np.float64]]:
    """Determinant and diagonal cofactors (shape (..., m)) of a batch of symmetric matrices.

    Closed forms up to m = 4 (vectorised over the batch, far cheaper than a batched
    LAPACK call per tiny matrix); numpy's LU beyond.
    """
    g = entry
    if m == 1:
        det = g(0, 0)
        return det, np.ones(det.shape + (1,))
    if m == 2:
        a, b, d = g(0, 0), g(0, 1), g(1, 1)
        return a * d - b * b, np.stack([d, a], axis=-1)
    if m == 3:
        a, b, c, e, f, i = g(0, 0), g(0, 1), g(0, 2), g(1, 1), g(1, 2), g(2, 2)
        c0 = e * i - f * f
        det = a * c0 - b * (b * i - f * c) + c * (b * f - e * c)
        return det, np.stack([c0, a * i - c * c, a * e - b * b], axis=-1)
    if m == 4:
        # Laplace expansion by complementary 2x2 minors of rows (0, 1) and rows (2, 3).
        e = [[g(min(i, j), max(i, j)) for j in range(4)] for i in range(4)]
        s0 = e[0][0] * e[1][1] - e[1][0] * e[0][1]
        s1 = e[0][0] * e[1][2] - e[1][0] * e[0][2]
        s2 = e[0][0] * e[1][3] - e[1][0] * e[0][3]
        s3 = e[0][1] * e[1][2] - e[1][1] * e[0][2]
        s4 = e[0][1] * e[1][3] - e[1][1] * e[0][3]
        s5 = e[0][2] * e[1][3] - e[1][2] * e[0][3]
        c5 = e[2][2] * e[3][3] - e[3][2] * e[2][3]
        c4 = e[2][1] * e[3][3] - e[3][1] * e[2][3]
        c3 = e[2][1] * e[3][2] - e[3][1] * e[2][2]
        c2 = e[2][0] * e[3][3] - e[3][0] * e[2][3]
        c1 = e[2][0] * e[3][2] - e[3][0] * e[2][2]
        c0 = e[2][0] * e[3][1] - e[3][0] * e[2][1]
        det = s0 * c5 - s1 * c4 + s2 * c3 + s3 * c2 - s4 * c1 + s5 * c0
        cof = np.stack(
            [
                e[1][1] * c5 - e[1][2] * c4 + e[1][3] * c3,
                e[0][0] * c5 - e[0][2] * c2 + e[0][3] * c1,
                e[3][0] * s4 - e[3][1] * s2 + e[3][3] * s0,
                e[2][0] * s3 - e[2][1] * s1 + e[2][2] * s0,
            ],
            axis=-1,
        )
        return det, cof
    M = _full(entry, m)
    det = np.linalg.det(M)
    usable = np.abs(det) > 0
    inverse = np.linalg.inv(np.where(usable[..., None, None], M, np.eye(m)))
    return det, np.diagonal(inverse, axis1=-2, axis2=-1) * det[..., None]


def _entry_loss(entry: _Entry, m: int, criterion: str, below: float = np.inf) -> NDArray[np.float64]:
    """Loss of every matrix of a batch given by an accessor (inf where singular).

    For the condition criterion, matrices whose loss cannot come below ``below`` may be
    returned as inf (only those that can are evaluated exactly).
    """
    if criterion == "condition":
        return _condition_loss(entry, m, below)
    det, cof = _cofactor_diagonal(entry, m)
    scale = np.prod(np.stack([entry(j, j) for j in range(m)], axis=-1), axis=-1)
    ok = (scale > 0) & (det > _SINGULAR * scale)
    safe = np.where(ok, det, 1.0)
    if criterion == "d-optimal":
        return np.where(ok, safe ** (-1.0 / m), np.inf)
    return np.where(ok, (cof / safe[..., None]).max(axis=-1), np.inf)


def _condition_loss(entry: _Entry, m: int, below: float) -> NDArray[np.float64]:
    """Squared condition number of the unit-diagonal matrix C = D M D (the correlations of M).

    Matrices that cannot come below ``below`` may be returned as inf: they are found by
    interlacing (kappa(C)^2 is at least ``(1 + |r|) / (1 - |r|)`` for every correlation
    ``r`` of C, a 2x2 principal block), tested without square roots. The rest get exact
    values: closed form for m = 2 (eigenvalues ``1 +- |r|``) and m = 3 (``lambda = 1 + mu``
    with ``mu^3 - p mu - 2 q = 0``, ``p`` the sum of squared correlations and ``q`` their
    product, solved by the trigonometric formula for three real roots); for m >= 4 a
    variance-inflation bound first (``lambda_min(C) <= 1 / max_j [C^-1]_jj`` with
    ``[C^-1]_jj = [M^-1]_jj M_jj``, and ``lambda_max >= (m - lambda_min) / (m - 1)`` as
    tr C = m), then the eigenvalues.
    """
    diagonal = [np.asarray(entry(j, j), dtype=np.float64) for j in range(m)]
    shape = diagonal[0].shape
    positive = np.all([d > 0 for d in diagonal], axis=0)
    if m == 1:
        return np.where(positive, 1.0, np.inf)
    out = np.full(shape, np.inf).reshape(-1)
    live = positive.reshape(-1)
    if math.isfinite(below):
        limit = below * (1.0 + _PRUNE_MARGIN)
        largest_r2 = ((limit - 1.0) / (limit + 1.0)) ** 2 if limit > 1.0 else 0.0
        for i in range(m):
            for j in range(i + 1, m):
                live = live & (np.reshape(entry(i, j), -1) ** 2 <= largest_r2 * (diagonal[i] * diagonal[j]).reshape(-1))
    live = np.flatnonzero(live)
    if live.size == 0:
        return out.reshape(shape)
    d = [np.sqrt(value.reshape(-1)[live]) for value in diagonal]
    rho = {
        (i, j): np.clip(np.broadcast_to(entry(i, j), shape).reshape(-1)[live] / (d[i] * d[j]), -1.0, 1.0)
        for i in range(m)
        for j in range(i + 1, m)
    }
    if m == 2:
        r = np.abs(rho[0, 1])
        usable = 1.0 - r * r > _SINGULAR
        out[live] = np.where(usable, (1.0 + r) / np.where(usable, 1.0 - r, 1.0), np.inf)
    elif m == 3:
        p = rho[0, 1] ** 2 + rho[0, 2] ** 2 + rho[1, 2] ** 2
        q = rho[0, 1] * rho[0, 2] * rho[1, 2]
        radius = np.sqrt(p / 3.0)
        cosine = np.where(p > 0, q / np.where(p > 0, radius, 1.0) ** 3, 0.0)
        angle = np.arccos(np.clip(cosine, -1.0, 1.0)) / 3.0
        largest = 1.0 + 2.0 * radius * np.cos(angle)
        smallest = 1.0 + 2.0 * radius * np.cos(angle + 2.0 * np.pi / 3.0)
        usable = (1.0 + 2.0 * q - p > _SINGULAR) & (smallest > 0)
        out[live] = np.where(usable, largest / np.where(usable, smallest, 1.0), np.inf)
    else:

        def correlation(i: int, j: int) -> NDArray[np.float64]:
            return np.ones(live.size) if i == j else rho[min(i, j), max(i, j)]

        det, cof = _cofactor_diagonal(correlation, m)
        ok = det > _SINGULAR
        t = 1.0 / np.where(ok, cof.max(axis=-1) / np.where(ok, det, 1.0), 1.0)
        hopeful = ok & ((m - t) / ((m - 1) * t) < below * (1.0 + _PRUNE_MARGIN))
        if np.any(hopeful):
            matrices = np.stack([np.stack([correlation(i, j)[hopeful] for j in range(m)], axis=-1) for i in range(m)], axis=-2)
            eig = np.linalg.eigvalsh(matrices)
            usable = eig[:, 0] > 0
            out[live[hopeful]] = np.where(usable, eig[:, -1] / np.where(usable, eig[:, 0], 1.0), np.inf)
    return out.reshape(shape)


def _gram_loss(M: NDArray[np.float64], criterion: str, *, below: float = np.inf) -> NDArray[np.float64]:
    """Loss of every Gram matrix in a (..., m, m) batch (inf where singular); see :func:`_entry_loss`."""
    return _entry_loss(lambda i, j: M[..., i, j], M.shape[-1], criterion, below)


def _gap_from_losses(criterion: str, loss: float, lower: float, m: int) -> float:
    """Proven factor between a plan's objective and the optimum, from a loss and a lower bound on it."""
    if not (lower > 0 and math.isfinite(lower)):
        return math.inf
    ratio = max(loss / lower, 1.0)
    return ratio**m if criterion == "d-optimal" else math.sqrt(ratio)


# --------------------------------------------------------------------------------------------
# Lower bounds over all plans (how far a greedy plan may be from the optimum)
# --------------------------------------------------------------------------------------------
#
# Each bound below holds for every set S of r candidate rows, whatever vectors it is evaluated
# with; the vectors come from Frank-Wolfe iterations on the continuous relaxation (weights in
# [0, 1] on the candidates summing to r), where the bounds are tightest.


def _top_sum(values: NDArray[np.float64], r: int, axis: int = -1) -> NDArray[np.float64]:
    """Sum of the ``r`` largest entries along ``axis``."""
    if r == 1:
        return values.max(axis=axis)
    top = -np.partition(-values, r - 1, axis=axis)
    return np.take(top, np.arange(r), axis=axis).sum(axis=axis)


def _top_index(values: NDArray[np.float64], r: int) -> NDArray[np.intp]:
    """Indices of the ``r`` largest entries along the last axis (unordered)."""
    return np.argpartition(-values, r - 1, axis=-1)[..., :r]


def _lower_bound_worst_relative(X: NDArray[np.float64], r: int, iterations: int) -> float:
    """Lower bound on min over r-sets of max_j [(X_S^T X_S)^-1]_jj.

    For any u and j, ``[M_S^-1]_jj >= u_j^2 / (u^T M_S u)`` (Cauchy-Schwarz) and ``u^T M_S u``
    is at most the sum of the r largest ``(u . x_c)^2``; weighting components by any ``mu`` in
    the simplex, ``max_j var_j >= sum_j mu_j var_j >= (sum_j mu_j u_jj)^2 / (sum of the r
    largest sum_j mu_j (u_j . x_c)^2)`` with ``u_j`` the columns of any symmetric ``U``.
    """
    n, m = X.shape
    outer = np.einsum("ni,nj->nij", X, X)
    relaxed = (r / n) * outer.sum(axis=0)
    best = 0.0
    for step in range(iterations):
        U = np.linalg.inv(relaxed + 1e-12 * np.trace(relaxed) * np.eye(m))
        projection = (X @ U) ** 2  # (n, j)
        scale = np.abs(np.diag(U))
        with np.errstate(divide="ignore", invalid="ignore"):
            best = max(best, float(np.nanmax(scale**2 / _top_sum(projection, r, axis=0))))
        for power in (1.0, 4.0, 16.0):
            mu = (scale / scale.max()) ** power
            mu /= mu.sum()
            with np.errstate(divide="ignore", invalid="ignore"):
                joint = (mu @ scale) ** 2 / _top_sum(projection @ mu, r)
            best = max(best, float(np.nan_to_num(joint, nan=0.0)))
        # Frank-Wolfe step towards the r rows that most reduce the weighted variance.
        mu = (scale / scale.max()) ** 8.0
        vertex = outer[_top_index(projection @ (mu / mu.sum()), r)].sum(axis=0)
        gamma = 2.0 / (step + 3.0)
        relaxed = (1.0 - gamma) * relaxed + gamma * vertex
    return best


def _lower_bound_d_optimal(X: NDArray[np.float64], r: int, iterations: int) -> float:
    """Lower bound on min over r-sets of det(X_S^T X_S)^(-1/m).

    For any positive definite Q, ``det M_S <= det Q (tr(Q^-1 M_S) / m)^m`` (arithmetic-geometric
    mean of the eigenvalues of Q^-1 M_S) and ``tr(Q^-1 M_S)`` is at most the sum of the r largest
    leverages ``x_c^T Q^-1 x_c``.
    """
    n, m = X.shape
    outer = np.einsum("ni,nj->nij", X, X)
    relaxed = (r / n) * outer.sum(axis=0)
    lowest = math.inf  # upper bound on log det
    for step in range(iterations):
        sign, log_det = np.linalg.slogdet(relaxed)
        if sign <= 0:
            break
        leverage = np.einsum("nk,kl,nl->n", X, np.linalg.inv(relaxed), X)
        lowest = min(lowest, float(log_det + m * np.log(_top_sum(leverage, r) / m)))
        gamma = 2.0 / (step + 3.0)
        relaxed = (1.0 - gamma) * relaxed + gamma * outer[_top_index(leverage, r)].sum(axis=0)
    return math.exp(-lowest / m) if math.isfinite(lowest) else 0.0


def _lower_bound_condition(X: NDArray[np.float64], r: int, iterations: int) -> float:
    """Lower bound on min over r-sets of the squared scaled condition number.

    For any w, ``lambda_min(D M_S D) <= (w^T M_S w) / (w^T diag(M_S) w)``, a ratio of sums over
    the set whose largest value over r-sets is the root of the convex decreasing
    ``F(t) = (sum of the r largest a_c - t b_c)``; Dinkelbach's iteration climbs to it from
    below and, every piece of F falling at least as fast as the r smallest ``b_c`` sum, a
    secant step bounds it from above. With ``lambda_min <= t`` and trace m,
    ``kappa^2 >= (m - t) / ((m - 1) t)``.
    """
    n, m = X.shape
    if m == 1:
        return 1.0
    outer = np.einsum("ni,nj->nij", X, X)
    relaxed = (r / n) * outer.sum(axis=0)
    smallest = 1.0
    for _ in range(iterations):
        d = 1.0 / np.sqrt(np.maximum(np.diag(relaxed), 1e-300))
        w = np.linalg.eigh(relaxed * d[:, None] * d[None, :])[1][:, 0] * d  # weakest scaled direction
        a, b = (X @ w) ** 2, (X**2) @ (w**2)
        t = 0.0
        for _ in range(4):
            chosen = _top_index(a - t * b, r)
            if not b[chosen].sum() > 0:
                break
            t = float(a[chosen].sum() / b[chosen].sum())
        slowest = float(-_top_sum(-b, r))
        upper = t + max(float(_top_sum(a - t * b, r)), 0.0) / slowest if slowest > 0 else 1.0
        smallest = min(smallest, max(upper, 1e-300))
        relaxed = 0.5 * relaxed + 0.5 * outer[_top_index(a - upper * b, r)].sum(axis=0)
    return (m - smallest) / ((m - 1) * smallest)


_LOWER_BOUNDS = {
    "worst-relative": _lower_bound_worst_relative,
    "d-optimal": _lower_bound_d_optimal,
    "condition": _lower_bound_condition,
}


# --------------------------------------------------------------------------------------------
# Greedy and exchange search
# --------------------------------------------------------------------------------------------


def _set_loss(X: NDArray[np.float64], sets: NDArray[np.intp], criterion: str) -> NDArray[np.float64]:
    """Loss of each row of ``sets`` (B, K) of candidate indices."""
    rows = X[sets]
    return _gram_loss(np.einsum("bki,bkj->bij", rows, rows), criterion)


def _greedy(
    X: NDArray[np.float64], count: int, conflict: NDArray[np.bool_] | None, criterion: str
) -> NDArray[np.intp] | None:
    """Forward selection with a small ridge so that the first picks (fewer than m rows) can be compared."""
    n, m = X.shape
    outer = np.einsum("ni,nj->nij", X, X)
    ridge = 1e-6 * np.trace(outer.sum(axis=0)) / m * np.eye(m)
    chosen: list[int] = []
    allowed = np.ones(n, dtype=bool)
    for _ in range(count):
        candidates = np.flatnonzero(allowed)
        if candidates.size == 0:
            return None
        gram = outer[chosen].sum(axis=0) + ridge + outer[candidates]
        # The condition number is scale-free and flat while fewer than m rows are chosen;
        # the worst relative variance points the same way and separates the candidates.
        loss = _gram_loss(gram, "worst-relative" if criterion == "condition" else criterion)
        pick = int(candidates[int(np.argmin(loss))])
        chosen.append(pick)
        allowed[pick] = False
        if conflict is not None:
            allowed &= ~conflict[pick]
    return np.array(chosen, dtype=np.intp)


def _spacing_tolerance(wavelengths: NDArray[np.float64]) -> float:
    """Rounding allowance when comparing distances between grid wavelengths (nm)."""
    return 1e-9 * max(1.0, float(np.max(np.abs(wavelengths))))


def _spaced_start(wavelengths: NDArray[np.float64], count: int, separation: float) -> NDArray[np.intp] | None:
    """The first ``count`` wavelengths of the left-to-right greedy spacing (None when fewer fit).

    Taking the leftmost wavelength that keeps the spacing packs the most points into the
    range (the interval-scheduling argument), so None means no feasible plan exists.
    """
    picks = [0]
    for index in range(1, wavelengths.size):
        if len(picks) == count:
            break
        if wavelengths[index] - wavelengths[picks[-1]] >= separation - _spacing_tolerance(wavelengths):
            picks.append(index)
    return np.array(picks, dtype=np.intp) if len(picks) >= count else None


def _exchange(
    X: NDArray[np.float64], start: NDArray[np.intp], conflict: NDArray[np.bool_] | None, criterion: str
) -> tuple[NDArray[np.intp], float, int]:
    """Swap one member for one non-member while the criterion improves (best swap first).

    Returns the set, its loss and the number of sets evaluated.
    """
    n = X.shape[0]
    current = np.array(start)
    loss = float(_set_loss(X, current[None], criterion)[0])
    evaluated = 1
    for _ in range(10 * n):
        outside = np.setdiff1d(np.arange(n), current)
        trial = np.repeat(current[None], current.size * outside.size, axis=0)
        slot = np.repeat(np.arange(current.size), outside.size)
        trial[np.arange(trial.shape[0]), slot] = np.tile(outside, current.size)
        if conflict is not None:
            keep = np.ones(trial.shape[0], dtype=bool)
            for a in range(current.size):
                for b in range(a + 1, current.size):
                    keep &= ~conflict[trial[:, a], trial[:, b]]
            trial = trial[keep]
        if trial.shape[0] == 0:
            break
        losses = _set_loss(X, trial, criterion)
        evaluated += trial.shape[0]
        best = int(np.argmin(losses))
        if not losses[best] < loss * (1.0 - _IMPROVEMENT):
            break
        current, loss = trial[best], float(losses[best])
    return np.sort(current), loss, evaluated


def _greedy_exchange(
    X: NDArray[np.float64], wavelengths: NDArray[np.float64], count: int, conflict: NDArray[np.bool_] | None,
    separation: float, criterion: str,
) -> tuple[NDArray[np.intp], float, int]:
    """Best of the exchange searches started from greedy picks (and a spaced start when needed)."""
    starts = [_greedy(X, count, conflict, criterion)]
    if criterion != "d-optimal":
        starts.append(_greedy(X, count, conflict, "d-optimal"))
    if conflict is not None:
        starts.append(_spaced_start(wavelengths, count, separation))
    best: tuple[NDArray[np.intp], float, int] | None = None
    evaluated = 0
    for start in starts:
        if start is None:
            continue
        result = _exchange(X, start, conflict, criterion)
        evaluated += result[2]
        if best is None or result[1] < best[1]:
            best = result
    assert best is not None  # the spaced start exists whenever any plan does (checked by the caller)
    return best[0], best[1], evaluated


# --------------------------------------------------------------------------------------------
# Exact search: branch and bound
# --------------------------------------------------------------------------------------------


class _BranchAndBound:
    """Proven-optimal K-subset by depth-first branch and bound with vectorised blocks.

    Parameters
    ----------
    X : ndarray, shape (n, m)
        Scaled design rows of the candidates.
    count : int
        Number of wavelengths K.
    conflict : ndarray of bool, shape (n, n), or None
        True where two candidates are closer than the least separation.
    criterion : str
    incumbent : ndarray of int, shape (K,)
        A feasible start (from greedy plus exchange) and ``incumbent_loss`` its loss.
    """

    def __init__(
        self, X: NDArray[np.float64], count: int, conflict: NDArray[np.bool_] | None, criterion: str,
        incumbent: NDArray[np.intp], incumbent_loss: float,
    ) -> None:
        n, m = X.shape
        gram = X.T @ X
        # Candidates in falling leverage order: late candidates are then poor, so the
        # bounds on partial sets that can only be completed from them bite hard.
        leverage = np.einsum("nk,kl,nl->n", X, np.linalg.pinv(gram), X)
        self.order = np.argsort(-leverage, kind="stable")
        self.position = np.empty(n, dtype=np.intp)
        self.position[self.order] = np.arange(n)
        self.X = X[self.order]
        self.conflict = None if conflict is None else conflict[np.ix_(self.order, self.order)]
        self.count = count
        self.criterion = criterion
        self.best_set = self.position[np.asarray(incumbent)]
        self.best_loss = float(incumbent_loss)
        self.evaluated = 0
        first, second = np.triu_indices(n, 1)
        if self.conflict is not None:
            keep = ~self.conflict[first, second]
            first, second = first[keep], second[keep]
        # Completion pairs in lexicographic order: those after position l are a suffix.
        self.pair_first, self.pair_second = first, second
        self.pair_offset = np.searchsorted(first, np.arange(n + 1))
        # Gram matrices by their upper-triangle entries, one contiguous row per entry.
        self.tri_rows, self.tri_cols = np.triu_indices(m)
        self.tri_lookup = np.zeros((m, m), dtype=np.intp)
        self.tri_lookup[self.tri_rows, self.tri_cols] = np.arange(self.tri_rows.size)
        self.tri_lookup[self.tri_cols, self.tri_rows] = np.arange(self.tri_rows.size)
        self.single_entries = np.ascontiguousarray((self.X[:, self.tri_rows] * self.X[:, self.tri_cols]).T)
        self.pair_entries = self.single_entries[:, first] + self.single_entries[:, second]
        self.screen = self._aim(self.best_set)

    def run(self) -> tuple[NDArray[np.intp], float, int]:
        """Search; returns candidate indices (original order) of the optimum, its loss, sets evaluated."""
        # kappa >= 1 for every matrix: an incumbent with kappa = 1 is optimal already.
        if not (self.criterion == "condition" and self.best_loss <= 1.0 + _IMPROVEMENT):
            if self.count == 1:
                losses = _entry_loss(lambda i, j: self.single_entries[self.tri_lookup[i, j]], self.X.shape[1], self.criterion)
                self.evaluated += losses.size
                self._offer(np.argmin(losses)[None], float(losses.min()))
            else:
                self._descend(np.zeros((1, 0), dtype=np.intp))
        return np.sort(self.order[self.best_set]), self.best_loss, self.evaluated

    def _offer(self, members: NDArray[np.intp], loss: float) -> None:
        """Take a better set as the incumbent and aim the screen at it."""
        if loss < self.best_loss * (1.0 - _IMPROVEMENT):
            self.best_loss = loss
            self.best_set = np.sort(members)
            self.screen = self._aim(self.best_set)

    def _entries(self, members: NDArray[np.intp]) -> NDArray[np.float64]:
        """Upper-triangle entries of the partial sets' Gram matrices, shape (B, n_entries)."""
        return self.single_entries[:, members].sum(axis=2).T

    def _aim(self, members: NDArray[np.intp]) -> _Screen:
        """A screen built on the Gram matrix of ``members`` (the incumbent)."""
        rows = self.X[members]
        return _Screen(rows.T @ rows, self.criterion, self.single_entries, self.pair_entries)

    def _remaining(self, members: NDArray[np.intp]) -> NDArray[np.bool_]:
        n = self.X.shape[0]
        last = members[:, -1] if members.shape[1] else np.full(members.shape[0], -1)
        mask = np.arange(n)[None, :] > last[:, None]
        if self.conflict is not None and members.shape[1]:
            mask &= ~self.conflict[members].any(axis=1)
        return mask

    def _descend(self, members: NDArray[np.intp]) -> None:
        """Extend surviving partial sets by one later candidate, screen, recurse; enumerate the last two."""
        r = self.count - members.shape[1]
        if r == 2:
            self._leaves(members)
            return
        parents = max(1, _NODE_BLOCK // self.X.shape[0])
        for start in range(0, members.shape[0], parents):
            block = members[start : start + parents]
            parent, child = np.nonzero(self._remaining(block))
            children = np.concatenate([block[parent], child[:, None]], axis=1)
            for first in range(0, children.shape[0], _NODE_BLOCK):
                survivors = self._prune(children[first : first + _NODE_BLOCK], r - 1)
                if survivors.shape[0]:
                    self._descend(survivors)

    def _prune(self, members: NDArray[np.intp], r: int) -> NDArray[np.intp]:
        """Keep the partial sets that, completed by r later candidates, may still beat the incumbent."""
        node_a, node_b = self.screen.values(self._entries(members))
        members = members[self.screen.passes_nodes(node_a, node_b, members[:, -1], r, self.best_loss)]
        return members

    def _leaves(self, members: NDArray[np.intp]) -> None:
        """Evaluate every completion pair of every partial set, grouped by the last member.

        A leaf is first put through the screen's linear tests (two additions and a
        comparison each); only the leaves that pass get the closed-form criterion.
        """
        p = members.shape[1]
        m = self.X.shape[1]
        last = members[:, -1] if p else np.full(members.shape[0], -1)
        node_entries = self._entries(members)
        screen = self.screen
        node_a, node_b = screen.values(node_entries)
        blocked = self.conflict[members].any(axis=1) if (self.conflict is not None and p) else None
        total = self.pair_first.size
        for value in np.unique(last):
            group = np.flatnonzero(last == value)
            lo = int(self.pair_offset[value + 1])
            if lo == total:
                continue
            rows = max(1, _LEAF_BLOCK // (total - lo))
            for g0 in range(0, group.size, rows):
                nodes = group[g0 : g0 + rows]
                cols = max(1, _LEAF_BLOCK // nodes.size)
                for s0 in range(lo, total, cols):
                    s1 = min(total, s0 + cols)
                    if screen is not self.screen:  # a better incumbent re-aimed the screen
                        screen = self.screen
                        node_a, node_b = screen.values(node_entries)
                    keep = screen.passes_leaves(
                        node_a[nodes], None if node_b is None else node_b[nodes], s0, s1, self.best_loss
                    )
                    if blocked is not None:
                        keep &= ~(blocked[nodes][:, self.pair_first[s0:s1]] | blocked[nodes][:, self.pair_second[s0:s1]])
                    self.evaluated += keep.size
                    passing = int(np.count_nonzero(keep))
                    if passing == 0:
                        continue
                    if 4 * passing > keep.size:
                        # Most leaves pass (flat criteria): broadcast sums over the block beat gathering.
                        block = node_entries[nodes].T[:, :, None] + self.pair_entries[:, None, s0:s1]
                        loss = _entry_loss(lambda i, j: block[self.tri_lookup[i, j]], m, self.criterion, self.best_loss)
                        loss[~keep] = np.inf
                        best = int(np.argmin(loss))
                        node, pair = divmod(best, s1 - s0)
                        value = float(loss[node, pair])
                    else:
                        node_index, pair_index = np.nonzero(keep)
                        gathered = node_entries[nodes[node_index]].T + self.pair_entries[:, pair_index + s0]
                        loss = _entry_loss(lambda i, j: gathered[self.tri_lookup[i, j]], m, self.criterion, self.best_loss)
                        best = int(np.argmin(loss))
                        node, pair, value = int(node_index[best]), int(pair_index[best]), float(loss[best])
                    if value < self.best_loss * (1.0 - _IMPROVEMENT):
                        pair += s0
                        self._offer(
                            np.concatenate([members[nodes[node]], [self.pair_first[pair], self.pair_second[pair]]]), value
                        )


class _Screen:
    """Linear necessary conditions that every set beating the incumbent meets.

    Each test ``t`` reads ``<A_t, M> - alpha_t <B_t, M> >= theta_t`` on the set's Gram
    matrix ``M``, which is a sum over the set's rows, so with the values of single
    candidates and of completion pairs precomputed a leaf costs two additions and a
    comparison per test, and a partial set is tested against the largest sum any
    ``r`` later candidates can add (a suffix table). The matrices come from the
    incumbent, near which the inequalities are tight:

    * worst-relative: ``var_k(S) >= u_k^2 / (u^T M u)`` for any ``u``, so ``u^T M u >=
      max_k u_k^2 / best`` for ``u`` the columns and eigenvectors of the incumbent's ``M^-1``;
    * d-optimal: ``det M <= det Q (tr(Q^-1 M) / m)^m`` with ``Q`` the incumbent's Gram matrix;
    * condition: ``lambda_min(D M D) <= w^T M w / w^T diag(M) w`` for ``w`` the incumbent's
      scaled eigen-directions, and ``kappa^2 >= (m - lambda_min) / ((m - 1) lambda_min)``;
      and interlacing, ``|M_ij| <= (best - 1) / (best + 1) sqrt(M_ii M_jj)``, made linear by
      ``sqrt(M_ii M_jj) <= (s M_ii + M_jj / s) / 2`` for a range of ``s``. These tests are used
      on partial sets only: on complete sets the exact interlacing check is cheaper.
    """

    def __init__(
        self, gram: NDArray[np.float64], criterion: str, single_entries: NDArray[np.float64], pair_entries: NDArray[np.float64]
    ) -> None:
        m = gram.shape[0]
        self.criterion = criterion
        self.m = m
        B: NDArray[np.float64] | None = None
        self.peak = np.zeros(0)
        self.log_det = 0.0
        self.leaf_tests = 0
        if not np.isfinite(_gram_loss(gram, criterion)):
            # No usable incumbent yet (every start was singular): no tests, everything passes.
            A = np.zeros((0, m, m))
            B = None
        elif criterion == "worst-relative":
            inverse = np.linalg.inv(gram)
            directions = np.concatenate([inverse, np.linalg.eigh(inverse)[1]], axis=1).T  # (2m, m)
            A = np.einsum("ti,tj->tij", directions, directions)
            self.peak = np.max(directions**2, axis=1)
        elif criterion == "d-optimal":
            A = np.linalg.inv(gram)[None]
            self.log_det = float(np.linalg.slogdet(gram)[1])
        else:
            d = 1.0 / np.sqrt(np.diag(gram))
            vectors = np.linalg.eigh(gram * d[:, None] * d[None, :])[1]
            w = (vectors * d[:, None]).T  # (m, m): every scaled eigen-direction, weakest first
            A = np.einsum("ti,tj->tij", w, w)
            B = np.einsum("ti,ij->tij", w**2, np.eye(m))
            self.leaf_tests = 0  # at complete sets the exact interlacing check in _condition_loss is cheaper
            # Interlacing, linearised for partial sets: |M_ij| <= rho0 sqrt(M_ii M_jj) <=
            # rho0 (s M_ii + M_jj / s) / 2 for every s > 0, tightest at s = sqrt(M_jj / M_ii);
            # s spans a factor 4 either side of the incumbent's ratio.
            extra_a, extra_b = [], []
            for i, j in zip(*np.triu_indices(m, 1)):
                for sign in (1.0, -1.0):
                    for s in np.sqrt(gram[j, j] / gram[i, i]) * 2.0 ** (np.arange(-4, 5) / 2.0):
                        a = np.zeros((m, m))
                        a[i, j] = a[j, i] = -sign
                        b = np.zeros((m, m))
                        b[i, i], b[j, j] = s, 1.0 / s
                        extra_a.append(a)
                        extra_b.append(b)
            A = np.concatenate([A, np.array(extra_a).reshape(-1, m, m)])
            B = np.concatenate([B, np.array(extra_b).reshape(-1, m, m)])
        # <A, M> over the upper-triangle entries of symmetric M: off-diagonal entries count twice.
        rows, cols = np.triu_indices(m)
        twice = np.where(rows == cols, 1.0, 2.0)
        self.weights_a = A[:, rows, cols] * twice
        self.weights_b = None if B is None else B[:, rows, cols] * twice
        self.single_a, self.single_b = self._on(single_entries)
        self.pair_a, self.pair_b = self._on(pair_entries)
        self.tests = A.shape[0]
        if criterion != "condition":
            self.leaf_tests = self.tests
        self._tables: dict[tuple[int, float], NDArray[np.float64]] = {}

    def _on(self, entries: NDArray[np.float64]) -> tuple[NDArray[np.float64], NDArray[np.float64] | None]:
        """The tests' linear parts on matrices given by upper-triangle entries (n_entries, batch) -> (n_tests, batch)."""
        return self.weights_a @ entries, None if self.weights_b is None else self.weights_b @ entries

    def values(self, entries: NDArray[np.float64]) -> tuple[NDArray[np.float64], NDArray[np.float64] | None]:
        """The tests' linear parts on partial sets given by entries (B, n_entries) -> (B, n_tests) each."""
        a, b = self._on(entries.T)
        return a.T, None if b is None else b.T

    def _limits(self, best: float) -> tuple[NDArray[np.float64], NDArray[np.float64]]:
        """``alpha`` and ``theta`` of each test for a set to beat ``best`` (with the pruning margin)."""
        limit = best * (1.0 + _PRUNE_MARGIN)
        tests = self.tests
        if tests == 0 or self.criterion == "worst-relative":
            return np.zeros(tests), self.peak / limit
        if self.criterion == "d-optimal":
            return np.zeros(tests), np.full(tests, self.m * math.exp(-self.log_det / self.m) / limit)
        # Condition: lambda_min(C) >= m / ((m - 1) best + 1), and every |r_ij| <= (best - 1) / (best + 1).
        alpha = np.full(tests, -(limit - 1.0) / (limit + 1.0))
        alpha[: self.m] = self.m / ((self.m - 1) * limit + 1.0)
        return alpha, np.zeros(tests)

    def passes_leaves(
        self, node_a: NDArray[np.float64], node_b: NDArray[np.float64] | None, s0: int, s1: int, best: float
    ) -> NDArray[np.bool_]:
        """Mask (B, s1 - s0) of leaves (partial set + pair s0..s1) that meet the leaf tests."""
        alpha, theta = self._limits(best)
        keep = np.ones((node_a.shape[0], s1 - s0), dtype=bool)
        for t in range(self.leaf_tests):
            node = node_a[:, t] if node_b is None else node_a[:, t] - alpha[t] * node_b[:, t]
            pair = self.pair_a[t, s0:s1] if self.pair_b is None else self.pair_a[t, s0:s1] - alpha[t] * self.pair_b[t, s0:s1]
            keep &= node[:, None] + pair[None, :] >= theta[t]
        return keep

    def passes_nodes(
        self, node_a: NDArray[np.float64], node_b: NDArray[np.float64] | None, last: NDArray[np.intp], r: int, best: float
    ) -> NDArray[np.bool_]:
        """Mask (B,) of partial sets that, completed by the best r later candidates per test, meet every test."""
        alpha, theta = self._limits(best)
        if (r, best) not in self._tables:
            single = self.single_a if self.single_b is None else self.single_a - alpha[:, None] * self.single_b
            self._tables = {(r, best): _suffix_top(single, r)}
        node = node_a if node_b is None else node_a - alpha[None, :] * node_b
        return np.all(node + self._tables[r, best][:, last + 1].T >= theta[None, :], axis=1)


def _suffix_top(values: NDArray[np.float64], r: int) -> NDArray[np.float64]:
    """``out[:, s]`` = sum of the r largest of ``values[:, s:]`` (-inf when fewer than r), shape (T, n + 1)."""
    T, n = values.shape
    out = np.full((T, n + 1), -np.inf)
    top = np.full((T, r), -np.inf)
    for start in range(n - 1, -1, -1):
        top = np.sort(np.concatenate([top, values[:, start : start + 1]], axis=1), axis=1)[:, 1:]
        out[:, start] = top.sum(axis=1)
    return out


# --------------------------------------------------------------------------------------------
# Windows for scanning instruments
# --------------------------------------------------------------------------------------------


def _window_search(
    X: NDArray[np.float64], wavelengths: NDArray[np.float64], under: NDArray[np.bool_], count: int, width: float, criterion: str
) -> tuple[NDArray[np.intp], float, int]:
    """Best set of ``count`` disjoint windows, each the narrowest run of grid points at least ``width`` nm wide.

    Widening a window adds rows, which can only lower every variance and raise the
    determinant, so for those criteria nothing wider than asked is worth scanning; the
    full-scan comparison shows what the widest window gives. Every window (and every
    combination of disjoint windows) is evaluated, so the result is exact.
    """
    n, m = X.shape
    tolerance = 1e-9 * max(1.0, float(wavelengths[-1]))
    ends = np.searchsorted(wavelengths, wavelengths + width - tolerance, side="left")
    violations = np.concatenate([[0], np.cumsum(~under)])
    starts = np.flatnonzero(ends < n)
    ends = ends[starts]
    clean = violations[ends + 1] - violations[starts] == 0
    starts, ends = starts[clean], ends[clean]
    if starts.size == 0:
        return np.zeros(0, dtype=np.intp), math.inf, 0
    outer = np.einsum("ni,nj->nij", X, X)
    grams = np.stack([outer[a : b + 1].sum(axis=0) for a, b in zip(starts, ends)])
    if count == 1:
        combos = np.arange(starts.size)[:, None]
    else:
        first, second = np.triu_indices(starts.size, 1)
        keep = starts[second] > ends[first]
        combos = np.stack([first[keep], second[keep]], axis=1)
        if count == 3:
            blocks = []
            for i, j in combos:
                later = np.flatnonzero(starts > ends[j])
                blocks.append(np.column_stack([np.full(later.size, i), np.full(later.size, j), later]))
            combos = np.concatenate(blocks) if blocks else np.zeros((0, 3), dtype=np.intp)
    if combos.shape[0] == 0:
        return np.zeros(0, dtype=np.intp), math.inf, 0
    losses = _gram_loss(grams[combos].sum(axis=1), criterion)
    best = int(np.argmin(losses))
    chosen = np.concatenate([np.arange(starts[w], ends[w] + 1) for w in combos[best]])
    return np.sort(chosen), float(losses[best]), int(combos.shape[0])


# --------------------------------------------------------------------------------------------
# Front door
# --------------------------------------------------------------------------------------------


def _expected_concentrations(library: ReferenceLibrary, expected: Mapping[str, float] | None) -> NDArray[np.float64]:
    given: dict[str, float] = {}
    for name, value in (expected or {}).items():
        if name not in library.names:
            raise AbsolveError(
                f"--expected names {name!r}, which is not in the library",
                fix="use one of " + ", ".join(library.names),
            )
        try:
            number = float(value)
        except (TypeError, ValueError):
            number = math.nan
        if not (math.isfinite(number) and number > 0):
            raise AbsolveError(
                f"--expected {name}={value!r}: the expected concentration must be a number above zero",
                fix=f"write e.g. --expected {name}=2.5 (in {library.unit})",
            )
        given[name] = number
    values = []
    for info in library.components:
        value = given.get(info.name, info.expected_concentration)
        if value is None:
            raise AbsolveError(
                f"component {info.name!r} has no calibrated concentration range to plan for",
                fix=f"give its expected concentration with --expected {info.name}=CONC (in {library.unit})",
            )
        if not value > 0:
            raise AbsolveError(
                f"component {info.name!r}: the middle of its calibrated range is {value:g}, not above zero",
                fix=f"give its expected concentration with --expected {info.name}=CONC (in {library.unit})",
            )
        values.append(float(value))
    return np.array(values)


def _check_options(count: int, max_absorbance: float, min_separation_nm: float, criterion: str, window_nm: float | None, search: str) -> None:
    if criterion not in CRITERIA:
        raise AbsolveError(f"unknown criterion (--criterion) {criterion!r}", fix="use one of " + ", ".join(CRITERIA))
    if search not in SEARCH_METHODS:
        raise AbsolveError(f"unknown search (--search) {search!r}", fix="use one of " + ", ".join(SEARCH_METHODS))
    if isinstance(count, bool) or not isinstance(count, (int, np.integer)) or count < 1:
        raise AbsolveError(f"--count must be a whole number of at least 1, got {count!r}", fix="write e.g. --count 4")
    if not (math.isfinite(max_absorbance) and max_absorbance > 0):
        raise AbsolveError(f"--max-absorbance must be a number above zero, got {max_absorbance!r}", fix="write e.g. --max-absorbance 1.5")
    if not (math.isfinite(min_separation_nm) and min_separation_nm >= 0):
        raise AbsolveError(f"--min-separation must be a number of nm >= 0, got {min_separation_nm!r}", fix="write e.g. --min-separation 10")
    if window_nm is not None:
        if not (math.isfinite(window_nm) and window_nm > 0):
            raise AbsolveError(f"--window must be a width in nm above zero, got {window_nm!r}", fix="write e.g. --window 40")
        if min_separation_nm > 0:
            raise AbsolveError("--min-separation applies to single wavelengths, not to --window", fix="drop one of them")
        if search != "auto":
            raise AbsolveError("--search applies to single wavelengths; windows are always searched exhaustively", fix="drop --search")
        if count > _WINDOW_LIMIT:
            raise AbsolveError(
                f"--count {count} windows: at most {_WINDOW_LIMIT} scan windows are planned at once",
                fix=f"use --count 1 to {_WINDOW_LIMIT} with --window",
            )


def plan_wavelengths(
    library: ReferenceLibrary,
    count: int,
    *,
    expected: Mapping[str, float] | None = None,
    wavelength_range: tuple[float | None, float | None] | None = None,
    max_absorbance: float = 1.5,
    min_separation_nm: float = 0.0,
    criterion: Criterion = "worst-relative",
    window_nm: float | None = None,
    search: SearchMethod = "auto",
) -> WavelengthPlan:
    """Choose ``count`` analytical wavelengths (or scan windows) that best measure the library's components.

    Parameters
    ----------
    library : ReferenceLibrary
        Absorptivity spectra of the components (per unit concentration per cm).
    count : int
        Number of wavelengths to read (at least the number of components); in window
        mode the number of disjoint scan windows (1 to 3).
    expected : mapping of str to float, optional
        Expected concentration of components in the library's unit; the others default
        to the middle of their calibrated range.
    wavelength_range : (float or None, float or None), optional
        Candidates are the library's grid points inside this range (nm).
    max_absorbance : float, default 1.5
        Ceiling on the expected mixture's absorbance (1 cm) at every chosen wavelength.
    min_separation_nm : float, default 0
        Least distance between chosen wavelengths.
    criterion : {"worst-relative", "condition", "d-optimal"}
        What "best" means (see the module docstring).
    window_nm : float, optional
        Plan contiguous scan windows at least this wide instead of single wavelengths.
    search : {"auto", "exact", "greedy"}
        ``"auto"``: exact branch and bound up to 4 wavelengths among at most 600 candidates,
        greedy plus exchange (with a proven gap bound) otherwise.

    Returns
    -------
    WavelengthPlan

    Raises
    ------
    AbsolveError
        For invalid options, a missing expected concentration, fewer wavelengths than
        components, or no feasible plan under the range, ceiling and separation.

    Examples
    --------
    >>> import numpy as np
    >>> from absolve import library_from_absorptivities
    >>> grid = np.arange(400.0, 701.0, 5.0)
    >>> spectra = [np.exp(-0.5 * ((grid - p) / 30) ** 2) for p in (480, 560)]
    >>> library = library_from_absorptivities(grid, spectra, ["yellow", "red"], "mg/L")
    >>> plan = plan_wavelengths(library, 2, expected={"yellow": 1.0, "red": 1.0})
    >>> plan.optimal, plan.wavelengths_nm.size
    (True, 2)
    """
    _check_options(count, max_absorbance, min_separation_nm, criterion, window_nm, search)
    concentration = _expected_concentrations(library, expected)
    grid = library.wavelengths
    low, high = wavelength_range if wavelength_range is not None else (None, None)
    low = float(grid[0]) if low is None else float(low)
    high = float(grid[-1]) if high is None else float(high)
    inside = (grid >= low) & (grid <= high)
    if np.count_nonzero(inside) < 2:
        raise AbsolveError(
            f"the range {low:g}-{high:g} nm holds {np.count_nonzero(inside)} of the library's wavelengths "
            f"({grid[0]:g}-{grid[-1]:g} nm)",
            fix="choose a --range inside the library's wavelengths",
        )
    wavelengths = grid[inside]
    absorptivity = library.absorptivity[:, inside]  # (m, n)
    absorbance = concentration @ absorptivity
    under = absorbance <= max_absorbance
    m = library.n_components
    X = absorptivity.T * concentration
    if not np.any(under):
        raise AbsolveError(
            f"the expected mixture absorbs more than {max_absorbance:g} at every wavelength in {low:g}-{high:g} nm "
            f"(least {absorbance.min():.3g})",
            fix="dilute (lower the --expected concentrations), raise --max-absorbance, or widen --range",
        )
    full_loss = float(_gram_loss(X[under].T @ X[under], criterion))
    if not math.isfinite(full_loss):
        raise AbsolveError(
            "even every candidate wavelength cannot tell the components apart (their spectra are proportional "
            "there, or one does not absorb)",
            fix="widen --range or raise --max-absorbance",
        )
    if window_nm is not None:
        chosen, loss, evaluated = _window_search(X, wavelengths, under, count, float(window_nm), criterion)
        if chosen.size == 0 or not math.isfinite(loss):
            raise AbsolveError(
                f"no {count} disjoint window(s) of {window_nm:g} nm in {low:g}-{high:g} nm keep the expected absorbance "
                f"<= {max_absorbance:g} and tell the components apart",
                fix="use a narrower --window, fewer windows, a wider --range or a higher --max-absorbance",
            )
        return _assemble(
            library, concentration, wavelengths, absorptivity, under, chosen, criterion, search="window",
            optimal=True, gap=1.0, evaluated=evaluated, window=True, range_nm=(low, high),
            max_absorbance=max_absorbance, min_separation_nm=0.0,
        )
    if count < m:
        raise AbsolveError(
            f"--count {count} is fewer than the {m} components: solving for {m} concentrations needs at least {m} wavelengths",
            fix=f"use --count {m} or more",
        )
    candidates = np.flatnonzero(under)
    if candidates.size < count:
        raise AbsolveError(
            f"only {candidates.size} wavelengths in {low:g}-{high:g} nm keep the expected absorbance <= {max_absorbance:g}, "
            f"fewer than --count {count}",
            fix="lower --count, widen --range, raise --max-absorbance or lower the --expected concentrations",
        )
    Xc = X[candidates]
    conflict = None
    if min_separation_nm > 0:
        spacing = np.abs(wavelengths[candidates][:, None] - wavelengths[candidates][None, :])
        conflict = spacing < min_separation_nm - _spacing_tolerance(wavelengths)
        np.fill_diagonal(conflict, False)
        if _spaced_start(wavelengths[candidates], count, min_separation_nm) is None:
            raise AbsolveError(
                f"{count} wavelengths at least {min_separation_nm:g} nm apart do not fit among the candidates in {low:g}-{high:g} nm",
                fix="lower --min-separation or --count, or widen --range",
            )
    chosen, loss, evaluated = _greedy_exchange(Xc, wavelengths[candidates], count, conflict, min_separation_nm, criterion)
    exact = search == "exact" or (search == "auto" and count <= _EXACT_LIMIT and candidates.size <= _EXACT_CANDIDATES)
    if exact:
        solver = _BranchAndBound(Xc, count, conflict, criterion, chosen, loss)
        chosen, loss, more = solver.run()
        evaluated += more
        gap = 1.0
    else:
        gap = _gap_from_losses(criterion, loss, _LOWER_BOUNDS[criterion](Xc, count, 200), m)
    if not math.isfinite(loss):
        raise AbsolveError(
            f"no {count} candidate wavelengths tell the components apart under these constraints",
            fix="raise --count, widen --range, or lower --min-separation",
        )
    return _assemble(
        library, concentration, wavelengths, absorptivity, under, candidates[chosen], criterion,
        search="exact" if exact else "greedy", optimal=exact, gap=gap, evaluated=evaluated, window=False,
        range_nm=(low, high), max_absorbance=max_absorbance, min_separation_nm=min_separation_nm,
    )


def _relative_uncertainty(design: NDArray[np.float64], concentration: NDArray[np.float64]) -> NDArray[np.float64]:
    """sqrt(diag((K^T K)^-1)) / c for a (k, m) design."""
    return np.sqrt(np.diag(np.linalg.inv(design.T @ design))) / concentration


def _criterion_value(criterion: str, design: NDArray[np.float64], concentration: NDArray[np.float64]) -> float:
    """The public criterion value of a (k, m) absorptivity design."""
    if criterion == "worst-relative":
        return float(_relative_uncertainty(design, concentration).max())
    if criterion == "condition":
        return float(np.linalg.cond(design / np.linalg.norm(design, axis=0)))
    return float(np.linalg.det(design.T @ design))


def _assemble(
    library: ReferenceLibrary, concentration: NDArray[np.float64], wavelengths: NDArray[np.float64],
    absorptivity: NDArray[np.float64], under: NDArray[np.bool_], chosen: NDArray[np.intp], criterion: str, *,
    search: str, optimal: bool, gap: float, evaluated: int, window: bool, range_nm: tuple[float, float],
    max_absorbance: float, min_separation_nm: float,
) -> WavelengthPlan:
    """Compute everything the plan reports for the chosen grid points."""
    design = absorptivity[:, chosen].T  # (k, m), 1 cm
    full = absorptivity[:, under].T
    absorbance = design @ concentration
    relative = _relative_uncertainty(design, concentration)
    full_relative = _relative_uncertainty(full, concentration)
    predicted = correlated = None
    noise = library.noise
    if noise is not None:
        sd = noise.standard_deviation(absorbance)
        weighted = design / sd[:, None] ** 2
        inverse = np.linalg.inv(design.T @ weighted)
        predicted = np.sqrt(np.diag(inverse))
        if noise.correlation_length_nm > 0:
            # The weighted fit's covariance when the noise is correlated along wavelength:
            # (K^T W K)^-1 K^T W S W K (K^T W K)^-1 with S = diag(sd) R diag(sd), R AR(1).
            spacing = np.abs(wavelengths[chosen][:, None] - wavelengths[chosen][None, :])
            noise_cov = np.exp(-spacing / noise.correlation_length_nm) * sd[:, None] * sd[None, :]
            correlated = np.sqrt(np.diag(inverse @ (weighted.T @ noise_cov @ weighted) @ inverse))
    windows = None
    if window:
        breaks = np.flatnonzero(np.diff(chosen) > 1)
        first = np.concatenate([[0], breaks + 1])
        last = np.concatenate([breaks, [chosen.size - 1]])
        windows = tuple((float(wavelengths[chosen[a]]), float(wavelengths[chosen[b]])) for a, b in zip(first, last))
    return WavelengthPlan(
        wavelengths_nm=wavelengths[chosen],
        criterion=criterion,
        objective=_criterion_value(criterion, design, concentration),
        component_names=library.names,
        unit=library.unit,
        expected_concentration=concentration,
        relative_uncertainty=relative,
        predicted_std_uncertainty=predicted,
        condition_number=_criterion_value("condition", design, concentration),
        expected_absorbance=absorbance,
        full_scan_objective=_criterion_value(criterion, full, concentration),
        full_scan_relative_uncertainty=full_relative,
        precision_ratio=float(relative.max() / full_relative.max()),
        optimal=optimal,
        gap_bound=gap,
        search=search,
        sets_evaluated=evaluated,
        windows_nm=windows,
        range_nm=range_nm,
        max_absorbance=float(max_absorbance),
        min_separation_nm=float(min_separation_nm),
        n_candidates=int(np.count_nonzero(under)),
        correlated_std_uncertainty=correlated,
    )
