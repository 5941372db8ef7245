"""The obvious script: pandas.read_csv, one scipy.optimize.nnls per scan, a CSV of concentrations.

Baseline for the whole-process benchmark (run as its own process, like ``absolve quantify``)::

    python baseline_script.py SCANS.csv ABSORPTIVITIES.csv OUT.csv

It fits each scan with the absorptivities and a free offset (split into a +1 and a -1 column,
since nnls knows only non-negative parameters) and writes one row per scan. No uncertainty,
no exclusions, no screening: only what a spreadsheet-macro replacement would do.
"""

from __future__ import annotations

import sys

import numpy as np
import pandas as pd
from scipy.optimize import nnls


def main(scans_path: str, absorptivities_path: str, out_path: str) -> None:
    scans = pd.read_csv(scans_path)
    absorptivities = pd.read_csv(absorptivities_path)
    grid = scans.iloc[:, 0].to_numpy()
    k = np.column_stack([np.interp(grid, absorptivities.iloc[:, 0], absorptivities[name]) for name in absorptivities.columns[1:]])
    ones = np.ones((grid.size, 1))
    design = np.hstack([k, ones, -ones])
    values = scans.iloc[:, 1:].to_numpy()
    rows = []
    for j, name in enumerate(scans.columns[1:]):
        x, _ = nnls(design, values[:, j])
        rows.append([name, *x[: k.shape[1]], x[-2] - x[-1]])
    pd.DataFrame(rows, columns=["scan", *absorptivities.columns[1:], "offset"]).to_csv(out_path, index=False)


if __name__ == "__main__":
    main(*sys.argv[1:4])
