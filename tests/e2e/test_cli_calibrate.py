"""``absolve calibrate`` driven through the command line: libraries written, every bad input one ``error:`` line."""

from __future__ import annotations

import json
import subprocess
import sys
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from absolve import __version__
from absolve.cli import main
from absolve.demo_data import DEMO_DYES
from absolve.io.library_file import read_library
from absolve.simulate import Instrument, measure, random_absorptivities

DYES = tuple(dye.code for dye in DEMO_DYES)
CONSOLE_SCRIPT = Path(sys.executable).parent / "absolve"


def _run(capsys: pytest.CaptureFixture[str], *args: str | Path) -> tuple[int, str, str]:
    code = main(["calibrate", *map(str, args)])
    captured = capsys.readouterr()
    return code, captured.out, captured.err


def _listing(folder: Path) -> dict[str, bytes]:
    return {path.name: path.read_bytes() for path in sorted(folder.iterdir()) if path.is_file()}


def test_calibrate_the_demo_standards(demo, tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    out = tmp_path / "dyes.json"
    code, stdout, err = _run(capsys, demo.standards, "--standards", demo.standards_concentrations, "--unit", "mg/L", "--out", out)
    assert code == 0, err
    library = read_library(out)
    assert library.names == DYES
    assert library.unit == "mg/L"
    assert stdout.startswith("Reference library: 3 components, 380-750 nm (371 points), unit mg/L")
    assert all(code in stdout for code in DYES)
    assert f"library written to {out}" in stdout
    # The demo's invented peak absorptivities are 0.034-0.041 per (mg/L x cm), see absolve.demo_data.
    true_peaks = [float(dye.absorptivity(library.wavelengths).max()) for dye in DEMO_DYES]
    np.testing.assert_allclose(library.absorptivity.max(axis=1), true_peaks, rtol=0.03)
    inputs = library.provenance["inputs"]
    assert [item["file"] for item in inputs] == ["standards.csv", "standards_concentrations.csv"]
    assert all(len(item["sha256"]) == 64 for item in inputs)


def test_calibrate_options_blank_range_masses_and_json(demo, tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    out = tmp_path / "lib.json"
    code, stdout, err = _run(
        capsys, demo.standards, "--standards", demo.standards_concentrations, "--unit", "mg/L", "--out", out,
        "--blank", demo.blank, "--range", "400:700", "--molar-mass", f"{DYES[0]}=642.5", "--json",
    )
    assert code == 0, err
    summary = json.loads(stdout)
    assert [row["component"] for row in summary["components"]] == list(DYES)
    assert summary["wavelength_range_nm"] == [400.0, 700.0]
    library = read_library(out)
    assert library.components[0].molar_mass == 642.5
    assert library.components[1].molar_mass is None
    assert [item["file"] for item in library.provenance["inputs"]][-1] == "blank.csv"


def test_calibrate_from_known_absorptivities(demo, tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    out = tmp_path / "given.json"
    code, stdout, err = _run(capsys, "--absorptivities", demo.absorptivities, "--unit", "mg/L", "--out", out)
    assert code == 0, err
    library = read_library(out)
    assert library.names == DYES
    # pandas reads the same table independently.
    table = pd.read_csv(demo.absorptivities, comment="#")
    np.testing.assert_array_equal(library.wavelengths, table.iloc[:, 0].to_numpy(dtype=float))
    np.testing.assert_array_equal(library.absorptivity, table[list(DYES)].to_numpy(dtype=float).T)
    assert np.all(library.std_error == 0.0)
    assert "no standards" in stdout


def _small_standards(folder: Path, dilution: float) -> tuple[Path, Path, np.ndarray]:
    """Noiseless pure standards of one invented dye, stated as stock concentrations diluted ``dilution`` times."""
    grid = np.arange(400.0, 501.0, 2.0)
    truth = random_absorptivities(grid, 1, np.random.default_rng(1))[0]
    stock = np.array([0.0, 0.2, 0.4, 0.6, 0.8, 1.0])
    absorbance = measure(grid, np.outer(stock / dilution, truth), Instrument(noise_floor=0.0, noise_proportional=0.0, stray_light=0.0), np.random.default_rng(0))
    names = [f"s{i}" for i in range(stock.size)]
    scans = folder / "std.csv"
    scans.write_text("nm," + ",".join(names) + "\n" + "".join(f"{w:g}," + ",".join(f"{v:.9f}" for v in absorbance[:, j]) + "\n" for j, w in enumerate(grid)))
    table = folder / "conc.csv"
    table.write_text("scan,component,concentration,dilution\n" + "".join(f"{n},dye,{c},{dilution}\n" for n, c in zip(names, stock)))
    return scans, table, truth


def test_dilution_divides_the_stated_concentration(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    scans, table, truth = _small_standards(tmp_path, dilution=4.0)
    code, _, err = _run(capsys, scans, "--standards", table, "--unit", "umol/L", "--out", tmp_path / "lib.json")
    assert code == 0, err
    np.testing.assert_allclose(read_library(tmp_path / "lib.json").absorptivity[0], truth, rtol=0, atol=1e-6)


def _bad_cases(demo, folder: Path) -> dict[str, list[str | Path]]:
    standards = ["calibrate", demo.standards, "--standards", demo.standards_concentrations, "--unit", "mg/L"]
    (folder / "word.csv").write_text("nm,a\n400,0.1\n401,zero\n")
    (folder / "far.csv").write_text("nm,x\n900,0.1\n901,0.2\n")
    (folder / "conc_bad.csv").write_text("scan,concentration\nYX-112-L1,2\n")
    (folder / "conc_ghost.csv").write_text(demo.standards_concentrations.read_text() + "ghost,YX-112,3,1.0\n")
    (folder / "taken").mkdir()
    out = folder / "new.json"
    return {
        "missing scan file": ["calibrate", folder / "absent.csv", "--standards", demo.standards_concentrations, "--unit", "mg/L", "--out", out],
        "non-numeric cell": ["calibrate", folder / "word.csv", "--standards", demo.standards_concentrations, "--unit", "mg/L", "--out", out],
        "table without column": ["calibrate", demo.standards, "--standards", folder / "conc_bad.csv", "--unit", "mg/L", "--out", out],
        "unknown scan in table": ["calibrate", demo.standards, "--standards", folder / "conc_ghost.csv", "--unit", "mg/L", "--out", out],
        "disjoint scan files": ["calibrate", demo.standards, folder / "far.csv", "--standards", demo.standards_concentrations, "--unit", "mg/L", "--out", out],
        "unknown unit": [*standards[:-1], "furlongs", "--out", out],
        "reversed range": [*standards, "--out", out, "--range", "700:400"],
        "wordy range": [*standards, "--out", out, "--range", "blue"],
        "range outside scans": [*standards, "--out", out, "--range", "900:1000"],
        "mass without value": [*standards, "--out", out, "--molar-mass", "YX-112"],
        "negative mass": [*standards, "--out", out, "--molar-mass", "YX-112=-3"],
        "bad decimal": [*standards, "--out", out, "--decimal", ":"],
        "bad quantity": [*standards, "--out", out, "--quantity", "optical-density"],
        "bad tolerance": [*standards, "--out", out, "--linearity-tolerance", "0.9"],
        "tolerance not a number": [*standards, "--out", out, "--linearity-tolerance", "tight"],
        "absorptivities and scans": [*standards, "--out", out, "--absorptivities", demo.absorptivities],
        "scans without table": ["calibrate", demo.standards, "--unit", "mg/L", "--out", out],
        "missing unit": ["calibrate", demo.standards, "--standards", demo.standards_concentrations, "--out", out],
        "missing out": standards,
        "unknown option": [*standards, "--out", out, "--colour", "red"],
        "folder as out": [*standards, "--out", folder / "taken", "--force"],
    }


BAD_CASES = [
    "missing scan file", "non-numeric cell", "table without column", "unknown scan in table", "disjoint scan files",
    "unknown unit", "reversed range", "wordy range", "range outside scans", "mass without value", "negative mass",
    "bad decimal", "bad quantity", "bad tolerance", "tolerance not a number", "absorptivities and scans",
    "scans without table", "missing unit", "missing out", "unknown option", "folder as out",
]
EXPECTED_MESSAGE = {
    "missing scan file": "absent.csv: file not found",
    "non-numeric cell": "word.csv:3:2: 'zero' is not a number",
    "table without column": "conc_bad.csv:1: the header lacks the column 'component'",
    "unknown scan in table": "scan 'ghost' is not among the scans read",
    "disjoint scan files": "share no wavelength",
    "unknown unit": "the --unit 'furlongs' is not a known concentration unit",
    "bad tolerance": "--linearity-tolerance 0.9 must lie between 0 and 0.5",
    "missing unit": "Missing option '--unit'",
    "missing out": "Missing option '--out'",
    "unknown option": "No such option: --colour",
    "folder as out": "cannot write",
}


@pytest.mark.parametrize("case", BAD_CASES)
def test_bad_input_is_one_error_line_and_writes_nothing(demo, tmp_path: Path, capsys: pytest.CaptureFixture[str], case: str) -> None:
    argv = _bad_cases(demo, tmp_path)[case]
    before = _listing(tmp_path)
    code = main([str(arg) for arg in argv])
    captured = capsys.readouterr()
    assert code == 2, captured
    lines = captured.err.strip().splitlines()
    assert len(lines) == 1 and lines[0].startswith("error: "), captured.err
    assert "Traceback" not in captured.err + captured.out
    assert EXPECTED_MESSAGE.get(case, "") in lines[0]
    assert _listing(tmp_path) == before
    assert not (tmp_path / "new.json").exists()


def test_existing_library_is_kept_without_force(demo, tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    out = tmp_path / "lib.json"
    out.write_bytes(b'{"old": "library"}\n')
    args = ["--absorptivities", demo.absorptivities, "--unit", "mg/L", "--out", out]
    code, _, err = _run(capsys, *args)
    assert code == 2
    assert err.strip() == f"error: {out} already exists — choose another output, or pass --force to replace it"
    assert out.read_bytes() == b'{"old": "library"}\n'
    code, _, err = _run(capsys, *args, "--force")
    assert code == 0, err
    assert read_library(out).names == DYES


def test_version_and_help(capsys: pytest.CaptureFixture[str]) -> None:
    assert main(["--version"]) == 0
    assert capsys.readouterr().out.strip() == f"absolve {__version__}"
    assert main(["calibrate", "--help"]) == 0
    text = capsys.readouterr().out
    assert "--standards" in text and "--absorptivities" in text and "--force" in text
    assert main([]) == 0  # a bare 'absolve' shows the help
    assert "calibrate" in capsys.readouterr().out
    assert main(["calibration"]) == 2
    err = capsys.readouterr().err.strip()
    assert err.startswith("error: No such command 'calibration'.") and err.endswith("run 'absolve --help'")


def test_installed_console_script_calibrates(demo, tmp_path: Path) -> None:
    out = tmp_path / "lib.json"
    completed = subprocess.run(
        [str(CONSOLE_SCRIPT), "calibrate", str(demo.standards), "--standards", str(demo.standards_concentrations), "--unit", "mg/L", "--out", str(out)],
        capture_output=True, text=True, timeout=120, check=False,
    )
    assert completed.returncode == 0, completed.stderr
    assert read_library(out).names == DYES
    assert all(code in completed.stdout for code in DYES)
