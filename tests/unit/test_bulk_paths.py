"""The fast paths for large batches give what the plain ones give.

Each check compares a path built for speed with a reference: the general per-scan screening
path, Python's and numpy's own number formatting, dense numpy matrix products, the careful
text parser, or quantify on the whole batch. Scans are invented (absolve.simulate).
"""

from __future__ import annotations

import csv
import dataclasses
import io
import json
import re
from pathlib import Path

import numpy as np
import pytest

from absolve.errors import AbsolveError
from absolve.io import tables
from absolve.io.results import STREAMED_FILES, fit_csv, results_csv, results_json, scan_json_lines, spectra_csv, write_results_in_chunks
from absolve.library import NoiseModel, library_from_absorptivities
from absolve.noise import ar1_coefficients, correlated_squared_norms
from absolve.quantify import quantify, quantify_chunks
from absolve.screening import _bulk
from absolve.simulate import Instrument, measure, random_absorptivities
from absolve.spectra import Spectra

GRID = np.arange(400.0, 640.0, 1.0)
NOISE = NoiseModel(floor=0.0015, proportional=0.004, correlation_length_nm=3.0)


def _batch(seed: int, n: int = 90) -> tuple[Spectra, object]:
    """Invented scans of three absorbers, some above the linear limit at their peaks and one with saturated points."""
    rng = np.random.default_rng(seed)
    absorptivity = random_absorptivities(GRID, 3, rng)
    library = dataclasses.replace(library_from_absorptivities(GRID, absorptivity, ["a", "b", "c"], "mg/L", linear_limit_absorbance=1.1), noise=NOISE)
    concentration = rng.uniform(0.0, 0.9, (n, 3)) * (rng.random((n, 3)) < 0.8)
    values = measure(GRID, concentration @ absorptivity, Instrument(baseline_offset_sd=0.003), rng)
    values[3, 100:104] = np.nan
    return Spectra(GRID, values, [f"scan {i}" for i in range(n)]), library


def _general_path_only(monkeypatch: pytest.MonkeyPatch) -> None:
    monkeypatch.setattr(_bulk._PointGeometry, "build", classmethod(lambda cls, *args: None))


@pytest.mark.parametrize(("baseline", "length"), [("offset", 3.0), ("linear", 0.0), ("none", 12.0)])
def test_screening_per_point_pattern_equals_the_general_path(monkeypatch: pytest.MonkeyPatch, baseline: str, length: float) -> None:
    spectra, library = _batch(41)
    library = dataclasses.replace(library, noise=dataclasses.replace(NOISE, correlation_length_nm=length))
    result = quantify(spectra, library, baseline=baseline)  # type: ignore[arg-type]
    assert len({tuple(row) for row in result.used}) >= 3
    _general_path_only(monkeypatch)
    general = quantify(spectra, library, baseline=baseline)  # type: ignore[arg-type]
    # Reference: the general path, which whitens and orthogonalises every scan's own bases (SVD).
    for name in ("statistic", "p_value", "noise_ratio", "durbin_watson"):
        np.testing.assert_allclose(getattr(result.screening, name), getattr(general.screening, name), rtol=1e-8, err_msg=name)
    np.testing.assert_array_equal(result.screening.smooth_dof, general.screening.smooth_dof)
    np.testing.assert_array_equal(result.screening.rough_dof, general.screening.rough_dof)
    np.testing.assert_array_equal(result.interferent, general.interferent)


def test_chunks_hold_the_whole_batch_numbers_also_without_a_noise_model() -> None:
    spectra, library = _batch(42)
    for lib in (library, dataclasses.replace(library, noise=None)):
        whole = quantify(spectra, lib, path_length_tolerance=0.01)
        chunks = list(quantify_chunks(spectra, lib, chunk_scans=25, path_length_tolerance=0.01))
        assert [chunk.n_scans for chunk in chunks] == [25, 25, 25, 15]
        assert sum((chunk.scan_names for chunk in chunks), ()) == whole.scan_names
        for name in ("concentration", "std_uncertainty", "expanded_uncertainty", "upper_limit", "lod", "fitted", "residuals", "noise_scale"):
            joined = np.concatenate([getattr(chunk, name) for chunk in chunks])
            np.testing.assert_allclose(joined, getattr(whole, name), rtol=1e-10, atol=1e-15, err_msg=name)
        np.testing.assert_array_equal(np.concatenate([chunk.interferent for chunk in chunks]), whole.interferent)
        assert sum((chunk.flags for chunk in chunks), ()) == whole.flags
    with pytest.raises(AbsolveError, match="chunk_scans"):
        quantify_chunks(spectra, library, chunk_scans=0)


def test_files_written_chunk_by_chunk_are_the_whole_batch_files(tmp_path: Path) -> None:
    spectra, library = _batch(43, n=40)
    whole = quantify(spectra, library)
    # One chunk: the very same numbers, so the very same bytes.
    targets = {name: tmp_path / "one" / name for name in STREAMED_FILES}
    assert write_results_in_chunks(quantify_chunks(spectra, library, chunk_scans=40), targets, provenance={"run": 1}) == 40
    expected = {
        "results.csv": results_csv(whole), "fit.csv": fit_csv(whole), "fitted.csv": spectra_csv(whole, "fitted"),
        "residuals.csv": spectra_csv(whole, "residuals"), "results.json": results_json(whole, {"run": 1}),
    }
    for name, text in expected.items():
        assert targets[name].read_text(encoding="utf-8") == text, name
    # Several chunks: the same layout; numbers equal to rounding.
    several = {name: tmp_path / "several" / name for name in STREAMED_FILES}
    write_results_in_chunks(quantify_chunks(spectra, library, chunk_scans=7), several, provenance={"run": 1})
    for name in ("results.csv", "fit.csv", "fitted.csv"):
        got = list(csv.reader(io.StringIO(several[name].read_text(encoding="utf-8"))))
        want = list(csv.reader(io.StringIO(expected[name])))
        assert len(got) == len(want) and got[0] == want[0]
        for row_got, row_want in zip(got[1:], want[1:], strict=True):
            for a, b in zip(row_got, row_want, strict=True):
                assert a == b or float(a) == pytest.approx(float(b), rel=1e-5, abs=1e-6)
    assert json.loads(several["results.json"].read_text(encoding="utf-8"))["scans"][39]["scan"] == "scan 39"
    assert not [path for path in (tmp_path / "several").iterdir() if path.name not in STREAMED_FILES]  # no scratch left
    with pytest.raises(AbsolveError, match="already exists"):
        write_results_in_chunks(quantify_chunks(spectra, library), several, provenance={})


@pytest.mark.parametrize("rounding", ["decimal", "scaled"])
def test_six_decimal_texts_match_python_and_numpy_formatting(rounding: str) -> None:
    rng = np.random.default_rng(44)
    halves = (rng.integers(-2_000_000, 2_000_000, 3000) + 0.5) / 1e6  # values at or next to rounding ties
    values = np.concatenate([rng.normal(0.0, 1.0, 3000), halves, np.nextafter(halves, np.inf), [0.0, -0.0, -4e-7, 999.9999996, -12.5, np.nan, 1234.5]])
    text = tables.fixed_decimals(values, "saturated", rounding)
    # Reference: Python's correctly rounded "%.6f" ("decimal") or numpy's np.round(value, 6) ("scaled"); never "-0.000000".
    rounded = [round(v, 6) if rounding == "decimal" else float(np.round(v, 6)) for v in values.tolist()]
    expected = ["saturated" if not np.isfinite(v) else f"{r + 0.0:.6f}" for v, r in zip(values.tolist(), rounded)]
    assert text.split(",") == expected


def test_many_rows_take_the_recursion_and_match_dense_products() -> None:
    grid = np.concatenate([np.arange(400.0, 460.0), np.arange(470.0, 500.0, 2.0)])
    phi = ar1_coefficients(grid, 4.0)
    rows = np.random.default_rng(45).standard_normal((300, 2, grid.size))
    dense = np.exp(-np.abs(grid[:, None] - grid[None, :]) / 4.0)  # AR(1) correlation, built densely with numpy
    expected = np.einsum("nit,ts,nis->ni", rows, dense, rows)
    np.testing.assert_allclose(correlated_squared_norms(rows, phi), expected, rtol=1e-10)
    np.testing.assert_allclose(correlated_squared_norms(rows[:3], phi), expected[:3], rtol=1e-10)


@pytest.mark.parametrize(
    "text",
    [
        "wavelength,a,b\n400,0.1,0.2\n401,0.15,0.25\n402,0.2,0.3\n",
        "# comment\nnm\ta\tb\n400\t0.1\t0.2\n# note\n\n401\t0.15\t0.25\r\n402\t0.2\t0.3\n",
        "nm;a;b\n400;0,1;0,2\n401;0,15;0,25\n402;0,2;0,3\n",
        "nm a b\n400 0.1  0.2\n401 0.15 0.25\n402 0.2 0.3\n",
    ],
)
def test_streamed_parse_equals_the_text_parse(write_file, text: str) -> None:
    path = write_file("t.csv", text)
    decimal = "," if ";" in text else "."
    streamed = tables._stream_parse(path, decimal)
    assert streamed is not None  # plain numeric files take the streamed path
    careful = tables._text_parse(path, decimal, "scan")
    assert streamed[0] == careful[0] and streamed[1:3] == careful[1:3] and streamed[4] == careful[4]
    np.testing.assert_array_equal(streamed[3], careful[3])
    assert tables._stream_parse(write_file("s.csv", "nm,a\n400,0.1\n401,saturated\n"), ".") is None


def test_scan_json_lines_are_the_json_of_the_summary_records() -> None:
    spectra, library = _batch(46, n=60)
    values = spectra.values.copy()
    values[5] = np.nan  # a scan with no usable point: NaN numbers become null
    names = [f'é "{i}"' if i % 9 == 0 else name for i, name in enumerate(spectra.names)]
    result = quantify(Spectra(GRID, values, names), dataclasses.replace(library, noise=None), baseline="linear", dilution=2.0)
    assert result.interferent.any() and any(result.scan_flags)
    # Reference: the json module encoding the records of MixtureResult.summary(). Numbers may be
    # spelt otherwise (1e-5 as 0.00001): spelt again by the json module, the texts are the same.
    lines = scan_json_lines(result)
    assert [_NUMBER.sub(lambda number: json.dumps(json.loads(number.group())), line) for line in lines] == [
        json.dumps(record, allow_nan=False) for record in result.summary()["scans"]
    ]
    assert json.loads(results_json(result, {"run": 2}))["scans"] == result.summary()["scans"]


# A JSON number: not part of a word such as the escape "\u00e9"; digits standing alone inside a string are spelt again unchanged.
_NUMBER = re.compile(r"(?<![\w.])-?\d+(?:\.\d+)?(?:[eE][-+]?\d+)?(?![\w.])")


def test_results_and_fit_csv_numbers_are_pythons_format() -> None:
    spectra, library = _batch(47, n=30)
    result = quantify(spectra, library, baseline="linear")
    # Reference: the csv module writing each row with format(value, spec), blank where not finite.
    def spelt(value: float, spec: str = ".6g") -> str:
        return format(value, spec) if np.isfinite(value) else ""

    buffer = io.StringIO()
    writer = csv.writer(buffer, lineterminator="\n")
    writer.writerow(["scan", "component", "concentration", "std_uncertainty", "expanded_uncertainty", "coverage_factor", "unit", "upper_limit", "lod", "loq", "flags"])
    for i, scan in enumerate(result.scan_names):
        for j, component in enumerate(result.components):
            numbers = [spelt(getattr(result, name)[i, j]) for name in ("concentration", "std_uncertainty", "expanded_uncertainty")]
            limits = [spelt(getattr(result, name)[i, j]) for name in ("upper_limit", "lod", "loq")]
            writer.writerow([scan, component, *numbers, spelt(result.coverage_factor[i, j], ".4g"), result.unit, *limits, ";".join(result.flags[i][j])])
    assert results_csv(result) == buffer.getvalue()
    rows = list(csv.DictReader(io.StringIO(fit_csv(result))))
    assert [row["rms_residual"] for row in rows] == [spelt(v) for v in result.rms_residual.tolist()]
    for name, values in (("condition_number", result.condition_number), ("noise_scale", result.noise_scale), ("interferent_p_value", result.screening.p_value)):
        assert [row[name] for row in rows] == [spelt(v, ".4g") for v in values.tolist()], name


def test_wide_tables_of_several_chunks_are_their_numbers_side_by_side(tmp_path: Path) -> None:
    spectra, library = _batch(48, n=30)
    chunks = list(quantify_chunks(spectra, library, chunk_scans=7))
    targets = {name: tmp_path / name for name in ("fitted.csv", "residuals.csv")}
    write_results_in_chunks(iter(chunks), targets, provenance={})
    for name, which in (("fitted.csv", "fitted"), ("residuals.csv", "residuals")):
        values = np.vstack([getattr(chunk, which) for chunk in chunks])
        # Reference: "%.6f" of numpy's np.round(value, 6) per cell, blank where a point was not used, never "-0.000000".
        expected = [["wavelength_nm", *spectra.names]] + [
            [f"{wavelength:g}", *("" if np.isnan(v) else "%.6f" % (float(np.round(v, 6)) + 0.0) for v in values[:, j].tolist())]
            for j, wavelength in enumerate(GRID.tolist())
        ]
        assert np.isnan(values).any(), which
        assert list(csv.reader(io.StringIO(targets[name].read_text(encoding="utf-8")))) == expected, name
