"""Residual plots of checked scans: a reused figure draws what a fresh one draws; workers give the same images."""

from __future__ import annotations

import importlib
import io
from concurrent.futures.process import BrokenProcessPool

import numpy as np
import pytest

from absolve.library import NoiseModel, library_from_absorptivities
from absolve.quantify import MixtureResult, quantify
from absolve.simulate import random_absorptivities
from absolve.spectra import Spectra

residual_figure = importlib.import_module("absolve.report.residual_figure")


@pytest.fixture(scope="module")
def checked() -> MixtureResult:
    """Simulated scans of three absorbers; every other one carries a band the library lacks (flagged, diagnosed)."""
    rng = np.random.default_rng(5)
    grid = np.arange(380.0, 701.0, 2.0)
    truth = random_absorptivities(grid, 3, rng)
    library = library_from_absorptivities(grid, truth, ["a", "b", "c"], "mg/L")
    values = rng.uniform(0.1, 0.5, (40, 3)) @ truth + rng.normal(0.0, 0.002, (40, grid.size))
    values[::2] += 0.05 * np.exp(-0.5 * ((grid - 520.0) / 12.0) ** 2)
    result = quantify(Spectra(grid, values, [f"s{i}" for i in range(40)]), library)
    assert result.interferent[::2].all() and all(d is not None for d in result.screening.diagnoses[::2])
    return result


def _fresh_png(result: MixtureResult, index: int, noise: NoiseModel | None) -> bytes:
    """The plot drawn on a figure of its own (matplotlib's rendering of a new figure: the reference)."""
    from matplotlib.backends.backend_agg import FigureCanvasAgg

    ax = residual_figure.plot_residual(result, index, noise)
    FigureCanvasAgg(ax.figure)
    buffer = io.BytesIO()
    ax.figure.savefig(buffer, format="png", dpi=110)
    return buffer.getvalue()


def test_a_reused_figure_draws_each_plot_as_a_fresh_figure_does(checked: MixtureResult) -> None:
    noise = NoiseModel(floor=0.002, proportional=0.01, correlation_length_nm=2.0)
    plotter = residual_figure._Plotter()
    # Flagged and clean scans in turn, with and without a noise band: nothing of one plot may stay in the next.
    for index, model in [(0, noise), (1, None), (2, None), (3, noise), (4, noise)]:
        image = plotter.png(checked, index, model)
        assert image.startswith(b"\x89PNG")
        assert image == _fresh_png(checked, index, model)


def test_workers_give_the_same_images_in_order(checked: MixtureResult, monkeypatch: pytest.MonkeyPatch) -> None:
    indices = [6, 0, 3, 10, 2]
    local = residual_figure.residual_pngs(checked, indices, None)
    monkeypatch.setattr(residual_figure, "_PARALLEL_FROM", 2)
    monkeypatch.setattr(residual_figure, "_PLOTS_PER_TASK", 2)
    monkeypatch.setattr(residual_figure, "_cores", lambda: 2)
    seen: list[tuple[int, int]] = []
    drawn = residual_figure.residual_pngs(checked, indices, None, progress=lambda done, total: seen.append((done, total)))
    assert drawn == local
    assert local == [_fresh_png(checked, i, None) for i in indices]
    assert seen[-1] == (5, 5) and [done for done, _ in seen] == sorted(done for done, _ in seen)


def test_a_broken_worker_pool_leaves_the_plots_to_this_process(checked: MixtureResult, monkeypatch: pytest.MonkeyPatch) -> None:
    def broken(*args, **kwargs):  # type: ignore[no-untyped-def]
        raise BrokenProcessPool("a worker died")

    monkeypatch.setattr(residual_figure, "_drawn_in_workers", broken)
    monkeypatch.setattr(residual_figure, "_PARALLEL_FROM", 2)
    monkeypatch.setattr(residual_figure, "_cores", lambda: 4)
    seen: list[int] = []
    drawn = residual_figure.residual_pngs(checked, [0, 2, 4], None, progress=lambda done, total: seen.append(done))
    assert drawn == [_fresh_png(checked, i, None) for i in (0, 2, 4)]
    assert seen == [1, 2, 3]
