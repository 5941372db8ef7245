"""Residual figures of checked scans: what the library left unexplained, against the noise band.

A large batch can have hundreds of flagged scans; their plots are drawn on one reused figure per
process, in worker processes when there are many (:func:`residual_pngs`).
"""

from __future__ import annotations

import io
import os
from collections.abc import Callable, Sequence
from concurrent.futures.process import BrokenProcessPool
from typing import TYPE_CHECKING

import numpy as np

from ..library import NoiseModel
from ..quantify import MixtureResult
from ._workers import spawned_pool

if TYPE_CHECKING:
    from matplotlib.axes import Axes

# Okabe-Ito colours: distinguishable with the common colour-vision deficiencies.
_RESIDUAL = "#0072B2"
_BAND = "#999999"
_FLAGGED = "#E69F00"


def plot_residual(result: MixtureResult, index: int, noise: NoiseModel | None = None, ax: Axes | None = None) -> Axes:
    """Residual of scan ``index`` with the +/- 2 sd noise band and the diagnosed window shaded.

    Returns the axes (a new figure's when ``ax`` is None).
    """
    if ax is None:
        ax = _residual_axes()
    grid = result.wavelengths
    residual = result.residuals[index]
    if noise is not None:
        band = 2.0 * noise.standard_deviation(np.nan_to_num(result.fitted[index]))
        ax.fill_between(grid, -band, band, color=_BAND, alpha=0.3, linewidth=0, label="noise band (±2 sd)")
    diagnosis = result.screening.diagnoses[index]
    if diagnosis is not None:
        ax.axvspan(*diagnosis.window_nm, color=_FLAGGED, alpha=0.25, label=f"{diagnosis.kind} ({diagnosis.confidence})")
    ax.plot(grid, residual, color=_RESIDUAL, linewidth=1.0, label="measured − fitted")
    ax.axhline(0.0, color="black", linewidth=0.6)
    ax.set_xlabel("wavelength (nm)")
    ax.set_ylabel("residual absorbance")
    p = result.screening.p_value[index]
    shown = "< 1e-16" if p < 1e-16 else f"= {p:.2g}"
    ax.set_title(f"{result.scan_names[index]}: interferent p {shown}" if np.isfinite(p) else result.scan_names[index], fontsize=10)
    ax.legend(fontsize=8, loc="best")
    return ax


def _residual_axes() -> Axes:
    """The empty axes of a residual figure, on a new figure."""
    from matplotlib.figure import Figure

    # Fixed margins: a layout engine measured every text on every draw and took 40 % of a plot's time
    # (hundreds of plots for a large batch); the labels here are of bounded length.
    figure = Figure(figsize=(7.0, 3.2))
    figure.subplots_adjust(left=0.14, right=0.98, bottom=0.15, top=0.9)
    return figure.add_subplot()


class _Plotter:
    """One figure reused for plot after plot: a third less time each than a fresh figure, the same PNG bytes."""

    def __init__(self) -> None:
        from matplotlib.backends.backend_agg import FigureCanvasAgg

        self.ax = _residual_axes()
        FigureCanvasAgg(self.ax.figure)

    def png(self, result: MixtureResult, index: int, noise: NoiseModel | None) -> bytes:
        ax = self.ax
        for artist in [*ax.lines, *ax.collections, *ax.patches]:
            artist.remove()
        legend = ax.get_legend()
        if legend is not None:
            legend.remove()
        ax.relim()
        ax.autoscale()
        plot_residual(result, index, noise, ax)
        buffer = io.BytesIO()
        ax.figure.savefig(buffer, format="png", dpi=110)
        return buffer.getvalue()


# A worker process's own plotter, made when the worker starts.
_worker_plotter: list[_Plotter] = []


def _start_worker() -> None:
    _worker_plotter.append(_Plotter())


def _draw_in_worker(result: MixtureResult, noise: NoiseModel | None) -> list[bytes]:
    return [_worker_plotter[0].png(result, i, noise) for i in range(result.n_scans)]


def residual_pngs(
    result: MixtureResult, indices: Sequence[int], noise: NoiseModel | None, progress: Callable[[int, int], None] | None = None
) -> list[bytes]:
    """The residual figures of scans ``indices`` as PNG bytes, in that order.

    Many plots are drawn in worker processes, one per core (at most
    :data:`MAX_WORKERS`), each handed ``_PLOTS_PER_TASK`` scans at a time; a
    few, or a machine with one core, are drawn here. The workers are fresh
    interpreters (:func:`~absolve.report._workers.spawned_pool`): a script that
    calls this must keep its work under ``if __name__ == "__main__":``. If a
    worker dies, the plots are drawn here.
    ``progress(done, total)`` hears of every plot.
    """
    total = len(indices)
    report = progress or (lambda done, total: None)
    workers = min(MAX_WORKERS, _cores(), -(-total // _PLOTS_PER_TASK))
    if total >= _PARALLEL_FROM and workers > 1:
        try:
            return _drawn_in_workers(result, list(indices), noise, workers, report)
        except BrokenProcessPool:
            pass  # a worker died (killed, out of memory): draw them all here instead
    plotter = _Plotter()
    images = []
    for done, index in enumerate(indices, start=1):
        images.append(plotter.png(result, index, noise))
        report(done, total)
    return images


def _drawn_in_workers(
    result: MixtureResult, indices: list[int], noise: NoiseModel | None, workers: int, report: Callable[[int, int], None]
) -> list[bytes]:
    tasks = [indices[start : start + _PLOTS_PER_TASK] for start in range(0, len(indices), _PLOTS_PER_TASK)]
    images: list[bytes] = []
    pool = spawned_pool(workers, _start_worker)
    try:
        # Each task gets only its scans (their spectra and numbers), not the whole batch.
        futures = [pool.submit(_draw_in_worker, result.take(task), noise) for task in tasks]
        for future in futures:
            images.extend(future.result())
            report(len(images), len(indices))
    finally:
        # On Ctrl-C or an error, tasks not yet started are dropped rather than waited for.
        pool.shutdown(wait=True, cancel_futures=True)
    return images


def _cores() -> int:
    """Cores this process may run on."""
    try:
        return len(os.sched_getaffinity(0))
    except AttributeError:  # not on Linux
        return os.cpu_count() or 1


# Worker processes for residual plots at most: each holds its own interpreter and matplotlib (~130 MB).
MAX_WORKERS = 4
# Below this many plots a worker's start (about a second) costs more than it saves.
_PARALLEL_FROM = 24
_PLOTS_PER_TASK = 16
