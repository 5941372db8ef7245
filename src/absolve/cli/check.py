"""``absolve check``: a detailed interferent screen of every scan, with candidate suspects."""

from __future__ import annotations

import csv
import io
import json
import re
from pathlib import Path
from typing import TYPE_CHECKING, Annotated, Optional

import typer

from ..io.files import check_writable, write_all
from ..io.library_file import read_library
from ..io.tables import read_scans
from ..render import ProgressLine, format_table, library_error_lines
from ..spectra import Spectra
from ._app import app
from ._common import BaselineOption, DecimalOption, FitRangeOption, LearnLibraryErrorOption, PathLengthOption, QuantityOption, parse_range

if TYPE_CHECKING:
    from ..checking import CheckResult


@app.command()
def check(
    scans: Annotated[list[Path], typer.Argument(help="Scan files to check (tables or JCAMP-DX).", show_default=False)],
    library: Annotated[Path, typer.Option("--library", help="Library file from 'absolve calibrate'.")],
    out: Annotated[Optional[Path], typer.Option("--out", help="Folder for check.csv and a residual plot per flagged scan.")] = None,
    suspects: Annotated[Optional[Path], typer.Option("--suspects", help="Candidate interferents: a scan table / JCAMP-DX (absorbance per unit per cm) or a library file.")] = None,
    baseline: BaselineOption = "offset",
    wavelength_range: FitRangeOption = None,
    path_length: PathLengthOption = 1.0,
    alpha: Annotated[float, typer.Option("--alpha", help="False-alarm rate of the screen.")] = 0.05,
    learn_library_error: LearnLibraryErrorOption = False,
    quantity: QuantityOption = None,
    decimal: DecimalOption = ".",
    force: Annotated[bool, typer.Option("--force", help="Replace existing check files.")] = False,
    as_json: Annotated[bool, typer.Option("--json", help="Print the verdicts as JSON.")] = False,
) -> None:
    """Tell, scan by scan, whether something the library does not explain is present, where, and what it looks like."""
    if out is not None:
        check_writable([out / "check.csv"], force=force)
    from ..checking import check_scans  # loaded by the command that needs it: quick start-up

    # Progress goes to stderr and only to a terminal: a large batch's plots take a while.
    with ProgressLine() as progress:
        progress("reading", 0, 0)
        reference = read_library(library)
        spectra = read_scans(scans, decimal=decimal, quantity=quantity)  # type: ignore[arg-type]
        candidates = _read_suspects(suspects, decimal) if suspects is not None else None
        progress(f"screening {spectra.values.shape[0]} scans", 0, 0)
        result = check_scans(
            spectra, reference, suspects=candidates, baseline=baseline,  # type: ignore[arg-type]
            wavelength_range=parse_range(wavelength_range), path_length=path_length, alpha=alpha,
            learn_library_error=learn_library_error,
        )
        rows = result.rows()
        if out is not None:
            files: dict[Path, str | bytes] = {out / "check.csv": _check_csv(rows)}
            from ..report.residual_figure import residual_pngs

            flagged = [i for i, row in enumerate(rows) if row["interferent"]]
            images = residual_pngs(
                result.mixture, flagged, reference.noise, progress=lambda done, total: progress("drawing residual plots", done, total)
            )
            files.update((out / f"residual-{_safe(rows[i]['scan'])}.png", image) for i, image in zip(flagged, images, strict=True))
            progress("writing files", 0, 0)
            write_all(files, force=force)
    typer.echo(json.dumps(rows, indent=1) if as_json else _table(result, rows))


def _read_suspects(path: Path, decimal: str) -> Spectra:
    if path.suffix.lower() == ".json":
        candidates = read_library(path)
        return Spectra(candidates.wavelengths, candidates.absorptivity, candidates.names, source=str(path))
    return read_scans([path], decimal=decimal)


def _safe(name: str) -> str:
    return re.sub(r"[^A-Za-z0-9._-]+", "_", name)[:80] or "scan"


def _check_csv(rows: list[dict]) -> str:
    buffer = io.StringIO()
    columns = list(rows[0]) if rows else ["scan"]
    writer = csv.DictWriter(buffer, fieldnames=columns, lineterminator="\n")
    writer.writeheader()
    for row in rows:
        writer.writerow({key: _cell(value) for key, value in row.items()})
    return buffer.getvalue()


def _cell(value: object) -> str:
    if value is None:
        return ""
    if isinstance(value, bool):
        return "true" if value else "false"
    if isinstance(value, float):
        return f"{value:.6g}"
    if isinstance(value, list):
        return "-".join(f"{v:g}" for v in value)
    return str(value)


def _table(result: CheckResult, rows: list[dict]) -> str:
    headers = ["scan", "verdict", "p", "rms resid", "what it looks like", "where (nm)", "size (A)"]
    if result.suspects is not None:
        headers += ["best suspect", "amount ± se", "suspect p"]
    body = []
    for row in rows:
        cells = [
            row["scan"], "INTERFERENT" if row["interferent"] else "clean", _cell(row["p_value"]), _cell(row["rms_residual"]),
            f"{row['diagnosis']} ({row['confidence']})" if row["diagnosis"] else "-",
            _cell(row["window_nm"]) or "-", _cell(row["unexplained_absorbance"]) or "-",
        ]
        if result.suspects is not None:
            amount = row.get("suspect_amount")
            cells += [row.get("suspect") or "none", "-" if amount is None else f"{amount:.4g} ± {row['suspect_amount_se']:.2g}", _cell(row.get("suspect_p_value")) or "-"]
        body.append(cells)
    lines = [format_table(headers, body, align="ll" + "r" * (len(headers) - 2))]
    flagged = [row for row in rows if row["interferent"] and row["message"]]
    for row in flagged:
        lines.append(f"{row['scan']}: {row['message']}")
    screening = result.mixture.screening
    lines.append(f"Screen: {screening.method}; false-alarm rate {screening.alpha:g}. {screening.batch_note()}")
    lines.extend(library_error_lines(result.mixture))
    return "\n".join(lines)
