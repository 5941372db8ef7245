"""A batch quantified chunk by chunk gives the report what the whole result would have given it."""

from __future__ import annotations

import multiprocessing
import subprocess
import sys
from concurrent.futures import Future
from pathlib import Path

import numpy as np
import pytest

from absolve.io.library_file import write_library
from absolve.io.tables import format_scan_table
from absolve.library import ComponentCalibration, NoiseModel, ReferenceLibrary
from absolve.quantify import MixtureResult, concatenate_results, quantify, quantify_chunks
from absolve.report import background, figures
from absolve.report.background import BackgroundFigures
from absolve.report.batch import BatchNumbers, ReportBatch, expected_rms_residual
from absolve.simulate import Band, Instrument, band_spectrum, measure, random_absorptivities
from absolve.spectra import Spectra

NOISE = NoiseModel(floor=0.002, proportional=0.005, correlation_length_nm=0.0)
N_SCANS = 40
FOREIGN = (3, 7, 11, 17, 22, 30, 38)


@pytest.fixture(scope="module")
def batch() -> tuple[Spectra, ReferenceLibrary]:
    """Forty simulated scans of two invented dyes; some hold a foreign band of different sizes, some are saturated."""
    rng = np.random.default_rng(5)
    grid = np.arange(400.0, 601.0, 2.0)
    k = random_absorptivities(grid, 2, rng)
    k = k / k.max(axis=1, keepdims=True)
    components = tuple(ComponentCalibration(name, concentration_range=(0.1, 1.5)) for name in ("dye-a", "dye-b"))
    library = ReferenceLibrary(grid, k, np.zeros_like(k), "mg/L", components, noise=NOISE)
    true = rng.uniform(0.2, 0.9, (N_SCANS, 2)) @ k
    for size, scan in enumerate(FOREIGN, start=1):
        true[scan] += band_spectrum(grid, [Band(540.0, 8.0, 0.02 * size, 0.0)])
    true[[5, 25]] *= 3.0
    instrument = Instrument(noise_floor=0.002, noise_proportional=0.005, correlation_length_nm=0.0, stray_light=0.0)
    return Spectra(grid, measure(grid, true, instrument, rng), [f"s{i:02d}" for i in range(N_SCANS)]), library


def _assert_same(a: MixtureResult, b: MixtureResult) -> None:
    assert a.scan_names == b.scan_names and a.flags == b.flags and a.scan_flags == b.scan_flags
    for name in ("concentration", "std_uncertainty", "rms_residual", "used", "interferent"):
        np.testing.assert_allclose(getattr(a, name), getattr(b, name), rtol=1e-12, atol=1e-15)
    np.testing.assert_allclose(a.screening.p_value, b.screening.p_value, rtol=1e-9)
    assert [d is None for d in a.screening.diagnoses] == [d is None for d in b.screening.diagnoses]


def test_take_and_concatenate_undo_each_other(batch: tuple[Spectra, ReferenceLibrary]) -> None:
    whole = quantify(*batch)
    rows = [9, 2, 30, 2]
    part = whole.take(rows)
    assert part.scan_names == tuple(whole.scan_names[i] for i in rows)
    np.testing.assert_array_equal(part.fitted, whole.fitted[rows])
    np.testing.assert_array_equal(part.budget["spectral_noise"], whole.budget["spectral_noise"][rows])
    np.testing.assert_array_equal(part.excluded["above_ceiling"], whole.excluded["above_ceiling"][rows])
    assert part.screening.diagnoses == tuple(whole.screening.diagnoses[i] for i in rows)
    assert part.settings == whole.settings and part.wavelengths is whole.wavelengths
    joined = concatenate_results([whole.take(range(0, 13)), whole.take(range(13, N_SCANS))])
    _assert_same(joined, whole)
    np.testing.assert_array_equal(joined.residuals, whole.residuals)


def test_a_result_without_spectra_keeps_every_per_scan_number(batch: tuple[Spectra, ReferenceLibrary]) -> None:
    whole = quantify(*batch)
    thin = whole.without_spectra()
    assert thin.fitted is None and thin.residuals is None
    assert thin.summary() == whole.summary()
    assert concatenate_results([thin, whole]).fitted is None


@pytest.mark.parametrize("chunk_scans", [1, 6, 16, N_SCANS])
@pytest.mark.parametrize("detail", [0, 2, 5])
def test_chunks_choose_the_scans_the_whole_result_would(batch: tuple[Spectra, ReferenceLibrary], chunk_scans: int, detail: int) -> None:
    spectra, library = batch
    whole = quantify(spectra, library)
    gathered = ReportBatch(library, detail)
    for chunk in quantify_chunks(spectra, library, chunk_scans=chunk_scans):
        gathered.add(chunk)
    first, flagged = figures.detail_scans(whole, detail)
    details = gathered.details
    assert (list(details.first), list(details.flagged)) == (first, flagged)
    if details.indices:
        np.testing.assert_allclose(details.result.fitted, whole.fitted[list(details.indices)], rtol=1e-12, atol=1e-15)
    numbers, expected = gathered.numbers, expected_rms_residual(whole, library)
    assert (numbers.scan_names, numbers.components, numbers.unit) == (whole.scan_names, whole.components, whole.unit)
    for name in ("concentration", "expanded_uncertainty", "rms_residual", "interferent"):
        np.testing.assert_allclose(getattr(numbers, name), getattr(whole, name), rtol=1e-12, atol=1e-15)
    np.testing.assert_allclose(numbers.expected_rms, expected, rtol=1e-12)  # type: ignore[arg-type]
    _assert_same(gathered.result, whole)
    assert gathered.result.fitted is None
    np.testing.assert_allclose(gathered.expected_rms, expected, rtol=1e-12)


def test_the_batch_holds_the_flagged_scans(batch: tuple[Spectra, ReferenceLibrary]) -> None:
    # The test data must exercise the choice: more flagged scans than the detail count.
    whole = quantify(*batch)
    flagged = [i for i in range(N_SCANS) if whole.scan_flags[i] or whole.interferent[i]]
    assert len(flagged) > 5, flagged
    assert set(FOREIGN[3:]) <= set(flagged)


def test_figures_from_chunks_equal_those_from_the_whole_result(batch: tuple[Spectra, ReferenceLibrary]) -> None:
    spectra, library = batch
    whole = quantify(spectra, library)
    gathered = ReportBatch(library, 3)
    for chunk in quantify_chunks(spectra, library, chunk_scans=7):
        gathered.add(chunk)
    from_chunks = figures.render_figures(gathered, library)
    from_whole = figures.render_figures(whole, library, detail=3)
    assert [(f.key, f.place, f.scan, f.caption) for f in from_chunks] == [(f.key, f.place, f.scan, f.caption) for f in from_whole]
    assert [f.scan for f in from_whole if f.place == "scan"] == [*figures.detail_scans(whole, 3)[0], *figures.detail_scans(whole, 3)[1]]


def _gathered(spectra: Spectra, library: ReferenceLibrary, drawer: BackgroundFigures | None, complete: bool = True) -> ReportBatch:
    gathered = ReportBatch(library, 3)
    for chunk in quantify_chunks(spectra, library, chunk_scans=7):
        gathered.add(chunk)
        if drawer is not None:
            # As the command does: figures of chosen scans start at once, the rest with the last chunk.
            drawer.follow(gathered, complete=complete and gathered.n_scans == spectra.values.shape[0])
    return gathered


def _not_here(*args: object) -> tuple[str, bytes | None]:
    raise AssertionError("a figure was drawn in this process")


@pytest.mark.parametrize(("file_format", "complete"), [(None, True), ("svg", True), (None, False)])
def test_figures_drawn_in_a_worker_process_equal_those_drawn_here(
    batch: tuple[Spectra, ReferenceLibrary], file_format: str | None, complete: bool, monkeypatch: pytest.MonkeyPatch
) -> None:
    spectra, library = batch
    here = figures.render_figures(_gathered(spectra, library, None), library, file_format=file_format)  # type: ignore[arg-type]
    # Every figure, the batch overviews too, comes from the worker, whether started ahead (complete) or when asked for.
    monkeypatch.setattr(background, "draw_figure", _not_here)
    with BackgroundFigures(library, file_format) as drawer:  # type: ignore[arg-type]
        away = figures.render_figures(_gathered(spectra, library, drawer, complete), library, file_format=file_format, drawer=drawer)  # type: ignore[arg-type]
    assert len([f for f in away if f.place == "scan"]) == 6  # the first three and three flagged ones
    assert [f.place for f in away[:3]] == ["library", "overview", "residual-sizes"]
    assert away == here


@pytest.mark.parametrize("complete", [True, False])
def test_figures_are_drawn_here_when_the_worker_dies(batch: tuple[Spectra, ReferenceLibrary], complete: bool) -> None:
    spectra, library = batch
    here = figures.render_figures(_gathered(spectra, library, None), library)
    with BackgroundFigures(library, None) as drawer:
        gathered = _gathered(spectra, library, drawer, complete)
        for worker in multiprocessing.active_children():
            worker.kill()
            worker.join()
        assert figures.render_figures(gathered, library, drawer=drawer) == here


def test_a_figure_that_fails_in_the_worker_raises_its_error_here(batch: tuple[Spectra, ReferenceLibrary], monkeypatch: pytest.MonkeyPatch) -> None:
    _, library = batch
    monkeypatch.setattr(background, "draw_figure", _not_here)  # no quiet second try in this process
    with BackgroundFigures(library, None) as drawer, pytest.raises(ValueError, match="the 'nonsense' figure needs"):
        drawer.draw("nonsense", "nonsense", library, None, None)


def test_each_overview_gets_its_part_of_the_shared_task_or_its_error() -> None:
    shared: Future[list[tuple[str, bytes | None]]] = Future()
    first, second = background._item(shared, 0), background._item(shared, 1)
    assert not first.done()
    shared.set_result([("<svg>a</svg>", None), ("<svg>b</svg>", b"b")])
    assert (first.result(), second.result()) == (("<svg>a</svg>", None), ("<svg>b</svg>", b"b"))
    failed: Future[list[tuple[str, bytes | None]]] = Future()
    part = background._item(failed, 1)
    failed.set_exception(ValueError("drawing failed"))
    with pytest.raises(ValueError, match="drawing failed"):
        part.result()


def test_a_run_of_several_chunks_leaves_matplotlib_to_the_worker(batch: tuple[Spectra, ReferenceLibrary], tmp_path: Path) -> None:
    spectra, library = batch
    (tmp_path / "scans.csv").write_text(format_scan_table(spectra), encoding="utf-8")
    write_library(library, tmp_path / "library.json")
    # A fresh interpreter: this one has imported matplotlib already. Chunks of 7 scans make the 40 a batch of several.
    code = (
        "import sys\n"
        "from pathlib import Path\n"
        "from absolve import workflow\n"
        "workflow.CHUNK_SCANS = 7\n"
        "request = workflow.QuantifyRequest([Path('scans.csv')], Path('out'), library=Path('library.json'), detail=3, figures='svg')\n"
        "workflow.run_quantify(request)\n"
        "assert 'matplotlib' not in sys.modules, 'matplotlib imported by the main process'\n"
    )
    run = subprocess.run([sys.executable, "-c", code], cwd=tmp_path, capture_output=True, text=True, timeout=300)
    assert run.returncode == 0, run.stderr
    drawn = sorted(path.stem for path in (tmp_path / "out" / "figures").iterdir())
    assert drawn[:3] == ["library", "overview", "residual-sizes"] and len(drawn) == 3 + 6, drawn
