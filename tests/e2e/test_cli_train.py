"""``absolve train`` on files: a model file written, the RMSECV curve printed, one error line for bad input."""

from __future__ import annotations

import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest

from absolve.cli import main
from absolve.io.model_file import read_model
from absolve.io.tables import format_scan_table
from absolve.simulate import Instrument, measure, random_absorptivities
from absolve.spectra import Spectra

GRID = np.arange(400.0, 701.0, 2.0)
NAMES = ("tartrazine-like", "indigo-like")


@pytest.fixture()
def training_files(tmp_path: Path) -> tuple[Path, Path, np.ndarray, np.ndarray]:
    rng = np.random.default_rng(42)
    k = random_absorptivities(GRID, 2, rng)
    conc = rng.uniform(0.5, 5.0, (18, 2))
    path_cm = np.where(np.arange(18) % 3 == 0, 0.5, 1.0)
    dilution = np.where(np.arange(18) % 4 == 0, 2.0, 1.0)
    # Cell concentration = table concentration / dilution; absorbance scales with path length.
    absorbance = measure(GRID, (conc / dilution[:, None]) @ (0.1 * k) * path_cm[:, None], Instrument(), rng)
    names = [f"mix-{i:02d}" for i in range(18)]
    scans = tmp_path / "standards.csv"
    scans.write_text(format_scan_table(Spectra(GRID, absorbance, names)), encoding="utf-8")
    table = tmp_path / "concentrations.csv"
    rows = ["scan,component,concentration,path_length_cm,dilution"]
    rows += [f"{name},{comp},{conc[i, j]:.6f},{path_cm[i]:g},{dilution[i]:g}" for i, name in enumerate(names) for j, comp in enumerate(NAMES)]
    table.write_text("\n".join(rows) + "\n", encoding="utf-8")
    return scans, table, conc, dilution


def test_train_writes_a_model_and_prints_the_rmsecv_curve(
    training_files: tuple[Path, Path, np.ndarray, np.ndarray], tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    scans, table, conc, dilution = training_files
    out = tmp_path / "model.json"
    code = main(["train", str(scans), "--concentrations", str(table), "--out", str(out), "--unit", "mg/L", "--derivative", "first", "--folds", "6"])
    captured = capsys.readouterr()
    assert code == 0, captured.err
    assert "RMSECV (mg/L)" in captured.out and "6 folds" in captured.out
    assert f"model written to {out}" in captured.err
    model = read_model(out)
    assert model.components_ == NAMES and model.unit_ == "mg/L" and model.derivative == "first"
    # The model learns cell concentrations: the table's values divided by the dilution.
    low, high = model.component_models_[0].training_range
    cell = conc[:, 0] / dilution
    assert (low, high) == pytest.approx((cell.min(), cell.max()), abs=1e-6)  # table holds 6 decimals
    # Training scans measured at 0.5 cm are put on a per-cm footing: they predict their own cell concentration.
    assert max(m.rmsecv for m in model.component_models_) < 0.05 * np.ptp(cell)
    inputs = [entry["file"] for entry in model.provenance_["inputs"]]
    assert inputs == [scans.name, table.name]  # names only: the file does not depend on where it was made


def test_existing_model_is_kept_without_force(training_files: tuple[Path, Path, np.ndarray, np.ndarray], tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    scans, table, _, _ = training_files
    out = tmp_path / "model.json"
    out.write_text("keep me", encoding="utf-8")
    assert main(["train", str(scans), "--concentrations", str(table), "--out", str(out)]) == 2
    assert out.read_text(encoding="utf-8") == "keep me"
    assert "--force" in capsys.readouterr().err
    assert main(["train", str(scans), "--concentrations", str(table), "--out", str(out), "--force", "--max-components", "4"]) == 0
    assert read_model(out).cv_.rmsecv.shape == (2, 5)


@pytest.mark.parametrize(
    ("table_text", "message"),
    [
        ("scan,component,amount\nmix-00,a,1\n", "lacks the column 'concentration'"),
        ("scan,component,concentration\nmix-00,a,lots\n", "concentration 'lots' is not a number"),
        ("scan,component,concentration\nmix-99,a,1\n", "scan 'mix-99' is not among the scans read"),
    ],
)
def test_bad_table_gives_one_error_line(
    training_files: tuple[Path, Path, np.ndarray, np.ndarray], tmp_path: Path, capsys: pytest.CaptureFixture[str], table_text: str, message: str
) -> None:
    scans, _, _, _ = training_files
    table = tmp_path / "bad.csv"
    table.write_text(table_text, encoding="utf-8")
    out = tmp_path / "model.json"
    code = main(["train", str(scans), "--concentrations", str(table), "--out", str(out), "--unit", "mg/L"])
    err = capsys.readouterr().err
    assert code == 2
    lines = err.strip().splitlines()
    assert len(lines) == 1 and lines[0].startswith("error: ") and str(table) in lines[0] and message in lines[0], err
    assert not out.exists()


def test_bad_options_give_one_error_line(training_files: tuple[Path, Path, np.ndarray, np.ndarray], tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    scans, table, _, _ = training_files
    out = tmp_path / "model.json"
    for options, message in (
        (["--derivative", "third"], "'derivative' parameter"),
        (["--derivative", "second", "--window", "6"], "'window' parameter"),
        (["--range", "700:400"], "low end must be below"),
        (["--unit", "furlongs"], "not a known concentration unit"),
    ):
        code = main(["train", str(scans), "--concentrations", str(table), "--out", str(out), "--unit", "mg/L", *options])
        lines = capsys.readouterr().err.strip().splitlines()
        assert code == 2 and len(lines) == 1 and lines[0].startswith("error: ") and message in lines[0], lines
    assert not out.exists()


def test_train_runs_as_a_program(training_files: tuple[Path, Path, np.ndarray, np.ndarray], tmp_path: Path) -> None:
    scans, table, _, _ = training_files
    out = tmp_path / "model.json"
    code = "import sys; from absolve.cli import main; sys.exit(main(sys.argv[1:]))"
    result = subprocess.run(
        [sys.executable, "-c", code, "train", str(scans), "--concentrations", str(table), "--out", str(out), "--range", "420:680"],
        capture_output=True, text=True, timeout=120,
    )
    assert result.returncode == 0, result.stderr
    assert "concentrations taken as mg/L" in result.stderr
    assert read_model(out).wavelengths_[0] == 420.0
