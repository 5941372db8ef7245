"""Figure of a wavelength plan: the library's expected absorbances with the chosen wavelengths marked."""

from __future__ import annotations

import io
from typing import TYPE_CHECKING

import numpy as np

if TYPE_CHECKING:
    from matplotlib.axes import Axes

    from ..library import ReferenceLibrary
    from ..planning import WavelengthPlan

__all__ = ["FIGURE_FORMATS", "plot_plan", "render_plan_figure"]

FIGURE_FORMATS: tuple[str, ...] = ("png", "svg")

# Colour-blind-safe qualitative palette (Okabe & Ito, "Color Universal Design", 2008),
# black left out because it draws the mixture; dashes tell more than seven components apart.
_PALETTE = ("#E69F00", "#56B4E9", "#009E73", "#F0E442", "#0072B2", "#D55E00", "#CC79A7")
_DASHES = ("-", "--", "-.", ":")


def plot_plan(plan: WavelengthPlan, library: ReferenceLibrary, ax: Axes | None = None) -> Axes:
    """Plot each component's expected absorbance, the mixture, the ceiling and the plan.

    Each component is drawn at the concentration the plan was made for (1 cm path),
    the expected mixture as a black line, the absorbance ceiling as a dashed grey
    line, wavelengths outside the candidate range shaded, and the chosen wavelengths
    as vertical lines with a marker on the mixture (scan windows as shaded bands).

    Parameters
    ----------
    plan : WavelengthPlan
        The plan to show.
    library : ReferenceLibrary
        The library the plan was made from.
    ax : matplotlib Axes, optional
        Where to draw; a new figure (matplotlib's ``Figure`` API, no pyplot state)
        is made when omitted.

    Returns
    -------
    matplotlib Axes
    """
    if ax is None:
        from matplotlib.figure import Figure

        ax = Figure(figsize=(7.0, 4.2), layout="constrained").subplots()
    grid = library.wavelengths
    contributions = library.absorptivity * plan.expected_concentration[:, None]
    for j, name in enumerate(plan.component_names):
        ax.plot(
            grid,
            contributions[j],
            color=_PALETTE[j % len(_PALETTE)],
            linestyle=_DASHES[(j // len(_PALETTE)) % len(_DASHES)],
            linewidth=1.4,
            label=f"{name} at {plan.expected_concentration[j]:.4g} {plan.unit}",
        )
    mixture = contributions.sum(axis=0)
    ax.plot(grid, mixture, color="black", linewidth=1.8, label="expected mixture")
    ax.axhline(plan.max_absorbance, color="0.45", linestyle="--", linewidth=1.0, label=f"ceiling {plan.max_absorbance:g}")
    low, high = plan.range_nm
    for start, stop in ((grid[0], low), (high, grid[-1])):
        if stop > start:
            ax.axvspan(start, stop, color="0.88", zorder=0)
    if plan.windows_nm is not None:
        for k, (start, stop) in enumerate(plan.windows_nm):
            # Hatched rather than tinted, so the band is not mistaken for a component's colour.
            ax.axvspan(
                start, stop, facecolor="none", edgecolor="0.35", hatch="///", linewidth=0.8, zorder=0,
                label="scan window" if k == 0 else None,
            )
    else:
        for k, wavelength in enumerate(plan.wavelengths_nm):
            ax.axvline(wavelength, color="0.25", linestyle=":", linewidth=1.0, label="chosen wavelength" if k == 0 else None)
        ax.plot(plan.wavelengths_nm, plan.expected_absorbance, "o", color="black", markersize=5, linestyle="none")
    ax.set_xlim(grid[0], grid[-1])
    ax.set_ylim(bottom=min(0.0, float(np.min(contributions))))
    ax.set_xlabel("wavelength (nm)")
    ax.set_ylabel("expected absorbance (1 cm)")
    status = "proven optimal" if plan.optimal else f"within {plan.gap_bound:.3g}x of optimal"
    ax.set_title(f"Wavelength plan ({plan.criterion}, {status})")
    ax.legend(frameon=False, fontsize="small")
    return ax


def render_plan_figure(plan: WavelengthPlan, library: ReferenceLibrary, fmt: str) -> bytes:
    """The figure of :func:`plot_plan` as the bytes of a ``"png"`` or ``"svg"`` file."""
    from matplotlib.figure import Figure

    figure = Figure(figsize=(7.0, 4.2), layout="constrained")
    plot_plan(plan, library, figure.subplots())
    buffer = io.BytesIO()
    figure.savefig(buffer, format=fmt, dpi=150)
    return buffer.getvalue()
