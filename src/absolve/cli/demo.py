"""``absolve demo``: the whole job on the bundled, invented dye-house data."""

from __future__ import annotations

from pathlib import Path
from typing import Annotated

import typer

from ..calibration import calibrate as fit_library
from ..demo_data import DEMO_UNIT, demo_files
from ..io.files import check_writable, write_all
from ..io.library_file import library_to_json
from ..io.tables import concentration_matrix, per_scan_value, read_concentration_table, read_scans
from ..render import library_report
from ..workflow import RESULT_FILES, QuantifyRequest, run_quantify
from ._app import app
from ._common import provenance


@app.command()
def demo(
    out: Annotated[Path, typer.Option("--out", help="Folder for the demo's library, results and report.")] = Path("absolve-demo"),
    force: Annotated[bool, typer.Option("--force", help="Replace the results of an earlier demo run.")] = False,
) -> None:
    """Calibrate the bundled standards, quantify the bundled bath samples, write the report."""
    files = demo_files()
    check_writable([out / "library.json", *(out / name for name in RESULT_FILES)], force=force)
    typer.echo(f"Demo: a dye-house lab checks trichromatic exhaust baths (invented dyes and data, from {files.standards.parent.parent}).\n")
    standards = read_scans([files.standards])
    table = read_concentration_table(files.standards_concentrations)
    conc, components = concentration_matrix(table, standards.names)
    library = fit_library(
        standards,
        conc / per_scan_value(table, standards.names, "dilution")[:, None],
        components,
        DEMO_UNIT,
        path_lengths=per_scan_value(table, standards.names, "path_length_cm"),
        provenance=provenance([files.standards, files.standards_concentrations], {"unit": DEMO_UNIT}),
    )
    library_path = out / "library.json"
    write_all({library_path: library_to_json(library)}, force=force)
    typer.echo(library_report(library))
    typer.echo(f"\nStep 2: quantify the bath samples against the library ({files.bath_samples.name})\n")
    outcome = run_quantify(QuantifyRequest(scans=[files.bath_samples], out=out, library=library_path, force=force))
    typer.echo(outcome.text)
    typer.echo(f"\nOpen {out / 'report.html'} in a browser to see the fits. True values of the invented samples: {files.bath_samples_truth}")
