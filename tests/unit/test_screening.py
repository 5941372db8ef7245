"""Tests for interferent screening (absolve.screening).

The scans are simulated with ``absolve.simulate``: invented dye-like absorptivity
spectra and invented disturbances, so the truth (interferent or none, its kind,
size and place) is known exactly. The noise is correlated along wavelength and
grows with absorbance, as on a real instrument. Reference checks use scipy
(Cholesky factor, chi-square and F distributions, Monte Carlo) and statsmodels
(generalised least squares).
"""

from __future__ import annotations

import dataclasses
import json

import numpy as np
import pytest
import scipy.linalg
import scipy.optimize
import scipy.stats
import statsmodels.api as sm

from absolve.errors import AbsolveError
from absolve.library import NoiseModel
from absolve.screening import (
    Screening,
    explain_with_suspects,
    prewhiten,
    screen_residuals,
    smooth_basis,
)
from absolve.simulate import Band, Instrument, band_spectrum, measure, random_absorptivities

GRID = np.arange(400.0, 701.0)
PEAKS = (430.0, 670.0)
# Instrument noise: 0.0015 absorbance floor, 0.4 % of absorbance, 3 nm correlation
# (invented but typical magnitudes; common practice, no source). No stray light:
# stray light is one of the disturbances the screen is meant to find.
INSTRUMENT = Instrument(noise_floor=0.0015, noise_proportional=0.004, correlation_length_nm=3.0, stray_light=0.0)
NOISE = NoiseModel(0.0015, 0.004, 3.0)
ALPHA = 0.05


def library(grid: np.ndarray = GRID, n: int = 3, seed: int = 1) -> np.ndarray:
    """Invented absorptivities (n, n_wl) whose band centres do not depend on the grid (so shifts are exact)."""
    return random_absorptivities(grid, n, np.random.default_rng(seed), peak_range=PEAKS)


def fit(measured: np.ndarray, k: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Non-negative fit with a free offset (split into +/- columns for nnls); returns design and fitted."""
    ones = np.ones(GRID.size)
    design = np.column_stack([k.T, ones])
    split = np.column_stack([k.T, ones, -ones])
    fitted = np.array([split @ scipy.optimize.nnls(split, y)[0] for y in measured])
    return design, fitted


def clean_scans(rng: np.random.Generator, k: np.ndarray, n: int, high: float = 1.0) -> np.ndarray:
    """True absorbance of n mixtures; peak absorbance about 0.5-1.3 for the default range."""
    return rng.uniform(0.2, high, (n, k.shape[0])) @ k


def disturbed(kind: str, size: float, n: int, seed: int) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """Scans with one kind of disturbance; returns library, measured, fitted residual inputs and the disturbance."""
    rng = np.random.default_rng(seed)
    k = library()
    instrument = INSTRUMENT
    if kind == "foreign-band":
        clean = clean_scans(rng, k, n)
        centre = rng.uniform(450.0, 650.0, (n, 1))
        width = rng.uniform(8.0, 25.0, (n, 1))
        extra = size * clean.max(axis=1, keepdims=True) * np.exp(-0.5 * ((GRID - centre) / width) ** 2)
        true = clean + extra
    elif kind == "scatter":
        clean = clean_scans(rng, k, n)
        extra = size * np.broadcast_to((GRID / 400.0) ** -4.0, clean.shape)  # Rayleigh-like turbidity
        true = clean + extra
    elif kind == "wavelength-shift":
        conc = rng.uniform(0.2, 1.0, (n, k.shape[0]))
        clean = conc @ k
        # The same invented bands evaluated size nm to the red: features appear at longer wavelengths.
        true = conc @ random_absorptivities(GRID - size, 3, np.random.default_rng(1), peak_range=PEAKS)
        extra = true - clean
    elif kind == "nonlinearity":
        clean = clean_scans(rng, k, n, high=2.0)  # up to about 2.5 absorbance, where stray light bites
        instrument = dataclasses.replace(INSTRUMENT, stray_light=size)
        true = clean
        extra = -np.log10((10.0**-clean + size) / (1.0 + size)) - clean
    else:
        raise ValueError(kind)
    measured = measure(GRID, true, instrument, rng)
    return k, measured, clean, extra


def binomial_bound(p: float, n: int) -> float:
    """Three binomial standard deviations of a rate estimated from n trials."""
    return 3.0 * np.sqrt(p * (1.0 - p) / n)


# --------------------------------------------------------------------------- whitening


def ar1_covariance(grid: np.ndarray, sd: np.ndarray, length: float) -> np.ndarray:
    """Covariance of heteroscedastic AR(1) noise: sd_i sd_j exp(-|x_i - x_j| / L) (the noise model's definition)."""
    return np.outer(sd, sd) * np.exp(-np.abs(grid[:, None] - grid[None, :]) / length)


def test_prewhiten_is_the_inverse_cholesky_factor_of_the_noise_covariance() -> None:
    # Uneven grid with an unusable gap: the whitening must link across the gap with the gap's own correlation.
    grid = np.array([400.0, 401.0, 402.5, 404.0, 405.0, 409.0, 410.0, 411.5])
    usable = np.array([[True, True, True, False, True, True, True, True]])
    level = np.array([[0.1, 0.5, 1.2, 0.9, 0.4, 0.2, 0.0, 0.8]])
    noise = NoiseModel(0.002, 0.01, 2.5)
    whitening = prewhiten(grid, np.eye(grid.size)[None], level, noise, usable=usable)[0]
    keep = usable[0]
    covariance = ar1_covariance(grid[keep], noise.standard_deviation(level[0, keep]), 2.5)
    # Reference: scipy's Cholesky factor; the unique lower-triangular whitener is its inverse.
    expected = scipy.linalg.solve_triangular(scipy.linalg.cholesky(covariance, lower=True), np.eye(keep.sum()), lower=True)
    np.testing.assert_allclose(whitening[np.ix_(keep, keep)], expected, rtol=1e-10, atol=1e-8)
    assert np.all(whitening[~keep] == 0) and np.all(whitening[:, ~keep] == 0)


def test_prewhitened_simulated_noise_is_white_with_unit_variance() -> None:
    rng = np.random.default_rng(2)
    level = np.tile(np.linspace(0.0, 1.5, GRID.size), (400, 1))
    noise = measure(GRID, level, INSTRUMENT, rng) - level
    white = prewhiten(GRID, noise, level, NOISE)
    assert abs(white.var() - 1.0) < 0.01  # 120 000 points: sd of the variance estimate is 0.004
    # Lag-1 autocorrelation by statsmodels' acf (reference), pooled over scans.
    lag1 = np.mean([sm.tsa.acf(row, nlags=1)[1] for row in white])
    assert abs(lag1) < 0.01


# --------------------------------------------------------------------------- the test statistic


def test_whitened_residual_energy_equals_generalised_least_squares() -> None:
    rng = np.random.default_rng(3)
    k = library()
    measured = measure(GRID, clean_scans(rng, k, 1), INSTRUMENT, rng)
    design, fitted = fit(measured, k)
    result = screen_residuals(GRID, measured - fitted, fitted, design, NOISE)
    energy = result.noise_ratio**2 * (result.rough_dof + result.statistic * result.smooth_dof)
    covariance = ar1_covariance(GRID, NOISE.standard_deviation(fitted[0]), 3.0)
    # Reference: statsmodels GLS with the full noise covariance; its ssr is the whitened residual energy.
    gls = sm.GLS(measured[0], design, sigma=covariance).fit()
    np.testing.assert_allclose(energy[0], gls.ssr, rtol=1e-8)
    assert result.smooth_dof[0] + result.rough_dof[0] == GRID.size - design.shape[1]
    # 20 cosine terms for 300 nm; the constant one is the design's offset column, and the smooth
    # parts of the three library columns are kept out of the test too, so 16 remain.
    assert result.smooth_dof[0] == 16


def test_statistic_does_not_depend_on_how_the_residual_was_fitted() -> None:
    rng = np.random.default_rng(4)
    k = library()
    measured = measure(GRID, clean_scans(rng, k, 5), INSTRUMENT, rng)
    design, fitted = fit(measured, k)
    other = fitted + (design @ rng.normal(0.0, 0.01, (design.shape[1], 5))).T  # any other coefficients
    a = screen_residuals(GRID, measured - fitted, fitted, design, NOISE, diagnose=False)
    b = screen_residuals(GRID, measured - other, fitted, design, NOISE, diagnose=False)
    np.testing.assert_allclose(a.statistic, b.statistic, rtol=1e-9)
    np.testing.assert_allclose(a.p_value, b.p_value, rtol=1e-7)


@pytest.mark.slow
def test_false_alarm_rate_stays_below_alpha_even_with_the_noise_scale_off_by_15_percent() -> None:
    rng = np.random.default_rng(5)
    k = library()
    n = 2000
    measured = measure(GRID, clean_scans(rng, k, n), INSTRUMENT, rng)
    design, fitted = fit(measured, k)
    share, tolerance = 0.1, 1.5
    for scale in (1.0, 1.15, 0.85):
        noise = NoiseModel(NOISE.floor * scale, NOISE.proportional * scale, NOISE.correlation_length_nm)
        result = screen_residuals(GRID, measured - fitted, fitted, design, noise, diagnose=False)
        dof = int(result.smooth_dof[0] + result.rough_dof[0])
        # Exact expected omnibus rate: it fires when the energy * scale**2 exceeds its limit (chi-square, scipy).
        omnibus = scipy.stats.chi2.sf(tolerance**2 * scale**2 * scipy.stats.chi2.isf(share * ALPHA, dof), dof)
        assert abs(np.mean(result.omnibus_p < share * ALPHA) - omnibus) < binomial_bound(max(omnibus, 1e-3), n)
        # Weighted Bonferroni of three tests each at or below its level: the rate is at most alpha
        # plus what the omnibus part adds when the noise is underestimated.
        rate = result.flagged.mean()
        assert rate < ALPHA + omnibus + binomial_bound(ALPHA, n), (scale, rate)
        # The smooth-test p-values are uniform under the null (Kolmogorov-Smirnov against scipy's uniform).
        assert scipy.stats.kstest(result.smooth_p, "uniform").pvalue > 0.001
        # The band scan's p-value is an upper bound (Rice's formula): never below its level on clean scans,
        # and not far above it either (measured: 0.9 % and 4.25 % at levels 1 % and 5 %).
        for level in (0.01, 0.05):
            band_rate = np.mean(result.band_p < level)
            assert level / 2.0 < band_rate < level + binomial_bound(level, n), (scale, level, band_rate)
        # Durbin-Watson of whitened residuals is about 2 (Durbin & Watson 1950).
        assert abs(np.mean(result.durbin_watson) - 2.0) < 0.05
    # The rough-residual noise ratio reads back the scale error.
    assert abs(np.median(result.noise_ratio) - 1.0 / 0.85) < 0.02


@pytest.mark.parametrize(
    ("kind", "size", "minimum_power"),
    [
        # Band peak at 0.5 % of the scan's maximum absorbance, overlapping library bands: measured 0.42
        # (the smooth F test alone, the screen before the band scan was added: 0.345).
        ("foreign-band", 0.005, 0.37),
        # Band peak at 1 %: measured 0.835 (F test alone: 0.765).
        ("foreign-band", 0.01, 0.78),
        # A few-percent absorber must be caught >= 90 % of the time (measured ~0.95).
        ("foreign-band", 0.03, 0.90),
        # Slight turbidity: 0.01 absorbance at 400 nm falling as lambda^-4 (measured 0.995).
        ("scatter", 0.01, 0.90),
        # Slighter: 0.006 absorbance at 400 nm (measured 0.775; F test alone: 0.60).
        ("scatter", 0.006, 0.68),
        # Wavelength scale off by 0.5 nm (measured 1.00).
        ("wavelength-shift", 0.5, 0.95),
        # Stray light 0.5 % on scans reaching ~2.5 absorbance (measured 0.91).
        ("nonlinearity", 0.005, 0.85),
    ],
)
def test_power_against_each_kind_of_disturbance(kind: str, size: float, minimum_power: float) -> None:
    k, measured, _, _ = disturbed(kind, size, 200, seed=11)
    design, fitted = fit(measured, k)
    result = screen_residuals(GRID, measured - fitted, fitted, design, NOISE, diagnose=False)
    assert result.flagged.mean() >= minimum_power


def test_band_scan_statistic_from_first_principles() -> None:
    # The band scan recomputed with dense linear algebra (scipy's orth and numpy's lstsq): Gaussian
    # bands whose width is the cosine basis's resolution, fitted by least squares on the design and the
    # cosines, whitened, projected off the guard (design and its smooth part), matched against the
    # whitened residual; the p-value is Rice's bound with the studentised tails (docs/screening.md).
    k, measured, _, _ = disturbed("foreign-band", 0.01, 2, seed=26)
    design, fitted = fit(measured, k)
    residual = measured - fitted
    result = screen_residuals(GRID, residual, fitted, design, NOISE, diagnose=False)
    terms = 20
    cosines = smooth_basis(GRID, terms)
    width = (GRID[-1] - GRID[0]) / terms
    centres = np.linspace(GRID[0], GRID[-1], int(np.ceil((GRID[-1] - GRID[0]) / (width / 3.0))) + 1)
    bands = np.exp(-0.5 * ((GRID[:, None] - centres[None, :]) / width) ** 2)
    smooth_part = cosines @ np.linalg.lstsq(cosines, design, rcond=None)[0]
    band_fit = np.linalg.lstsq(np.column_stack([design, cosines]), bands, rcond=None)[0][design.shape[1] :]
    for i in range(2):
        def whiten(values: np.ndarray) -> np.ndarray:
            return prewhiten(GRID, values[None], fitted[i : i + 1], NOISE)[0]

        guard = scipy.linalg.orth(np.column_stack([whiten(design), whiten(smooth_part)]))
        smooth = whiten(cosines) - guard @ (guard.T @ whiten(cosines))
        templates = smooth @ band_fit
        templates /= np.linalg.norm(templates, axis=0)
        w = whiten(residual[i : i + 1].T)[:, 0]
        off_design = w - (q := scipy.linalg.orth(whiten(design))) @ (q.T @ w)
        in_smooth = scipy.linalg.orth(smooth)
        rough = off_design - in_smooth @ (in_smooth.T @ off_design)
        nu = GRID.size - design.shape[1] - in_smooth.shape[1]
        largest = np.max(templates.T @ w) / np.sqrt(rough @ rough / nu)
        length = np.sum(np.arccos(np.clip(np.sum(templates[:, :-1] * templates[:, 1:], axis=0), -1.0, 1.0)))
        expected = scipy.stats.t.sf(largest, nu) + length / (2.0 * np.pi) * (1.0 + largest**2 / nu) ** (-nu / 2.0)
        np.testing.assert_allclose(result.band_p[i], min(expected, 1.0), rtol=1e-6)


# --------------------------------------------------------------------------- diagnosis


@pytest.mark.parametrize(
    ("kind", "size", "minimum_right"),
    [
        ("foreign-band", 0.03, 0.85),  # measured ~0.93
        ("scatter", 0.02, 0.80),  # measured ~0.9; a broad band at the short end looks alike
        ("wavelength-shift", 0.5, 0.95),  # measured 1.00
        ("nonlinearity", 0.005, 0.90),  # measured ~0.98
    ],
)
def test_diagnosis_names_the_kind_and_the_place(kind: str, size: float, minimum_right: float) -> None:
    k, measured, _, extra = disturbed(kind, size, 100, seed=12)
    design, fitted = fit(measured, k)
    result = screen_residuals(GRID, measured - fitted, fitted, design, NOISE)
    flagged = np.flatnonzero(result.flagged)
    assert flagged.size >= 80
    right = [result.diagnoses[i].kind == kind for i in flagged]
    assert np.mean(right) >= minimum_right
    # The place: the true disturbance's largest point lies in the reported window (5 nm slack).
    true_peak = GRID[np.argmax(np.abs(extra), axis=1)]
    inside = [
        result.diagnoses[i].window_nm[0] - 5.0 <= true_peak[i] <= result.diagnoses[i].window_nm[1] + 5.0
        for i in flagged
        if result.diagnoses[i].kind == kind
    ]
    assert np.mean(inside) >= 0.9
    # The size: the disturbance's largest absorbance (scattering: its rise across the range).
    # Measured median relative error about 5 % for every kind.
    named = [i for i in flagged if result.diagnoses[i].kind == kind]
    truth = [extra[i, 0] - extra[i, -1] if kind == "scatter" else extra[i, np.argmax(np.abs(extra[i]))] for i in named]
    relative = [result.diagnoses[i].size_absorbance / t - 1.0 for i, t in zip(named, truth, strict=True)]
    assert np.median(np.abs(relative)) < 0.15
    # "high" confidence is earned: measured 100 % right over 1293 such diagnoses (docs/screening.md).
    assert all(result.diagnoses[i].kind == kind for i in flagged if result.diagnoses[i].confidence == "high")
    assert all(result.diagnoses[i] is None for i in np.flatnonzero(~result.flagged))


def test_diagnosis_estimates_the_wavelength_shift_and_the_band() -> None:
    k, measured, _, _ = disturbed("wavelength-shift", 0.5, 40, seed=13)
    design, fitted = fit(measured, k)
    result = screen_residuals(GRID, measured - fitted, fitted, design, NOISE)
    shifts = np.array([d.detail["shift_nm"] for d in result.diagnoses])
    errors = np.array([d.detail["shift_se_nm"] for d in result.diagnoses])
    # First-order template: within 3 standard errors plus 10 % of the shift (second-order bias).
    assert np.all(np.abs(shifts - 0.5) < 3.0 * errors + 0.05)
    assert all(d.confidence in ("high", "moderate") for d in result.diagnoses)

    rng = np.random.default_rng(14)
    clean = clean_scans(rng, k, 1)
    band = band_spectrum(GRID, [Band(540.0, 12.0, 0.03)])
    measured = measure(GRID, clean + band, INSTRUMENT, rng)
    design, fitted = fit(measured, k)
    diagnosis = screen_residuals(GRID, measured - fitted, fitted, design, NOISE).diagnoses[0]
    assert diagnosis.kind == "foreign-band"
    assert abs(diagnosis.detail["center_nm"] - 540.0) <= 3.0
    assert abs(diagnosis.size_absorbance - 0.03) < 0.006
    assert "540 nm" in diagnosis.message and diagnosis.confidence in diagnosis.message


def test_false_alarms_are_not_given_a_confident_cause() -> None:
    rng = np.random.default_rng(15)
    k = library()
    measured = measure(GRID, clean_scans(rng, k, 600), INSTRUMENT, rng)
    design, fitted = fit(measured, k)
    result = screen_residuals(GRID, measured - fitted, fitted, design, NOISE)
    diagnoses = [d for d in result.diagnoses if d is not None]
    assert diagnoses  # at alpha = 0.05 some clean scans are flagged
    assert sum(d.confidence == "high" for d in diagnoses) <= 0.1 * len(diagnoses)


# --------------------------------------------------------------------------- masks, shapes, errors


def test_unusable_points_are_left_out_exactly() -> None:
    rng = np.random.default_rng(16)
    k = library()
    measured = measure(GRID, clean_scans(rng, k, 3) + 0.01 * (GRID / 400.0) ** -4, INSTRUMENT, rng)
    design, fitted = fit(measured, k)
    residual = measured - fitted
    keep = np.ones(GRID.size, dtype=bool)
    keep[100:120] = False  # interior gap: the grid's ends, hence the cosine basis, stay the same
    masked = screen_residuals(GRID, residual, fitted, design, NOISE, usable=np.tile(keep, (3, 1)), smooth_terms=20)
    with_nan = screen_residuals(GRID, np.where(keep, residual, np.nan), fitted, design, NOISE, smooth_terms=20)
    cut = screen_residuals(GRID[keep], residual[:, keep], fitted[:, keep], design[keep], NOISE, smooth_terms=20)
    for other in (with_nan, cut):
        np.testing.assert_allclose(masked.statistic, other.statistic, rtol=1e-7)
        np.testing.assert_array_equal(masked.rough_dof, other.rough_dof)
    assert masked.diagnoses[0] is not None and masked.diagnoses[0].kind == "scatter"


def test_scan_with_too_few_points_is_reported_untestable() -> None:
    grid = np.linspace(400.0, 700.0, 10)
    design = np.column_stack([np.exp(-0.5 * ((grid - 550.0) / 60.0) ** 2), np.ones(10)])
    usable = np.ones((2, 10), dtype=bool)
    usable[1, 3:] = False
    rng = np.random.default_rng(17)
    result = screen_residuals(grid, 0.002 * rng.standard_normal((2, 10)), np.zeros((2, 10)), design, NOISE, usable=usable)
    assert np.isfinite(result.p_value[0]) and np.isnan(result.p_value[1])
    assert not result.flagged[1]
    assert result.summary()["n_untestable"] == 1


def test_inputs_are_not_mutated_and_results_serialise() -> None:
    k, measured, _, _ = disturbed("foreign-band", 0.03, 4, seed=18)
    design, fitted = fit(measured, k)
    residual = measured - fitted
    copies = [a.copy() for a in (residual, fitted, design)]
    result = screen_residuals(GRID, residual, fitted, design, NOISE)
    for original, copy in zip((residual, fitted, design), copies, strict=True):
        np.testing.assert_array_equal(original, copy)
    summary = json.loads(json.dumps(result.summary()))
    assert summary["n_scans"] == 4 and summary["n_flagged"] == int(result.flagged.sum())
    text = result.report(names=["a", "b", "c", "d"])
    assert text.count("\n") >= 4 and "a:" in text


def test_per_scan_designs_give_the_same_answer_as_a_shared_one() -> None:
    k, measured, _, _ = disturbed("scatter", 0.01, 3, seed=19)
    design, fitted = fit(measured, k)
    shared = screen_residuals(GRID, measured - fitted, fitted, design, NOISE, diagnose=False)
    stacked = screen_residuals(GRID, measured - fitted, fitted, np.stack([design] * 3), NOISE, diagnose=False)
    np.testing.assert_allclose(shared.p_value, stacked.p_value, rtol=1e-12)
    # Path lengths 1, 2 and 0.5 scale the component columns: the same column space, hence the same
    # tests, but computed scan by scan (the general path) instead of once per point pattern.
    scaled = np.stack([design * np.r_[np.full(3, length), 1.0] for length in (1.0, 2.0, 0.5)])
    per_scan = screen_residuals(GRID, measured - fitted, fitted, scaled, NOISE, diagnose=False)
    for name in ("statistic", "smooth_p", "band_p", "omnibus_p", "p_value"):
        np.testing.assert_allclose(getattr(per_scan, name), getattr(shared, name), rtol=1e-6, err_msg=name)


@pytest.mark.parametrize(
    ("change", "message"),
    [
        ({"alpha": 1.5}, "alpha must be"),
        ({"noise": NoiseModel(0.0, 0.01, 3.0)}, "floor > 0"),
        ({"design": np.ones((5, 2))}, "does not fit"),
        ({"design": np.full((GRID.size, 2), np.nan)}, "NaN"),
        ({"usable": np.ones((1, GRID.size))}, "boolean array"),
        ({"fitted": np.zeros((2, GRID.size))}, "must both be"),
        ({"omnibus_share": 0.0}, "omnibus_share"),
        ({"band_share": 0.95}, "band_share"),
        ({"noise_tolerance": 0.5}, "noise_tolerance"),
        ({"smooth_terms": 0}, "positive integer"),
    ],
)
def test_bad_inputs_raise_absolve_error(change: dict, message: str) -> None:
    arguments = {
        "wavelengths": GRID,
        "residuals": np.zeros((1, GRID.size)),
        "fitted": np.zeros((1, GRID.size)),
        "design": np.ones((GRID.size, 2)),
        "noise": NOISE,
    }
    arguments.update(change)
    with pytest.raises(AbsolveError, match=message):
        screen_residuals(**arguments)


def test_smooth_basis_is_the_cosine_basis() -> None:
    basis = smooth_basis([0.0, 1.0, 2.0], 3)
    # cos(pi k x) at x = 0, 1/2, 1 (definition of the DCT-II basis at these points, from memory)
    np.testing.assert_allclose(basis, [[1, 1, 1], [1, 0, -1], [1, -1, 1]], atol=1e-15)


# --------------------------------------------------------------------------- suspects


def suspect_scans(n: int, with_hidden: bool, seed: int) -> tuple[np.ndarray, ...]:
    rng = np.random.default_rng(seed)
    k = library(n=4)
    known, hidden = k[:3], k[3]
    amount = rng.uniform(0.04, 0.06, n) if with_hidden else np.zeros(n)
    measured = measure(GRID, rng.uniform(0.2, 1.0, (n, 3)) @ known + amount[:, None] * hidden, INSTRUMENT, rng)
    design = np.column_stack([known.T, np.ones(GRID.size)])
    decoy = band_spectrum(GRID, [Band(620.0, 20.0, 1.0)])
    return measured, design, np.vstack([hidden, decoy]), amount


def test_suspects_find_the_hidden_absorber_and_its_amount() -> None:
    measured, design, candidates, amount = suspect_scans(60, True, seed=20)
    nonnegative = np.array([True, True, True, False])
    report = explain_with_suspects(GRID, measured, design, nonnegative, candidates, ["hidden", "decoy"], NOISE)
    # Measured: found in 84 % of scans at amount 0.03 and 99.5 % at 0.05 (peak absorbance 0.05-0.08).
    assert np.mean(report.best == 0) >= 0.85
    found = report.best == 0
    z = (report.amount[found, 0] - amount[found]) / report.amount_se[found, 0]
    assert np.mean(np.abs(z) < 3.0) >= 0.9
    assert np.mean(report.explained[found]) >= 0.8
    assert report.best_names[int(np.argmax(found))] == "hidden"
    json.dumps(report.summary())
    assert "hidden" in report.report()


def test_suspects_rarely_named_when_absent() -> None:
    measured, design, candidates, _ = suspect_scans(300, False, seed=21)
    nonnegative = np.array([True, True, True, False])
    report = explain_with_suspects(GRID, measured, design, nonnegative, candidates, ["hidden", "decoy"], NOISE)
    # Bonferroni over two suspects keeps the rate at or below alpha (measured 0.043 on 1000 scans).
    assert np.mean(report.best >= 0) < ALPHA + binomial_bound(ALPHA, 300)
    # With the amount constrained >= 0, about half the null fits put it at zero (p = 1).
    assert abs(np.mean(report.p_value[:, 0] == 1.0) - 0.5) < binomial_bound(0.5, 300)


def test_suspect_f_statistic_is_the_squared_gls_t_value() -> None:
    measured, design, candidates, _ = suspect_scans(1, True, seed=22)
    nonnegative = np.zeros(4, dtype=bool)  # all library columns free: the unconstrained case
    report = explain_with_suspects(GRID, measured, design, nonnegative, candidates[:1], ["hidden"], NOISE)
    beta, *_ = np.linalg.lstsq(design, measured[0], rcond=None)
    covariance = ar1_covariance(GRID, NOISE.standard_deviation(design @ beta), 3.0)
    # Reference: statsmodels GLS with the same covariance; F for one added column equals t squared.
    gls = sm.GLS(measured[0], np.column_stack([design, candidates[0]]), sigma=covariance).fit()
    assert gls.params[-1] > 0
    np.testing.assert_allclose(report.f_statistic[0, 0], gls.tvalues[-1] ** 2, rtol=1e-6)
    np.testing.assert_allclose(report.amount[0, 0], gls.params[-1], rtol=1e-6)
    np.testing.assert_allclose(report.amount_se[0, 0], gls.bse[-1], rtol=1e-6)
    np.testing.assert_allclose(report.p_value[0, 0], 0.5 * gls.pvalues[-1], rtol=1e-6)


def test_suspects_reject_mismatched_candidates() -> None:
    measured, design, candidates, _ = suspect_scans(1, False, seed=23)
    with pytest.raises(AbsolveError, match="one unique name each"):
        explain_with_suspects(GRID, measured, design, np.ones(4, bool), candidates, ["only-one"], NOISE)
    with pytest.raises(AbsolveError, match="nonnegative"):
        explain_with_suspects(GRID, measured, design, np.ones(3, bool), candidates, ["a", "b"], NOISE)



def test_screening_result_fields_line_up() -> None:
    k, measured, _, _ = disturbed("foreign-band", 0.03, 5, seed=25)
    design, fitted = fit(measured, k)
    result = screen_residuals(GRID, measured - fitted, fitted, design, NOISE)
    assert isinstance(result, Screening)
    for array in (result.statistic, result.p_value, result.flagged, result.smooth_p, result.band_p, result.omnibus_p):
        assert array.shape == (5,)
    assert len(result.diagnoses) == 5
    np.testing.assert_array_equal(result.flagged, result.p_value < ALPHA)


def test_batch_note_compares_the_flagged_count_with_chance() -> None:
    # Binomial tail: with 200 scans at alpha = 0.05, 10 expected; 20 or more has P = 0.0027 and 25 or more
    # P = 2.6e-5 (scipy.special.bdtrc, the binomial survival function; common practice, no source for the 1e-3 cut).
    def screening(n_flagged: int, n_scans: int = 200) -> Screening:
        p_value = np.full(n_scans, 0.5)
        p_value[:n_flagged] = 0.001
        nan = np.full(n_scans, np.nan)
        zero = np.zeros(n_scans, dtype=np.int64)
        return Screening(
            statistic=nan, p_value=p_value, flagged=p_value < 0.05, alpha=0.05, method="test", diagnoses=(None,) * n_scans,
            smooth_p=nan, omnibus_p=nan, noise_ratio=nan, durbin_watson=nan, smooth_dof=zero, rough_dof=zero,
        )

    assert screening(12).batch_note() == "12 of 200 tested scan(s) flagged; about 10 would be by chance if all were clean."
    assert "far more than chance" not in screening(20).batch_note()
    assert "far more than chance" in screening(25).batch_note()
    assert screening(12, n_scans=20000).batch_note().startswith("12 of 20000 tested scan(s) flagged; about 1000 would be")
