"""Plain-text tables: wide scan tables, long concentration tables, absorptivity tables.

Layouts
-------
Scan table (.csv .tsv .txt)
    First column wavelength in nm, every other column one scan whose header is
    the scan name. The delimiter (comma, tab, semicolon or whitespace) is
    sniffed; lines starting with ``#`` are comments; ``decimal=","`` reads
    comma-decimal exports. Descending or uneven wavelength grids are sorted.
Concentration table (CSV, long)
    ``scan,component,concentration`` with optional ``path_length_cm`` and
    ``dilution`` (both default 1). A scan with several rows is a mixed standard.
Absorptivity table (CSV, wide)
    Like a scan table, with one column per component holding absorbance per
    (unit concentration x 1 cm).
"""

from __future__ import annotations

import codecs
import csv
import functools
import io
import os
from decimal import ROUND_HALF_EVEN, Decimal
from collections.abc import Iterable, Iterator, Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import IO, TYPE_CHECKING

import numpy as np
import orjson
from numpy.typing import NDArray

from ..errors import AbsolveError
from ..spectra import QUANTITIES, Quantity, Spectra, stack_spectra

if TYPE_CHECKING:  # pandas is imported where it is used: reading scans does not need it
    import pandas as pd

__all__ = [
    "concentration_matrix",
    "csv_field",
    "fixed_decimal_rows",
    "fixed_decimals",
    "format_scan_table",
    "read_concentration_table",
    "read_scan_table",
    "read_scans",
    "read_text",
    "wide_table_lines",
    "JCAMP_SUFFIXES",
]

JCAMP_SUFFIXES = (".jdx", ".dx", ".jcamp")
# A cell reading this marks a point the instrument could not measure (a saturated
# detector); it becomes an unusable point, excluded and reported downstream.
SATURATED = "saturated"
_MISSING_WORDS = {"", "na", "nan", "n/a", "null", "none", "-", "--", "inf", "-inf", "+inf", "infinity"}
# Wavelengths a UV-Vis-NIR instrument can report, in nm (common practice, no source).
_PLAUSIBLE_NM = (150.0, 3500.0)


def read_text(path: str | os.PathLike[str], *, expected: str = "a text table", fix: str = "export the data as CSV or JCAMP-DX text") -> str:
    """Read a text file as UTF-8 (with or without BOM), falling back to Latin-1.

    Binary files and missing files raise :class:`AbsolveError`.
    """
    file = Path(path)
    try:
        raw = file.read_bytes()
    except FileNotFoundError:
        raise AbsolveError("file not found", fix="check the path", file=file) from None
    except IsADirectoryError:
        raise AbsolveError("is a folder, not a file", fix="name a file", file=file) from None
    except OSError as error:
        raise AbsolveError(f"cannot read: {error.strerror}", fix="check the file's permissions", file=file) from None
    if b"\x00" in raw[:65536]:
        text = _wide_text(raw)
        if text is None:
            raise AbsolveError(f"not {expected} (binary content)", fix=fix, file=file)
        return text
    try:
        return raw.decode("utf-8-sig")
    except UnicodeDecodeError:
        return raw.decode("latin-1")


def _wide_text(raw: bytes) -> str | None:
    """Text of a UTF-32 or UTF-16 file (with or without byte-order mark), or None when ``raw`` is binary.

    Without a mark, UTF-16 is recognised by its zero high bytes (text in Latin
    script has them in nearly every character); the decoded text must hold no
    control characters but line breaks and tabs.
    """
    if raw.startswith((codecs.BOM_UTF32_LE, codecs.BOM_UTF32_BE)):  # before UTF-16: the LE marks share two bytes
        codec = "utf-32"
    elif raw.startswith((codecs.BOM_UTF16_LE, codecs.BOM_UTF16_BE)):
        codec = "utf-16"
    else:
        sample = raw[:65536]
        zero_odd, zero_even = sample[1::2].count(0), sample[0::2].count(0)
        if max(zero_odd, zero_even) < 0.9 * (len(sample) // 2) or len(sample) % 2:
            return None
        codec = "utf-16-le" if zero_odd > zero_even else "utf-16-be"
    try:
        text = raw.decode(codec)
    except UnicodeDecodeError:
        return None
    if any(ord(character) < 32 and character not in "\t\n\r" for character in text[:65536]):
        return None
    return text


@dataclass(frozen=True)
class _Lines:
    """The data-bearing lines of a text table with their 1-based line numbers."""

    texts: list[str]
    numbers: list[int]


def _content_lines(text: str) -> _Lines:
    texts: list[str] = []
    numbers: list[int] = []
    for number, line in enumerate(text.splitlines(), start=1):
        stripped = line.strip()
        if stripped and not stripped.startswith("#"):
            texts.append(line.rstrip("\r\n"))
            numbers.append(number)
    return _Lines(texts, numbers)


def _sniff_delimiter(sample: Sequence[str], decimal: str, file: Path, line: int) -> str | None:
    """Return the delimiter character, or None for runs of whitespace."""
    joined = "\n".join(sample)
    if "\t" in joined:
        return "\t"
    if ";" in joined:
        return ";"
    if "," in joined:
        if decimal == ",":
            # Commas are decimal marks here, so columns can only be separated by whitespace.
            if all(len(line.split()) >= 2 for line in sample):
                return None
            raise AbsolveError(
                "commas appear both as decimal marks and as separators",
                fix="use ';' or tabs between columns in comma-decimal files",
                file=file,
                line=line,
            )
        return ","
    return None


def _split(line: str, delimiter: str | None) -> list[str]:
    if delimiter is None:
        return line.split()
    try:
        return next(csv.reader([line], delimiter=delimiter))
    except csv.Error:
        # A cell beyond the csv module's size limit (128 kB) is no value anyway: split
        # plainly, so that the bad cell is reported with its line and column.
        return line.split(delimiter)


def _parse_number(cell: str, decimal: str) -> float | None:
    text = cell.strip()
    if decimal == ",":
        text = text.replace(",", ".")
    # Python's float() reads "1_000" as 1000; no instrument writes that, so it is a typo, not a number.
    if text.lower() in _MISSING_WORDS or "_" in text:
        return None
    try:
        value = float(text)
    except ValueError:
        return None
    return value if np.isfinite(value) else None


@dataclass(frozen=True)
class WideTable:
    """A parsed wide table: first column the grid, the rest named columns.

    Attributes
    ----------
    grid : ndarray, shape (n_rows,)
        First column, sorted increasing.
    columns : ndarray, shape (n_columns, n_rows)
        The other columns, rows following ``grid``'s order.
    names : tuple of str
        Column headers (generated when the file has no header).
    lines : ndarray of int, shape (n_rows,)
        1-based line in the file of each row, in ``grid``'s order (for messages).
    """

    grid: NDArray[np.float64]
    columns: NDArray[np.float64]
    names: tuple[str, ...]
    lines: NDArray[np.int64]


def read_wide_table(path: str | os.PathLike[str], *, decimal: str = ".", what: str = "scan") -> WideTable:
    """Parse a wide table (grid in the first column), with precise errors.

    Plain numeric files are streamed from disk by numpy's C reader, so a
    20,000-column file never exists as text in memory; anything unusual
    (other encodings, missing or saturated cells, malformed rows) takes the
    careful path, which reads the text and names the first bad cell.

    Parameters
    ----------
    path : path-like
        The file.
    decimal : {".", ","}
        Decimal mark.
    what : str
        What a column holds ("scan", "component"), for messages.
    """
    file = Path(path)
    if decimal not in (".", ","):
        raise AbsolveError(f"the decimal mark must be '.' or ','; got {decimal!r}", fix="use --decimal , or leave it out")
    parsed = _stream_parse(file, decimal) or _text_parse(file, decimal, what)
    header, has_header, header_line, matrix, data_numbers = parsed
    n_columns = len(header)
    if has_header:
        names = tuple(name if name else f"{what}-{j}" for j, name in enumerate(header[1:], start=1))
        empty = [j for j, name in enumerate(header[1:], start=2) if not name]
        if empty:
            raise AbsolveError(
                f"column {empty[0]} has no header", fix=f"give every {what} column a name", file=file, line=header_line, column=empty[0]
            )
    else:
        names = tuple(f"{file.stem}-{j}" for j in range(1, n_columns))
    if len(set(names)) != len(names):
        duplicated = [name for j, name in enumerate(names) if name in names[:j]]
        raise AbsolveError(
            f"two columns are named {duplicated[0]!r}", fix=f"give every {what} a unique name", file=file, line=header_line
        )
    grid = matrix[:, 0]
    order = np.argsort(grid, kind="stable")
    in_order = bool(np.all(order == np.arange(order.size)))
    grid = grid[order]
    repeats = np.flatnonzero(np.diff(grid) == 0)
    if repeats.size:
        first_row = int(order[repeats[0] + 1])
        raise AbsolveError(
            f"wavelength {grid[repeats[0]]:g} nm appears twice",
            fix="remove the repeated row",
            file=file,
            line=data_numbers[first_row],
            column=1,
        )
    if grid.size < 2:
        raise AbsolveError("only one wavelength", fix="a scan needs at least two wavelengths", file=file, line=data_numbers[0])
    lines_sorted = np.asarray(data_numbers, dtype=np.int64)[order]
    if grid[0] < _PLAUSIBLE_NM[0] or grid[-1] > _PLAUSIBLE_NM[1]:
        raise AbsolveError(
            f"the first column runs from {grid[0]:g} to {grid[-1]:g}, which is not a UV-Vis wavelength range in nm",
            fix="the first column must be the wavelength in nm (convert wavenumbers or micrometres first)",
            file=file,
            line=int(lines_sorted[0] if grid[0] < _PLAUSIBLE_NM[0] else lines_sorted[-1]),
            column=1,
        )
    # Rows already in order need no gathered copy: the transposition is the only one.
    rows = matrix[:, 1:] if in_order else matrix[order, 1:]
    return WideTable(grid, _transposed(rows), names, lines_sorted)


def _transposed(matrix: NDArray[np.float64]) -> NDArray[np.float64]:
    """C-ordered transpose copied in blocks of columns.

    A plain copy of a wide table's transpose strides across the whole table
    for every element (0.25 s for 400 x 20,000 values); blocks that fit in
    the cache take a tenth of that.
    """
    out = np.empty(matrix.shape[::-1])
    for start in range(0, matrix.shape[1], _TRANSPOSE_BLOCK):
        out[start : start + _TRANSPOSE_BLOCK] = matrix[:, start : start + _TRANSPOSE_BLOCK].T
    return out


# (header cells, has a header, line of the first content line, data matrix, line of each data row)
_Parsed = tuple[list[str], bool, int, NDArray[np.float64], list[int]]
# Enough of a file's start to tell text from UTF-16 or binary content.
_SNIFF_BYTES = 65536
# Columns per block of the transposing copy (400 rows x 512 values = 1.6 MB, cache-sized).
_TRANSPOSE_BLOCK = 512


def _stream_parse(file: Path, decimal: str) -> _Parsed | None:
    """Parse a plain, complete numeric table straight from the file; None sends it the careful way.

    The first pass walks the lines in binary (one line in memory at a time)
    to find comments, blank lines and the header; the second reads the data
    rows from the file handle with orjson (:func:`_json_rows`), or with
    numpy's C parser when they are not all plain numbers.
    """
    try:
        handle = open(file, "rb")
    except OSError:
        return None
    with handle:
        if b"\x00" in handle.read(_SNIFF_BYTES):
            return None
        handle.seek(0)
        first: list[bytes] = []
        numbers: list[int] = []
        data_offset = 0
        offset = 0
        for number, raw in enumerate(handle, start=1):
            line = raw[len(codecs.BOM_UTF8):] if number == 1 and raw.startswith(codecs.BOM_UTF8) else raw
            stripped = line.strip()
            if b"\r" in line.rstrip(b"\r\n") or b"\x0b" in line or b"\x0c" in line:
                return None  # old Mac line ends or form feeds: the text path splits lines like str.splitlines
            if stripped and not stripped.startswith(b"#"):
                if len(numbers) == 1:
                    data_offset = offset
                numbers.append(number)
                if len(first) < 5:
                    first.append(line.rstrip(b"\r\n"))
            offset += len(raw)
        if len(numbers) < 2:
            return None
        try:
            texts = [text.decode("utf-8") for text in first]
        except UnicodeDecodeError:
            texts = [text.decode("latin-1") for text in first]
        delimiter = _sniff_delimiter(texts, decimal, file, numbers[0])
        header = [cell.strip() for cell in _split(texts[0], delimiter)]
        has_header = _parse_number(header[0], decimal) is None
        if len(header) < 2 or not has_header:
            return None
        data_numbers = numbers[1:]
        contiguous = data_numbers[-1] - data_numbers[0] == len(data_numbers) - 1

        def data_rows() -> Iterable[bytes]:
            if contiguous and decimal == ".":
                handle.seek(data_offset)
                return handle
            return _data_lines(handle, set(data_numbers), decimal)

        matrix = _json_rows(data_rows(), len(data_numbers), len(header), delimiter)
        if matrix is None:
            try:
                matrix = np.loadtxt(
                    data_rows(), delimiter=delimiter, dtype=np.float64, comments=None, max_rows=len(data_numbers), ndmin=2
                )
            except ValueError:
                return None
    if matrix.shape != (len(data_numbers), len(header)) or not np.all(np.isfinite(matrix)):
        return None
    return header, has_header, numbers[0], matrix, data_numbers


def _json_rows(lines: Iterable[bytes], n_rows: int, n_columns: int, delimiter: str | None) -> NDArray[np.float64] | None:
    """The data rows read as JSON arrays of numbers; None unless every row is plain numbers.

    orjson parses a wide row two to three times faster than numpy's C reader,
    correctly rounded as numpy's (checked in tests/unit/test_tables.py). Only
    rows of digits, signs, points, exponents, blanks and the delimiter are
    tried, so a word such as "true" can never pass for a number; a row JSON
    does not accept (".5", "1.", "+1", an empty cell) returns None and numpy's
    reader and the careful path take the table as before. An integer "-0"
    reads as 0 (JSON integers have no sign of zero).
    """
    if delimiter is None or len(delimiter) != 1:
        return None  # cells split by runs of blanks are numpy's to read
    separator = delimiter.encode()
    matrix = np.empty((n_rows, n_columns))
    count = 0
    for line in lines:
        if count == n_rows:
            break
        text = line if separator == b"," else line.replace(separator, b",")
        if text.translate(None, _PLAIN_NUMBER_BYTES):
            return None
        try:
            row = orjson.loads(b"[" + text + b"]")
        except orjson.JSONDecodeError:
            return None
        if len(row) != n_columns:
            return None
        matrix[count] = row
        count += 1
    return matrix if count == n_rows else None


# Bytes a row of plain numbers is made of (JSON's blanks included); the delimiter is a comma by then.
_PLAIN_NUMBER_BYTES = b"0123456789+-.eE, \t\r\n"


def _data_lines(handle: IO[bytes], wanted: set[int], decimal: str) -> Iterator[bytes]:
    """The data rows of a file with comments or blank lines among them, decimal commas made points."""
    handle.seek(0)
    for number, raw in enumerate(handle, start=1):
        if number in wanted:
            line = raw.strip()
            yield line.replace(b",", b".") if decimal == "," else line


def _text_parse(file: Path, decimal: str, what: str) -> _Parsed:
    """Read the whole text and parse it, naming the first bad line or cell."""
    lines = _content_lines(read_text(file))
    if not lines.texts:
        raise AbsolveError("the file holds no data", fix="check it is the right export", file=file)
    delimiter = _sniff_delimiter(lines.texts[:5], decimal, file, lines.numbers[0])
    header = [cell.strip() for cell in _split(lines.texts[0], delimiter)]
    has_header = _parse_number(header[0], decimal) is None
    if len(header) < 2:
        raise AbsolveError(
            f"found one column; a {what} table needs a wavelength column and at least one {what} column",
            fix="check the delimiter (comma, tab, semicolon or spaces) and --decimal",
            file=file,
            line=lines.numbers[0],
        )
    body = slice(1, None) if has_header else slice(0, None)
    data_lines, data_numbers = lines.texts[body], lines.numbers[body]
    if not data_lines:
        raise AbsolveError("the file has a header but no data rows", fix="check it is the right export", file=file, line=lines.numbers[0])
    n_columns = len(header)
    matrix = _fast_parse(data_lines, delimiter, decimal, n_columns)
    if matrix is None:
        matrix = _careful_parse(data_lines, data_numbers, delimiter, decimal, n_columns, file, what)
    return header, has_header, lines.numbers[0], matrix, data_numbers


def _fast_parse(lines: list[str], delimiter: str | None, decimal: str, n_columns: int) -> NDArray[np.float64] | None:
    """Parse all-numeric, complete data with pandas' C reader; None when anything is off."""
    import pandas as pd

    try:
        frame = pd.read_csv(
            io.StringIO("\n".join(lines)),
            sep=r"\s+" if delimiter is None else delimiter,
            header=None,
            decimal=decimal,
            dtype=np.float64,
            engine="c",
            na_filter=True,
        )
    except (ValueError, pd.errors.ParserError):
        return None
    values = frame.to_numpy(dtype=np.float64)
    if values.shape[1] != n_columns or not np.all(np.isfinite(values)):
        return None
    return values


def _careful_parse(
    lines: list[str], numbers: list[int], delimiter: str | None, decimal: str, n_columns: int, file: Path, what: str
) -> NDArray[np.float64]:
    """Parse cell by cell to name the first bad cell precisely."""
    rows: list[list[float]] = []
    for text, number in zip(lines, numbers):
        cells = _split(text, delimiter)
        if len(cells) != n_columns:
            raise AbsolveError(
                f"{len(cells)} cells where the header has {n_columns}",
                fix="every row needs a wavelength and one value per column (check the delimiter)",
                file=file,
                line=number,
            )
        row = []
        for column, cell in enumerate(cells, start=1):
            value = np.nan if column > 1 and cell.strip().lower() == SATURATED else _parse_number(cell, decimal)
            if value is None:
                shown = cell.strip()
                if shown.lower() in _MISSING_WORDS:
                    problem = "missing value" if shown == "" else f"{shown!r} is not a measured value"
                    fix = "fill in the value or remove the row"
                else:
                    problem = f"{shown[:40]!r} is not a number"
                    fix = "use --decimal , for comma decimals" if "," in shown and decimal == "." else "correct the cell"
                raise AbsolveError(problem, fix=fix, file=file, line=number, column=column)
            row.append(value)
        rows.append(row)
    return np.array(rows, dtype=np.float64)


def read_scan_table(path: str | os.PathLike[str], *, decimal: str = ".", quantity: Quantity = "absorbance") -> Spectra:
    """Read a wide scan table into :class:`Spectra` (in ``quantity``, not yet converted).

    Transmittance above 1.1 (or percent transmittance above 110) is refused as
    a likely wrong ``quantity``; transmittance at or below zero is kept and
    becomes an unusable (saturated) point on conversion to absorbance.
    """
    if quantity not in QUANTITIES:
        raise AbsolveError(f"unknown quantity {quantity!r}", fix="use one of " + ", ".join(QUANTITIES))
    table = read_wide_table(path, decimal=decimal, what="scan")
    _check_quantity(table, quantity, Path(path))
    return Spectra(table.grid, table.columns, table.names, quantity, source=str(path))


def _check_quantity(table: WideTable, quantity: Quantity, file: Path) -> None:
    # Allowing a few percent above full scale covers ordinary noise on a clear
    # blank (common practice, no source).
    # fmax skips unusable (NaN) points without a masked copy of a table that may be large.
    top = float(np.fmax.reduce(table.columns, axis=None))
    if not np.isfinite(top):
        return
    column, row = np.unravel_index(int(np.argmax(table.columns == top)), table.columns.shape)
    where = {"file": file, "line": int(table.lines[row]), "column": int(column) + 2}
    if quantity == "transmittance" and top > 1.1:
        raise AbsolveError(
            f"transmittance up to {top:g} (above 1)",
            fix="for percent values use --quantity percent-transmittance",
            **where,
        )
    if quantity == "percent-transmittance" and top > 110.0:
        raise AbsolveError(f"percent transmittance up to {top:g} (above 100 %)", fix="check the export's quantity and units", **where)
    if quantity == "absorbance" and top > 10.0:
        raise AbsolveError(
            f"absorbance up to {top:g}, beyond any photometric range",
            fix="if the file holds %T use --quantity percent-transmittance",
            **where,
        )


def read_scans(
    paths: Sequence[str | os.PathLike[str]], *, decimal: str = ".", quantity: Quantity | None = None
) -> Spectra:
    """Read scan tables and JCAMP-DX files and join them as absorbance.

    ``quantity`` applies to tables (default absorbance) and overrides the
    units a JCAMP-DX file declares when given.
    """
    if not paths:
        raise AbsolveError("no scan files given", fix="name at least one scan file")
    batches = []
    for path in paths:
        if Path(path).suffix.lower() in JCAMP_SUFFIXES:
            from .jcamp import read_jcamp

            batch = read_jcamp(path, quantity=quantity)
        else:
            batch = read_scan_table(path, decimal=decimal, quantity=quantity or "absorbance")
        # fmax skips NaN (unusable) points without a masked copy of a table that may be large.
        top = float(np.fmax.reduce(batch.values, axis=None))
        if not np.isfinite(top) or (batch.quantity != "absorbance" and top <= 0):
            raise AbsolveError(
                "no usable value: every point is saturated" + ("" if batch.quantity == "absorbance" else " or a transmittance at or below zero"),
                fix="check the export and --quantity (absorbance, transmittance or percent-transmittance)",
                file=path,
            )
        batches.append(batch)
    return stack_spectra(batches)


def format_scan_table(spectra: Spectra, *, first_header: str = "wavelength_nm") -> str:
    """CSV text of ``spectra`` in the wide layout (fixed 6-decimal values, ``saturated`` for NaN)."""
    return "".join(wide_table_lines(first_header, spectra.names, spectra.wavelengths, spectra.values, missing=SATURATED))


def wide_table_lines(
    first_header: str,
    names: Sequence[str],
    wavelengths: NDArray[np.float64],
    values: NDArray[np.float64],
    *,
    missing: str,
    rounding: str = "decimal",
) -> Iterator[str]:
    """The lines (each ending in a newline) of a wide table: a header, then one row per wavelength.

    Values are written with six decimals, never as "-0.000000"; ``missing``
    stands for NaN. ``rounding="decimal"`` rounds each value's exact binary
    value (as ``"%.6f"``); ``"scaled"`` rounds ``value * 1e6`` to an integer
    (as ``np.round(value, 6)``). Rows are spelt a small block of wavelengths
    at a time and handed out one by one, so a caller can write a large table
    without holding all of its text.

    Parameters
    ----------
    first_header : str
        Header of the wavelength column.
    names : sequence of str
        Column headers, one per row of ``values``.
    wavelengths : ndarray, shape (n_wavelengths,)
    values : ndarray, shape (n_columns, n_wavelengths)
    """
    yield ",".join(csv_field(name) for name in (first_header, *names)) + "\n"
    blocks = fixed_decimal_rows(np.asarray(values).T, missing, rounding)
    rows = (row for block in blocks for row in block.decode("utf-8").split("\n")[:-1])
    for wavelength, row in zip(wavelengths.tolist(), rows, strict=True):
        # Shortest text that reads back to the same float: fine grids must not collapse onto repeated wavelengths.
        yield np.format_float_positional(wavelength, trim="-") + "," + row + "\n"


def csv_field(text: str) -> str:
    """A CSV field as the csv module writes it with minimal quoting and "\\n" line ends."""
    return '"' + text.replace('"', '""') + '"' if any(mark in text for mark in ',"\n') else text


def fixed_decimals(values: NDArray[np.float64], missing: str = "", rounding: str = "decimal") -> str:
    """Comma-separated six-decimal texts of ``values`` (1-D), ``missing`` for NaN (see :func:`wide_table_lines`)."""
    return b"".join(fixed_decimal_rows(np.reshape(values, (1, -1)), missing, rounding))[:-1].decode("utf-8")


def fixed_decimal_rows(values: NDArray[np.float64], missing: str = "", rounding: str = "decimal") -> Iterator[bytes]:
    """Each row of ``values`` as a line of comma-separated six-decimal texts (UTF-8, every line ending in a newline).

    The cells are spelt as by :func:`fixed_decimals` (see :func:`wide_table_lines`
    for ``missing`` and ``rounding``), a block of rows at a time: each value
    becomes an integer of millionths whose digit groups index lookup tables
    of 4-byte words, and the words' zero padding is dropped in one pass.
    This is numpy work per value and none in Python per value or per row.

    Parameters
    ----------
    values : ndarray, shape (n_rows, n_cells)
    missing : str
        Text of a NaN or infinite cell.
    rounding : {"decimal", "scaled"}

    Returns
    -------
    iterator of bytes
        The text of consecutive blocks of whole lines, ``n_rows`` lines in
        all: a large table is never held whole.
    """
    block = np.asarray(values, dtype=np.float64)
    if block.ndim != 2:
        raise ValueError(f"values must be 2-D (rows of cells); got {block.ndim} dimensions")
    if block.shape[1] == 0:
        return iter([b"\n" * block.shape[0]])
    # Blocks of rows whose temporary arrays stay cache-sized.
    step = max(1, _SPELL_CELLS // block.shape[1])
    return (_spelt_rows(block[start : start + step], missing, rounding) for start in range(0, block.shape[0], step))


def _spelt_rows(block: NDArray[np.float64], missing: str, rounding: str) -> bytes:
    """:func:`fixed_decimal_rows` of a block of rows with at least one cell each."""
    # Huge values overflow to infinity and infinities give NaN here: both are spelt one by one below.
    with np.errstate(over="ignore", invalid="ignore"):
        product = block * 1e6
        scaled = np.rint(product)
        if rounding == "decimal":
            # Where value * 1e6 lies within rounding error of a half, the scaled product may round the other way.
            close = np.abs(np.abs(product - np.floor(product)) - 0.5) <= 2.0 * np.spacing(np.abs(product))
            for i in np.flatnonzero(close & (np.abs(product) < 1e9)).tolist():
                scaled.flat[i] = float(round(Decimal(float(block.flat[i])).scaleb(6).to_integral_value(ROUND_HALF_EVEN)))
    # The tables spell values below 1000 in size; NaN fails both comparisons.
    plain = None if scaled.min() > -1e9 and scaled.max() < 1e9 else np.abs(scaled) < 1e9
    if plain is not None:
        scaled[~plain] = 0.0
    negative = scaled < 0
    millionths = np.abs(scaled).astype(np.uint32)
    thousandths = millionths // 1000
    units = thousandths // 1000
    prefix, high, low = _digit_words()
    words = np.empty((*block.shape, 3), dtype="<u4")  # little-endian, as the tables spell
    words[..., 0] = prefix[units + np.uint32(1000) * negative]
    words[..., 1] = high[thousandths - 1000 * units]
    words[..., 2] = low[millionths - 1000 * thousandths]
    if plain is not None:
        words[~plain] = (0, 0, _COMMA_WORD)
    words[:, -1, 2] ^= _LINE_END
    text = words.tobytes().translate(None, b"\0")
    if plain is None:
        return text
    # Cells the tables cannot spell: values of 1000 and above (rare enough for Python's own formatting) and, unless empty, missing ones.
    spell = ~plain & (np.isfinite(block) | (missing != ""))
    if not spell.any():
        return text
    lines = text.split(b"\n")
    for row in np.flatnonzero(spell.any(axis=1)).tolist():
        cells = lines[row].split(b",")
        for column in np.flatnonzero(spell[row]).tolist():
            value = float(block[row, column])
            with np.errstate(over="ignore"):  # np.round of a value above 1e302 is infinite, as numpy has it
                cells[column] = (_six_decimals(value, rounding) if np.isfinite(value) else missing).encode("utf-8")
        lines[row] = b",".join(cells)
    return b"\n".join(lines)


def _six_decimals(value: float, rounding: str) -> str:
    rounded = float(np.round(value, 6)) if rounding == "scaled" else round(value, 6)
    # Adding 0.0 turns every value that rounds to zero into "0.000000", never "-0.000000".
    return f"{rounded + 0.0:.6f}"


# Cells spelt at once by fixed_decimal_rows: its temporary arrays stay in the cache (twice as fast as 400 x 2,048 at once).
_SPELL_CELLS = 1 << 16
# The comma alone, in the last byte of a word (a cell written empty), and what turns that comma into a line end.
_COMMA_WORD = np.uint32(ord(",") << 24)
_LINE_END = np.uint32((ord(",") ^ ord("\n")) << 24)


@functools.cache
def _digit_words() -> tuple[NDArray[np.uint32], NDArray[np.uint32], NDArray[np.uint32]]:
    """Lookup tables of little-endian 4-byte words.

    ``prefix[u + 1000 * negative]`` spells the sign and the integer part ``u``
    (0-999) right-aligned, zero bytes before it (dropped when the text is
    joined); ``high[i]`` spells ``".iii"`` and ``low[j]`` spells ``"jjj,"``.
    """
    digits = np.array([list(f"{i:03d}".encode()) for i in range(1000)], dtype=np.uint32)
    high = np.uint32(ord(".")) | (digits[:, 0] << 8) | (digits[:, 1] << 16) | (digits[:, 2] << 24)
    low = digits[:, 0] | (digits[:, 1] << 8) | (digits[:, 2] << 16) | _COMMA_WORD
    prefix = np.zeros(2000, dtype=np.uint32)
    for index in range(2000):
        spelt = (("-" if index >= 1000 else "") + str(index % 1000)).encode()
        prefix[index] = sum(byte << (8 * (4 - len(spelt) + k)) for k, byte in enumerate(spelt))
    return prefix, high.astype(np.uint32), low.astype(np.uint32)


_CONCENTRATION_COLUMNS = ("scan", "component", "concentration")
_OPTIONAL_COLUMNS = {"path_length_cm": 1.0, "dilution": 1.0}


def read_concentration_table(path: str | os.PathLike[str]) -> pd.DataFrame:
    """Read a long concentration table.

    Returns
    -------
    pandas.DataFrame
        Columns ``scan, component, concentration, path_length_cm, dilution, line``
        (``line`` is the 1-based line in the file, for messages).
    """
    file = Path(path)
    lines = _content_lines(read_text(file))
    if not lines.texts:
        raise AbsolveError("the table is empty", fix="add a header 'scan,component,concentration' and rows", file=file)
    delimiter = _sniff_delimiter(lines.texts[:3], ".", file, lines.numbers[0]) or ","
    header = [cell.strip().lower() for cell in _split(lines.texts[0], delimiter)]
    missing = [name for name in _CONCENTRATION_COLUMNS if name not in header]
    if missing:
        raise AbsolveError(
            f"the header lacks the column {missing[0]!r} (found: {', '.join(header)})",
            fix="the header must name scan, component, concentration (optional path_length_cm, dilution)",
            file=file,
            line=lines.numbers[0],
        )
    records = []
    for text, number in zip(lines.texts[1:], lines.numbers[1:]):
        cells = [cell.strip() for cell in _split(text, delimiter)]
        if len(cells) != len(header):
            raise AbsolveError(
                f"{len(cells)} cells where the header has {len(header)}", fix="check the row", file=file, line=number
            )
        row = dict(zip(header, cells))
        record: dict[str, object] = {"scan": row["scan"], "component": row["component"], "line": number}
        if not row["scan"] or not row["component"]:
            raise AbsolveError("empty scan or component name", fix="fill in both names", file=file, line=number)
        for name, default in (("concentration", None), *_OPTIONAL_COLUMNS.items()):
            cell = row.get(name, "")
            if cell == "" and default is not None:
                record[name] = default
                continue
            value = _parse_number(cell, ".")
            column = header.index(name) + 1
            if value is None:
                raise AbsolveError(f"{name} {cell!r} is not a number", fix="correct the cell", file=file, line=number, column=column)
            if name == "concentration" and value < 0:
                raise AbsolveError(f"negative concentration {value:g}", fix="concentrations must be >= 0", file=file, line=number, column=column)
            if name != "concentration" and value <= 0:
                raise AbsolveError(f"{name} must be positive; got {value:g}", fix="correct the cell", file=file, line=number, column=column)
            record[name] = value
        records.append(record)
    if not records:
        raise AbsolveError("the table has a header but no rows", fix="add one row per scan and component", file=file)
    import pandas as pd

    frame = pd.DataFrame.from_records(records)
    repeated = frame.duplicated(["scan", "component"])
    if repeated.any():
        bad = frame[repeated].iloc[0]
        raise AbsolveError(
            f"scan {bad['scan']!r} lists component {bad['component']!r} twice",
            fix="give one row per scan and component",
            file=file,
            line=int(bad["line"]),
        )
    for name in _OPTIONAL_COLUMNS:
        differs = frame[name] != frame.groupby("scan", sort=False)[name].transform("first")
        if differs.any():
            bad = frame[differs].iloc[0]
            raise AbsolveError(
                f"scan {bad['scan']!r} has differing {name} values",
                fix=f"use one {name} per scan",
                file=file,
                line=int(bad["line"]),
                column=header.index(name) + 1,
            )
    frame.attrs["source"] = str(file)
    return frame


def concentration_matrix(
    table: pd.DataFrame, scan_names: Sequence[str], components: Sequence[str] | None = None
) -> tuple[NDArray[np.float64], tuple[str, ...]]:
    """Concentrations as a (n_scans, n_components) matrix, zeros where a scan lacks a component.

    Every scan in ``scan_names`` must appear in the table, and every table row
    must name a scan in ``scan_names``.
    """
    source = table.attrs.get("source")
    names = tuple(components) if components is not None else tuple(dict.fromkeys(table["component"]))
    known = set(scan_names)
    unknown = table[~table["scan"].isin(known)]
    if len(unknown):
        row = unknown.iloc[0]
        raise AbsolveError(
            f"scan {row['scan']!r} is not among the scans read",
            fix="check the scan names (column headers) match the table",
            file=source,
            line=int(row["line"]),
        )
    listed = set(table["scan"])
    absent = [name for name in scan_names if name not in listed]
    if absent:
        raise AbsolveError(
            f"scan {absent[0]!r} has no row in the concentration table",
            fix="add its concentrations, or leave the scan out",
            file=source,
        )
    index = {name: i for i, name in enumerate(scan_names)}
    column = {name: j for j, name in enumerate(names)}
    stray = table[~table["component"].isin(column)]
    if len(stray):
        row = stray.iloc[0]
        raise AbsolveError(f"unknown component {row['component']!r}", fix="use one of " + ", ".join(names), file=source, line=int(row["line"]))
    matrix = np.zeros((len(scan_names), len(names)))
    rows = table["scan"].map(index).to_numpy()
    cols = table["component"].map(column).to_numpy()
    matrix[rows, cols] = table["concentration"].to_numpy(dtype=np.float64)
    return matrix, names


def per_scan_value(table: pd.DataFrame, scan_names: Sequence[str], column: str) -> NDArray[np.float64]:
    """One value per scan of ``column`` (``path_length_cm`` or ``dilution``)."""
    first = table.drop_duplicates("scan").set_index("scan")[column]
    return first.reindex(list(scan_names)).to_numpy(dtype=np.float64)
