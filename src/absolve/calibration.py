"""From standards to a reference library: absorptivity spectra, linearity audit, working range, noise model.

At every wavelength the standards' absorbances are regressed on
``path_length x concentration`` of each component plus an intercept (the
blank level), by ordinary least squares: for pure standards this is the
slope of each component's calibration line, for mixed standards the
multi-component regression. The slope is the absorptivity, with its standard
error from the residual scatter.

Stray light and other non-idealities bend the response at high absorbance.
The working range is found by fitting the low-absorbance points, following
the relative deviation of the standards from that line as the predicted
absorbance grows, and stopping where the median deviation leaves the line by
more than ``linearity_tolerance`` (default 1 %, common practice, no source);
points above it do not enter the fit, and quantification later excludes
sample points above it.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field
from typing import Any

import numpy as np
from numpy.typing import ArrayLike, NDArray
from scipy import optimize, stats

from .errors import AbsolveError
from .library import ComponentCalibration, NoiseModel, ReferenceLibrary
from .photometry import correct_stray_light
from .spectra import Spectra

__all__ = ["Calibration", "calibrate"]

_MIN_LEVELS_ADVISED = 5  # fewer levels cannot show curvature reliably (common practice, no source)
_SAFE_START = 0.8  # absorbance below which stray light is negligible on ordinary instruments (common practice, no source)
_DEVIATION_FLOOR = 0.1  # absorbance below which relative deviations say nothing about linearity


@dataclass(frozen=True)
class _Fit:
    """Per-wavelength least-squares fit of the standards."""

    coefficients: NDArray[np.float64]  # (p, n_wl), last row the intercept
    std_error: NDArray[np.float64]  # (p, n_wl)
    residual_dof: NDArray[np.int64]  # (n_wl,)
    residuals: NDArray[np.float64]  # (n_std, n_wl), NaN where not used
    leverage: NDArray[np.float64]  # (n_std, n_wl), NaN where not used
    predicted: NDArray[np.float64]  # (n_std, n_wl) for every standard


@dataclass
class Calibration:
    """Turn standards into a :class:`~absolve.library.ReferenceLibrary` (estimator-like).

    Parameters
    ----------
    unit : str
        Concentration unit of the standards (and of the library).
    linearity_tolerance : float
        Relative departure from the line that ends the working range.
    ceiling : float
        Measured absorbance above which no standard point is trusted at all.
    detect_working_range : bool
        Find where the standards leave the line and exclude what lies above it.
    correct_stray_light : bool
        Estimate the instrument's stray-light fraction from the standards'
        curvature and correct for it (see :mod:`absolve.photometry`); the
        library records it so that samples get the same correction.
    weighted : bool
        Refit with each point weighted by its inverse noise variance from the
        learned noise model (ordinary least squares when False).
    standard_baseline : {"none", "offset", "linear"}
        Baseline of each standard's own (cuvette mismatch, drift), estimated
        from its residual across wavelengths and removed before the final fit.
        Without this, standards' offsets leak into the absorptivities as
        smooth errors wherever the weights vary along wavelength.

    Attributes
    ----------
    library_ : ReferenceLibrary
        The fitted library.
    linear_limit_ : float or None
        Absorbance (after stray-light correction) above which the standards leave the line (None: they never did).
    stray_light_ : float
        Estimated stray-light fraction (0 when not corrected).
    """

    unit: str
    linearity_tolerance: float = 0.01
    ceiling: float = 3.0
    detect_working_range: bool = True
    correct_stray_light: bool = True
    weighted: bool = True
    standard_baseline: str = "linear"
    library_: ReferenceLibrary = field(init=False, repr=False)
    linear_limit_: float | None = field(init=False, default=None)
    stray_light_: float = field(init=False, default=0.0)

    def fit(
        self,
        standards: Spectra,
        concentrations: ArrayLike,
        components: Sequence[str],
        *,
        path_lengths: ArrayLike | None = None,
        molar_masses: Mapping[str, float] | None = None,
        provenance: Mapping[str, Any] | None = None,
    ) -> Calibration:
        """Fit absorptivities from standards.

        Parameters
        ----------
        standards : Spectra
            Standard scans (converted to absorbance here).
        concentrations : array_like, shape (n_standards, n_components)
            Concentration of each component in each scanned solution, in ``unit``
            (already divided by any dilution).
        components : sequence of str
            Component names, in column order.
        path_lengths : array_like, shape (n_standards,), optional
            Cell path length of each standard in cm (default 1).
        """
        if self.standard_baseline not in ("none", "offset", "linear"):
            raise AbsolveError(f"The 'standard_baseline' must be one of none, offset, linear; got {self.standard_baseline!r} instead.")
        if not 0 < self.linearity_tolerance < 0.5:
            raise AbsolveError(f"The 'linearity_tolerance' must lie in (0, 0.5); got {self.linearity_tolerance!r}.")
        scans = standards.to_absorbance()
        conc = np.atleast_2d(np.asarray(concentrations, dtype=np.float64))
        names = tuple(components)
        n_std = scans.n_scans
        if conc.shape != (n_std, len(names)):
            raise AbsolveError(f"concentrations of shape {conc.shape} do not match {n_std} standards x {len(names)} components")
        paths = np.ones(n_std) if path_lengths is None else np.asarray(path_lengths, dtype=np.float64).reshape(-1)
        if paths.shape != (n_std,) or np.any(~np.isfinite(paths)) or np.any(paths <= 0):
            raise AbsolveError("path lengths must be positive numbers, one per standard", fix="check the path_length_cm column")
        design = np.column_stack([conc * paths[:, None], np.ones(n_std)])
        _check_design(design, conc, names)
        trusted = scans.usable & (scans.values <= self.ceiling)
        stray = _estimate_stray_light(design, scans.values, trusted) if self.correct_stray_light else 0.0
        absorbance = correct_stray_light(scans.values, stray)
        trusted &= np.isfinite(absorbance)
        fit = _fit_per_wavelength(design, absorbance, trusted)
        limits: dict[int, float | None] = {}
        limit: float | None = None
        if self.detect_working_range:
            # Start from the low-absorbance points, where the law holds on any
            # instrument, so that bent high points cannot tilt the reference line.
            # Departures are judged against this line only: refitting with the
            # points up to a found limit would let slightly bent points lower
            # the line, move the limit up, and repeat.
            fit = _fit_per_wavelength(design, absorbance, trusted & (absorbance <= _SAFE_START))
            limits = {k: _departure(fit, absorbance, trusted, conc[:, k] > 0, self.linearity_tolerance) for k in range(len(names))}
            found = [value for value in limits.values() if value is not None]
            limit = min(found) if found else None
            fit = _fit_per_wavelength(design, absorbance, trusted if limit is None else trusted & (absorbance <= limit))
        used = trusted if limit is None else trusted & (absorbance <= limit)
        as_measured = absorbance
        weights: NDArray[np.float64] | None = None
        if self.standard_baseline != "none":
            absorbance, fit = _remove_standard_baselines(design, absorbance, used, scans.wavelengths, self.standard_baseline)
        noise = _noise_model(fit, scans.wavelengths)
        if noise is not None and self.weighted:
            # Noise grows with absorbance: weight each point by its inverse noise
            # variance so that standard errors are honest at every level, then
            # learn the noise model again from the weighted fit.
            weights = 1.0 / noise.standard_deviation(fit.predicted) ** 2
            fit = _fit_per_wavelength(design, absorbance, used, weights)
            noise = _noise_model(fit, scans.wavelengths) or noise
        self.linear_limit_ = limit
        self.stray_light_ = stray
        screening_scale = 1.0 if noise is None else _screening_scale(design, as_measured, used, weights, noise, scans.wavelengths)
        highest = float(np.max(np.where(used, absorbance, -np.inf)))
        details = tuple(
            _audit(
                k, names, conc, paths, absorbance, used, fit, scans.wavelengths,
                molar_mass=(molar_masses or {}).get(names[k]), limit=limits.get(k),
            )
            for k in range(len(names))
        )
        self.library_ = ReferenceLibrary(
            wavelengths=scans.wavelengths,
            absorptivity=fit.coefficients[:-1],
            std_error=fit.std_error[:-1],
            unit=self.unit,
            components=details,
            linear_limit_absorbance=limit if limit is not None else highest,
            noise=noise,
            stray_light=stray,
            screening_scale=screening_scale,
            residual_dof=int(np.median(fit.residual_dof)),
            provenance=dict(provenance or {}),
        )
        return self


def calibrate(
    standards: Spectra,
    concentrations: ArrayLike,
    components: Sequence[str],
    unit: str,
    *,
    path_lengths: ArrayLike | None = None,
    molar_masses: Mapping[str, float] | None = None,
    linearity_tolerance: float = 0.01,
    provenance: Mapping[str, Any] | None = None,
) -> ReferenceLibrary:
    """Build a reference library from standards (see :class:`Calibration`).

    Examples
    --------
    >>> import numpy as np
    >>> from absolve import Spectra
    >>> grid = np.arange(400.0, 410.0)
    >>> levels = np.array([[0.0], [1.0], [2.0], [3.0], [4.0], [5.0]])
    >>> scans = Spectra(grid, levels * np.linspace(0.1, 0.2, 10), [f"s{i}" for i in range(6)])
    >>> library = calibrate(scans, levels, ["dye"], "mg/L")
    >>> round(float(library.absorptivity[0, -1]), 6)
    0.2
    """
    return (
        Calibration(unit=unit, linearity_tolerance=linearity_tolerance)
        .fit(standards, concentrations, components, path_lengths=path_lengths, molar_masses=molar_masses, provenance=provenance)
        .library_
    )


def _check_design(design: NDArray[np.float64], conc: NDArray[np.float64], names: tuple[str, ...]) -> None:
    for k, name in enumerate(names):
        levels = np.unique(conc[:, k][conc[:, k] > 0])
        if levels.size == 0:
            raise AbsolveError(f"no standard contains {name!r}", fix="add standards of it, or drop it from the table")
        if np.unique(conc[:, k]).size < 2:
            raise AbsolveError(
                f"{name!r} appears at a single concentration level",
                fix="a calibration line needs at least two levels (five or more advised)",
            )
    if np.linalg.matrix_rank(design) < design.shape[1]:
        raise AbsolveError(
            "the standards cannot separate the components (their concentrations are proportional to each other)",
            fix="add pure standards or mixtures with varied proportions",
        )
    if design.shape[0] <= design.shape[1]:
        raise AbsolveError(
            f"{design.shape[0]} standards for {design.shape[1] - 1} components and a blank level leave no degrees of freedom",
            fix="measure more standards (five levels per component advised)",
        )


def _fit_per_wavelength(
    design: NDArray[np.float64], absorbance: NDArray[np.float64], mask: NDArray[np.bool_], weights: NDArray[np.float64] | None = None
) -> _Fit:
    """Weighted least squares at every wavelength at once.

    ``mask`` says which standards count at each wavelength; ``weights``
    (inverse noise variances, relative) default to 1. Standard errors use the
    residual scatter, s^2 (X^T W X)^-1 with s^2 = sum(w r^2) / (n - p).
    """
    n_std, n_wl = absorbance.shape
    p = design.shape[1]
    w = mask.astype(np.float64) if weights is None else np.where(mask, weights, 0.0)
    counts = mask.sum(axis=0)
    gram = np.einsum("ij,ik,il->ljk", design, design, w)  # (n_wl, p, p)
    rank_ok = counts > p
    if np.any(rank_ok):
        rank_ok[rank_ok] = np.linalg.matrix_rank(gram[rank_ok]) == p
    if not np.all(rank_ok):
        # Too few trusted points at some wavelengths: use every finite one there.
        fallback = ~rank_ok
        finite = np.isfinite(absorbance[:, fallback])
        w[:, fallback] = finite if weights is None else np.where(finite, weights[:, fallback], 0.0)
        counts[fallback] = finite.sum(axis=0)
        gram[fallback] = np.einsum("ij,ik,il->ljk", design, design, w[:, fallback])
        if np.any(counts <= p) or np.any(np.linalg.matrix_rank(gram) < p):
            raise AbsolveError(
                "too few usable standards at some wavelengths to separate the components",
                fix="add lower-concentration standards, or restrict the wavelength range",
            )
    y = np.where(w > 0, absorbance, 0.0)
    rhs = np.einsum("ij,il,il->lj", design, w, y)  # (n_wl, p)
    inverse_gram = np.linalg.inv(gram)
    coefficients = np.einsum("ljk,lk->jl", inverse_gram, rhs)  # (p, n_wl)
    predicted = design @ coefficients
    residuals = np.where(w > 0, absorbance - predicted, np.nan)
    dof = (w > 0).sum(axis=0) - p
    variance = np.nansum(w * np.nan_to_num(residuals) ** 2, axis=0) / dof
    diagonal = np.diagonal(inverse_gram, axis1=1, axis2=2).T  # (p, n_wl)
    std_error = np.sqrt(diagonal * variance)
    hat = np.einsum("ij,ljk,ik->il", design, inverse_gram, design) * w
    leverage = np.where(w > 0, hat, np.nan)
    return _Fit(coefficients, std_error, dof.astype(np.int64), residuals, leverage, predicted)


def _remove_standard_baselines(
    design: NDArray[np.float64], absorbance: NDArray[np.float64], used: NDArray[np.bool_], wavelengths: NDArray[np.float64], kind: str
) -> tuple[NDArray[np.float64], _Fit]:
    """Estimate and subtract each standard's own baseline, alternating with the per-wavelength fit.

    The per-wavelength intercept takes the baseline common to all standards;
    what remains of a standard's residual that is constant (or linear) in
    wavelength is its own cuvette offset or drift, not absorbance.
    """
    x = (wavelengths - wavelengths.mean()) / 100.0
    columns = np.ones((wavelengths.size, 1)) if kind == "offset" else np.column_stack([np.ones_like(x), x])
    corrected = absorbance
    fit = _fit_per_wavelength(design, corrected, used)
    for _ in range(3):
        residual = np.where(used, fit.residuals, 0.0)
        weights = used.astype(np.float64)
        gram = np.einsum("iw,wa,wb->iab", weights, columns, columns)
        rhs = np.einsum("iw,wa->ia", residual, columns)
        solvable = np.linalg.matrix_rank(gram) == columns.shape[1]
        coefficients = np.zeros((absorbance.shape[0], columns.shape[1]))
        coefficients[solvable] = np.linalg.solve(gram[solvable], rhs[solvable][..., None])[..., 0]
        corrected = corrected - coefficients @ columns.T
        fit = _fit_per_wavelength(design, corrected, used)
    return corrected, fit


def _screening_scale(
    design: NDArray[np.float64],
    absorbance: NDArray[np.float64],
    used: NDArray[np.bool_],
    weights: NDArray[np.float64] | None,
    noise: NoiseModel,
    wavelengths: NDArray[np.float64],
) -> float:
    """How much larger the interferent screen's statistic runs on clean scans than its theory says.

    Each standard is a scan known to hold nothing but the library's
    components. It is fitted, as a sample would be, against a library
    calibrated without it, and its residual screened as
    :func:`absolve.quantify.quantify` screens samples. The median statistic
    over the standards, against the median of its F distribution, gives a
    factor (never below 1) that corrects the screen for what the noise model
    cannot capture: an imperfect correlation length and the noise in the
    library itself.
    """
    from .screening import screen_residuals

    n_std = design.shape[0]
    n_comp = design.shape[1] - 1
    if wavelengths.size < 10 or n_std < 5:
        return 1.0
    residuals = np.zeros_like(absorbance)
    fitted = np.zeros_like(absorbance)
    designs = np.zeros((n_std, wavelengths.size, n_comp + 1))
    extra = np.zeros_like(absorbance)
    usable = np.zeros_like(used)
    for i in range(n_std):
        others = used.copy()
        others[i] = False
        try:
            left_out = _fit_per_wavelength(design, absorbance, others, weights)
        except AbsolveError:
            continue
        columns = np.column_stack([left_out.coefficients[:n_comp].T, np.ones(wavelengths.size)])
        rows = used[i]
        if rows.sum() < 10:
            continue
        beta, *_ = np.linalg.lstsq(columns[rows], absorbance[i, rows], rcond=None)
        designs[i] = columns
        fitted[i] = columns @ beta
        residuals[i] = np.where(rows, absorbance[i] - fitted[i], 0.0)
        extra[i] = beta[:n_comp] ** 2 @ left_out.std_error[:n_comp] ** 2
        usable[i] = rows
    keep = usable.any(axis=1)
    if keep.sum() < 5:
        return 1.0
    result = screen_residuals(
        wavelengths, residuals[keep], fitted[keep], designs[keep], noise,
        usable=usable[keep], extra_variance=extra[keep], diagnose=False,
    )
    testable = np.isfinite(result.statistic)
    if testable.sum() < 5:
        return 1.0
    expected = stats.f.median(result.smooth_dof[testable], result.rough_dof[testable])
    return float(np.clip(np.median(result.statistic[testable] / expected), 1.0, 10.0))


def _estimate_stray_light(design: NDArray[np.float64], absorbance: NDArray[np.float64], trusted: NDArray[np.bool_]) -> float:
    """Stray-light fraction that makes the standards most linear (bounded 1-D least squares).

    Only meaningful when the standards reach absorbances where stray light
    shows (above about 1); below that the estimate stays at 0.
    """
    if np.nanmax(np.where(trusted, absorbance, np.nan)) < 1.0:
        return 0.0

    # The same points for every candidate: those the largest candidate can still correct.
    largest = 0.01
    usable = trusted & np.isfinite(correct_stray_light(absorbance, largest))
    columns = usable.all(axis=0)
    if columns.sum() < 2:
        return 0.0
    measured = absorbance[:, columns]

    def residuals(fraction: float) -> NDArray[np.float64]:
        y = correct_stray_light(measured, fraction)
        beta, *_ = np.linalg.lstsq(design, y, rcond=None)
        return y - design @ beta

    def misfit(fraction: float) -> float:
        return float(np.sum(residuals(fraction) ** 2))

    found = optimize.minimize_scalar(misfit, bounds=(0.0, largest), method="bounded", options={"xatol": 1e-6})
    fraction = float(found.x)
    # Keep the fraction only when it improves the fit significantly: an F test
    # of the one extra parameter, with the degrees of freedom shrunk by the
    # residuals' correlation along wavelength (neighbouring points are not
    # independent evidence).
    base = residuals(0.0)
    rho = float(np.sum(base[:, 1:] * base[:, :-1]) / max(np.sum(base**2), 1e-300))
    shrink = float(np.clip((1.0 - rho) / (1.0 + rho), 0.01, 1.0))
    dof = (base.size - design.shape[1] * base.shape[1]) * shrink
    if dof < 2 or not found.fun < misfit(0.0):
        return 0.0
    f_value = (misfit(0.0) - found.fun) / (found.fun / dof)
    return fraction if stats.f.sf(f_value, 1, dof) < 0.001 else 0.0


def _departure(
    fit: _Fit, absorbance: NDArray[np.float64], trusted: NDArray[np.bool_], holds: NDArray[np.bool_], tolerance: float
) -> float | None:
    """Measured absorbance where standards holding a component leave the line, or None.

    Points are ordered by predicted absorbance and pooled into bins; the first
    bin whose median deviation falls below ``-tolerance`` times its absorbance,
    by more than the scatter of the standards' own baseline offsets, ends the
    working range.
    """
    rows = holds[:, None] & trusted & (fit.predicted > _DEVIATION_FLOOR)
    if rows.sum() < 40:
        return None
    # Each standard's own baseline offset (its median residual where it absorbs
    # little) is removed so that cuvette mismatch is not read as curvature.
    quiet = np.isfinite(fit.residuals) & (np.abs(fit.predicted) < 0.3)
    offsets = np.array([np.median(fit.residuals[i, quiet[i]]) if quiet[i].sum() >= 5 else 0.0 for i in range(quiet.shape[0])])
    predicted = fit.predicted[rows]
    measured = absorbance[rows]
    deviation = measured - predicted - np.broadcast_to(offsets[:, None], rows.shape)[rows]
    order = np.argsort(predicted)
    predicted, measured, deviation = predicted[order], measured[order], deviation[order]
    chunks = np.array_split(np.arange(predicted.size), min(40, predicted.size // 20))
    departed = [float(np.median(deviation[c])) < -tolerance * float(np.median(predicted[c])) for c in chunks]
    # Stray light bends the response more the higher the absorbance, so the
    # range ends where every bin from there up has left the line; an isolated
    # low bin below the line is noise, not the end of the range.
    if not departed[-1]:
        return None
    first = len(departed) - 1
    while first > 0 and departed[first - 1]:
        first -= 1
    start = chunks[first][0]
    below = measured[:start]
    return float(below.max()) if below.size else float(measured[start])


def _noise_model(fit: _Fit, wavelengths: NDArray[np.float64]) -> NoiseModel | None:
    """Noise level, growth with absorbance and correlation length from the standards' residuals.

    Each standard's mean residual (its cuvette or baseline offset, which the
    quantification baseline absorbs) is removed first; squared residuals are
    corrected for leverage, E[r^2] = sigma^2 (1 - h).
    """
    residuals = fit.residuals
    usable = np.isfinite(residuals)
    if usable.sum() < 20:
        return None
    centred = residuals - np.nanmean(residuals, axis=1, keepdims=True)
    scaled_sq = centred**2 / np.clip(1.0 - fit.leverage, 0.05, None)
    level = np.abs(fit.predicted)
    x, y = level[usable], scaled_sq[usable]
    order = np.argsort(x)
    chunks = np.array_split(order, max(1, min(30, order.size // 30)))
    bin_level = np.array([np.mean(x[c] ** 2) for c in chunks])
    bin_variance = np.array([np.mean(y[c]) for c in chunks])
    design = np.column_stack([np.ones_like(bin_level), bin_level])
    terms, _ = optimize.nnls(design, bin_variance)
    for _ in range(3):
        # A bin's variance is known to about the same relative precision at every level, so
        # the fit weighs relative misfit: otherwise the few highest bins, where any systematic
        # misfit (stray light, curvature) swells the residuals, decide the floor too, and can
        # drive it to zero (measured: floor 0.0001 for a true 0.0015, and clean scans flagged).
        predicted = np.maximum(design @ terms, 1e-3 * float(np.median(bin_variance)))
        terms, _ = optimize.nnls(design / predicted[:, None], bin_variance / predicted)
    floor, proportional = float(np.sqrt(terms[0])), float(np.sqrt(terms[1]))
    if floor == 0 and proportional == 0:
        return None
    # Every detector has some noise at zero absorbance; a zero floor (the fit's
    # boundary, when the standards hardly sample low absorbance) would give such
    # points infinite weight. A twentieth of the typical noise is a safe minimum.
    floor = max(floor, 0.05 * float(np.sqrt(np.median(bin_variance))))
    sd = np.sqrt(floor**2 + (proportional * level) ** 2)
    standardised = np.where(usable, centred / np.where(sd > 0, sd, 1.0), np.nan)
    lagged = standardised[:, 1:] * standardised[:, :-1]
    both = np.isfinite(lagged)
    numerator = np.sum(np.where(both, lagged, 0.0))
    denominator = np.sqrt(
        np.sum(np.where(both, standardised[:, 1:] ** 2, 0.0)) * np.sum(np.where(both, standardised[:, :-1] ** 2, 0.0))
    )
    rho = float(numerator / denominator) if denominator > 0 else 0.0
    step = float(np.median(np.diff(wavelengths)))
    length = 0.0 if rho <= 0.01 else -step / np.log(min(rho, 0.999))
    return NoiseModel(floor=floor, proportional=proportional, correlation_length_nm=float(length))


def _audit(
    k: int,
    names: tuple[str, ...],
    conc: NDArray[np.float64],
    paths: NDArray[np.float64],
    absorbance: NDArray[np.float64],
    used: NDArray[np.bool_],
    fit: _Fit,
    wavelengths: NDArray[np.float64],
    *,
    molar_mass: float | None,
    limit: float | None,
) -> ComponentCalibration:
    """Linearity audit of one component at its absorptivity peak."""
    peak = int(np.nanargmax(fit.coefficients[k]))
    rows = used[:, peak]
    holds = conc[:, k] > 0
    levels_present = np.unique(conc[rows & holds, k])
    warnings: list[str] = []
    if levels_present.size < _MIN_LEVELS_ADVISED:
        warnings.append(f"only {levels_present.size} concentration levels inside the working range; 5 or more are advised")
    design = np.column_stack([conc * paths[:, None], np.ones(conc.shape[0])])[rows]
    y = absorbance[rows, peak]
    p = design.shape[1]
    n = y.size
    beta, *_ = np.linalg.lstsq(design, y, rcond=None)
    resid = y - design @ beta
    dof = n - p
    rss = float(resid @ resid)
    tss = float(np.sum((y - y.mean()) ** 2))
    r_squared = 1.0 - rss / tss if tss > 0 else None
    intercept = float(beta[-1])
    intercept_se = intercept_p = curvature_p = lack_of_fit_p = None
    if dof > 0:
        sigma2 = rss / dof
        inverse_gram = np.linalg.pinv(design.T @ design)
        intercept_se = float(np.sqrt(sigma2 * inverse_gram[-1, -1]))
        if intercept_se > 0:
            intercept_p = float(2 * stats.t.sf(abs(intercept) / intercept_se, dof))
        curvature_p = _curvature_p(design, y, k)
        lack_of_fit_p = _lack_of_fit_p(design, resid, dof)
    if intercept_p is not None and intercept_p < 0.01:
        warnings.append(f"intercept {intercept:+.4f} differs from zero (p = {intercept_p:.2g}): check the blank and baseline")
    if curvature_p is not None and curvature_p < 0.01:
        warnings.append(f"the response bends inside the working range (curvature p = {curvature_p:.2g})")
    if lack_of_fit_p is not None and lack_of_fit_p < 0.01:
        warnings.append(f"replicates show lack of fit (p = {lack_of_fit_p:.2g})")
    if limit is not None:
        warnings.append(f"standards leave the line above absorbance {limit:.3f}; points above it are not used")
    chosen = conc[holds, k]
    return ComponentCalibration(
        name=names[k],
        molar_mass=molar_mass,
        peak_wavelength_nm=float(wavelengths[peak]),
        levels=int(np.unique(chosen).size),
        concentration_range=(float(chosen.min()), float(chosen.max())),
        r_squared=r_squared,
        intercept=intercept,
        intercept_se=intercept_se,
        intercept_p=intercept_p,
        curvature_p=curvature_p,
        lack_of_fit_p=lack_of_fit_p,
        linear_limit_absorbance=limit,
        warnings=tuple(warnings),
    )


def _curvature_p(design: NDArray[np.float64], y: NDArray[np.float64], k: int) -> float | None:
    """p-value of a quadratic term in component ``k`` (t-test of the added column)."""
    extended = np.column_stack([design, design[:, k] ** 2])
    dof = y.size - extended.shape[1]
    if dof <= 0 or np.linalg.matrix_rank(extended) < extended.shape[1]:
        return None
    beta, *_ = np.linalg.lstsq(extended, y, rcond=None)
    resid = y - extended @ beta
    sigma2 = float(resid @ resid) / dof
    variance = sigma2 * np.linalg.inv(extended.T @ extended)[-1, -1]
    if variance <= 0:
        return None
    return float(2 * stats.t.sf(abs(beta[-1]) / np.sqrt(variance), dof))


def _lack_of_fit_p(design: NDArray[np.float64], resid: NDArray[np.float64], dof: int) -> float | None:
    """Lack-of-fit F test against the scatter of replicate standards (identical design rows)."""
    _, groups = np.unique(np.round(design, 12), axis=0, return_inverse=True)
    groups = groups.reshape(-1)
    n_groups = int(groups.max()) + 1
    pure_dof = resid.size - n_groups
    lack_dof = dof - pure_dof
    if pure_dof <= 0 or lack_dof <= 0:
        return None
    means = np.bincount(groups, weights=resid) / np.bincount(groups)
    pure_ss = float(np.sum((resid - means[groups]) ** 2))
    lack_ss = float(resid @ resid) - pure_ss
    if pure_ss <= 0:
        return None
    f_value = (lack_ss / lack_dof) / (pure_ss / pure_dof)
    return float(stats.f.sf(f_value, lack_dof, pure_dof))
