"""``absolve quantify`` on files: the result files and their columns, no overwriting, one error line for bad input.

The scans are invented (absolve.simulate) so that the true concentrations are known.
"""

from __future__ import annotations

import csv
import io
import json
import re
from pathlib import Path

import numpy as np
import pytest

from absolve.cli import main
from absolve.io.results import spectra_csv
from absolve.io.tables import format_scan_table, read_scan_table
from absolve.library import library_from_absorptivities
from absolve.quantify import quantify
from absolve.simulate import Instrument, measure
from absolve.spectra import Spectra
from absolve.workflow import RESULT_FILES

RESULTS_COLUMNS = ["scan", "component", "concentration", "std_uncertainty", "expanded_uncertainty", "coverage_factor", "unit"]
FIT_COLUMNS = ["scan", "rms_residual", "condition_number", "interferent"]
INSTRUMENT = Instrument(baseline_offset_sd=0.002)
# ISO 8601 time stamps, the only thing allowed to differ between two runs on the same inputs.
TIME_STAMP = re.compile(r"\d{4}-\d\d-\d\dT\d\d:\d\d:\d\d(\.\d+)?([+-]\d\d:\d\d|Z)?")


class Inputs:
    """A calibrated library file, a sample scan file and the samples' true concentrations."""

    def __init__(self, folder: Path, standards) -> None:  # type: ignore[no-untyped-def]
        self.folder = folder
        scans = folder / "standards.csv"
        scans.write_text(format_scan_table(standards.spectra), encoding="utf-8")
        rows = ["scan,component,concentration"]
        for name, row in zip(standards.spectra.names, standards.concentrations):
            present = [(standards.names[k], value) for k, value in enumerate(row) if value > 0] or [(standards.names[0], 0.0)]
            rows += [f"{name},{component},{value:g}" for component, value in present]
        table = folder / "standards_concentrations.csv"
        table.write_text("\n".join(rows) + "\n", encoding="utf-8")
        self.library = folder / "library.json"
        assert main(["calibrate", str(scans), "--standards", str(table), "--unit", "mg/L", "--out", str(self.library)]) == 0
        rng = np.random.default_rng(8)
        self.truth = rng.uniform(0.2, 0.8, (4, 2))
        values = measure(standards.grid, self.truth @ standards.truth, INSTRUMENT, rng)
        self.names = [f"sample-{i}" for i in range(4)]
        self.samples = folder / "samples.csv"
        self.samples.write_text(format_scan_table(Spectra(standards.grid, values, self.names)), encoding="utf-8")
        self.components = standards.names


@pytest.fixture(scope="module")
def inputs(tmp_path_factory: pytest.TempPathFactory, simulated_standards) -> Inputs:  # type: ignore[no-untyped-def]
    standards = simulated_standards(7, INSTRUMENT, (0.1, 0.2, 0.4, 0.6, 0.8, 1.0), n_components=2)
    return Inputs(tmp_path_factory.mktemp("quantify-inputs"), standards)


def _quantify(inputs: Inputs, out: Path, *extra: str) -> int:
    return main(["quantify", str(inputs.samples), "--library", str(inputs.library), "--out", str(out), *extra])


def _read_csv(path: Path) -> list[dict[str, str]]:
    return list(csv.DictReader(io.StringIO(path.read_text(encoding="utf-8"))))


def _snapshot(folder: Path) -> dict[str, bytes]:
    return {path.name: path.read_bytes() for path in sorted(folder.iterdir())}


def _one_error_line(err: str) -> str:
    lines = err.strip().splitlines()
    assert len(lines) == 1 and lines[0].startswith("error: "), err
    assert "Traceback" not in err
    return lines[0]


def test_quantify_writes_every_result_file_with_the_contract_columns(
    inputs: Inputs, tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    out = tmp_path / "run"
    code = _quantify(inputs, out)
    captured = capsys.readouterr()
    assert code == 0, captured.err
    assert sorted(path.name for path in out.iterdir()) == sorted(RESULT_FILES)
    assert "sample-3" in captured.out and "results written to" in captured.out

    results = _read_csv(out / "results.csv")
    header = (out / "results.csv").read_text(encoding="utf-8").splitlines()[0].split(",")
    assert header[: len(RESULTS_COLUMNS)] == RESULTS_COLUMNS
    assert [(row["scan"], row["component"]) for row in results] == [(s, c) for s in inputs.names for c in inputs.components]
    concentration = np.array([float(row["concentration"]) for row in results]).reshape(4, 2)
    expanded = np.array([float(row["expanded_uncertainty"]) for row in results]).reshape(4, 2)
    assert {row["unit"] for row in results} == {"mg/L"}
    assert np.all(expanded > 0)
    # Invented scans: the truth is known; four expanded uncertainties is a loose, fail-safe bound.
    assert np.all(np.abs(concentration - inputs.truth) < 4 * expanded)
    for row in results:
        assert float(row["expanded_uncertainty"]) == pytest.approx(float(row["coverage_factor"]) * float(row["std_uncertainty"]), rel=2e-3)

    fit = _read_csv(out / "fit.csv")
    assert (out / "fit.csv").read_text(encoding="utf-8").split("\n")[0].split(",")[: len(FIT_COLUMNS)] == FIT_COLUMNS
    assert [row["scan"] for row in fit] == inputs.names
    assert {row["interferent"] for row in fit} <= {"true", "false"}
    assert all(float(row["condition_number"]) >= 1 for row in fit)

    for name in ("fitted.csv", "residuals.csv"):
        table = _read_csv(out / name)
        assert list(table[0]) == ["wavelength_nm", *inputs.names]
        assert len(table) == 201
    residuals = np.array([[float(v) for v in list(row.values())[1:]] for row in _read_csv(out / "residuals.csv")])
    assert np.sqrt(np.mean(residuals**2)) < 0.01

    document = json.loads((out / "results.json").read_text(encoding="utf-8"), parse_constant=lambda name: pytest.fail(f"{name} in JSON"))
    assert [scan["scan"] for scan in document["scans"]] == inputs.names
    assert document["provenance"]["inputs"][0]["file"] == "samples.csv"
    report = (out / "report.html").read_text(encoding="utf-8")
    assert report.lstrip().lower().startswith("<!doctype html") and "sample-0" in report


def test_existing_results_are_kept_without_force_and_replaced_identically_with_it(
    inputs: Inputs, tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    out = tmp_path / "run"
    assert _quantify(inputs, out) == 0
    first = _snapshot(out)
    capsys.readouterr()

    assert _quantify(inputs, out) == 2
    line = _one_error_line(capsys.readouterr().err)
    assert "--force" in line
    assert _snapshot(out) == first

    assert _quantify(inputs, out, "--force") == 0
    second = _snapshot(out)
    assert second.keys() == first.keys()
    for name in first:
        if name in ("results.json", "report.html"):
            # Only the provenance time may differ.
            assert TIME_STAMP.search(first[name].decode("utf-8"))
            assert TIME_STAMP.sub("T", second[name].decode("utf-8")) == TIME_STAMP.sub("T", first[name].decode("utf-8")), name
        else:
            assert second[name] == first[name], name


@pytest.mark.parametrize(
    ("case", "expected"),
    [
        ("missing-library", "no-such-library.json"),
        ("outside-range", "share no wavelength range"),
        ("--baseline=foo", "none, offset, linear"),
        ("--dilution=0", "dilution"),
        ("--path-length=-1", "path length"),
        ("--range=800:900", "800"),
    ],
)
def test_bad_input_exits_2_with_one_error_line_and_writes_nothing(
    case: str, expected: str, inputs: Inputs, tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    out = tmp_path / "run"
    samples, library, extra = inputs.samples, inputs.library, []
    if case == "missing-library":
        library = tmp_path / "no-such-library.json"
    elif case == "outside-range":
        grid = np.arange(700.0, 801.0, 1.0)
        samples = tmp_path / "far.csv"
        samples.write_text(format_scan_table(Spectra(grid, np.full((1, grid.size), 0.2), ["far-red"])), encoding="utf-8")
    else:
        extra = case.split("=", 1)
    code = main(["quantify", str(samples), "--library", str(library), "--out", str(out), *extra])
    line = _one_error_line(capsys.readouterr().err)
    assert code == 2
    assert expected in line
    assert not out.exists() or not any(out.iterdir())


def test_fitted_and_residual_tables_read_back_as_scan_tables_on_a_fine_grid(tmp_path: Path) -> None:
    # A 0.005 nm grid above 1000 nm: six significant digits would write 1000.02 twice.
    grid = 1000.0 + 0.005 * np.arange(40)
    absorptivity = np.vstack([np.linspace(0.2, 0.8, grid.size), np.linspace(0.9, 0.1, grid.size) ** 2])
    values = np.array([[0.5, 0.3], [0.2, 0.0]]) @ absorptivity
    result = quantify(Spectra(grid, values, ["a", "b"]), library_from_absorptivities(grid, absorptivity, ["x", "y"], "mg/L"), baseline="none")
    for which, expected in (("fitted", result.fitted), ("residuals", result.residuals)):
        path = tmp_path / f"{which}.csv"
        text = spectra_csv(result, which)
        path.write_text(text, encoding="utf-8")
        assert "-0.000000" not in text
        back = read_scan_table(path)
        assert np.array_equal(back.wavelengths, grid)
        np.testing.assert_allclose(back.values, expected, atol=5e-7)


def test_a_batch_written_in_chunks_gives_the_same_files_as_one_chunk(inputs: Inputs, tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    from absolve import workflow

    argv = [str(inputs.samples), "--library", str(inputs.library), "--detail", "1", "--figures", "svg"]
    assert main(["quantify", *argv, "--out", str(tmp_path / "whole")]) == 0
    monkeypatch.setattr(workflow, "CHUNK_SCANS", 1)
    assert main(["quantify", *argv, "--out", str(tmp_path / "chunked")]) == 0
    whole = sorted(path.relative_to(tmp_path / "whole") for path in (tmp_path / "whole").rglob("*") if path.is_file())
    assert whole == sorted(path.relative_to(tmp_path / "chunked") for path in (tmp_path / "chunked").rglob("*") if path.is_file())
    # Figures: library, overview, residual sizes, the first scan and each flagged scan after it.
    flagged_after_first = sum(row["interferent"] == "true" for row in list(csv.DictReader(io.StringIO((tmp_path / "whole" / "fit.csv").read_text())))[1:])
    assert len(whole) == len(RESULT_FILES) + 4 + flagged_after_first
    for name in whole:
        first, second = (_comparable((tmp_path / folder / name).read_text(encoding="utf-8")) for folder in ("whole", "chunked"))
        if name.name == "results.json":
            # Every digit is written here, and chunks agree with the whole batch to rounding (quantify_chunks).
            (shape_a, numbers_a), (shape_b, numbers_b) = _split_numbers(json.loads(first)), _split_numbers(json.loads(second))
            assert shape_a == shape_b
            np.testing.assert_allclose(numbers_a, numbers_b, rtol=1e-9)
        else:
            assert first == second, name


def _split_numbers(value: object) -> tuple[object, list[float]]:
    """A JSON value with each float replaced by 0.0, and the floats in order."""
    if isinstance(value, float):
        return 0.0, [value]
    if isinstance(value, dict):
        parts = {key: _split_numbers(item) for key, item in value.items()}
        return {key: part[0] for key, part in parts.items()}, [x for part in parts.values() for x in part[1]]
    if isinstance(value, list):
        pieces = [_split_numbers(item) for item in value]
        return [piece[0] for piece in pieces], [x for piece in pieces for x in piece[1]]
    return value, []


def _comparable(text: str) -> str:
    """The text without time stamps and SVG clip-path ids (hashes of axes limits, which chunking can move by a rounding error)."""
    return re.sub(r'(clip-path="url\(#|clipPath id=")p[0-9a-f]+', r"\1p", TIME_STAMP.sub("T", text))


def test_no_spectra_leaves_out_the_spectra_tables_and_any_stale_ones(inputs: Inputs, tmp_path: Path) -> None:
    out = tmp_path / "out"
    argv = ["quantify", str(inputs.samples), "--library", str(inputs.library), "--out", str(out)]
    assert main(argv) == 0
    with_spectra = {path.name: path.read_bytes() for path in out.iterdir()}
    assert main([*argv, "--no-spectra"]) == 2  # the earlier run's files are there: --force is needed
    assert main([*argv, "--no-spectra", "--force"]) == 0
    names = sorted(path.name for path in out.iterdir())
    assert names == sorted(set(RESULT_FILES) - {"fitted.csv", "residuals.csv"})
    for name in ("results.csv", "fit.csv"):
        assert (out / name).read_bytes() == with_spectra[name]
    assert json.loads((out / "results.json").read_text())["provenance"]["options"]["spectra"] is False
