"""Figure of the cross-validation behind a PLS inverse calibration."""

from __future__ import annotations

from typing import TYPE_CHECKING

import numpy as np

if TYPE_CHECKING:
    from matplotlib.axes import Axes

    from ..inverse import InverseModel

__all__ = ["plot_rmsecv"]


def plot_rmsecv(model: InverseModel, ax: Axes | None = None) -> Axes:
    """Plot RMSECV against the number of latent variables, one line per component.

    Error bars are one standard error across folds (carried from the mean
    squared error to its root by the delta method, se / (2 RMSECV)); the
    chosen number of latent variables is drawn as a large filled marker.
    The RMSECV axis is logarithmic because the curve falls by decades over
    the first latent variables.

    Parameters
    ----------
    model : InverseModel
        A trained model.
    ax : matplotlib Axes, optional
        Where to draw; a new figure (matplotlib's ``Figure`` API, no pyplot
        state) is made when omitted.

    Returns
    -------
    matplotlib Axes
    """
    if ax is None:
        from matplotlib.figure import Figure

        ax = Figure(figsize=(6.0, 4.0), layout="constrained").subplots()
    cv = model.cv_
    latent = cv.latent_variables
    for j, name in enumerate(model.components_):
        curve = cv.rmsecv[j]
        spread = cv.mse_standard_error[j] / (2.0 * np.where(curve > 0, curve, np.inf))
        line = ax.errorbar(latent, curve, yerr=spread, marker="o", markersize=3, capsize=2, label=name)
        chosen = int(cv.chosen[j])
        ax.plot([chosen], [curve[chosen]], marker="o", markersize=9, color=line.lines[0].get_color(), linestyle="none")
    ax.set_yscale("log")
    ax.set_xlabel("latent variables")
    ax.set_ylabel(f"RMSECV ({model.unit_})")
    ax.set_xticks(latent)
    ax.set_title(f"Cross-validation ({cv.folds} folds); large marker: chosen")
    ax.legend(frameon=False)
    return ax
