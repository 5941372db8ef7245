"""Report figures drawn in a worker process while the batch is still being quantified.

matplotlib takes a fixed few seconds for a report's figures, and much of that
work does not depend on the scans still to come: the library figure, and each
scan chosen for a detailed figure once it is chosen. A second process draws
those while this one fits, screens and writes; at the end this process draws
the batch overviews and any chosen scan not yet started while the worker
finishes. A scan that later drops out of the choice has its figure thrown away.
The figures are the ones :func:`~absolve.report.figures.draw_figure` makes in
this process (same function, same settings, ids from the figure's key), and if
the worker dies or cannot start they are all drawn here.

The worker is a fresh interpreter ("spawn"), which imports the main module
again: a script that uses this must keep its work under
``if __name__ == "__main__":`` (the ``absolve`` command does)."""

from __future__ import annotations

import multiprocessing
import signal
from concurrent.futures import Future, ProcessPoolExecutor
from concurrent.futures.process import BrokenProcessPool

import numpy as np
from numpy.typing import NDArray

from ..library import ReferenceLibrary
from ..quantify import MixtureResult
from .batch import ReportBatch
from .figures import FigureFormat, draw_figure, scan_figure_key

__all__ = ["BackgroundFigures"]

# Figures at most waiting for the worker while scans are still being quantified.
_AHEAD = 4
# The worker's own copy of the library, sent once when it starts.
_worker_library: ReferenceLibrary | None = None


def _start_worker(library: ReferenceLibrary) -> None:
    global _worker_library
    _worker_library = library
    # Ctrl-C is the main process's to handle: it stops the worker by shutting the pool down.
    signal.signal(signal.SIGINT, signal.SIG_IGN)


def _draw_in_worker(
    key: str, place: str, data: MixtureResult | None, expected: NDArray[np.float64] | None, file_format: FigureFormat | None
) -> tuple[str, bytes | None]:
    assert _worker_library is not None
    return draw_figure(key, place, _worker_library, data, expected, file_format)


class BackgroundFigures:
    """Draws report figures in one worker process, starting before they are asked for.

    Use as a context manager around the run; pass it as ``drawer`` to
    :func:`~absolve.report.figures.render_figures` at the end.

    Parameters
    ----------
    library : ReferenceLibrary
        The library of the run (the worker draws the library figure at once).
    file_format : {"png", "svg"}, optional
        Figure files asked for besides the inline SVG.
    """

    def __init__(self, library: ReferenceLibrary, file_format: FigureFormat | None) -> None:
        self.library = library
        self.file_format = file_format
        # "spawn": a fresh interpreter, safe whatever threads this process runs (BLAS, the writer).
        self._pool = ProcessPoolExecutor(1, mp_context=multiprocessing.get_context("spawn"), initializer=_start_worker, initargs=(library,))
        self._futures: dict[str, Future[tuple[str, bytes | None]]] = {
            "library": self._pool.submit(_draw_in_worker, "library", "library", None, None, file_format)
        }

    def __enter__(self) -> BackgroundFigures:
        return self

    def __exit__(self, *exc_info: object) -> None:
        self.close()

    def follow(self, batch: ReportBatch) -> None:
        """Start figures of the scans chosen for detail so far, a few at a time.

        At most ``_AHEAD`` figures wait for the worker, first scans first, then
        the most strongly flagged: a scan that later drops out of the choice
        costs the worker at most that much, and nothing is ever cancelled (a
        cancelled task in a pool whose worker then dies leaves the pool hung
        on Python 3.11).
        """
        details = batch.details
        names = details.result.scan_names
        waiting = sum(not future.done() for future in self._futures.values())
        try:
            for local, index in enumerate(details.indices):
                if waiting >= _AHEAD:
                    break
                key = scan_figure_key(index, names[local])
                if key not in self._futures:
                    self._futures[key] = self._pool.submit(_draw_in_worker, key, "scan", details.result.take([local]), None, self.file_format)
                    waiting += 1
        except BrokenProcessPool:
            pass  # :meth:`draw` draws them here instead

    def draw(
        self, key: str, place: str, library: ReferenceLibrary, data: MixtureResult | None,
        expected: NDArray[np.float64] | None, file_format: FigureFormat | None,
    ) -> tuple[str, bytes | None]:
        """The figure from the worker if it was started there, else (or if the worker died) drawn here.

        The batch overviews are always drawn here: sending the whole batch's
        numbers to the worker would hold them twice more.
        """
        if library is not self.library or file_format != self.file_format:
            raise ValueError("the figure was asked for with another library or file format than the worker's")
        future = self._futures.pop(key, None)
        if future is not None:
            try:
                return future.result()
            except BrokenProcessPool:
                pass  # the worker died (killed, out of memory) or could not start: the report does not depend on it
        return draw_figure(key, place, library, data, expected, file_format)

    def close(self) -> None:
        """Let the worker go once it has drawn what it has (at most a few figures)."""
        self._pool.shutdown(wait=False)
