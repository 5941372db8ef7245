"""JCAMP-DX spectra: reading and writing the IUPAC open exchange format.

The format is the one described by McDonald & Wilks, Applied Spectroscopy 42
(1988) 151, at version 4.24. A file holds one or more blocks, each running
from ``##TITLE=`` to ``##END=``; a ``##DATA TYPE=LINK`` block wraps several
child blocks. Data come as

- ``##XYDATA=(X++(Y..Y))``: evenly spaced ordinates, each line starting with
  its abscissa, in plain numbers (AFFN) or the compressed ASDF forms
  (SQZ ``@A-Ia-i``, DIF ``%J-Rj-r``, DUP ``S-Zs``, PAC ``+``/``-`` separated);
- ``##XYPOINTS=(XY..XY)``: explicit ``x, y`` pairs for uneven grids.

Both are scaled by ``##XFACTOR`` / ``##YFACTOR``; the true abscissae of
``X++(Y..Y)`` come from ``##FIRSTX``, ``##LASTX`` and ``##NPOINTS``, and the
abscissa written at the start of each line is checked against them.

Reading rules chosen here (the standard leaves them open):

- ``E``/``e`` directly after a number is an exponent only when a sign and a
  digit follow (``1.5E+02``); otherwise it is the SQZ digit 5 (``1E5`` is the
  abscissa 1 followed by the ordinate 55... i.e. ``E5`` = +55).
- A DIF value may not follow the missing-value marker ``?``.
- A file that is not UTF-8 (or UTF-16 with a byte-order mark) is read as
  latin-1; a file holding NUL bytes otherwise is refused as binary.

Writing: one scan gives one block; several scans give a ``LINK`` block with
one child per scan (``##BLOCK_ID=1..n``), the standard's way of putting
several spectra in one file. Ordinates are integers times a power-of-ten
``##YFACTOR`` chosen so that the largest magnitude keeps 6 significant
digits. Percent transmittance is written as ``TRANSMITTANCE`` (0-1), the
unit the standard names.
"""

from __future__ import annotations

import math
import re
import warnings
from dataclasses import dataclass, field
from os import PathLike
from pathlib import Path
from typing import TypeVar

import numpy as np
from numpy.typing import NDArray

from ..errors import AbsolveError
from ..spectra import QUANTITIES, Quantity, Spectra, stack_spectra
from .tables import _wide_text

__all__ = ["read_jcamp", "write_jcamp"]

_MAX_LINE = 80  # the standard's line-length limit
_Unit = TypeVar("_Unit", bound=str)

# Labels compare equal regardless of case, spaces, '-', '/' and '_' (JCAMP-DX 1988, label rules).
_LABEL_NOISE = re.compile(r"[\s\-/_]")
_LABEL_LINE = re.compile(r"##([^=]*)=(.*)")
_DATA_LABELS = ("XYDATA", "XYPOINTS")

_SQZ_POSITIVE = "@ABCDEFGHI"
_SQZ_NEGATIVE = "@abcdefghi"
_DIF_POSITIVE = "%JKLMNOPQR"
_DIF_NEGATIVE = "%jklmnopqr"
_DUP_DIGITS = "STUVWXYZs"  # DUP counts 1..9 as first digit

_TOKEN = re.compile(
    r"(?P<affn>[+-]?(?:\d+\.?\d*|\.\d+)(?:[Ee][+-]\d+)?)"
    r"|(?P<sqz>[@A-Ia-i]\d*(?:\.\d+)?)"
    r"|(?P<dif>[%J-Rj-r]\d*(?:\.\d+)?)"
    r"|(?P<dup>[S-Zs]\d*)"
    r"|(?P<missing>\?)"
    r"|(?P<sep>[\s,;]+)"
)

_X_UNITS: dict[str, str] = {
    "NANOMETERS": "nm",
    "NM": "nm",
    "1/CM": "1/cm",
    "CM-1": "1/cm",
    "MICROMETERS": "um",
    "MICRONS": "um",
    "UM": "um",
}
_Y_UNITS: dict[str, Quantity] = {
    "ABSORBANCE": "absorbance",
    "TRANSMITTANCE": "transmittance",
    "%T": "percent-transmittance",
    "PERCENT TRANSMITTANCE": "percent-transmittance",
    "% TRANSMITTANCE": "percent-transmittance",
}
_WRITTEN_Y_UNITS: dict[str, str] = {
    "absorbance": "ABSORBANCE",
    "transmittance": "TRANSMITTANCE",
    "percent-transmittance": "TRANSMITTANCE",
}
# Above this a "TRANSMITTANCE" block cannot be a 0-1 fraction (common practice, no source).
_PERCENT_THRESHOLD = 1.5


# ----------------------------------------------------------------------------------------------
# Reading
# ----------------------------------------------------------------------------------------------


@dataclass
class _Block:
    """One ``##TITLE= ... ##END=`` block as found in the text, before decoding."""

    first_line: int
    labels: dict[str, tuple[str, int]] = field(default_factory=dict)
    data_label: str | None = None
    data_lines: list[tuple[int, str]] = field(default_factory=list)
    children: list[_Block] = field(default_factory=list)
    last_label: str | None = None

    @property
    def title(self) -> str:
        """First line of ``##TITLE=`` (the scan name), empty when the title is blank."""
        lines = self.labels["TITLE"][0].strip().splitlines()
        return lines[0].strip() if lines else ""


@dataclass(frozen=True)
class _Decoded:
    """One block's spectrum: grid in nm (increasing), values, and what they are."""

    name: str
    line: int  # where the block begins
    grid: NDArray[np.float64]
    values: NDArray[np.float64]
    quantity: Quantity
    percent_guess_line: int | None  # line of ##YUNITS when percent was inferred from the values


def _load_text(path: Path) -> str:
    try:
        raw = path.read_bytes()
    except FileNotFoundError:
        raise AbsolveError("does not exist", fix="check the file name", file=path) from None
    except OSError as error:
        raise AbsolveError(f"cannot read: {error.strerror}", fix="check the file permissions", file=path) from None
    if b"\x00" in raw:
        # UTF-16 (with or without byte-order mark) and UTF-32 exports are text all the same.
        text = _wide_text(raw)
        if text is not None:
            return text
        line = raw[: raw.index(b"\x00")].count(b"\n") + 1
        raise AbsolveError(
            "the file holds binary data (a NUL byte), not JCAMP-DX text",
            fix="export the spectrum as a JCAMP-DX text file (.jdx)",
            file=path,
            line=line,
        )
    try:
        return raw.decode("utf-8-sig")
    except UnicodeDecodeError:
        # JCAMP-DX is ASCII; older files carry latin-1 characters in titles and comments.
        return raw.decode("latin-1")


def _normalise_label(label: str) -> str:
    return _LABEL_NOISE.sub("", label).upper()


def _split_blocks(text: str, path: Path) -> list[_Block]:
    """Split ``text`` into top-level blocks (LINK blocks keep their children)."""
    lines = text.replace("\x1a", "").splitlines()
    if not any(line.strip() for line in lines):
        raise AbsolveError("the file is empty", fix="choose a JCAMP-DX file that holds a spectrum", file=path, line=1)
    stack: list[_Block] = []
    top: list[_Block] = []
    for number, raw_line in enumerate(lines, start=1):
        content = raw_line.split("$$", 1)[0]  # '$$' starts a comment (JCAMP-DX 1988)
        stripped = content.strip()
        if not stripped:
            continue
        if stripped.startswith("##"):
            match = _LABEL_LINE.match(stripped)
            if match is None:
                raise AbsolveError(
                    f"label {stripped[:40]!r} has no '='",
                    fix="write labels as ##NAME=value",
                    file=path,
                    line=number,
                )
            key, value = _normalise_label(match.group(1)), match.group(2).strip()
            if key == "TITLE":
                block = _Block(first_line=number)
                block.labels["TITLE"] = (value, number)
                block.last_label = "TITLE"
                stack.append(block)
                continue
            if not stack:
                raise AbsolveError(
                    f"##{match.group(1)}= appears outside a block",
                    fix="every block must start with ##TITLE= and end with ##END=",
                    file=path,
                    line=number,
                )
            if key == "END":
                finished = stack.pop()
                (stack[-1].children if stack else top).append(finished)
                continue
            block = stack[-1]
            if key in _DATA_LABELS and block.data_label is not None:
                raise AbsolveError(
                    f"second data table (##{match.group(1)}=) in the block begun at line {block.first_line}",
                    fix="give each spectrum its own ##TITLE= ... ##END= block",
                    file=path,
                    line=number,
                )
            block.labels[key] = (value, number)
            block.last_label = key
            if key in _DATA_LABELS:
                block.data_label = key
            continue
        if not stack:
            raise AbsolveError(
                f"text {stripped[:40]!r} outside a block",
                fix="every block must start with ##TITLE= and end with ##END=",
                file=path,
                line=number,
            )
        block = stack[-1]
        if block.last_label in _DATA_LABELS:
            block.data_lines.append((number, stripped))
        else:
            # A value may continue on the following lines until the next label.
            value, where = block.labels[block.last_label]  # type: ignore[index]
            block.labels[block.last_label] = (value + "\n" + stripped, where)  # type: ignore[index]
    if stack:
        raise AbsolveError(
            f"the block {stack[-1].title!r} begun at line {stack[-1].first_line} is not closed by ##END= "
            "(the file looks truncated)",
            fix="copy the whole file again, or add the missing ##END= line",
            file=path,
            line=len(lines),
        )
    if not top:
        raise AbsolveError(
            "no ##TITLE= block found",
            fix="choose a JCAMP-DX file (blocks run from ##TITLE= to ##END=)",
            file=path,
            line=1,
        )
    return top


def _data_blocks(blocks: list[_Block], path: Path, *, inside_link: bool = False) -> list[_Block]:
    """The blocks holding a spectrum, in file order; LINK children without data are skipped."""
    found: list[_Block] = []
    for block in blocks:
        if block.children:
            found.extend(_data_blocks(block.children, path, inside_link=True))
        elif block.data_label is not None:
            found.append(block)
        elif not inside_link:
            raise AbsolveError(
                f"the block {block.title!r} has no ##XYDATA= or ##XYPOINTS= table",
                fix="export the spectrum itself (peak tables are not read)",
                file=path,
                line=block.first_line,
            )
    if not found and not inside_link:
        raise AbsolveError(
            "no ##XYDATA= or ##XYPOINTS= table in the file",
            fix="export the spectrum itself (peak tables are not read)",
            file=path,
            line=blocks[0].first_line,
        )
    return found


def _number(block: _Block, key: str, path: Path, *, default: float | None = None) -> float:
    """A numeric label value, or ``default`` when the label is absent."""
    if key not in block.labels:
        if default is not None:
            return default
        raise AbsolveError(
            f"the block {block.title!r} has no ##{key}= label",
            fix=f"add ##{key}= (it is required for ##{block.data_label}=)",
            file=path,
            line=block.labels[block.data_label][1],  # type: ignore[index]
        )
    text, line = block.labels[key]
    try:
        value = float(text.split()[0]) if text.split() else math.nan
    except ValueError:
        value = math.nan
    if not math.isfinite(value):
        raise AbsolveError(f"##{key}={text!r} is not a number", fix=f"write ##{key}= as a plain number", file=path, line=line)
    if key.endswith("FACTOR") and value == 0:
        raise AbsolveError(f"##{key}=0 would make every value zero", fix=f"write the scale factor ##{key}= that was used", file=path, line=line)
    return value


def _tokens(text: str, path: Path, line: int) -> list[tuple[str, str]]:
    """Split one data line into ``(kind, text)`` tokens, kinds affn/sqz/dif/dup/missing."""
    found: list[tuple[str, str]] = []
    position = 0
    while position < len(text):
        match = _TOKEN.match(text, position)
        if match is None:
            raise AbsolveError(
                f"unexpected character {text[position]!r} in the data",
                fix="data lines may hold only numbers and the JCAMP-DX compression characters",
                file=path,
                line=line,
                column=position + 1,
            )
        kind = match.lastgroup
        if kind != "sep":
            found.append((kind, match.group()))  # type: ignore[arg-type]
        position = match.end()
    return found


def _digit_value(token: str, positive: str, negative: str) -> float:
    """Value of an SQZ or DIF token: its first character stands for a signed digit."""
    lead = token[0]
    if lead in positive:
        return float(str(positive.index(lead)) + token[1:])
    return -float(str(negative.index(lead)) + token[1:])


def _decode_ordinates(tokens: list[tuple[str, str]], path: Path, line: int) -> tuple[list[float], str]:
    """Ordinates of one data line, and the form ("abs" or "dif") of its last value."""
    values: list[float] = []
    mode = "abs"
    for kind, token in tokens:
        if kind == "affn":
            values.append(float(token))
            mode = "abs"
        elif kind == "sqz":
            values.append(_digit_value(token, _SQZ_POSITIVE, _SQZ_NEGATIVE))
            mode = "abs"
        elif kind == "missing":
            values.append(math.nan)
            mode = "abs"
        elif kind == "dif":
            if not values:
                raise AbsolveError(
                    f"the line's first ordinate is the difference {token!r}",
                    fix="each line's first ordinate must be absolute (SQZ or plain)",
                    file=path,
                    line=line,
                )
            if math.isnan(values[-1]):
                raise AbsolveError(
                    f"the difference {token!r} follows a missing value '?'",
                    fix="write the ordinate after '?' as an absolute value",
                    file=path,
                    line=line,
                )
            values.append(values[-1] + _digit_value(token, _DIF_POSITIVE, _DIF_NEGATIVE))
            mode = "dif"
        else:  # DUP: the previous value (or difference) occurs `count` times in all
            count = int(str(_DUP_DIGITS.index(token[0]) + 1) + token[1:])
            if not values or (mode == "dif" and len(values) < 2):
                raise AbsolveError(f"the repeat count {token!r} has nothing to repeat", fix="check the line", file=path, line=line)
            step = values[-1] - values[-2] if mode == "dif" else 0.0
            values.extend((values[-1] + step * np.arange(1, count)).tolist())
    return values, mode


def _decode_xydata(block: _Block, path: Path) -> tuple[NDArray[np.float64], NDArray[np.float64]]:
    """Abscissae (file units, scaled) and ordinates (scaled) of an ``(X++(Y..Y))`` table."""
    form, form_line = block.labels["XYDATA"]
    if form.replace(" ", "").upper() != "(X++(Y..Y))":
        raise AbsolveError(
            f"##XYDATA={form} is not read",
            fix="use the (X++(Y..Y)) form (or ##XYPOINTS=(XY..XY))",
            file=path,
            line=form_line,
        )
    x_factor = _number(block, "XFACTOR", path, default=1.0)
    y_factor = _number(block, "YFACTOR", path, default=1.0)
    first_x = _number(block, "FIRSTX", path)
    last_x = _number(block, "LASTX", path)
    declared = _number(block, "NPOINTS", path)
    n_points = int(declared)
    if n_points != declared or n_points < 1:
        raise AbsolveError(
            f"##NPOINTS={block.labels['NPOINTS'][0]} is not a positive whole number",
            fix="write the number of points",
            file=path,
            line=block.labels["NPOINTS"][1],
        )
    step = (last_x - first_x) / (n_points - 1) if n_points > 1 else 0.0
    if not block.data_lines:
        raise AbsolveError("##XYDATA= is followed by no data lines", fix="the file looks truncated", file=path, line=form_line)

    values: list[float] = []
    ended_in_dif = False  # the Y-check rule applies after a line whose last value was in DIF form
    for line, text in block.data_lines:
        tokens = _tokens(text, path, line)
        kind, x_text = tokens[0]
        if kind not in ("affn", "sqz") or len(tokens) < 2:
            raise AbsolveError(
                f"a data line must be an abscissa followed by ordinates, found {text[:40]!r}",
                fix="check the line was not cut or joined (the file may be truncated)",
                file=path,
                line=line,
            )
        line_values, mode = _decode_ordinates(tokens[1:], path, line)
        index_of_first = len(values)
        if ended_in_dif:
            check = line_values.pop(0)
            if not math.isclose(check, values[-1], rel_tol=1e-9, abs_tol=1e-9):
                raise AbsolveError(
                    f"the Y-check value {check:g} does not repeat the previous line's last ordinate {values[-1]:g}",
                    fix="the data are corrupt; export the file again",
                    file=path,
                    line=line,
                )
            index_of_first -= 1
        line_x = (float(x_text) if kind == "affn" else _digit_value(x_text, _SQZ_POSITIVE, _SQZ_NEGATIVE)) * x_factor
        # Allow the rounding of the abscissa as written plus a quarter step: a point
        # missing or extra before this line then shows whenever the abscissae carry
        # enough digits to tell neighbouring points apart.
        decimals = len(x_text.partition(".")[2]) if kind == "affn" and "e" not in x_text.lower() else 0
        tolerance = 0.5 * 10.0**-decimals * abs(x_factor) + 0.25 * abs(step) + 1e-9 * abs(line_x)
        expected_x = first_x + index_of_first * step
        if abs(line_x - expected_x) > tolerance:
            raise AbsolveError(
                f"the line's abscissa {line_x:g} should be {expected_x:g} (point {index_of_first + 1} of "
                f"##FIRSTX={first_x:g}..##LASTX={last_x:g}, ##NPOINTS={n_points})",
                fix="a point is missing or extra before this line, or FIRSTX/LASTX/NPOINTS are wrong",
                file=path,
                line=line,
            )
        values.extend(line_values)
        ended_in_dif = mode == "dif"
    if len(values) != n_points:
        raise AbsolveError(
            f"decoded {len(values)} ordinates but ##NPOINTS={n_points} (line {block.labels['NPOINTS'][1]})",
            fix="the file looks truncated or ##NPOINTS is wrong",
            file=path,
            line=block.data_lines[-1][0],
        )
    grid = np.linspace(first_x, last_x, n_points)
    return grid, np.asarray(values, dtype=np.float64) * y_factor


def _decode_xypoints(block: _Block, path: Path) -> tuple[NDArray[np.float64], NDArray[np.float64]]:
    """Abscissae and ordinates (scaled) of an ``(XY..XY)`` table."""
    form, form_line = block.labels["XYPOINTS"]
    if form.replace(" ", "").upper() != "(XY..XY)":
        raise AbsolveError(f"##XYPOINTS={form} is not read", fix="use the (XY..XY) form", file=path, line=form_line)
    x_factor = _number(block, "XFACTOR", path, default=1.0)
    y_factor = _number(block, "YFACTOR", path, default=1.0)
    numbers: list[float] = []
    for line, text in block.data_lines:
        for kind, token in _tokens(text, path, line):
            if kind not in ("affn", "missing"):
                raise AbsolveError(
                    f"compressed value {token!r} in an (XY..XY) table",
                    fix="write x, y pairs as plain numbers",
                    file=path,
                    line=line,
                )
            if kind == "missing" and len(numbers) % 2 == 0:
                raise AbsolveError("an abscissa is missing ('?')", fix="every pair needs its x value", file=path, line=line)
            numbers.append(math.nan if kind == "missing" else float(token))
    last_line = block.data_lines[-1][0] if block.data_lines else form_line
    if not numbers or len(numbers) % 2:
        raise AbsolveError(
            f"the (XY..XY) table holds {len(numbers)} numbers, not whole x, y pairs",
            fix="the file looks truncated",
            file=path,
            line=last_line,
        )
    pairs = np.asarray(numbers, dtype=np.float64).reshape(-1, 2)
    if "NPOINTS" in block.labels:
        declared = _number(block, "NPOINTS", path)
        if declared != pairs.shape[0]:
            raise AbsolveError(
                f"decoded {pairs.shape[0]} points but ##NPOINTS={declared:g} (line {block.labels['NPOINTS'][1]})",
                fix="the file looks truncated or ##NPOINTS is wrong",
                file=path,
                line=last_line,
            )
    return pairs[:, 0] * x_factor, pairs[:, 1] * y_factor


def _unit(block: _Block, key: str, known: dict[str, _Unit], path: Path, *, hint: str) -> tuple[_Unit, str, int]:
    """What the unit label ``key`` names (from ``known``), its text and its line."""
    if key not in block.labels:
        raise AbsolveError(
            f"the block {block.title!r} has no ##{key}= label",
            fix=f"add ##{key}={next(iter(known))}{hint}",
            file=path,
            line=block.first_line,
        )
    text, line = block.labels[key]
    found = known.get(" ".join(text.upper().split()))
    if found is None:
        raise AbsolveError(
            f"##{key}={text} is not read",
            fix="use one of " + ", ".join(known) + hint,
            file=path,
            line=line,
        )
    return found, text, line


def _to_nanometres(block: _Block, x: NDArray[np.float64], path: Path) -> NDArray[np.float64]:
    unit, text, line = _unit(block, "XUNITS", _X_UNITS, path, hint="")
    if not np.all(x > 0):
        raise AbsolveError(
            f"an abscissa is zero or negative ({x.min():g} {text})",
            fix="wavelengths and wavenumbers must be positive",
            file=path,
            line=line,
        )
    if unit == "1/cm":
        return 1e7 / x  # nm = 1e7 / wavenumber in cm^-1
    return x * 1000.0 if unit == "um" else x


def _quantity(block: _Block, values: NDArray[np.float64], path: Path) -> tuple[Quantity, int | None]:
    """Quantity named by ``##YUNITS``, and the line when percent was inferred from the values."""
    quantity, _, line = _unit(block, "YUNITS", _Y_UNITS, path, hint=", or pass the quantity (--quantity)")
    if quantity == "transmittance" and np.any(values > _PERCENT_THRESHOLD):
        return "percent-transmittance", line
    return quantity, None


def _decode_block(block: _Block, path: Path, quantity: Quantity | None) -> _Decoded:
    if block.data_label == "XYDATA":
        x, values = _decode_xydata(block, path)
    else:
        x, values = _decode_xypoints(block, path)
    grid = _to_nanometres(block, x, path)
    order = np.argsort(grid, kind="stable")
    grid, values = grid[order], values[order]
    if np.any(np.diff(grid) <= 0):
        raise AbsolveError(
            "two points share one abscissa",
            fix="remove the repeated point",
            file=path,
            line=block.labels[block.data_label][1],  # type: ignore[index]
        )
    guessed_line = None
    if quantity is None:
        quantity, guessed_line = _quantity(block, values, path)
    return _Decoded(block.title, block.first_line, grid, values, quantity, guessed_line)


def _unique_names(names: list[str], fallback: str) -> list[str]:
    """Scan names, with ' #2', ' #3'... added to repeated ones and ``fallback`` for empty ones."""
    seen: dict[str, int] = {}
    unique: list[str] = []
    for name in names:
        base = name or fallback
        seen[base] = seen.get(base, 0) + 1
        unique.append(base if seen[base] == 1 else f"{base} #{seen[base]}")
    return unique


def read_jcamp(path: str | PathLike[str], *, quantity: Quantity | None = None) -> Spectra:
    """Read the spectra of a JCAMP-DX file.

    Parameters
    ----------
    path : str or path-like
        A JCAMP-DX file (``.jdx``, ``.dx``) with one or more blocks, or a
        LINK block holding several.
    quantity : {"absorbance", "transmittance", "percent-transmittance"}, optional
        What the ordinates are. By default ``##YUNITS`` says; given, it
        overrides ``##YUNITS``.

    Returns
    -------
    Spectra
        One scan per data block, named by ``##TITLE`` (repeats get " #2",
        " #3"...), on an increasing grid in nm. When the blocks share one grid
        and one quantity they are kept as read; otherwise they are joined with
        :func:`~absolve.spectra.stack_spectra` (interpolated onto the overlap
        and converted to absorbance).

    Raises
    ------
    AbsolveError
        For anything malformed, naming the file and line.

    Warns
    -----
    UserWarning
        When ``##YUNITS=TRANSMITTANCE`` but the values exceed 1.5: they are
        read as percent transmittance.

    Examples
    --------
    >>> scans = read_jcamp("dye.jdx")  # doctest: +SKIP
    >>> scans.quantity  # doctest: +SKIP
    'absorbance'
    """
    if quantity is not None and quantity not in QUANTITIES:
        raise AbsolveError(f"unknown quantity {quantity!r}", fix="use one of " + ", ".join(QUANTITIES))
    file = Path(path)
    blocks = _data_blocks(_split_blocks(_load_text(file), file), file)
    decoded = [_decode_block(block, file, quantity) for block in blocks]
    for part in decoded:
        if part.percent_guess_line is not None:
            warnings.warn(
                f"{file}:{part.percent_guess_line}: ##YUNITS=TRANSMITTANCE but the values of {part.name!r} reach "
                f"{np.nanmax(part.values):g}; read as percent transmittance",
                UserWarning,
                stacklevel=2,
            )
    names = _unique_names([part.name for part in decoded], file.stem)
    source = str(file)
    first = decoded[0]
    same_grid = all(
        part.grid.shape == first.grid.shape and np.allclose(part.grid, first.grid, rtol=1e-12, atol=0) for part in decoded
    )
    if same_grid and all(part.quantity == first.quantity for part in decoded):
        return Spectra(first.grid, np.vstack([part.values for part in decoded]), names, first.quantity, source)
    low, high = first.grid[0], first.grid[-1]
    for part in decoded[1:]:
        low, high = max(low, part.grid[0]), min(high, part.grid[-1])
        if not np.any((first.grid >= low) & (first.grid <= high)):
            raise AbsolveError(
                f"the block {part.name!r} ({part.grid[0]:g}-{part.grid[-1]:g} nm) leaves no wavelength of the first "
                f"block common to all blocks before it",
                fix="split the file, or keep only blocks covering the same wavelengths",
                file=file,
                line=part.line,
            )
    batches = [
        Spectra(part.grid, part.values, [name], part.quantity, source) for part, name in zip(decoded, names, strict=True)
    ]
    return stack_spectra(batches)


# ----------------------------------------------------------------------------------------------
# Writing
# ----------------------------------------------------------------------------------------------


def _signed_digit_token(value: int, positive: str, negative: str) -> str:
    digits = str(abs(value))
    table = positive if value >= 0 else negative
    return table[int(digits[0])] + digits[1:]


def _dup_token(count: int) -> str:
    digits = str(count)
    return _DUP_DIGITS[int(digits[0]) - 1] + digits[1:]


def _y_factor(values: NDArray[np.float64]) -> float:
    """Power of ten that leaves the largest magnitude with 6 significant digits as an integer."""
    finite = np.abs(values[np.isfinite(values)])
    largest = float(finite.max()) if finite.size else 0.0
    if largest == 0.0:
        return 1.0
    return 10.0 ** (math.floor(math.log10(largest)) - 5)


def _x_text(x: float) -> str:
    return f"{x:.10g}"


def _affn_lines(grid: NDArray[np.float64], ints: list[int | None]) -> list[str]:
    """``X++(Y..Y)`` lines in plain numbers, each at most 80 characters."""
    lines: list[str] = []
    index = 0
    while index < len(ints):
        line = _x_text(grid[index])
        while index < len(ints):
            token = " " + ("?" if ints[index] is None else str(ints[index]))
            if len(line) + len(token) > _MAX_LINE and " " in line:
                break
            line += token
            index += 1
        lines.append(line)
    return lines


def _difdup_lines(grid: NDArray[np.float64], ints: list[int | None]) -> list[str]:
    """``X++(Y..Y)`` lines in DIFDUP form with Y-check values (JCAMP-DX 1988 compression rules).

    Each line starts with an absolute (SQZ) ordinate; later ordinates are
    differences (DIF), runs of equal differences are folded with a repeat
    count (DUP). When a line ends in DIF form the next line begins by
    repeating that last ordinate as a check, and a final check line closes
    the table.
    """
    n = len(ints)
    lines: list[str] = []
    start = 0
    while True:
        first = ints[start]
        line = _x_text(grid[start]) + " " + ("?" if first is None else _signed_digit_token(first, _SQZ_POSITIVE, _SQZ_NEGATIVE))
        index = start + 1
        ended_in_dif = False
        while index < n:
            current, previous = ints[index], ints[index - 1]
            if current is None or previous is None:
                token = "?" if current is None else _signed_digit_token(current, _SQZ_POSITIVE, _SQZ_NEGATIVE)
                run, is_dif = 1, False
            else:
                difference = current - previous
                run = 1
                while (
                    index + run < n
                    and ints[index + run] is not None
                    and ints[index + run] - ints[index + run - 1] == difference  # type: ignore[operator]
                ):
                    run += 1
                token = _signed_digit_token(difference, _DIF_POSITIVE, _DIF_NEGATIVE)
                if run > 1:
                    token += _dup_token(run)
                is_dif = True
            if len(line) + len(token) > _MAX_LINE:
                break
            line += token
            index += run
            ended_in_dif = is_dif
        lines.append(line)
        if ended_in_dif:
            start = index - 1  # the next line repeats the last ordinate as its Y-check
            if index == n:
                check = ints[start]
                lines.append(_x_text(grid[start]) + " " + _signed_digit_token(check, _SQZ_POSITIVE, _SQZ_NEGATIVE))  # type: ignore[arg-type]
                break
        else:
            start = index
            if index == n:
                break
    return lines


def _block(
    name: str,
    grid: NDArray[np.float64],
    values: NDArray[np.float64],
    y_units: str,
    *,
    compress: bool,
    block_id: int | None,
) -> list[str]:
    y_factor = _y_factor(values)
    scaled = np.rint(values / y_factor)
    ints: list[int | None] = [None if not math.isfinite(v) else int(v) for v in scaled]
    n = grid.size
    step = (grid[-1] - grid[0]) / (n - 1) if n > 1 else 0.0
    even = n == 1 or bool(np.all(np.abs(grid - np.linspace(grid[0], grid[-1], n)) <= 1e-6 * abs(step)))
    first_y = "?" if ints[0] is None else f"{ints[0] * y_factor:.10g}"
    header = [
        f"##TITLE={' '.join(name.split())}",
        "##JCAMP-DX=4.24",
        "##DATA TYPE=UV/VIS SPECTRUM",
        "##ORIGIN=absolve",
        "##OWNER=",
    ]
    if block_id is not None:
        header.append(f"##BLOCK_ID={block_id}")
    header += [
        "##XUNITS=NANOMETERS",
        f"##YUNITS={y_units}",
        "##XFACTOR=1",
        f"##YFACTOR={y_factor!r}",
        f"##FIRSTX={float(grid[0])!r}",
        f"##LASTX={float(grid[-1])!r}",
    ]
    if even:
        header.append(f"##DELTAX={step:.10g}")
    header += [f"##NPOINTS={n}", f"##FIRSTY={first_y}"]
    if even:
        table = ["##XYDATA=(X++(Y..Y))"]
        table += _difdup_lines(grid, ints) if compress else _affn_lines(grid, ints)
    else:
        table = ["##XYPOINTS=(XY..XY)"]
        table += [f"{float(x)!r}, {'?' if y is None else y}" for x, y in zip(grid, ints, strict=True)]
    return header + table + ["##END="]


def write_jcamp(spectra: Spectra, *, compress: bool = False) -> str:
    """Text of a JCAMP-DX 4.24 file holding ``spectra``.

    Parameters
    ----------
    spectra : Spectra
        Scans to write, shape (n_scans, n_wavelengths). NaN points are
        written as the standard's missing-value marker ``?``.
    compress : bool, default False
        Write ordinates in the compressed DIFDUP form instead of plain numbers.

    Returns
    -------
    str
        One block for a single scan; for several scans a ``LINK`` block with
        one child block per scan. An evenly spaced grid is written as
        ``##XYDATA=(X++(Y..Y))``, an uneven one as ``##XYPOINTS=(XY..XY)``.
        Ordinates are rounded to integers times ``##YFACTOR`` (6 significant
        digits for the largest magnitude); abscissae are exact in
        ``##FIRSTX``/``##LASTX`` (even grids) or in each pair (uneven grids).
        Percent transmittance is written as ``TRANSMITTANCE`` in 0-1.

    Examples
    --------
    >>> text = write_jcamp(Spectra([400, 401, 402], [[0.5, 0.25, 0.125]], ["dye"]))
    >>> text.splitlines()[0], text.splitlines()[-2]
    ('##TITLE=dye', '400 500000 250000 125000')
    """
    values = spectra.values / 100.0 if spectra.quantity == "percent-transmittance" else spectra.values
    y_units = _WRITTEN_Y_UNITS[spectra.quantity]
    if spectra.n_scans == 1:
        lines = _block(spectra.names[0], spectra.wavelengths, values[0], y_units, compress=compress, block_id=None)
    else:
        # The title names the source files, not their folders: the same scans converted anywhere give the same bytes.
        title = ", ".join(Path(part).name for part in spectra.source.split(", ")) if spectra.source else "absolve scans"
        lines = [
            f"##TITLE={' '.join(title.split())}",
            "##JCAMP-DX=4.24",
            "##DATA TYPE=LINK",
            f"##BLOCKS={spectra.n_scans}",
        ]
        for number, (name, row) in enumerate(zip(spectra.names, values, strict=True), start=1):
            lines += _block(name, spectra.wavelengths, row, y_units, compress=compress, block_id=number)
        lines.append("##END=")
    return "\n".join(lines) + "\n"
