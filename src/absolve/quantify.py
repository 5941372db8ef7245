"""Quantify overlapping absorbers: design, batch NNLS, uncertainty budget, diagnostics.

For every scan the measured absorbance on the used wavelengths is modelled as
``A = b * K^T c + baseline``: library absorptivities ``K`` (interpolated onto
the scan grid) times the path length ``b``, plus free baseline terms (none, a
constant offset, or offset and slope) for cuvette mismatch and mild scatter.
Concentrations are constrained to be non-negative; scans that share the same
used points are solved together from one Gram matrix
(:func:`absolve.solver.solve_nonnegative`).

Points are excluded where the measured absorbance is unusable (saturated),
above the library's linear working range, or above the instrument ceiling;
every exclusion is counted per scan.

Uncertainty follows the GUM (JCGM 100:2008) law of propagation for a linear
measurement model, per component:

* spectral noise: the least-squares estimate is a linear map ``P`` of the
  scan, so its covariance is ``P Sigma P^T`` with ``Sigma`` the noise
  covariance along wavelength — heteroscedastic AR(1) from the library's
  noise model, scaled by the scan's own whitened residual variance when that
  is larger (or estimated from the scan alone when the library has no noise
  model);
* absorptivity: the calibration's standard errors, correlated along
  wavelength like the noise that produced them, propagated through
  ``dc = -P (dK c)``;
* path length and dilution: relative standard uncertainties given by the user.

The expanded uncertainty uses ``k = t_{0.9545}(nu_eff)`` with the
Welch-Satterthwaite effective degrees of freedom (GUM G.4), which is 2 for
many degrees of freedom and larger for few.
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass, field
from typing import Any, Literal, get_args

import numpy as np
from numpy.typing import NDArray
from scipy import stats

from .errors import AbsolveError
from .library import NoiseModel, ReferenceLibrary
from .photometry import correct_stray_light
from .noise import ar1_coefficients, correlated_norm_squared, effective_points, whiten
from .screening import Screening, screen_residuals
from .solver import MAX_CONDITION, solve_nonnegative
from .spectra import Spectra

__all__ = ["Baseline", "BASELINES", "MixtureResult", "baseline_columns", "quantify", "DEFAULT_CEILING"]

Baseline = Literal["none", "offset", "linear"]
BASELINES: tuple[str, ...] = get_args(Baseline)
# Above about 2 absorbance units ordinary instruments see under 1 % of the
# light and stray light dominates (common practice, no source).
DEFAULT_CEILING = 2.0
# Variance inflation above 10 marks harmful collinearity (common practice, no source).
VIF_LIMIT = 10.0
_COVERAGE_PROBABILITY = 0.9545  # the probability that k = 2 gives for a normal distribution (GUM 6.2.2)
_CHUNK = 2048  # scans per block in the covariance step, bounding memory
_MIN_SCREEN_POINTS = 10  # fewer wavelengths leave no room for a residual test


@dataclass(frozen=True, eq=False)
class MixtureResult:
    """Concentrations of the library's components in each scan, with everything needed to judge them.

    Arrays are indexed ``[scan, component]`` or ``[scan, wavelength]``.

    Attributes
    ----------
    scan_names, components : tuple of str
    unit : str
        Concentration unit (the library's), after dilution correction.
    wavelengths : ndarray, shape (n_wavelengths,)
        Grid of the fit (the scans' grid inside the library's range and ``--range``).
    concentration, std_uncertainty, expanded_uncertainty, coverage_factor, effective_dof : ndarray
        Per scan and component. Components held at zero by the bound report 0
        with the uncertainty they would have if free.
    budget : dict of str to ndarray
        Standard uncertainty contributions per source: ``spectral_noise``,
        ``absorptivity``, ``path_length``, ``dilution``.
    upper_limit : ndarray
        For components at the zero bound, an upper limit (estimate without the
        bound, floored at 0, plus k standard uncertainties); NaN elsewhere.
    lod, loq : ndarray
        Limits of detection and quantification in this mixture: 3.3 and 10
        times the spectral-noise standard uncertainty (ICH Q2(R2) sigma/S
        form with the multivariate sensitivity).
    sensitivity, selectivity, variance_inflation : ndarray
        Net analyte signal norm per unit concentration (absorbance units), its
        share of the pure absorptivity norm, and 1 / selectivity^2 (Lorber 1986;
        Olivieri et al., Pure Appl. Chem. 78 (2006) 633).
    baseline : ndarray, shape (n_scans, n_baseline_terms)
    fitted, residuals : ndarray, shape (n_scans, n_wavelengths)
        NaN where a point was not used.
    used : ndarray of bool, shape (n_scans, n_wavelengths)
    rms_residual, condition_number, residual_dof, noise_scale, residual_p_value : ndarray, shape (n_scans,)
    excluded : dict of str to ndarray
        Points excluded per scan and reason: ``unusable``, ``above_working_range``, ``above_ceiling``.
    interferent : ndarray of bool, shape (n_scans,)
        The residual holds structure the library does not explain (``screening.flagged``).
    screening : Screening
        The interferent screen of every scan: p-values and, for flagged scans,
        a diagnosis of what the unexplained residual looks like.
    flags : tuple of tuple of tuple of str
        ``flags[scan][component]``: plain keywords (see :data:`FLAG_TEXT`).
    scan_flags : tuple of tuple of str
        ``scan_flags[scan]``: keywords that concern the whole scan.
    settings : dict
        The options used.
    """

    scan_names: tuple[str, ...]
    components: tuple[str, ...]
    unit: str
    wavelengths: NDArray[np.float64]
    concentration: NDArray[np.float64]
    std_uncertainty: NDArray[np.float64]
    expanded_uncertainty: NDArray[np.float64]
    coverage_factor: NDArray[np.float64]
    effective_dof: NDArray[np.float64]
    budget: Mapping[str, NDArray[np.float64]]
    upper_limit: NDArray[np.float64]
    lod: NDArray[np.float64]
    loq: NDArray[np.float64]
    sensitivity: NDArray[np.float64]
    selectivity: NDArray[np.float64]
    variance_inflation: NDArray[np.float64]
    baseline: NDArray[np.float64]
    fitted: NDArray[np.float64]
    residuals: NDArray[np.float64]
    used: NDArray[np.bool_]
    rms_residual: NDArray[np.float64]
    condition_number: NDArray[np.float64]
    residual_dof: NDArray[np.int64]
    noise_scale: NDArray[np.float64]
    residual_p_value: NDArray[np.float64]
    excluded: Mapping[str, NDArray[np.int64]]
    interferent: NDArray[np.bool_]
    screening: Screening
    flags: tuple[tuple[tuple[str, ...], ...], ...]
    scan_flags: tuple[tuple[str, ...], ...]
    settings: Mapping[str, Any] = field(default_factory=dict)

    @property
    def n_scans(self) -> int:
        """Number of scans."""
        return len(self.scan_names)

    def summary(self) -> dict[str, Any]:
        """JSON-safe record of every number, per scan, with the uncertainty budget."""
        scans = []
        for i, name in enumerate(self.scan_names):
            components = []
            for j, component in enumerate(self.components):
                components.append(
                    {
                        "component": component,
                        "concentration": _json_number(self.concentration[i, j]),
                        "std_uncertainty": _json_number(self.std_uncertainty[i, j]),
                        "expanded_uncertainty": _json_number(self.expanded_uncertainty[i, j]),
                        "coverage_factor": _json_number(self.coverage_factor[i, j]),
                        "effective_dof": _json_number(self.effective_dof[i, j]),
                        "budget": {key: _json_number(value[i, j]) for key, value in self.budget.items()},
                        "upper_limit": _json_number(self.upper_limit[i, j]),
                        "lod": _json_number(self.lod[i, j]),
                        "loq": _json_number(self.loq[i, j]),
                        "sensitivity": _json_number(self.sensitivity[i, j]),
                        "selectivity": _json_number(self.selectivity[i, j]),
                        "variance_inflation": _json_number(self.variance_inflation[i, j]),
                        "flags": list(self.flags[i][j]),
                    }
                )
            scans.append(
                {
                    "scan": name,
                    "components": components,
                    "baseline": [_json_number(v) for v in self.baseline[i]],
                    "rms_residual": _json_number(self.rms_residual[i]),
                    "condition_number": _json_number(self.condition_number[i]),
                    "residual_dof": int(self.residual_dof[i]),
                    "noise_scale": _json_number(self.noise_scale[i]),
                    "residual_p_value": _json_number(self.residual_p_value[i]),
                    "points_used": int(self.used[i].sum()),
                    "excluded": {key: int(value[i]) for key, value in self.excluded.items()},
                    "interferent": bool(self.interferent[i]),
                    "interferent_p_value": _json_number(self.screening.p_value[i]),
                    "diagnosis": None if self.screening.diagnoses[i] is None else self.screening.diagnoses[i].summary(),
                    "flags": list(self.scan_flags[i]),
                }
            )
        return {"unit": self.unit, "components": list(self.components), "settings": dict(self.settings), "scans": scans}

    def report(self) -> str:
        """Compact text table: concentration +/- expanded uncertainty per component and scan, with flags."""
        from .render import mixture_report

        return mixture_report(self)


FLAG_TEXT: dict[str, str] = {
    "below-detection": "held at zero by the non-negativity bound or below the limit of detection; the upper limit is reported",
    "below-quantification": "detected but below the limit of quantification: treat the value as semi-quantitative",
    "beyond-calibration": "the concentration in the cell lies above the highest standard; the calibration does not vouch for it",
    "ill-conditioned": "the components' spectra overlap so much on the used points that small errors are strongly amplified (no result when they are beyond the solver's limit)",
    "points-excluded": "some points were left out (saturated, above the working range, or above the instrument ceiling)",
    "interferent": "the residual holds structure the library does not explain: something else absorbs, scatters or is shifted",
    "no-residual-dof": "as many unknowns as points: the uncertainty comes from the calibration's noise model, not from the scan",
    "no-uncertainty": "no uncertainty can be estimated: no residual degrees of freedom and no noise model in the library",
    "too-few-points": "fewer usable points than unknowns: no result for this scan",
}


def _json_number(value: float) -> float | None:
    number = float(value)
    return number if np.isfinite(number) else None


def baseline_columns(wavelengths: NDArray[np.float64], baseline: str) -> NDArray[np.float64]:
    if baseline == "none":
        return np.empty((wavelengths.size, 0))
    offset = np.ones((wavelengths.size, 1))
    if baseline == "offset":
        return offset
    centred = (wavelengths - wavelengths.mean()) / 100.0  # slope per 100 nm keeps the column scale near 1
    return np.column_stack([offset, centred])


def quantify(
    spectra: Spectra,
    library: ReferenceLibrary,
    *,
    baseline: Baseline = "offset",
    wavelength_range: tuple[float | None, float | None] = (None, None),
    path_length: float = 1.0,
    dilution: float = 1.0,
    ceiling: float = DEFAULT_CEILING,
    path_length_tolerance: float = 0.0,
    dilution_tolerance: float = 0.0,
    alpha: float = 0.05,
) -> MixtureResult:
    """Concentrations of the library's components in every scan, with uncertainties and diagnostics.

    Parameters
    ----------
    spectra : Spectra
        The sample scans (any quantity; converted to absorbance).
    library : ReferenceLibrary
        Absorptivities of the components.
    baseline : {"none", "offset", "linear"}
        Free baseline terms fitted with the components.
    wavelength_range : (low, high)
        Restrict the fit to these wavelengths (nm); ``None`` leaves a side open.
        The fit never reaches outside the library's grid.
    path_length : float
        Cell path length in cm.
    dilution : float
        Factor by which the samples were diluted before scanning; results are
        multiplied by it.
    ceiling : float
        Instrument ceiling: measured absorbance above it is not used.
    path_length_tolerance, dilution_tolerance : float
        Relative standard uncertainties of path length and dilution.
    alpha : float
        Significance level of the residual test that sets ``interferent``.

    Returns
    -------
    MixtureResult
    """
    _check_options(baseline, path_length, dilution, ceiling, path_length_tolerance, dilution_tolerance, alpha)
    scans = spectra.to_absorbance()
    requested = wavelength_range
    low = max(requested[0] if requested[0] is not None else -np.inf, float(library.wavelengths[0]), float(scans.wavelengths[0]))
    high = min(requested[1] if requested[1] is not None else np.inf, float(library.wavelengths[-1]), float(scans.wavelengths[-1]))
    if not low < high:
        asked = "" if requested == (None, None) else ", the requested range (" + ":".join("" if v is None else f"{v:g}" for v in requested) + " nm)"
        raise AbsolveError(
            f"the scans ({scans.wavelengths[0]:g}-{scans.wavelengths[-1]:g} nm){asked} and the library "
            f"({library.wavelengths[0]:g}-{library.wavelengths[-1]:g} nm) share no wavelength range",
            fix="use a library calibrated over the scanned range, and a --range inside both",
            file=scans.source,
        )
    scans = scans.restrict(low, high)
    absorptivity, std_error = library.on_grid(scans.wavelengths)
    grid = scans.wavelengths
    n_scans, n_wl = scans.values.shape
    n_comp = library.n_components
    design = np.column_stack([absorptivity.T * path_length, baseline_columns(grid, baseline)])
    n_params = design.shape[1]
    values = correct_stray_light(scans.values, library.stray_light)
    unusable = ~np.isfinite(values)
    limit = library.linear_limit_absorbance
    above_range = ~unusable & (values > limit) if limit is not None else np.zeros_like(unusable)
    above_ceiling = ~unusable & (scans.values > ceiling) & ~above_range
    used = ~(unusable | above_range | above_ceiling)

    out = _Accumulator(n_scans, n_comp, n_params - n_comp, n_wl)
    patterns, groups = np.unique(used, axis=0, return_inverse=True)
    groups = groups.reshape(-1)
    for index, pattern in enumerate(patterns):
        rows = np.flatnonzero(groups == index)
        if pattern.sum() < n_params:
            out.fail(rows)
            continue
        _solve_group(
            out, rows, pattern, design, values, absorptivity * path_length, std_error * path_length,
            library, grid, n_comp, path_length_tolerance, dilution_tolerance, alpha,
        )

    scale = dilution
    concentration = out.concentration * scale
    budget = {key: value * scale for key, value in out.budget.items()}
    budget["path_length"] = np.abs(concentration) * path_length_tolerance
    budget["dilution"] = np.abs(concentration) * dilution_tolerance
    std_uncertainty = np.sqrt(sum(value**2 for value in budget.values()))
    effective_dof = _welch_satterthwaite(budget, out.noise_dof, library.residual_dof, std_uncertainty)
    coverage = np.where(np.isfinite(effective_dof), stats.t.ppf(0.5 + _COVERAGE_PROBABILITY / 2, np.maximum(effective_dof, 1.0)), 2.0)
    coverage = np.where(np.isnan(std_uncertainty), np.nan, coverage)
    upper = np.where(out.at_bound, np.maximum(out.unconstrained * scale, 0.0) + coverage * std_uncertainty, np.nan)
    lod = 3.3 * out.budget["spectral_noise"] * scale
    loq = 10.0 * out.budget["spectral_noise"] * scale
    residuals = np.where(used, values - out.fitted, np.nan)
    screening = _screen(grid, residuals, out, design, used, std_error * path_length, library.noise, library.screening_scale, alpha)
    interferent = screening.flagged
    flags, scan_flags = _flags(out, concentration, lod, loq, library, dilution, used, unusable, above_range, above_ceiling, interferent)
    return MixtureResult(
        scan_names=scans.names,
        components=library.names,
        unit=library.unit,
        wavelengths=grid,
        concentration=concentration,
        std_uncertainty=std_uncertainty,
        expanded_uncertainty=coverage * std_uncertainty,
        coverage_factor=coverage,
        effective_dof=effective_dof,
        budget=budget,
        upper_limit=upper,
        lod=lod,
        loq=loq,
        sensitivity=out.sensitivity,
        selectivity=out.selectivity,
        variance_inflation=out.vif,
        baseline=out.baseline,
        fitted=out.fitted,
        residuals=residuals,
        used=used,
        rms_residual=out.rms,
        condition_number=out.condition,
        residual_dof=out.dof,
        noise_scale=out.noise_scale,
        residual_p_value=out.p_value,
        excluded={
            "unusable": unusable.sum(axis=1),
            "above_working_range": above_range.sum(axis=1),
            "above_ceiling": above_ceiling.sum(axis=1),
        },
        interferent=interferent,
        screening=screening,
        flags=flags,
        scan_flags=scan_flags,
        settings={
            "baseline": baseline,
            "wavelength_range_nm": [float(grid[0]), float(grid[-1])],
            "path_length_cm": path_length,
            "dilution": dilution,
            "ceiling": ceiling,
            "linear_limit_absorbance": limit,
            "path_length_tolerance": path_length_tolerance,
            "dilution_tolerance": dilution_tolerance,
            "alpha": alpha,
            "noise_model": "calibration" if library.noise is not None else "scan residuals",
        },
    )


def _check_options(baseline: str, path_length: float, dilution: float, ceiling: float, tol_b: float, tol_d: float, alpha: float) -> None:
    if baseline not in BASELINES:
        raise AbsolveError(f"The 'baseline' option must be one of {', '.join(BASELINES)}; got {baseline!r} instead.")
    for name, value in (("path length", path_length), ("dilution", dilution), ("ceiling", ceiling)):
        if not (np.isfinite(value) and value > 0):
            raise AbsolveError(f"the {name} must be a positive number; got {value!r}", fix=f"give the {name} as a number above 0")
    if dilution < 1:
        raise AbsolveError(f"the dilution factor must be >= 1; got {dilution!r}", fix="give how many times the sample was diluted (1 = not diluted)")
    for name, value in (("path-length tolerance", tol_b), ("dilution tolerance", tol_d)):
        if not (np.isfinite(value) and 0 <= value < 0.5):
            raise AbsolveError(f"the {name} must be a relative standard uncertainty in [0, 0.5); got {value!r}", fix="e.g. 0.002 for 0.2 %")
    if not 0 < alpha < 0.5:
        raise AbsolveError(f"the significance level must lie in (0, 0.5); got {alpha!r}")


class _Accumulator:
    """Per-scan outputs filled group by group."""

    def __init__(self, n_scans: int, n_comp: int, n_base: int, n_wl: int) -> None:
        nan = np.nan
        self.concentration = np.full((n_scans, n_comp), nan)
        self.unconstrained = np.full((n_scans, n_comp), nan)
        self.budget = {"spectral_noise": np.full((n_scans, n_comp), nan), "absorptivity": np.full((n_scans, n_comp), nan)}
        self.noise_dof = np.full((n_scans, n_comp), np.inf)
        self.at_bound = np.zeros((n_scans, n_comp), dtype=bool)
        self.sensitivity = np.full((n_scans, n_comp), nan)
        self.selectivity = np.full((n_scans, n_comp), nan)
        self.vif = np.full((n_scans, n_comp), nan)
        self.baseline = np.full((n_scans, n_base), nan)
        self.fitted = np.full((n_scans, n_wl), nan)
        self.rms = np.full(n_scans, nan)
        self.condition = np.full(n_scans, nan)
        self.dof = np.zeros(n_scans, dtype=np.int64)
        self.noise_scale = np.full(n_scans, nan)
        self.p_value = np.full(n_scans, nan)
        self.failed = np.zeros(n_scans, dtype=bool)
        self.singular = np.zeros(n_scans, dtype=bool)
        self.no_model_no_dof = np.zeros(n_scans, dtype=bool)

    def fail(self, rows: NDArray[np.intp]) -> None:
        self.failed[rows] = True


def _solve_group(
    out: _Accumulator,
    rows: NDArray[np.intp],
    pattern: NDArray[np.bool_],
    design_full: NDArray[np.float64],
    values: NDArray[np.float64],
    absorptivity: NDArray[np.float64],
    std_error: NDArray[np.float64],
    library: ReferenceLibrary,
    grid: NDArray[np.float64],
    n_comp: int,
    tol_b: float,
    tol_d: float,
    alpha: float,
) -> None:
    """Fit, diagnose and propagate uncertainty for scans sharing the same used points."""
    design = design_full[pattern]
    targets = values[np.ix_(rows, np.flatnonzero(pattern))]
    n_used, n_params = design.shape
    nonnegative = np.arange(n_params) < n_comp
    scaled = design / np.linalg.norm(design, axis=0)
    condition = float(np.linalg.cond(scaled))
    out.condition[rows] = condition
    sensitivity, selectivity, vif = _figures_of_merit(design, n_comp)
    out.sensitivity[rows], out.selectivity[rows], out.vif[rows] = sensitivity, selectivity, vif
    # Beyond the solver's limit the numbers are not worth reporting: a flagged gap, not an error for the whole batch.
    if condition > MAX_CONDITION:
        out.fail(rows)
        out.singular[rows] = True
        return
    solution = solve_nonnegative(design, targets, nonnegative=nonnegative)
    coefficients = solution.coefficients
    fitted = coefficients @ design.T
    residual = targets - fitted
    out.concentration[rows] = coefficients[:, :n_comp]
    out.baseline[rows] = coefficients[:, n_comp:]
    out.at_bound[rows] = solution.at_bound[:, :n_comp]
    out.fitted[np.ix_(rows, np.flatnonzero(pattern))] = fitted
    out.rms[rows] = np.sqrt(np.mean(residual**2, axis=1))
    used_grid = grid[pattern]
    noise = library.noise
    phi = ar1_coefficients(used_grid, noise.correlation_length_nm if noise is not None else _scan_correlation_length(residual, used_grid))
    sigma = noise.standard_deviation(fitted) if noise is not None else np.ones_like(fitted)
    # The residual holds the scan's noise and the calibration's absorptivity
    # errors times the concentrations; both are correlated along wavelength.
    se_used = std_error[:, pattern]
    sigma_total = np.sqrt(sigma**2 + (coefficients[:, :n_comp] ** 2) @ (se_used**2)) if noise is not None else sigma
    whitened = whiten(residual / sigma_total, phi)
    unconstrained = np.linalg.lstsq(design, targets.T, rcond=None)[0].T
    out.unconstrained[rows] = unconstrained[:, :n_comp]
    free_patterns, free_groups = np.unique(~solution.at_bound, axis=0, return_inverse=True)
    for f_index, free in enumerate(free_patterns):
        members = np.flatnonzero(free_groups.reshape(-1) == f_index)
        _propagate(out, rows[members], design, free, n_comp, sigma[members], whitened[members], phi,
                   absorptivity[:, pattern], std_error[:, pattern], coefficients[members, :n_comp], noise is not None, alpha)


def _screen(
    grid: NDArray[np.float64],
    residuals: NDArray[np.float64],
    out: _Accumulator,
    design: NDArray[np.float64],
    used: NDArray[np.bool_],
    std_error: NDArray[np.float64],
    noise: NoiseModel | None,
    null_scale: float,
    alpha: float,
) -> Screening:
    """Interferent screen of every fitted scan (see :mod:`absolve.screening`).

    The residual also holds the calibration's absorptivity errors times the
    concentrations; that variance is added to the noise model's so that an
    imperfect library is not mistaken for an interferent. Without a noise
    model in the library, one is estimated from the batch's residuals: the
    screen's main test is a ratio within each scan, so only the correlation
    length matters, and that is a property of the instrument.
    """
    fitted_ok = ~out.failed & np.isfinite(out.fitted).any(axis=1)
    if grid.size < _MIN_SCREEN_POINTS:
        return _unscreened(residuals.shape[0], alpha, f"not screened: {grid.size} wavelengths are too few")
    model = noise if noise is not None else _batch_noise_model(residuals[fitted_ok], grid)
    extra = np.nan_to_num(out.concentration) ** 2 @ std_error**2
    usable = used & np.isfinite(residuals) & fitted_ok[:, None]
    return screen_residuals(
        grid, np.nan_to_num(residuals), np.nan_to_num(out.fitted), design, model,
        usable=usable, alpha=alpha, extra_variance=extra, null_scale=null_scale,
    )


def _unscreened(n_scans: int, alpha: float, reason: str) -> Screening:
    """A screening record for scans that cannot be tested (too few points): no flags, NaN statistics."""
    nan = np.full(n_scans, np.nan)
    zero = np.zeros(n_scans, dtype=np.int64)
    return Screening(
        statistic=nan, p_value=nan.copy(), flagged=np.zeros(n_scans, dtype=bool), alpha=alpha, method=reason,
        diagnoses=(None,) * n_scans, smooth_p=nan.copy(), omnibus_p=nan.copy(), noise_ratio=nan.copy(),
        durbin_watson=nan.copy(), smooth_dof=zero, rough_dof=zero.copy(),
    )


def _batch_noise_model(residuals: NDArray[np.float64], grid: NDArray[np.float64]) -> NoiseModel:
    """White-or-AR(1) noise model from a batch's residuals, for libraries without one."""
    finite = residuals[np.isfinite(residuals)]
    floor = float(np.sqrt(np.mean(finite**2))) if finite.size else 1e-3
    return NoiseModel(floor=max(floor, 1e-6), proportional=0.0, correlation_length_nm=_scan_correlation_length(np.nan_to_num(residuals), grid))


def _figures_of_merit(design: NDArray[np.float64], n_comp: int) -> tuple[NDArray, NDArray, NDArray]:
    """Net analyte signal norm, selectivity and variance inflation of each component column.

    With every other column (other components and baseline terms) as
    interference, the net analyte signal norm per unit concentration is
    ``1 / sqrt([(D^T D)^-1]_jj)`` (Lorber 1986).
    """
    inverse_gram = np.linalg.pinv(design.T @ design)
    diagonal = np.diag(inverse_gram)[:n_comp]
    sensitivity = 1.0 / np.sqrt(np.maximum(diagonal, np.finfo(float).tiny))
    norms = np.linalg.norm(design[:, :n_comp], axis=0)
    selectivity = sensitivity / norms
    return sensitivity, selectivity, 1.0 / selectivity**2


def _scan_correlation_length(residual: NDArray[np.float64], grid: NDArray[np.float64]) -> float:
    """Correlation length from the residuals themselves (no noise model): pooled lag-one correlation."""
    if residual.shape[1] < 3:
        return 0.0
    centred = residual - residual.mean(axis=1, keepdims=True)
    numerator = float(np.sum(centred[:, 1:] * centred[:, :-1]))
    denominator = float(np.sum(centred**2))
    rho = numerator / denominator if denominator > 0 else 0.0
    if rho <= 0.01:
        return 0.0
    return float(-np.median(np.diff(grid)) / np.log(min(rho, 0.99)))


def _propagate(
    out: _Accumulator,
    rows: NDArray[np.intp],
    design: NDArray[np.float64],
    free: NDArray[np.bool_],
    n_comp: int,
    sigma: NDArray[np.float64],
    whitened: NDArray[np.float64],
    phi: NDArray[np.float64],
    absorptivity: NDArray[np.float64],
    std_error: NDArray[np.float64],
    concentration: NDArray[np.float64],
    have_model: bool,
    alpha: float,
) -> None:
    """Uncertainty contributions for scans sharing used points and the same free parameters."""
    n_used = design.shape[0]
    n_free = int(free.sum())
    dof = n_used - n_free
    out.dof[rows] = dof
    effective = effective_points(phi)
    if dof > 0:
        chi_square = np.sum(whitened**2, axis=1)
        scale = chi_square / dof
        # Correlated points carry fewer independent pieces of information.
        noise_dof = max(1.0, effective * dof / n_used)
    else:
        chi_square = np.zeros(len(rows))
        scale = np.ones(len(rows))
        noise_dof = np.inf
    if have_model:
        out.p_value[rows] = stats.chi2.sf(chi_square, dof) if dof > 0 else np.nan
        scale = np.maximum(scale, 1.0)
        uses_scan_scale = scale > 1.0
    else:
        out.p_value[rows] = np.nan
        uses_scan_scale = np.ones(len(rows), dtype=bool)
        if dof == 0:
            out.no_model_no_dof[rows] = True
    out.noise_scale[rows] = scale
    # Every component gets an uncertainty: one held at the bound gets the one it would have if free.
    pinv_free = _pseudo_inverse(design, free)
    pinv_all = _pseudo_inverse(design, np.ones_like(free))
    for start in range(0, len(rows), _CHUNK):
        block = slice(start, start + _CHUNK)
        weighted_free = pinv_free[None, :, :] * sigma[block, None, :]
        weighted_all = pinv_all[None, :n_comp, :] * sigma[block, None, :]
        variance_free = np.diagonal(correlated_norm_squared(weighted_free, phi), axis1=1, axis2=2)
        variance_all = np.diagonal(correlated_norm_squared(weighted_all, phi), axis1=1, axis2=2)
        component_variance = variance_all.copy()
        free_components = np.flatnonzero(free[:n_comp])
        component_variance[:, free_components] = variance_free[:, : free_components.size]
        noise_sd = np.sqrt(component_variance * scale[block, None])
        if not have_model and dof == 0:
            noise_sd[:] = np.nan
        out.budget["spectral_noise"][rows[block]] = noise_sd
        out.noise_dof[rows[block]] = np.where(uses_scan_scale[block, None], noise_dof, np.inf)
    out.budget["absorptivity"][rows] = _absorptivity_term(pinv_all[:n_comp], std_error, concentration, phi)


def _pseudo_inverse(design: NDArray[np.float64], free: NDArray[np.bool_]) -> NDArray[np.float64]:
    """Rows of (D_F^T D_F)^-1 D_F^T for the free columns, shape (n_free, n_used)."""
    sub = design[:, free]
    return np.linalg.solve(sub.T @ sub, sub.T)


def _absorptivity_term(
    pinv_rows: NDArray[np.float64], std_error: NDArray[np.float64], concentration: NDArray[np.float64], phi: NDArray[np.float64]
) -> NDArray[np.float64]:
    """Standard uncertainty from absorptivity errors, dc = -P (dK c).

    Each component's absorptivity errors are taken as correlated along
    wavelength like the noise of the standards behind them (AR(1)) and
    independent between components.
    """
    n_comp = pinv_rows.shape[0]
    # weights[j, k, t] = P[j, t] * se[k, t]
    weights = pinv_rows[:, None, :] * std_error[None, :, :]
    flat = weights.reshape(n_comp * n_comp, -1)
    sums = np.diagonal(correlated_norm_squared(flat, phi)).reshape(n_comp, n_comp)
    return np.sqrt(concentration**2 @ sums.T)


def _welch_satterthwaite(
    budget: Mapping[str, NDArray[np.float64]], noise_dof: NDArray[np.float64], library_dof: int, combined: NDArray[np.float64]
) -> NDArray[np.float64]:
    """Effective degrees of freedom (GUM G.4.1); infinite terms contribute nothing to the denominator."""
    absorptivity_dof = library_dof if library_dof > 0 else np.inf
    with np.errstate(divide="ignore", invalid="ignore"):
        denominator = budget["spectral_noise"] ** 4 / noise_dof + budget["absorptivity"] ** 4 / absorptivity_dof
        result = np.where(denominator > 0, combined**4 / denominator, np.inf)
    return np.where(np.isnan(combined), np.nan, result)


def _flags(
    out: _Accumulator,
    concentration: NDArray[np.float64],
    lod: NDArray[np.float64],
    loq: NDArray[np.float64],
    library: ReferenceLibrary,
    dilution: float,
    used: NDArray[np.bool_],
    unusable: NDArray[np.bool_],
    above_range: NDArray[np.bool_],
    above_ceiling: NDArray[np.bool_],
    interferent: NDArray[np.bool_],
) -> tuple[tuple[tuple[str, ...], ...], tuple[tuple[str, ...], ...]]:
    top = np.array([c.concentration_range[1] if c.concentration_range else np.inf for c in library.components])
    flags = []
    scan_flags = []
    excluded_any = (unusable | above_range | above_ceiling).any(axis=1)
    for i in range(concentration.shape[0]):
        scan: list[str] = []
        failure = "ill-conditioned" if out.singular[i] else "too-few-points"
        if out.failed[i]:
            scan.append(failure)
        if excluded_any[i]:
            scan.append("points-excluded")
        if np.nanmax(out.vif[i], initial=0.0) > VIF_LIMIT and not out.singular[i]:
            scan.append("ill-conditioned")
        if interferent[i]:
            scan.append("interferent")
        if out.dof[i] == 0 and not out.failed[i]:
            scan.append("no-uncertainty" if out.no_model_no_dof[i] else "no-residual-dof")
        row = []
        for j in range(concentration.shape[1]):
            component: list[str] = []
            if out.failed[i]:
                component.append(failure)
            elif out.at_bound[i, j] or concentration[i, j] < lod[i, j]:
                component.append("below-detection")
            elif concentration[i, j] < loq[i, j]:
                component.append("below-quantification")
            if concentration[i, j] / dilution > 1.05 * top[j]:
                component.append("beyond-calibration")
            row.append(tuple(component))
        flags.append(tuple(row))
        scan_flags.append(tuple(scan))
    return tuple(flags), tuple(scan_flags)
