"""Every performance benchmark in one run, each against a baseline measured beside it.

Run on demand (pytest does not collect this folder)::

    python tests/benchmarks/run_all.py [--quick] [--json OUT] [--scans N] [--repeats R]

Rows, medians of ``--repeats`` runs with the contenders interleaved (so load from other
processes hits all of them alike):

solver
    Batch NNLS for N scans x 400 wavelengths x 3 components + offset (bench_solver.py) against a
    loop of scipy.optimize.nnls (target >= 20x faster) and against the unconstrained solution by
    one product with a precomputed pseudo-inverse (target <= 1.5x its time).
whole process
    ``absolve quantify`` (the installed command, as a subprocess) on an N-scan wide CSV against
    the obvious script (pandas.read_csv, scipy nnls per scan, a CSV; baseline_script.py; target
    <= 0.5x) and against pandas.read_csv alone (target <= 3x), each a fresh process. Beside
    them, the same command with ``--detail 0`` (the report without detailed scan figures, whose
    drawing is a fixed cost of a few seconds whatever the batch size), and with ``--detail 0
    --no-spectra`` as well (no fitted.csv and residuals.csv).
memory
    Peak resident memory of those runs, summed over each run's process tree (``absolve
    quantify`` draws figures in a worker process for batches of more than one chunk; sampled
    every 20 ms), against the size of the scans as float64 (target <= 3x). A Python process
    with numpy, scipy and absolve imported holds about 100-200 MB before it reads anything
    (more than twice these 61 MB of scans), so the target is judged on the peak above the same
    command's on a 10-scan file; the total is
    shown too. (On 100,000 scans x 371 wavelengths the total itself is 2.3x the data:
    tests/reliability/test_load.py.)
planner
    Exact wavelength planning (``absolve.planning.plan_wavelengths``, branch and bound) of K = 3
    and K = 4 wavelengths among 300 candidates, beside its greedy search; for K = 3 also
    against scoring every one of the 4.5 million sets.

The scans are simulated into a temporary folder that is deleted afterwards.
"""

from __future__ import annotations

import argparse
import json
import math
import os
import shutil
import sys
import tempfile
import time
from collections.abc import Callable, Sequence
from itertools import combinations
from pathlib import Path
from typing import Any

import numpy as np

HERE = Path(__file__).resolve().parent
sys.path.insert(0, str(HERE))
sys.path.insert(0, str(HERE.parent / "reliability"))

import bench_solver  # noqa: E402  (a sibling script, found through the path above)
from _reliability import run_sampling_memory  # noqa: E402  (the load check's process-tree memory sampling)
from _workload import Workload, write_workload  # noqa: E402

READ_ONLY = "import sys, pandas; pandas.read_csv(sys.argv[1])"


def run_child(command: Sequence[str]) -> tuple[float, float]:
    """Wall-clock seconds and peak resident memory (bytes) of one child process and its workers.

    The memory is the peak of the summed resident memory of the child's whole process tree
    (absolve quantify draws figures in a worker process), sampled every 20 ms from /proc.
    """
    start = time.perf_counter()
    finished, peak = run_sampling_memory(command, timeout=3600.0)
    seconds = time.perf_counter() - start
    if finished.returncode != 0:
        raise RuntimeError(f"{' '.join(command)} failed ({finished.returncode}):\n{finished.stderr}")
    return seconds, peak


def absolve_command() -> list[str]:
    """The installed ``absolve`` console script next to this interpreter, else the same entry point through -c."""
    script = Path(sys.executable).parent / "absolve"
    return [str(script)] if script.exists() else [sys.executable, "-c", "from absolve.cli import run; run()"]


def whole_process(work: Workload, folder: Path, repeats: int) -> dict[str, Any]:
    """Seconds and peak memory of absolve quantify (with and without detailed scan figures), the obvious script and reading alone."""
    contenders: dict[str, Callable[[Path], list[str]]] = {
        "absolve_quantify": lambda scans: [*absolve_command(), "quantify", str(scans), "--library", str(work.library),
                                           "--out", str(folder / "cli-out"), "--force", "--quiet"],
        "obvious_script": lambda scans: [sys.executable, str(HERE / "baseline_script.py"), str(scans), str(work.absorptivities),
                                         str(folder / "script-out.csv")],
        "read_csv_only": lambda scans: [sys.executable, "-c", READ_ONLY, str(scans)],
        "absolve_quantify_detail_0": lambda scans: [*absolve_command(), "quantify", str(scans), "--library", str(work.library),
                                                    "--out", str(folder / "cli-out-0"), "--force", "--quiet", "--detail", "0"],
        "absolve_quantify_lean": lambda scans: [*absolve_command(), "quantify", str(scans), "--library", str(work.library),
                                                "--out", str(folder / "cli-out-lean"), "--force", "--quiet", "--detail", "0", "--no-spectra"],
    }
    seconds: dict[str, list[float]] = {name: [] for name in contenders}
    peak: dict[str, list[float]] = {name: [] for name in contenders}
    small_peak: dict[str, float] = {}
    for name, command in contenders.items():
        # One unrecorded run each: the file and the interpreter's modules in the page cache for all alike.
        _, small_peak[name] = run_child(command(work.small_scans))
    run_child(contenders["read_csv_only"](work.scans))
    for _ in range(repeats):
        for name, command in contenders.items():
            elapsed, memory = run_child(command(work.scans))
            seconds[name].append(elapsed)
            peak[name].append(memory)
    median = {name: float(np.median(values)) for name, values in seconds.items()}
    peaks = {name: float(np.max(values)) for name, values in peak.items()}
    data = float(work.data_bytes)
    return {
        "seconds": median,
        "all_seconds": seconds,
        "peak_bytes": peaks,
        "peak_bytes_10_scans": small_peak,
        "data_bytes": data,
        "ratio_absolve_to_script": median["absolve_quantify"] / median["obvious_script"],
        "ratio_absolve_to_read": median["absolve_quantify"] / median["read_csv_only"],
        "ratio_detail_0_to_script": median["absolve_quantify_detail_0"] / median["obvious_script"],
        "ratio_detail_0_to_read": median["absolve_quantify_detail_0"] / median["read_csv_only"],
        "ratio_lean_to_script": median["absolve_quantify_lean"] / median["obvious_script"],
        "ratio_lean_to_read": median["absolve_quantify_lean"] / median["read_csv_only"],
        "memory_ratio": {name: peaks[name] / data for name in contenders},
        "memory_ratio_above_10_scans": {name: (peaks[name] - small_peak[name]) / data for name in contenders},
    }


def planner(repeats: int) -> dict[str, Any]:
    """Exact planning of 3 and 4 wavelengths among 300 candidates, beside greedy search and (K = 3) scoring every set."""
    try:
        from absolve import planning
    except ImportError:
        return {"skipped": "absolve.planning is not there"}
    from absolve.library import library_from_absorptivities
    from absolve.simulate import random_absorptivities

    grid = np.arange(400.0, 700.0)
    absorptivity = random_absorptivities(grid, 3, np.random.default_rng(7))
    library = library_from_absorptivities(grid, absorptivity, ["red", "yellow", "blue"], "mg/L")
    expected = {"red": 0.3, "yellow": 0.3, "blue": 0.3}
    out: dict[str, Any] = {"candidates": int(grid.size)}
    for count in (3, 4):
        times: dict[str, list[float]] = {"exact": [], "greedy": []}
        plans = {}
        for _ in range(repeats):
            for search in times:
                start = time.perf_counter()
                plans[search] = planning.plan_wavelengths(library, count, expected=expected, search=search)
                times[search].append(time.perf_counter() - start)
        out[f"K{count}"] = {
            "seconds_exact": float(np.median(times["exact"])),
            "seconds_greedy": float(np.median(times["greedy"])),
            "exact_wavelengths_nm": plans["exact"].wavelengths_nm.tolist(),
            "greedy_wavelengths_nm": plans["greedy"].wavelengths_nm.tolist(),
            "optimal": bool(plans["exact"].optimal),
        }
    # Scoring every set with the planner's own criterion: the brute force the branch and bound avoids.
    concentration = np.array([expected[name] for name in library.names])
    x = absorptivity.T * concentration
    start = time.perf_counter()
    best_loss, best_set = math.inf, None
    sets = np.array(list(combinations(range(grid.size), 3)), dtype=np.intp)
    for first in range(0, len(sets), 250_000):
        block = sets[first : first + 250_000]
        loss = planning._set_loss(x, block, "worst-relative")
        index = int(np.argmin(loss))
        if loss[index] < best_loss:
            best_loss, best_set = float(loss[index]), block[index]
    out["K3"]["seconds_every_set"] = time.perf_counter() - start
    out["K3"]["every_set_wavelengths_nm"] = grid[np.sort(best_set)].tolist() if best_set is not None else []
    return out


def render(result: dict[str, Any]) -> str:
    """The table printed at the end."""
    lines = [f"absolve benchmarks: {result['n_scans']} scans x 400 wavelengths, medians of {result['repeats']} runs", ""]
    rows: list[tuple[str, str, str, str]] = []
    solver = result["solver"]
    s = solver["seconds"]
    rows.append(("solver: solve_nonnegative", f"{s['c_solve_nonnegative']:.3f} s", "", ""))
    rows.append(("  vs scipy nnls loop", f"{s['a_scipy_nnls_loop']:.3f} s", f"{solver['speedup_vs_loop']:.1f}x faster", _verdict(solver["speedup_vs_loop"] >= 20, ">= 20x")))
    rows.append(("  vs pinv product (unconstrained)", f"{s['b_pinv_product']:.3f} s", f"{solver['ratio_to_product']:.2f}x its time", _verdict(solver["ratio_to_product"] <= 1.5, "<= 1.5x")))
    whole = result["whole_process"]
    w = whole["seconds"]
    rows.append(("process: absolve quantify (CLI)", f"{w['absolve_quantify']:.2f} s", "", ""))
    rows.append(("  vs obvious script", f"{w['obvious_script']:.2f} s", f"{whole['ratio_absolve_to_script']:.2f}x its time", _verdict(whole["ratio_absolve_to_script"] <= 0.5, "<= 0.5x")))
    rows.append(("  vs pandas.read_csv alone", f"{w['read_csv_only']:.2f} s", f"{whole['ratio_absolve_to_read']:.2f}x its time", _verdict(whole["ratio_absolve_to_read"] <= 3.0, "<= 3x")))
    rows.append(("process: absolve quantify --detail 0", f"{w['absolve_quantify_detail_0']:.2f} s", "", ""))
    rows.append(("  vs obvious script", "", f"{whole['ratio_detail_0_to_script']:.2f}x its time", _verdict(whole["ratio_detail_0_to_script"] <= 0.5, "<= 0.5x")))
    rows.append(("  vs pandas.read_csv alone", "", f"{whole['ratio_detail_0_to_read']:.2f}x its time", _verdict(whole["ratio_detail_0_to_read"] <= 3.0, "<= 3x")))
    rows.append(("process: ... --detail 0 --no-spectra", f"{w['absolve_quantify_lean']:.2f} s", "", ""))
    rows.append(("  vs obvious script", "", f"{whole['ratio_lean_to_script']:.2f}x its time", _verdict(whole["ratio_lean_to_script"] <= 0.5, "<= 0.5x")))
    rows.append(("  vs pandas.read_csv alone", "", f"{whole['ratio_lean_to_read']:.2f}x its time", _verdict(whole["ratio_lean_to_read"] <= 3.0, "<= 3x")))
    data_mb = whole["data_bytes"] / 2**20
    for name, label in (("absolve_quantify", "memory: absolve quantify peak"), ("absolve_quantify_detail_0", "memory: ... --detail 0 peak"),
                        ("absolve_quantify_lean", "memory: ... --no-spectra peak"),
                        ("obvious_script", "memory: obvious script peak"), ("read_csv_only", "memory: read_csv alone peak")):
        total = whole["memory_ratio"][name]
        above = whole["memory_ratio_above_10_scans"][name]
        rows.append((label, f"{whole['peak_bytes'][name] / 2**20:.0f} MB", f"{total:.2f}x data ({above:.2f}x above 10 scans)",
                     _verdict(above <= 3.0, "<= 3x, above start-up") if name.startswith("absolve") else ""))
    lines.append(f"(scans as float64: {data_mb:.0f} MB)")
    plan = result["planner"]
    if "skipped" in plan:
        rows.append(("planner", "skipped", plan["skipped"], ""))
    else:
        for count in (3, 4):
            row = plan[f"K{count}"]
            rows.append((f"planner: exact K = {count} of {plan['candidates']}", f"{row['seconds_exact']:.2f} s",
                         f"greedy {row['seconds_greedy']:.3f} s", "optimal" if row["optimal"] else "NOT PROVEN"))
        k3 = plan["K3"]
        same = sorted(k3["every_set_wavelengths_nm"]) == sorted(k3["exact_wavelengths_nm"])
        rows.append(("  K = 3 vs scoring every set", f"{k3['seconds_every_set']:.2f} s",
                     f"{k3['seconds_every_set'] / k3['seconds_exact']:.1f}x the exact search's time", "same set" if same else "DIFFERENT SET"))
    widths = [max(len(row[i]) for row in rows) for i in range(4)]
    lines += ["  ".join(cell.ljust(width) for cell, width in zip(row, widths)).rstrip() for row in rows]
    return "\n".join(lines)


def _verdict(met: bool, target: str) -> str:
    return f"target {target}: {'met' if met else 'MISSED'}"


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    parser.add_argument("--quick", action="store_true", help="2,000 scans and 2 repeats: a smoke test, not the targets' size")
    parser.add_argument("--scans", type=int, help="scans in the batch (default 20000)")
    parser.add_argument("--repeats", type=int, help="timed repeats; medians are reported (default 3)")
    parser.add_argument("--json", type=Path, help="also write every number to this JSON file")
    args = parser.parse_args()
    n_scans = args.scans or (2_000 if args.quick else 20_000)
    repeats = args.repeats or (2 if args.quick else 3)
    folder = Path(tempfile.mkdtemp(prefix="absolve-bench-"))
    try:
        work = write_workload(folder, n_scans)
        result: dict[str, Any] = {"n_scans": n_scans, "repeats": repeats, "python": sys.version.split()[0], "cpus": os.cpu_count()}
        result["solver"] = bench_solver.run(n_scans, max(repeats, 3), min(2_000, n_scans))
        result["whole_process"] = whole_process(work, folder, repeats)
        result["planner"] = planner(1 if args.quick else repeats)
    finally:
        shutil.rmtree(folder, ignore_errors=True)
    print(render(result))
    if args.json is not None:
        args.json.write_text(json.dumps(result, indent=2) + "\n", encoding="utf-8")


if __name__ == "__main__":
    main()
