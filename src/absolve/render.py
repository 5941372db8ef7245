"""Plain-text views of results for the terminal (formatting only, no computation)."""

from __future__ import annotations

import sys
import threading
import time
from collections.abc import Callable, Sequence
from types import TracebackType
from typing import TYPE_CHECKING, TextIO

import numpy as np

from .library import ReferenceLibrary

if TYPE_CHECKING:
    from .quantify import MixtureResult

__all__ = ["ProgressLine", "format_table", "library_error_lines", "library_report", "mixture_report"]


def format_table(headers: Sequence[str], rows: Sequence[Sequence[str]], *, align: str | None = None) -> str:
    """Fixed-width table; ``align`` holds 'l' or 'r' per column (default: first left, rest right)."""
    widths = [len(h) for h in headers]
    for row in rows:
        widths = [max(w, len(cell)) for w, cell in zip(widths, row)]
    align = align or "l" + "r" * (len(headers) - 1)

    def line(cells: Sequence[str]) -> str:
        return "  ".join(cell.ljust(w) if a == "l" else cell.rjust(w) for cell, w, a in zip(cells, widths, align)).rstrip()

    return "\n".join([line(headers), line(["-" * w for w in widths]), *(line(row) for row in rows)])


def _number(value: float | None, spec: str = ".4g") -> str:
    return "-" if value is None or not np.isfinite(value) else format(value, spec)


def library_report(library: ReferenceLibrary) -> str:
    """Readable summary of a library: per component peak, absorptivity +/- se, levels, range, warnings."""
    summary = library.summary()
    unit = library.unit
    rows = []
    for item in summary["components"]:
        span = item["concentration_range"]
        rows.append(
            [
                item["component"],
                f"{item['peak_wavelength_nm']:g}",
                f"{item['peak_absorptivity']:.5g} ± {item['peak_std_error']:.2g}",
                str(item["levels"]),
                "-" if span is None else f"{span[0]:g}-{span[1]:g}",
                _number(item["r_squared"], ".5f"),
                _number(item["linear_limit_absorbance"], ".3f"),
            ]
        )
    low, high = summary["wavelength_range_nm"]
    lines = [
        f"Reference library: {library.n_components} components, {low:g}-{high:g} nm ({summary['n_wavelengths']} points), unit {unit}",
        format_table(
            ["component", "peak nm", f"absorptivity at peak (per {unit} per cm)", "levels", f"range ({unit})", "R^2", "leaves line at A"],
            rows,
        ),
    ]
    limit = summary["linear_limit_absorbance"]
    if limit is not None:
        lines.append(f"Working range: measured absorbance up to {limit:.3f}; sample points above it will be excluded.")
    if library.noise is not None:
        noise = library.noise
        lines.append(
            f"Noise model: sd = sqrt({noise.floor:.2g}^2 + ({noise.proportional:.2g} x A)^2), "
            f"correlation length {noise.correlation_length_nm:.2g} nm"
        )
    for item in summary["components"]:
        for warning in item["warnings"]:
            lines.append(f"warning: {item['component']}: {warning}")
    return "\n".join(lines)


def _value_cell(concentration: float, expanded: float, upper: float) -> str:
    if np.isnan(concentration):
        return "no result"
    if np.isfinite(upper):
        return f"< {upper:.3g}"
    if np.isnan(expanded):
        return f"{concentration:.4g} ± ?"
    return f"{concentration:.4g} ± {expanded:.2g}"


def mixture_report(result: MixtureResult, *, max_scans: int = 200) -> str:
    """Terminal table: one row per scan, concentration ± expanded uncertainty per component, flags.

    Values held at zero show as an upper limit ("< x"). Batches longer than
    ``max_scans`` show the first rows and a count of the rest.
    """
    headers = ["scan", *(f"{name} ({result.unit})" for name in result.components), "rms resid", "cond", "flags"]
    rows = []
    shown = min(result.n_scans, max_scans)
    for i in range(shown):
        cells = [result.scan_names[i]]
        for j in range(len(result.components)):
            cells.append(_value_cell(result.concentration[i, j], result.expanded_uncertainty[i, j], result.upper_limit[i, j]))
        labels = list(result.scan_flags[i]) + sorted({f for per in result.flags[i] for f in per if f != "below-detection"})
        cells += [_number(result.rms_residual[i], ".2g"), _number(result.condition_number[i], ".3g"), ", ".join(dict.fromkeys(labels)) or "ok"]
        rows.append(cells)
    lines = [format_table(headers, rows)]
    if result.n_scans > shown:
        lines.append(f"... and {result.n_scans - shown} more scans (all of them are in results.csv)")
    k = result.coverage_factor[np.isfinite(result.coverage_factor)]
    if k.size:
        lines.append(f"± is the expanded uncertainty (coverage factor k = {np.median(k):.2f}, about 95 %); '< x' is an upper limit.")
    from .quantify import FLAG_TEXT

    used = sorted({f for scan in result.scan_flags for f in scan} | {f for scan in result.flags for per in scan for f in per})
    for flag in used:
        lines.append(f"{flag}: {FLAG_TEXT[flag]}")
    if "interferent" in used:
        lines.append(f"Interferent screen: {result.screening.batch_note()}")
    lines.extend(library_error_lines(result))
    return "\n".join(lines)


def library_error_lines(result: MixtureResult) -> list[str]:
    """The line saying what ``learn_library_error`` did (none when it was not asked for)."""
    learned = result.settings.get("library_error")
    return [f"Library error from this batch: {learned['message']}."] if learned else []


class ProgressLine:
    """A one-line progress indicator for long runs, redrawn in place on a terminal's stderr.

    Shows the current step, its count when it has one, and the time so far.
    Nothing is shown for the first ``delay`` seconds (short runs stay clean),
    nor ever when ``quiet`` or when the stream is not a terminal (a pipe, a log
    file, a test's capture). While one long library call runs and cannot
    report, a background thread keeps the elapsed time moving. The line is
    erased when the ``with`` block ends, so the results print on a clean line.

    Parameters
    ----------
    stream : text stream, optional
        Where to draw (default: ``sys.stderr``).
    quiet : bool
        Never draw.
    delay : float
        Seconds before anything is drawn.
    interval : float
        Seconds between redraws.
    clock : callable
        Monotonic time in seconds (replaceable in tests).

    Examples
    --------
    >>> with ProgressLine() as progress:
    ...     progress("drawing figures", 3, 12)
    """

    def __init__(
        self,
        stream: TextIO | None = None,
        *,
        quiet: bool = False,
        delay: float = 2.0,
        interval: float = 0.25,
        clock: Callable[[], float] = time.monotonic,
    ) -> None:
        self._stream = stream if stream is not None else sys.stderr
        isatty = getattr(self._stream, "isatty", None)
        self.enabled = not quiet and callable(isatty) and bool(isatty())
        self._delay = delay
        self._interval = interval
        self._clock = clock
        self._start = clock()
        self._stage, self._done, self._total = "", 0, 0
        self._line = ""
        self._lock = threading.Lock()
        self._stop = threading.Event()
        self._thread: threading.Thread | None = None

    def __call__(self, stage: str, done: int = 0, total: int = 0) -> None:
        """Record the current step and redraw when due."""
        with self._lock:
            self._stage, self._done, self._total = stage, done, total
        self._draw()

    def _draw(self) -> None:
        if not self.enabled:
            return
        with self._lock:
            elapsed = self._clock() - self._start
            if elapsed < self._delay or not self._stage:
                return
            count = f" {self._done}/{self._total}" if self._total else ""
            line = f"absolve: {self._stage}{count} ({elapsed:.0f} s)"
            if line == self._line:
                return
            # Carriage return and erase-line redraw the same terminal line.
            self._stream.write(f"\r\x1b[K{line}")
            self._stream.flush()
            self._line = line

    def _tick(self) -> None:
        while not self._stop.wait(self._interval):
            self._draw()

    def __enter__(self) -> ProgressLine:
        self._start = self._clock()
        if self.enabled:
            self._thread = threading.Thread(target=self._tick, name="absolve-progress", daemon=True)
            self._thread.start()
        return self

    def __exit__(self, kind: type[BaseException] | None, error: BaseException | None, trace: TracebackType | None) -> None:
        self._stop.set()
        if self._thread is not None:
            self._thread.join()
        with self._lock:
            if self._line:
                self._stream.write("\r\x1b[K")
                self._stream.flush()
