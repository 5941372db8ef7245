"""PLS inverse calibration: agreement with scikit-learn, the outlier limits, and recovery under a background absorber."""

from __future__ import annotations

import json
import subprocess
import sys
from dataclasses import dataclass

import numpy as np
import pytest
from scipy import stats
from scipy.optimize import nnls
from sklearn.cross_decomposition import PLSRegression

from absolve.errors import AbsolveError
from absolve.inverse import InverseModel, _assign_folds, _one_standard_error, hotelling_t2_limit, q_residual_limit
from absolve.simulate import Band, Instrument, band_spectrum, measure, random_absorptivities
from absolve.spectra import Spectra

GRID = np.arange(400.0, 701.0, 2.0)
NAMES = ("red", "yellow", "blue")


@dataclass(frozen=True)
class Scenario:
    absorptivity: np.ndarray
    train: Spectra
    train_conc: np.ndarray
    test: Spectra
    test_conc: np.ndarray


def _background(grid: np.ndarray) -> np.ndarray:
    """A broad band under all the dyes, of an absorber that is never quantified (a matrix colour)."""
    return band_spectrum(grid, [Band(grid[0] + 0.4 * (grid[-1] - grid[0]), 110.0, 1.0, skew=0.5)])


def _scans(rng: np.random.Generator, k: np.ndarray, n: int, prefix: str, *, grid: np.ndarray = GRID,
           instrument: Instrument = Instrument(), background: float = 0.3) -> tuple[Spectra, np.ndarray]:
    conc = rng.uniform(0.05, 0.5, (n, k.shape[0]))
    true = conc @ k + rng.uniform(0.0, background, (n, 1)) * _background(grid)
    values = measure(grid, true, instrument, rng)
    return Spectra(grid, values, [f"{prefix}{i}" for i in range(n)]), conc


@pytest.fixture(scope="module")
def scenario() -> Scenario:
    rng = np.random.default_rng(20240601)
    k = random_absorptivities(GRID, 3, rng)
    train, train_conc = _scans(rng, k, 30, "std")
    test, test_conc = _scans(rng, k, 60, "sample")
    return Scenario(k, train, train_conc, test, test_conc)


@pytest.fixture(scope="module")
def model(scenario: Scenario) -> InverseModel:
    return InverseModel().fit(scenario.train, scenario.train_conc, NAMES, "mg/L")


# ---------------------------------------------------------------- reference library: scikit-learn
def test_coefficients_and_predictions_match_sklearn(scenario: Scenario, model: InverseModel) -> None:
    # Reference: scikit-learn's PLSRegression used directly on the same data.
    prediction = model.predict(scenario.test)
    for j, component in enumerate(model.component_models_):
        direct = PLSRegression(n_components=component.latent_variables, scale=False).fit(
            scenario.train.values, scenario.train_conc[:, j]
        )
        np.testing.assert_allclose(component.coefficients, direct.coef_[0], rtol=1e-10, atol=1e-12)
        np.testing.assert_allclose(prediction.concentration[:, j], direct.predict(scenario.test.values).reshape(-1), rtol=0, atol=1e-10)


def test_rmsecv_curve_matches_direct_sklearn_fits_per_fold(scenario: Scenario) -> None:
    # Reference: one scikit-learn fit per fold and per number of latent variables,
    # against the model's shortcut (truncated rotations of one fit per fold).
    fitted = InverseModel(max_components=4, folds=5).fit(scenario.train, scenario.train_conc, NAMES, "mg/L")
    fold = fitted.cv_.fold_of_scan
    x, y = scenario.train.values, scenario.train_conc
    for j in range(len(NAMES)):
        for a in range(1, 5):
            errors = np.empty(y.shape[0])
            for f in range(fitted.cv_.folds):
                held = fold == f
                direct = PLSRegression(n_components=a, scale=False).fit(x[~held], y[~held, j])
                errors[held] = direct.predict(x[held]).reshape(-1) - y[held, j]
            assert fitted.cv_.rmsecv[j, a] == pytest.approx(np.sqrt(np.mean(errors**2)), rel=1e-9)
        # Zero latent variables predicts the training-fold mean.
        mean_errors = np.concatenate([y[fold == f, j] - y[fold != f, j].mean() for f in range(fitted.cv_.folds)])
        assert fitted.cv_.rmsecv[j, 0] == pytest.approx(np.sqrt(np.mean(mean_errors**2)), rel=1e-12)


# ---------------------------------------------------------------- cross-validation design
def test_folds_are_venetian_blinds_over_standards_with_replicates_together() -> None:
    standards = np.array([[1.0, 0.0], [2.0, 0.5], [3.0, 1.0], [4.0, 1.5], [5.0, 2.0]])
    # Order of scans: standard 0, its replicate, then 1..4 with a replicate of 2 at the end.
    conc = standards[[0, 0, 1, 2, 3, 4, 2]]
    fold, n_folds = _assign_folds(conc, 3)
    assert n_folds == 3
    assert fold.tolist() == [0, 0, 1, 2, 0, 1, 2]
    fold, n_folds = _assign_folds(conc, 10)  # more folds than standards: leave one standard out
    assert n_folds == 5
    assert fold.tolist() == [0, 0, 1, 2, 3, 4, 2]


def test_one_standard_error_rule_picks_the_fewest_within_one_se() -> None:
    # Hand-worked from the rule's definition (Hastie, Tibshirani & Friedman 2009, 7.10):
    # minimum 0.18 at 4 LV, se 0.025 -> threshold 0.205; 2 LV (0.20) is the fewest below it.
    mse = np.array([1.0, 0.5, 0.20, 0.19, 0.18, 0.185])
    se = np.array([0.1, 0.05, 0.02, 0.02, 0.025, 0.02])
    assert _one_standard_error(mse, se) == 2
    assert _one_standard_error(mse, np.zeros_like(se)) == 4


def test_chosen_latent_variables_follow_the_rule_on_the_stored_table(model: InverseModel) -> None:
    cv = model.cv_
    mse = cv.rmsecv**2
    for j in range(len(NAMES)):
        best = 1 + int(np.argmin(mse[j, 1:]))
        expected = 1 + int(np.flatnonzero(mse[j, 1:] <= mse[j, best] + cv.mse_standard_error[j, best])[0])
        assert model.component_models_[j].latent_variables == expected
    # Three dyes plus one varying background span four spectral factors.
    assert np.all(model.n_latent_ >= 4)


# ---------------------------------------------------------------- the point of inverse calibration
def test_pls_recovers_components_where_classical_least_squares_is_biased(scenario: Scenario, model: InverseModel) -> None:
    prediction = model.predict(scenario.test)
    error = prediction.concentration - scenario.test_conc
    rmsep = np.sqrt(np.mean(error**2, axis=0))
    span = np.ptp(scenario.train_conc, axis=0)
    assert np.all(rmsep < 0.03 * span), rmsep / span
    # Classical least squares with the true pure-component absorptivities, one
    # non-negative fit per scan (scipy.optimize.nnls), cannot know the background.
    classical = np.array([nnls(scenario.absorptivity.T, row)[0] for row in scenario.test.values])
    cls_rmsep = np.sqrt(np.mean((classical - scenario.test_conc) ** 2, axis=0))
    assert np.all(rmsep < cls_rmsep / 4), (rmsep, cls_rmsep)


def test_uncertainty_is_of_the_right_size(scenario: Scenario, model: InverseModel) -> None:
    prediction = model.predict(scenario.test)
    z = (prediction.concentration - scenario.test_conc) / prediction.std_uncertainty
    # 180 standardised errors: their spread should be near 1 (0.7-1.4 allows
    # for the approximate leverage formula and the sampling error of RMSECV).
    assert 0.7 < np.std(z) < 1.4
    assert np.all(prediction.leverage > 1.0 / 30)


def test_outlier_checks_flag_an_unmodelled_absorber(scenario: Scenario, model: InverseModel) -> None:
    ordinary = model.predict(scenario.test)
    assert ordinary.outside.mean() <= 0.1
    intruder = band_spectrum(GRID, [Band(450.0, 12.0, 0.15)])
    strange = Spectra(GRID, scenario.test.values[:20] + intruder, [f"odd{i}" for i in range(20)])
    flagged = model.predict(strange)
    assert flagged.outside.mean() >= 0.9
    assert np.all(flagged.q_residual > ordinary.q_limit)


def test_beyond_range_marks_extrapolation(scenario: Scenario, model: InverseModel) -> None:
    rng = np.random.default_rng(3)
    conc = np.array([[0.25, 0.25, 0.25], [0.9, 0.25, 0.25]])
    values = measure(GRID, conc @ scenario.absorptivity + 0.1 * _background(GRID), Instrument(), rng)
    prediction = model.predict(Spectra(GRID, values, ["middle", "strong-red"]))
    assert prediction.beyond_range.tolist() == [[False, False, False], [True, False, False]]


# ---------------------------------------------------------------- limits against their sources
def test_t2_limit_is_the_f_formula_and_holds_for_normal_data() -> None:
    # F-distribution formula for a new observation (Tracy, Young & Mason 1992), via scipy.stats.f.
    a, n, alpha = 3, 25, 0.05
    expected = a * (n - 1) * (n + 1) / (n * (n - a)) * stats.f.ppf(1 - alpha, a, n - a)
    assert hotelling_t2_limit(a, n, alpha) == pytest.approx(expected, rel=1e-12)
    # Monte Carlo: the limit is exact for multivariate normal data; 20000 training
    # sets of 25 and one new observation each; binomial sd of the rate is 0.0015.
    rng = np.random.default_rng(11)
    train = rng.standard_normal((20000, n, a)) @ np.array([[2.0, 0, 0], [0.5, 1.0, 0], [0, 0.3, 0.2]])
    new = rng.standard_normal((20000, a)) @ np.array([[2.0, 0, 0], [0.5, 1.0, 0], [0, 0.3, 0.2]])
    centred = train - train.mean(axis=1, keepdims=True)
    cov = np.einsum("rni,rnj->rij", centred, centred) / (n - 1)
    d = new - train.mean(axis=1)
    t2 = np.einsum("ri,ri->r", d, np.linalg.solve(cov, d[..., None])[..., 0])
    assert np.mean(t2 > expected) == pytest.approx(alpha, abs=0.006)


def test_model_t2_limit_uses_its_components_and_training_size(model: InverseModel) -> None:
    check = model.diagnostics_
    a = check.loadings.shape[1]
    assert a == int(model.n_latent_.max())
    assert check.t2_limit == pytest.approx(hotelling_t2_limit(a, 30, 0.01), rel=1e-12)


def test_q_limit_matches_monte_carlo_quantile_of_weighted_chi_squares() -> None:
    # Q of a normal residual is sum(lambda_i z_i^2); its quantile by simulation
    # (400000 draws, quantile sd ~0.3 %) against the Jackson-Mudholkar
    # approximation, which is good to about 1-2 % here (tolerance 3 %).
    rng = np.random.default_rng(5)
    lam = np.geomspace(1.0, 0.01, 25)
    draws = (rng.standard_normal((400000, lam.size)) ** 2) @ lam
    for alpha in (0.05, 0.01):
        assert q_residual_limit(lam, alpha) == pytest.approx(np.quantile(draws, 1 - alpha), rel=0.03)
    # Equal eigenvalues: Q / lambda is exactly chi-squared with m degrees of freedom (scipy.stats.chi2).
    assert q_residual_limit(np.full(20, 0.5), 0.05) == pytest.approx(0.5 * stats.chi2.ppf(0.95, 20), rel=0.01)


def test_q_limit_falls_back_to_scaled_chi_squared_when_h0_is_not_positive() -> None:
    lam = np.concatenate([[1.0], np.full(200, 0.05)])
    t1, t2, t3 = (np.sum(lam**p) for p in (1, 2, 3))
    assert 1 - 2 * t1 * t3 / (3 * t2**2) <= 0
    # Box (1954) scaled chi-squared g chi2(h), g = theta2/theta1, h = theta1^2/theta2, via scipy.stats.chi2.
    assert q_residual_limit(lam, 0.05) == pytest.approx(t2 / t1 * stats.chi2.ppf(0.95, t1**2 / t2), rel=1e-12)


def _homoscedastic(rng: np.random.Generator, k: np.ndarray, n: int, grid: np.ndarray) -> tuple[Spectra, np.ndarray]:
    return _scans(rng, k, n, "s", grid=grid, instrument=Instrument(noise_proportional=0.0, stray_light=0.0), background=0.0)


@pytest.mark.slow
def test_model_q_limit_against_monte_carlo_new_scans() -> None:
    # Equally noisy Gaussian scans (the limit's assumption). With 200 training
    # scans the limit should sit within 6 % of the empirical 95 % quantile of
    # 10000 new scans (training-set sampling error ~3 %, simulation error ~1 %).
    grid = np.arange(400.0, 701.0, 10.0)
    rng = np.random.default_rng(0)
    k = random_absorptivities(grid, 3, rng)
    train, conc = _homoscedastic(rng, k, 200, grid)
    fitted = InverseModel(alpha=0.05, max_components=3).fit(train, conc, NAMES, "mg/L")
    new, _ = _homoscedastic(rng, k, 10000, grid)
    q = fitted.predict(new).q_residual
    assert fitted.diagnostics_.q_limit == pytest.approx(np.quantile(q, 0.95), rel=0.06)
    # With only 20 training scans the degrees-of-freedom rescaling keeps the
    # false-alarm rate near alpha on average over training sets (without it,
    # about 0.2); 10 sets x 2000 scans, tolerance for the spread between sets.
    rates = []
    for _ in range(10):
        train, conc = _homoscedastic(rng, k, 20, grid)
        small = InverseModel(alpha=0.05, max_components=3).fit(train, conc, NAMES, "mg/L")
        new, _ = _homoscedastic(rng, k, 2000, grid)
        prediction = small.predict(new)
        rates.append(np.mean(prediction.q_residual > prediction.q_limit))
    assert 0.025 < np.mean(rates) < 0.085, rates


# ---------------------------------------------------------------- preprocessing and grids
def test_derivative_model_recovers_components_and_removes_baseline_offsets(scenario: Scenario) -> None:
    rng = np.random.default_rng(21)
    shifted = Instrument(baseline_offset_sd=0.05)
    train, conc = _scans(rng, scenario.absorptivity, 30, "std", instrument=shifted)
    test, test_conc = _scans(rng, scenario.absorptivity, 40, "sample", instrument=shifted)
    plain = InverseModel().fit(train, conc, NAMES, "mg/L")
    derivative = InverseModel(derivative="first", window=11).fit(train, conc, NAMES, "mg/L")
    rmsep_derivative = np.sqrt(np.mean((derivative.predict(test).concentration - test_conc) ** 2, axis=0))
    assert np.all(rmsep_derivative < 0.03 * np.ptp(conc, axis=0))
    # The offset needs a latent variable of its own without the derivative.
    assert np.all(derivative.n_latent_ <= plain.n_latent_)


def test_uneven_training_grid_is_resampled_evenly_for_derivatives(scenario: Scenario) -> None:
    uneven = np.concatenate([np.arange(400.0, 550.0, 2.0), np.arange(550.0, 701.0, 2.5)])
    rng = np.random.default_rng(4)
    train, conc = _scans(rng, random_absorptivities(uneven, 3, np.random.default_rng(1)), 25, "std", grid=uneven)
    fitted = InverseModel(derivative="second", window=9).fit(train, conc, NAMES, "mg/L")
    steps = np.diff(fitted.wavelengths_)
    assert fitted.wavelengths_[0] == 400.0 and fitted.wavelengths_[-1] == 700.0
    np.testing.assert_allclose(steps, steps[0], rtol=1e-9)


def test_scans_on_another_grid_are_interpolated_and_uncovered_grids_refused(scenario: Scenario, model: InverseModel) -> None:
    fine = np.arange(398.0, 702.0, 0.5)
    rng = np.random.default_rng(9)
    conc = rng.uniform(0.1, 0.4, (10, 3))
    # The same absorbers on a finer, wider grid (bands interpolated from the model grid).
    absorptivity = np.vstack([np.interp(fine, GRID, row) for row in scenario.absorptivity])
    values = measure(fine, conc @ absorptivity, Instrument(), rng)
    prediction = model.predict(Spectra(fine, values, [f"f{i}" for i in range(10)]))
    assert np.sqrt(np.mean((prediction.concentration - conc) ** 2)) < 0.01
    with pytest.raises(AbsolveError, match="does not include"):
        model.predict(scenario.test.restrict(450.0, 700.0))


def test_path_length_scales_absorbance(scenario: Scenario, model: InverseModel) -> None:
    half = Spectra(GRID, scenario.test.values * 0.5, scenario.test.names)
    np.testing.assert_allclose(
        model.predict(half, path_length_cm=0.5).concentration, model.predict(scenario.test).concentration, rtol=0, atol=1e-12
    )


def test_incomplete_scans_give_nan_and_are_flagged(scenario: Scenario, model: InverseModel) -> None:
    values = np.array(scenario.test.values[:3])
    values[1, 40] = np.nan
    prediction = model.predict(Spectra(GRID, values, ["a", "b", "c"]))
    assert prediction.complete.tolist() == [True, False, True]
    assert np.all(np.isnan(prediction.concentration[1])) and np.all(np.isfinite(prediction.concentration[[0, 2]]))
    assert prediction.outside[1]
    json.dumps(prediction.summary(), allow_nan=False)


# ---------------------------------------------------------------- estimator contract
def test_init_only_stores_settings_and_fit_validates_them(scenario: Scenario) -> None:
    odd = InverseModel(derivative="third", window=4, folds=1)
    assert odd.get_params()["derivative"] == "third" and not hasattr(odd, "component_models_")
    with pytest.raises(AbsolveError, match="'derivative' parameter of InverseModel"):
        odd.fit(scenario.train, scenario.train_conc, NAMES, "mg/L")
    cases = [
        ({"derivative": "first", "window": 4}, "'window' parameter"),
        ({"folds": 1}, "'folds' parameter"),
        ({"max_components": 0}, "'max_components' parameter"),
        ({"max_components": 40}, "at most"),
        ({"alpha": 0.7}, "'alpha' parameter"),
        ({"wavelength_range": (600.0, 500.0)}, "'wavelength_range' parameter"),
    ]
    for settings, message in cases:
        with pytest.raises(AbsolveError, match=message):
            InverseModel(**settings).fit(scenario.train, scenario.train_conc, NAMES, "mg/L")


def test_fit_is_idempotent_and_leaves_inputs_alone(scenario: Scenario, model: InverseModel) -> None:
    conc = np.array(scenario.train_conc)
    values = np.array(scenario.train.values)
    again = InverseModel()
    again.fit(scenario.train, conc, NAMES, "mg/L")
    first = again.coef_.copy()
    again.fit(scenario.train, conc, NAMES, "mg/L")
    np.testing.assert_array_equal(again.coef_, first)
    np.testing.assert_array_equal(again.coef_, model.coef_)
    np.testing.assert_array_equal(conc, scenario.train_conc)
    np.testing.assert_array_equal(values, scenario.train.values)


def test_bad_training_data_is_refused_with_a_fix(scenario: Scenario) -> None:
    fit = InverseModel().fit
    with pytest.raises(AbsolveError, match="do not match 30 scans x 3 components"):
        fit(scenario.train, scenario.train_conc[:, :2], NAMES, "mg/L")
    constant = np.array(scenario.train_conc)
    constant[:, 1] = 0.2
    with pytest.raises(AbsolveError, match="'yellow' has the same concentration"):
        fit(scenario.train, constant, NAMES, "mg/L")
    with pytest.raises(AbsolveError, match="not a known concentration unit"):
        fit(scenario.train, scenario.train_conc, NAMES, "furlongs")
    values = np.array(scenario.train.values)
    values[4, 10] = np.nan
    with pytest.raises(AbsolveError, match="'std4' has an unusable"):
        fit(Spectra(GRID, values, scenario.train.names), scenario.train_conc, NAMES, "mg/L")
    # ... and restricting the range past the bad point makes it usable.
    restricted = InverseModel(wavelength_range=(430.0, 700.0)).fit(Spectra(GRID, values, scenario.train.names), scenario.train_conc, NAMES, "mg/L")
    assert restricted.wavelengths_[0] == 430.0
    two_standards = np.repeat([[0.1, 0.2, 0.3], [0.3, 0.1, 0.2]], 15, axis=0)
    with pytest.raises(AbsolveError, match="only 2 distinct standards"):
        fit(scenario.train, two_standards, NAMES, "mg/L")
    with pytest.raises(AbsolveError, match="not been trained"):
        InverseModel().predict(scenario.test)


# ---------------------------------------------------------------- views
def test_summary_is_json_safe_and_report_names_everything(scenario: Scenario, model: InverseModel) -> None:
    prediction = model.predict(scenario.test)
    summary = json.loads(json.dumps(prediction.summary(), allow_nan=False))
    assert summary["components"] == list(NAMES)
    assert len(summary["scans"]) == 60
    assert summary["scans"][0]["concentration"]["red"] == pytest.approx(prediction.concentration[0, 0])
    text = prediction.report()
    assert "sample0:" in text and "blue" in text
    model_summary = json.loads(json.dumps(model.summary(), allow_nan=False))
    assert [c["latent_variables"] for c in model_summary["components"]] == model.n_latent_.tolist()
    report = model.report()
    # One star in the legend line, then one per component at its chosen row.
    assert report.count("*") == 1 + 3 and "RMSECV (mg/L)" in report


def test_rmsecv_figure(model: InverseModel) -> None:
    from absolve.report.inverse_figure import plot_rmsecv

    ax = plot_rmsecv(model)
    assert ax.get_yscale() == "log"
    assert [t.get_text() for t in ax.get_legend().get_texts()] == list(NAMES)
    # Big markers sit at the chosen number of latent variables.
    chosen = [line.get_xdata()[0] for line in ax.get_lines() if len(line.get_xdata()) == 1]
    assert chosen == model.n_latent_.tolist()


def test_inverse_module_does_not_import_matplotlib() -> None:
    code = "import sys, absolve.inverse; print('matplotlib' in sys.modules)"
    result = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True)
    assert result.stdout.strip() == "False"
