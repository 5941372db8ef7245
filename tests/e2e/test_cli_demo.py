"""``absolve demo``: the whole job on the bundled invented data, in-process and as a real program."""

from __future__ import annotations

import csv
import io
import subprocess
import sys
from pathlib import Path

import pytest

from absolve.cli import main
from absolve.demo_data import DemoFiles
from absolve.workflow import RESULT_FILES

# Baths with nothing foreign in them (the carry-over and turbid baths are built to be disturbed).
CLEAN_BATHS = ("bath-01-start", "bath-02-20min", "bath-03-40min", "bath-04-60min", "bath-06-strong")


def _rows(path: Path) -> list[dict[str, str]]:
    return list(csv.DictReader(io.StringIO(path.read_text(encoding="utf-8"))))


def test_demo_writes_the_library_results_and_report(tmp_path: Path, demo: DemoFiles, capsys: pytest.CaptureFixture[str]) -> None:
    out = tmp_path / "demo"
    code = main(["demo", "--out", str(out)])
    captured = capsys.readouterr()
    assert code == 0, captured.err
    assert sorted(path.name for path in out.iterdir()) == sorted(["library.json", "model.json", *RESULT_FILES])
    assert "report.html" in captured.out and "bath-06-strong" in captured.out
    # The demo also plans filter wavelengths and cross-checks the library with a PLS model.
    assert "Wavelength plan: 3 wavelengths" in captured.out and "Library and PLS model:" in captured.out
    report = (out / "report.html").read_text(encoding="utf-8")
    assert report.startswith("<!DOCTYPE html>") and "bath-01-start" in report and "Provenance" in report
    assert "Wavelength plan" in report and "Library and PLS compared" in report
    # The demo's samples are invented, so their truth is known: the clean baths come back within 5 %.
    truth = {(row["scan"], row["component"]): float(row["concentration"]) for row in _rows(demo.bath_samples_truth)}
    results = _rows(out / "results.csv")
    assert {(row["scan"], row["component"]) for row in results} == set(truth)
    for row in results:
        if row["scan"] in CLEAN_BATHS:
            expected = truth[row["scan"], row["component"]]
            assert float(row["concentration"]) == pytest.approx(expected, rel=0.05), row


def test_demo_keeps_earlier_results_without_force(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    out = tmp_path / "demo"
    assert main(["demo", "--out", str(out)]) == 0
    before = {path.name: path.read_bytes() for path in out.iterdir()}
    capsys.readouterr()
    assert main(["demo", "--out", str(out)]) == 2
    lines = capsys.readouterr().err.strip().splitlines()
    assert len(lines) == 1 and lines[0].startswith("error: ") and "--force" in lines[0]
    assert {path.name: path.read_bytes() for path in out.iterdir()} == before


def test_demo_runs_as_an_installed_program_from_another_folder(tmp_path: Path) -> None:
    program = Path(sys.executable).with_name("absolve")
    assert program.exists(), program
    done = subprocess.run([str(program), "demo"], cwd=tmp_path, capture_output=True, text=True, timeout=120)
    assert done.returncode == 0, done.stderr
    assert "Traceback" not in done.stderr
    assert (tmp_path / "absolve-demo" / "report.html").stat().st_size > 1000
    assert (tmp_path / "absolve-demo" / "results.csv").read_text(encoding="utf-8").startswith("scan,component,concentration")
