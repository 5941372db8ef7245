"""Invented inputs for the benchmarks: a calibrated library and a wide table of many scans.

Everything is simulated with :mod:`absolve.simulate` (three overlapping invented absorbers on
400 wavelengths, a realistic instrument), so no data file is kept in the repository: the files
are written into a temporary folder the caller owns.
"""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path

import numpy as np

from absolve.calibration import calibrate
from absolve.io.library_file import write_library
from absolve.io.tables import wide_table_lines
from absolve.library import ReferenceLibrary
from absolve.simulate import Instrument, measure, random_absorptivities
from absolve.spectra import Spectra

GRID = np.linspace(350.0, 749.0, 400)
COMPONENTS = ("red", "yellow", "blue")
# A cuvette offset per scan, so the free baseline term matters.
INSTRUMENT = Instrument(baseline_offset_sd=0.003)
# Standards up to a peak absorbance of 1.2 and samples up to about 1: a few scans reach past
# the calibrated working range at their peaks, so those scans have points excluded.
LEVELS = (0.1, 0.2, 0.4, 0.6, 0.8, 1.0, 1.2)


@dataclass(frozen=True)
class Workload:
    """Paths of the generated files and the sizes that matter.

    Attributes
    ----------
    library : Path
        Library file (``absolve calibrate`` format).
    absorptivities : Path
        The same absorptivities as a plain wide CSV, for scripts that do not use absolve.
    scans : Path
        Wide scan table: first column wavelength, one column per scan.
    small_scans : Path
        The first 10 scans only, for a command's fixed cost (start-up, imports).
    n_scans, n_wavelengths : int
    data_bytes : int
        Size of the scans as float64 (``n_scans * n_wavelengths * 8``).
    """

    library: Path
    absorptivities: Path
    scans: Path
    small_scans: Path
    n_scans: int
    n_wavelengths: int

    @property
    def data_bytes(self) -> int:
        return self.n_scans * self.n_wavelengths * 8


def make_library(seed: int = 20240) -> tuple[ReferenceLibrary, np.ndarray]:
    """A library calibrated from simulated pure standards, and the true absorptivities (n_comp, n_wl)."""
    rng = np.random.default_rng(seed)
    truth = random_absorptivities(GRID, len(COMPONENTS), rng)
    truth = truth / truth.max(axis=1, keepdims=True)
    n = len(COMPONENTS)
    rows = [[level if j == k else 0.0 for j in range(n)] for k in range(n) for level in LEVELS] + [[0.0] * n] * 2
    concentration = np.array(rows)
    standards = Spectra(GRID, measure(GRID, concentration @ truth, INSTRUMENT, rng), [f"std-{i:02d}" for i in range(len(rows))])
    return calibrate(standards, concentration, list(COMPONENTS), "mg/L"), truth


def write_workload(folder: Path, n_scans: int, seed: int = 20240) -> Workload:
    """Write the library, its absorptivities and ``n_scans`` simulated sample scans into ``folder``."""
    library, truth = make_library(seed)
    rng = np.random.default_rng(seed + 1)
    paths = {name: folder / name for name in ("library.json", "absorptivities.csv", "scans.csv", "scans-small.csv")}
    write_library(library, paths["library.json"])
    with open(paths["absorptivities.csv"], "w", encoding="utf-8") as handle:
        handle.writelines(wide_table_lines("wavelength_nm", COMPONENTS, library.wavelengths, library.absorptivity, missing="", rounding="decimal"))
    # Each component is absent from about 30 % of the scans, so the non-negativity bound matters.
    present = rng.random((n_scans, len(COMPONENTS))) < 0.7
    concentration = rng.uniform(0.05, 0.8, (n_scans, len(COMPONENTS))) * present
    values = measure(GRID, concentration @ truth, INSTRUMENT, rng)
    names = [f"scan-{i:06d}" for i in range(n_scans)]
    with open(paths["scans.csv"], "w", encoding="utf-8") as handle:
        handle.writelines(wide_table_lines("wavelength_nm", names, GRID, values, missing="saturated"))
    with open(paths["scans-small.csv"], "w", encoding="utf-8") as handle:
        handle.writelines(wide_table_lines("wavelength_nm", names[:10], GRID, values[:10], missing="saturated"))
    return Workload(paths["library.json"], paths["absorptivities.csv"], paths["scans.csv"], paths["scans-small.csv"], n_scans, GRID.size)
