"""``absolve plan`` on library files: the readable table, exactly one JSON object with --json,
a figure file, and one error line (exit status 2) for bad input."""

from __future__ import annotations

import json
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest

from absolve.cli import main
from absolve.io.library_file import write_library
from absolve.library import ComponentCalibration, NoiseModel, ReferenceLibrary, library_from_absorptivities
from absolve.simulate import Band, band_spectrum

GRID = np.arange(400.0, 701.0, 2.0)
NAMES = ("yellow-dye", "red-dye", "blue-dye")
BANDS = ([Band(455.0, 25.0, 1.0, skew=0.2)], [Band(525.0, 30.0, 0.9)], [Band(615.0, 35.0, 1.1, skew=0.1)])


def _library(noise: NoiseModel | None = None, ranges: bool = True) -> ReferenceLibrary:
    k = np.stack([band_spectrum(GRID, bands) for bands in BANDS])
    if not ranges:
        return library_from_absorptivities(GRID, k, NAMES, "mg/L")
    components = tuple(ComponentCalibration(name=n, concentration_range=(0.5, 1.5)) for n in NAMES)
    return ReferenceLibrary(GRID, k, np.zeros_like(k), "mg/L", components, noise=noise)


@pytest.fixture()
def library_file(tmp_path: Path) -> Path:
    path = tmp_path / "library.json"
    write_library(_library(NoiseModel(floor=0.002, proportional=0.01, correlation_length_nm=0.0)), path)
    return path


def run(args: list[str], capsys: pytest.CaptureFixture[str]) -> tuple[int, str, str]:
    code = main(args)
    captured = capsys.readouterr()
    return code, captured.out, captured.err


def test_plan_prints_a_readable_table(library_file: Path, capsys: pytest.CaptureFixture[str]) -> None:
    code, out, err = run(["plan", "--library", str(library_file), "--count", "4"], capsys)
    assert code == 0, err
    assert "wavelength_nm" in out and "proven optimal" in out
    assert all(name in out for name in NAMES)
    assert "predicted u (mg/L)" in out  # the library has a noise model


def test_plan_json_is_exactly_one_object(library_file: Path, capsys: pytest.CaptureFixture[str]) -> None:
    code, out, err = run(
        ["plan", "--library", str(library_file), "--count", "3", "--expected", "red-dye=0.4", "--range", "420:680",
         "--max-absorbance", "0.8", "--min-separation", "20", "--json"],
        capsys,
    )
    assert code == 0, err
    summary = json.loads(out)  # the whole of stdout parses as one JSON value
    assert isinstance(summary, dict)
    for key in ("wavelengths_nm", "objective", "relative_uncertainty", "criterion", "condition_number",
                "expected_absorbance", "full_scan_objective", "precision_ratio", "optimal", "gap_bound"):
        assert key in summary
    assert summary["criterion"] == "worst-relative" and summary["optimal"] is True
    wavelengths = np.array(summary["wavelengths_nm"])
    assert wavelengths.size == 3 and np.all((wavelengths >= 420) & (wavelengths <= 680))
    assert np.all(np.diff(wavelengths) >= 20)
    assert max(summary["expected_absorbance"]) <= 0.8
    assert summary["expected_concentration"] == {"yellow-dye": 1.0, "red-dye": 0.4, "blue-dye": 1.0}
    assert set(summary["predicted_std_uncertainty"]) == set(NAMES)


def test_plan_criteria_windows_and_greedy(library_file: Path, capsys: pytest.CaptureFixture[str]) -> None:
    for criterion in ("condition", "d-optimal"):
        code, out, err = run(["plan", "--library", str(library_file), "--count", "3", "--criterion", criterion, "--json"], capsys)
        assert code == 0, err
        assert json.loads(out)["criterion"] == criterion
    code, out, err = run(["plan", "--library", str(library_file), "--count", "1", "--window", "40", "--json"], capsys)
    assert code == 0, err
    (low, high), = json.loads(out)["windows_nm"]
    assert high - low >= 40
    code, out, err = run(["plan", "--library", str(library_file), "--count", "6", "--json"], capsys)
    assert code == 0, err
    summary = json.loads(out)
    assert summary["search"] == "greedy" and summary["optimal"] is False and summary["gap_bound"] >= 1.0


@pytest.mark.parametrize("suffix", [".png", ".svg"])
def test_plan_writes_a_figure_and_refuses_to_overwrite_it(
    library_file: Path, tmp_path: Path, suffix: str, capsys: pytest.CaptureFixture[str]
) -> None:
    figure = tmp_path / f"plan{suffix}"
    code, _, err = run(["plan", "--library", str(library_file), "--count", "3", "--figure", str(figure)], capsys)
    assert code == 0, err
    content = figure.read_bytes()
    assert content.startswith(b"\x89PNG") if suffix == ".png" else b"<svg" in content[:2000]
    assert f"figure written to {figure}" in err
    code, _, err = run(["plan", "--library", str(library_file), "--count", "3", "--figure", str(figure)], capsys)
    assert code == 2 and "already exists" in err and "--force" in err
    code, _, err = run(["plan", "--library", str(library_file), "--count", "3", "--figure", str(figure), "--force"], capsys)
    assert code == 0, err


@pytest.mark.parametrize(
    ("extra", "message"),
    [
        (["--count", "2"], "fewer than the 3 components"),
        (["--count", "3", "--expected", "red-dye"], "NAME=CONC"),
        (["--count", "3", "--expected", "red-dye=lots"], "not a number"),
        (["--count", "3", "--expected", "green-dye=1"], "not in the library"),
        (["--count", "3", "--criterion", "fastest"], "unknown criterion"),
        (["--count", "3", "--range", "700:400"], "low end must be below"),
        (["--count", "3", "--figure", "plan.pdf"], "image format"),
    ],
)
def test_plan_errors_are_one_line(
    library_file: Path, extra: list[str], message: str, capsys: pytest.CaptureFixture[str]
) -> None:
    code, out, err = run(["plan", "--library", str(library_file), *extra], capsys)
    assert code == 2 and out == ""
    assert err.startswith("error: ") and err.count("\n") == 1 and message in err


def test_plan_without_ranges_asks_for_expected(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    path = tmp_path / "known.json"
    write_library(_library(ranges=False), path)
    code, _, err = run(["plan", "--library", str(path), "--count", "3"], capsys)
    assert code == 2 and "--expected yellow-dye=CONC" in err
    args = ["plan", "--library", str(path), "--count", "3", "--json"] + [f"--expected={n}=1" for n in NAMES]
    code, out, err = run(args, capsys)
    assert code == 0, err
    assert json.loads(out)["predicted_std_uncertainty"] is None


def test_plan_bad_library_file(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    path = tmp_path / "broken.json"
    path.write_text("{not json", encoding="utf-8")
    code, _, err = run(["plan", "--library", str(path), "--count", "3"], capsys)
    assert code == 2 and str(path) in err


def test_plan_in_a_real_process(library_file: Path) -> None:
    code = "import sys; from absolve.cli import main; sys.exit(main(sys.argv[1:]))"
    result = subprocess.run(
        [sys.executable, "-c", code, "plan", "--library", str(library_file), "--count", "4", "--json"],
        capture_output=True, text=True, timeout=120,
    )
    assert result.returncode == 0, result.stderr
    assert len(json.loads(result.stdout)["wavelengths_nm"]) == 4
