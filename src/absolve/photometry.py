"""Stray-light correction of measured absorbance.

Heterochromatic stray light adds a fraction ``s`` of unabsorbed light to what
reaches the detector, so the measured transmittance is
``T_meas = (T + s) / (1 + s)`` and high absorbances read low (common practice,
no source; the form is the usual single-parameter stray-light model). Given
``s`` the true absorbance is recovered as ``A = -log10((1 + s) T_meas - s)``,
and the noise grows by ``dA/dA_meas = (1 + s) T_meas / ((1 + s) T_meas - s)``.
Points where ``(1 + s) T_meas - s`` is too small carry no usable information.
"""

from __future__ import annotations

import numpy as np
from numpy.typing import NDArray

__all__ = ["correct_stray_light", "stray_light_gain"]

# Correction is refused where the corrected transmittance would fall below
# this multiple of the stray-light fraction: the noise gain there exceeds ~2.
_MARGIN = 1.0


def correct_stray_light(absorbance: NDArray[np.float64], fraction: float) -> NDArray[np.float64]:
    """Absorbance corrected for a stray-light ``fraction``; NaN where the correction breaks down."""
    if fraction <= 0:
        return absorbance
    with np.errstate(over="ignore", invalid="ignore"):
        transmittance = (1.0 + fraction) * 10.0 ** (-absorbance) - fraction
        return np.where(transmittance > _MARGIN * fraction, -np.log10(np.where(transmittance > 0, transmittance, 1.0)), np.nan)


def stray_light_gain(absorbance: NDArray[np.float64], fraction: float) -> NDArray[np.float64]:
    """Factor by which the correction scales noise at each measured absorbance."""
    if fraction <= 0:
        return np.ones_like(absorbance)
    with np.errstate(over="ignore", invalid="ignore"):
        measured = (1.0 + fraction) * 10.0 ** (-absorbance)
        return measured / np.maximum(measured - fraction, 1e-300)
