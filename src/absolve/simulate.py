"""Realistic synthetic scans, for the demo and for statistical self-checks.

Real spectrophotometer output differs from textbook Beer-Lambert in ways
that matter for honest uncertainties: bands are asymmetric with shoulders,
photometric noise grows with absorbance and is correlated along wavelength
(the instrument smooths and oversamples), cuvettes add small baseline
offsets, and stray light bends the response at high absorbance. This module
produces such scans from known truths, so tests can measure recovery and
coverage where the answer is known.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np
from numpy.typing import ArrayLike, NDArray

__all__ = ["Band", "Instrument", "band_spectrum", "random_absorptivities", "measure"]


@dataclass(frozen=True)
class Band:
    """One absorption band: a skewed Gaussian.

    Attributes
    ----------
    center_nm, width_nm : float
        Position of the maximum and the standard deviation-like width.
    height : float
        Absorptivity at the maximum.
    skew : float
        Asymmetry: the long-wavelength side is ``1 + skew`` times wider.
    """

    center_nm: float
    width_nm: float
    height: float
    skew: float = 0.0


def band_spectrum(wavelengths: ArrayLike, bands: Sequence[Band]) -> NDArray[np.float64]:
    """Sum of skewed Gaussian bands evaluated at ``wavelengths``."""
    x = np.asarray(wavelengths, dtype=np.float64)
    total = np.zeros_like(x)
    for band in bands:
        width = np.where(x > band.center_nm, band.width_nm * (1.0 + band.skew), band.width_nm)
        total += band.height * np.exp(-0.5 * ((x - band.center_nm) / width) ** 2)
    return total


def random_absorptivities(
    wavelengths: ArrayLike, n_components: int, rng: np.random.Generator, *, peak_range: tuple[float, float] | None = None
) -> NDArray[np.float64]:
    """Random overlapping dye-like absorptivity spectra, shape (n_components, n_wavelengths).

    Each component has a main band plus a shoulder; peaks are spread over
    ``peak_range`` (default: the middle 80 % of the grid) so that bands overlap.
    Heights are of order 1 (absorbance per unit concentration per cm).
    """
    x = np.asarray(wavelengths, dtype=np.float64)
    low, high = peak_range or (x[0] + 0.1 * (x[-1] - x[0]), x[-1] - 0.1 * (x[-1] - x[0]))
    centres = np.sort(rng.uniform(low, high, n_components))
    spectra = np.empty((n_components, x.size))
    for row, centre in enumerate(centres):
        width = rng.uniform(0.05, 0.09) * (x[-1] - x[0])
        main = Band(centre, width, 1.0, skew=rng.uniform(0.0, 0.4))
        shoulder = Band(centre - rng.uniform(0.8, 1.4) * width, 0.8 * width, rng.uniform(0.15, 0.4))
        spectra[row] = band_spectrum(x, [main, shoulder]) * rng.uniform(0.6, 1.4)
    return spectra


@dataclass(frozen=True)
class Instrument:
    """How a simulated spectrophotometer distorts the true absorbance.

    Attributes
    ----------
    noise_floor : float
        Noise standard deviation at zero absorbance.
    noise_proportional : float
        Relative noise growth with absorbance.
    correlation_length_nm : float
        Noise correlation length along wavelength (AR(1)).
    stray_light : float
        Stray-light fraction s; measured A = -log10((10^-A + s) / (1 + s)).
    baseline_offset_sd : float
        Standard deviation of a constant offset per scan (cuvette mismatch).
    baseline_slope_sd : float
        Standard deviation of a linear baseline tilt per 100 nm.
    """

    noise_floor: float = 0.0015
    noise_proportional: float = 0.004
    correlation_length_nm: float = 3.0
    stray_light: float = 0.0005
    baseline_offset_sd: float = 0.0
    baseline_slope_sd: float = 0.0


def correlated_noise(
    n_scans: int, wavelengths: NDArray[np.float64], correlation_length_nm: float, rng: np.random.Generator
) -> NDArray[np.float64]:
    """Unit-variance AR(1) noise along wavelength, shape (n_scans, n_wavelengths)."""
    steps = np.diff(wavelengths)
    noise = rng.standard_normal((n_scans, wavelengths.size))
    if correlation_length_nm <= 0:
        return noise
    rho = np.exp(-steps / correlation_length_nm)
    for j in range(1, wavelengths.size):
        noise[:, j] = rho[j - 1] * noise[:, j - 1] + np.sqrt(1.0 - rho[j - 1] ** 2) * noise[:, j]
    return noise


def measure(
    wavelengths: ArrayLike,
    true_absorbance: ArrayLike,
    instrument: Instrument,
    rng: np.random.Generator,
) -> NDArray[np.float64]:
    """Simulate measured absorbance for true absorbance rows, shape (n_scans, n_wavelengths)."""
    x = np.asarray(wavelengths, dtype=np.float64)
    true = np.atleast_2d(np.asarray(true_absorbance, dtype=np.float64))
    s = instrument.stray_light
    bent = -np.log10((10.0 ** (-true) + s) / (1.0 + s))
    n_scans = true.shape[0]
    offset = instrument.baseline_offset_sd * rng.standard_normal((n_scans, 1))
    tilt = instrument.baseline_slope_sd * rng.standard_normal((n_scans, 1)) * (x - x.mean()) / 100.0
    sd = np.sqrt(instrument.noise_floor**2 + (instrument.noise_proportional * bent) ** 2)
    noise = correlated_noise(n_scans, x, instrument.correlation_length_nm, rng) * sd
    return bent + offset + tilt + noise
