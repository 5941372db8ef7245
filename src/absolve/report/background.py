"""Report figures drawn in a worker process while the batch is still being quantified.

matplotlib takes a fixed few seconds for a report's figures (importing it
alone over a second), and none of that work needs this process. A second
process draws the library figure at once, each scan chosen for a detailed
figure once it is chosen, and, when the last chunk is in, the batch overviews
from the few numbers per scan they draw
(:class:`~absolve.report.batch.BatchNumbers`, a few MB even at 100,000 scans),
all while this process fits, screens and writes: this process never imports
matplotlib. A scan that later drops out of the choice has its figure thrown
away. The figures are the ones :func:`~absolve.report.figures.draw_figure`
makes in this process (same function, same settings, ids from the figure's
key), and if the worker dies or cannot start, those not yet drawn are drawn
here; a figure that fails in the worker raises its error here.

The worker is a fresh interpreter ("spawn"), which imports the main module
again: a script that uses this must keep its work under
``if __name__ == "__main__":`` (the ``absolve`` command does)."""

from __future__ import annotations

from concurrent.futures import Future
from concurrent.futures.process import BrokenProcessPool
from typing import TypeAlias

from ..library import ReferenceLibrary
from ..quantify import MixtureResult
from ._workers import spawned_pool
from .batch import BatchNumbers, ReportBatch
from .figures import FigureFormat, draw_figure, scan_figure_key

__all__ = ["BackgroundFigures"]

# Figures at most waiting for the worker before a flagged scan's starts, while scans are still being quantified.
_AHEAD = 4
# The batch overviews, keyed by their place (as render_figures asks for them).
_OVERVIEWS = ("overview", "residual-sizes")
_Drawn: TypeAlias = tuple[str, bytes | None]  # inline SVG, and the figure file when one is asked for
# The worker's own copy of the library, sent once when it starts.
_worker_library: ReferenceLibrary | None = None


def _start_worker(library: ReferenceLibrary) -> None:
    global _worker_library
    _worker_library = library


def _draw_in_worker(key: str, place: str, data: MixtureResult | BatchNumbers | None, file_format: FigureFormat | None) -> _Drawn:
    assert _worker_library is not None
    return draw_figure(key, place, _worker_library, data, file_format)


def _draw_overviews_in_worker(numbers: BatchNumbers, file_format: FigureFormat | None) -> list[_Drawn]:
    # One task for both: the batch's numbers are sent (and held in the worker) once.
    return [_draw_in_worker(place, place, numbers, file_format) for place in _OVERVIEWS]


def _item(whole: Future[list[_Drawn]], position: int) -> Future[_Drawn]:
    """A future of one item of the list ``whole`` gives (or of its error)."""
    item: Future[_Drawn] = Future()

    def settle(done: Future[list[_Drawn]]) -> None:
        error = done.exception()
        if error is None:
            item.set_result(done.result()[position])
        else:
            item.set_exception(error)

    whole.add_done_callback(settle)
    return item


class BackgroundFigures:
    """Draws report figures in one worker process, starting before they are asked for.

    Use as a context manager around the run; pass it as ``drawer`` to
    :func:`~absolve.report.figures.render_figures` at the end.

    Parameters
    ----------
    library : ReferenceLibrary
        The library of the run (the worker draws the library figure at once,
        which also has it import matplotlib before anything else is asked).
    file_format : {"png", "svg"}, optional
        Figure files asked for besides the inline SVG.
    """

    def __init__(self, library: ReferenceLibrary, file_format: FigureFormat | None) -> None:
        self.library = library
        self.file_format = file_format
        self._pool = spawned_pool(1, _start_worker, (library,))
        self._futures: dict[str, Future[_Drawn]] = {
            "library": self._pool.submit(_draw_in_worker, "library", "library", None, file_format)
        }

    def __enter__(self) -> BackgroundFigures:
        return self

    def __exit__(self, *exc_info: object) -> None:
        self.close()

    def follow(self, batch: ReportBatch, *, complete: bool = False) -> None:
        """Start figures of the scans chosen for detail so far; all of them, and the overviews, once the batch is complete.

        The first scans are chosen for good and start at once. Flagged scans
        start while fewer than ``_AHEAD`` figures wait for the worker, most
        strongly flagged first: one that later drops out of the choice costs
        the worker at most that much, and nothing is ever cancelled (a
        cancelled task in a pool whose worker then dies leaves the pool hung
        on Python 3.11). With ``complete`` (``batch`` holds its last chunk)
        the choice is final: every chosen scan's figure starts, then the two
        batch overviews from :attr:`ReportBatch.numbers`.
        """
        details = batch.details
        names = details.result.scan_names
        waiting = sum(not future.done() for future in self._futures.values())
        try:
            for local, index in enumerate(details.indices):
                if waiting >= _AHEAD and not complete and local >= len(details.first):
                    break
                key = scan_figure_key(index, names[local])
                if key not in self._futures:
                    self._futures[key] = self._pool.submit(_draw_in_worker, key, "scan", details.result.take([local]), self.file_format)
                    waiting += 1
            if complete and not set(_OVERVIEWS) & set(self._futures):
                both = self._pool.submit(_draw_overviews_in_worker, batch.numbers, self.file_format)
                self._futures.update((place, _item(both, position)) for position, place in enumerate(_OVERVIEWS))
        except BrokenProcessPool:
            pass  # :meth:`draw` draws them here instead

    def draw(
        self, key: str, place: str, library: ReferenceLibrary, data: MixtureResult | BatchNumbers | None, file_format: FigureFormat | None
    ) -> _Drawn:
        """The figure from the worker (started now if it was not yet), or drawn here if the worker died."""
        if library is not self.library or file_format != self.file_format:
            raise ValueError("the figure was asked for with another library or file format than the worker's")
        future = self._futures.pop(key, None)
        try:
            if future is None:
                future = self._pool.submit(_draw_in_worker, key, place, data, file_format)
            return future.result()
        except BrokenProcessPool:
            pass  # the worker died (killed, out of memory) or could not start: the report does not depend on it
        return draw_figure(key, place, library, data, file_format)

    def close(self, *, wait: bool = False) -> None:
        """Let the worker go once it has drawn what it was given (a few figures; the rest of the report's after the last chunk).

        With ``wait``, return only when it has ended and its memory is free.
        """
        self._pool.shutdown(wait=wait)
