"""``absolve convert``: JCAMP-DX <-> scan table, optionally transmittance -> absorbance."""

from __future__ import annotations

from pathlib import Path
from typing import Annotated

import typer

from ..errors import AbsolveError
from ..io.files import check_writable, write_all
from ..io.jcamp import read_jcamp, write_jcamp
from ..io.tables import JCAMP_SUFFIXES, format_scan_table, read_scan_table, read_text
from ..spectra import QUANTITIES, Quantity, Spectra
from ._app import app
from ._common import say

_TABLE_SUFFIXES = (".csv", ".tsv", ".txt")
_QUANTITY_COMMENT = "# quantity:"


def _format_of(path: Path, role: str) -> str:
    """``"jcamp"`` or ``"table"`` from the file name's extension."""
    suffix = path.suffix.lower()
    if suffix in JCAMP_SUFFIXES:
        return "jcamp"
    if suffix in _TABLE_SUFFIXES:
        return "table"
    raise AbsolveError(
        f"cannot tell the format of the {role} file {path.name!r} from its extension",
        fix="use " + ", ".join(JCAMP_SUFFIXES) + " for JCAMP-DX or " + ", ".join(_TABLE_SUFFIXES) + " for a scan table",
    )


def _declared_quantity(path: Path) -> Quantity | None:
    """The quantity named on a table's first line (``# quantity: ...``, as this command writes it)."""
    lines = read_text(path).splitlines()
    first = lines[0].strip() if lines else ""
    if not first.lower().startswith(_QUANTITY_COMMENT):
        return None
    named = first[len(_QUANTITY_COMMENT) :].strip()
    if named not in QUANTITIES:
        raise AbsolveError(
            f"the first line names the quantity {named!r}",
            fix="write one of " + ", ".join(QUANTITIES) + ", or pass --quantity",
            file=path,
            line=1,
        )
    return named  # type: ignore[return-value]


def convert_file(source: Path, kind: str, *, quantity: Quantity | None, decimal: str, to_absorbance: bool) -> Spectra:
    """Read ``source`` (a JCAMP-DX file or a scan table) and optionally convert it to absorbance.

    For a table without ``quantity`` the quantity named by a first line
    ``# quantity: ...`` is used, else absorbance.
    """
    if kind == "jcamp":
        spectra = read_jcamp(source, quantity=quantity)
    else:
        spectra = read_scan_table(source, decimal=decimal, quantity=quantity or _declared_quantity(source) or "absorbance")
    return spectra.to_absorbance() if to_absorbance else spectra


@app.command("convert")
def convert(
    source: Annotated[
        Path, typer.Argument(metavar="IN", help="Scan file to read: JCAMP-DX (.jdx, .dx) or a table (.csv, .tsv, .txt).")
    ],
    out: Annotated[Path, typer.Option("--out", help="File to write; its extension picks the format.")],
    quantity: Annotated[
        str | None,
        typer.Option(
            "--quantity",
            help="What the input values are: absorbance, transmittance or percent-transmittance. "
            "Default: the JCAMP-DX ##YUNITS, or a table's '# quantity:' line, else absorbance.",
        ),
    ] = None,
    decimal: Annotated[str, typer.Option("--decimal", help="Decimal mark of an input table ('.' or ',').")] = ".",
    to_absorbance: Annotated[
        bool, typer.Option("--to-absorbance", help="Convert transmittance to absorbance, A = -log10 T.")
    ] = False,
    compress: Annotated[bool, typer.Option("--compress", help="Write JCAMP-DX ordinates in the compressed DIFDUP form.")] = False,
    force: Annotated[bool, typer.Option("--force", help="Replace OUT if it exists.")] = False,
) -> None:
    """Convert scans between JCAMP-DX and a CSV scan table.

    A table gets a first line '# quantity: ...' and 'saturated' cells for unusable
    points; JCAMP-DX gets ##YUNITS and '?' for them. Percent transmittance is
    written to JCAMP-DX as TRANSMITTANCE in 0-1.
    """
    if quantity is not None and quantity not in QUANTITIES:
        raise AbsolveError(f"--quantity {quantity!r} is not known", fix="use one of " + ", ".join(QUANTITIES))
    source_kind = _format_of(source, "input")
    out_kind = _format_of(out, "output")
    check_writable([out], force=force)
    if source_kind == "jcamp" and decimal != ".":
        say("note: --decimal applies to tables; JCAMP-DX numbers always use '.'")
    if out_kind == "table" and compress:
        say("note: --compress applies to JCAMP-DX output only")
    spectra = convert_file(source, source_kind, quantity=quantity, decimal=decimal, to_absorbance=to_absorbance)  # type: ignore[arg-type]
    if out_kind == "jcamp":
        text = write_jcamp(spectra, compress=compress)
    else:
        text = f"{_QUANTITY_COMMENT} {spectra.quantity}\n" + format_scan_table(spectra)
    write_all({out: text}, force=force)
    # write_jcamp stores percent transmittance as the standard's 0-1 transmittance.
    written = "transmittance" if out_kind == "jcamp" and spectra.quantity == "percent-transmittance" else spectra.quantity
    message = f"wrote {out}: {spectra.n_scans} scans x {spectra.n_wavelengths} wavelengths ({written})"
    saturated = spectra.count_saturated()
    if saturated:
        marker = "?" if out_kind == "jcamp" else "'saturated' cells"
        message += f"; {saturated} unusable points written as {marker}"
    say(message)
