"""``--learn-library-error`` on the command line: quantify and check on a batch whose library is off.

The library and scans are invented (absolve.simulate): a library calibrated from noisy standards is
given a deliberate smooth absorptivity error, and 120 clean samples are written as a scan table.
"""

from __future__ import annotations

import csv
import dataclasses
import json
from pathlib import Path

import numpy as np
import pytest
from scipy import stats

from absolve.calibration import calibrate
from absolve.cli import main
from absolve.io.library_file import write_library
from absolve.io.tables import wide_table_lines
from absolve.simulate import Band, Instrument, band_spectrum, measure

GRID = np.arange(400.0, 601.0)
# Most clean scans of 120 that a screen at alpha 0.05 flags by chance: the binomial 99.9 % quantile (scipy.stats.binom).
CHANCE = int(stats.binom.ppf(0.999, 120, 0.05))


@pytest.fixture(scope="module")
def batch(tmp_path_factory: pytest.TempPathFactory, simulated_standards: type) -> tuple[Path, Path]:
    folder = tmp_path_factory.mktemp("learn")
    instrument = Instrument(stray_light=0.0)
    standards = simulated_standards(31, instrument, (0.16, 0.4, 0.64, 0.96, 1.28, 1.76))
    library = calibrate(standards.spectra, standards.concentrations, list(standards.names), "mg/L")
    error = band_spectrum(GRID, [Band(470.0, 12.0, 0.03)])  # 3 % of the first dye's peak, on its flank
    library_path = folder / "library.json"
    write_library(dataclasses.replace(library, absorptivity=standards.truth + np.vstack([error, np.zeros(GRID.size)])), library_path)
    rng = np.random.default_rng(32)
    values = measure(GRID, rng.uniform(0.08, 0.96, (120, 2)) @ standards.truth, instrument, rng)
    scans_path = folder / "samples.csv"
    with scans_path.open("w", encoding="utf-8") as handle:
        handle.writelines(wide_table_lines("wavelength_nm", [f"x{i:03d}" for i in range(120)], GRID, values, missing=""))
    return library_path, scans_path


def _flag_rate(folder: Path) -> float:
    rows = list(csv.DictReader((folder / "fit.csv").open(encoding="utf-8")))
    return sum(row["interferent"] == "true" for row in rows) / len(rows)


def test_quantify_learns_the_error_and_records_it(tmp_path: Path, batch: tuple[Path, Path], capsys: pytest.CaptureFixture[str]) -> None:
    library, scans = batch
    assert main(["quantify", str(scans), "--library", str(library), "--out", str(tmp_path / "plain"), "-q"]) == 0
    assert main(["quantify", str(scans), "--library", str(library), "--out", str(tmp_path / "learned"), "--learn-library-error"]) == 0
    shown = capsys.readouterr().out
    assert "Library error from this batch: library bias estimated from" in shown
    assert _flag_rate(tmp_path / "plain") > 0.3
    assert _flag_rate(tmp_path / "learned") <= CHANCE / 120
    document = json.loads((tmp_path / "learned" / "results.json").read_text(encoding="utf-8"))
    assert document["settings"]["library_error"]["applied"] is True
    assert document["provenance"]["options"]["learn_library_error"] is True
    assert "library bias estimated from" in (tmp_path / "learned" / "report.html").read_text(encoding="utf-8")
    # Concentrations do not change: only the screen sees the correction.
    plain = (tmp_path / "plain" / "results.csv").read_text(encoding="utf-8")
    assert plain == (tmp_path / "learned" / "results.csv").read_text(encoding="utf-8")


def test_check_takes_the_option_too(tmp_path: Path, batch: tuple[Path, Path], capsys: pytest.CaptureFixture[str]) -> None:
    library, scans = batch
    assert main(["check", str(scans), "--library", str(library), "--learn-library-error", "--json"]) == 0
    rows = json.loads(capsys.readouterr().out)
    assert sum(row["interferent"] for row in rows) <= CHANCE
    assert main(["check", str(scans), "--library", str(library), "--learn-library-error"]) == 0
    assert "Library error from this batch: library bias estimated from" in capsys.readouterr().out


def test_without_a_library_the_option_is_one_error_line(tmp_path: Path, batch: tuple[Path, Path], capsys: pytest.CaptureFixture[str]) -> None:
    _, scans = batch
    code = main(["quantify", str(scans), "--model", str(tmp_path / "model.json"), "--out", str(tmp_path / "out"), "--learn-library-error"])
    err = capsys.readouterr().err
    assert code == 2 and err.count("\n") == 1 and err.startswith("error: ") and "--learn-library-error needs --library" in err
    assert not (tmp_path / "out").exists()
