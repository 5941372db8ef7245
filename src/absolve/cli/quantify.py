"""``absolve quantify``: concentrations of the library's components in sample scans."""

from __future__ import annotations

from pathlib import Path
from typing import Annotated, Optional

import typer

from ..errors import AbsolveError
from ..render import ProgressLine
from ._app import app
from ._common import BaselineOption, DecimalOption, FitRangeOption, LearnLibraryErrorOption, PathLengthOption, QuantityOption, parse_range


@app.command()
def quantify(
    scans: Annotated[list[Path], typer.Argument(help="Sample scan files (tables or JCAMP-DX).", show_default=False)],
    out: Annotated[Path, typer.Option("--out", help="Folder for results.csv, fit.csv, results.json, report.html.")],
    library: Annotated[Optional[Path], typer.Option("--library", help="Library file from 'absolve calibrate'.")] = None,
    model: Annotated[Optional[Path], typer.Option("--model", help="PLS model file from 'absolve train' (with --library too: both results compared).")] = None,
    baseline: BaselineOption = "offset",
    wavelength_range: FitRangeOption = None,
    path_length: PathLengthOption = 1.0,
    dilution: Annotated[float, typer.Option("--dilution", help="Dilution factor of the samples before scanning.")] = 1.0,
    path_tolerance: Annotated[float, typer.Option("--path-length-tolerance", help="Relative standard uncertainty of the path length.")] = 0.0,
    dilution_tolerance: Annotated[float, typer.Option("--dilution-tolerance", help="Relative standard uncertainty of the dilution.")] = 0.0,
    ceiling: Annotated[float, typer.Option("--ceiling", help="Instrument ceiling: absorbance above it is not used.")] = 2.0,
    quantity: QuantityOption = None,
    decimal: DecimalOption = ".",
    blank: Annotated[Optional[Path], typer.Option("--blank", help="Blank scan(s) to subtract first.")] = None,
    figures: Annotated[Optional[str], typer.Option("--figures", help="Also save the report's figures as png or svg files in OUT/figures/.")] = None,
    detail: Annotated[int, typer.Option("--detail", help="Draw the first N scans in detail (and up to N flagged ones).")] = 12,
    spectra: Annotated[bool, typer.Option("--spectra/--no-spectra", help="Write fitted.csv and residuals.csv (as large as the scans themselves).")] = True,
    learn_library_error: LearnLibraryErrorOption = False,
    force: Annotated[bool, typer.Option("--force", help="Replace existing result files.")] = False,
    quiet: Annotated[bool, typer.Option("--quiet", "-q", help="Print nothing but errors (no progress line either).")] = False,
    as_json: Annotated[bool, typer.Option("--json", help="Print the results as JSON instead of a table.")] = False,
) -> None:
    """Quantify each component in every scan, with uncertainties, diagnostics and a report."""
    if library is None and model is None:
        raise AbsolveError("quantify needs --library, --model, or both (to compare them)", fix="e.g. --library lib.json")
    from ..workflow import QuantifyRequest, run_quantify  # loaded by the command that needs it: quick start-up

    request = QuantifyRequest(
        scans=list(scans), out=out, library=library, model=model, baseline=baseline,
        wavelength_range=parse_range(wavelength_range), path_length=path_length, dilution=dilution,
        path_length_tolerance=path_tolerance, dilution_tolerance=dilution_tolerance, ceiling=ceiling,
        quantity=quantity, decimal=decimal, blank=blank, force=force, figures=figures, detail=detail, spectra=spectra,
        learn_library_error=learn_library_error,
    )
    # Progress goes to stderr and only to a terminal, so --json output on stdout stays pure JSON.
    with ProgressLine(quiet=quiet) as progress:
        outcome = run_quantify(request, progress)
    if not quiet:
        typer.echo(outcome.json_text if as_json else outcome.text)
