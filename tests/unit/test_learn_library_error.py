"""quantify(..., learn_library_error=True): the library's fixed error learned from the batch, set aside before the screen.

The scans and libraries are invented (absolve.simulate); each library here is calibrated from noisy
standards and then given a deliberate smooth absorptivity error, so the cause of the false alarms is
known and the same in every run.
"""

from __future__ import annotations

import dataclasses
import importlib
from collections.abc import Callable

import numpy as np
import pytest
from scipy import stats

from absolve.calibration import calibrate
from absolve.library import ReferenceLibrary
from absolve.quantify import concatenate_results, quantify, quantify_chunks
from absolve.simulate import Band, Instrument, band_spectrum, measure
from absolve.spectra import Spectra

GRID = np.arange(400.0, 601.0)
# Standards to a peak absorbance of about 1.8, samples to about 1 (peak 1 per unit concentration).
LEVELS = (0.16, 0.4, 0.64, 0.96, 1.28, 1.76)
INSTRUMENT = Instrument(stray_light=0.0)
ALPHA = 0.05


@pytest.fixture
def setting(simulated_standards: type) -> Callable[..., tuple[ReferenceLibrary, np.ndarray, np.ndarray, np.random.Generator]]:
    """(seed, n_scans, size=0.03) -> a library of two overlapping dyes with a smooth error in the first one (``size`` of
    its peak; 0: as calibrated), the true spectra, clean sample concentrations and the generator to measure them with."""

    def make(seed: int, n_scans: int, size: float = 0.03) -> tuple[ReferenceLibrary, np.ndarray, np.ndarray, np.random.Generator]:
        standards = simulated_standards(seed, INSTRUMENT, LEVELS)
        library = calibrate(standards.spectra, standards.concentrations, list(standards.names), "mg/L")
        # An error of `size` of the peak on a flank of the first dye (e.g. a standard weighed from a damp lot).
        error = band_spectrum(GRID, [Band(470.0, 12.0, size)])
        wrong = dataclasses.replace(library, absorptivity=standards.truth + np.vstack([error, np.zeros(GRID.size)]))
        rng = np.random.default_rng(seed + 1)
        return wrong, standards.truth, rng.uniform(0.08, 0.96, (n_scans, 2)), rng

    return make


def _scans(truth: np.ndarray, samples: np.ndarray, rng: np.random.Generator, extra: np.ndarray | None = None) -> Spectra:
    absorbance = samples @ truth + (0.0 if extra is None else extra)
    return Spectra(GRID, measure(GRID, absorbance, INSTRUMENT, rng), [f"x{i}" for i in range(samples.shape[0])])


def _upper_rate(n_scans: int) -> float:
    """Highest clean-scan flag rate consistent with a rate of alpha: the binomial 99.9 % quantile (scipy.stats.binom)."""
    return float(stats.binom.ppf(0.999, n_scans, ALPHA)) / n_scans


def test_a_wrong_library_stops_flagging_clean_scans_and_nothing_else_changes(setting: Callable) -> None:
    library, truth, samples, rng = setting(11, 300)
    scans = _scans(truth, samples, rng)
    plain = quantify(scans, library)
    learned = quantify(scans, library, learn_library_error=True)
    # The deliberate error makes the plain screen cry wolf on most clean scans ...
    assert plain.interferent.mean() > 0.3, plain.interferent.mean()
    # ... and once it is learned and set aside, the rate is back within chance of alpha.
    assert learned.interferent.mean() <= _upper_rate(300), learned.interferent.mean()
    record = learned.settings["library_error"]
    assert record["applied"] and "estimated from" in record["message"]
    # The error found is the one put in (per unit concentration, as far as the fit leaves it in the
    # residual): its largest value is within a third of the deliberate error's peak.
    assert record["largest_bias"][0] == pytest.approx(0.03, rel=0.35)
    assert plain.settings["library_error"] is None
    # The first dye's error is named as beyond the calibration's uncertainty, the second dye's is not.
    first, second = record["components"]
    assert first["largest_in_standard_errors"] > 10 > second["largest_in_standard_errors"]
    assert "for dye-0 it reaches" in record["message"] and "dye-1" not in record["message"]
    # Only the screen sees the correction.
    for name in ("concentration", "std_uncertainty", "expanded_uncertainty", "fitted", "residuals", "rms_residual", "residual_p_value"):
        np.testing.assert_array_equal(getattr(learned, name), getattr(plain, name), err_msg=name)


def test_with_interferents_in_a_minority_of_scans_the_screen_is_that_of_a_right_library(setting: Callable) -> None:
    library, truth, samples, rng = setting(21, 300)
    hit = np.zeros(300, dtype=bool)
    hit[::10] = True  # 30 scans with a foreign band of 3 % of their maximum absorbance, overlapping the dyes
    peak = (samples @ truth).max(axis=1)
    extra = np.where(hit[:, None], 0.03 * peak[:, None] * band_spectrum(GRID, [Band(520.0, 15.0, 1.0)]), 0.0)
    scans = _scans(truth, samples, rng, extra)
    learned = quantify(scans, library, learn_library_error=True)
    # The reference: the same scans screened with the true absorptivities (noise model and null correction unchanged).
    right = quantify(scans, dataclasses.replace(library, absorptivity=truth))
    assert quantify(scans, library).interferent[~hit].mean() > 0.5  # what the wrong library does unaided
    assert learned.interferent[hit].mean() >= min(0.9, right.interferent[hit].mean() - 0.1), learned.interferent[hit].mean()
    assert learned.interferent[~hit].mean() <= max(_upper_rate(270), right.interferent[~hit].mean() + 0.03)
    # The first screen found (most of) them and the final estimate was made without them.
    assert learned.settings["library_error"]["scans_flagged_first"] >= 25


def test_scans_outside_the_learning_sample_are_corrected_too(setting: Callable, monkeypatch: pytest.MonkeyPatch) -> None:
    library, truth, samples, rng = setting(13, 400)
    scans = _scans(truth, samples, rng)
    whole = quantify(scans, library, learn_library_error=True)
    # Learn from 80 of the 400 scans only: the other 320 get the estimate's correction without leave-one-out.
    monkeypatch.setattr(importlib.import_module("absolve.quantify"), "_LIBRARY_ERROR_SCANS", 80)
    sampled = quantify(scans, library, learn_library_error=True)
    assert sampled.settings["library_error"]["largest_scans_used"] <= 80
    assert sampled.interferent.mean() <= _upper_rate(400), sampled.interferent.mean()
    # Same verdicts as when every scan took part, up to a few scans near the threshold.
    assert np.count_nonzero(sampled.interferent != whole.interferent) <= 8


def test_chunks_give_the_whole_batch_numbers(setting: Callable) -> None:
    library, truth, samples, rng = setting(14, 150)
    scans = _scans(truth, samples, rng)
    whole = quantify(scans, library, learn_library_error=True)
    joined = concatenate_results(list(quantify_chunks(scans, library, chunk_scans=40, learn_library_error=True)))
    np.testing.assert_array_equal(joined.interferent, whole.interferent)
    np.testing.assert_allclose(joined.screening.p_value, whole.screening.p_value, rtol=1e-9)
    assert joined.settings["library_error"] == whole.settings["library_error"]


def test_too_small_a_batch_is_screened_as_before_and_says_why(setting: Callable) -> None:
    library, truth, samples, rng = setting(15, 20)  # 20 + 5 * 2 = 30 scans are needed
    scans = _scans(truth, samples, rng)
    learned = quantify(scans, library, learn_library_error=True)
    plain = quantify(scans, library)
    np.testing.assert_array_equal(learned.screening.p_value, plain.screening.p_value)
    record = learned.settings["library_error"]
    assert not record["applied"] and "at least 30 needed" in record["message"]
    assert "Library error from this batch: library bias not estimated" in learned.report()


def test_a_library_right_within_its_uncertainty_is_not_named(setting: Callable) -> None:
    library, truth, samples, rng = setting(11, 300, size=0.0)
    record = quantify(_scans(truth, samples, rng), library, learn_library_error=True).settings["library_error"]
    assert record["applied"]
    # Measured when written: 3.5 standard errors at most, for either dye (a gross error reaches tens).
    assert all(size["largest_in_standard_errors"] < 10 for size in record["components"])
    assert "standard error" not in record["message"]
