"""Scan and concentration table readers: layouts accepted, every malformed file located precisely."""

from __future__ import annotations

import codecs
from pathlib import Path

import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from hypothesis.extra import numpy as hnp

from absolve.errors import AbsolveError
from absolve.io.tables import (
    concentration_matrix,
    format_scan_table,
    per_scan_value,
    read_concentration_table,
    read_scan_table,
    read_scans,
    read_wide_table,
)
from absolve.spectra import Spectra

GRID = [400.0, 410.0, 420.0, 430.0]
VALUES = [[0.10, 0.25, 0.40, 0.20], [0.05, 0.5, 1.25, 0.75]]


def _table(delimiter: str = ",", decimal: str = ".", header: tuple[str, ...] = ("wavelength", "red", "blue")) -> str:
    lines = [delimiter.join(header)]
    for j, wavelength in enumerate(GRID):
        cells = [f"{wavelength:g}", *(f"{row[j]:.2f}" for row in VALUES)]
        lines.append(delimiter.join(cell.replace(".", decimal) for cell in cells))
    return "\n".join(lines) + "\n"


def _assert_expected(scans: Spectra, names: tuple[str, ...] = ("red", "blue")) -> None:
    assert scans.names == names
    np.testing.assert_array_equal(scans.wavelengths, GRID)
    np.testing.assert_allclose(scans.values, VALUES, rtol=0, atol=1e-12)


@pytest.mark.parametrize(("delimiter", "decimal"), [(",", "."), ("\t", "."), (";", "."), (" ", "."), ("   ", "."), (";", ","), ("\t", ","), (" ", ",")])
def test_delimiters_and_decimal_marks_are_recognised(write_file, delimiter: str, decimal: str) -> None:
    path = write_file("scans.txt", _table(delimiter, decimal))
    scans = read_scan_table(path, decimal=decimal)
    _assert_expected(scans)
    assert scans.source == str(path)
    assert scans.quantity == "absorbance"


def test_comment_lines_and_blank_lines_are_skipped(write_file) -> None:
    lines = _table().splitlines()
    text = "# exported 2026-01-01\n\n  # operator note\n" + lines[0] + "\n# mid-table remark\n" + "\n".join(lines[1:]) + "\n\n"
    _assert_expected(read_scan_table(write_file("commented.csv", text)))


def test_windows_line_endings(write_file) -> None:
    _assert_expected(read_scan_table(write_file("crlf.csv", _table().replace("\n", "\r\n"))))


def test_descending_and_uneven_grids_are_sorted_with_their_rows(write_file) -> None:
    text = "nm,a,b\n700,0.7,7\n401.5,0.4,4\n650,0.6,6\n400,0.3,3\n"
    scans = read_scan_table(write_file("desc.csv", text))
    assert scans.wavelengths.tolist() == [400.0, 401.5, 650.0, 700.0]
    assert scans.values.tolist() == [[0.3, 0.4, 0.6, 0.7], [3, 4, 6, 7]]


def test_headerless_tables_get_names_from_the_file(write_file) -> None:
    text = "\n".join(",".join(line.split(",")) for line in _table().splitlines()[1:]) + "\n"
    _assert_expected(read_scan_table(write_file("bath.csv", text)), names=("bath-1", "bath-2"))


@pytest.mark.parametrize("encoding", ["utf-8-sig", "latin-1", "utf-16", "utf-16-le-bom", "utf-16-be-bom"])
def test_text_encodings(write_file, encoding: str) -> None:
    text = _table(header=("wavelength", "rouge é", "bleu"))
    if encoding.endswith("-bom"):
        codec = encoding.removesuffix("-bom")
        content = (codecs.BOM_UTF16_LE if codec.endswith("le") else codecs.BOM_UTF16_BE) + text.encode(codec)
    else:
        content = text.encode(encoding)
    _assert_expected(read_scan_table(write_file("enc.csv", content)), names=("rouge é", "bleu"))


@pytest.mark.parametrize(
    ("quantity", "scale"),
    [("transmittance", 1.0), ("percent-transmittance", 100.0)],
)
def test_transmittance_tables_are_read_as_such(write_file, quantity: str, scale: float) -> None:
    text = f"nm,s\n400,{1.0 * scale:g}\n410,{0.1 * scale:g}\n420,{0.0:g}\n"
    scans = read_scan_table(write_file("t.csv", text), quantity=quantity)  # type: ignore[arg-type]
    assert scans.quantity == quantity
    absorbance = scans.to_absorbance()
    # A = -log10 T; T = 0 is a saturated point (common practice, no source).
    np.testing.assert_allclose(absorbance.values[0, :2], [0.0, 1.0], atol=1e-12)
    assert absorbance.usable.tolist() == [[True, True, False]]


# (file name, content, read options, line, column, message): every malformed file raises
# AbsolveError naming the file, and the line (and column) wherever one applies.
MALFORMED = [
    ("empty.csv", "", {}, None, None, "the file holds no data"),
    ("comments.csv", "# nothing\n#\n", {}, None, None, "the file holds no data"),
    ("header_only.csv", "# x\nwavelength,a,b\n", {}, 2, None, "header but no data rows"),
    ("word.csv", "nm,a,b\n400,0.1,0.2\n410,0.1,abc\n", {}, 3, 3, "'abc' is not a number"),
    ("comma_decimal.csv", "nm;a\n400;0.1\n410;0,2\n", {}, 3, 2, "'0,2' is not a number — use --decimal ,"),
    ("missing.csv", "nm,a,b\n400,0.1,0.2\n410,,0.2\n", {}, 3, 2, "missing value"),
    ("nan.csv", "nm,a,b\n400,0.1,0.2\n410,NaN,0.2\n", {}, 3, 2, "'NaN' is not a measured value"),
    ("inf.csv", "nm,a,b\n400,0.1,0.2\n410,0.2,-inf\n", {}, 3, 3, "'-inf' is not a measured value"),
    ("underscore.csv", "nm,a\n400,1_0\n410,0.2\n", {}, 2, 2, "'1_0' is not a number"),
    ("repeat.csv", "nm,a\n400,0.1\n410,0.2\n400,0.3\n", {}, 4, 1, "wavelength 400 nm appears twice"),
    ("one.csv", "nm,a,b\n400,0.1,0.2\n", {}, 2, None, "only one wavelength"),
    ("short_row.csv", "nm,a,b\n400,0.1,0.2\n410,0.1\n420,0.1,0.2\n", {}, 3, None, "2 cells where the header has 3"),
    ("long_row.csv", "nm,a,b\n400,0.1,0.2\n410,0.1,0.2,0.3\n", {}, 3, None, "4 cells where the header has 3"),
    ("one_column.csv", "wavelength\n400\n410\n", {}, 1, None, "found one column"),
    ("no_name.csv", "nm,a,,b\n400,1,2,3\n410,1,2,3\n", {}, 1, 3, "column 3 has no header"),
    ("twins.csv", "nm,a,a\n400,0.1,0.2\n410,0.1,0.2\n", {}, 1, None, "two columns are named 'a'"),
    ("wavenumber.csv", "cm-1,a\n25000,0.1\n20000,0.2\n", {}, 2, 1, "not a UV-Vis wavelength range in nm"),
    ("micrometre.csv", "um,a\n0.4,0.1\n0.5,0.2\n", {}, 2, 1, "not a UV-Vis wavelength range in nm"),
    ("percent.csv", "nm,a,b\n400,50,60\n410,99,120.5\n", {"quantity": "percent-transmittance"}, 3, 3, "percent transmittance up to 120.5"),
    ("fraction.csv", "nm,a,b\n400,0.5,60\n410,0.9,0.3\n", {"quantity": "transmittance"}, 2, 3, "transmittance up to 60 .* use --quantity percent-transmittance"),
    ("absorbance_pct.csv", "nm,a\n400,45\n410,80\n", {}, 3, 2, "absorbance up to 80"),
    ("both_commas.csv", "nm,a\n400,0,1\n410,0,2\n", {"decimal": ","}, 1, None, "commas appear both as decimal marks and as separators"),
    ("binary.csv", b"\x89PNG\r\n\x1a\n\x00\x00\x00\rIHDR\x00\x01", {}, None, None, r"not a text table \(binary content\)"),
]


@pytest.mark.parametrize(("name", "content", "options", "line", "column", "message"), MALFORMED, ids=[case[0] for case in MALFORMED])
def test_malformed_scan_tables_are_located(write_file, name, content, options, line, column, message) -> None:
    path = write_file(name, content)
    with pytest.raises(AbsolveError, match=message) as caught:
        read_scan_table(path, **options)
    error = caught.value
    assert (error.file, error.line, error.column) == (str(path), line, column)
    where = str(path) + ("" if line is None else f":{line}") + ("" if column is None else f":{column}")
    assert str(error).startswith(where + ": ")
    assert "\n" not in str(error)


def test_missing_file_folder_and_bad_options(tmp_path: Path) -> None:
    with pytest.raises(AbsolveError, match="file not found — check the path") as caught:
        read_scan_table(tmp_path / "absent.csv")
    assert caught.value.file == str(tmp_path / "absent.csv")
    with pytest.raises(AbsolveError, match="is a folder, not a file"):
        read_scan_table(tmp_path)
    with pytest.raises(AbsolveError, match="decimal mark must be '.' or ','"):
        read_wide_table(tmp_path / "absent.csv", decimal=":")
    with pytest.raises(AbsolveError, match="unknown quantity 'absorbency'"):
        read_scan_table(tmp_path / "absent.csv", quantity="absorbency")  # type: ignore[arg-type]


def test_read_scans_joins_tables_as_absorbance(write_file) -> None:
    first = write_file("first.csv", _table())
    finer = write_file("finer.csv", "nm,pct\n" + "".join(f"{w},{10.0:g}\n" for w in range(395, 436)))
    scans = read_scans([first, finer], quantity="absorbance")
    assert scans.names == ("red", "blue", "pct")
    np.testing.assert_array_equal(scans.wavelengths, GRID)
    np.testing.assert_allclose(scans.values[2], 10.0, atol=1e-12)
    with pytest.raises(AbsolveError, match="no scan files given"):
        read_scans([])


def test_read_scans_converts_percent_transmittance(write_file) -> None:
    path = write_file("pt.csv", "nm,s\n400,100\n410,10\n420,1\n")
    scans = read_scans([path], quantity="percent-transmittance")
    assert scans.quantity == "absorbance"
    np.testing.assert_allclose(scans.values, [[0.0, 1.0, 2.0]], atol=1e-12)


def test_bundled_comma_decimal_export_reads(demo) -> None:
    # The demo's %T export uses semicolons and decimal commas.
    scans = read_scan_table(demo.bath_samples_percent_t, decimal=",", quantity="percent-transmittance")
    assert scans.n_scans == 2
    assert 0.0 < float(np.nanmin(scans.values)) and float(np.nanmax(scans.values)) <= 110.0


# ---------------------------------------------------------------- round trips and fuzzing

_NAME = st.text(alphabet="abcdefghijklmnopqrstuvwxyzABCXYZ0123456789-_.+() éµ", min_size=1, max_size=12).map(str.strip).filter(bool)


@st.composite
def _spectra(draw: st.DrawFn) -> Spectra:
    n_scans = draw(st.integers(1, 4))
    steps = draw(hnp.arrays(np.float64, st.integers(1, 25), elements=st.floats(1e-3, 40.0)))
    start = draw(st.floats(190.0, 600.0))
    grid = start + np.concatenate([[0.0], np.cumsum(steps)])
    values = draw(hnp.arrays(np.float64, (n_scans, grid.size), elements=st.floats(-0.5, 5.0)))
    names = draw(st.lists(_NAME, min_size=n_scans, max_size=n_scans, unique=True))
    return Spectra(grid, values, names)


@given(scans=_spectra())
@settings(suppress_health_check=[HealthCheck.function_scoped_fixture])
def test_format_then_read_round_trips(write_file, scans: Spectra) -> None:
    back = read_scan_table(write_file("round.csv", format_scan_table(scans)))
    assert back.names == scans.names
    np.testing.assert_array_equal(back.wavelengths, scans.wavelengths)
    # Values are written with 6 decimals.
    np.testing.assert_allclose(back.values, scans.values, rtol=0, atol=5.000001e-7)


def test_format_scan_table_layout() -> None:
    scans = Spectra([400.0, 400.5, 1000.125], [[-1e-9, 0.1234567, np.nan], [-0.0, 2.0, -0.25]], ["a, quoted", "b"])
    assert format_scan_table(scans).splitlines() == [
        'wavelength_nm,"a, quoted",b',
        "400,0.000000,0.000000",
        "400.5,0.123457,2.000000",  # fixed 6 decimals
        "1000.125,saturated,-0.250000",  # an unusable point is marked, and reads back as one
    ]


_VALID = (
    "# exported scans\n"
    "wavelength_nm,std-1,std-2\n"
    "400,0.100000,0.200000\n"
    "401,0.110000,0.210000\n"
    "402,0.120000,0.220000\n"
    "403,0.130000,0.230000\n"
).encode()


@given(
    edits=st.lists(
        st.tuples(st.sampled_from(["replace", "insert", "delete"]), st.integers(0, len(_VALID) - 1), st.integers(0, 255)),
        min_size=1,
        max_size=6,
    ),
    quantity=st.sampled_from(["absorbance", "transmittance", "percent-transmittance"]),
    decimal=st.sampled_from([".", ","]),
)
@settings(suppress_health_check=[HealthCheck.function_scoped_fixture])
def test_mutated_files_give_spectra_or_absolve_error(write_file, edits, quantity: str, decimal: str) -> None:
    content = bytearray(_VALID)
    for kind, position, byte in edits:
        position = min(position, len(content) - 1)
        if kind == "replace" and content:
            content[position] = byte
        elif kind == "insert":
            content.insert(position, byte)
        elif content:
            del content[position]
    path = write_file("mutated.csv", bytes(content))
    try:
        scans = read_scan_table(path, decimal=decimal, quantity=quantity)  # type: ignore[arg-type]
    except AbsolveError as error:
        assert error.file == str(path)
        return
    assert isinstance(scans, Spectra)
    assert np.all(np.diff(scans.wavelengths) > 0)
    assert not np.any(np.isinf(scans.values))


# Cell spellings of one number: plain, exponent, integer, signs and padding; the last ones JSON does not
# accept, so their tables must take numpy's reader instead and still read the same numbers.
_SPELLINGS = [
    lambda x: repr(x), lambda x: f"{x:.6f}", lambda x: f"{x:.17e}", lambda x: f"{x:.3E}", lambda x: f"{x:.25g}",
    lambda x: f" {x:.4f} ", lambda x: str(int(round(x * 100))),
]
_NOT_JSON = [lambda x: f"{x:+.4f}", lambda x: f"{x:.4f}".replace("0.", ".", 1) if 0 <= x < 1 else f"{x:.4f}", lambda x: f"{round(x)}."]


@given(
    values=hnp.arrays(np.float64, st.tuples(st.integers(2, 6), st.integers(1, 5)), elements=st.floats(-3.0, 9.0)),
    spelling=st.integers(0, len(_SPELLINGS) + len(_NOT_JSON) - 1),
    delimiter=st.sampled_from([",", "\t", ";"]),
)
@settings(suppress_health_check=[HealthCheck.function_scoped_fixture], max_examples=60)
def test_every_cell_reads_as_the_correctly_rounded_float_of_its_text(write_file, values, spelling: int, delimiter: str) -> None:
    spell = (_SPELLINGS + _NOT_JSON)[spelling]
    grid = 400.0 + np.arange(values.shape[0])
    cells = [[f"{w:g}", *(spell(float(v)) for v in row)] for w, row in zip(grid, values)]
    header = delimiter.join(["wavelength", *(f"s{j}" for j in range(values.shape[1]))])
    path = write_file("cells.csv", "\n".join([header, *(delimiter.join(row) for row in cells)]) + "\n")
    table = read_wide_table(path, what="scan")
    # Python's float() of a decimal text is the correctly rounded double (IEEE 754 conversion), the
    # reference whichever reader took the table.
    expected = np.array([[float(cell) for cell in row[1:]] for row in cells]).T
    np.testing.assert_array_equal(table.columns, expected)


def test_plain_tables_are_read_without_numpy_and_others_with_it(write_file, monkeypatch: pytest.MonkeyPatch) -> None:
    calls: list[int] = []
    loadtxt = np.loadtxt

    def counted(*args, **kwargs):  # type: ignore[no-untyped-def]
        calls.append(1)
        return loadtxt(*args, **kwargs)

    monkeypatch.setattr(np, "loadtxt", counted)
    _assert_expected(read_scan_table(write_file("plain.csv", _table())))
    _assert_expected(read_scan_table(write_file("commented.csv", "# note\n" + _table().replace("\n400", "\n# mid\n400"))))
    assert calls == []
    # A cell JSON does not accept, or a word that JSON would read (true), sends the table to numpy's reader.
    _assert_expected(read_scan_table(write_file("leading-point.csv", _table().replace("0.10", ".10"))))
    assert len(calls) == 1
    with pytest.raises(AbsolveError, match="'true' is not a number"):
        read_scan_table(write_file("word.csv", _table().replace("0.10", "true")))
    assert len(calls) == 2


# ---------------------------------------------------------------- concentration tables

CONCENTRATIONS = (
    "scan,component,concentration,path_length_cm,dilution\n"
    "std-1,red,2.0,1.0,\n"
    "std-2,red,4.0,1,2\n"
    "mix-1,red,1.5,0.5,\n"
    "mix-1,blue,3.0,0.5,\n"
    "std-3,blue,5.0,,\n"
)


def test_concentration_table_defaults_and_matrix(write_file) -> None:
    path = write_file("conc.csv", CONCENTRATIONS)
    table = read_concentration_table(path)
    assert set(table.columns) == {"scan", "component", "concentration", "path_length_cm", "dilution", "line"}
    assert table["line"].tolist() == [2, 3, 4, 5, 6]
    scans = ("std-1", "std-2", "std-3", "mix-1")
    matrix, components = concentration_matrix(table, scans)
    assert components == ("red", "blue")
    np.testing.assert_array_equal(matrix, [[2.0, 0.0], [4.0, 0.0], [0.0, 5.0], [1.5, 3.0]])
    np.testing.assert_array_equal(per_scan_value(table, scans, "path_length_cm"), [1.0, 1.0, 1.0, 0.5])
    np.testing.assert_array_equal(per_scan_value(table, scans, "dilution"), [1.0, 2.0, 1.0, 1.0])
    ordered, names = concentration_matrix(table, scans, components=["blue", "red"])
    assert names == ("blue", "red")
    np.testing.assert_array_equal(ordered, matrix[:, ::-1])


def test_concentration_table_minimal_layout_with_semicolons_and_comments(write_file) -> None:
    path = write_file("conc.csv", "# standards of lot 7\nScan;Component;Concentration\nA;dye;0\nB;dye;1e-3\n")
    table = read_concentration_table(path)
    assert table["concentration"].tolist() == [0.0, 1e-3]
    assert table["path_length_cm"].tolist() == [1.0, 1.0]
    assert table["line"].tolist() == [3, 4]


CONCENTRATION_ERRORS = [
    ("empty.csv", "", None, None, "the table is empty"),
    ("no_component.csv", "scan,concentration\na,1\n", 1, None, "lacks the column 'component'"),
    ("no_concentration.csv", "# c\nscan,component,amount\na,x,1\n", 2, None, "lacks the column 'concentration'"),
    ("header_only.csv", "scan,component,concentration\n", None, None, "header but no rows"),
    ("negative.csv", "scan,component,concentration\na,x,1\nb,x,-0.5\n", 3, 3, "negative concentration -0.5"),
    ("word.csv", "scan,component,concentration\na,x,lots\n", 2, 3, "concentration 'lots' is not a number"),
    ("nan.csv", "scan,component,concentration\na,x,nan\n", 2, 3, "concentration 'nan' is not a number"),
    ("zero_path.csv", "scan,component,concentration,path_length_cm\na,x,1,1\nb,x,1,0\n", 3, 4, "path_length_cm must be positive; got 0"),
    ("negative_dilution.csv", "scan,dilution,component,concentration\na,-2,x,1\n", 2, 2, "dilution must be positive; got -2"),
    ("twice.csv", "scan,component,concentration\na,x,1\nb,x,2\na,x,3\n", 4, None, "scan 'a' lists component 'x' twice"),
    ("ragged.csv", "scan,component,concentration\na,x,1,9\n", 2, None, "4 cells where the header has 3"),
    ("unnamed.csv", "scan,component,concentration\n,x,1\n", 2, None, "empty scan or component name"),
    ("two_paths.csv", "scan,component,concentration,path_length_cm\nm,x,1,1\nm,y,1,2\n", 3, 4, "scan 'm' has differing path_length_cm"),
    ("binary.csv", bytes(range(256)), None, None, "binary content"),
]


@pytest.mark.parametrize(("name", "content", "line", "column", "message"), CONCENTRATION_ERRORS, ids=[c[0] for c in CONCENTRATION_ERRORS])
def test_malformed_concentration_tables_are_located(write_file, name, content, line, column, message) -> None:
    path = write_file(name, content)
    with pytest.raises(AbsolveError, match=message) as caught:
        read_concentration_table(path)
    assert (caught.value.file, caught.value.line, caught.value.column) == (str(path), line, column)


def test_concentration_matrix_refuses_unknown_and_unlisted_scans(write_file) -> None:
    path = write_file("conc.csv", "scan,component,concentration\na,x,1\nb,x,2\nghost,x,3\n")
    table = read_concentration_table(path)
    with pytest.raises(AbsolveError, match="scan 'ghost' is not among the scans read") as caught:
        concentration_matrix(table, ["a", "b"])
    assert (caught.value.file, caught.value.line) == (str(path), 4)
    with pytest.raises(AbsolveError, match="scan 'c' has no row in the concentration table") as caught:
        concentration_matrix(table, ["a", "b", "ghost", "c"])
    assert caught.value.file == str(path)
    with pytest.raises(AbsolveError, match="unknown component 'x' — use one of y") as caught:
        concentration_matrix(table, ["a", "b", "ghost"], components=["y"])
    assert caught.value.line == 2


def test_saturated_cells_round_trip_as_unusable_points(tmp_path: Path) -> None:
    scans = Spectra([400.0, 401.0], [[0.5, np.nan], [0.25, 0.75]], ["a", "b"])
    path = tmp_path / "sat.csv"
    path.write_text(format_scan_table(scans))
    back = read_scan_table(path)
    assert back.usable.tolist() == [[True, False], [True, True]]
    np.testing.assert_allclose(back.values[back.usable], scans.values[scans.usable])
