"""Whole jobs from files to files: read inputs, run the computation, write every output together.

The command line calls one function here per verb; the functions take paths
and options and return the texts to show, so they are testable without a
terminal. Outputs go to temporary files first and are renamed into place together
only when everything has succeeded; large batches are fitted and written
chunk by chunk, so only one chunk's spectra are held at a time.
"""

from __future__ import annotations

import json
from collections.abc import Callable, Iterator
from dataclasses import dataclass, field, replace
from pathlib import Path
from typing import TYPE_CHECKING, Any, get_args

import numpy as np

from .errors import AbsolveError
from .io.files import Content, check_writable, write_all
from .io.library_file import read_library
from .io.results import prediction_fit_csv, prediction_results_csv, write_results_in_chunks
from .io.tables import read_scans
from .quantify import MixtureResult, quantify_chunks
from .report.batch import ReportBatch
from .report.background import BackgroundFigures
from .report.figures import FigureFormat, render_figures
from .report.html import build_report
from .spectra import Spectra

if TYPE_CHECKING:
    from .inverse import InverseModel, InversePrediction

__all__ = ["FIGURE_FOLDER", "Progress", "QuantifyRequest", "QuantifyOutcome", "run_quantify", "RESULT_FILES"]

RESULT_FILES = ("results.csv", "fit.csv", "fitted.csv", "residuals.csv", "results.json", "report.html")
SPECTRA_FILES = ("fitted.csv", "residuals.csv")  # left out with QuantifyRequest(spectra=False)
FIGURE_FOLDER = "figures"
CHUNK_SCANS = 2048  # scans fitted, written and let go at a time (their spectra: a few MB to tens of MB)

Progress = Callable[[str, int, int], None]
"""Told ``(stage, done, total)`` as a run goes on (``total`` 0 when a step cannot count)."""


def _silent(stage: str, done: int, total: int) -> None:
    """The progress callback that shows nothing."""


@dataclass
class QuantifyRequest:
    """Everything ``absolve quantify`` was asked to do."""

    scans: list[Path]
    out: Path
    library: Path | None = None
    model: Path | None = None
    baseline: str = "offset"
    wavelength_range: tuple[float | None, float | None] = (None, None)
    path_length: float = 1.0
    dilution: float = 1.0
    path_length_tolerance: float = 0.0
    dilution_tolerance: float = 0.0
    ceiling: float = 2.0
    quantity: str | None = None
    decimal: str = "."
    blank: Path | None = None
    force: bool = False
    figures: str | None = None
    detail: int = 12
    spectra: bool = True
    learn_library_error: bool = False
    extra_sections: list[tuple[str, str]] = field(default_factory=list)


@dataclass(frozen=True)
class QuantifyOutcome:
    """What a quantification run produced: the result and the texts to show.

    A library run's result holds every per-scan number but not the fitted and
    residual spectra (:meth:`MixtureResult.without_spectra`): those went to
    fitted.csv and residuals.csv chunk by chunk.
    """

    result: MixtureResult | InversePrediction
    text: str
    written: tuple[Path, ...]

    @property
    def json_text(self) -> str:
        """The result's summary as JSON (built on demand: it is costly for large batches)."""
        return json.dumps(self.result.summary(), indent=1, allow_nan=False)


def _options(request: QuantifyRequest) -> dict[str, Any]:
    return {
        "baseline": request.baseline,
        "range": list(request.wavelength_range),
        "path_length_cm": request.path_length,
        "dilution": request.dilution,
        "path_length_tolerance": request.path_length_tolerance,
        "dilution_tolerance": request.dilution_tolerance,
        "ceiling": request.ceiling,
        "quantity": request.quantity,
        "detail": request.detail,
        "figures": request.figures,
        "spectra": request.spectra,
        "learn_library_error": request.learn_library_error,
    }


def _check_report_options(request: QuantifyRequest) -> FigureFormat | None:
    choices = get_args(FigureFormat)
    if request.figures is not None and request.figures not in choices:
        raise AbsolveError(f"--figures must be one of {', '.join(choices)}; got {request.figures!r}", fix="e.g. --figures svg")
    if request.figures is not None and request.library is None:
        raise AbsolveError("--figures needs --library: a PLS model's report has no spectra figures", fix="leave out --figures")
    if request.learn_library_error and request.library is None:
        raise AbsolveError("--learn-library-error needs --library: it learns the library's error", fix="add --library, or leave the option out")
    if request.detail < 0:
        raise AbsolveError(f"--detail must be 0 or more; got {request.detail}", fix="e.g. --detail 12")
    return request.figures  # type: ignore[return-value]


def run_quantify(request: QuantifyRequest, progress: Progress = _silent) -> QuantifyOutcome:
    """Read scans and a library, quantify, write the result files, and return the summary texts.

    ``progress`` hears of each step (reading, fitting, drawing figures, writing).
    """
    from .cli._common import provenance

    targets = [request.out / name for name in RESULT_FILES]
    if request.out.exists() and not request.out.is_dir():
        raise AbsolveError(f"{request.out} is a file, not a folder", fix="give --out a folder name")
    file_format = _check_report_options(request)
    check_writable(targets, force=request.force)
    if request.library is None:
        return _run_model(request, targets)
    progress("reading", 0, 0)
    library = read_library(request.library)
    spectra, inputs = _read_samples(request)
    inputs.append(request.library)
    n_scans = spectra.values.shape[0]
    prediction = None
    if request.model is not None:
        # Both a library and a PLS model: the library's results lead, the model's are compared with them.
        progress("predicting with the PLS model", 0, 0)
        prediction = _predict(_read_model(request.model), spectra, request)
        inputs.append(request.model)
    record = provenance(inputs, _options(request))
    chunks = quantify_chunks(
        spectra,
        library,
        chunk_scans=CHUNK_SCANS,
        baseline=request.baseline,  # type: ignore[arg-type]
        wavelength_range=request.wavelength_range,
        path_length=request.path_length,
        dilution=request.dilution,
        ceiling=request.ceiling,
        path_length_tolerance=request.path_length_tolerance,
        dilution_tolerance=request.dilution_tolerance,
        learn_library_error=request.learn_library_error,
    )
    # Each chunk is written as it comes and leaves only its per-scan numbers and the
    # scans the report draws, so memory stays bounded whatever the batch size.
    batch = ReportBatch(library, request.detail)
    # Batches of several chunks take long enough for a worker process to draw the figures meanwhile.
    drawer = BackgroundFigures(library, file_format) if n_scans > CHUNK_SCANS else None

    def gathered() -> Iterator[MixtureResult]:
        progress("fitting", 0, n_scans)
        for chunk in chunks:
            batch.add(chunk)
            if drawer is not None:
                # After the last chunk the worker gets the rest, overviews included, while this process still writes.
                drawer.follow(batch, complete=batch.n_scans == n_scans)
            progress("fitting", batch.n_scans, n_scans)
            yield chunk

    figure_folder = request.out / FIGURE_FOLDER
    figure_files: list[Path] = []

    def report_files() -> dict[Path, Content]:
        figures = render_figures(
            batch, library, file_format=file_format, progress=lambda done, total: progress("drawing figures", done, total), drawer=drawer
        )
        if drawer is not None:
            drawer.close(wait=True)  # every figure is in: the worker's memory is free before the report is built
        progress("writing files", 0, 0)
        files: dict[Path, Content] = {targets[5]: build_report(batch.result, library, record, figures=figures, sections=request.extra_sections, prediction=prediction)}
        figure_files.extend(figure_folder / f"{figure.key}.{file_format}" for figure in figures if figure.file is not None)
        files.update(zip(figure_files, (figure.file for figure in figures if figure.file is not None)))
        return files

    skipped = () if request.spectra else SPECTRA_FILES
    streamed = {name: request.out / name for name in RESULT_FILES if name != "report.html" and name not in skipped}
    json_extra = None if prediction is None else {"pls": prediction.summary()}
    try:
        write_results_in_chunks(gathered(), streamed, provenance=record, force=request.force, json_extra=json_extra, finish=report_files)
    finally:
        if drawer is not None:
            drawer.close()
    for name in skipped:
        # Spectra of an earlier run (replaced with --force) would not match these results.
        (request.out / name).unlink(missing_ok=True)
    result = batch.result
    saved = f" and {len(figure_files)} figures in {figure_folder}/" if file_format is not None else ""
    text = result.report() + (_agreement(result, prediction) if prediction is not None else "")
    text += f"\nresults written to {request.out}/ ({', '.join(name for name in RESULT_FILES if name not in skipped)}){saved}"
    return QuantifyOutcome(result, text, (*streamed.values(), targets[5], *figure_files))


def _read_samples(request: QuantifyRequest) -> tuple[Spectra, list[Path]]:
    """The sample scans (blank subtracted when one is given) and the input files read for them."""
    spectra = read_scans(request.scans, decimal=request.decimal, quantity=request.quantity)  # type: ignore[arg-type]
    inputs: list[Path] = list(request.scans)
    if request.blank is not None:
        spectra = spectra.subtract_blank(read_scans([request.blank], decimal=request.decimal, quantity=request.quantity))  # type: ignore[arg-type]
        inputs.append(request.blank)
    return spectra, inputs


def _read_model(path: Path) -> InverseModel:
    """The PLS model file (its reader and the PLS code are loaded only when a model is used)."""
    from .io.model_file import read_model

    return read_model(path)


def _predict(model: InverseModel, spectra: Spectra, request: QuantifyRequest) -> InversePrediction:
    """PLS predictions of ``spectra``, corrected for dilution."""
    prediction = model.predict(spectra, path_length_cm=request.path_length)
    if request.dilution == 1.0:
        return prediction
    return replace(
        prediction,
        concentration=prediction.concentration * request.dilution,
        std_uncertainty=prediction.std_uncertainty * request.dilution,
    )


def _agreement(result: MixtureResult, prediction: InversePrediction) -> str:
    """One line: how many library/PLS pairs disagree beyond their expanded uncertainties."""
    shared = [(j, prediction.components.index(c)) for j, c in enumerate(result.components) if c in prediction.components]
    rows = {name: i for i, name in enumerate(prediction.names)}
    total = disagree = 0
    for i, name in enumerate(result.scan_names):
        if name not in rows:
            continue
        for j, k in shared:
            a, ua = result.concentration[i, j], result.expanded_uncertainty[i, j]
            b, ub = prediction.concentration[rows[name], k], 2.0 * prediction.std_uncertainty[rows[name], k]
            if np.isfinite(a) and np.isfinite(b) and np.isfinite(ua):
                total += 1
                disagree += bool(abs(a - b) > np.hypot(ua, ub))
    return f"\nLibrary and PLS model: {disagree} of {total} results differ by more than their combined expanded uncertainties (see the report)."


def _run_model(request: QuantifyRequest, targets: list[Path]) -> QuantifyOutcome:
    """Quantify with a PLS model: the same result files, Q and T^2 in place of the residual test."""
    from .cli._common import provenance
    from .report.html import build_model_report

    assert request.model is not None
    model = _read_model(request.model)
    spectra, inputs = _read_samples(request)
    inputs.append(request.model)
    prediction = _predict(model, spectra, request)
    record = provenance(inputs, _options(request))
    n_points = int(model.wavelengths_.size)
    document = {"format": "absolve-results", "version": 1, **prediction.summary(), "provenance": record}
    files = {
        targets[0]: prediction_results_csv(prediction),
        targets[1]: prediction_fit_csv(prediction, n_points),
        targets[4]: json.dumps(document, indent=1, allow_nan=False) + "\n",
        targets[5]: build_model_report(prediction, record),
    }
    write_all(files, force=request.force)
    text = prediction.report() + f"\nresults written to {request.out}/ ({', '.join(p.name for p in files)})"
    return QuantifyOutcome(prediction, text, tuple(files))
