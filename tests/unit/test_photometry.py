"""Stray-light correction: the single-parameter stray-light model and its inverse.

The model T_meas = (T + s) / (1 + s) for a stray-light fraction s is common practice, no source
(it is the usual single-parameter heterochromatic stray-light model); here it is written out in
the test and applied to known absorbances, so the correction must undo it exactly.
"""

from __future__ import annotations

import numpy as np
import pytest

from absolve.photometry import correct_stray_light, stray_light_gain
from absolve.simulate import Instrument, measure


def _with_stray_light(absorbance: np.ndarray, fraction: float) -> np.ndarray:
    return -np.log10((10.0 ** (-absorbance) + fraction) / (1.0 + fraction))


@pytest.mark.parametrize("fraction", [1e-4, 0.003, 0.02])
def test_correction_inverts_the_stray_light_formula(fraction: float) -> None:
    true = np.linspace(0.0, 2.0, 81).reshape(3, 27)
    measured = _with_stray_light(true, fraction)
    kept = measured.copy()
    corrected = correct_stray_light(measured, fraction)
    # Where the corrected transmittance stays above the stray-light fraction the inverse is exact.
    valid = 10.0 ** (-true) > fraction
    np.testing.assert_allclose(corrected[valid], true[valid], rtol=1e-10, atol=1e-12)
    assert np.all(np.isnan(corrected[~valid]))
    assert np.array_equal(measured, kept)


def test_correction_undoes_the_simulated_instrument() -> None:
    grid = np.arange(400.0, 450.0)
    true = np.linspace(0.0, 2.2, grid.size)[None, :]
    quiet = Instrument(noise_floor=0.0, noise_proportional=0.0, stray_light=0.003)
    measured = measure(grid, true, quiet, np.random.default_rng(0))
    assert np.max(true - measured) > 0.1  # the instrument really bends the top of the range
    np.testing.assert_allclose(correct_stray_light(measured, 0.003), true, rtol=1e-10, atol=1e-12)


def test_no_stray_light_changes_nothing_and_nan_stays_nan() -> None:
    values = np.array([[0.1, np.nan, 1.5]])
    assert correct_stray_light(values, 0.0) is values
    assert np.isnan(correct_stray_light(values, 0.003)[0, 1])
    assert np.all(stray_light_gain(values[:, [0, 2]], 0.0) == 1.0)


def test_gain_is_the_derivative_of_the_correction() -> None:
    # Reference: a central finite difference of the correction itself.
    measured = np.linspace(0.0, 2.0, 41)
    fraction = 0.003
    step = 1e-6
    numeric = (correct_stray_light(measured + step, fraction) - correct_stray_light(measured - step, fraction)) / (2 * step)
    np.testing.assert_allclose(stray_light_gain(measured, fraction), numeric, rtol=1e-6)
    assert np.all(np.diff(stray_light_gain(measured, fraction)) > 0)  # noise grows with absorbance
