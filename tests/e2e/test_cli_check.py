"""``absolve check`` on the bundled demo files: exit codes, the table, the files it writes."""

from __future__ import annotations

import csv
from pathlib import Path

import pytest

from absolve.cli import main


@pytest.fixture(scope="module")
def library(tmp_path_factory: pytest.TempPathFactory, demo) -> Path:  # type: ignore[no-untyped-def]
    path = tmp_path_factory.mktemp("check") / "library.json"
    code = main(["calibrate", str(demo.standards), "--standards", str(demo.standards_concentrations), "--unit", "mg/L", "--out", str(path)])
    assert code == 0
    return path


def test_check_writes_verdicts_and_a_plot_per_flagged_scan(tmp_path: Path, demo, library: Path, capsys) -> None:  # type: ignore[no-untyped-def]
    out = tmp_path / "check"
    code = main(["check", str(demo.bath_samples), "--library", str(library), "--out", str(out)])
    captured = capsys.readouterr()
    assert code == 0, captured.err
    assert "INTERFERENT" in captured.out
    rows = list(csv.DictReader((out / "check.csv").open()))
    flagged = [row["scan"] for row in rows if row["interferent"] == "true"]
    assert flagged, "the demo holds disturbed baths"
    for scan in flagged:
        assert (out / f"residual-{scan}.png").read_bytes().startswith(b"\x89PNG")
    # A second run refuses to overwrite.
    assert main(["check", str(demo.bath_samples), "--library", str(library), "--out", str(out)]) == 2
    assert capsys.readouterr().err.startswith("error: ")


def test_bad_suspects_file_is_one_error_line(tmp_path: Path, demo, library: Path, capsys) -> None:  # type: ignore[no-untyped-def]
    bad = tmp_path / "suspects.csv"
    bad.write_text("wavelength_nm,x\n400,abc\n401,0.1\n")
    code = main(["check", str(demo.bath_samples), "--library", str(library), "--suspects", str(bad)])
    err = capsys.readouterr().err
    assert code == 2
    assert err.count("\n") == 1 and err.startswith("error: ") and "suspects.csv:2:2" in err
