"""``absolve calibrate``: standards (or known absorptivities) into a library file."""

from __future__ import annotations

from pathlib import Path
from typing import Annotated, Optional

import numpy as np
import typer

from ..errors import AbsolveError
from ..io.files import check_writable, write_all
from ..io.library_file import MAX_ABSORPTIVITY, library_to_json
from ..io.tables import WideTable, concentration_matrix, per_scan_value, read_concentration_table, read_scans, read_wide_table
from ..library import ReferenceLibrary, library_from_absorptivities
from ..render import library_report
from ..units import check_unit
from ._app import app
from ._common import DecimalOption, KeepRangeOption, QuantityOption, parse_range, provenance


@app.command()
def calibrate(
    scans: Annotated[Optional[list[Path]], typer.Argument(help="Standard scan files (tables or JCAMP-DX).", show_default=False)] = None,
    standards: Annotated[Optional[Path], typer.Option("--standards", help="Long table scan,component,concentration[,path_length_cm,dilution].")] = None,
    absorptivities: Annotated[Optional[Path], typer.Option("--absorptivities", help="Wide table of known absorptivities (wavelength, one column per component).")] = None,
    unit: Annotated[str, typer.Option("--unit", help="Concentration unit: mol/L, mmol/L, umol/L, g/L, mg/L, ug/L.")] = ...,  # type: ignore[assignment]
    out: Annotated[Path, typer.Option("--out", help="Library file to write (JSON).")] = ...,  # type: ignore[assignment]
    blank: Annotated[Optional[Path], typer.Option("--blank", help="Blank scan(s) to subtract from every standard.")] = None,
    wavelength_range: KeepRangeOption = None,
    quantity: QuantityOption = None,
    decimal: DecimalOption = ".",
    molar_mass: Annotated[Optional[list[str]], typer.Option("--molar-mass", help="NAME=G_PER_MOL, repeatable.")] = None,
    tolerance: Annotated[float, typer.Option("--linearity-tolerance", help="Relative departure from the line that ends the working range.")] = 0.01,
    force: Annotated[bool, typer.Option("--force", help="Replace an existing library file.")] = False,
    as_json: Annotated[bool, typer.Option("--json", help="Print the summary as JSON.")] = False,
) -> None:
    """Build a reference library from standards, or from known absorptivities."""
    unit = check_unit(unit, parameter="--unit")
    if not 0 < tolerance < 0.5:
        raise AbsolveError(f"--linearity-tolerance {tolerance:g} must lie between 0 and 0.5", fix="e.g. 0.01 for a 1 % departure")
    check_writable([out], force=force)
    masses = _parse_masses(molar_mass or [])
    low, high = parse_range(wavelength_range)
    options = {"unit": unit, "range": wavelength_range, "quantity": quantity, "linearity_tolerance": tolerance}
    if absorptivities is not None:
        if standards is not None or scans:
            raise AbsolveError("--absorptivities builds a library without standards", fix="give either scans with --standards, or --absorptivities")
        table = read_wide_table(absorptivities, decimal=decimal, what="component")
        _check_plausible(table, absorptivities)
        library = library_from_absorptivities(
            table.grid, table.columns, table.names, unit, molar_masses=masses, provenance=provenance([absorptivities], options)
        )
    else:
        if standards is None or not scans:
            raise AbsolveError("calibrate needs standard scans and --standards TABLE", fix="e.g. absolve calibrate standards.csv --standards conc.csv --unit mg/L --out lib.json")
        library = _from_standards(scans, standards, unit, blank, low, high, quantity, decimal, masses, tolerance, options)
    write_all({out: library_to_json(library)}, force=force)
    _print_summary(library, out, as_json)


def _from_standards(scans, standards, unit, blank, low, high, quantity, decimal, masses, tolerance, options) -> ReferenceLibrary:  # type: ignore[no-untyped-def]
    spectra = read_scans(scans, decimal=decimal, quantity=quantity)  # type: ignore[arg-type]
    inputs = [*scans, standards]
    if blank is not None:
        spectra = spectra.subtract_blank(read_scans([blank], decimal=decimal, quantity=quantity))  # type: ignore[arg-type]
        inputs.append(blank)
    if low is not None or high is not None:
        spectra = spectra.restrict(low, high)
    table = read_concentration_table(standards)
    conc, components = concentration_matrix(table, spectra.names)
    dilution = per_scan_value(table, spectra.names, "dilution")
    paths = per_scan_value(table, spectra.names, "path_length_cm")
    from ..calibration import calibrate as fit_library  # scipy-heavy: loaded only when standards are fitted

    try:
        return fit_library(
            spectra, conc / dilution[:, None], components, unit,
            path_lengths=paths, molar_masses=masses, linearity_tolerance=tolerance, provenance=provenance(inputs, options),
        )
    except AbsolveError as error:
        # What the standards cannot support (a single level, proportional mixtures) is fixed in the table.
        raise error.located(standards) from None


def _check_plausible(table: WideTable, file: Path) -> None:
    """Refuse absorptivities no absorber has (a unit slip, or a pasted wrong column) with their cell."""
    magnitude = np.abs(table.columns)
    if np.nanmax(magnitude, initial=0.0) > MAX_ABSORPTIVITY:
        column, row = np.unravel_index(int(np.nanargmax(magnitude)), magnitude.shape)
        raise AbsolveError(
            f"absorptivity {table.columns[column, row]:g} is beyond any absorber's (at most {MAX_ABSORPTIVITY:g} per unit per cm)",
            fix="check the table holds absorbance per (unit concentration x 1 cm) in the --unit given",
            file=file,
            line=int(table.lines[row]),
            column=int(column) + 2,
        )


def _parse_masses(items: list[str]) -> dict[str, float]:
    masses: dict[str, float] = {}
    for item in items:
        name, _, value = item.partition("=")
        try:
            mass = float(value)
        except ValueError:
            mass = float("nan")
        if not name or not mass > 0:
            raise AbsolveError(f"--molar-mass {item!r} is not NAME=G_PER_MOL with a positive number", fix="write e.g. --molar-mass RM-207=812.6")
        masses[name.strip()] = mass
    return masses


def _print_summary(library: ReferenceLibrary, out: Path, as_json: bool) -> None:
    import json

    if as_json:
        typer.echo(json.dumps(library.summary(), indent=1))
    else:
        typer.echo(library_report(library))
        typer.echo(f"library written to {out}")
