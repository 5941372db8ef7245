"""``absolve plan``: choose analytical wavelengths (or scan windows) for a library's components."""

from __future__ import annotations

import json
import math
from pathlib import Path
from typing import Annotated, Optional

import typer

from ..errors import AbsolveError
from ..io.files import check_writable, write_all
from ..io.library_file import read_library
from ..report.plan_figure import FIGURE_FORMATS, render_plan_figure
from ._app import app
from ._common import parse_range, say


def _parse_expected(items: list[str]) -> dict[str, float]:
    """``NAME=CONC`` options into a mapping (the last '=' splits, so names may hold '=')."""
    expected: dict[str, float] = {}
    for item in items:
        name, sep, value = item.rpartition("=")
        if not sep or not name.strip():
            raise AbsolveError(f"--expected {item!r} is not of the form NAME=CONC", fix="write e.g. --expected tartrazine=2.5")
        try:
            number = float(value)
        except ValueError:
            raise AbsolveError(f"--expected {item!r}: {value!r} is not a number", fix="write e.g. --expected tartrazine=2.5") from None
        if not (math.isfinite(number) and number > 0):
            raise AbsolveError(f"--expected {item!r}: the concentration must be above zero", fix="write e.g. --expected tartrazine=2.5")
        if name.strip() in expected:
            raise AbsolveError(f"--expected names {name.strip()!r} twice", fix="give each component once")
        expected[name.strip()] = number
    return expected


@app.command()
def plan(
    library: Annotated[Path, typer.Option("--library", help="Library file (JSON) from 'absolve calibrate'.")] = ...,  # type: ignore[assignment]
    count: Annotated[int, typer.Option("--count", help="Wavelengths to choose (with --window: scan windows, 1 to 3).")] = ...,  # type: ignore[assignment]
    expected: Annotated[
        Optional[list[str]],
        typer.Option("--expected", help="Expected concentration NAME=CONC in the library's unit (repeat per component)."),
    ] = None,
    wavelength_range: Annotated[Optional[str], typer.Option("--range", help="Candidate wavelengths LOW:HIGH nm.")] = None,
    max_absorbance: Annotated[
        float, typer.Option("--max-absorbance", help="Ceiling on the expected mixture's absorbance (1 cm) at chosen wavelengths.")
    ] = 1.5,
    min_separation: Annotated[float, typer.Option("--min-separation", help="Least distance between chosen wavelengths, nm.")] = 0.0,
    criterion: Annotated[
        str, typer.Option("--criterion", help="worst-relative (default), condition or d-optimal.")
    ] = "worst-relative",
    window: Annotated[
        Optional[float], typer.Option("--window", help="Plan contiguous scan windows at least this wide (nm) instead.")
    ] = None,
    search: Annotated[
        str, typer.Option("--search", help="auto (exact up to 4 wavelengths among up to 600 candidates), exact or greedy.")
    ] = "auto",
    as_json: Annotated[bool, typer.Option("--json", help="Print the plan as one JSON object.")] = False,
    figure: Annotated[
        Optional[Path], typer.Option("--figure", help="Write a plot of the library with the plan marked (.png or .svg).")
    ] = None,
    force: Annotated[bool, typer.Option("--force", help="Replace an existing figure file.")] = False,
) -> None:
    """Choose the analytical wavelengths that measure the library's components most precisely."""
    figure_format = None
    if figure is not None:
        figure_format = figure.suffix.lower().lstrip(".")
        if figure_format not in FIGURE_FORMATS:
            raise AbsolveError(
                f"--figure {figure}: cannot tell the image format from {figure.suffix or 'no extension'!r}",
                fix="end the file name in " + " or ".join("." + f for f in FIGURE_FORMATS),
            )
        check_writable([figure], force=force)
    low, high = parse_range(wavelength_range)
    concentrations = _parse_expected(expected or [])
    reference = read_library(library)
    from ..planning import plan_wavelengths  # loaded by the command that needs it: quick start-up

    result = plan_wavelengths(
        reference,
        count,
        expected=concentrations,
        wavelength_range=(low, high),
        max_absorbance=max_absorbance,
        min_separation_nm=min_separation,
        criterion=criterion,  # type: ignore[arg-type]
        window_nm=window,
        search=search,  # type: ignore[arg-type]
    )
    if figure is not None and figure_format is not None:
        write_all({figure: render_plan_figure(result, reference, figure_format)}, force=force)
    typer.echo(json.dumps(result.summary(), indent=2, allow_nan=False) if as_json else result.report())
    if figure is not None:
        say(f"figure written to {figure}")
