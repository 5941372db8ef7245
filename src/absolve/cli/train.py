"""``absolve train``: PLS inverse calibration from scans of mixed standards into a model file."""

from __future__ import annotations

from pathlib import Path
from typing import Annotated, Optional

import typer

from ..io.files import check_writable, write_all
from ..io.tables import concentration_matrix, per_scan_value, read_concentration_table, read_scans
from ..units import check_unit
from ._app import app
from ._common import DecimalOption, KeepRangeOption, parse_range, say

# Without --unit the concentrations are taken as mg/L, the unit most dye and
# colour work reports in (common practice, no source); the run says so.
_DEFAULT_UNIT = "mg/L"


@app.command()
def train(
    scans: Annotated[list[Path], typer.Argument(help="Scans of the training standards (tables or JCAMP-DX).", show_default=False)],
    concentrations: Annotated[
        Path, typer.Option("--concentrations", help="Long table scan,component,concentration[,path_length_cm,dilution].")
    ] = ...,  # type: ignore[assignment]
    out: Annotated[Path, typer.Option("--out", help="Model file to write (JSON).")] = ...,  # type: ignore[assignment]
    unit: Annotated[Optional[str], typer.Option("--unit", help="Unit of the table's concentrations (default mg/L).")] = None,
    derivative: Annotated[str, typer.Option("--derivative", help="Savitzky-Golay derivative before PLS: none, first or second.")] = "none",
    window: Annotated[int, typer.Option("--window", help="Savitzky-Golay window in grid points (odd).")] = 11,
    max_components: Annotated[
        Optional[int], typer.Option("--max-components", help="Most latent variables tried (default up to 10).")
    ] = None,
    folds: Annotated[int, typer.Option("--folds", help="Cross-validation folds (at most one per standard).")] = 10,
    wavelength_range: KeepRangeOption = None,
    quantity: Annotated[
        Optional[str], typer.Option("--quantity", help="absorbance, transmittance or percent-transmittance (default absorbance).")
    ] = None,
    decimal: DecimalOption = ".",
    force: Annotated[bool, typer.Option("--force", help="Replace an existing model file.")] = False,
) -> None:
    """Train a PLS model (one per component) on scans of mixed standards; print the RMSECV curve."""
    if unit is None:
        say(f"concentrations taken as {_DEFAULT_UNIT} (give --unit to change)")
    unit_name = check_unit(unit or _DEFAULT_UNIT, parameter="--unit")
    check_writable([out], force=force)
    low, high = parse_range(wavelength_range)
    table = read_concentration_table(concentrations)
    spectra = read_scans(scans, decimal=decimal, quantity=quantity)  # type: ignore[arg-type]
    conc, components = concentration_matrix(table, spectra.names)
    # The table gives each standard's concentration before any dilution for
    # measurement; the model learns the concentration in the cell.
    dilution = per_scan_value(table, spectra.names, "dilution")
    paths = per_scan_value(table, spectra.names, "path_length_cm")
    span = None
    if low is not None or high is not None:
        span = (spectra.wavelengths[0] if low is None else low, spectra.wavelengths[-1] if high is None else high)
    from ..inverse import InverseModel  # loaded by the command that needs it: quick start-up
    from ..io.model_file import model_to_json

    model = InverseModel(
        derivative=derivative,  # type: ignore[arg-type]
        window=window,
        max_components=max_components,
        folds=folds,
        wavelength_range=None if span is None else (float(span[0]), float(span[1])),
    ).fit(spectra, conc / dilution[:, None], components, unit_name, path_length_cm=paths)
    write_all({out: model_to_json(model, inputs=[*scans, concentrations])}, force=force)
    typer.echo(model.report())
    say(f"model written to {out}")
