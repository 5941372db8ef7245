"""``absolve demo``: the whole job on the bundled, invented dye-house data."""

from __future__ import annotations

from pathlib import Path
from typing import Annotated

import typer

from ..io.files import check_writable, write_all
from ..io.library_file import library_to_json
from ..io.tables import concentration_matrix, per_scan_value, read_concentration_table, read_scans
from ..render import library_report
from ._app import app
from ._common import provenance

PLAN_COUNT = 3  # a three-filter photometer: one wavelength per dye


@app.command()
def demo(
    out: Annotated[Path, typer.Option("--out", help="Folder for the demo's library, model, results and report.")] = Path("absolve-demo"),
    force: Annotated[bool, typer.Option("--force", help="Replace the results of an earlier demo run.")] = False,
) -> None:
    """Calibrate the bundled standards, plan wavelengths, quantify the bundled bath samples, write the report."""
    # The whole tool is needed here; loading it inside keeps every other command's start-up quick.
    from ..calibration import calibrate as fit_library
    from ..demo_data import DEMO_UNIT, demo_files
    from ..inverse import InverseModel
    from ..io.model_file import model_to_json
    from ..planning import plan_wavelengths
    from ..report.figures import figure_svg
    from ..report.html import plan_section
    from ..workflow import RESULT_FILES, QuantifyRequest, run_quantify

    files = demo_files()
    library_path, model_path = out / "library.json", out / "model.json"
    check_writable([library_path, model_path, *(out / name for name in RESULT_FILES)], force=force)
    typer.echo(f"Demo: a dye-house lab checks trichromatic exhaust baths (invented dyes and data, from {files.standards.parent.parent}).\n")
    standards = read_scans([files.standards])
    table = read_concentration_table(files.standards_concentrations)
    conc, components = concentration_matrix(table, standards.names)
    conc = conc / per_scan_value(table, standards.names, "dilution")[:, None]
    paths = per_scan_value(table, standards.names, "path_length_cm")
    inputs = [files.standards, files.standards_concentrations]
    library = fit_library(
        standards, conc, components, DEMO_UNIT, path_lengths=paths, provenance=provenance(inputs, {"unit": DEMO_UNIT})
    )
    typer.echo("Step 1: calibrate the standards into a reference library\n")
    typer.echo(library_report(library))

    typer.echo(f"\nStep 2: the best {PLAN_COUNT} wavelengths for a filter photometer measuring these dyes\n")
    plan = plan_wavelengths(library, PLAN_COUNT)
    typer.echo(plan.report())

    typer.echo("\nStep 3: a PLS model from the same standards, as a cross-check of the library\n")
    model = InverseModel().fit(standards, conc, components, DEMO_UNIT, path_length_cm=paths)
    typer.echo(model.report())
    write_all({library_path: library_to_json(library), model_path: model_to_json(model, inputs=inputs)}, force=force)

    typer.echo(f"\nStep 4: quantify the bath samples ({files.bath_samples.name}) and screen them for interferents\n")
    from ..report.plan_figure import plot_plan

    plan_svg = figure_svg(plot_plan(plan, library).figure, "plan")
    request = QuantifyRequest(
        scans=[files.bath_samples], out=out, library=library_path, model=model_path, force=force,
        extra_sections=[plan_section(plan, plan_svg)],
    )
    outcome = run_quantify(request)
    typer.echo(outcome.text)
    typer.echo(
        f"\nOpen {out / 'report.html'} in a browser to see the fits, the screen and the plan. "
        f"True values of the invented samples: {files.bath_samples_truth}"
    )
