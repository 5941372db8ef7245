"""Reproducible to the byte: the same inputs give the same files, wherever and whenever the run happens.

Each command runs twice: once on the corpus's good files by absolute path,
once on copies in another folder by relative path from there. Data files
must be byte-identical; JSON files may differ only in the provenance time
(``created``). Cells use fixed formats, rows a stable order, and no data
file holds a time stamp.
"""

from __future__ import annotations

import json
import re
import shutil
from pathlib import Path
from typing import Any

import pytest

from _reliability import GOOD, read_rows, run

# ISO 8601 time stamps (the provenance time), e.g. 2026-12-02T03:34:17+00:00.
TIME_STAMP = re.compile(r"\d{4}-\d\d-\d\dT\d\d:\d\d(:\d\d(\.\d+)?)?([+-]\d\d:\d\d|Z)?")
DATA_FILES = ("results.csv", "fit.csv", "fitted.csv", "residuals.csv")


def _without_created(text: str) -> str:
    """JSON text with the provenance time blanked (the one field allowed to differ), checking it was there."""
    document = json.loads(text)
    assert TIME_STAMP.fullmatch(document["provenance"]["created"]), document["provenance"]
    return re.sub(r'"created": "[^"]*"', '"created": ""', text)


def _twice(
    tmp_path: Path, capsys: pytest.CaptureFixture[str], monkeypatch: pytest.MonkeyPatch, argv: list[str], inputs: list[Path], out: str = "out"
) -> tuple[Path, Path]:
    """Run ``argv`` ({out} and the input names filled in) in folder a/ by absolute paths and in b/ by relative ones."""
    first, second = tmp_path / "a", tmp_path / "b"
    for folder in (first, second):
        folder.mkdir()
    for path in inputs:
        shutil.copyfile(path, second / path.name)
    by_name = {path.name: path for path in inputs}
    code, _, err = run(capsys, [str(by_name.get(arg, arg)) if arg != "{out}" else str(first / out) for arg in argv])
    assert code == 0, err
    monkeypatch.chdir(second)
    code, _, err = run(capsys, [arg if arg != "{out}" else out for arg in argv])
    assert code == 0, err
    return first / out, second / out


def test_quantify_twice_gives_identical_result_files(made: Any, tmp_path: Path, capsys: pytest.CaptureFixture[str], monkeypatch: pytest.MonkeyPatch) -> None:
    argv = ["quantify", "samples.csv", "--library", "library.json", "--out", "{out}"]
    first, second = _twice(tmp_path, capsys, monkeypatch, argv, [GOOD / "samples.csv", made.library])
    for name in DATA_FILES:
        data = (first / name).read_bytes()
        assert data == (second / name).read_bytes(), name
        assert not TIME_STAMP.search(data.decode("utf-8")), f"{name} holds a time stamp"
    assert _without_created((first / "results.json").read_text(encoding="utf-8")) == _without_created((second / "results.json").read_text(encoding="utf-8"))


def test_report_differs_only_in_its_time_stamp(made: Any, tmp_path: Path, capsys: pytest.CaptureFixture[str], monkeypatch: pytest.MonkeyPatch) -> None:
    argv = ["quantify", "samples.csv", "--library", "library.json", "--out", "{out}"]
    first, second = _twice(tmp_path, capsys, monkeypatch, argv, [GOOD / "samples.csv", made.library])
    one, two = ((folder / "report.html").read_text(encoding="utf-8") for folder in (first, second))
    assert TIME_STAMP.sub("T", one) == TIME_STAMP.sub("T", two)


@pytest.mark.parametrize("file_format", ["svg", "png"])
def test_figure_files_are_identical(
    file_format: str, made: Any, tmp_path: Path, capsys: pytest.CaptureFixture[str], monkeypatch: pytest.MonkeyPatch
) -> None:
    argv = ["quantify", "samples.csv", "--library", "library.json", "--out", "{out}", "--figures", file_format]
    first, second = _twice(tmp_path, capsys, monkeypatch, argv, [GOOD / "samples.csv", made.library])
    names = sorted(path.name for path in (first / "figures").iterdir())
    assert names and names == sorted(path.name for path in (second / "figures").iterdir())
    for name in names:
        assert (first / "figures" / name).read_bytes() == (second / "figures" / name).read_bytes(), name


def test_calibrate_twice_gives_the_same_library_but_for_its_time(made: Any, tmp_path: Path, capsys: pytest.CaptureFixture[str], monkeypatch: pytest.MonkeyPatch) -> None:
    argv = ["calibrate", "standards.csv", "--standards", "standards_concentrations.csv", "--unit", "mg/L", "--out", "{out}"]
    first, second = _twice(tmp_path, capsys, monkeypatch, argv, [GOOD / "standards.csv", GOOD / "standards_concentrations.csv"])
    assert _without_created(first.read_text(encoding="utf-8")) == _without_created(second.read_text(encoding="utf-8"))


def test_train_twice_gives_the_same_model_but_for_its_time(made: Any, tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    # Same paths both times: the model's provenance records the paths as given.
    argv = ["train", str(GOOD / "mixtures.csv"), "--concentrations", str(GOOD / "mixture_concentrations.csv"), "--unit", "mg/L", "--folds", "4", "--out"]
    assert run(capsys, [*argv, str(tmp_path / "one.json")])[0] == 0
    assert run(capsys, [*argv, str(tmp_path / "two.json")])[0] == 0
    assert _without_created((tmp_path / "one.json").read_text(encoding="utf-8")) == _without_created((tmp_path / "two.json").read_text(encoding="utf-8"))


@pytest.mark.parametrize("suffix", [".jdx", ".csv"])
def test_convert_twice_gives_identical_bytes(suffix: str, tmp_path: Path, capsys: pytest.CaptureFixture[str], monkeypatch: pytest.MonkeyPatch) -> None:
    argv = ["convert", "samples.csv", "--out", "{out}"]
    first, second = _twice(tmp_path, capsys, monkeypatch, argv, [GOOD / "samples.csv"], out=f"converted{suffix}")
    assert first.read_bytes() == second.read_bytes()


# Formats the result writers promise (absolve.io.results): 6 significant digits, coverage factor and condition number 4.
RESULTS_FORMATS = {"concentration": ".6g", "std_uncertainty": ".6g", "expanded_uncertainty": ".6g", "coverage_factor": ".4g",
                   "upper_limit": ".6g", "lod": ".6g", "loq": ".6g"}
FIT_FORMATS = {"rms_residual": ".6g", "condition_number": ".4g", "noise_scale": ".4g"}


def _canonical(cell: str, spec: str) -> bool:
    """The cell is exactly how ``spec`` writes the number it holds (empty cells pass: flags explain them)."""
    return cell == "" or (format(float(cell), spec) == cell and cell not in ("-0", "nan", "inf", "-inf"))


def test_result_tables_have_fixed_formats_and_a_stable_order(made: Any, tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    out = tmp_path / "out"
    assert run(capsys, ["quantify", GOOD / "samples.csv", "--library", made.library, "--out", out])[0] == 0
    results = read_rows(out / "results.csv")
    # Scans in the file's order, components in the library's.
    assert [(row["scan"], row["component"]) for row in results] == [
        (scan, component) for scan in ("sample-1", "sample-2", "sample-3") for component in ("red", "blue")
    ]
    for row in results:
        for column, spec in RESULTS_FORMATS.items():
            assert _canonical(row[column], spec), (column, row[column])
    for row in read_rows(out / "fit.csv"):
        for column, spec in FIT_FORMATS.items():
            assert _canonical(row[column], spec), (column, row[column])
        assert row["interferent"] in ("true", "false")
    for name in ("fitted.csv", "residuals.csv"):
        rows = read_rows(out / name)
        assert [row["wavelength_nm"] for row in rows] == [f"{w:g}" for w in range(400, 601, 10)]
        for row in rows:
            for key, cell in row.items():
                if key != "wavelength_nm" and cell:
                    assert f"{float(cell):.6f}" == cell and cell != "-0.000000", (name, key, cell)
