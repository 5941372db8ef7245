"""The result writers' fast paths against Python's own spelling of the same numbers.

results.json's numbers are spelt by orjson a whole array at a time; the check
is that every text reads back (json.loads) to the very float64 that json.dumps
(repr) spells, sign of zero included, and that non-finite values become null.
The CSV writers' "%" formatting of whole columns is checked against
format(value, spec), and the six-decimal spelling of 2-D blocks against "%.6f"
of Python's round or of numpy's np.round. The values cover negatives, both
zeros, NaN and infinities, subnormal and huge magnitudes and values of 1000
and above.
"""

from __future__ import annotations

import csv
import io
import json
import math

import numpy as np
import pytest
from hypothesis import given
from hypothesis import strategies as st

from absolve.io import results, tables

EDGES = [
    0.0, -0.0, 1.0, -1.0, 0.1, -2.5, 1e-5, -1e-5, 1e-4, 2.5e-7, 1e15, 1e16, -1e16, 1e22, 123456789012345680.0,
    999.9999996, -999.9999994, 999.9999995, -999.9999995, 1000.0, -1234.5, 4e-7, -4e-7, 5e-7, -5e-7, 1e300, -1e-300, 5e-324, 2.2250738585072014e-308,
    1.7976931348623157e308, math.nan, math.inf, -math.inf,
]


def _values(seed: int) -> np.ndarray:
    """The edge values and random ones over every magnitude, shuffled."""
    rng = np.random.default_rng(seed)
    spread = rng.standard_normal(1467) * 10.0 ** rng.uniform(-300.0, 300.0, 1467)
    near_one = rng.standard_normal(1500) * 10.0 ** rng.integers(-8, 4, 1500)
    return rng.permutation(np.concatenate([EDGES, spread, near_one]))


def _same_float(text: str, value: float) -> bool:
    """Whether a JSON text reads back as the float ``value`` (bit for bit; null where it is not finite)."""
    parsed = json.loads(text)
    if not math.isfinite(value):
        return text == "null"
    # Reference: the json module's own spelling (repr) of the value, read back.
    return type(parsed) is float and parsed.hex() == json.loads(json.dumps(value)).hex() == value.hex()


def test_json_texts_read_back_to_the_very_same_floats() -> None:
    values = _values(60)
    texts = results._json_texts(values.reshape(40, -1))  # C order, like np.ravel
    assert len(texts) == values.size
    assert all(_same_float(text, value) for text, value in zip(texts, values.tolist()))
    assert results._json_texts(np.array([])) == []
    assert results._json_texts(np.array([[3, -4]])) == ["3.0", "-4.0"]  # integers are spelt as floats, as before


@given(st.lists(st.floats(allow_nan=True, allow_infinity=True), max_size=40))
def test_json_texts_of_any_floats_read_back(values: list[float]) -> None:
    texts = results._json_texts(np.array(values, dtype=np.float64))
    assert len(texts) == len(values) and all(_same_float(text, value) for text, value in zip(texts, values))


@pytest.mark.parametrize("shape", [(7, 9), (1, 1), (3, 0), (0, 4)])
def test_json_rows_are_the_rows_as_json_lists(shape: tuple[int, int]) -> None:
    values = _values(61)[: shape[0] * shape[1]].reshape(shape)
    rows = results._json_rows(values)
    assert len(rows) == shape[0]
    for row, expected in zip(rows, values.tolist()):
        texts = row.split(", ") if row else []
        assert len(texts) == len(expected) and all(_same_float(text, value) for text, value in zip(texts, expected))
        # Reference: json.dumps's separators between list items.
        assert json.loads(f"[{row}]") == json.loads(json.dumps([v if math.isfinite(v) else None for v in expected]))


@pytest.mark.parametrize("spec", [".6g", ".4g", ".3g"])
def test_csv_numbers_are_pythons_format(spec: str) -> None:
    values = _values(62).reshape(-1, 5)
    expected = [format(v, spec) if math.isfinite(v) else "" for v in values.ravel().tolist()]
    assert results._numbers(values, spec) == expected
    finite = [1.0, 1e6, 1234567.0, -0.0, 0.5]  # no NaN: the path without blanks
    assert results._numbers(np.array(finite), spec) == [format(v, spec) for v in finite]
    assert results._numbers(np.array([]), spec) == []


def _six_decimals(value: float, rounding: str, missing: str) -> str:
    """Reference: "%.6f" of the correctly rounded value ("decimal") or of np.round(value, 6) ("scaled"), never "-0.000000"."""
    if not math.isfinite(value):
        return missing
    with np.errstate(over="ignore"):  # np.round(value, 6) of a value above 1e302 is infinite
        rounded = round(value, 6) if rounding == "decimal" else float(np.round(value, 6))
    return "%.6f" % (rounded + 0.0)


@pytest.mark.parametrize("rounding", ["decimal", "scaled"])
@pytest.mark.parametrize("missing", ["", "saturated"])
@pytest.mark.parametrize("spell_cells", [7, 1 << 16])
def test_six_decimal_rows_are_pythons_formatting(rounding: str, missing: str, spell_cells: int, monkeypatch: pytest.MonkeyPatch) -> None:
    # Small blocks of rows (spell_cells) as well as the usual size: the blocks' texts must join seamlessly.
    monkeypatch.setattr(tables, "_SPELL_CELLS", spell_cells)
    rng = np.random.default_rng(63)
    halves = (rng.integers(-999_000_000, 999_000_000, 2000) + 0.5) / 1e6  # at or next to rounding ties
    small = np.concatenate([rng.normal(0.0, 2.0, 2000), halves, np.nextafter(halves, np.inf), np.nextafter(halves, -np.inf)])
    values = rng.permutation(np.concatenate([small, [v for v in EDGES if not 0 < abs(v) < 1e-300]]))[:8000].reshape(80, 100)
    values[5] = np.nan  # a row with no value at all
    values[6, :] = rng.normal(0.0, 1.0, 100)  # a row of ordinary values only
    blocks = list(tables.fixed_decimal_rows(values, missing, rounding))
    assert len(blocks) == (80 if spell_cells == 7 else 1)
    text = b"".join(blocks).decode("utf-8")
    expected = "".join(",".join(_six_decimals(v, rounding, missing) for v in row) + "\n" for row in values.tolist())
    assert text == expected
    assert b"".join(tables.fixed_decimal_rows(values[:, :1], missing, rounding)).decode() == "".join(_six_decimals(v, rounding, missing) + "\n" for v in values[:, 0].tolist())
    assert b"".join(tables.fixed_decimal_rows(np.empty((3, 0)), missing, rounding)) == b"\n\n\n"
    with pytest.raises(ValueError, match="2-D"):
        tables.fixed_decimal_rows(values[0], missing, rounding)


def test_wide_table_lines_in_blocks_of_wavelengths_are_the_table(monkeypatch: pytest.MonkeyPatch) -> None:
    # Blocks of three wavelengths: rows come out one by one and in order whatever the block size.
    monkeypatch.setattr(tables, "_SPELL_CELLS", 3 * 4)
    rng = np.random.default_rng(64)
    wavelengths = np.arange(400.0, 410.0, 0.25)
    values = rng.normal(0.0, 1.0, (4, wavelengths.size))
    values[1, 3] = np.nan
    values[2, 7] = 1234.5678
    names = ["a", "b,c", 'd"e', "é"]
    lines = list(tables.wide_table_lines("wavelength_nm", names, wavelengths, values, missing="saturated"))
    # Reference: the csv module writing rows of "%g" wavelengths and "%.6f" values.
    buffer = io.StringIO()
    writer = csv.writer(buffer, lineterminator="\n")
    writer.writerow(["wavelength_nm", *names])
    for j, wavelength in enumerate(wavelengths.tolist()):
        writer.writerow([f"{wavelength:g}", *(_six_decimals(v, "decimal", "saturated") for v in values[:, j].tolist())])
    assert len(lines) == wavelengths.size + 1 and all(line.endswith("\n") for line in lines)
    assert "".join(lines) == buffer.getvalue()
