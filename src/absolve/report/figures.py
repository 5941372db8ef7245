"""Figures of a quantification: library spectra, scan fits, residuals, batch overviews.

Built with matplotlib's object API only (``matplotlib.figure.Figure`` and its
own canvas, never ``pyplot``), imported inside the functions, so importing
this module costs nothing and no global plotting state is touched. Each
plotting function takes ``ax=None`` (a new figure is made when omitted) and
returns the axes it drew on.

Colours come from the Okabe-Ito palette, chosen to stay distinguishable for the
common forms of colour-blindness (Okabe, M. & Ito, K., *Color Universal
Design*, 2008, https://jfly.uni-koeln.de/color/). Every axis is labelled with
its unit.
"""

from __future__ import annotations

import contextlib
import io
import re
import textwrap
from collections.abc import Callable, Iterator
from dataclasses import dataclass
from typing import TYPE_CHECKING, Literal, Protocol

import numpy as np
from numpy.typing import NDArray

from .batch import BatchNumbers, ReportBatch, detail_positions, expected_rms_residual, flag_strength

if TYPE_CHECKING:
    from matplotlib.axes import Axes
    from matplotlib.figure import Figure

    from ..library import ReferenceLibrary
    from ..quantify import MixtureResult

__all__ = [
    "COMPONENT_COLOURS",
    "FigureDrawer",
    "FigureFormat",
    "OKABE_ITO",
    "RenderedFigure",
    "detail_scans",
    "draw_figure",
    "figure_bytes",
    "figure_svg",
    "library_figure",
    "plot_library",
    "plot_library_error",
    "plot_overview",
    "plot_residual_sizes",
    "plot_scan_fit",
    "plot_scan_residual",
    "render_figures",
    "scan_figure",
    "scan_figure_key",
]

FigureFormat = Literal["png", "svg"]
ProgressCallback = Callable[[int, int], None]

OKABE_ITO: dict[str, str] = {
    "black": "#000000",
    "orange": "#E69F00",
    "sky blue": "#56B4E9",
    "bluish green": "#009E73",
    "yellow": "#F0E442",
    "blue": "#0072B2",
    "vermillion": "#D55E00",
    "reddish purple": "#CC79A7",
}
# Components take the palette's strong colours in this order; vermillion is
# kept for flags and the fitted line, yellow for shading (too light for lines).
COMPONENT_COLOURS: tuple[str, ...] = tuple(OKABE_ITO[name] for name in ("blue", "orange", "bluish green", "reddish purple", "sky blue"))
_LINE_STYLES = ("-", "--", "-.", ":")
_FLAG = OKABE_ITO["vermillion"]
_SHADE = OKABE_ITO["yellow"]
_GREY = "#7a7a7a"
# Beyond this many scans the batch figures draw their points as one embedded
# image: a vector marker per point would make the report tens of megabytes.
_RASTER_ABOVE = 300
_RASTER_DPI = 110
_NAMED_TICKS_UP_TO = 30


def _style(j: int) -> dict[str, str]:
    """Colour and line style of component ``j`` (styles vary once the colours run out)."""
    n = len(COMPONENT_COLOURS)
    return {"color": COMPONENT_COLOURS[j % n], "linestyle": _LINE_STYLES[(j // n) % len(_LINE_STYLES)]}


def _plain(text: str) -> str:
    """User text shown literally: a '$' would otherwise start matplotlib's math notation."""
    return str(text).replace("$", r"\$")


def _legend_outside(ax: Axes, fontsize: float = 7.5) -> None:
    """Legend in a column right of the axes, where it never hides data."""
    ax.legend(loc="upper left", bbox_to_anchor=(1.01, 1.0), borderaxespad=0.0, frameon=False, fontsize=fontsize)


def _new_axes(width: float, height: float) -> Axes:
    from matplotlib.figure import Figure

    return Figure(figsize=(width, height), layout="constrained").subplots()


def _runs(mask: NDArray[np.bool_], wavelengths: NDArray[np.float64]) -> list[tuple[float, float]]:
    """Wavelength spans of the runs of True in ``mask``, each widened by half a grid step."""
    if not mask.any():
        return []
    edges = np.diff(np.concatenate([[0], mask.astype(np.int8), [0]]))
    starts, stops = np.flatnonzero(edges == 1), np.flatnonzero(edges == -1) - 1
    step = np.diff(wavelengths)
    half_before = np.concatenate([[step[0] if step.size else 0.5], step]) / 2
    half_after = np.concatenate([step, [step[-1] if step.size else 0.5]]) / 2
    return [(float(wavelengths[a] - half_before[a]), float(wavelengths[b] + half_after[b])) for a, b in zip(starts, stops)]


# --------------------------------------------------------------------------- library


def plot_library(library: ReferenceLibrary, ax: Axes | None = None, *, coverage: float = 2.0) -> Axes:
    """Absorptivity spectra of the library's components with ``coverage`` x standard-error bands.

    Parameters
    ----------
    library : ReferenceLibrary
    ax : matplotlib Axes, optional
        Where to draw; a new figure is made when omitted.
    coverage : float
        Half-width of the shaded band in standard errors.

    Returns
    -------
    matplotlib Axes
    """
    ax = ax if ax is not None else _new_axes(7.5, 3.6)
    grid = library.wavelengths
    for j, name in enumerate(library.names):
        style = _style(j)
        k, se = library.absorptivity[j], library.std_error[j]
        ax.fill_between(grid, k - coverage * se, k + coverage * se, color=style["color"], alpha=0.3, linewidth=0)
        ax.plot(grid, k, linewidth=1.4, label=_plain(name), **style)
    ax.set_xlabel("wavelength (nm)")
    ax.set_ylabel(f"absorptivity (absorbance per {_plain(library.unit)} per cm)")
    ax.set_xlim(grid[0], grid[-1])
    _legend_outside(ax, 8)
    return ax


def plot_library_error(library: ReferenceLibrary, ax: Axes | None = None, *, coverage: float = 2.0) -> Axes:
    """Half-width of the absorptivity band (``coverage`` x standard error) per component and wavelength.

    The band of :func:`plot_library` is often too narrow to see; this shows where
    the calibration is least certain. Components without standard errors draw nothing.
    """
    ax = ax if ax is not None else _new_axes(7.5, 1.8)
    grid = library.wavelengths
    for j, name in enumerate(library.names):
        if np.any(library.std_error[j] > 0):
            ax.plot(grid, coverage * library.std_error[j], linewidth=1.0, label=_plain(name), **_style(j))
    if not np.any(library.std_error > 0):
        ax.text(0.5, 0.5, "no standard errors: absorptivities taken as given", transform=ax.transAxes, ha="center", va="center", fontsize=8)
    ax.set_xlabel("wavelength (nm)")
    ax.set_ylabel(f"{coverage:g} × std. error\n(per {_plain(library.unit)} per cm)")
    ax.set_xlim(grid[0], grid[-1])
    return ax


def library_figure(library: ReferenceLibrary) -> Figure:
    """Two panels: absorptivity spectra with ±2 standard-error bands, and the band half-width.

    A library without standard errors gets the first panel only.
    """
    from matplotlib.figure import Figure

    if not np.any(library.std_error > 0):
        return plot_library(library).figure  # type: ignore[return-value]
    figure = Figure(figsize=(7.5, 4.8), layout="constrained")
    top, bottom = figure.subplots(2, 1, sharex=True, height_ratios=[2.4, 1])
    plot_library(library, top)
    top.set_xlabel("")
    plot_library_error(library, bottom)
    return figure


# --------------------------------------------------------------------------- one scan


def _component_signals(result: MixtureResult, library: ReferenceLibrary, scan: int) -> NDArray[np.float64]:
    """Absorbance each component contributes to the scan in the cell, shape (n_components, n_wavelengths)."""
    absorptivity, _ = library.on_grid(result.wavelengths)
    in_cell = result.concentration[scan] / float(result.settings.get("dilution", 1.0))
    return in_cell[:, None] * absorptivity * float(result.settings.get("path_length_cm", 1.0))


def plot_scan_fit(result: MixtureResult, library: ReferenceLibrary, scan: int, ax: Axes | None = None) -> Axes:
    """Measured and fitted absorbance of one scan with each component's contribution and the baseline.

    Points the fit did not use (saturated, above the working range or the
    instrument ceiling) are shaded grey; the measured curve shows only used
    points, after any stray-light correction the library asks for.

    Parameters
    ----------
    result : MixtureResult
    library : ReferenceLibrary
        The library the result came from.
    scan : int
        Index of the scan in the batch.
    ax : matplotlib Axes, optional

    Returns
    -------
    matplotlib Axes
    """
    ax = ax if ax is not None else _new_axes(7.5, 3.4)
    grid = result.wavelengths
    fitted = result.fitted[scan]
    measured = fitted + result.residuals[scan]
    signals = _component_signals(result, library, scan)
    for low, high in _runs(~result.used[scan], grid):
        ax.axvspan(low, high, color=_GREY, alpha=0.18, linewidth=0)
    corrected = "\n(stray-light corrected)" if library.stray_light > 0 else ""
    ax.plot(grid, measured, color=OKABE_ITO["black"], linewidth=1.6, label=f"measured{corrected}")
    ax.plot(grid, fitted, color=_FLAG, linewidth=1.2, linestyle="--", label="fitted")
    for j, name in enumerate(result.components):
        if np.all(np.isfinite(signals[j])):
            ax.plot(grid, signals[j], linewidth=1.0, alpha=0.9, label=_plain(name), **_style(j))
    if result.settings.get("baseline", "none") != "none":
        ax.plot(grid, fitted - np.nansum(signals, axis=0), color=_GREY, linewidth=0.9, linestyle=":", label="baseline")
    if (~result.used[scan]).any():
        ax.axvspan(np.nan, np.nan, color=_GREY, alpha=0.18, linewidth=0, label="not used")
    ax.set_ylabel("absorbance")
    ax.set_xlabel("wavelength (nm)")
    ax.set_xlim(grid[0], grid[-1])
    ax.set_title(_plain(result.scan_names[scan]), loc="left", fontsize=10)
    _legend_outside(ax)
    return ax


def _expected_residual_sd(result: MixtureResult, library: ReferenceLibrary, scan: int) -> NDArray[np.float64] | None:
    """Standard deviation the residual should have: instrument noise at the fitted absorbance plus
    the calibration's absorptivity errors times the concentrations in the cell (None without a noise model)."""
    if library.noise is None:
        return None
    _, std_error = library.on_grid(result.wavelengths)
    in_cell = np.nan_to_num(result.concentration[scan]) / float(result.settings.get("dilution", 1.0))
    path = float(result.settings.get("path_length_cm", 1.0))
    variance = library.noise.standard_deviation(result.fitted[scan]) ** 2 + (in_cell**2) @ (std_error * path) ** 2
    return np.sqrt(variance)


def plot_scan_residual(result: MixtureResult, library: ReferenceLibrary, scan: int, ax: Axes | None = None) -> Axes:
    """Residual of one scan against its expected noise band, with any flagged region shaded.

    The band is ±2 standard deviations from the library's noise model at the
    fitted absorbance (including the calibration's absorptivity errors); a
    library without a noise model gets ±2 x the scan's own rms residual. When
    the interferent screen flagged the scan, the window of its diagnosis is
    shaded and its message is the title.
    """
    ax = ax if ax is not None else _new_axes(7.5, 2.2)
    grid = result.wavelengths
    residual = result.residuals[scan]
    sd = _expected_residual_sd(result, library, scan)
    if sd is None:
        sd = np.full(grid.size, result.rms_residual[scan])
        band_label = "±2 × rms residual\n(no noise model)"
    else:
        band_label = "±2 sd expected\nfrom noise"
    sd = np.where(result.used[scan], sd, np.nan)
    for low, high in _runs(~result.used[scan], grid):
        ax.axvspan(low, high, color=_GREY, alpha=0.18, linewidth=0)
    ax.fill_between(grid, -2 * sd, 2 * sd, color=_GREY, alpha=0.3, linewidth=0, label=band_label)
    diagnosis = result.screening.diagnoses[scan]
    if diagnosis is not None:
        low, high = diagnosis.window_nm
        ax.axvspan(low, high, color=_SHADE, alpha=0.45, linewidth=0, label=f"flagged: {diagnosis.kind}")
        ax.set_title(_plain(_wrapped(diagnosis.message)), loc="left", fontsize=7)
    ax.axhline(0.0, color=_GREY, linewidth=0.6)
    ax.plot(grid, residual, color=OKABE_ITO["black"], linewidth=0.9, label="residual")
    ax.set_xlabel("wavelength (nm)")
    ax.set_ylabel("residual\n(absorbance)")
    ax.set_xlim(grid[0], grid[-1])
    _legend_outside(ax)
    return ax


def _wrapped(message: str) -> str:
    return textwrap.fill(message, 88)


def scan_figure(result: MixtureResult, library: ReferenceLibrary, scan: int) -> Figure:
    """Two panels for one scan: the fit with its components above, the residual and noise band below."""
    from matplotlib.figure import Figure

    # Fixed margins: a report may hold dozens of these, and automatic layout doubles the drawing time.
    diagnosis = result.screening.diagnoses[scan]
    lines = 0 if diagnosis is None else _wrapped(diagnosis.message).count("\n") + 1
    # Fixed margins in inches (a report may hold dozens of these figures, and
    # automatic layout doubles the drawing time): title above, legends in a
    # column on the right, room between the panels for the diagnosis.
    width, top_h, bottom_h, gap = 7.5, 2.7, 1.3, 0.25 + 0.12 * lines
    height = 0.35 + top_h + gap + bottom_h + 0.5
    figure = Figure(figsize=(width, height))
    top, bottom = figure.subplots(
        2, 1, sharex=True,
        gridspec_kw={"height_ratios": [top_h, bottom_h], "hspace": gap / ((top_h + bottom_h) / 2),
                     "left": 1.05 / width, "right": 1 - 1.75 / width, "top": 1 - 0.35 / height, "bottom": 0.5 / height},
    )
    plot_scan_fit(result, library, scan, top)
    top.set_xlabel("")
    plot_scan_residual(result, library, scan, bottom)
    return figure


# --------------------------------------------------------------------------- batches


def _scan_axis(ax: Axes, result: MixtureResult | BatchNumbers) -> NDArray[np.float64]:
    """Scan positions 1..n; with few scans their names label the ticks."""
    x = np.arange(1, result.n_scans + 1, dtype=np.float64)
    if result.n_scans <= _NAMED_TICKS_UP_TO:
        ax.set_xticks(x, [_plain(name) for name in result.scan_names], rotation=40, ha="right", fontsize=7)
        ax.set_xlabel("scan")
    else:
        ax.set_xlabel("scan (position in the batch)")
    ax.set_xlim(0.3, result.n_scans + 0.7)
    return x


def _points(many: bool, size: float) -> dict[str, object]:
    """Marker settings: round vector dots for a few scans; for many, small squares without edges,
    rasterised, which stay pixel-sharp and compress well (a few hundred kB for 10,000 scans)."""
    if many:
        return {"marker": "s", "markersize": 1.6, "markeredgewidth": 0.0, "linestyle": "none", "rasterized": True}
    return {"marker": "o", "markersize": size, "linestyle": "none"}


def plot_overview(result: MixtureResult | BatchNumbers, ax: Axes | None = None) -> Axes:
    """Concentration of every component in every scan, with its expanded-uncertainty bar.

    Batches of more than a few hundred scans get a compact dot plot instead:
    the bars would merge into a band, and the points are drawn as one embedded
    image (the axes and text stay vector). ``result`` may be a whole result or
    just the numbers drawn (:class:`~absolve.report.batch.BatchNumbers`).
    """
    ax = ax if ax is not None else _new_axes(7.5, 3.4)
    x = _scan_axis(ax, result)
    many = result.n_scans > _RASTER_ABOVE
    n_comp = len(result.components)
    # Side by side when there is room, so the bars of different components do not hide each other.
    spread = 0.0 if result.n_scans > 60 else 0.5 / max(n_comp, 1)
    for j, name in enumerate(result.components):
        position = x + (j - (n_comp - 1) / 2) * spread
        colour = _style(j)["color"]
        if many:
            ax.plot(position, result.concentration[:, j], color=colour, label=_plain(name), **_points(many, 4))
        else:
            ax.errorbar(
                position, result.concentration[:, j], yerr=result.expanded_uncertainty[:, j],
                fmt="o", markersize=4, elinewidth=1.0, capsize=0, color=colour, label=_plain(name),
            )
    ax.set_ylabel(f"concentration ({_plain(result.unit)})")
    ax.legend(loc="upper left", bbox_to_anchor=(1.01, 1.0), borderaxespad=0.0, frameon=False, fontsize=8, markerscale=3 if many else 1)
    return ax


def plot_residual_sizes(
    result: MixtureResult | BatchNumbers,
    library: ReferenceLibrary | None = None,
    ax: Axes | None = None,
    *,
    expected: NDArray[np.float64] | None = None,
) -> Axes:
    """Root-mean-square residual of every scan, with the scans the interferent screen flagged marked.

    The rms residual expected from noise alone at each scan's fitted
    absorbance is drawn too (grey): ``expected`` when given, else the
    ``expected_rms`` of :class:`~absolve.report.batch.BatchNumbers`, else
    computed from a result's fitted spectra with the library's noise model
    when it has one.
    """
    ax = ax if ax is not None else _new_axes(7.5, 2.8)
    x = _scan_axis(ax, result)
    many = result.n_scans > _RASTER_ABOVE
    rms = result.rms_residual
    if expected is None and isinstance(result, BatchNumbers):
        expected = result.expected_rms
    elif expected is None and library is not None:
        expected = expected_rms_residual(result, library)
    if expected is not None:
        grey = {**_points(many, 10), "marker": "s" if many else "_"}
        ax.plot(x, expected, color=_GREY, label="expected from noise", **grey)
    ax.plot(x, rms, color=OKABE_ITO["black"], label="rms residual", **_points(many, 4))
    flagged = np.flatnonzero(result.interferent)
    if flagged.size:
        ring = {**_points(many, 9), "markersize": 2.4} if many else {"marker": "o", "markersize": 9, "linestyle": "none", "markerfacecolor": "none", "markeredgewidth": 1.5}
        ax.plot(x[flagged], rms[flagged], color=_FLAG, markeredgecolor=_FLAG, label="flagged by the\ninterferent screen", **ring)
    finite = rms[np.isfinite(rms) & (rms > 0)]
    if finite.size and finite.max() > 20 * finite.min():
        ax.set_yscale("log")
    ax.set_ylabel("rms residual (absorbance)")
    ax.legend(loc="upper left", bbox_to_anchor=(1.01, 1.0), borderaxespad=0.0, frameon=False, fontsize=8, markerscale=3 if many else 1)
    return ax


# --------------------------------------------------------------------------- selection and output


def detail_scans(result: MixtureResult, count: int) -> tuple[list[int], list[int]]:
    """Scans worth a detailed figure: the first ``count``, and up to ``count`` flagged ones.

    Flagged scans (any scan flag or an interferent verdict) are taken most
    strongly flagged first: by the interferent screen's p-value, then in batch order.

    Returns
    -------
    first, flagged : list of int
        Indices of the first scans, and of the flagged scans not among them.
    """
    count = max(int(count), 0)
    flagged, p = flag_strength(result)
    chosen = detail_positions(np.arange(result.n_scans), p, flagged, count).tolist()
    n_first = min(count, result.n_scans)
    return chosen[:n_first], chosen[n_first:]


_ID = re.compile(r'(\bid="|href="#|url\(#)([^")]+)')
_PATH_DATA = re.compile(r' d="[^"]*"')
_DIGITS = re.compile(r"(\d\.\d\d)\d+")


def figure_svg(figure: Figure, prefix: str) -> str:
    """The figure as an ``<svg>`` element ready to inline into HTML.

    Ids get ``prefix`` (so that several figures can share a page) and are
    numbered in order, which with the metadata and comments stripped makes the
    text the same on every run. ``xlink:href`` becomes plain ``href`` so the
    element needs no extra namespace.
    """
    buffer = io.StringIO()
    figure.savefig(buffer, format="svg", dpi=_RASTER_DPI, metadata={"Date": None})
    text = buffer.getvalue()
    text = text[text.index("<svg") :]
    text = re.sub(r"<metadata>.*?</metadata>\s*", "", text, flags=re.DOTALL)
    text = re.sub(r"<!--.*?-->\s*", "", text, flags=re.DOTALL)
    text = text.replace("xlink:href=", "href=").replace(' xmlns:xlink="http://www.w3.org/1999/xlink"', "")
    names: dict[str, str] = {}
    for match in _ID.finditer(text):
        if match.group(1) == 'id="':
            names.setdefault(match.group(2), f"{prefix}-{len(names)}")
    text = _ID.sub(lambda m: m.group(1) + names.get(m.group(2), m.group(2)), text)
    # Hundredths of a point are far below what a screen or printer shows; the shorter numbers shrink the page.
    return _PATH_DATA.sub(lambda m: _DIGITS.sub(r"\1", m.group(0)), text).strip()


def figure_bytes(figure: Figure, file_format: FigureFormat) -> bytes:
    """The figure as a PNG (150 dpi) or SVG file."""
    buffer = io.BytesIO()
    figure.savefig(buffer, format=file_format, dpi=150, metadata={"Software": None} if file_format == "png" else {"Date": None})
    return buffer.getvalue()


@dataclass(frozen=True)
class RenderedFigure:
    """One figure of the report, drawn.

    Attributes
    ----------
    key : str
        File-name stem, unique within the report (also the SVG id prefix).
    place : {"library", "overview", "residual-sizes", "scan"}
        Where it belongs in the report.
    scan : int or None
        Index of the scan for ``place == "scan"``.
    caption : str
        Plain text.
    svg : str
        Inline ``<svg>`` element.
    file : bytes or None
        The figure as a file in the requested format, when one was requested.
    """

    key: str
    place: str
    scan: int | None
    caption: str
    svg: str
    file: bytes | None = None


def scan_figure_key(index: int, name: str) -> str:
    """File stem (and SVG id stem) of the detailed figure of scan ``index`` (0-based) named ``name``."""
    safe = re.sub(r"[^A-Za-z0-9._-]+", "_", name).strip("._")[:60]
    return f"scan-{index + 1:05d}" + (f"-{safe}" if safe else "")


def render_figures(
    result: MixtureResult | ReportBatch,
    library: ReferenceLibrary,
    *,
    detail: int = 12,
    file_format: FigureFormat | None = None,
    progress: ProgressCallback | None = None,
    drawer: FigureDrawer | None = None,
) -> tuple[RenderedFigure, ...]:
    """Draw every figure of the report: the library, the batch overviews, and the chosen scans.

    Parameters
    ----------
    result : MixtureResult or ReportBatch
        A whole result with its spectra, or a batch gathered chunk by chunk
        (which brings its own choice of scans to draw; ``detail`` is then unused).
    library : ReferenceLibrary
    detail : int
        Detailed scan figures for the first ``detail`` scans and for up to
        ``detail`` flagged ones (see :func:`detail_scans`).
    file_format : {"png", "svg"}, optional
        Also produce each figure as a file of this format.
    progress : callable, optional
        Called as ``progress(done, total)`` after each figure.
    drawer : FigureDrawer, optional
        Draws each figure instead of :func:`draw_figure` in this process (for
        example in a worker process, ahead of time); the figures are the same.

    Returns
    -------
    tuple of RenderedFigure
        Scan figures carry the scan's index in the batch.
    """
    batch = result if isinstance(result, ReportBatch) else ReportBatch.of(result, library, detail)
    numbers, details = batch.numbers, batch.details
    jobs: list[tuple[str, str, int | None, str]] = [
        ("library", "library", None, "Absorptivity of each component (bands: ±2 standard errors from the calibration) and the band half-width."),
        ("overview", "overview", None, _overview_caption(numbers)),
        ("residual-sizes", "residual-sizes", None, "Root-mean-square residual per scan against what noise alone would give; scans flagged by the interferent screen are marked in red-orange."),
    ]
    for local, i in enumerate(details.indices):
        jobs.append((scan_figure_key(i, numbers.scan_names[i]), "scan", local, _scan_caption(details.result, local)))
    rendered = []
    for done, (key, place, scan, caption) in enumerate(jobs, start=1):
        data = None if place == "library" else numbers if scan is None else details.result.take([scan])
        svg, file = (draw_figure if drawer is None else drawer.draw)(key, place, library, data, file_format)
        rendered.append(RenderedFigure(key, place, None if scan is None else details.indices[scan], caption, svg, file))
        if progress is not None:
            progress(done, len(jobs))
    return tuple(rendered)


class FigureDrawer(Protocol):
    """Something that draws a report figure as :func:`draw_figure` does."""

    def draw(
        self, key: str, place: str, library: ReferenceLibrary, data: MixtureResult | BatchNumbers | None, file_format: FigureFormat | None
    ) -> tuple[str, bytes | None]: ...


def draw_figure(
    key: str,
    place: str,
    library: ReferenceLibrary,
    data: MixtureResult | BatchNumbers | None,
    file_format: FigureFormat | None,
) -> tuple[str, bytes | None]:
    """One figure of the report as inline SVG text, and as a file when a format is asked for.

    Parameters
    ----------
    key : str
        The figure's file stem; its SVG ids start with ``f-{key}``, so they
        are unique on the page and the same whichever process draws it.
    place : {"library", "overview", "residual-sizes", "scan"}
    library : ReferenceLibrary
    data : MixtureResult or BatchNumbers or None
        The whole batch's numbers for the overviews (:class:`BatchNumbers`, or
        a result), the one scan (with its spectra) for a scan figure, None for
        the library figure.
    file_format : {"png", "svg"}, optional
    """
    with _svg_settings():
        if place == "library":
            figure = library_figure(library)
        elif data is None:
            raise ValueError(f"the {place!r} figure needs the scans' results")
        elif place == "overview":
            figure = plot_overview(data).figure
        elif place == "residual-sizes":
            figure = plot_residual_sizes(data, library).figure
        elif place == "scan" and not isinstance(data, BatchNumbers):
            figure = scan_figure(data, library, 0)
        else:
            raise ValueError(f"cannot draw a {place!r} figure from {type(data).__name__}")
        return figure_svg(figure, f"f-{key}"), None if file_format is None else figure_bytes(figure, file_format)


@contextlib.contextmanager
def _svg_settings() -> Iterator[None]:
    """SVG text as text elements, not glyph outlines (quicker to write, and smaller), and ids the same on every run."""
    import matplotlib

    with matplotlib.rc_context({"svg.fonttype": "none", "svg.hashsalt": "absolve"}):
        yield


def _overview_caption(result: BatchNumbers) -> str:
    if result.n_scans > _RASTER_ABOVE:
        return "Concentration per scan and component (one dot each; the uncertainties are in the results table and results.csv)."
    return "Concentration per scan and component; bars are expanded uncertainties (about 95 %), often smaller than the dots."


def _scan_caption(result: MixtureResult, scan: int) -> str:
    flags = ", ".join(result.scan_flags[scan]) or "no scan flags"
    diagnosis = result.screening.diagnoses[scan]
    text = f"{result.scan_names[scan]}: measured and fitted absorbance with each component's contribution; residual with its noise band ({flags})."
    return text if diagnosis is None else f"{text} {diagnosis.message}"
