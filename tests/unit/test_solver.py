"""Batch non-negative least squares (absolve.solver).

Reference library: scipy.optimize — ``nnls`` (Lawson-Hanson active set) when every parameter is
constrained, ``lsq_linear(method="bvls")`` (bounded-variable least squares) when some are free,
``numpy.linalg.lstsq`` for the unconstrained baseline.
"""

from __future__ import annotations

import json
import warnings

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy.optimize import lsq_linear, nnls

from absolve.errors import AbsolveError
from absolve.simulate import random_absorptivities
from absolve.solver import (
    ENUMERATE_LIMIT,
    MAX_CONDITION,
    BatchSolution,
    _enumerate,  # its round-off fallback is only reachable directly
    _Slack,
    solve_nonnegative,
    unconstrained_solution,
)

RTOL = 1e-9


def random_problem(
    seed: int, n_params: int, n_free: int, n_scans: int, n_points: int | None = None
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """A well-conditioned design, targets whose unconstrained fits break the bounds often, and the mask.

    Targets are the design times coefficients of either sign plus noise, so every scan has its
    own mixture of parameters at and off their bounds.
    """
    rng = np.random.default_rng(seed)
    n_points = n_points or 3 * n_params + 8
    design = rng.normal(size=(n_points, n_params)) * rng.uniform(0.1, 10.0, n_params)
    coefficients = rng.normal(size=(n_scans, n_params)) / np.linalg.norm(design, axis=0)
    targets = coefficients @ design.T + 0.3 * rng.normal(size=(n_scans, n_points))
    nonnegative = np.arange(n_params) >= n_free
    return design, targets, nonnegative


def scipy_reference(design: np.ndarray, targets: np.ndarray, nonnegative: np.ndarray) -> np.ndarray:
    """One scipy.optimize solve per scan (the reference library)."""
    rows = []
    for target in targets:
        if nonnegative.all():
            rows.append(nnls(design, target)[0])
        else:
            lower = np.where(nonnegative, 0.0, -np.inf)
            rows.append(lsq_linear(design, target, bounds=(lower, np.inf), method="bvls", tol=1e-14).x)
    return np.array(rows)


def assert_matches(solution: BatchSolution, reference: np.ndarray, design: np.ndarray, targets: np.ndarray) -> None:
    """Coefficients to 1e-9 relative (to each scan's largest coefficient) and the same objective."""
    scale = np.maximum(np.abs(reference).max(axis=1, keepdims=True), 1e-300)
    np.testing.assert_allclose(solution.coefficients / scale, reference / scale, rtol=0, atol=RTOL)
    reference_rss = np.sum((reference @ design.T - targets) ** 2, axis=1)
    data_scale = np.sum(targets**2, axis=1)
    np.testing.assert_allclose(solution.residual_sum_squares, reference_rss, rtol=RTOL, atol=1e-12 * data_scale.max())


problem_sizes = st.tuples(
    st.integers(0, 2**31 - 1),  # seed
    st.integers(1, 6),  # n_params
    st.integers(0, 2),  # free columns
    st.integers(1, 6),  # scans
)


@settings(derandomize=True, max_examples=60, deadline=None)
@given(problem_sizes, st.sampled_from(["auto", "enumerate", "active-set"]))
def test_matches_scipy(sizes: tuple[int, int, int, int], method: str) -> None:
    seed, n_params, n_free, n_scans = sizes
    design, targets, nonnegative = random_problem(seed, n_params, min(n_free, n_params), n_scans)
    solution = solve_nonnegative(design, targets, nonnegative=nonnegative, method=method)
    assert_matches(solution, scipy_reference(design, targets, nonnegative), design, targets)
    assert solution.converged.all()
    # Non-negativity holds exactly, and at_bound marks exactly the constrained zeros.
    assert (solution.coefficients[:, nonnegative] >= 0.0).all()
    np.testing.assert_array_equal(solution.at_bound, nonnegative & (solution.coefficients == 0.0))


@settings(derandomize=True, max_examples=40, deadline=None)
@given(st.integers(0, 2**31 - 1), st.integers(1, 6), st.integers(0, 2), st.sampled_from(["enumerate", "active-set"]))
def test_exact_nonnegative_mixture_is_recovered(seed: int, n_params: int, n_free: int, method: str) -> None:
    rng = np.random.default_rng(seed)
    n_free = min(n_free, n_params)
    design = rng.uniform(0.0, 1.0, (40, n_params)) + 0.2 * rng.normal(size=(40, n_params))
    truth = rng.uniform(0.1, 2.0, (8, n_params)) * (rng.random((8, n_params)) < 0.6)  # some components absent
    truth[:, :n_free] = rng.normal(size=(8, n_free))  # free terms take either sign
    targets = truth @ design.T
    nonnegative = np.arange(n_params) >= n_free
    solution = solve_nonnegative(design, targets, nonnegative=nonnegative, method=method)
    np.testing.assert_allclose(solution.coefficients, truth, rtol=0, atol=1e-10 * np.abs(truth).max())
    assert (solution.coefficients[:, nonnegative] >= 0.0).all()
    # The sum of squares comes from y.y - b.x, whose round-off is a few eps * y.y.
    assert (solution.residual_sum_squares <= 1e-13 * np.sum(targets**2, axis=1)).all()


@settings(derandomize=True, max_examples=30, deadline=None)
@given(st.integers(0, 2**31 - 1), st.integers(1, ENUMERATE_LIMIT), st.integers(0, 2))
def test_enumerate_and_active_set_agree(seed: int, n_constrained: int, n_free: int) -> None:
    design, targets, nonnegative = random_problem(seed, n_constrained + n_free, n_free, n_scans=20)
    enumerated = solve_nonnegative(design, targets, nonnegative=nonnegative, method="enumerate")
    iterated = solve_nonnegative(design, targets, nonnegative=nonnegative, method="active-set")
    assert iterated.converged.all()
    scale = np.maximum(np.abs(enumerated.coefficients).max(axis=1, keepdims=True), 1e-300)
    np.testing.assert_allclose(iterated.coefficients / scale, enumerated.coefficients / scale, rtol=0, atol=RTOL)
    np.testing.assert_allclose(iterated.residual_sum_squares, enumerated.residual_sum_squares, rtol=RTOL)


@pytest.mark.parametrize(("seed", "n_free"), [(11, 0), (12, 0), (13, 1), (14, 2)])
def test_ten_constrained_active_set_matches_scipy(seed: int, n_free: int) -> None:
    design, targets, nonnegative = random_problem(seed, 10 + n_free, n_free, n_scans=30)
    solution = solve_nonnegative(design, targets, nonnegative=nonnegative)
    assert solution.method == "active-set"  # more than ENUMERATE_LIMIT constrained: auto iterates
    assert solution.converged.all()
    assert solution.at_bound.any()  # the bounds matter in this problem
    assert_matches(solution, scipy_reference(design, targets, nonnegative), design, targets)


@pytest.mark.parametrize("method", ["enumerate", "active-set"])
def test_bounds_only_just_active(method: str) -> None:
    """Unconstrained solutions a hair below zero: the bound must still be enforced exactly.

    Round-off slack in the sign tests must stay far below these margins, or a candidate that breaks
    a bound by less than the slack would be taken and clipped, moving the other coefficients.
    """
    rng = np.random.default_rng(99)
    design = rng.uniform(0.0, 1.0, (40, 4)) + 0.3 * rng.normal(size=(40, 4))
    margins = np.logspace(-13, -3, 21)
    truth = np.tile([0.5, 1.0, 0.8, 0.3], (margins.size, 1))
    truth[:, 2] = -margins  # the unconstrained fit of component 2 is just negative
    # Add a part of the scan the design cannot explain, so the fit is not exact.
    outside = rng.normal(size=(margins.size, 40))
    outside -= outside @ design @ np.linalg.pinv(design)
    targets = truth @ design.T + 0.1 * outside
    solution = solve_nonnegative(design, targets, method=method)
    assert_matches(solution, scipy_reference(design, targets, np.ones(4, dtype=bool)), design, targets)
    assert solution.at_bound[:, 2].all()


def ill_conditioned_problem(seed: int, n_params: int, condition: float) -> tuple[np.ndarray, np.ndarray]:
    """A design with the given condition number (singular values spread evenly in log) and targets
    whose unconstrained fits break the bounds."""
    rng = np.random.default_rng(seed)
    left = np.linalg.qr(rng.normal(size=(60, n_params)))[0]
    right = np.linalg.qr(rng.normal(size=(n_params, n_params)))[0]
    design = left @ np.diag(np.logspace(0.0, -np.log10(condition), n_params)) @ right.T
    targets = rng.normal(size=(12, n_params)) @ design.T + 0.05 * rng.normal(size=(12, 60))
    return design, targets


@settings(derandomize=True, max_examples=40, deadline=None)
@given(
    st.integers(0, 2**31 - 1),
    st.integers(2, 5),
    st.sampled_from([1e2, 1e3, 1e4, 1e5]),
    st.sampled_from(["enumerate", "active-set"]),
)
def test_ill_conditioned_designs_match_scipy(seed: int, n_params: int, condition: float, method: str) -> None:
    """Accuracy degrades like cond^2 * eps (normal equations), never by clipping a wrong candidate."""
    design, targets = ill_conditioned_problem(seed, n_params, condition)
    assert np.linalg.cond(design) == pytest.approx(condition, rel=1e-6)
    solution = solve_nonnegative(design, targets, method=method)
    reference = np.array([nnls(design, target)[0] for target in targets])  # scipy.optimize.nnls
    assert solution.converged.all()
    assert (solution.coefficients >= 0.0).all()
    scale = np.maximum(np.abs(reference).max(axis=1, keepdims=True), 1e-300)
    accuracy = 1e3 * condition**2 * np.finfo(float).eps
    np.testing.assert_allclose(solution.coefficients / scale, reference / scale, rtol=0, atol=accuracy)
    # The objective is flat along the badly determined direction: it must match much more closely.
    direct = np.sum((targets - solution.coefficients @ design.T) ** 2, axis=1)
    reference_rss = np.sum((targets - reference @ design.T) ** 2, axis=1)
    np.testing.assert_allclose(direct, reference_rss, rtol=1e-9)
    # The Gram form of the sum of squares cancels terms as large as the coefficients' contributions.
    size = np.sum(targets**2, axis=1) + n_params * np.sum((solution.coefficients * np.linalg.norm(design, axis=0)) ** 2, axis=1)
    np.testing.assert_array_less(np.abs(solution.residual_sum_squares - direct), 100 * np.finfo(float).eps * size)


def test_clearly_negative_coefficient_of_a_nearly_collinear_pair_is_resolved() -> None:
    """Two bands differing by a 0.1 % tilt (condition number ~1.5e4): the unconstrained fit gives
    one component a large negative amount, which must be held at zero and the other re-fitted."""
    rng = np.random.default_rng(0)
    grid = np.arange(400.0, 701.0, 2.0)
    base = random_absorptivities(grid, 1, rng)[0]
    design = np.column_stack([base, base * (1 + 1e-3 * (grid - 500.0) / 100.0)])
    target = design @ [0.3, 0.2] + 0.001 * rng.standard_normal(grid.size)
    assert np.linalg.lstsq(design, target, rcond=None)[0][1] < -0.5  # unconstrained: clearly negative
    reference = nnls(design, target)[0]  # scipy.optimize.nnls
    for method in ("enumerate", "active-set"):
        solution = solve_nonnegative(design, target, method=method)
        np.testing.assert_allclose(solution.coefficients[0], reference, rtol=1e-7, atol=1e-9)
        direct = np.sum((target - solution.coefficients[0] @ design.T) ** 2)
        assert solution.residual_sum_squares[0] == pytest.approx(direct, rel=1e-8)


def test_enumeration_falls_back_to_the_best_feasible_candidate() -> None:
    """If round-off defeated every KKT test, the clipped candidate of lowest objective is the optimum.

    Forced here with a negative slack (every sign test demands a margin of 1 % of the candidate's
    size), on scans whose held parameter has a gradient below that margin, so no candidate passes.
    """
    rng = np.random.default_rng(100)
    design = rng.uniform(0.0, 1.0, (30, 3)) + 0.3 * rng.normal(size=(30, 3))
    scaled = design / np.linalg.norm(design, axis=0)
    gram = scaled.T @ scaled
    coefficients = np.array([[0.8, 0.5, -2e-4], [0.4, 0.9, -5e-4]])  # column 2 just below zero
    targets = coefficients @ scaled.T
    optimum = _enumerate(gram, scaled.T @ targets.T, np.ones(3, dtype=bool), _Slack(1e-12, 1e-12))
    forced = _enumerate(gram, scaled.T @ targets.T, np.ones(3, dtype=bool), _Slack(-1e-2, -1e-2))
    reference = np.array([nnls(scaled, target)[0] for target in targets])  # scipy.optimize.nnls
    np.testing.assert_allclose(optimum.T, reference, rtol=0, atol=1e-12)
    np.testing.assert_allclose(forced.T, reference, rtol=0, atol=1e-12)


def test_auto_chooses_by_number_of_constrained_parameters() -> None:
    design, targets, _ = random_problem(5, ENUMERATE_LIMIT + 2, 0, n_scans=4)
    few = np.arange(ENUMERATE_LIMIT + 2) < ENUMERATE_LIMIT
    assert solve_nonnegative(design, targets, nonnegative=few).method == "enumerate"
    assert solve_nonnegative(design, targets).method == "active-set"


def test_residual_sum_squares_is_the_residual_norm() -> None:
    design, targets, nonnegative = random_problem(21, 5, 1, n_scans=50)
    solution = solve_nonnegative(design, targets, nonnegative=nonnegative)
    direct = np.sum((targets - solution.coefficients @ design.T) ** 2, axis=1)
    np.testing.assert_allclose(solution.residual_sum_squares, direct, rtol=1e-10)


def test_unconstrained_solution_matches_lstsq() -> None:
    design, targets, _ = random_problem(31, 4, 0, n_scans=7)
    expected = np.linalg.lstsq(design, targets.T, rcond=None)[0].T  # numpy reference
    np.testing.assert_allclose(unconstrained_solution(design, targets), expected, rtol=1e-10, atol=1e-12)


def test_all_free_parameters_is_ordinary_least_squares() -> None:
    design, targets, _ = random_problem(32, 3, 0, n_scans=5)
    solution = solve_nonnegative(design, targets, nonnegative=np.zeros(3, dtype=bool))
    expected = np.linalg.lstsq(design, targets.T, rcond=None)[0].T  # numpy reference
    np.testing.assert_allclose(solution.coefficients, expected, rtol=1e-10, atol=1e-12)
    assert not solution.at_bound.any()


def test_column_scale_does_not_change_the_answer() -> None:
    design, targets, nonnegative = random_problem(41, 4, 1, n_scans=10)
    factors = np.array([1e-6, 1.0, 1e5, 3.0])
    plain = solve_nonnegative(design, targets, nonnegative=nonnegative)
    scaled = solve_nonnegative(design * factors, targets, nonnegative=nonnegative)
    np.testing.assert_allclose(scaled.coefficients * factors, plain.coefficients, rtol=1e-9, atol=1e-12)
    np.testing.assert_array_equal(scaled.at_bound, plain.at_bound)


def test_single_scan_is_a_batch_of_one() -> None:
    design, targets, nonnegative = random_problem(51, 4, 1, n_scans=3)
    batch = solve_nonnegative(design, targets, nonnegative=nonnegative)
    for row in range(3):
        flat = solve_nonnegative(design, targets[row], nonnegative=nonnegative)
        assert flat.coefficients.shape == (1, 4)
        assert flat.residual_sum_squares.shape == (1,)
        np.testing.assert_allclose(flat.coefficients[0], batch.coefficients[row], rtol=1e-12, atol=1e-14)
    assert unconstrained_solution(design, targets[0]).shape == (1, 4)


def test_empty_batch() -> None:
    design, _, _ = random_problem(52, 3, 0, n_scans=1)
    solution = solve_nonnegative(design, np.empty((0, design.shape[0])))
    assert solution.coefficients.shape == (0, 3)
    assert solution.summary()["n_scans"] == 0


def test_inputs_are_not_mutated_and_results_are_read_only() -> None:
    design, targets, nonnegative = random_problem(61, 4, 1, n_scans=5)
    for array in (design, targets, nonnegative):
        array.flags.writeable = False  # any write by the solver would raise
    before = (design.copy(), targets.copy(), nonnegative.copy())
    for method in ("enumerate", "active-set"):
        solution = solve_nonnegative(design, targets, nonnegative=nonnegative, method=method)
        for array, original in zip((design, targets, nonnegative), before, strict=True):
            np.testing.assert_array_equal(array, original)
        with pytest.raises(ValueError, match="read-only"):
            solution.coefficients[0, 0] = 1.0


def test_iteration_cap_is_reported_not_raised() -> None:
    design, targets, nonnegative = random_problem(71, 10, 0, n_scans=40)
    capped = solve_nonnegative(design, targets, method="active-set", max_iter=1)
    assert not capped.converged.all()
    # Iterates are feasible even when stopped early, and never better than the optimum.
    assert (capped.coefficients >= 0.0).all()
    optimum = solve_nonnegative(design, targets, method="active-set")
    assert (capped.residual_sum_squares >= optimum.residual_sum_squares * (1 - 1e-12)).all()
    direct = np.sum((targets - capped.coefficients @ design.T) ** 2, axis=1)
    np.testing.assert_allclose(capped.residual_sum_squares, direct, rtol=1e-10)
    summary = capped.summary()
    assert summary["n_converged"] == int(capped.converged.sum()) < 40


def test_max_iter_is_ignored_by_enumeration_with_a_warning() -> None:
    design, targets, _ = random_problem(72, 3, 0, n_scans=2)
    with pytest.warns(UserWarning, match="max_iter is ignored by method='enumerate'"):
        solve_nonnegative(design, targets, method="enumerate", max_iter=5)
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        solve_nonnegative(design, targets, method="auto", max_iter=5)


def test_summary_is_json_safe() -> None:
    design, targets, nonnegative = random_problem(81, 4, 1, n_scans=30)
    solution = solve_nonnegative(design, targets, nonnegative=nonnegative)
    summary = json.loads(json.dumps(solution.summary()))
    assert summary["method"] == "enumerate"
    assert (summary["n_scans"], summary["n_params"], summary["n_converged"]) == (30, 4, 30)
    assert summary["at_bound_count"] == solution.at_bound.sum(axis=0).tolist()
    assert summary["at_bound_count"][0] == 0  # the free column never sits at a bound
    assert summary["residual_sum_squares_max"] == pytest.approx(solution.residual_sum_squares.max())


# --- errors -----------------------------------------------------------------------------------


def test_unknown_method() -> None:
    design, targets, _ = random_problem(91, 2, 0, n_scans=1)
    with pytest.raises(
        AbsolveError,
        match=r"The 'method' parameter of solve_nonnegative must be one of 'auto', 'enumerate', 'active-set'; "
        r"got 'fastest' instead\.",
    ):
        solve_nonnegative(design, targets, method="fastest")  # type: ignore[arg-type]


def test_nan_and_inf_in_targets() -> None:
    design, targets, _ = random_problem(92, 3, 0, n_scans=4)
    for bad in (np.nan, np.inf, -np.inf):
        broken = targets.copy()
        broken[2, 5] = bad
        with pytest.raises(AbsolveError, match=r"targets contain NaN or inf \(scan 2, point 5\)"):
            solve_nonnegative(design, broken)
        with pytest.raises(AbsolveError, match=r"targets contain NaN or inf \(scan 2, point 5\)"):
            unconstrained_solution(design, broken)


def test_nan_in_design() -> None:
    design, targets, _ = random_problem(93, 3, 0, n_scans=2)
    design[4, 1] = np.nan
    with pytest.raises(AbsolveError, match=r"design matrix contains NaN or inf \(row 4, column 1\)"):
        solve_nonnegative(design, targets)


def test_targets_too_large() -> None:
    design, targets, _ = random_problem(94, 3, 0, n_scans=2)
    # The problem is homogeneous: huge but representable targets give proportionally huge coefficients ...
    small = solve_nonnegative(design, targets)
    np.testing.assert_allclose(solve_nonnegative(design, targets * 1e160).coefficients, small.coefficients * 1e160, rtol=1e-9)
    # ... while targets whose products with the design overflow are refused.
    with pytest.raises(AbsolveError, match="too large to solve in double precision"):
        solve_nonnegative(design, targets / np.abs(targets).max() * 1.7e308)


def test_shape_mismatches() -> None:
    design, targets, _ = random_problem(95, 3, 0, n_scans=2)
    with pytest.raises(AbsolveError, match=r"targets have 16 points per scan but the design has 17 rows"):
        solve_nonnegative(design, targets[:, :-1])
    with pytest.raises(AbsolveError, match=r"design matrix must be 2-D"):
        solve_nonnegative(design[:, 0], targets)
    with pytest.raises(AbsolveError, match=r"targets must be 2-D"):
        solve_nonnegative(design, targets[None])
    with pytest.raises(AbsolveError, match=r"'nonnegative' parameter .* boolean mask of shape \(3,\)"):
        solve_nonnegative(design, targets, nonnegative=[True, False])
    with pytest.raises(AbsolveError, match=r"'nonnegative' parameter .* got dtype int64"):
        solve_nonnegative(design, targets, nonnegative=np.array([1, 0, 1]))
    with pytest.raises(AbsolveError, match=r"3 parameters but only 2 points"):
        solve_nonnegative(design[:2], targets[:, :2])


def test_bad_max_iter() -> None:
    design, targets, _ = random_problem(96, 3, 0, n_scans=2)
    for bad in (0, -3, 2.5, True):
        with pytest.raises(AbsolveError, match=r"'max_iter' parameter of solve_nonnegative must be an integer >= 1"):
            solve_nonnegative(design, targets, method="active-set", max_iter=bad)  # type: ignore[arg-type]


def test_rank_deficient_design() -> None:
    rng = np.random.default_rng(97)
    design = rng.uniform(size=(30, 4))
    design[:, 3] = design[:, 1] + 2.0 * design[:, 2]  # exactly dependent
    targets = rng.normal(size=(3, 30))
    with pytest.raises(AbsolveError, match=r"rank deficient: columns 1, 2, 3 are \(nearly\) linearly dependent"):
        solve_nonnegative(design, targets)
    with pytest.raises(AbsolveError, match="rank deficient"):
        unconstrained_solution(design, targets)
    # Nearly dependent beyond the limit is refused too; just inside it is solved.
    design[:, 3] += 1e-3 / MAX_CONDITION * rng.normal(size=30)
    with pytest.raises(AbsolveError, match=r"condition number .* the solver accepts at most 1e\+05"):
        solve_nonnegative(design, targets)
    design[:, 3] = design[:, 1] + 2.0 * design[:, 2] + 1e-3 * rng.normal(size=30)
    assert solve_nonnegative(design, targets).converged.all()


def test_zero_column() -> None:
    design, targets, _ = random_problem(98, 3, 0, n_scans=2)
    design[:, 2] = 0.0
    with pytest.raises(AbsolveError, match="design column 2 is all zeros"):
        solve_nonnegative(design, targets)
