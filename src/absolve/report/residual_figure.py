"""Residual figure of one checked scan: what the library left unexplained, against the noise band."""

from __future__ import annotations

from typing import TYPE_CHECKING

import numpy as np

from ..library import NoiseModel
from ..quantify import MixtureResult

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
        from matplotlib.figure import Figure

        # Fixed margins: a layout engine measured every text on every draw and took 40 % of a plot's time
        # (hundreds of plots for a large batch); the labels here are of bounded length.
        figure = Figure(figsize=(7.0, 3.2))
        figure.subplots_adjust(left=0.14, right=0.98, bottom=0.15, top=0.9)
        ax = figure.add_subplot()
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


def residual_png(result: MixtureResult, index: int, noise: NoiseModel | None) -> bytes:
    """The residual figure of scan ``index`` as PNG bytes."""
    import io

    from matplotlib.backends.backend_agg import FigureCanvasAgg

    ax = plot_residual(result, index, noise)
    figure = ax.figure
    FigureCanvasAgg(figure)
    buffer = io.BytesIO()
    figure.savefig(buffer, format="png", dpi=110)
    return buffer.getvalue()
