"""JCAMP-DX reading and writing (absolve.io.jcamp)."""

from __future__ import annotations

import math
import re
import warnings
from pathlib import Path

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from absolve.errors import AbsolveError
from absolve.io.jcamp import read_jcamp, write_jcamp
from absolve.spectra import Spectra

DATA = Path(__file__).resolve().parents[1] / "data" / "jcamp"

# The ordinates 10 12 15 15 15 15 13 -4 -4 0 (YFACTOR 0.001) on 400..409 nm, encoded in
# tests/data/jcamp/*.jdx in every form; each encoding worked by hand from the JCAMP-DX 1988
# compression rules (McDonald & Wilks, Appl. Spectrosc. 42 (1988) 151):
#   SQZ  10 -> A0, 12 -> A2, 15 -> A5, 13 -> A3, -4 -> d, 0 -> @
#   DIF  differences +2 +3 0 0 0 -2 -17 0 +4 -> K L % % % k j7 % M
#   DUP  a count that includes the first occurrence: 15 four times -> A5V, % three times -> %U
HAND_ORDINATES = np.array([10, 12, 15, 15, 15, 15, 13, -4, -4, 0]) * 0.001
HAND_GRID = np.arange(400.0, 410.0)


def _write(tmp_path: Path, text: str, name: str = "scan.jdx") -> Path:
    path = tmp_path / name
    path.write_text(text, encoding="utf-8")
    return path


def _block(
    data: str,
    *,
    title: str = "dye",
    xunits: str = "NANOMETERS",
    yunits: str = "ABSORBANCE",
    first: float = 400,
    last: float = 409,
    npoints: int = 10,
    yfactor: str = "1",
    form: str = "##XYDATA=(X++(Y..Y))",
) -> str:
    return (
        f"##TITLE={title}\n##JCAMP-DX=4.24\n##DATA TYPE=UV/VIS SPECTRUM\n##XUNITS={xunits}\n##YUNITS={yunits}\n"
        f"##XFACTOR=1\n##YFACTOR={yfactor}\n##FIRSTX={first}\n##LASTX={last}\n##NPOINTS={npoints}\n"
        f"{form}\n{data}\n##END=\n"
    )


# ------------------------------------------------------------------ compression forms


@pytest.mark.parametrize("form", ["affn", "pac", "sqz", "sqzdup", "dif", "difdup"])
def test_every_compression_form_decodes_the_hand_worked_ordinates(form: str) -> None:
    # Expected numbers worked by hand from the JCAMP-DX 1988 compression rules (see HAND_ORDINATES).
    scans = read_jcamp(DATA / f"{form}.jdx")
    assert scans.names == (form,)
    assert scans.quantity == "absorbance"
    np.testing.assert_allclose(scans.wavelengths, HAND_GRID, rtol=0, atol=1e-12)
    np.testing.assert_allclose(scans.values[0], HAND_ORDINATES, rtol=0, atol=1e-12)


def test_multi_digit_and_nine_repeat_counts(tmp_path: Path) -> None:
    # Worked by hand from the JCAMP-DX 1988 compression rules: DUP S2 = 12 occurrences of A0 (10);
    # J = DIF +1 and DUP s makes it 9 differences in all, so "@Js" is 0, 1, ..., 9.
    path = _write(tmp_path, _block("400A0S2", last=411, npoints=12) + _block("400@Js", title="ramp", npoints=10))
    scans = read_jcamp(path)
    assert scans.names == ("dye", "ramp")
    np.testing.assert_allclose(scans.values[0], np.full(10, 10.0), rtol=0, atol=0)  # joined on the common 400-409 nm
    np.testing.assert_allclose(scans.values[1], np.arange(10.0), rtol=0, atol=0)


def test_exponent_needs_a_sign_otherwise_E_is_the_sqz_digit_five(tmp_path: Path) -> None:
    # '1.5E+01' is AFFN 15; in '402E5' the E is SQZ +5, so E5 = 55 (JCAMP-DX 1988 SQZ table).
    path = _write(tmp_path, _block("400 1.5E+01 2e-1\n402E5", last=402, npoints=3))
    np.testing.assert_allclose(read_jcamp(path).values[0], [15.0, 0.2, 55.0], rtol=1e-12)


def test_missing_value_marker_becomes_nan(tmp_path: Path) -> None:
    path = _write(tmp_path, _block("400 1 ? 3", last=402, npoints=3))
    scans = read_jcamp(path)
    assert scans.usable[0].tolist() == [True, False, True]


# ------------------------------------------------------------------ units and quantities


def test_wavenumbers_become_nanometres_sorted_increasing(tmp_path: Path) -> None:
    # nm = 1e7 / (wavenumber in cm^-1): 20000 -> 500, 22500 -> 444.4..., 25000 -> 400 (definition of the units).
    path = _write(tmp_path, _block("20000 3 2 1", xunits="1/CM", first=20000, last=25000, npoints=3, yfactor="0.1"))
    scans = read_jcamp(path)
    np.testing.assert_allclose(scans.wavelengths, [400.0, 1e7 / 22500, 500.0], rtol=1e-12)
    np.testing.assert_allclose(scans.values[0], [0.1, 0.2, 0.3], rtol=1e-12)


def test_descending_micrometres_are_sorted(tmp_path: Path) -> None:
    path = _write(tmp_path, _block("0.5 3 2 1", xunits="MICROMETERS", first=0.5, last=0.4, npoints=3))
    scans = read_jcamp(path)
    np.testing.assert_allclose(scans.wavelengths, [400.0, 450.0, 500.0], rtol=1e-12)
    np.testing.assert_allclose(scans.values[0], [1.0, 2.0, 3.0], rtol=0)


@pytest.mark.parametrize("yunits", ["%T", "PERCENT TRANSMITTANCE", "% transmittance"])
def test_percent_transmittance_units(tmp_path: Path, yunits: str) -> None:
    path = _write(tmp_path, _block("400 10 100", yunits=yunits, last=401, npoints=2))
    scans = read_jcamp(path)
    assert scans.quantity == "percent-transmittance"
    # 10 % -> A = 1, 100 % -> A = 0 (common practice, no source).
    np.testing.assert_allclose(scans.to_absorbance().values[0], [1.0, 0.0], rtol=0, atol=1e-12)


def test_transmittance_above_one_and_a_half_is_read_as_percent_with_a_warning(tmp_path: Path) -> None:
    path = _write(tmp_path, _block("400 10 50 100", yunits="TRANSMITTANCE", last=402, npoints=3))
    with pytest.warns(UserWarning, match=r"scan\.jdx:5: .*read as percent transmittance"):
        scans = read_jcamp(path)
    assert scans.quantity == "percent-transmittance"


def test_transmittance_fraction_is_kept_without_warning(tmp_path: Path) -> None:
    path = _write(tmp_path, _block("400 0.1 1", yunits="TRANSMITTANCE", last=401, npoints=2))
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        scans = read_jcamp(path)
    assert scans.quantity == "transmittance"
    np.testing.assert_allclose(scans.to_absorbance().values[0], [1.0, 0.0], rtol=0, atol=1e-12)


def test_quantity_argument_overrides_yunits(tmp_path: Path) -> None:
    path = _write(tmp_path, _block("400 10 100", yunits="ARBITRARY UNITS", last=401, npoints=2))
    assert read_jcamp(path, quantity="percent-transmittance").quantity == "percent-transmittance"
    with pytest.raises(AbsolveError, match=r"scan\.jdx:5: ##YUNITS=ARBITRARY UNITS .*ABSORBANCE, TRANSMITTANCE, %T"):
        read_jcamp(path)
    with pytest.raises(AbsolveError, match="unknown quantity 'opacity'"):
        read_jcamp(path, quantity="opacity")  # type: ignore[arg-type]


# ------------------------------------------------------------------ blocks


def test_link_block_children_with_data_and_unique_names() -> None:
    scans = read_jcamp(DATA / "link.jdx")
    assert scans.names == ("dye", "dye #2")  # the peak-table child is skipped
    np.testing.assert_allclose(scans.wavelengths, [400, 401, 402, 403, 404], rtol=0)
    np.testing.assert_allclose(scans.values[0], [0.1, 0.2, 0.3, 0.4, 0.5], rtol=1e-12)
    np.testing.assert_allclose(scans.values[1], [0.5, 0.6, np.nan, 0.8, 0.9], rtol=1e-12)


def test_blocks_on_different_grids_are_interpolated_onto_the_overlap(tmp_path: Path) -> None:
    first = _block("400 0 1 2 3 4", first=400, last=404, npoints=5)
    second = _block("401 10 30 50", title="second", first=401, last=405, npoints=3, yunits="TRANSMITTANCE", yfactor="0.01")
    scans = read_jcamp(_write(tmp_path, first + second))
    assert scans.quantity == "absorbance"
    np.testing.assert_allclose(scans.wavelengths, [401, 402, 403, 404], rtol=0)
    # A = -log10 T of T = 0.1, 0.3, 0.5 at 401, 403, 405 nm, then linear interpolation (stack_spectra
    # interpolates absorbance): 402 nm is the mean of the 401 and 403 nm absorbances.
    a401, a403, a405 = -np.log10([0.1, 0.3, 0.5])
    np.testing.assert_allclose(scans.values[1], [a401, (a401 + a403) / 2, a403, (a403 + a405) / 2], rtol=1e-12)
    np.testing.assert_allclose(scans.values[0], [1, 2, 3, 4], rtol=0)


def test_blocks_without_common_wavelengths_are_refused(tmp_path: Path) -> None:
    text = _block("400 1 2", last=401, npoints=2) + _block("500 1 2", title="far", first=500, last=501, npoints=2)
    with pytest.raises(AbsolveError, match=r"scan\.jdx:14: the block 'far' .*leaves no wavelength"):
        read_jcamp(_write(tmp_path, text))


def test_latin1_file_is_read() -> None:
    assert read_jcamp(DATA / "latin1.jdx").names == ("Farbstoff grün",)


# ------------------------------------------------------------------ malformed files

MALFORMED = [
    # (file text, where the error must point, what it must say)
    (_block("400 1 2 x3", last=402, npoints=3), 12, "unexpected character 'x'"),
    (_block("400 1 2 3", last=402, npoints=4), 12, r"decoded 3 ordinates but ##NPOINTS=4"),
    (_block("400 1 2 3\n403 4", last=404, npoints=5), 13, r"decoded 4 ordinates but ##NPOINTS=5"),
    (_block("401 1 2 3", last=402, npoints=3), 12, r"abscissa 401 should be 400"),
    (_block("400 1 2 3\n402 4", last=403, npoints=4), 13, r"abscissa 402 should be 403"),
    (_block("400A0KL%%\n404A6%kj7%M\n409@"), 13, r"Y-check value 16 does not repeat .* 15"),
    (_block("400K1", last=401, npoints=2), 12, r"first ordinate is the difference 'K1'"),
    (_block("400 ?J", last=401, npoints=2), 12, r"difference 'J' follows a missing value"),
    (_block("400 1 2", last=401, npoints=2, yfactor="abc"), 7, r"##YFACTOR='abc' is not a number"),
    (_block("400 1 2", last=401, npoints=2, yfactor="0"), 7, r"##YFACTOR=0"),
    (_block("400 1 2", last=401, npoints=2.5), 10, r"##NPOINTS=2.5 is not a positive whole number"),  # type: ignore[arg-type]
    (_block("400 1 2", last=401, npoints=2, xunits="HERTZ"), 4, r"##XUNITS=HERTZ is not read .*NANOMETERS, NM, 1/CM"),
    (_block("0 1 2", xunits="1/CM", first=0, last=1, npoints=2), 4, r"zero or negative"),
    (_block("400 1 2", last=401, npoints=2, form="##XYDATA=(X++(R..R))"), 11, r"##XYDATA=\(X\+\+\(R\.\.R\)\) is not read"),
    (_block("400, 1; 401", form="##XYPOINTS=(XY..XY)"), 12, r"holds 3 numbers, not whole x, y pairs"),
    (_block("400, 1\n400, 2", form="##XYPOINTS=(XY..XY)", npoints=2), 11, r"two points share one abscissa"),
    (_block("400 1 2", last=401, npoints=2).replace("##FIRSTX=400\n", ""), 10, r"no ##FIRSTX= label"),
    (_block("400 1 2", last=401, npoints=2).replace("##XUNITS=NANOMETERS\n", ""), 1, r"no ##XUNITS= label"),
    (_block("400 1 2", last=401, npoints=2).replace("##END=\n", ""), 12, r"not closed by ##END= \(the file looks truncated\)"),
    (_block("400 1 2 3 4", last=404, npoints=5)[:-10], 12, r"not closed by ##END="),
    ("##TITLE=header only\n##JCAMP-DX=4.24\n##END=\n", 1, r"no ##XYDATA= or ##XYPOINTS= table"),
    ("stray words\n" + _block("400 1 2", last=401, npoints=2), 1, r"text 'stray words' outside a block"),
    ("##TITLE=x\n##XUNITS NANOMETERS\n##END=\n", 2, r"has no '='"),
    ("##NPOINTS=3\n", 1, r"##NPOINTS= appears outside a block"),
    (_block("400 1 2", last=401, npoints=2).replace("##END=\n", "##XYPOINTS=(XY..XY)\n400, 1\n##END=\n"), 13, r"second data table"),
    ("", 1, "the file is empty"),
    ("$$ only a comment\n\n", 1, "no ##TITLE= block found"),
]


@pytest.mark.parametrize(("text", "line", "problem"), MALFORMED)
def test_malformed_files_name_file_and_line(tmp_path: Path, text: str, line: int, problem: str) -> None:
    path = _write(tmp_path, text, name="bad.jdx")
    with pytest.raises(AbsolveError, match=rf"bad\.jdx:{line}(:\d+)?: .*{problem}") as caught:
        read_jcamp(path)
    assert caught.value.fix  # every error says how to fix it
    assert caught.value.file == str(path) and caught.value.line == line


def test_bad_character_error_gives_the_column(tmp_path: Path) -> None:
    path = _write(tmp_path, _block("400 1 2 x3", last=402, npoints=3))
    with pytest.raises(AbsolveError) as caught:
        read_jcamp(path)
    assert (caught.value.line, caught.value.column) == (12, 9)


def test_binary_junk_is_refused_with_its_line(tmp_path: Path) -> None:
    path = tmp_path / "junk.jdx"
    path.write_bytes(b"##TITLE=x\n##JCAMP-DX=4.24\n\x00\x01\x02\xff")
    with pytest.raises(AbsolveError, match=r"junk\.jdx:3: .*binary"):
        read_jcamp(path)


def test_utf16_file_with_byte_order_mark_is_read(tmp_path: Path) -> None:
    path = tmp_path / "wide.jdx"
    path.write_bytes(_block("400 1 2", last=401, npoints=2).encode("utf-16"))
    np.testing.assert_allclose(read_jcamp(path).values, [[1.0, 2.0]], rtol=0)


def test_missing_file(tmp_path: Path) -> None:
    with pytest.raises(AbsolveError, match="does not exist"):
        read_jcamp(tmp_path / "nowhere.jdx")


# ------------------------------------------------------------------ writing


def test_plain_writing_of_one_scan() -> None:
    scans = Spectra(HAND_GRID, [HAND_ORDINATES * 10], ["dye"])
    lines = write_jcamp(scans).splitlines()
    assert lines[0] == "##TITLE=dye" and lines[-1] == "##END="
    assert "##JCAMP-DX=4.24" in lines and "##DATA TYPE=UV/VIS SPECTRUM" in lines
    assert "##XUNITS=NANOMETERS" in lines and "##YUNITS=ABSORBANCE" in lines
    # Largest magnitude 0.15 keeps 6 significant digits as the integer 150000 (YFACTOR 1e-6).
    assert "##YFACTOR=1e-06" in lines and "##NPOINTS=10" in lines
    start = lines.index("##XYDATA=(X++(Y..Y))")
    assert lines[start + 1] == "400 100000 120000 150000 150000 150000 150000 130000 -40000 -40000 0"


def test_compressed_writing_matches_the_hand_worked_difdup_encoding() -> None:
    # Ordinates 100000 120000 150000 150000 150000 150000 130000 -40000 -40000 0: worked by hand from the
    # JCAMP-DX 1988 compression rules as SQZ A00000, DIF K0000 L0000, three zero DIFs %U, k0000 j70000 % M0000,
    # ending in DIF form, so a Y-check line repeats the last ordinate (SQZ @) at 409 nm.
    scans = Spectra(HAND_GRID, [HAND_ORDINATES * 10], ["dye"])
    lines = write_jcamp(scans, compress=True).splitlines()
    start = lines.index("##XYDATA=(X++(Y..Y))")
    assert lines[start + 1 : start + 3] == ["400 A00000K0000L0000%Uk0000j70000%M0000", "409 @"]


def test_long_compressed_tables_keep_lines_short_and_use_y_checks() -> None:
    grid = np.linspace(300.0, 800.0, 1001)
    values = np.exp(-(((grid - 550.0) / 60.0) ** 2))
    text = write_jcamp(Spectra(grid, [values], ["band"]), compress=True)
    lines = text.splitlines()
    assert max(len(line) for line in lines) <= 80  # the standard's line limit
    start = lines.index("##XYDATA=(X++(Y..Y))")
    data = lines[start + 1 : lines.index("##END=")]
    assert len(data) > 10 and data[-1].startswith("800 ")
    # Each continuation line starts with an SQZ check (never a DIF character).
    assert all(re.match(r"^[\d.]+ [@A-Ia-i?]", line) for line in data)


def test_several_scans_go_in_a_link_block(tmp_path: Path) -> None:
    scans = Spectra([400, 401], [[0.1, 0.2], [0.3, 0.4]], ["a", "b"], source="bath.csv")
    text = write_jcamp(scans)
    assert text.startswith("##TITLE=bath.csv\n##JCAMP-DX=4.24\n##DATA TYPE=LINK\n##BLOCKS=2\n")
    assert text.count("##TITLE=") == 3 and text.count("##END=") == 3
    assert "##BLOCK_ID=2" in text


def test_uneven_grid_is_written_as_xypoints(tmp_path: Path) -> None:
    scans = Spectra([400.0, 401.0, 403.5], [[0.1, np.nan, 0.3]], ["a"])
    text = write_jcamp(scans)
    assert "##XYPOINTS=(XY..XY)" in text and "##XYDATA" not in text
    assert "401.0, ?" in text
    back = read_jcamp(_write(tmp_path, text))
    np.testing.assert_array_equal(back.wavelengths, scans.wavelengths)
    np.testing.assert_allclose(back.values, scans.values, rtol=1e-6)


def test_percent_transmittance_is_written_as_transmittance_fraction(tmp_path: Path) -> None:
    scans = Spectra([400, 401], [[10.0, 100.0]], ["a"], quantity="percent-transmittance")
    text = write_jcamp(scans)
    assert "##YUNITS=TRANSMITTANCE" in text
    back = read_jcamp(_write(tmp_path, text))
    assert back.quantity == "transmittance"
    np.testing.assert_allclose(back.values, [[0.1, 1.0]], rtol=1e-12)


def test_all_missing_scan_is_written_with_markers(tmp_path: Path) -> None:
    scans = Spectra([400, 401, 402], [[np.nan, np.nan, np.nan]], ["dark"])
    for compress in (False, True):
        back = read_jcamp(_write(tmp_path, write_jcamp(scans, compress=compress)))
        assert not back.usable.any()


_grids = st.builds(
    lambda start, step, n: start + step * np.arange(n),
    st.floats(190.0, 900.0),
    st.sampled_from([0.1, 0.25, 0.5, 1.0, 2.0, 1.0 / 3.0]),
    st.integers(1, 60),
)


@st.composite
def _spectra(draw: st.DrawFn) -> Spectra:
    grid = draw(_grids)
    if draw(st.booleans()) and grid.size > 2:  # an uneven grid
        grid = np.sort(grid + draw(st.floats(0.01, 0.04)) * (np.arange(grid.size) % 2))
    quantity = draw(st.sampled_from(["absorbance", "transmittance"]))
    n_scans = draw(st.integers(1, 3))
    high = 4.0 if quantity == "absorbance" else 1.2
    low = -0.5 if quantity == "absorbance" else 0.0
    scale = draw(st.sampled_from([1.0, 1e-3, 1e-6]))
    values = draw(
        st.lists(
            st.one_of(st.floats(low, high), st.just(math.nan)), min_size=grid.size * n_scans, max_size=grid.size * n_scans
        )
    )
    names = [f"scan {i}" for i in range(n_scans)]
    return Spectra(grid, np.reshape(values, (n_scans, grid.size)) * scale, names, quantity)


@settings(max_examples=80, deadline=None, derandomize=True)
@given(scans=_spectra(), compress=st.booleans())
def test_write_then_read_round_trip(tmp_path_factory: pytest.TempPathFactory, scans: Spectra, compress: bool) -> None:
    path = tmp_path_factory.mktemp("round") / "trip.jdx"
    path.write_text(write_jcamp(scans, compress=compress), encoding="utf-8")
    back = read_jcamp(path)
    assert back.names == scans.names and back.quantity == scans.quantity
    np.testing.assert_allclose(back.wavelengths, scans.wavelengths, rtol=1e-12, atol=0)
    np.testing.assert_array_equal(back.usable, scans.usable)
    for row_back, row in zip(back.values, scans.values, strict=True):
        finite = np.abs(row[np.isfinite(row)])
        largest = finite.max() if finite.size else 0.0
        # Within half of the YFACTOR step (6 significant digits of the largest magnitude).
        resolution = 10.0 ** (math.floor(math.log10(largest)) - 5) if largest > 0 else 1.0
        np.testing.assert_allclose(row_back, row, rtol=0, atol=0.5 * resolution * (1 + 1e-9) + 1e-300)
