"""Quantification of mixtures: solver agreement, uncertainty budget, figures of merit, exclusions, flags.

Every check is against something outside absolve: scipy.optimize (nnls, lsq_linear), statsmodels
OLS, covariances written out with numpy, the GUM (JCGM 100:2008) formulas, the ICH Q2(R2) limits,
a textbook worked example, or simulated scans whose truth is known.
"""

from __future__ import annotations

import dataclasses

import numpy as np
import pytest
import statsmodels.api as sm
from hypothesis import given
from hypothesis import strategies as st
from scipy import optimize, stats

from absolve.calibration import calibrate
from absolve.errors import AbsolveError
from absolve.library import NoiseModel, ReferenceLibrary, library_from_absorptivities
from absolve.quantify import BASELINES, FLAG_TEXT, quantify
from absolve.simulate import Instrument, measure, random_absorptivities
from absolve.spectra import Spectra

GRID = np.arange(400.0, 601.0, 2.0)
# GUM 6.2.2: k = 2 gives about 95.45 % for a normal distribution; the t quantile for the same
# two-sided probability is t.ppf(0.5 + 0.9545 / 2, nu) (GUM G.3.4, table G.2).
TWO_SIDED_9545 = 0.5 + 0.9545 / 2


def _library(
    absorptivity: np.ndarray,
    grid: np.ndarray = GRID,
    *,
    noise: NoiseModel | None = None,
    limit: float | None = None,
    unit: str = "mg/L",
    names: tuple[str, ...] | None = None,
) -> ReferenceLibrary:
    names = names or tuple(f"dye-{k}" for k in range(absorptivity.shape[0]))
    library = library_from_absorptivities(grid, absorptivity, names, unit, linear_limit_absorbance=limit)
    return dataclasses.replace(library, noise=noise) if noise is not None else library


def _scans(values: np.ndarray, grid: np.ndarray = GRID, quantity: str = "absorbance") -> Spectra:
    values = np.atleast_2d(values)
    return Spectra(grid, values, [f"scan-{i:02d}" for i in range(values.shape[0])], quantity=quantity)  # type: ignore[arg-type]


def _baseline_design(grid: np.ndarray, baseline: str) -> np.ndarray:
    """Baseline columns written independently of absolve (any basis of the same span will do)."""
    if baseline == "none":
        return np.empty((grid.size, 0))
    if baseline == "offset":
        return np.ones((grid.size, 1))
    return np.column_stack([np.ones(grid.size), grid])


def _flags_explain_every_nan(result) -> None:  # type: ignore[no-untyped-def]
    for i in range(result.n_scans):
        for j in range(len(result.components)):
            if np.isnan(result.concentration[i, j]):
                assert result.flags[i][j], f"NaN without a flag for scan {i}, component {j}"
                assert all(flag in FLAG_TEXT for flag in result.flags[i][j])


# --- reference solvers ------------------------------------------------------------------------


@given(seed=st.integers(0, 2**31 - 1), n_components=st.integers(1, 4), baseline=st.sampled_from(BASELINES))
def test_concentrations_equal_scipy_reference_solvers(seed: int, n_components: int, baseline: str) -> None:
    # Reference: scipy.optimize.nnls (no baseline) and scipy.optimize.lsq_linear with method
    # "bvls", bounds [0, inf) on concentrations and a free baseline, on the same used points.
    rng = np.random.default_rng(seed)
    absorptivity = random_absorptivities(GRID, n_components, rng)
    present = rng.uniform(size=(5, n_components)) > 0.3
    truth = rng.uniform(0.0, 0.8, (5, n_components)) * present
    values = truth @ absorptivity + 0.003 + 0.01 * rng.standard_normal((5, GRID.size))
    result = quantify(_scans(values), _library(absorptivity), baseline=baseline)  # type: ignore[arg-type]
    design = np.column_stack([absorptivity.T, _baseline_design(GRID, baseline)])
    lower = np.where(np.arange(design.shape[1]) < n_components, 0.0, -np.inf)
    for i in range(5):
        used = result.used[i]
        if baseline == "none":
            reference = optimize.nnls(design[used], values[i, used])[0]
        else:
            reference = optimize.lsq_linear(design[used], values[i, used], bounds=(lower, np.inf), method="bvls", tol=1e-14).x
        scale = max(float(np.max(np.abs(reference[:n_components]))), 1e-12)
        np.testing.assert_allclose(result.concentration[i], reference[:n_components], rtol=1e-9, atol=1e-9 * scale)
    assert np.all(result.concentration >= 0)


def test_ill_conditioned_but_solvable_scan_still_matches_scipy_nnls() -> None:
    # Condition number 2.4e4, below the solver's limit: the round-off slack of the sign tests must
    # not let a clearly negative coefficient pass as zero (it once did, returning 3.97 for 0.50).
    rng = np.random.default_rng(0)
    base = random_absorptivities(GRID, 1, rng)[0]
    absorptivity = np.vstack([base, base * (1 + 1e-3 * (GRID - 500.0) / 100.0)])
    values = np.array([0.3, 0.2]) @ absorptivity + 0.001 * rng.standard_normal(GRID.size)
    result = quantify(_scans(values), _library(absorptivity), baseline="none")
    reference = optimize.nnls(absorptivity.T, values)[0]  # scipy reference
    np.testing.assert_allclose(result.concentration[0], reference, rtol=1e-6, atol=1e-6)


# --- spectral-noise uncertainty ---------------------------------------------------------------


def test_white_noise_uncertainty_equals_ols_covariance_with_known_sigma() -> None:
    # Reference: statsmodels OLS cov_params(scale=s^2), i.e. s^2 (D^T D)^-1, and the same with numpy.
    rng = np.random.default_rng(21)
    absorptivity = random_absorptivities(GRID, 3, rng)
    s = 0.002
    library = _library(absorptivity, noise=NoiseModel(floor=s, proportional=0.0, correlation_length_nm=0.0))
    truth = rng.uniform(0.3, 0.7, (4, 3))
    # Scans quieter than the noise model: the model's sigma is used as it is (scale 1).
    values = truth @ absorptivity + 0.004 + 0.5 * s * rng.standard_normal((4, GRID.size))
    result = quantify(_scans(values), library, baseline="offset")
    assert np.all(result.noise_scale == 1.0)
    assert np.all(np.isnan(result.upper_limit))  # every component well inside the bound
    design = np.column_stack([absorptivity.T, np.ones(GRID.size)])
    by_numpy = np.sqrt(np.diag(s**2 * np.linalg.inv(design.T @ design)))[:3]
    for i in range(4):
        fit = sm.OLS(values[i], design).fit()
        by_statsmodels = np.sqrt(np.diag(fit.cov_params(scale=s**2)))[:3]
        np.testing.assert_allclose(result.budget["spectral_noise"][i], by_statsmodels, rtol=1e-9)
        np.testing.assert_allclose(result.concentration[i], fit.params[:3], rtol=1e-9)
    np.testing.assert_allclose(result.budget["spectral_noise"], np.broadcast_to(by_numpy, (4, 3)), rtol=1e-9)
    assert np.all(result.budget["absorptivity"] == 0.0)
    np.testing.assert_allclose(result.std_uncertainty, result.budget["spectral_noise"], rtol=1e-12)


def test_noisier_scan_than_model_uses_its_own_residual_variance() -> None:
    # Reference: statsmodels OLS with the scale estimated from the residuals (ssr / df_resid): the
    # standard errors are its bse, and the residual test is the chi-square of ssr / s^2.
    rng = np.random.default_rng(22)
    absorptivity = random_absorptivities(GRID, 2, rng)
    s = 0.001
    library = _library(absorptivity, noise=NoiseModel(floor=s, proportional=0.0, correlation_length_nm=0.0))
    values = np.array([[0.5, 0.4]]) @ absorptivity + 3 * s * rng.standard_normal((1, GRID.size))
    result = quantify(_scans(values), library, baseline="none")
    fit = sm.OLS(values[0], absorptivity.T).fit()
    assert result.residual_dof[0] == fit.df_resid
    assert result.noise_scale[0] == pytest.approx(fit.scale / s**2, rel=1e-9)
    np.testing.assert_allclose(result.budget["spectral_noise"][0], fit.bse, rtol=1e-9)
    assert result.residual_p_value[0] == pytest.approx(stats.chi2.sf(fit.ssr / s**2, fit.df_resid), rel=1e-6)
    assert result.interferent[0]  # nine times the modelled variance is not noise the library explains


def test_without_a_noise_model_white_scans_get_the_ols_standard_errors() -> None:
    # Reference: statsmodels OLS bse (scale ssr / df_resid). White noise, so the residuals' pooled
    # lag-one correlation is negligible and no correlation is assumed.
    rng = np.random.default_rng(24)
    absorptivity = random_absorptivities(GRID, 3, rng)
    truth = rng.uniform(0.3, 0.7, (20, 3))
    values = truth @ absorptivity + 0.002 * rng.standard_normal((20, GRID.size))
    result = quantify(_scans(values), _library(absorptivity), baseline="offset")
    design = np.column_stack([absorptivity.T, np.ones(GRID.size)])
    for i in range(20):
        fit = sm.OLS(values[i], design).fit()
        np.testing.assert_allclose(result.budget["spectral_noise"][i], fit.bse[:3], rtol=1e-9)
        assert result.effective_dof[i, 0] == pytest.approx(fit.df_resid, rel=1e-12)
    assert np.all(np.isnan(result.residual_p_value))  # no model to test the residual against


def test_a_batch_gives_each_scan_what_it_gets_alone() -> None:
    # Scans with different used points and different components at the bound share one call.
    rng = np.random.default_rng(25)
    absorptivity = random_absorptivities(GRID, 3, rng)
    noise = NoiseModel(floor=0.002, proportional=0.01, correlation_length_nm=3.0)
    library = _library(absorptivity, noise=noise, limit=1.2)
    truth = np.array([[0.4, 0.3, 0.5], [0.0, 0.6, 0.2], [1.5, 0.2, 0.0], [0.3, 0.0, 0.0], [0.2, 0.2, 0.2]])
    values = truth @ absorptivity + 0.003 * rng.standard_normal((5, GRID.size))
    values[4, 20:30] = np.nan
    batch = quantify(_scans(values), library, path_length_tolerance=0.01)
    assert len({tuple(row) for row in batch.used}) >= 3 and len({tuple(row) for row in batch.concentration == 0}) >= 3
    for i in range(5):
        alone = quantify(_scans(values[i]), library, path_length_tolerance=0.01)
        for name in ("concentration", "std_uncertainty", "expanded_uncertainty", "upper_limit", "lod", "baseline", "fitted", "noise_scale"):
            np.testing.assert_allclose(getattr(batch, name)[i], getattr(alone, name)[0], rtol=1e-10, atol=1e-14, err_msg=name)
        assert batch.flags[i] == alone.flags[0] and batch.scan_flags[i] == alone.scan_flags[0]


def test_correlated_heteroscedastic_noise_follows_the_law_of_propagation() -> None:
    # GUM (JCGM 100:2008) 5.2.2 with correlated inputs: u^2(c) = P Sigma P^T with P = (D^T D)^-1 D^T
    # and Sigma_ij = sigma_i sigma_j exp(-|x_i - x_j| / L), built densely with numpy.
    rng = np.random.default_rng(23)
    absorptivity = random_absorptivities(GRID, 3, rng)
    noise = NoiseModel(floor=0.0015, proportional=0.01, correlation_length_nm=4.0)
    truth = np.array([[0.6, 0.3, 0.5]])
    values = truth @ absorptivity + 0.0002 * rng.standard_normal((1, GRID.size))
    result = quantify(_scans(values), _library(absorptivity, noise=noise), baseline="linear")
    assert result.noise_scale[0] == 1.0
    design = np.column_stack([absorptivity.T, _baseline_design(GRID, "linear")])
    sigma = np.sqrt(noise.floor**2 + (noise.proportional * result.fitted[0]) ** 2)
    covariance = np.outer(sigma, sigma) * np.exp(-np.abs(GRID[:, None] - GRID[None, :]) / noise.correlation_length_nm)
    projector = np.linalg.solve(design.T @ design, design.T)
    expected = np.sqrt(np.diag(projector @ covariance @ projector.T))[:3]
    np.testing.assert_allclose(result.budget["spectral_noise"][0], expected, rtol=1e-9)


# --- a textbook worked example ----------------------------------------------------------------

# Cobalt and nickel complexes with 2,3-quinoxalinedithiol, 1.00 cm cell (from memory: the
# simultaneous-determination example of Skoog, West, Holler & Crouch, Fundamentals of Analytical
# Chemistry, chapter on molecular absorption): epsilon(Co) = 36400 and epsilon(Ni) = 5520
# L mol^-1 cm^-1 at 510 nm, 1240 and 17500 at 656 nm; the solution read A = 0.446 at 510 nm and
# 0.326 at 656 nm; answers 9.53e-6 mol/L Co and 1.80e-5 mol/L Ni, i.e. 132 ppm Co and 248 ppm Ni
# in a 0.425 g sample dissolved to 50.0 mL, of which 25.0 mL was developed and made up to 50.0 mL.
TEXTBOOK_GRID = np.array([510.0, 656.0])
TEXTBOOK_EPSILON = np.array([[36400.0, 1240.0], [5520.0, 17500.0]])  # rows Co, Ni
TEXTBOOK_ABSORBANCE = np.array([[0.446, 0.326]])


def _cramer() -> tuple[float, float]:
    """The two simultaneous equations solved by hand with Cramer's rule."""
    (a, b), (c, d) = TEXTBOOK_EPSILON.T  # A510 = a Co + b Ni, A656 = c Co + d Ni
    a510, a656 = TEXTBOOK_ABSORBANCE[0]
    determinant = a * d - b * c
    return (a510 * d - b * a656) / determinant, (a * a656 - c * a510) / determinant


def test_textbook_cobalt_nickel_example_is_solved_exactly() -> None:
    library = _library(TEXTBOOK_EPSILON, TEXTBOOK_GRID, unit="mol/L", names=("Co", "Ni"))
    result = quantify(_scans(TEXTBOOK_ABSORBANCE, TEXTBOOK_GRID), library, baseline="none")
    cobalt, nickel = _cramer()
    np.testing.assert_allclose(result.concentration[0], [cobalt, nickel], rtol=1e-9)
    assert float(f"{result.concentration[0, 0]:.3g}") == 9.53e-6
    assert float(f"{result.concentration[0, 1]:.3g}") == 1.80e-5
    # Zero residual degrees of freedom and no noise model: no uncertainty, and the flag says so.
    assert result.residual_dof[0] == 0
    assert "no-uncertainty" in result.scan_flags[0]
    assert np.all(np.isnan(result.std_uncertainty))


def test_textbook_example_with_dilution_gives_the_ppm_in_the_solid() -> None:
    library = _library(TEXTBOOK_EPSILON, TEXTBOOK_GRID, unit="mol/L", names=("Co", "Ni"))
    # The 25.0 mL aliquot made up to 50.0 mL is a two-fold dilution of the 50.0 mL sample solution.
    result = quantify(_scans(TEXTBOOK_ABSORBANCE, TEXTBOOK_GRID), library, baseline="none", dilution=2.0)
    molar_mass = np.array([58.933, 58.693])  # g/mol, standard atomic weights (from memory)
    ppm = result.concentration[0] * 0.0500 * molar_mass / 0.425 * 1e6
    assert np.round(ppm).tolist() == [132.0, 248.0]


def test_textbook_example_with_a_noise_model_has_uncertainty_but_no_residual_dof() -> None:
    s = 0.002
    library = _library(
        TEXTBOOK_EPSILON, TEXTBOOK_GRID, unit="mol/L", names=("Co", "Ni"),
        noise=NoiseModel(floor=s, proportional=0.0, correlation_length_nm=0.0),
    )
    result = quantify(_scans(TEXTBOOK_ABSORBANCE, TEXTBOOK_GRID), library, baseline="none")
    assert "no-residual-dof" in result.scan_flags[0] and "no-uncertainty" not in result.scan_flags[0]
    np.testing.assert_allclose(result.concentration[0], _cramer(), rtol=1e-9)
    # Two equations, two unknowns: u = s sqrt(diag((E E^T)^-1)) with E the epsilon matrix (numpy).
    expected = s * np.sqrt(np.diag(np.linalg.inv(TEXTBOOK_EPSILON @ TEXTBOOK_EPSILON.T)))
    np.testing.assert_allclose(result.std_uncertainty[0], expected, rtol=1e-9)
    assert np.all(result.coverage_factor == 2.0)  # only model-based terms: infinite degrees of freedom


# --- GUM combination, coverage factor, path length and dilution -----------------------------


@pytest.fixture(scope="module")
def calibrated(simulated_standards):  # type: ignore[no-untyped-def]
    """A library calibrated from simulated pure standards, and mixtures measured on the same instrument."""
    instrument = Instrument(baseline_offset_sd=0.002)
    standards = simulated_standards(31, instrument, (0.1, 0.2, 0.4, 0.6, 0.8, 1.0), n_components=3)
    library = calibrate(standards.spectra, standards.concentrations, standards.names, "mg/L")
    rng = np.random.default_rng(32)
    truth = rng.uniform(0.1, 0.6, (6, 3))
    samples = _scans(measure(standards.grid, truth @ standards.truth, instrument, rng), standards.grid)
    return library, samples, truth


def test_budget_terms_combine_in_quadrature_with_relative_path_and_dilution_terms(calibrated) -> None:  # type: ignore[no-untyped-def]
    library, samples, _ = calibrated
    result = quantify(samples, library, path_length_tolerance=0.01, dilution_tolerance=0.005, dilution=2.0)
    budget = result.budget
    assert set(budget) == {"spectral_noise", "absorptivity", "path_length", "dilution"}
    assert np.all(budget["absorptivity"] > 0) and np.all(budget["spectral_noise"] > 0)
    # GUM 5.1.2 with uncorrelated inputs: u_c^2 = sum of the squared contributions.
    np.testing.assert_allclose(result.std_uncertainty**2, sum(term**2 for term in budget.values()), rtol=1e-12)
    # GUM 5.1.6: for c proportional to A / (b) x f the relative uncertainties add, so path length
    # and dilution contribute c u_rel(b) and c u_rel(f).
    np.testing.assert_allclose(budget["path_length"], result.concentration * 0.01, rtol=1e-12)
    np.testing.assert_allclose(budget["dilution"], result.concentration * 0.005, rtol=1e-12)
    np.testing.assert_allclose(result.expanded_uncertainty, result.coverage_factor * result.std_uncertainty, rtol=1e-12)
    finite = np.isfinite(result.effective_dof)
    assert finite.any()
    np.testing.assert_allclose(
        result.coverage_factor[finite], stats.t.ppf(TWO_SIDED_9545, result.effective_dof[finite]), rtol=1e-12
    )


def test_absorptivity_term_and_welch_satterthwaite_dof() -> None:
    # Absorptivity errors (independent between components and, with white noise, between
    # wavelengths) propagate through dc = -P (dK^T c): u_j^2 = sum_k c_k^2 sum_t P_jt^2 se_kt^2
    # (GUM 5.1.2, written out with numpy). Effective dof by Welch-Satterthwaite, GUM G.2b:
    # nu_eff = u_c^4 / sum(u_i^4 / nu_i), terms known exactly (path length) having nu = inf.
    rng = np.random.default_rng(43)
    absorptivity = random_absorptivities(GRID, 2, rng)
    std_error = 0.01 * absorptivity + 1e-4
    s = 0.001
    library = dataclasses.replace(
        library_from_absorptivities(GRID, absorptivity, ("a", "b"), "mg/L", std_error=std_error),
        noise=NoiseModel(floor=s, proportional=0.0, correlation_length_nm=0.0),
        residual_dof=5,
    )
    values = np.array([[0.6, 0.5]]) @ absorptivity + 4 * s * rng.standard_normal((1, GRID.size))
    result = quantify(_scans(values), library, baseline="none", path_length_tolerance=0.01)
    projector = np.linalg.solve(absorptivity @ absorptivity.T, absorptivity)
    expected = np.sqrt((projector**2 @ (std_error**2).T) @ result.concentration[0] ** 2)
    np.testing.assert_allclose(result.budget["absorptivity"][0], expected, rtol=1e-9)
    budget = {key: value[0] for key, value in result.budget.items()}
    noise_dof = result.residual_dof[0]  # white noise, scan noisier than the model: its own residual dof
    assert result.noise_scale[0] > 1
    welch = result.std_uncertainty[0] ** 4 / (budget["spectral_noise"] ** 4 / noise_dof + budget["absorptivity"] ** 4 / 5)
    np.testing.assert_allclose(result.effective_dof[0], welch, rtol=1e-9)
    assert np.all(welch > 5)  # the exactly known path-length term only adds confidence


def test_path_length_and_dilution_scale_the_result() -> None:
    # Beer-Lambert A = epsilon b c: doubling b halves c; a dilution factor f multiplies it.
    rng = np.random.default_rng(41)
    absorptivity = random_absorptivities(GRID, 2, rng)
    library = _library(absorptivity, noise=NoiseModel(floor=0.001, proportional=0.0, correlation_length_nm=0.0))
    values = np.array([[0.4, 0.3]]) @ absorptivity + 0.0005 * rng.standard_normal((1, GRID.size))
    one_cm = quantify(_scans(values), library, baseline="none")
    two_cm = quantify(_scans(values), library, baseline="none", path_length=2.0)
    diluted = quantify(_scans(values), library, baseline="none", dilution=5.0)
    np.testing.assert_allclose(two_cm.concentration, one_cm.concentration / 2, rtol=1e-12)
    np.testing.assert_allclose(two_cm.std_uncertainty, one_cm.std_uncertainty / 2, rtol=1e-9)
    np.testing.assert_allclose(diluted.concentration, one_cm.concentration * 5, rtol=1e-12)
    np.testing.assert_allclose(diluted.std_uncertainty, one_cm.std_uncertainty * 5, rtol=1e-9)


def test_coverage_factor_is_two_for_many_dof_and_student_t_for_few() -> None:
    rng = np.random.default_rng(42)
    absorptivity = random_absorptivities(GRID, 2, rng)
    s = 0.001
    model = NoiseModel(floor=s, proportional=0.0, correlation_length_nm=0.0)
    truth = np.array([[0.5, 0.5]])
    # Scan quieter than the model: only model-based terms, infinite dof, k = 2 (GUM 6.2.2).
    quiet = quantify(_scans(truth @ absorptivity), _library(absorptivity, noise=model), baseline="none")
    assert quiet.coverage_factor[0].tolist() == [2.0, 2.0]
    assert stats.norm.ppf(TWO_SIDED_9545) == pytest.approx(2.0, abs=1e-3)
    # Noisy scan on many points: the scan's own variance with 99 dof, k = t(99) close to 2.
    noisy = truth @ absorptivity + 4 * s * rng.standard_normal((1, GRID.size))
    many = quantify(_scans(noisy), _library(absorptivity, noise=model), baseline="none")
    assert many.residual_dof[0] == GRID.size - 2
    np.testing.assert_allclose(many.coverage_factor[0], stats.t.ppf(TWO_SIDED_9545, GRID.size - 2), rtol=1e-9)
    assert np.all(np.abs(many.coverage_factor - 2.0) < 0.05)
    # Noisy scan on six points, two unknowns: 4 dof (white noise), k = t.ppf(0.97725, 4) = 2.87.
    few_grid = GRID[::20]
    narrow = _library(absorptivity[:, ::20], few_grid, noise=model)
    few = quantify(_scans(noisy[:, ::20], few_grid), narrow, baseline="none")
    assert few.residual_dof[0] == 4 and few.noise_scale[0] > 1
    np.testing.assert_allclose(few.effective_dof[0], 4.0, rtol=1e-12)
    np.testing.assert_allclose(few.coverage_factor[0], stats.t.ppf(TWO_SIDED_9545, 4), rtol=1e-12)
    assert few.coverage_factor[0, 0] == pytest.approx(2.87, abs=0.01)  # GUM table G.2, nu = 4, p = 95.45 %


# --- figures of merit and limits --------------------------------------------------------------


def test_limits_of_detection_and_quantification_follow_ich_q2() -> None:
    # ICH Q2(R2): LOD = 3.3 sigma / S and LOQ = 10 sigma / S; here S is the net analyte signal norm
    # 1 / sqrt([(D^T D)^-1]_jj) (Lorber 1986) and sigma the photometric noise, computed with numpy.
    rng = np.random.default_rng(51)
    absorptivity = random_absorptivities(GRID, 3, rng)
    s = 0.0015
    library = _library(absorptivity, noise=NoiseModel(floor=s, proportional=0.0, correlation_length_nm=0.0))
    values = np.array([[0.2, 0.5, 0.4]]) @ absorptivity + 0.5 * s * rng.standard_normal((1, GRID.size))
    result = quantify(_scans(values), library, baseline="offset")
    design = np.column_stack([absorptivity.T, np.ones(GRID.size)])
    sensitivity = 1.0 / np.sqrt(np.diag(np.linalg.inv(design.T @ design)))[:3]
    np.testing.assert_allclose(result.sensitivity[0], sensitivity, rtol=1e-9)
    np.testing.assert_allclose(result.lod[0], 3.3 * s / sensitivity, rtol=1e-9)
    np.testing.assert_allclose(result.loq[0], 10.0 * s / sensitivity, rtol=1e-9)
    np.testing.assert_allclose(result.lod, 3.3 * result.budget["spectral_noise"], rtol=1e-12)
    np.testing.assert_allclose(result.loq, 10.0 * result.budget["spectral_noise"], rtol=1e-12)
    # Selectivity: share of the pure spectrum's norm that is net analyte signal; VIF = 1 / selectivity^2.
    selectivity = sensitivity / np.linalg.norm(absorptivity, axis=1)
    np.testing.assert_allclose(result.selectivity[0], selectivity, rtol=1e-9)
    np.testing.assert_allclose(result.variance_inflation[0], 1 / selectivity**2, rtol=1e-9)


# --- exclusions and flags ---------------------------------------------------------------------


def test_saturated_points_are_excluded_and_counted() -> None:
    rng = np.random.default_rng(61)
    absorptivity = random_absorptivities(GRID, 2, rng)
    truth = np.array([[0.3, 0.4], [0.2, 0.1]])
    transmittance = 10.0 ** (-(truth @ absorptivity))
    transmittance[0, 10:15] = 0.0  # a saturated detector reads no light
    transmittance[0, 40] = -0.002  # dark-current overshoot
    result = quantify(_scans(transmittance, quantity="transmittance"), _library(absorptivity), baseline="none")
    assert result.excluded["unusable"].tolist() == [6, 0]
    assert not result.used[0, 10:15].any() and not result.used[0, 40] and result.used[1].all()
    assert "points-excluded" in result.scan_flags[0] and "points-excluded" not in result.scan_flags[1]
    assert np.all(np.isnan(result.residuals[0, 10:15]))
    np.testing.assert_allclose(result.concentration, truth, rtol=1e-9)  # noise-free: exact from the rest


def test_points_above_the_working_range_and_the_ceiling_are_excluded_and_counted() -> None:
    rng = np.random.default_rng(62)
    absorptivity = random_absorptivities(GRID, 2, rng)
    truth = np.array([[1.6, 1.2], [0.3, 0.2]])
    values = truth @ absorptivity
    limited = quantify(_scans(values), _library(absorptivity, limit=1.0), baseline="none", ceiling=1.6)
    above_limit = (values > 1.0).sum(axis=1)
    assert above_limit[0] > 5
    assert limited.excluded["above_working_range"].tolist() == above_limit.tolist()
    assert limited.excluded["above_ceiling"].tolist() == [0, 0]  # counted once, under the first reason
    np.testing.assert_allclose(limited.concentration, truth, rtol=1e-9)
    unlimited = quantify(_scans(values), _library(absorptivity), baseline="none", ceiling=1.6)
    assert unlimited.excluded["above_ceiling"].tolist() == (values > 1.6).sum(axis=1).tolist()
    assert unlimited.excluded["above_working_range"].tolist() == [0, 0]
    assert not np.any(unlimited.used & (values > 1.6))
    assert "points-excluded" in unlimited.scan_flags[0]


def test_too_few_usable_points_give_nan_with_a_flag() -> None:
    rng = np.random.default_rng(63)
    absorptivity = random_absorptivities(GRID, 3, rng)
    values = np.array([[0.3, 0.4, 0.2], [0.1, 0.2, 0.3]]) @ absorptivity
    values[0, 3:] = np.nan  # three points left for three components and an offset
    result = quantify(_scans(values), _library(absorptivity), baseline="offset")
    assert np.all(np.isnan(result.concentration[0])) and np.all(np.isnan(result.std_uncertainty[0]))
    assert "too-few-points" in result.scan_flags[0]
    assert all("too-few-points" in flags for flags in result.flags[0])
    np.testing.assert_allclose(result.concentration[1], [0.1, 0.2, 0.3], rtol=1e-9)
    assert "too-few-points" not in result.scan_flags[1]
    _flags_explain_every_nan(result)


def test_nearly_identical_spectra_are_flagged_ill_conditioned() -> None:
    rng = np.random.default_rng(64)
    base = random_absorptivities(GRID, 1, rng)[0]
    tilt = 1 + (GRID - 500.0) / 100.0
    separate = random_absorptivities(GRID, 2, np.random.default_rng(65))
    values = np.array([0.3, 0.2])
    for spectra, expect in ((np.vstack([base, base * (1 + 0.1 * tilt)]), True), (separate, False)):
        result = quantify(_scans(values @ spectra), _library(spectra), baseline="none")
        # VIF_j = [(D^T D)^-1]_jj ||d_j||^2 (numpy); above 10 is harmful collinearity (common practice, no source).
        vif = np.diag(np.linalg.inv(spectra @ spectra.T)) * np.sum(spectra**2, axis=1)
        np.testing.assert_allclose(result.variance_inflation[0], vif, rtol=1e-6)
        assert ("ill-conditioned" in result.scan_flags[0]) == expect == bool(vif.max() > 10)


def test_spectra_identical_beyond_the_solver_limit_give_flagged_nan_not_an_error() -> None:
    rng = np.random.default_rng(66)
    base = random_absorptivities(GRID, 1, rng)[0]
    twins = np.vstack([base, base * (1 + 1e-7 * (GRID - 500.0) / 100.0)])
    other = random_absorptivities(GRID, 2, np.random.default_rng(67))
    values = np.array([[0.3, 0.2]]) @ twins
    result = quantify(_scans(values), _library(twins), baseline="none")
    assert np.all(np.isnan(result.concentration))
    assert "ill-conditioned" in result.scan_flags[0] and "too-few-points" not in result.scan_flags[0]
    _flags_explain_every_nan(result)
    # The same scans against a sound library are solved: the failure belongs to the scan, not the batch.
    assert np.all(np.isfinite(quantify(_scans(values), _library(other), baseline="none").concentration))


def test_component_at_the_bound_reports_zero_and_an_upper_limit() -> None:
    rng = np.random.default_rng(68)
    absorptivity = random_absorptivities(GRID, 3, rng)
    s = 0.002
    library = _library(absorptivity, noise=NoiseModel(floor=s, proportional=0.0, correlation_length_nm=0.0))
    # A slightly negative amount of the last component drives its free estimate below zero.
    truth = np.array([[0.4, 0.3, -0.02]])
    values = truth @ absorptivity + 0.5 * s * rng.standard_normal((1, GRID.size))
    free_estimate = np.linalg.lstsq(absorptivity.T, values[0], rcond=None)[0]  # numpy, no bound
    assert free_estimate[2] < 0
    result = quantify(_scans(values), library, baseline="none")
    assert result.concentration[0, 2] == 0.0
    assert "below-detection" in result.flags[0][2]
    # Upper limit: the free estimate floored at 0, plus k standard uncertainties.
    assert result.upper_limit[0, 2] == pytest.approx(result.coverage_factor[0, 2] * result.std_uncertainty[0, 2], rel=1e-12)
    assert result.upper_limit[0, 2] > 0
    assert np.all(np.isnan(result.upper_limit[0, :2])) and not result.flags[0][0] and not result.flags[0][1]
    reference = optimize.nnls(absorptivity.T, values[0])[0]  # scipy reference for the other two
    np.testing.assert_allclose(result.concentration[0], reference, rtol=1e-9, atol=1e-12)


@pytest.mark.parametrize(
    ("options", "message"),
    [
        ({"baseline": "foo"}, "'baseline' option must be one of none, offset, linear"),
        ({"path_length": -1.0}, "path length must be a positive number"),
        ({"dilution": 0.0}, "dilution must be a positive number"),
        ({"dilution": 0.5}, "dilution factor must be >= 1"),
        ({"path_length_tolerance": 0.7}, "path-length tolerance"),
        ({"wavelength_range": (800.0, 900.0)}, "share no wavelength range"),
    ],
)
def test_invalid_options_are_refused(options: dict, message: str) -> None:
    absorptivity = random_absorptivities(GRID, 2, np.random.default_rng(69))
    with pytest.raises(AbsolveError, match=message):
        quantify(_scans(np.array([0.2, 0.3]) @ absorptivity), _library(absorptivity), **options)


# --- Monte Carlo: coverage and recovery on invented spectra with a known truth ------------------

COVERAGE_INSTRUMENT = Instrument(
    noise_floor=0.0015, noise_proportional=0.004, correlation_length_nm=3.0, stray_light=0.0, baseline_offset_sd=0.002
)


def _plain_intervals(absorptivity: np.ndarray, values: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Per-scan NNLS with a free offset (scipy lsq_linear) and white-noise OLS standard errors
    s^2 (D^T D)^-1 from the scan's own residual: no correlation, no absorptivity term."""
    design = np.column_stack([absorptivity.T, np.ones(absorptivity.shape[1])])
    n_points, n_params = design.shape
    lower = np.r_[np.zeros(n_params - 1), -np.inf]
    inverse = np.linalg.inv(design.T @ design)
    estimates, halfwidths = [], []
    for y in values:
        x = optimize.lsq_linear(design, y, bounds=(lower, np.inf), method="bvls").x
        variance = np.sum((y - design @ x) ** 2) / (n_points - n_params)
        estimates.append(x[:-1])
        halfwidths.append(stats.t.ppf(0.975, n_points - n_params) * np.sqrt(variance * np.diag(inverse)[:-1]))
    return np.array(estimates), np.array(halfwidths)


def _calibrate_and_measure(simulated_standards, seed: int, instrument: Instrument, levels: tuple[float, ...], strength: tuple[float, float], n_samples: int):  # type: ignore[no-untyped-def]
    """Calibrate invented pure standards, measure mixtures of known truth, quantify them."""
    standards = simulated_standards(seed, instrument, levels, n_components=3)
    library = calibrate(standards.spectra, standards.concentrations, standards.names, "mg/L")
    rng = np.random.default_rng(seed + 100_000)
    truth = rng.uniform(*strength, (n_samples, 3))
    values = measure(standards.grid, truth @ standards.truth, instrument, rng)
    return standards, library, truth, values, quantify(_scans(values, standards.grid), library)


@pytest.mark.slow
def test_expanded_uncertainty_covers_the_truth_about_95_percent(simulated_standards) -> None:  # type: ignore[no-untyped-def]
    # 40 independent calibrations (6 levels x 3 pure invented dyes, 2 blanks) x 25 mixtures x 3
    # components; the spectra are invented (absolve.simulate) so that the truth is known.
    covered, plain_covered = [], []
    for seed in range(40):
        _, library, truth, values, result = _calibrate_and_measure(
            simulated_standards, 1000 + seed, COVERAGE_INSTRUMENT, (0.1, 0.2, 0.4, 0.6, 0.8, 1.0), (0.1, 0.7), 25
        )
        covered.append(np.abs(result.concentration - truth) <= result.expanded_uncertainty)
        estimate, halfwidth = _plain_intervals(library.absorptivity, values)
        plain_covered.append(np.abs(estimate - truth) <= halfwidth)
    coverage = float(np.mean(covered))
    plain = float(np.mean(plain_covered))
    print(f"coverage of 95 % intervals: absolve {coverage:.3f}, plain {plain:.3f}")
    assert 0.90 <= coverage <= 0.985, coverage
    assert plain < 0.85, plain


def test_strong_samples_with_stray_light_are_recovered_better_than_the_plain_way(simulated_standards) -> None:  # type: ignore[no-untyped-def]
    # Standards up to a peak absorbance of 1.5, samples 1.5-3 times stronger (band maxima past the
    # standards' range), stray light 0.3 %. Plain way: per-wavelength least-squares calibration of
    # every standard point, no exclusion or correction, then per-scan NNLS on all points (scipy).
    instrument = Instrument(stray_light=0.003)
    errors, plain_errors = [], []
    for seed in range(4):
        standards, _, truth, values, result = _calibrate_and_measure(
            simulated_standards, 200 + seed, instrument, (0.25, 0.5, 0.75, 1.0, 1.25, 1.5), (1.5, 3.0), 10
        )
        assert np.all(result.excluded["above_working_range"] + result.excluded["unusable"] > 0)
        errors.append(np.abs(result.concentration / truth - 1))
        regressors = np.column_stack([standards.concentrations, np.ones(len(standards.concentrations))])
        absorptivity = np.linalg.lstsq(regressors, standards.spectra.values, rcond=None)[0][:3]
        estimate, _ = _plain_intervals(absorptivity, values)
        plain_errors.append(np.abs(estimate / truth - 1))
    ratio = float(np.mean(errors) / np.mean(plain_errors))
    print(f"mean absolute relative error: absolve {np.mean(errors):.4f}, plain {np.mean(plain_errors):.4f}")
    assert ratio < 0.5, ratio
