"""Benchmark of the batch non-negative least-squares solver.

Run on demand (pytest does not collect it)::

    /work/venv/bin/python tests/benchmarks/bench_solver.py [--scans N] [--repeats R] [--json OUT]

Problem: simulated mixtures of 3 overlapping absorbers on 400 wavelengths plus a free baseline
offset (4 parameters, 3 of them non-negative). Each component is absent from ~30 % of the scans,
so noise pushes many unconstrained estimates below zero and the bounds matter.

Timed, median over the repeats:

(a) a Python loop of ``scipy.optimize.nnls``, one call per scan. nnls knows only non-negative
    parameters, so the free offset column is split into a +1 and a -1 column (offset = difference
    of the two). This loop is slow, so it is timed on ``--loop-scans`` scans and scaled linearly to
    the full batch; the output says so.
(b) the unconstrained batch solution with a precomputed pseudo-inverse: one matrix product.
(c) ``absolve.solver.solve_nonnegative`` on the whole batch, from the raw design and targets
    (validation and scaling included). Also timed: the same with its residual sums of squares
    read, which takes one more pass over the targets (``y.y``) that (b) does not make.

Targets: (c) at least 20x faster than (a) and at most 1.5x the time of (b).
"""

from __future__ import annotations

import argparse
import json
import time
from collections.abc import Callable
from pathlib import Path

import numpy as np
from scipy.optimize import nnls

from absolve.simulate import Instrument, measure, random_absorptivities
from absolve.solver import solve_nonnegative, unconstrained_solution

N_WAVELENGTHS = 400
N_COMPONENTS = 3


def make_problem(n_scans: int, seed: int = 20240) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Design (400, 4), targets (n_scans, 400) and the non-negativity mask."""
    rng = np.random.default_rng(seed)
    grid = np.linspace(350.0, 749.0, N_WAVELENGTHS)
    absorptivity = random_absorptivities(grid, N_COMPONENTS, rng)
    present = rng.random((n_scans, N_COMPONENTS)) < 0.7
    concentration = rng.uniform(0.05, 0.8, (n_scans, N_COMPONENTS)) * present
    instrument = Instrument(baseline_offset_sd=0.005)
    targets = measure(grid, concentration @ absorptivity, instrument, rng)
    design = np.column_stack([absorptivity.T, np.ones(N_WAVELENGTHS)])
    nonnegative = np.array([True] * N_COMPONENTS + [False])
    return design, targets, nonnegative


def scipy_loop(design: np.ndarray, targets: np.ndarray) -> np.ndarray:
    """(a) One nnls call per scan, the free last column split into +1 and -1 parts."""
    split = np.column_stack([design, -design[:, -1]])
    out = np.empty((targets.shape[0], design.shape[1]))
    for row, target in enumerate(targets):
        x, _ = nnls(split, target)
        out[row] = x[:-1]
        out[row, -1] -= x[-1]
    return out


def elapsed(function: Callable[[], object]) -> float:
    """Wall-clock seconds of one call."""
    start = time.perf_counter()
    function()
    return time.perf_counter() - start


def run(n_scans: int, repeats: int, loop_scans: int) -> dict[str, object]:
    design, targets, nonnegative = make_problem(n_scans)
    loop_scans = min(loop_scans, n_scans)
    subset = targets[:loop_scans]
    pseudo_inverse = np.linalg.pinv(design)

    # Warm up (allocator, BLAS threads) and check the answers agree before timing.
    reference = scipy_loop(design, subset)
    solution = solve_nonnegative(design, targets, nonnegative=nonnegative)
    agreement = float(np.max(np.abs(solution.coefficients[:loop_scans] - reference)))
    unconstrained = unconstrained_solution(design, targets)

    timings: dict[str, list[float]] = {"loop": [], "product": [], "helper": [], "solver": [], "norms": []}
    # Interleave the contenders so load from other processes hits all of them alike.
    for _ in range(repeats):
        timings["product"].append(elapsed(lambda: targets @ pseudo_inverse.T))
        timings["solver"].append(elapsed(lambda: solve_nonnegative(design, targets, nonnegative=nonnegative)))
        timings["helper"].append(elapsed(lambda: unconstrained_solution(design, targets)))
        # Residual sums of squares are computed when first read: one more pass over the targets.
        timings["norms"].append(elapsed(lambda: solve_nonnegative(design, targets, nonnegative=nonnegative).residual_sum_squares))
        timings["loop"].append(elapsed(lambda: scipy_loop(design, subset)))
    medians = {name: float(np.median(values)) for name, values in timings.items()}
    loop_full = medians["loop"] * n_scans / loop_scans
    return {
        "n_scans": n_scans,
        "n_wavelengths": N_WAVELENGTHS,
        "n_params": int(design.shape[1]),
        "n_constrained": int(nonnegative.sum()),
        "repeats": repeats,
        "loop_scans_timed": loop_scans,
        "loop_scaled_linearly": loop_scans < n_scans,
        "method": solution.method,
        "fraction_scans_with_a_bound_active": float(solution.at_bound.any(axis=1).mean()),
        "fraction_unconstrained_infeasible": float((unconstrained[:, nonnegative] < 0).any(axis=1).mean()),
        "max_abs_difference_vs_scipy_nnls": agreement,
        "all_converged": bool(solution.converged.all()),
        "seconds": {
            "a_scipy_nnls_loop": loop_full,
            "b_pinv_product": medians["product"],
            "b_unconstrained_solution_helper": medians["helper"],
            "c_solve_nonnegative": medians["solver"],
            "c_with_residual_sums": medians["norms"],
        },
        "speedup_vs_loop": loop_full / medians["solver"],
        "ratio_to_product": medians["solver"] / medians["product"],
    }


def render(result: dict[str, object]) -> str:
    seconds = result["seconds"]
    assert isinstance(seconds, dict)
    solver = seconds["c_solve_nonnegative"]
    lines = [
        f"{result['n_scans']} scans x {result['n_wavelengths']} wavelengths x {result['n_params']} parameters "
        f"({result['n_constrained']} non-negative + free offset); median of {result['repeats']} repeats",
        f"solver method: {result['method']}; scans with a bound active: "
        f"{result['fraction_scans_with_a_bound_active']:.1%}; "
        f"max |difference| vs scipy nnls: {result['max_abs_difference_vs_scipy_nnls']:.2e}",
        "",
        f"{'contender':<48}{'time [ms]':>12}{'time / (c)':>15}",
    ]
    labels = {
        "a_scipy_nnls_loop": "(a) scipy.optimize.nnls loop, offset split +/-",
        "b_pinv_product": "(b) unconstrained, precomputed pinv (1 product)",
        "b_unconstrained_solution_helper": "    unconstrained_solution() helper",
        "c_solve_nonnegative": "(c) solve_nonnegative",
        "c_with_residual_sums": "    with residual sums read (y.y pass)",
    }
    for key, label in labels.items():
        lines.append(f"{label:<48}{seconds[key] * 1e3:>12.2f}{seconds[key] / solver:>14.2f}x")
    if result["loop_scaled_linearly"]:
        lines.append(f"(a) was timed on {result['loop_scans_timed']} scans and scaled linearly to {result['n_scans']}.")
    speed = result["speedup_vs_loop"]
    ratio = result["ratio_to_product"]
    lines.append(f"target (c) >= 20x faster than (a): {speed:.1f}x -> {'met' if speed >= 20 else 'MISSED'}")
    lines.append(f"target (c) <= 1.5x of (b): {ratio:.2f}x -> {'met' if ratio <= 1.5 else 'MISSED'}")
    return "\n".join(lines)


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    parser.add_argument("--scans", type=int, default=20_000, help="scans in the batch (default 20000)")
    parser.add_argument("--repeats", type=int, default=7, help="timed repeats; medians are reported (default 7)")
    parser.add_argument("--loop-scans", type=int, default=2_000, help="scans timed for the scipy loop (default 2000)")
    parser.add_argument("--json", type=Path, help="also write the numbers to this JSON file")
    args = parser.parse_args()
    result = run(args.scans, args.repeats, args.loop_scans)
    print(render(result))
    if args.json is not None:
        args.json.write_text(json.dumps(result, indent=2) + "\n", encoding="utf-8")


if __name__ == "__main__":
    main()
