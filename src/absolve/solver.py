"""Batch non-negative least squares for many scans sharing one design matrix.

Quantifying a mixture by the Beer-Lambert law is a linear least-squares
problem per scan: the design matrix holds one column per component
(absorptivity x path length) plus optional baseline columns (offset, slope),
and concentrations cannot be negative. A run of scans shares one design, so
:func:`solve_nonnegative` solves the whole batch at once from the Gram
matrix ``G = D^T D`` and the products ``B = Y D`` (one matrix product over
all scans); everything after that works on ``n_params``-sized systems and
costs little next to the product.

Two exact methods are offered:

``"enumerate"``
    Tries every choice of which constrained parameters sit at zero
    (``2^m`` choices for ``m`` constrained parameters), solves the reduced
    normal equations for all scans at once and keeps, per scan, the choice
    that meets the Karush-Kuhn-Tucker conditions. Best for ``m <= 8``.
``"active-set"``
    The active-set method of Lawson & Hanson (1974), in the Gram-matrix form
    of Bro & De Jong (1997), run for all scans together, each scan with its
    own set of parameters held at zero. For larger ``m``.

Columns are scaled to unit norm internally (it does not change which
solution is non-negative) and the result is scaled back.
"""

from __future__ import annotations

import functools
import warnings
from dataclasses import dataclass, field
from typing import Any, Literal, get_args

import numpy as np
from numpy.typing import ArrayLike, NDArray

from .errors import AbsolveError

__all__ = [
    "ENUMERATE_LIMIT",
    "MAX_CONDITION",
    "METHODS",
    "BatchSolution",
    "Method",
    "solve_nonnegative",
    "unconstrained_solution",
]

Method = Literal["auto", "enumerate", "active-set"]
METHODS: tuple[str, ...] = get_args(Method)

#: ``method="auto"`` enumerates up to this many constrained parameters (2^8 = 256 reduced systems).
ENUMERATE_LIMIT = 8

#: Largest condition number of the column-scaled design the solver accepts. The normal equations
#: square it, so coefficients carry round-off of about ``MAX_CONDITION**2 * eps`` (2e-6 relative)
#: here. Up to it both methods match scipy's QR-based nnls; at 7e5 the active-set method was seen
#: to stop 1e-4 (relative) above the optimal residual, its sign decisions lost in round-off.
MAX_CONDITION = 1e5

# Candidate values (float64) the enumeration holds at once: 512 KiB stays in a core's L2 cache and
# is reused block after block instead of being freshly mapped (1.6 ms against 2.2 ms in one block,
# 4 parameters, 3 constrained, 20,000 scans) ...
_ENUMERATE_BLOCK_VALUES = 65536
# ... but at least this many scans per block, or with 256 sets the per-block overhead dominates
# (measured best at 256 scans: 0.30 s against 0.47 s at 32, 8 parameters, 20,000 scans).
_ENUMERATE_MIN_BLOCK = 256


@dataclass(frozen=True, eq=False)
class BatchSolution:
    """Solutions of one non-negative least-squares problem per scan.

    Attributes
    ----------
    coefficients : ndarray, shape (n_scans, n_params)
        The minimiser of ``||design @ x - y||^2`` for each scan, constrained
        parameters ``>= 0``.
    residual_sum_squares : ndarray, shape (n_scans,)
        ``||design @ x - y||^2`` at the solution, computed on first access
        (it takes one more pass over the targets, which callers that form
        their own residuals do not need; the targets are read then, so
        read it before changing them in place) without forming residuals, as
        ``y.y - x.(2 b - G x)`` (``b = design^T y``, ``G = design^T design``),
        so its absolute round-off is a few
        ``eps * (y.y + n_params * sum_j (x_j |design_j|)^2)``: ``eps * y.y``
        unless an ill-conditioned design gives large, cancelling
        coefficients. Clipped at zero.
    at_bound : ndarray of bool, shape (n_scans, n_params)
        True where a constrained coefficient is exactly zero: its bound is
        active. Always False for free parameters.
    converged : ndarray of bool, shape (n_scans,)
        False where the active-set iteration hit its cap; those scans hold
        the last (feasible, but not optimal) iterate. Enumeration is exact
        and always True.
    method : {"enumerate", "active-set"}
        The method that produced the solutions.
    """

    coefficients: NDArray[np.float64]
    at_bound: NDArray[np.bool_]
    converged: NDArray[np.bool_]
    method: str
    _problem: _ScaledProblem = field(repr=False)

    def __post_init__(self) -> None:
        # A frozen dataclass stops rebinding the fields, not writing into the arrays.
        for array in (self.coefficients, self.at_bound, self.converged):
            array.flags.writeable = False

    @functools.cached_property
    def residual_sum_squares(self) -> NDArray[np.float64]:  # noqa: D102  (documented with the attributes)
        rss = self._problem.residual_sum_squares(self.coefficients)
        rss.flags.writeable = False
        return rss

    def summary(self) -> dict[str, Any]:
        """JSON-safe overview: sizes, method, convergence and how often each parameter sat at zero."""
        n_scans, n_params = self.coefficients.shape
        rss = self.residual_sum_squares
        return {
            "method": self.method,
            "n_scans": int(n_scans),
            "n_params": int(n_params),
            "n_converged": int(np.count_nonzero(self.converged)),
            "at_bound_count": [int(count) for count in np.count_nonzero(self.at_bound, axis=0)],
            "residual_sum_squares_median": float(np.median(rss)) if n_scans else None,
            "residual_sum_squares_max": float(np.max(rss)) if n_scans else None,
        }


@dataclass(frozen=True)
class _ScaledProblem:
    """What the residual sums of squares are computed from: the targets and the scaled normal equations."""

    targets: NDArray[np.float64]  # (n_scans, n_points), as given
    products: NDArray[np.float64]  # B = D_s^T Y^T, (n_params, n_scans), D_s the unit-norm columns
    gram: NDArray[np.float64]  # D_s^T D_s
    scale: NDArray[np.float64]  # column norms: x = x_s / scale

    def residual_sum_squares(self, coefficients: NDArray[np.float64]) -> NDArray[np.float64]:
        """``y.y - x_s.(2 b - G x_s)`` per scan, clipped at zero."""
        solution = coefficients.T * self.scale[:, None]
        # ||D x - y||^2 = y.y - x.(2 b - G x). At a reduced solution this equals y.y - b.x, but that
        # shortcut passes round-off in x on to first order; the full form is stationary at the optimum.
        gradient_less_b = _thin(self.gram, solution)
        gradient_less_b -= self.products
        gradient_less_b -= self.products
        rss = np.einsum("ij,ij->i", self.targets, self.targets) + np.einsum("ji,ji->i", solution, gradient_less_b)
        return np.maximum(rss, 0.0, out=rss)


def solve_nonnegative(
    design: ArrayLike,
    targets: ArrayLike,
    *,
    nonnegative: ArrayLike | None = None,
    method: Method = "auto",
    max_iter: int | None = None,
) -> BatchSolution:
    """Least squares with non-negative parameters, for a batch of scans sharing one design.

    Minimises ``||design @ x - y||^2`` for every row ``y`` of ``targets``
    subject to ``x[j] >= 0`` wherever ``nonnegative[j]``.

    Parameters
    ----------
    design : array_like, shape (n_points, n_params)
        Design matrix; must have full column rank (condition number of the
        column-scaled matrix at most :data:`MAX_CONDITION`).
    targets : array_like, shape (n_scans, n_points) or (n_points,)
        One scan per row; a 1-D array is a batch of one.
    nonnegative : array_like of bool, shape (n_params,), optional
        Which parameters are constrained to be ``>= 0``; False marks free
        parameters such as baseline offset and slope. Default: all True.
    method : {"auto", "enumerate", "active-set"}, default "auto"
        ``"auto"`` enumerates when at most :data:`ENUMERATE_LIMIT` parameters
        are constrained and uses the active-set method otherwise.
    max_iter : int, optional
        Iteration cap of the active-set method (one reduced solve per
        iteration); default ``3 * n_params``. Scans that reach it are
        reported in ``converged``, not raised. Ignored by enumeration.

    Returns
    -------
    BatchSolution

    Raises
    ------
    AbsolveError
        Unknown method, mismatched shapes, NaN or inf in the inputs, or a
        rank-deficient design.

    Examples
    --------
    >>> design = [[1.0, 0.0], [0.0, 1.0], [1.0, 1.0]]
    >>> solution = solve_nonnegative(design, [[2.0, -1.0, 1.0]])
    >>> solution.coefficients.round(6).tolist(), solution.at_bound.tolist()
    ([[1.5, 0.0]], [[False, True]])
    """
    if method not in METHODS:
        choices = ", ".join(repr(choice) for choice in METHODS)
        raise AbsolveError(
            f"The 'method' parameter of solve_nonnegative must be one of {choices}; got {method!r} instead."
        )
    matrix = _as_design(design)
    n_points, n_params = matrix.shape
    constrained = _as_mask(nonnegative, n_params)
    if max_iter is None:
        max_iter = 3 * n_params
    elif isinstance(max_iter, bool) or not isinstance(max_iter, (int, np.integer)) or max_iter < 1:
        raise AbsolveError(
            f"The 'max_iter' parameter of solve_nonnegative must be an integer >= 1; got {max_iter!r} instead."
        )
    elif method == "enumerate":
        warnings.warn("max_iter is ignored by method='enumerate', which is exact", UserWarning, stacklevel=2)
    data = _as_targets(targets, n_points)

    scale = _column_norms(matrix)
    scaled = matrix / scale
    singular = _check_rank(scaled)
    gram = scaled.T @ scaled
    # Internally every per-scan array is (n_params, n_scans): operations then run along rows of
    # n_scans values instead of rows of a handful, several times faster in numpy.
    products = scaled.T @ data.T
    # D^T y is NaN or inf when a scan holds NaN or inf (NaN and inf times any column entry, zero
    # included, stay non-finite); checking the few products is free, where a full isfinite pass
    # over the targets would cost a third of the product.
    _refuse_nonfinite(data, ~np.isfinite(products).all(axis=0))

    chosen = method
    if method == "auto":
        chosen = "enumerate" if np.count_nonzero(constrained) <= ENUMERATE_LIMIT else "active-set"
    # Where the unconstrained solution already meets the bounds it is the optimum (zero gradient,
    # lowest objective of all), whatever the method; in routine work that is most scans. The test
    # is strict: a hair below zero may be round-off or not, and the methods below sort that out.
    solution = _thin(np.linalg.inv(gram), products)
    slack = _Slack.for_design(singular)
    converged = np.ones(data.shape[0], dtype=bool)
    outside = np.zeros(data.shape[0], dtype=bool)
    for row in np.flatnonzero(constrained):
        outside |= solution[row] < 0.0
    rest = np.flatnonzero(outside)
    # Columns are gathered with take(): fancy indexing on the last axis returns an F-ordered array,
    # on which the einsum products run five times slower.
    if rest.size and chosen == "enumerate":
        solution[:, rest] = _enumerate(gram, products.take(rest, axis=1), constrained, slack)
    elif rest.size:
        solution[:, rest], converged[rest] = _active_set(
            gram, products.take(rest, axis=1), constrained, slack, max_iter
        )
    # A candidate accepted within round-off may hold a coefficient a hair below zero.
    np.maximum(solution, np.where(constrained, 0.0, -np.inf)[:, None], out=solution)

    at_bound = (solution == 0.0) & constrained[:, None]
    np.divide(solution, scale[:, None], out=solution)
    return BatchSolution(
        coefficients=solution.T,
        at_bound=at_bound.T,
        converged=converged,
        method=chosen,
        _problem=_ScaledProblem(data, products, gram, scale),
    )


def unconstrained_solution(design: ArrayLike, targets: ArrayLike) -> NDArray[np.float64]:
    """Ordinary least squares for a batch of scans, through the pseudo-inverse of the design.

    The reference point for :func:`solve_nonnegative`: no bounds, one matrix
    product over the batch.

    Parameters
    ----------
    design : array_like, shape (n_points, n_params)
        Design matrix of full column rank.
    targets : array_like, shape (n_scans, n_points) or (n_points,)
        One scan per row; a 1-D array is a batch of one.

    Returns
    -------
    ndarray, shape (n_scans, n_params)
        Least-squares coefficients per scan.

    Examples
    --------
    >>> unconstrained_solution([[1.0, 0.0], [0.0, 1.0], [1.0, 1.0]], [2.0, -1.0, 1.0]).round(6).tolist()
    [[2.0, -1.0]]
    """
    matrix = _as_design(design)
    data = _as_targets(targets, matrix.shape[0])
    _check_rank(matrix / _column_norms(matrix))
    _refuse_nonfinite(data, ~np.isfinite(data).all(axis=1))
    return data @ np.linalg.pinv(matrix).T


# --- input checks -----------------------------------------------------------------------------


def _as_design(design: ArrayLike) -> NDArray[np.float64]:
    matrix = np.asarray(design, dtype=np.float64)
    if matrix.ndim != 2 or matrix.shape[0] == 0 or matrix.shape[1] == 0:
        raise AbsolveError(
            f"the design matrix must be 2-D (n_points, n_params) and non-empty; got shape {matrix.shape}",
            fix="pass one row per wavelength and one column per parameter",
        )
    if not np.isfinite(matrix).all():
        row, column = np.argwhere(~np.isfinite(matrix))[0]
        raise AbsolveError(
            f"the design matrix contains NaN or inf (row {row}, column {column})",
            fix="drop the points where a reference spectrum is missing before solving",
        )
    n_points, n_params = matrix.shape
    if n_points < n_params:
        raise AbsolveError(
            f"the design has {n_params} parameters but only {n_points} points, so they cannot all be determined",
            fix="use at least as many wavelengths as parameters (components plus baseline terms)",
        )
    return matrix


def _as_mask(nonnegative: ArrayLike | None, n_params: int) -> NDArray[np.bool_]:
    if nonnegative is None:
        return np.ones(n_params, dtype=bool)
    mask = np.asarray(nonnegative)
    if mask.dtype != np.bool_ or mask.shape != (n_params,):
        raise AbsolveError(
            f"The 'nonnegative' parameter of solve_nonnegative must be a boolean mask of shape ({n_params},); "
            f"got dtype {mask.dtype} and shape {mask.shape} instead.",
            fix="pass one True (constrained) or False (free) per design column",
        )
    return mask.copy()


def _as_targets(targets: ArrayLike, n_points: int) -> NDArray[np.float64]:
    data = np.asarray(targets, dtype=np.float64)
    if data.ndim == 1:
        data = data.reshape(1, -1)
    if data.ndim != 2:
        raise AbsolveError(
            f"targets must be 2-D (n_scans, n_points); got {data.ndim} dimensions",
            fix="pass one scan per row",
        )
    if data.shape[1] != n_points:
        raise AbsolveError(
            f"targets have {data.shape[1]} points per scan but the design has {n_points} rows (points)",
            fix="put the scans on the same points as the design, one scan per row",
        )
    return data


def _column_norms(matrix: NDArray[np.float64]) -> NDArray[np.float64]:
    norms = np.linalg.norm(matrix, axis=0)
    empty = np.flatnonzero(norms == 0.0)
    if empty.size:
        raise AbsolveError(
            f"design column {int(empty[0])} is all zeros, so its parameter cannot be determined",
            fix="drop that parameter, or use a range where the component absorbs",
        )
    return norms


def _check_rank(scaled: NDArray[np.float64]) -> NDArray[np.float64]:
    """Refuse a design whose unit-norm columns are (nearly) linearly dependent; return its singular values."""
    _, singular, right = np.linalg.svd(scaled, full_matrices=False)
    if singular[-1] > singular[0] / MAX_CONDITION:
        return singular
    condition = singular[0] / singular[-1] if singular[-1] > 0 else np.inf
    # The right singular vector of the smallest singular value is the near-dependence among columns.
    weights = np.abs(right[-1])
    involved = np.flatnonzero(weights >= 0.1 * weights.max())
    raise AbsolveError(
        f"the design matrix is rank deficient: columns {', '.join(str(int(j)) for j in involved)} are "
        f"(nearly) linearly dependent (condition number {condition:.3g} after scaling columns to unit norm; "
        f"the solver accepts at most {MAX_CONDITION:.0e})",
        fix="remove one of those columns (a component that duplicates another, or a baseline term the "
        "components already explain) or widen the wavelength range",
    )


def _refuse_nonfinite(data: NDArray[np.float64], suspect: NDArray[np.bool_]) -> None:
    """Refuse targets holding NaN or inf, or values so large that their products overflow, in the ``suspect`` scans."""
    if not suspect.any():
        return
    rows = np.flatnonzero(suspect)
    bad = ~np.isfinite(data[rows])
    if bad.any():
        row, point = np.argwhere(bad)[0]
        raise AbsolveError(
            f"targets contain NaN or inf (scan {int(rows[row])}, point {int(point)})",
            fix="drop unusable points from both the design and the targets before solving",
        )
    raise AbsolveError(
        f"targets are too large to solve in double precision (scan {int(rows[0])} reaches "
        f"{np.max(np.abs(data[rows[0]])):.3g})",
        fix="check the units of the scans; absorbances are of order 1",
    )


# --- shared numerics --------------------------------------------------------------------------


def _thin(matrix: NDArray[np.float64], columns: NDArray[np.float64]) -> NDArray[np.float64]:
    """``matrix @ columns`` for ``columns`` of shape (n_params, n_scans): a handful of rows.

    numpy's own loop rather than BLAS: with an inner dimension of a handful, a threaded BLAS spends
    more on waking its threads than on arithmetic (measured 0.2 ms against 12 ms on a busy machine).
    """
    return np.einsum("jk,ki->ji", matrix, columns)


@dataclass(frozen=True)
class _Slack:
    """Relative round-off the sign tests allow, for coefficients and for gradients.

    With unit-norm columns the numbers in a candidate (coefficients, ``b``, gradients) share one
    scale, and errors are relative to it. A reduced solve with the Gram matrix gets coefficients
    to about ``cond(G) * eps``, ``cond(G)`` bounding that of every principal submatrix. Gradients
    are residuals of those solves, which a backward-stable solve gets to about ``eps``; a held
    parameter's gradient also carries the coefficients' error through at most ``cond(D)`` =
    ``sqrt(cond(G))``. A margin for the size of the system on top of both.
    """

    coefficient: float
    gradient: float

    @classmethod
    def for_design(cls, singular: NDArray[np.float64]) -> _Slack:
        """From the singular values of the column-scaled design."""
        unit = 10.0 * singular.size * np.finfo(np.float64).eps
        condition = singular[0] / singular[-1]
        return cls(coefficient=unit * condition**2, gradient=unit * condition)


def _masked_gram(gram: NDArray[np.float64], passive: NDArray[np.bool_]) -> NDArray[np.float64]:
    """Stack of Gram matrices restricted to each passive set, identity on the held parameters.

    ``passive`` has shape (k, n); the result (k, n, n) is ``G[P, P]`` embedded with ones on the
    diagonal for the parameters outside ``P``, so it stays invertible and its solutions are zero there.
    """
    both = passive[:, :, None] & passive[:, None, :]
    matrices = np.where(both, gram, 0.0)
    diagonal = np.arange(gram.shape[0])
    matrices[:, diagonal, diagonal] = np.where(passive, np.diag(gram), 1.0)
    return matrices


def _embedded_inverses(gram: NDArray[np.float64], passive: NDArray[np.bool_]) -> NDArray[np.float64]:
    """``inv(G[P, P])`` embedded in zeros, one (n, n) matrix per row of ``passive``: ``x = H b``."""
    both = passive[:, :, None] & passive[:, None, :]
    return np.linalg.inv(_masked_gram(gram, passive)) * both


# --- enumeration ------------------------------------------------------------------------------


def _enumerate(
    gram: NDArray[np.float64],
    products: NDArray[np.float64],
    constrained: NDArray[np.bool_],
    slack: _Slack,
) -> NDArray[np.float64]:
    """Exact solutions by trying every set of constrained parameters held at zero.

    For held set ``S`` and passive set ``P`` the candidate is ``x_P = G_PP^-1 b_P``, ``x_S = 0``.
    It is the optimum when the constrained part of ``x_P`` is ``>= 0`` (primal feasibility) and the
    gradient ``G x - b`` on ``S`` is ``>= 0`` (dual feasibility). Both tests are linear in ``b``, so
    for all candidates at once they are one small matrix product of the batch's ``B``. Where
    round-off leaves the tests undecided, the objective decides.
    """
    n_params, n_scans = products.shape
    held_index = np.flatnonzero(constrained)
    n_held = held_index.size
    n_sets = 2**n_held
    # Row k of `held` says which constrained parameters set number k holds at zero (bit i -> parameter i).
    held = (np.arange(n_sets)[:, None] >> np.arange(n_held)) & 1 == 1
    passive = np.ones((n_sets, n_params), dtype=bool)
    passive[:, held_index] = ~held

    inverses = _embedded_inverses(gram, passive)  # (n_sets, n, n): candidates x = H b
    gradients = gram @ inverses - np.eye(n_params)  # (n_sets, n, n): gradients G x - b = (G H - I) b
    # Per parameter and set, the coefficient where the parameter is passive and the gradient where it
    # is held, each a linear map of b: one row (j, set) of `maps` per value.
    maps = np.where(passive[:, :, None], inverses, gradients).transpose(1, 0, 2).reshape(n_params * n_sets, n_params)

    solution = np.empty((n_params, n_scans))
    block = max(_ENUMERATE_MIN_BLOCK, _ENUMERATE_BLOCK_VALUES // (n_params * n_sets))
    for start in range(0, n_scans, block):
        columns = slice(start, start + block)
        b = products[:, columns]
        width = b.shape[1]
        # maps has n_params * n_sets rows: enough for BLAS to beat numpy's own loop (2.5x measured).
        values = (maps @ b).reshape(n_params, n_sets, width)
        # Each candidate's sign tests allow round-off relative to that candidate's own size.
        size = np.maximum(np.maximum(values.max(axis=0), -values.min(axis=0)), np.abs(b).max(axis=0))
        coefficient_floor, gradient_floor = -slack.coefficient * size, -slack.gradient * size
        optimal = np.ones((n_sets, width), dtype=bool)
        for k, j in enumerate(held_index):
            optimal &= values[j] >= np.where(held[:, k, None], gradient_floor, coefficient_floor)
        choice = np.argmax(optimal, axis=0)
        # The KKT set is unique for a full-rank design, but round-off can pass several or none.
        # Then the candidates, clipped to their bounds, are compared by objective: every clipped
        # candidate is a feasible point and the optimum is one of them, so the lowest is the optimum.
        unclear = np.flatnonzero(np.count_nonzero(optimal, axis=0) != 1)
        if unclear.size:
            b_unclear = b[:, unclear]
            candidates = np.where(passive.T[:, :, None], values[:, :, unclear], 0.0)
            candidates[held_index] = np.maximum(candidates[held_index], 0.0)
            # Objective 0.5 x.G x - b.x, for every set and scan.
            pull = 0.5 * np.einsum("jk,ksu->jsu", gram, candidates) - b_unclear[:, None, :]
            choice[unclear] = np.argmin(np.einsum("jsu,jsu->su", candidates, pull), axis=0)
        picked = values.reshape(n_params, n_sets * width).take(choice * width + np.arange(width), axis=1)
        solution[:, columns] = np.where(passive.T.take(choice, axis=1), picked, 0.0)
    return solution


# --- active set -------------------------------------------------------------------------------


def _active_set(
    gram: NDArray[np.float64],
    products: NDArray[np.float64],
    constrained: NDArray[np.bool_],
    slack: _Slack,
    max_iter: int,
) -> tuple[NDArray[np.float64], NDArray[np.bool_]]:
    """Lawson-Hanson active-set iterations for all scans together, each with its own passive set.

    Each iteration, scans whose last reduced solution was feasible free the constrained parameter
    with the most negative gradient (or stop: the optimum is reached when none has one); then every
    scan still running solves its reduced normal equations. A scan whose solution turns a passive
    parameter negative steps back along the segment to the first bound and holds that parameter.
    Iterates are always feasible, so a scan stopped by the cap still has a usable answer.
    """
    n_params, n_scans = products.shape
    passive = np.repeat(~constrained[:, None], n_scans, axis=1)
    solution = _thin(_embedded_inverses(gram, ~constrained[None])[0], products)  # free parameters only
    looking = np.ones(n_scans, dtype=bool)  # last solve was feasible: look for a parameter to free
    converged = np.zeros(n_scans, dtype=bool)
    running = np.arange(n_scans)
    bounded = constrained[:, None]
    for iteration in range(max_iter + 1):
        # Minus the gradient, for the scans still running.
        b, iterate = products.take(running, axis=1), solution.take(running, axis=1)
        descent = b - _thin(gram, iterate)
        size = np.maximum(np.abs(b).max(axis=0, initial=0.0), np.abs(iterate).max(axis=0, initial=0.0))
        significant = descent > slack.gradient * size
        entering = looking[running] & bounded & ~passive.take(running, axis=1) & significant
        done = looking[running] & ~entering.any(axis=0)
        converged[running[done]] = True
        running, descent, entering = running[~done], descent[:, ~done], entering[:, ~done]
        if running.size == 0 or iteration == max_iter:
            break
        grow = np.flatnonzero(entering.any(axis=0))
        best = np.argmax(np.where(entering[:, grow], descent[:, grow], -np.inf), axis=0)
        passive[best, running[grow]] = True

        free = passive.take(running, axis=1)
        rhs = np.where(free, products.take(running, axis=1), 0.0).T[..., None]
        trial = np.linalg.solve(_masked_gram(gram, free.T), rhs)[..., 0].T
        blocked = bounded & free & (trial <= 0.0)
        stepping = blocked.any(axis=0)
        accept = running[~stepping]
        solution[:, accept] = trial[:, ~stepping]
        looking[accept] = True

        back = running[stepping]
        start, target, blocked = solution.take(back, axis=1), trial[:, stepping], blocked[:, stepping]
        gap = start - target
        # Fraction of the way to the first parameter that would cross zero (0/0 means it is at zero).
        ratio = np.where(blocked, start / np.where(gap > 0.0, gap, 1.0), np.inf)
        first = np.argmin(ratio, axis=0)
        across = np.arange(back.size)
        moved = start + ratio[first, across] * (target - start)
        moved[first, across] = 0.0
        leaving = bounded & (moved <= 0.0)
        solution[:, back] = np.where(leaving, 0.0, moved)
        passive[:, back] &= ~leaving
        looking[back] = False
    return solution, converged
