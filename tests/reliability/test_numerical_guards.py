"""Numerical guards: designs the data cannot support give a clear flag or error, never a bare NaN or a false number.

Singular and near-singular designs (identical library components), all-zero
scans, a component without signal in the chosen range, and absurd values.
Every results.csv written here is checked cell by cell: an empty (NaN)
concentration or uncertainty must carry a flag saying why.

The absorptivity spectra are invented bands (absolve.simulate), so the truth is known.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest

from _reliability import GOOD, assert_no_bare_gaps, one_error_line, read_rows, run
from absolve.io.library_file import read_library
from absolve.io.tables import read_scan_table
from absolve.quantify import quantify
from absolve.simulate import Band, band_spectrum
from absolve.spectra import Spectra

GRID = np.arange(400.0, 601.0, 5.0)
RED = band_spectrum(GRID, [Band(450.0, 20.0, 0.05)])
# A dye that does not absorb at all below 500 nm (exact zeros, as a published table lists them).
BLUE = np.where(GRID >= 500.0, band_spectrum(GRID, [Band(540.0, 20.0, 0.04)]), 0.0)


def _table(path: Path, rows: np.ndarray, names: list[str], first: str = "wavelength_nm") -> Path:
    lines = [",".join([first, *names])] + [f"{w:g}," + ",".join(f"{v:.8g}" for v in rows[:, j]) for j, w in enumerate(GRID)]
    path.write_text("\n".join(lines) + "\n", encoding="utf-8")
    return path


def _library(tmp_path: Path, capsys: pytest.CaptureFixture[str], rows: np.ndarray, names: list[str]) -> Path:
    table = _table(tmp_path / "absorptivities.csv", rows, names)
    library = tmp_path / "library.json"
    code, _, err = run(capsys, ["calibrate", "--absorptivities", table, "--unit", "mg/L", "--out", library])
    assert code == 0, err
    return library


def _samples(tmp_path: Path, truth: np.ndarray, noise: float = 0.001) -> Path:
    values = truth @ np.vstack([RED, BLUE]) + noise * np.random.default_rng(4).standard_normal((truth.shape[0], GRID.size))
    return _table(tmp_path / "samples.csv", values, [f"s{i}" for i in range(truth.shape[0])])


def _quantify(capsys: pytest.CaptureFixture[str], samples: Path, library: Path, out: Path, *extra: str) -> tuple[int, str, str]:
    return run(capsys, ["quantify", samples, "--library", library, "--out", out, *extra])


def test_identical_components_give_flagged_gaps_not_numbers(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    library = _library(tmp_path, capsys, np.vstack([RED, RED]), ["red", "red-twin"])
    code, stdout, err = _quantify(capsys, _samples(tmp_path, np.array([[10.0, 0.0], [4.0, 3.0]])), library, tmp_path / "out")
    assert code == 0, err
    rows = assert_no_bare_gaps(tmp_path / "out" / "results.csv")
    # Two identical columns cannot be told apart: no number is better than a made-up split.
    assert all(row["concentration"] == "" and "ill-conditioned" in row["flags"] for row in rows)
    assert all("ill-conditioned" in row["flags"] for row in read_rows(tmp_path / "out" / "fit.csv"))
    assert "ill-conditioned" in stdout


def test_near_identical_components_are_flagged_and_their_uncertainty_explodes(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    truth = np.array([[10.0, 5.0], [8.0, 0.0]])
    # 0.2 % apart per 100 nm: a library of two batches of one dye.
    near = RED * (1.0 + 0.002 * (GRID - 500.0) / 100.0)
    (tmp_path / "near").mkdir()
    library = _library(tmp_path / "near", capsys, np.vstack([RED, near]), ["red", "red-near"])
    code, _, err = _quantify(capsys, _samples(tmp_path, truth), library, tmp_path / "near" / "out")
    assert code == 0, err
    rows = assert_no_bare_gaps(tmp_path / "near" / "out" / "results.csv")
    assert all("ill-conditioned" in row["flags"] for row in read_rows(tmp_path / "near" / "out" / "fit.csv"))
    (tmp_path / "apart").mkdir()
    separated = _library(tmp_path / "apart", capsys, np.vstack([RED, BLUE]), ["red", "blue"])
    assert _quantify(capsys, _samples(tmp_path, truth), separated, tmp_path / "apart" / "out")[0] == 0
    apart = read_rows(tmp_path / "apart" / "out" / "results.csv")
    # The collinear pair's uncertainties are far larger (variance inflation, common practice, no source): 50x is a loose floor.
    near_u = np.array([float(row["std_uncertainty"]) for row in rows])
    apart_u = np.array([float(row["std_uncertainty"]) for row in apart])
    assert np.all(near_u > 50 * apart_u.max())


def test_all_zero_scans_report_zero_with_an_upper_limit(made, tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    samples = tmp_path / "zeros.csv"
    text = (GOOD / "samples.csv").read_text(encoding="utf-8").splitlines()
    samples.write_text("\n".join([text[0]] + [line.split(",")[0] + ",0,0,0" for line in text[1:]]) + "\n", encoding="utf-8")
    code, _, err = _quantify(capsys, samples, made.library, tmp_path / "out")
    assert code == 0, err
    rows = assert_no_bare_gaps(tmp_path / "out" / "results.csv")
    for row in rows:
        assert float(row["concentration"]) == 0.0 and "below-detection" in row["flags"]
        assert float(row["upper_limit"]) > 0.0 and float(row["std_uncertainty"]) > 0.0


def test_all_zero_scans_without_a_noise_model_do_not_claim_zero_uncertainty(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    library = _library(tmp_path, capsys, np.vstack([RED, BLUE]), ["red", "blue"])
    samples = _table(tmp_path / "zeros.csv", np.zeros((2, GRID.size)), ["z1", "z2"])
    code, _, err = _quantify(capsys, samples, library, tmp_path / "out")
    assert code == 0, err
    for row in assert_no_bare_gaps(tmp_path / "out" / "results.csv"):
        assert row["std_uncertainty"] == "" or float(row["std_uncertainty"]) > 0.0 or "no-uncertainty" in row["flags"], row


def _component_without_signal(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> tuple[int, str, str, Path]:
    library = _library(tmp_path, capsys, np.vstack([RED, BLUE]), ["red", "blue"])
    out = tmp_path / "out"
    # Between 400 and 480 nm the blue dye has no absorptivity at all.
    code, stdout, err = _quantify(capsys, _samples(tmp_path, np.array([[10.0, 5.0]])), library, out, "--range", "400:480")
    return code, stdout, err, out


def test_a_component_without_signal_in_the_range_is_an_error_or_a_flag(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    code, _, err, out = _component_without_signal(tmp_path, capsys)
    if code == 2:
        line = one_error_line(err)
        assert "blue" in line and "—" in line
        assert not out.exists()
    else:
        assert code == 0, err
        rows = assert_no_bare_gaps(out / "results.csv")
        assert all(row["flags"] for row in rows if row["component"] == "blue")


def test_absurd_absorbance_values_are_excluded_and_flagged_not_fitted(made) -> None:
    # 1e9 absorbance units: only the library API can receive them (the scan reader refuses above 10).
    good = read_scan_table(GOOD / "samples.csv")
    scans = Spectra(good.wavelengths, good.values * 1e9, good.names)
    result = quantify(scans, read_library(made.library))
    # Points above the ceiling are excluded; what is left (the scaled-up baseline noise) may still give
    # a number, but never an unflagged one.
    assert all("points-excluded" in flags for flags in result.scan_flags)
    for (i, j), value in np.ndenumerate(result.concentration):
        if not np.isfinite(value) or value > 1e3:
            assert result.flags[i][j], (result.scan_names[i], result.components[j], value)
        if np.isfinite(value) and value > 1e3:
            assert "beyond-calibration" in result.flags[i][j]


def test_a_path_length_typo_gives_concentrations_flagged_beyond_calibration(made, tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    # 1e-6 cm where 1 cm was meant: concentrations a million times the standards'.
    code, _, err = _quantify(capsys, GOOD / "samples.csv", made.library, tmp_path / "out", "--path-length", "1e-6")
    assert code == 0, err
    rows = assert_no_bare_gaps(tmp_path / "out" / "results.csv")
    for row in rows:
        if row["concentration"] and float(row["concentration"]) > 1e3:
            assert "beyond-calibration" in row["flags"], row
    assert any(row["concentration"] and float(row["concentration"]) > 1e3 for row in rows)


def test_an_absurd_standard_concentration_is_refused_naming_the_table(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    # 600000000 typed for 0.6 mg/L.
    text = (GOOD / "standards_concentrations.csv").read_text(encoding="utf-8").replace("red-3,red,0.6", "red-3,red,600000000")
    table = tmp_path / "typo.csv"
    table.write_text(text, encoding="utf-8")
    out = tmp_path / "lib.json"
    code, _, err = run(capsys, ["calibrate", GOOD / "standards.csv", "--standards", table, "--unit", "mg/L", "--out", out])
    assert code == 2
    line = one_error_line(err)
    assert str(table) in line and " — " in line
    assert not out.exists()
