"""Interferent screening: does a scan hold something the reference library does not explain?

After a mixture fit, the residual ``measured - fitted`` should be instrument
noise and nothing else. Real photometric noise grows with absorbance and is
correlated along wavelength, so a plain chi-square on raw residuals either
raises false alarms (correlation inflates it) or misses real interferents
(a loose threshold). This module

1. whitens the residual with the instrument :class:`~absolve.library.NoiseModel`:
   divide by the noise standard deviation at the fitted absorbance, then undo the
   first-order autoregressive correlation along wavelength (the Prais-Winsten
   transform, i.e. the inverse Cholesky factor of the AR(1) covariance);
2. projects the whitened residual onto the orthogonal complement of the whitened
   design, which removes exactly the degrees of freedom the fit used, whatever
   fitting method (non-negative or not) produced the residual;
3. splits what is left into a smooth part (a cosine basis of a few dozen terms,
   whitened and orthogonalised the same way) and a rough part, and tests the
   smooth share with an F ratio. Interferents, turbidity, wavelength shifts and
   stray light all leave *smooth* residuals, while noise spreads evenly over all
   directions, so this test has far more power than an omnibus chi-square; and
   because it is a ratio of two energies measured in the same scan, an error in
   the noise model's overall scale cancels;
4. scans the same smooth subspace with a matched filter: Gaussian band
   templates (whitened and projected like the residual) at every centre, the
   largest normalised projection studentised by the rough part, its p-value
   from Rice's upcrossing bound for the maximum over a curve of templates.
   Absorbers add localised positive bands, so this one-sided test concentrates
   on one direction where the F test spreads over all smooth ones;
5. adds an omnibus chi-square on the whole whitened residual (against a noise
   level ``noise_tolerance`` times the model's, so only gross excess counts),
   for rough structure and noisy scans, combined with the other two by a
   weighted Bonferroni rule.

Flagged scans get a :class:`Diagnosis`: the smooth unexplained residual is
matched against shape templates (a foreign band, scattering, a wavelength
shift, a shortfall at high absorbance) and the best match is named with how
sure the match is. :func:`explain_with_suspects` refits with candidate
absorbers added and tests each with a boundary-aware F test.

References
----------
Box, G. E. P. (1954). Some theorems on quadratic forms applied in the study of
analysis of variance problems, I. Ann. Math. Statist. 25, 290-302.
ASTM E1655, Standard practices for infrared multivariate quantitative analysis
(spectral residual and outlier checks on prediction samples).
Durbin, J. & Watson, G. S. (1950). Testing for serial correlation in least
squares regression. Biometrika 37, 409-428; Ljung, G. M. & Box, G. E. P. (1978).
On a measure of lack of fit in time series models. Biometrika 65, 297-303.
Prais, S. J. & Winsten, C. B. (1954). Trend estimators and serial correlation.
Cowles Commission discussion paper 383.
Self, S. G. & Liang, K.-Y. (1987). Asymptotic properties of maximum likelihood
estimators and likelihood ratio tests under nonstandard conditions. JASA 82, 605-610.
Turin, G. L. (1960). An introduction to matched filters. IRE Trans. Inf. Theory 6,
311-329 (the matched filter).
Rice, S. O. (1944). Mathematical analysis of random noise. Bell Syst. Tech. J. 23,
282-332 (expected upcrossings); Hotelling, H. (1939). Tubes and spheres in n-spaces,
and a class of statistical problems. Amer. J. Math. 61, 440-460; Davies, R. B. (1977,
1987). Hypothesis testing when a nuisance parameter is present only under the
alternative. Biometrika 64, 247-254 and 74, 33-43; Knowles, M. & Siegmund, D. (1989).
On Hotelling's approach to testing for a nonlinear parameter in regression. Int.
Statist. Rev. 57, 205-220 (the maximum over a curve of templates).
"""

from __future__ import annotations

import dataclasses
import functools
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field
from typing import Any, Literal

import numpy as np
import scipy.linalg
import scipy.special
from numpy.typing import ArrayLike, NDArray
from threadpoolctl import ThreadpoolController

from .errors import AbsolveError
from .library import NoiseModel

(_gbsv,) = scipy.linalg.get_lapack_funcs(("gbsv",), dtype=np.float64)

__all__ = [
    "Diagnosis",
    "DiagnosisKind",
    "LibraryBias",
    "Screening",
    "SuspectReport",
    "estimate_library_bias",
    "explain_with_suspects",
    "prewhiten",
    "screen_residuals",
    "smooth_basis",
]

DiagnosisKind = Literal["foreign-band", "scatter", "wavelength-shift", "nonlinearity", "unclassified"]
Confidence = Literal["high", "moderate", "low"]

# Fewer rough degrees of freedom than this leave the F ratio's denominator too
# unstable to be worth a p-value; such scans are reported as untestable.
_MIN_ROUGH_DOF = 5
# A flagged count whose binomial upper tail at alpha is below this is 'far more than chance'.
_EXCESS_P = 1e-3
# Scans are processed in blocks so the stacked whitened bases stay small in memory.
_BLOCK = 256
# Scans per block of the shared-pattern path: its per-scan arrays are a few times n_wl x 32
# (about 6 MB for 128 scans of 400 points). Measured at 400 points: 128 a quarter faster than 512
# (whose arrays no longer stay in the processor's cache), 64 slower (more steps of Python per scan).
_GROUP_BLOCK = 128
# Flagged scans per block of subspaces for the diagnosis (each scan's whitened bases take n_wl x 50 values).
_DIAGNOSIS_BLOCK = 64
# Largest table of null-draw z-scores made at once in the diagnosis (values): about 2 MB.
_NULL_TABLE = 300_000
# Singular values below this fraction of a matrix's Frobenius norm count as zero.
_RANK_TOL = 1e-9
# Gram-matrix eigenvalues (squared singular values) below this fraction of the squared norm count as
# zero; well above the rounding of the Gram subtraction (about 1e-16 of the norm squared).
_GRAM_TOL = 1e-12
# Width of the narrowest structure the default cosine basis resolves, in nm.
_SMOOTH_SCALE_NM = 15.0
# Spacing of neighbouring band centres in the matched-filter band scan, as a fraction of the band
# width: neighbours then correlate above 0.97, so the largest statistic on the grid is within about
# 1 % of the maximum over continuous centres.
_SCAN_STEP = 1.0 / 3.0
# Band widths (Gaussian standard deviation, nm) and scattering exponents tried by the diagnosis.
_BAND_WIDTHS_NM = (3.0, 4.5, 6.5, 9.0, 13.0, 18.0, 25.0, 35.0, 50.0)
_SCATTER_EXPONENTS = (0.5, 1.0, 1.5, 2.0, 3.0, 4.0, 5.0)
# (share, evidence) needed for "high" and "moderate" confidence in a diagnosis.
_HIGH = (0.8, 10.0)
_MODERATE = (0.6, 4.0)
# The batch estimate of the library's error is not subtracted where its own noise would add more than
# this share of a typical scan's noise variance (it is common to every scan it corrects).
_BIAS_MAX_ADDED_NOISE = 0.25
_FAMILY_WORDS = {
    "foreign-band": "a foreign absorption band",
    "scatter": "scattering (turbidity)",
    "wavelength-shift": "a wavelength-scale shift",
    "nonlinearity": "a shortfall at high absorbance",
}


# --------------------------------------------------------------------------- results


@dataclass(frozen=True)
class Diagnosis:
    """What the unexplained part of one flagged scan looks like.

    Attributes
    ----------
    kind : {"foreign-band", "scatter", "wavelength-shift", "nonlinearity", "unclassified"}
        The shape that best matches the smooth unexplained residual.
    window_nm : tuple of float
        Contiguous wavelength range around ``peak_nm`` where the matched disturbance
        is at least half its largest size.
    peak_nm : float
        Wavelength of the largest matched disturbance.
    size_absorbance : float
        Largest absolute absorbance of the matched disturbance (for "scatter": its rise
        from the long-wavelength end, since a baseline offset absorbs the flat part; for
        "unclassified": of the smooth unexplained residual). Signed: negative means a shortfall.
    residual_absorbance : float
        Largest absolute absorbance of the smooth residual the library cannot
        explain (part of a disturbance that resembles library components is
        absorbed by the fit and does not show here).
    confidence : {"high", "moderate", "low"}
        How sure the shape match is (not whether something is there: that is the
        screening p-value).
    share : float
        Fraction of the smooth unexplained residual energy the matched shape explains.
    runner_up : str or None
        The next best shape family.
    runner_up_share : float
        Its share.
    amplitude_z : float
        Matched amplitude over its standard error.
    evidence : float
        How much better the match is than the runner-up's: the difference of their
        explained whitened energies, each less what its family explains of pure
        noise, in noise-variance units (twice a log-likelihood ratio).
    detail : dict
        Shape parameters: ``center_nm`` and ``width_nm`` (band), ``exponent``
        (scatter), ``shift_nm`` and ``shift_se_nm`` (shift), ``shape`` (nonlinearity).
    message : str
        One plain-language sentence, saying how sure it is.
    """

    kind: DiagnosisKind
    window_nm: tuple[float, float]
    peak_nm: float
    size_absorbance: float
    residual_absorbance: float
    confidence: Confidence
    share: float
    runner_up: str | None
    runner_up_share: float
    amplitude_z: float
    evidence: float
    detail: Mapping[str, float | str] = field(default_factory=dict)
    message: str = ""

    def summary(self) -> dict[str, Any]:
        """JSON-safe dictionary of every field."""
        return {
            "kind": self.kind,
            "window_nm": [float(self.window_nm[0]), float(self.window_nm[1])],
            "peak_nm": float(self.peak_nm),
            "size_absorbance": float(self.size_absorbance),
            "residual_absorbance": float(self.residual_absorbance),
            "confidence": self.confidence,
            "share": float(self.share),
            "runner_up": self.runner_up,
            "runner_up_share": float(self.runner_up_share),
            "amplitude_z": float(self.amplitude_z),
            "evidence": float(self.evidence),
            "detail": {k: (v if isinstance(v, str) else float(v)) for k, v in self.detail.items()},
            "message": self.message,
        }


def _nan_to_none(value: float) -> float | None:
    return None if not np.isfinite(value) else float(value)


@dataclass(frozen=True, eq=False)
class Screening:
    """Result of :func:`screen_residuals` for a batch of scans.

    Attributes
    ----------
    statistic : ndarray, shape (n_scans,)
        Smooth-structure F ratio: energy per degree of freedom of the whitened
        residual in the smooth subspace over that in the rest. About 1 for noise.
    p_value : ndarray, shape (n_scans,)
        Combined p-value (weighted Bonferroni of ``smooth_p``, ``band_p`` and ``omnibus_p``);
        NaN where the scan has too few usable points to test.
    flagged : ndarray of bool, shape (n_scans,)
        ``p_value < alpha``.
    alpha : float
        False-alarm rate the test was run at.
    method : str
        Description of the test.
    diagnoses : tuple of (Diagnosis or None)
        One per scan; None for scans not flagged.
    smooth_p, omnibus_p : ndarray, shape (n_scans,)
        p-values of the smooth F test and of the omnibus chi-square (the latter
        against ``noise_tolerance`` times the modelled noise).
    noise_ratio : ndarray, shape (n_scans,)
        Root-mean-square of the rough whitened residual: observed noise over the
        noise model's (1 when the model is right; it has no bearing on the F test).
    durbin_watson : ndarray, shape (n_scans,)
        Durbin-Watson statistic of the whitened, projected residual (about 2 for
        white noise, towards 0 for smooth structure).
    smooth_dof, rough_dof : ndarray of int, shape (n_scans,)
        Degrees of freedom of the F ratio.
    band_p : ndarray, shape (n_scans,)
        p-value (an upper bound) of the matched-filter band scan; NaN where not
        tested (records made without it default to NaN).
    """

    statistic: NDArray[np.float64]
    p_value: NDArray[np.float64]
    flagged: NDArray[np.bool_]
    alpha: float
    method: str
    diagnoses: tuple[Diagnosis | None, ...]
    smooth_p: NDArray[np.float64]
    omnibus_p: NDArray[np.float64]
    noise_ratio: NDArray[np.float64]
    durbin_watson: NDArray[np.float64]
    smooth_dof: NDArray[np.int64]
    rough_dof: NDArray[np.int64]
    band_p: NDArray[np.float64] = field(default_factory=lambda: np.empty(0))

    def __post_init__(self) -> None:
        # Records built without the band scan (e.g. for untestable scans) hold NaN there.
        if self.band_p.size != self.statistic.size:
            object.__setattr__(self, "band_p", np.full(self.statistic.size, np.nan))

    @property
    def n_scans(self) -> int:
        """Number of scans screened."""
        return int(self.statistic.size)

    def summary(self) -> dict[str, Any]:
        """JSON-safe summary: settings, counts and one record per scan."""
        scans = []
        for i in range(self.n_scans):
            diagnosis = self.diagnoses[i]
            scans.append(
                {
                    "statistic": _nan_to_none(self.statistic[i]),
                    "p_value": _nan_to_none(self.p_value[i]),
                    "flagged": bool(self.flagged[i]),
                    "smooth_p": _nan_to_none(self.smooth_p[i]),
                    "omnibus_p": _nan_to_none(self.omnibus_p[i]),
                    "band_p": _nan_to_none(self.band_p[i]),
                    "noise_ratio": _nan_to_none(self.noise_ratio[i]),
                    "durbin_watson": _nan_to_none(self.durbin_watson[i]),
                    "smooth_dof": int(self.smooth_dof[i]),
                    "rough_dof": int(self.rough_dof[i]),
                    "diagnosis": None if diagnosis is None else diagnosis.summary(),
                }
            )
        return {
            "method": self.method,
            "alpha": float(self.alpha),
            "n_scans": self.n_scans,
            "n_flagged": int(self.flagged.sum()),
            "n_untestable": int(np.isnan(self.p_value).sum()),
            "scans": scans,
        }

    def batch_note(self) -> str:
        """One sentence on the flagged count against what chance alone gives at ``alpha``.

        When the count is far above chance (binomial upper tail below 0.001),
        the sentence says what that can mean: many samples hold something the
        library does not explain, or the library's own errors are large
        enough to trip the screen on clean samples (see docs/screening.md).
        """
        tested = int(np.count_nonzero(np.isfinite(self.p_value)))
        flagged = int(np.count_nonzero(self.flagged))
        expected = self.alpha * tested
        about = f"{expected:.0f}" if expected >= 10 else f"{expected:.2g}"
        text = f"{flagged} of {tested} tested scan(s) flagged; about {about} would be by chance if all were clean."
        # P(X >= flagged) for X ~ Binomial(tested, alpha).
        if flagged >= 3 and scipy.special.bdtrc(flagged - 1, tested, self.alpha) < _EXCESS_P:
            text += (
                " That is far more than chance: either many of these samples hold something the library does not explain,"
                " or the library is too uncertain for this screen (its own absorptivity errors look like structure);"
                " run check standards known to be clean to tell, and recalibrate with more standards if they are flagged too."
            )
        return text

    def report(self, names: Sequence[str] | None = None) -> str:
        """Plain-text report, one block per scan (``names`` label the scans)."""
        labels = list(names) if names is not None else [f"scan {i + 1}" for i in range(self.n_scans)]
        lines = [f"Interferent screen at alpha = {self.alpha:g} ({self.method}): {self.batch_note()}"]
        for i, label in enumerate(labels):
            if np.isnan(self.p_value[i]):
                lines.append(f"{label}: not tested (too few usable points)")
                continue
            verdict = "UNEXPLAINED STRUCTURE" if self.flagged[i] else "consistent with noise"
            lines.append(
                f"{label}: {verdict} (p = {self.p_value[i]:.3g}, smooth F = {self.statistic[i]:.2f}, "
                f"noise ratio = {self.noise_ratio[i]:.2f})"
            )
            diagnosis = self.diagnoses[i]
            if diagnosis is not None:
                lines.append(f"    {diagnosis.message}")
        return "\n".join(lines)


@dataclass(frozen=True, eq=False)
class SuspectReport:
    """Result of :func:`explain_with_suspects`.

    Attributes
    ----------
    candidate_names : tuple of str
        The suspects, in column order.
    amount, amount_se : ndarray, shape (n_scans, n_candidates)
        Estimated amount of each suspect (candidate units) when added alone, and its
        standard error.
    f_statistic : ndarray, shape (n_scans, n_candidates)
        Whitened extra-sum-of-squares F for adding the suspect.
    p_value : ndarray, shape (n_scans, n_candidates)
        Boundary-corrected p-value (the amount is constrained >= 0, so the null
        distribution is an equal mixture of 0 and F(1, dof)).
    best : ndarray of int, shape (n_scans,)
        Index of the suspect that best explains the residual (largest F), or -1
        when none is significant at ``alpha`` after the Bonferroni correction.
    best_p : ndarray, shape (n_scans,)
        Bonferroni-adjusted p-value of the best suspect.
    remaining : Screening
        Screen of the residual left after adding the best suspect (or none): a
        flagged scan still holds something the suspect does not explain.
    alpha : float
        Significance level.
    """

    candidate_names: tuple[str, ...]
    amount: NDArray[np.float64]
    amount_se: NDArray[np.float64]
    f_statistic: NDArray[np.float64]
    p_value: NDArray[np.float64]
    best: NDArray[np.int64]
    best_p: NDArray[np.float64]
    remaining: Screening
    alpha: float

    @property
    def best_names(self) -> tuple[str | None, ...]:
        """Name of the best significant suspect per scan (None when none is)."""
        return tuple(None if b < 0 else self.candidate_names[b] for b in self.best)

    @property
    def explained(self) -> NDArray[np.bool_]:
        """True where a suspect is significant and nothing unexplained remains after adding it."""
        return (self.best >= 0) & ~self.remaining.flagged

    def summary(self) -> dict[str, Any]:
        """JSON-safe summary with one record per scan."""
        scans = []
        for i, name in enumerate(self.best_names):
            scans.append(
                {
                    "best": name,
                    "best_p": _nan_to_none(self.best_p[i]),
                    "explained": bool(self.explained[i]),
                    "remaining_p": _nan_to_none(self.remaining.p_value[i]),
                    "candidates": [
                        {
                            "name": cand,
                            "amount": _nan_to_none(self.amount[i, j]),
                            "amount_se": _nan_to_none(self.amount_se[i, j]),
                            "f_statistic": _nan_to_none(self.f_statistic[i, j]),
                            "p_value": _nan_to_none(self.p_value[i, j]),
                        }
                        for j, cand in enumerate(self.candidate_names)
                    ],
                }
            )
        return {"alpha": float(self.alpha), "candidates": list(self.candidate_names), "scans": scans}

    def report(self, names: Sequence[str] | None = None) -> str:
        """Plain-text report, one line per scan."""
        labels = list(names) if names is not None else [f"scan {i + 1}" for i in range(self.best.size)]
        lines = [f"Suspects tried: {', '.join(self.candidate_names)} (alpha = {self.alpha:g})"]
        for i, label in enumerate(labels):
            b = int(self.best[i])
            if b < 0:
                lines.append(f"{label}: no suspect explains the residual significantly")
                continue
            rest = "and nothing else remains" if self.explained[i] else "but something else remains"
            lines.append(
                f"{label}: {self.candidate_names[b]} = {self.amount[i, b]:.4g} ± {self.amount_se[i, b]:.2g} "
                f"(p = {self.best_p[i]:.3g}), {rest} (p = {self.remaining.p_value[i]:.3g})"
            )
        return "\n".join(lines)


@dataclass(frozen=True, eq=False)
class LibraryBias:
    """Result of :func:`estimate_library_bias`: the library's fixed error as one batch's residuals show it.

    Attributes
    ----------
    bias : ndarray, shape (n_wavelengths, n_components)
        Residual per unit of each component's fitted coefficient: minus the
        library's absorptivity error (times the path length), as far as the
        fit leaves it in the residual. Zero where not estimated.
    common : ndarray, shape (n_wavelengths,)
        The part of the residual shared by every scan whatever its
        concentrations (the regression's intercept). Reported, never removed:
        a contaminant common to the whole batch must stay visible to the screen.
    n_used : ndarray of int, shape (n_wavelengths,)
        Scans in the estimate at each wavelength.
    estimated : ndarray of bool, shape (n_wavelengths,)
        Wavelengths where the estimate was made and subtracted.
    added_noise : ndarray, shape (n_wavelengths,)
        Median over the scans in the estimate of the variance the estimate's
        own noise adds to a scan's corrected residual, in units of that scan's
        noise variance (homoscedastic approximation); NaN where not estimated.
    corrected : ndarray, shape (n_scans, n_wavelengths)
        The residuals less ``bias @ coefficients[i]``, each scan in the
        estimate corrected by the estimate made without it (leave-one-out).
        Unchanged where not estimated, at unusable points and for scans with
        non-finite coefficients.
    applied : bool
        Whether any wavelength was corrected.
    message : str
        One sentence on what was done, or why nothing was.
    min_scans : int
        The fewest scans per wavelength the estimate was allowed to use.
    """

    bias: NDArray[np.float64]
    common: NDArray[np.float64]
    n_used: NDArray[np.int64]
    estimated: NDArray[np.bool_]
    added_noise: NDArray[np.float64]
    corrected: NDArray[np.float64]
    applied: bool
    message: str
    min_scans: int

    @property
    def n_components(self) -> int:
        """Number of library components (columns of ``bias``)."""
        return int(self.bias.shape[1])

    def summary(self) -> dict[str, Any]:
        """JSON-safe summary (without the per-scan residuals)."""
        shown = self.estimated.any()
        return {
            "applied": bool(self.applied),
            "message": self.message,
            "min_scans": int(self.min_scans),
            "n_wavelengths": int(self.estimated.size),
            "n_wavelengths_estimated": int(np.count_nonzero(self.estimated)),
            "largest_scans_used": int(self.n_used.max(initial=0)),
            "largest_bias": [float(v) for v in np.abs(self.bias).max(axis=0, initial=0.0)],
            "median_added_noise": _nan_to_none(float(np.median(self.added_noise[self.estimated]))) if shown else None,
        }


# --------------------------------------------------------------------------- validation


def _check_alpha(alpha: float) -> float:
    if not (isinstance(alpha, (int, float)) and 0.0 < float(alpha) < 1.0):
        raise AbsolveError(f"alpha must be a number between 0 and 1, got {alpha!r}", fix="use e.g. alpha=0.05")
    return float(alpha)


def _as_float(name: str, value: ArrayLike, ndim: int | tuple[int, ...]) -> NDArray[np.float64]:
    array = np.array(value, dtype=np.float64)
    allowed = (ndim,) if isinstance(ndim, int) else ndim
    if array.ndim not in allowed:
        raise AbsolveError(
            f"{name} must be a {' or '.join(f'{d}-D' for d in allowed)} array, got shape {array.shape}"
        )
    return array


def _check_grid(wavelengths: ArrayLike) -> NDArray[np.float64]:
    grid = _as_float("wavelengths", wavelengths, 1)
    if grid.size < 3 or not np.all(np.isfinite(grid)) or not np.all(np.diff(grid) > 0):
        raise AbsolveError("wavelengths must be at least three finite values, strictly increasing (nm)")
    return grid


def _check_noise(noise: NoiseModel) -> NoiseModel:
    if not isinstance(noise, NoiseModel):
        raise AbsolveError(
            f"noise must be a NoiseModel, got {type(noise).__name__}",
            fix="calibrate a library from standards, or give NoiseModel(floor, proportional, correlation_length_nm)",
        )
    if noise.floor <= 0:
        raise AbsolveError(
            "screening needs a noise model with floor > 0 (zero noise at zero absorbance gives infinite weight)",
            fix="set the noise floor to the instrument's baseline noise",
        )
    return noise


def _check_design(design: ArrayLike, n_scans: int, n_wl: int) -> NDArray[np.float64]:
    x = _as_float("design", design, (2, 3))
    if x.ndim == 2:
        x = x[None]
    if x.shape[1] != n_wl or x.shape[0] not in (1, n_scans) or x.shape[2] < 1:
        raise AbsolveError(
            f"design of shape {np.shape(design)} does not fit {n_scans} scans x {n_wl} wavelengths",
            fix="give the fit's design matrix as (n_wavelengths, n_columns) or (n_scans, n_wavelengths, n_columns)",
        )
    if not np.all(np.isfinite(x)):
        raise AbsolveError("design matrix holds NaN or infinite values", fix="build it from finite absorptivities")
    return np.broadcast_to(x, (n_scans, n_wl, x.shape[2]))


def _usable_points(
    usable: ArrayLike | None, shape: tuple[int, int], *arrays: NDArray[np.float64]
) -> NDArray[np.bool_]:
    """Points to use: the caller's mask, minus any non-finite value (NaN marks an unusable point)."""
    mask = np.ones(shape, dtype=bool)
    if usable is not None:
        given = np.asarray(usable)
        if given.shape != shape or given.dtype != np.bool_:
            raise AbsolveError(f"usable must be a boolean array of shape {shape}, got {given.dtype} {given.shape}")
        mask &= given
    for array in arrays:
        mask &= np.isfinite(array)
    return mask


# --------------------------------------------------------------------------- whitening


def _ar_links(
    grid: NDArray[np.float64], usable: NDArray[np.bool_], correlation_length_nm: float
) -> tuple[NDArray[np.float64], NDArray[np.intp], NDArray[np.bool_]]:
    """AR(1) coefficient linking each usable point to the previous usable one, that point's index,
    and whether such a previous point exists."""
    index = np.arange(grid.size)
    last = np.maximum.accumulate(np.where(usable, index, -1), axis=1)
    previous = np.full_like(last, -1)
    previous[:, 1:] = last[:, :-1]
    linked = usable & (previous >= 0)
    previous = np.maximum(previous, 0)
    if correlation_length_nm <= 0:
        return np.zeros(usable.shape), previous, linked
    gap = grid[None, :] - grid[previous]
    return np.where(linked, np.exp(-gap / correlation_length_nm), 0.0), previous, linked


def prewhiten(
    wavelengths: ArrayLike,
    values: ArrayLike,
    level: ArrayLike,
    noise: NoiseModel,
    *,
    usable: ArrayLike | None = None,
) -> NDArray[np.float64]:
    """Transform residual-like values so that modelled noise becomes independent unit-variance noise.

    Each point is divided by the noise standard deviation at absorbance
    ``level`` (heteroscedastic scaling), then the AR(1) correlation along
    wavelength is removed with the Prais-Winsten transform
    ``w_j = (z_j - rho_j z_{j-1}) / sqrt(1 - rho_j**2)``, ``rho_j = exp(-gap_j / L)``,
    linking each usable point to the previous usable one. This is the inverse
    Cholesky factor of the noise covariance: if ``v = D e`` with ``e`` AR(1),
    the output is independent N(0, 1). Unusable points come out as 0 so they
    drop out of every sum of squares.

    Parameters
    ----------
    wavelengths : array_like, shape (n_wavelengths,)
        Increasing grid in nm.
    values : array_like, shape (n_scans, n_wavelengths) or (n_scans, n_wavelengths, n_columns)
        Residuals, or design columns to transform the same way.
    level : array_like, shape (n_scans, n_wavelengths)
        Absorbance the noise standard deviation is evaluated at (the fitted absorbance).
    noise : NoiseModel
        Instrument noise model (floor must be > 0).
    usable : array_like of bool, shape (n_scans, n_wavelengths), optional
        Points to use; non-finite ``level`` points are unusable too.

    Returns
    -------
    ndarray, same shape as ``values``
        Whitened values (0 at unusable points).

    Examples
    --------
    >>> from absolve.library import NoiseModel
    >>> w = prewhiten([400, 401, 402], [[0.002, 0.002, 0.002]], [[0.0, 0.0, 0.0]], NoiseModel(0.002, 0.0, 0.0))
    >>> w.round(6).tolist()
    [[1.0, 1.0, 1.0]]
    """
    grid = _check_grid(wavelengths)
    noise = _check_noise(noise)
    data = _as_float("values", values, (2, 3))
    lev = _as_float("level", level, 2)
    if lev.shape[1] != grid.size or data.shape[:2] != lev.shape:
        raise AbsolveError(
            f"values {data.shape} and level {lev.shape} do not match {grid.size} wavelengths",
            fix="give one row per scan on the wavelength grid",
        )
    mask = _usable_points(usable, lev.shape, lev)
    rho, previous, _ = _ar_links(grid, mask, noise.correlation_length_nm)
    return _whiten(data, _noise_sd(noise, lev, mask), mask, rho, previous)


def _noise_sd(
    noise: NoiseModel, level: NDArray[np.float64], mask: NDArray[np.bool_], extra_variance: NDArray[np.float64] | None = None
) -> NDArray[np.float64]:
    """Noise standard deviation at each point: the model at ``level``, plus any extra variance."""
    sd = noise.standard_deviation(np.where(mask, level, 0.0))
    if extra_variance is None:
        return sd
    return np.sqrt(sd**2 + np.where(mask, extra_variance, 0.0))


def _whiten(
    data: NDArray[np.float64],
    sd: NDArray[np.float64],
    mask: NDArray[np.bool_],
    rho: NDArray[np.float64],
    previous: NDArray[np.intp],
) -> NDArray[np.float64]:
    """Prais-Winsten whitening of (n, n_wl) or (n, n_wl, q) values with point standard deviations ``sd``; 0 at unusable points."""
    scans = np.arange(data.shape[0])[:, None]
    if data.ndim == 3:
        sd, rho, mask = sd[..., None], rho[..., None], mask[..., None]
    z = np.where(mask, data, 0.0)
    z /= sd
    # In place: temporaries of a block's size cost several times the arithmetic (fresh pages). The
    # previous points are gathered by (scan, point) pairs, whole rows of q at a time: an index array
    # of the data's full size (take_along_axis) costs more than the arithmetic.
    out = z[scans, previous]
    out *= rho
    np.subtract(z, out, out=out)
    out /= np.sqrt(1.0 - rho**2)
    np.copyto(out, 0.0, where=~mask)
    return out


def _unwhiten(
    whitened: NDArray[np.float64], sd: NDArray[np.float64], rho: NDArray[np.float64], mask: NDArray[np.bool_]
) -> NDArray[np.float64]:
    """Invert :func:`_whiten` for one scan (NaN at unusable points)."""
    rows = np.flatnonzero(mask)
    s, r, w = sd[rows], rho[rows], whitened[rows]
    root = np.sqrt(1.0 - r**2)
    # The whitening matrix is lower bidiagonal over the usable points; in LAPACK's band storage the first
    # row is room for the fill-in of pivoting. Solved by LAPACK directly, as scipy.linalg.solve_banded
    # does: its checks and wrapping cost some 50 times the solve of a few hundred points.
    banded = np.zeros((3, rows.size))
    banded[1] = 1.0 / (s * root)
    banded[2, :-1] = -r[1:] / (s[:-1] * root[1:])
    _, _, solution, info = _gbsv(1, 0, banded, w, overwrite_ab=True)
    if info != 0:
        raise np.linalg.LinAlgError("singular whitening matrix")
    out = np.full(sd.shape, np.nan)
    out[rows] = solution
    return out


# --------------------------------------------------------------------------- subspaces


def smooth_basis(wavelengths: ArrayLike, n_terms: int) -> NDArray[np.float64]:
    """Cosine basis for smooth structure along wavelength, shape (n_wavelengths, n_terms).

    Column k is ``cos(pi * k * x)`` with ``x`` running from 0 to 1 over the grid
    (the discrete cosine transform's basis evaluated at the actual wavelengths),
    so ``n_terms`` terms resolve features down to about ``2 * span / n_terms`` nm
    in period. Cosines have even leverage across the range (high-degree
    polynomials crowd at the ends).
    """
    grid = _check_grid(wavelengths)
    if not (isinstance(n_terms, (int, np.integer)) and n_terms >= 1):
        raise AbsolveError(f"the number of smooth terms must be a positive integer, got {n_terms!r}")
    x = (grid - grid[0]) / (grid[-1] - grid[0])
    return np.cos(np.pi * np.outer(x, np.arange(int(n_terms))))


def _default_terms(grid: NDArray[np.float64], n_columns: int) -> int:
    """Terms resolving features of about ``_SMOOTH_SCALE_NM``, leaving most points for the rough part."""
    by_scale = int(round((grid[-1] - grid[0]) / _SMOOTH_SCALE_NM))
    return min(max(by_scale, 4), 40, max(1, (grid.size - n_columns) // 3))


def _orthonormal_columns(matrix: NDArray[np.float64]) -> tuple[NDArray[np.float64], NDArray[np.int64]]:
    """Orthonormal basis of each stacked matrix's column space; columns beyond the rank are zeroed."""
    u, s, _ = np.linalg.svd(matrix, full_matrices=False)
    keep = s > _RANK_TOL * np.linalg.norm(matrix, axis=(1, 2))[:, None]
    return u * keep[:, None, :], keep.sum(axis=1)


@dataclass(frozen=True)
class _Subspaces:
    """Whitened geometry of a block of scans.

    The smooth subspace is held through the eigen-decomposition of its Gram
    matrix rather than an orthonormal basis: ``coords`` are the residual's
    coordinates in an orthonormal basis of it, which is all the test needs, and
    a k x k eigenproblem per scan is far cheaper than an SVD of the n_wl x k basis.
    """

    mask: NDArray[np.bool_]
    rho: NDArray[np.float64]
    previous: NDArray[np.intp]
    linked: NDArray[np.bool_]
    sd: NDArray[np.float64]
    noise: NoiseModel
    design_basis: NDArray[np.float64]  # (n, n_wl, p) orthonormal, zero columns beyond the rank
    design_rank: NDArray[np.int64]
    projected_smooth: NDArray[np.float64]  # (n, n_wl, k) whitened cosine basis projected off the design and its smooth part
    smooth_gram: NDArray[np.float64]  # (n, k, k) Gram matrix of the whitened cosine basis projected off the guard
    smooth_vectors: NDArray[np.float64]  # (n, k, k) Gram eigenvectors scaled by 1/sqrt(eigenvalue), 0 if dropped
    smooth_rank: NDArray[np.int64]
    residual: NDArray[np.float64]  # (n, n_wl) whitened residual projected off the design
    coords: NDArray[np.float64]  # (n, k) residual coordinates in the smooth subspace

    def one(self, i: int) -> _Subspaces:
        """The subspaces of scan ``i`` of the block alone (views, no copies)."""
        return _Subspaces(**{
            item.name: value if isinstance(value, NoiseModel) else value[i : i + 1]
            for item in dataclasses.fields(self)
            for value in (getattr(self, item.name),)
        })

    def smooth_orthonormal(self) -> NDArray[np.float64]:
        """Orthonormal bases (n, n_wl, k; zero columns beyond the rank) of the scans' smooth subspaces."""
        return self.projected_smooth @ self.smooth_vectors


def _smooth_projection(design: NDArray[np.float64], basis: NDArray[np.float64], mask: NDArray[np.bool_]) -> NDArray[np.float64]:
    """Least-squares projection of every design column onto the smooth basis over each scan's usable points.

    The basis's Gram matrix and its pseudo-inverse depend on the usable points only: made once per pattern.
    """
    projection = np.empty(design.shape)
    for points, rows in _point_patterns(mask):
        # Matrix products: a three-operand einsum does not use BLAS and is many times slower.
        weighted = basis.T * points
        inverse = np.linalg.pinv(weighted @ basis, hermitian=True)
        projection[rows] = basis @ (inverse @ (weighted @ design[rows]))
    return projection


def _subspaces(
    grid: NDArray[np.float64],
    residuals: NDArray[np.float64],
    fitted: NDArray[np.float64],
    design: NDArray[np.float64],
    mask: NDArray[np.bool_],
    basis: NDArray[np.float64],
    noise: NoiseModel,
    extra_variance: NDArray[np.float64] | None = None,
) -> _Subspaces:
    rho, previous, linked = _ar_links(grid, mask, noise.correlation_length_nm)
    sd = _noise_sd(noise, fitted, mask, extra_variance)
    white_design = _whiten(design, sd, mask, rho, previous)
    design_basis, design_rank = _orthonormal_columns(white_design)
    # The smooth subspace is kept clear of the design *and of its smooth part*.
    # A library estimated from noisy standards explains a sample as a noisy
    # version of its true, smooth spectrum; what is left over then lies along
    # the smooth part of the library spectra, and a test looking there would
    # mistake the calibration's noise for an interferent. Interferents shaped
    # like a smoothed library spectrum could not be told from a concentration
    # error anyway, so little power is lost.
    smooth_part = _smooth_projection(design, basis, mask)
    guard_basis, _ = _orthonormal_columns(np.concatenate([white_design, _whiten(smooth_part, sd, mask, rho, previous)], axis=2))
    white_smooth = _whiten(np.broadcast_to(basis, design.shape[:2] + basis.shape[1:]), sd, mask, rho, previous)
    # Gram matrix of the smooth basis after projection off the guard: S'S - (G'S)'(G'S).
    overlap = guard_basis.transpose(0, 2, 1) @ white_smooth
    gram = white_smooth.transpose(0, 2, 1) @ white_smooth - overlap.transpose(0, 2, 1) @ overlap
    values, vectors = np.linalg.eigh(gram)
    keep = values > _GRAM_TOL * np.einsum("nwk,nwk->n", white_smooth, white_smooth)[:, None]
    vectors = vectors * np.where(keep, 1.0 / np.sqrt(np.where(keep, values, 1.0)), 0.0)[:, None, :]
    white_residual = _whiten(residuals, sd, mask, rho, previous)
    along = np.einsum("nwp,nw->np", design_basis, white_residual)
    off_design = white_residual - np.einsum("nwp,np->nw", design_basis, along)
    projected_smooth = white_smooth - guard_basis @ overlap
    coords = np.einsum("nkj,nk->nj", vectors, np.einsum("nwk,nw->nk", projected_smooth, off_design))
    return _Subspaces(
        mask, rho, previous, linked, sd, noise, design_basis, design_rank, projected_smooth, gram, vectors, keep.sum(axis=1),
        off_design, coords,
    )


# --------------------------------------------------------------------------- band scan (matched filter)


def _band_templates(grid: NDArray[np.float64], n_terms: int) -> NDArray[np.float64]:
    """Gaussian bands (n_templates, n_wl) with centres across the grid, a third of a width apart.

    The width (standard deviation) is the smooth subspace's resolution, the
    span per cosine term (15 nm by default): the test looks at the residual
    in that subspace only, where a narrower band looks like one of this width,
    and one width is one curve of templates, for which the p-value bound of
    :func:`_band_scan_p` is nearly exact (several widths would be joined by
    Bonferroni's inequality, measured to cost more power than the mismatch of
    broader bands does).
    """
    span = grid[-1] - grid[0]
    width = span / n_terms
    centres = np.linspace(grid[0], grid[-1], int(np.ceil(span / (_SCAN_STEP * width))) + 1)
    return np.exp(-0.5 * ((grid[None, :] - centres[:, None]) / width) ** 2)


def _band_scan_statistic(
    numerator: NDArray[np.float64], norm2: NDArray[np.float64], cross: NDArray[np.float64]
) -> tuple[NDArray[np.float64], NDArray[np.float64]]:
    """Largest normalised band projection of each scan, and the length of the curve of templates.

    With ``tau_t`` the coordinates of template ``t`` (whitened, projected like
    the residual) and ``y`` the residual's, all in one orthonormal basis of the
    scan's smooth subspace: ``numerator = <tau_t, y>``, ``norm2 = |tau_t|**2``
    and ``cross = <tau_t, tau_t+1>``, each (n_scans, n_templates[-1]). The
    statistic is ``max_t <tau_t, y> / |tau_t|``, N(0, 1) for each ``t`` under
    white noise; the curve's length is that of the piecewise great-circle path
    through the normalised templates, ``sum arccos(<u_t, u_t+1>)``. The
    largest statistic over the templates is at most the maximum over that path,
    so the bound of :func:`_band_scan_p` holds for it. A template the design
    absorbs entirely is left out, and the path through it counted at the
    longest (pi).
    """
    valid = norm2 > _GRAM_TOL * np.max(norm2, axis=1, initial=0.0)[:, None]
    scale = np.where(valid, 1.0 / np.sqrt(np.where(valid, norm2, 1.0)), 0.0)
    largest = np.max(np.where(valid, numerator * scale, -np.inf), axis=1, initial=-np.inf)
    cosine = np.where(valid[:, :-1] & valid[:, 1:], cross * scale[:, :-1] * scale[:, 1:], -1.0)
    return largest, np.sum(np.arccos(np.clip(cosine, -1.0, 1.0)), axis=1)


def _band_scan_p(
    largest: NDArray[np.float64], length: NDArray[np.float64], rough_dof: NDArray[np.int64]
) -> NDArray[np.float64]:
    """p-value of the largest Studentised band statistic: Rice's upcrossing bound.

    For a curve of unit-norm templates ``u(s)`` in a subspace where the
    residual coordinates ``y`` are independent N(0, sigma**2),
    ``X(s) = <u(s), y> / sigma`` is a unit-variance Gaussian process and, by
    Rice's formula, ``P(max X > c) <= P(X(s_0) > c) + E[upcrossings of c]
    = Phi(-c) + kappa / (2 pi) exp(-c**2 / 2)`` with ``kappa`` the curve's
    length on the unit sphere (Rice 1944; Hotelling 1939; Davies 1977, 1987;
    Knowles & Siegmund 1989): the look-elsewhere cost of scanning the band
    centre. ``sigma`` is estimated from the rough part, independent of ``y``,
    with ``nu`` degrees of freedom; averaging the bound over that estimate
    (``sigma_hat**2 / sigma**2 ~ chi2(nu) / nu``) gives exactly
    ``P(t_nu > c) + kappa / (2 pi) (1 + c**2 / nu) ** (-nu / 2)`` (the
    chi-square moment generating function).
    """
    nu = np.maximum(rough_dof, 1).astype(np.float64)
    c = np.maximum(largest, 0.0)
    crossings = length / (2.0 * np.pi) * np.exp(-0.5 * nu * np.log1p(c**2 / nu))
    return np.minimum(1.0, scipy.special.stdtr(nu, -c) + crossings)


# --------------------------------------------------------------------------- energies in bulk


@dataclass(frozen=True)
class _Sums:
    """Per-scan sums the tests are made of, filled block by block.

    ``energy``: whitened residual energy off the design; ``smooth_energy``: its
    share in the smooth subspace; ``dw_numerator``: the Durbin-Watson numerator;
    ``band_largest`` and ``band_length``: the band scan's statistic and curve
    length (:func:`_band_scan_statistic`); ``total_dof``
    and ``smooth_dof``: degrees of freedom off the design and in the smooth subspace.
    """

    energy: NDArray[np.float64]
    smooth_energy: NDArray[np.float64]
    dw_numerator: NDArray[np.float64]
    band_largest: NDArray[np.float64]
    band_length: NDArray[np.float64]
    total_dof: NDArray[np.int64]
    smooth_dof: NDArray[np.int64]

    @classmethod
    def empty(cls, n_scans: int) -> _Sums:
        floats = [np.empty(n_scans) for _ in range(5)]
        return cls(*floats, np.empty(n_scans, dtype=np.int64), np.empty(n_scans, dtype=np.int64))


def _energies(
    grid: NDArray[np.float64],
    resid: NDArray[np.float64],
    fit: NDArray[np.float64],
    x: NDArray[np.float64],
    mask: NDArray[np.bool_],
    basis: NDArray[np.float64],
    noise: NoiseModel,
    extra: NDArray[np.float64] | None,
    shared_design: bool,
    templates: NDArray[np.float64],
) -> _Sums:
    """Whitened residual energies, band scan and degrees of freedom of every scan (see :class:`_Sums`).

    Scans sharing the design and their usable points share every subspace
    before whitening, so those are found once per point pattern
    (:class:`_PointGeometry`); only the whitening differs from scan to scan.
    Per-scan designs, and patterns with too few points, take the general
    path of :func:`_subspaces`.
    """
    n_scans = resid.shape[0]
    sums = _Sums.empty(n_scans)
    general = np.ones(n_scans, dtype=bool)
    if shared_design:
        # One BLAS thread: on a busy machine a second one mostly waits (measured 2-3x slower with two).
        with _one_blas_thread():
            _bulk_energies(grid, resid, fit, x[0], mask, basis, noise, extra, templates, sums, general)
    rows = np.flatnonzero(general)
    if rows.size:
        # Stacks of small matrices: BLAS threads only add synchronisation (tens of times slower on a busy machine).
        with _one_blas_thread():
            for start in range(0, rows.size, _BLOCK):
                block = rows[start : start + _BLOCK]
                sub = _subspaces(grid, resid[block], fit[block], x[block], mask[block], basis, noise, None if extra is None else extra[block])
                u = sub.residual
                sums.energy[block] = np.einsum("nw,nw->n", u, u)
                sums.smooth_energy[block] = np.einsum("nk,nk->n", sub.coords, sub.coords)
                step = np.where(sub.linked, u - np.take_along_axis(u, sub.previous, axis=1), 0.0)
                sums.dw_numerator[block] = np.einsum("nw,nw->n", step, step)
                sums.total_dof[block] = sub.mask.sum(axis=1) - sub.design_rank
                sums.smooth_dof[block] = sub.smooth_rank
                sums.band_largest[block], sums.band_length[block] = _general_band_scan(sub, x[block], basis, templates)
    return sums


def _general_band_scan(
    sub: _Subspaces, design: NDArray[np.float64], basis: NDArray[np.float64], templates: NDArray[np.float64]
) -> tuple[NDArray[np.float64], NDArray[np.float64]]:
    """The band scan of a block of scans with their own designs or usable points.

    Each template is replaced by its least-squares fit ``D a + S b`` on the
    design and the cosine basis over the scan's usable points (as the bulk
    path's projection on its basis); whitened and projected off the guard, only
    ``S b`` remains, with coordinates ``V^T G b`` in the orthonormal basis of
    :meth:`_Subspaces.smooth_orthonormal` (``G`` the projected Gram matrix,
    ``V`` its scaled eigenvectors).
    """
    mask = sub.mask[:, :, None]
    p = design.shape[2]
    columns = np.where(mask, np.concatenate([design, np.broadcast_to(basis, design.shape[:2] + basis.shape[1:])], axis=2), 0.0)
    smooth_part = np.linalg.pinv(columns)[:, p:, :] @ np.where(mask, templates.T, 0.0)
    tau = np.einsum("nkj,nkt->njt", sub.smooth_gram @ sub.smooth_vectors, smooth_part)
    return _band_scan_statistic(
        np.einsum("nj,njt->nt", sub.coords, tau), np.einsum("njt,njt->nt", tau, tau),
        np.einsum("njt,njt->nt", tau[:, :, :-1], tau[:, :, 1:]),
    )


def _bulk_energies(
    grid: NDArray[np.float64], resid: NDArray[np.float64], fit: NDArray[np.float64], design: NDArray[np.float64],
    mask: NDArray[np.bool_], basis: NDArray[np.float64], noise: NoiseModel, extra: NDArray[np.float64] | None,
    templates: NDArray[np.float64], sums: _Sums, general: NDArray[np.bool_],
) -> None:
    """Fill ``sums`` for the scans the shared-pattern path can take, and clear their ``general`` mark."""
    for points, rows in _point_patterns(mask):
        geometry = _PointGeometry.build(grid, design, basis, points, noise.correlation_length_nm, templates)
        if geometry is None:
            continue
        for start in range(0, rows.size, _GROUP_BLOCK):
            sub = rows[start : start + _GROUP_BLOCK]
            found = geometry.energies(resid[sub], fit[sub], None if extra is None else extra[sub], noise)
            if found is None:
                continue
            sums.energy[sub], sums.smooth_energy[sub], sums.dw_numerator[sub], sums.band_largest[sub], sums.band_length[sub] = found
            sums.total_dof[sub] = geometry.n_points - geometry.design_rank
            sums.smooth_dof[sub] = geometry.smooth_rank
            general[sub] = False


def _point_patterns(mask: NDArray[np.bool_]) -> list[tuple[NDArray[np.bool_], NDArray[np.intp]]]:
    """Distinct rows of ``mask`` with the scans (row indices, increasing) that have each.

    Rows are packed into 64-bit words and sorted by them: sorting rows as
    byte strings (``np.unique(..., axis=0)``) is many times slower.
    """
    n_rows = mask.shape[0]
    packed = np.packbits(mask, axis=1)
    words = np.zeros((n_rows, -(-packed.shape[1] // 8) * 8), dtype=np.uint8)
    words[:, : packed.shape[1]] = packed
    keys = words.view(np.uint64)
    order = np.lexsort(keys.T[::-1])  # stable: each pattern's rows stay in increasing order
    ordered = keys[order]
    starts = np.flatnonzero(np.concatenate([[True], np.any(ordered[1:] != ordered[:-1], axis=1)]))
    return [(mask[rows[0]], rows) for rows in np.split(order, starts[1:])]


@dataclass(frozen=True)
class _PointGeometry:
    """The subspaces of scans that share a design and their usable points, before whitening.

    ``basis`` is orthonormal and nested: its first ``design_rank`` columns
    span the design, the first ``guard_rank`` the design and its smooth part
    (the guard of :func:`_subspaces`), and all of them add the cosine basis.
    Whitening is an invertible map of the usable points, so it carries these
    spans onto the whitened ones :func:`_subspaces` builds scan by scan; ranks
    are decided here with the same relative tolerances. For one scan, with
    ``A = W basis`` (``W`` its whitening), ``H = A^T A = L L^T`` (Cholesky)
    and ``y = L^-1 A^T w`` for the whitened residual ``w``, the energy in the
    span of the first ``j`` columns is ``sum(y[:j]**2)``: the smooth energy
    is ``sum(y[guard_rank:]**2)``.

    ``W^T W = S^-1 T S^-1`` with ``S`` the point standard deviations and ``T``
    tridiagonal (the AR(1) precision), so every scan's ``H`` is a weighted sum
    of the fixed products ``b_t b_t^T`` and ``b_t b_{t+1}^T + b_{t+1} b_t^T``
    of basis rows: one matrix product for a whole block of scans.

    The band templates of the matched-filter scan enter through their
    coefficients ``c`` on the basis (least squares over the usable points,
    the same template :func:`_general_band_scan` tests). With ``L_ss`` the
    smooth block of ``L``, a template's smooth coordinates are ``L_ss^T c_s``,
    so ``<tau, y_s> = c_s^T (L_ss y_s)`` and
    ``|tau|**2 = c_s^T (H_ss - L_sg L_sg^T) c_s``: again one matrix product
    per block of scans, against fixed products of the coefficients.
    """

    points: NDArray[np.intp] | slice
    n_points: int
    basis: NDArray[np.float64]
    design_rank: int
    guard_rank: int
    smooth_rank: int
    rho: NDArray[np.float64]
    root: NDArray[np.float64]
    precision_diagonal: NDArray[np.float64]
    precision_off: NDArray[np.float64]
    products: NDArray[np.float64]  # (2 n_points - 1, r (r + 1) / 2), lower triangle row by row
    band_coefficients: NDArray[np.float64]  # (k, n_templates): the band templates on the smooth basis columns
    band_squares: NDArray[np.float64]  # (k (k + 1) / 2, n_templates): c_a c_b per smooth lower-triangle pair
    band_neighbours: NDArray[np.float64]  # (k (k + 1) / 2, n_templates - 1): the same for neighbouring templates
    smooth_pairs: NDArray[np.intp]  # positions of the smooth block's lower triangle in the packed Gram matrix

    @classmethod
    def build(
        cls, grid: NDArray[np.float64], design: NDArray[np.float64], basis: NDArray[np.float64], usable: NDArray[np.bool_],
        correlation_length_nm: float, templates: NDArray[np.float64],
    ) -> _PointGeometry | None:
        """The geometry of one point pattern; None when it has too few points for this path."""
        points = np.flatnonzero(usable)
        d, s = design[points], basis[points]
        if points.size <= d.shape[1] + s.shape[1]:
            return None
        # The smooth part of each design column over the usable points, as _smooth_projection.
        smooth = s @ (np.linalg.pinv(s.T @ s, hermitian=True) @ (s.T @ d))
        u_d, sv_d, _ = np.linalg.svd(d, full_matrices=False)
        design_rank = int(np.count_nonzero(sv_d > _RANK_TOL * np.linalg.norm(d)))
        guard = np.hstack([d, smooth])
        guard_rank = int(np.count_nonzero(np.linalg.svd(guard, compute_uv=False) > _RANK_TOL * np.linalg.norm(guard)))
        q_d = u_d[:, :design_rank]
        u_e = np.linalg.svd(smooth - q_d @ (q_d.T @ smooth), full_matrices=False)[0][:, : max(guard_rank - design_rank, 0)]
        q_g = np.hstack([q_d, u_e])
        u_f, sv_f, _ = np.linalg.svd(s - q_g @ (q_g.T @ s), full_matrices=False)
        smooth_rank = int(np.count_nonzero(sv_f**2 > _GRAM_TOL * np.einsum("wk,wk->", s, s)))
        nested = np.hstack([q_g, u_f[:, :smooth_rank]])
        rho = np.zeros(points.size)
        if correlation_length_nm > 0:
            rho[1:] = np.exp(-np.diff(grid[points]) / correlation_length_nm)
        c2 = 1.0 - rho**2
        diagonal = 1.0 / c2
        diagonal[:-1] += rho[1:] ** 2 / c2[1:]
        row, column = np.tril_indices(nested.shape[1])
        products = np.vstack([
            nested[:, row] * nested[:, column],
            nested[:-1, row] * nested[1:, column] + nested[1:, row] * nested[:-1, column],
        ])
        band = nested[:, q_g.shape[1] :].T @ templates[:, points].T
        a, b = np.tril_indices(smooth_rank)
        twice = np.where(a == b, 1.0, 2.0)[:, None]
        squares = twice * band[a] * band[b]
        neighbours = band[a, :-1] * band[b, 1:] + np.where(a == b, 0.0, 1.0)[:, None] * band[b, :-1] * band[a, 1:]
        g = q_g.shape[1]
        smooth_pairs = (a + g) * (a + g + 1) // 2 + b + g
        # A run of consecutive points is taken as a slice: no gathered copy of each block.
        span = slice(int(points[0]), int(points[-1]) + 1) if points[-1] - points[0] == points.size - 1 else points
        return cls(
            span, points.size, nested, design_rank, g, smooth_rank, rho, np.sqrt(c2), diagonal, -rho[1:] / c2[1:], products,
            band, squares, neighbours, smooth_pairs,
        )

    def _whiten(self, values: NDArray[np.float64], sd: NDArray[np.float64]) -> NDArray[np.float64]:
        """Prais-Winsten whitening of rows over the usable points (as :func:`_whiten`)."""
        z = values / sd
        out = np.empty_like(z)
        out[:, 0] = z[:, 0]
        # In place: temporaries of a block's size cost several times the arithmetic (fresh pages).
        linked = out[:, 1:]
        np.multiply(z[:, :-1], self.rho[1:], out=linked)
        np.subtract(z[:, 1:], linked, out=linked)
        linked /= self.root[1:]
        return out

    def energies(
        self, resid: NDArray[np.float64], fit: NDArray[np.float64], extra: NDArray[np.float64] | None, noise: NoiseModel
    ) -> tuple[NDArray[np.float64], ...] | None:
        """Energy off the design, smooth energy, Durbin-Watson numerator, largest band statistic and band-curve
        length (:func:`_band_scan_statistic`) of each scan; None if a Gram matrix is not positive definite.

        The Cholesky factor of ``[[H, g], [g^T, .]]`` with ``g = A^T w`` holds
        ``y = L^-1 g`` as its last row; it is computed for all scans at once,
        one column at a time.
        """
        p = self.points
        sd = noise.standard_deviation(fit[:, p])
        if extra is not None:
            sd = np.sqrt(sd**2 + extra[:, p])
        w = self._whiten(resid[:, p], sd)
        n_scans, n = w.shape
        inverse = 1.0 / sd
        weights = np.empty((n_scans, 2 * n - 1))
        np.square(inverse, out=weights[:, :n])
        weights[:, :n] *= self.precision_diagonal
        weights[:, n:] = self.precision_off * (inverse[:, :-1] * inverse[:, 1:])
        r = self.basis.shape[1]
        row, column = np.tril_indices(r)
        factor = np.zeros((n_scans, r + 1, r + 1))
        gram = weights @ self.products
        factor.reshape(n_scans, -1)[:, row * (r + 1) + column] = gram
        back = w / self.root  # W^T w = S^-1 L^T w, with L the bidiagonal AR(1) whitening
        ahead = self.rho[1:] * w[:, 1:]
        ahead /= self.root[1:]
        back[:, :-1] -= ahead
        factor[:, r, :r] = (back * inverse) @ self.basis
        for j in range(r):
            pivot = factor[:, j, j] - np.einsum("nk,nk->n", factor[:, j, :j], factor[:, j, :j])
            if not np.all(pivot > 0):
                return None
            factor[:, j, j] = np.sqrt(pivot)
            below = factor[:, j + 1 :, j] - np.einsum("nik,nk->ni", factor[:, j + 1 :, :j], factor[:, j, :j])
            factor[:, j + 1 :, j] = below / factor[:, j, j, None]
        y = factor[:, r, :r]
        k = self.design_rank
        if k:
            # Design coefficients of the whitened residual: back-substitution in the leading block.
            coefficients = np.empty((n_scans, k))
            for j in range(k - 1, -1, -1):
                coefficients[:, j] = (y[:, j] - np.einsum("nk,nk->n", factor[:, j + 1 : k, j], coefficients[:, j + 1 :])) / factor[:, j, j]
            w = w - self._whiten(coefficients @ self.basis[:, :k].T, sd)
        step = np.diff(w, axis=1)
        g = self.guard_rank
        smooth = y[:, g:]
        lower_ss = factor[:, g:r, g:r]
        # Smooth block of the Schur complement H / H_gg = L_ss L_ss^T, packed like the coefficient products.
        a, b = np.tril_indices(r - g)
        guard_part = factor[:, g:r, :g]
        schur = gram[:, self.smooth_pairs] - (guard_part @ guard_part.transpose(0, 2, 1))[:, a, b]
        largest, length = _band_scan_statistic(
            np.einsum("nab,nb->na", lower_ss, smooth) @ self.band_coefficients,
            schur @ self.band_squares, schur @ self.band_neighbours,
        )
        return (
            np.einsum("nt,nt->n", w, w), np.einsum("nk,nk->n", smooth, smooth), np.einsum("nt,nt->n", step, step), largest, length,
        )


_CONTROLLER: list[ThreadpoolController] = []


def _one_blas_thread() -> Any:
    """Limit BLAS to one thread (a context manager); the library lookup is made once per process."""
    if not _CONTROLLER:
        _CONTROLLER.append(ThreadpoolController())
    return _CONTROLLER[0].limit(limits=1, user_api="blas")


# --------------------------------------------------------------------------- screening


def screen_residuals(
    wavelengths: ArrayLike,
    residuals: ArrayLike,
    fitted: ArrayLike,
    design: ArrayLike,
    noise: NoiseModel,
    *,
    usable: ArrayLike | None = None,
    alpha: float = 0.05,
    smooth_terms: int | None = None,
    noise_tolerance: float = 1.5,
    omnibus_share: float = 0.1,
    band_share: float = 0.45,
    diagnose: bool = True,
    extra_variance: ArrayLike | None = None,
    null_scale: float = 1.0,
) -> Screening:
    """Test each scan's fit residual for structure the reference library does not explain.

    ``extra_variance`` (n_scans, n_wavelengths), optional, adds known variance
    to the noise model's at each point, e.g. the absorptivity uncertainty
    times the fitted concentrations, which the residual also holds.
    ``null_scale`` (>= 1) divides the smooth F statistic (and its square root
    the band statistic): an empirical correction of their null distribution,
    learned from scans known to be clean (the calibration standards, left out
    one at a time), for what the noise model cannot capture (an imperfect
    correlation length, noise in the library itself).

    The whitened residual (see :func:`prewhiten`) is projected off the whitened
    design, leaving ``m - rank`` degrees of freedom of pure noise when the
    library explains the scan (``m`` usable points). That space is split into a
    smooth subspace (the whitened cosine basis of :func:`smooth_basis`,
    orthogonalised against the design, ``k`` dimensions) and the rough rest.

    - Smooth F test: ``F = (Q_s / k) / (Q_r / (m - rank - k))`` follows
      F(k, m - rank - k) under the null whatever the noise model's overall scale,
      because both energies scale alike. Smooth interferents concentrate their
      energy in ``k`` dimensions instead of ``m``, hence the power.
    - Band scan (matched filter; Turin 1960): Gaussian bands as wide as the
      cosine basis resolves, centres a third of a width apart across the
      grid, each least-squares fitted on the design and cosines, whitened and
      projected like the residual. The statistic is the largest
      ``<tau_t, y> / |tau_t|`` (``y`` the residual's smooth coordinates),
      studentised by the rough part (so the noise scale cancels again) and
      divided by ``sqrt(null_scale)``. Its p-value is Rice's (1944) upcrossing
      bound for the maximum over the curve of templates (Hotelling 1939;
      Davies 1987; Knowles & Siegmund 1989),
      ``P(t_nu > c) + kappa / (2 pi) (1 + c**2 / nu) ** (-nu / 2)``, with
      ``kappa`` the curve's length on the unit sphere, found per scan; one
      sided, because absorbers add. It holds the rate at or below its level
      (measured: 4.3 % at 5 %).
    - Omnibus test: the whole whitened residual energy (the Q statistic of
      ASTM E1655-style residual checks, here exactly chi-square because whitened,
      so no Box (1954) or Jackson & Mudholkar (1979) approximation is needed)
      against ``noise_tolerance**2`` times chi-square(m - rank): it fires only
      when the residual is much larger than any plausible misestimate of the noise
      model, catching rough structure (spikes, narrow features) and noisy scans.
    - Combined p-value ``min(p_F / (1 - w_B - w_Q), p_B / w_B, p_Q / w_Q)`` with
      ``w_B = band_share`` and ``w_Q = omnibus_share`` (weighted Bonferroni):
      the false-alarm rate is at most ``alpha`` (measured about 0.8 ``alpha``
      with the noise model right, the F and band tests overlapping).

    The Durbin-Watson statistic (Durbin & Watson 1950) of the projected whitened
    residual is reported as a whiteness measure alongside, in the spirit of the
    Ljung-Box portmanteau check.

    Parameters
    ----------
    wavelengths : array_like, shape (n_wavelengths,)
        Increasing grid in nm.
    residuals : array_like, shape (n_scans, n_wavelengths)
        ``measured - fitted`` (NaN or ``usable=False`` at points left out of the fit).
    fitted : array_like, shape (n_scans, n_wavelengths)
        Fitted absorbance, the level the noise standard deviation is evaluated at.
    design : array_like, shape (n_wavelengths, p) or (n_scans, n_wavelengths, p)
        The matrix the fit used (absorptivity x path length, baseline columns).
        The residual must be ``measured - design @ beta`` for some ``beta``; the
        fitting method does not matter.
    noise : NoiseModel
        Instrument noise (floor > 0). Its overall scale may be off; its
        correlation length should be right (see docs/screening.md).
    usable : array_like of bool, shape (n_scans, n_wavelengths), optional
        Points the fit used.
    alpha : float, default 0.05
        False-alarm rate.
    smooth_terms : int, optional
        Size of the cosine basis; default one term per 15 nm of range (4 to 40).
    noise_tolerance : float, default 1.5
        Noise-scale error the omnibus test forgives.
    omnibus_share : float, default 0.1
        Share of ``alpha`` spent on the omnibus test (0 < share < 1).
    band_share : float, default 0.45
        Share of ``alpha`` spent on the band scan (0 < share < 1 - omnibus_share);
        the F test takes the rest.
    diagnose : bool, default True
        Whether to match the shapes of flagged scans' residuals.

    Returns
    -------
    Screening

    Examples
    --------
    >>> import numpy as np
    >>> from absolve.library import NoiseModel
    >>> grid = np.arange(400.0, 701.0)
    >>> design = np.column_stack([np.exp(-0.5 * ((grid - 520) / 30) ** 2), np.ones_like(grid)])
    >>> noise = NoiseModel(0.002, 0.0, 0.0)
    >>> rng = np.random.default_rng(0)
    >>> residual = 0.002 * rng.standard_normal((1, grid.size))
    >>> bump = 0.01 * np.exp(-0.5 * ((grid - 600) / 8) ** 2)
    >>> result = screen_residuals(grid, np.vstack([residual, residual + bump]), np.zeros((2, grid.size)), design, noise)
    >>> result.flagged.tolist(), result.diagnoses[1].kind
    ([False, True], 'foreign-band')
    """
    alpha = _check_alpha(alpha)
    if not (isinstance(noise_tolerance, (int, float)) and noise_tolerance >= 1.0):
        raise AbsolveError(f"noise_tolerance must be a number >= 1, got {noise_tolerance!r}")
    if not (np.isfinite(null_scale) and null_scale >= 1.0):
        raise AbsolveError(f"null_scale must be a finite number >= 1, got {null_scale!r}")
    if not (isinstance(omnibus_share, (int, float)) and 0.0 < omnibus_share < 1.0):
        raise AbsolveError(f"omnibus_share must be strictly between 0 and 1, got {omnibus_share!r}")
    if not (isinstance(band_share, (int, float)) and 0.0 < band_share < 1.0 - omnibus_share):
        raise AbsolveError(
            f"band_share must be above 0 and below 1 - omnibus_share ({1.0 - omnibus_share:g}), got {band_share!r}",
            fix="the smooth F test takes what the two shares leave of alpha",
        )
    grid = _check_grid(wavelengths)
    noise = _check_noise(noise)
    resid = _as_float("residuals", residuals, 2)
    fit = _as_float("fitted", fitted, 2)
    if resid.shape[1] != grid.size or fit.shape != resid.shape:
        raise AbsolveError(
            f"residuals {resid.shape} and fitted {fit.shape} must both be (n_scans, {grid.size})",
            fix="give one row per scan on the wavelength grid",
        )
    n_scans = resid.shape[0]
    x = _check_design(design, n_scans, grid.size)
    mask = _usable_points(usable, resid.shape, resid, fit)
    terms = _default_terms(grid, x.shape[2]) if smooth_terms is None else smooth_terms
    basis = smooth_basis(grid, terms)
    extra = None if extra_variance is None else _as_float("extra_variance", extra_variance, 2)
    if extra is not None and (extra.shape != resid.shape or np.any(extra[mask] < 0)):
        raise AbsolveError(f"extra_variance must be (n_scans, {grid.size}) and >= 0, got shape {extra.shape}")

    # A stack of identical designs is a shared one: the same subspaces, and the bulk path.
    shared_design = x.strides[0] == 0 or bool(np.all(x == x[:1]))
    templates = _band_templates(grid, terms)
    sums = _energies(grid, resid, fit, x, mask, basis, noise, extra, shared_design, templates)

    smooth_dof = sums.smooth_dof
    rough_dof = sums.total_dof - smooth_dof
    testable = (rough_dof >= _MIN_ROUGH_DOF) & (smooth_dof >= 1)
    rough_energy = np.maximum(sums.energy - sums.smooth_energy, 0.0)
    smooth_share = 1.0 - omnibus_share - band_share
    with np.errstate(divide="ignore", invalid="ignore"):
        noise_ratio = np.where(testable, np.sqrt(rough_energy / rough_dof), np.nan)
        statistic = np.where(testable, (sums.smooth_energy / smooth_dof) / (rough_energy / rough_dof), np.nan) / null_scale
        smooth_p = np.where(testable, scipy.special.fdtrc(smooth_dof, rough_dof, statistic), np.nan)
        # The same null correction as the F ratio's, on the scale of a standard deviation.
        band_statistic = sums.band_largest / (noise_ratio * np.sqrt(null_scale))
        band_p = np.where(testable, _band_scan_p(band_statistic, sums.band_length, rough_dof), np.nan)
        omnibus_p = np.where(testable, scipy.special.chdtrc(sums.total_dof, sums.energy / noise_tolerance**2), np.nan)
        durbin_watson = np.where(testable, sums.dw_numerator / sums.energy, np.nan)
    p_value = np.minimum(1.0, np.minimum.reduce([smooth_p / smooth_share, band_p / band_share, omnibus_p / omnibus_share]))
    flagged = testable & (p_value < alpha)
    smooth_found = (smooth_p < smooth_share * alpha) | (band_p < band_share * alpha)

    diagnoses: list[Diagnosis | None] = [None] * n_scans
    if diagnose and flagged.any():
        fixed = _fixed_families(grid)
        # One thread limit around the whole loop: setting it looks up the BLAS libraries (milliseconds a time).
        with _one_blas_thread():
            rows = np.flatnonzero(flagged)
            # The flagged scans' subspaces are made a block at a time; each diagnosis takes its scan's share.
            for start in range(0, rows.size, _DIAGNOSIS_BLOCK):
                block = rows[start : start + _DIAGNOSIS_BLOCK]
                sub = _subspaces(grid, resid[block], fit[block], x[block], mask[block], basis, noise, None if extra is None else extra[block])
                for i, diagnosis in zip(block.tolist(), _diagnose_block(grid, fit[block], sub, smooth_found[block], fixed), strict=True):
                    diagnoses[i] = diagnosis
    method = (
        f"whitened smooth-subspace F test ({terms} cosine terms) + matched-filter band scan + omnibus chi-square at "
        f"{noise_tolerance:g}x modelled noise, weighted Bonferroni ({smooth_share:g}/{band_share:g}/{omnibus_share:g})"
    )
    return Screening(
        statistic=statistic,
        p_value=p_value,
        flagged=flagged,
        alpha=alpha,
        method=method,
        diagnoses=tuple(diagnoses),
        smooth_p=smooth_p,
        omnibus_p=omnibus_p,
        noise_ratio=noise_ratio,
        durbin_watson=durbin_watson,
        smooth_dof=smooth_dof,
        rough_dof=rough_dof,
        band_p=band_p,
    )


# --------------------------------------------------------------------------- library bias from a batch


def _bias_minimum(n_components: int) -> int:
    """Default fewest scans for the batch estimate: 20 plus 5 per component (common practice, no source)."""
    return 20 + 5 * n_components


def estimate_library_bias(
    residuals: ArrayLike,
    coefficients: ArrayLike,
    usable: ArrayLike | None = None,
    *,
    exclude: ArrayLike | None = None,
    min_scans: int | None = None,
) -> LibraryBias:
    """Estimate the library's fixed absorptivity error from a batch's residuals, and remove it.

    A library learned from noisy standards carries absorptivity errors
    ``dK`` that are the same for every scan of a batch. A clean scan's residual
    then holds ``-dK.T @ c_i`` (as far as the fit does not absorb it) besides
    noise: a fixed shape times the scan's concentrations, which the screen
    may take for an interferent. Across the batch, each wavelength's residuals
    are regressed by ordinary least squares on the fitted coefficients plus an
    intercept,

    ``r_i(lam) = a(lam) + b(lam) @ c_i + e_i(lam)``,

    over the scans where the point is usable, and ``b(lam) @ c_i`` is
    subtracted. The intercept ``a`` (what every scan shares whatever its
    concentrations, e.g. a contaminated solvent) is estimated so that it does
    not leak into ``b``, and kept in the residual. Each scan in the estimate
    is corrected with the estimate made without it (the deleted-residual
    identity ``b_(-i) = b - (G^-1 x_i e_i / (1 - h_i))_c``), so a scan's own
    interferent is not subtracted from it through its leverage.

    What it cannot tell apart: an interferent present in many scans in
    proportion to one component (an impure dye lot) has exactly the shape of a
    library error and is removed with it (docs/screening.md measures this).
    Interferents in a minority of scans pull on the estimate; screen the
    corrected residuals, then estimate again with the flagged scans in
    ``exclude`` and screen those residuals (see Examples).

    The correction's own noise is common to the scans it corrects; it is
    left out (``estimated`` False) where it would add more than a quarter
    of a typical scan's noise variance (``added_noise``), which happens
    when the concentrations vary too little across the batch for the
    library's error to be told from a shape common to every scan.

    Parameters
    ----------
    residuals : array_like, shape (n_scans, n_wavelengths)
        ``measured - fitted`` of every scan of the batch (NaN at unused points).
    coefficients : array_like, shape (n_scans, n_components)
        The fitted coefficients of the library's columns in the design (the
        concentrations before any dilution factor). Scans with a non-finite
        coefficient are left out of the estimate and not corrected.
    usable : array_like of bool, shape (n_scans, n_wavelengths), optional
        Points the fit used; NaN residuals are left out as well.
    exclude : array_like of bool, shape (n_scans,), optional
        Scans kept out of the estimate (e.g. flagged by a first screen); they
        are still corrected, with the estimate from the others.
    min_scans : int, optional
        Fewest scans a wavelength's estimate may use; default ``20 + 5 *
        n_components``. Below it the wavelength is left uncorrected; with no
        wavelength left, ``applied`` is False and ``message`` says why.

    Returns
    -------
    LibraryBias

    Examples
    --------
    Two passes around the screen (quantities as for :func:`screen_residuals`):

    >>> import numpy as np
    >>> rng = np.random.default_rng(0)
    >>> grid = np.arange(400.0, 501.0)
    >>> conc = rng.uniform(1.0, 10.0, (60, 2))
    >>> error = np.vstack([np.sin(grid / 9.0), np.cos(grid / 7.0)]).T * 1e-3   # (n_wavelengths, 2)
    >>> residuals = conc @ error.T + 1e-4 * rng.standard_normal((60, grid.size))
    >>> first = estimate_library_bias(residuals, conc)
    >>> bool(np.allclose(first.bias, error, atol=2e-5)), first.applied
    (True, True)
    >>> # flagged = screen_residuals(grid, first.corrected, fitted, design, noise).flagged
    >>> # final = estimate_library_bias(residuals, conc, exclude=flagged).corrected
    """
    resid = _as_float("residuals", residuals, 2)
    coef = _as_float("coefficients", coefficients, 2)
    n_scans, n_wl = resid.shape
    if coef.shape[0] != n_scans or coef.shape[1] < 1:
        raise AbsolveError(
            f"coefficients {coef.shape} must be (n_scans, n_components) with n_scans = {n_scans} (one row per residual)",
            fix="give the fitted coefficients of the library's columns, one row per scan",
        )
    n_comp = coef.shape[1]
    fitted_rows = np.all(np.isfinite(coef), axis=1)
    mask = _usable_points(usable, resid.shape, resid) & fitted_rows[:, None]
    if exclude is None:
        left_out = np.zeros(n_scans, dtype=bool)
    else:
        left_out = np.asarray(exclude)
        if left_out.shape != (n_scans,) or left_out.dtype != np.bool_:
            raise AbsolveError(f"exclude must be a boolean array of shape ({n_scans},), got {left_out.dtype} {left_out.shape}")
    need = _bias_minimum(n_comp) if min_scans is None else min_scans
    if isinstance(need, bool) or not isinstance(need, (int, np.integer)) or need < n_comp + 2:
        raise AbsolveError(
            f"The 'min_scans' parameter of estimate_library_bias must be an integer >= {n_comp + 2}; got {min_scans!r} instead.",
            fix=f"leave it out for the default {_bias_minimum(n_comp)}",
        )
    need = int(need)
    inside = mask & ~left_out[:, None]
    n_used = np.count_nonzero(inside, axis=0)

    # Columns scaled to unit root-mean-square so the Gram matrices are well scaled in any concentration unit.
    values = np.where(fitted_rows[:, None], coef, 0.0)
    in_rows = fitted_rows & ~left_out
    scale = np.sqrt(np.mean(values[in_rows] ** 2, axis=0)) if in_rows.any() else np.ones(n_comp)
    scale = np.where(scale > 0, scale, 1.0)
    x = np.column_stack([np.ones(n_scans), values / scale])
    n_cols = n_comp + 1
    weight = inside.astype(np.float64)
    gram = (weight.T @ (x[:, :, None] * x[:, None, :]).reshape(n_scans, n_cols * n_cols)).reshape(n_wl, n_cols, n_cols)
    moment = np.where(inside, resid, 0.0).T @ x
    # Pseudo-inverse: a component absent from the whole batch (coefficient 0 throughout) gets no bias.
    inverse = np.linalg.pinv(gram, rcond=_RANK_TOL, hermitian=True)
    beta = np.einsum("wpq,wq->wp", inverse, moment)

    corrected = resid.copy()
    added = np.full((n_scans, n_wl), np.nan)
    correction = np.zeros((n_scans, n_wl))
    for start in range(0, n_scans, _BLOCK):
        rows = slice(start, start + _BLOCK)
        xb, inside_b = x[rows], inside[rows]
        projected = np.einsum("wpq,iq->iwp", inverse, xb)  # G^-1 x_i at every wavelength
        leverage = np.einsum("iwp,ip->iw", projected, xb)
        added_b = np.einsum("iwk,ik->iw", projected[:, :, 1:] - inverse[None, :, 1:, 0], xb[:, 1:])
        added[rows] = np.where(inside_b, added_b, np.nan)
        own = resid[rows] - np.einsum("wp,ip->iw", beta, xb)
        with np.errstate(divide="ignore", invalid="ignore"):
            loo = np.einsum("iwk,ik->iw", projected[:, :, 1:], xb[:, 1:]) * own / (1.0 - leverage)
        part = xb[:, 1:] @ beta[:, 1:].T
        # A scan that alone determines a wavelength's estimate (leverage 1) has no leave-one-out estimate there.
        lone = inside_b & ~(leverage < 1.0 - 1e-9)
        correction[rows] = np.where(lone, 0.0, part - np.where(inside_b & ~lone, loo, 0.0))
    typical = np.full(n_wl, np.nan)
    reached = n_used > 0  # a median over no scan would warn
    typical[reached] = np.nanmedian(added[:, reached], axis=0)
    estimated = (n_used >= need) & np.isfinite(typical) & (typical <= _BIAS_MAX_ADDED_NOISE)
    apply = mask & estimated[None, :]
    corrected[apply] = resid[apply] - correction[apply]
    bias = np.where(estimated[:, None], beta[:, 1:] / scale, 0.0)
    common = np.where(estimated, beta[:, 0], 0.0)

    n_in = int(np.count_nonzero(in_rows))
    if estimated.any():
        message = (
            f"library bias estimated from {n_in} scans and removed at {int(estimated.sum())} of {n_wl} wavelengths"
        )
    elif n_used.max(initial=0) < need:
        message = (
            f"library bias not estimated: {int(n_used.max(initial=0))} scans in the estimate at most, "
            f"at least {need} needed for {n_comp} component(s)"
        )
    else:
        message = (
            "library bias not estimated: the concentrations vary too little across the batch to tell "
            "the library's error from a residual common to every scan"
        )
    return LibraryBias(
        bias=bias, common=common, n_used=n_used.astype(np.int64), estimated=estimated,
        added_noise=np.where(estimated, typical, np.nan), corrected=corrected,
        applied=bool(estimated.any()), message=message, min_scans=need,
    )


# --------------------------------------------------------------------------- diagnosis


@dataclass(frozen=True)
class _Family:
    """Candidate shapes of one kind: ``shapes`` (n_shapes, n_wl), their parameters, and the sign rule.

    A block of scans holds the shapes made from each scan as one family, ``shapes`` (n_scans, n_shapes, n_wl).
    """

    kind: str
    shapes: NDArray[np.float64]
    parameters: Mapping[str, NDArray]
    positive: bool


def _fixed_families(grid: NDArray[np.float64]) -> list[_Family]:
    """Shapes that do not depend on the scan: Gaussian bands on a grid of centres and widths, power-law scattering.

    Made once per grid (a batch screened in blocks asks for the same ones each time); read-only.
    """
    return _fixed_families_on(grid.tobytes())


@functools.lru_cache(maxsize=4)
def _fixed_families_on(grid_bytes: bytes) -> list[_Family]:
    grid = np.frombuffer(grid_bytes, dtype=np.float64)
    span = grid[-1] - grid[0]
    step = max(float(np.median(np.diff(grid))), span / 150.0)
    centres = np.arange(grid[0], grid[-1] + 0.5 * step, step)
    widths = np.array([w for w in _BAND_WIDTHS_NM if w <= span / 3.0] or [span / 6.0])
    c, w = (a.ravel() for a in np.meshgrid(centres, widths, indexing="ij"))
    bands = np.exp(-0.5 * ((grid[None, :] - c[:, None]) / w[:, None]) ** 2)
    exponents = np.array(_SCATTER_EXPONENTS)
    scatter = (grid[None, :] / grid[0]) ** (-exponents[:, None])
    for array in (bands, scatter, c, w, exponents):
        array.flags.writeable = False
    return [
        _Family("foreign-band", bands, {"center_nm": c, "width_nm": w}, True),
        _Family("scatter", scatter, {"exponent": exponents}, True),
    ]


def _scan_families(grid: NDArray[np.float64], fitted: NDArray[np.float64]) -> list[_Family]:
    """Shapes built from the fitted absorbance: wavelength shift and high-absorbance shortfall.

    ``fitted`` is one scan's, shape (n_wl,), giving shapes (n_shapes, n_wl), or a
    block's, (n_scans, n_wl), giving shapes (n_scans, n_shapes, n_wl).
    """
    level = np.clip(fitted, 0.0, None)
    # A shift of +d nm (features at longer wavelengths than the library) turns A(x) into A(x - d) ~ A - d A'.
    shift = -np.gradient(fitted, grid, axis=-1)[..., None, :]
    shortfall = np.stack([-(level**2), -(10.0**level - 1.0) / np.log(10.0)], axis=-2)
    return [
        _Family("wavelength-shift", shift, {}, False),
        _Family("nonlinearity", shortfall, {"shape": np.array(["quadratic", "stray-light"])}, True),
    ]


def _whiten_adjoint(
    g: NDArray[np.float64], sd: NDArray[np.float64], rho: NDArray[np.float64], previous: NDArray[np.intp],
    linked: NDArray[np.bool_], mask: NDArray[np.bool_],
) -> NDArray[np.float64]:
    """``W.T @ g`` for each scan's whitening matrix W, g of shape (n, n_wl, k).

    Whitening many templates ``t`` and taking coordinates ``G.T @ W @ t`` is the
    same as ``(W.T @ G).T @ t``: one pass over the k basis vectors instead of one
    per template.
    """
    root = np.sqrt(1.0 - rho**2)
    out = np.where(mask[..., None], g / (sd * root)[..., None], 0.0)
    scans = np.arange(g.shape[0])[:, None]
    # Row j of W is 1 / (sd_j root_j) at j and -rho_j / (root_j sd_b) at the usable point b before it,
    # so point b also takes a share of g at the point linked back to it, its successor (at most one).
    # Gathered by (scan, point) pairs, whole rows of k at a time: scattering into out costs more.
    scan, j = np.nonzero(linked)
    successor = np.zeros(previous.shape, dtype=np.intp)
    successor[scan, previous[scan, j]] = j
    followed = np.zeros(previous.shape, dtype=bool)
    followed[scan, previous[scan, j]] = True
    weight = rho / (root * sd[scans, previous])
    share = weight[scans, successor][..., None] * g[scans, successor]
    np.subtract(out, share, out=out, where=followed[..., None])
    return out


def _half_window(grid: NDArray[np.float64], profile: NDArray[np.float64]) -> tuple[float, float, float, float]:
    """Peak position, signed peak value and the contiguous half-maximum window around it."""
    size = np.abs(np.nan_to_num(profile))
    peak = int(np.argmax(size))
    below = size < 0.5 * size[peak]
    left, right = np.flatnonzero(below[:peak]), np.flatnonzero(below[peak + 1 :])
    lo = int(left[-1]) + 1 if left.size else 0
    hi = peak + int(right[0]) if right.size else grid.size - 1
    return float(grid[peak]), float(profile[peak]), float(grid[lo]), float(grid[hi])


def _confidence(share: float, evidence: float) -> Confidence:
    """How sure the shape match is: by the share it explains and its evidence over the runner-up.

    Evidence 10 is a likelihood ratio of about 150 to 1, 4 about 7 to 1. The
    thresholds were set so that, on simulated scans, "high" names the right
    kind at least 95 % of the time and "moderate" at least 80 % (docs/screening.md).
    """
    if share >= _HIGH[0] and evidence >= _HIGH[1]:
        return "high"
    if share >= _MODERATE[0] and evidence >= _MODERATE[1]:
        return "moderate"
    return "low"


@dataclass(frozen=True)
class _Match:
    kind: str
    explained: float  # whitened energy the best shape of the family explains
    null_explained: float  # what the best shape would explain of pure noise, on average
    amplitude: float
    amplitude_se: float
    shape: NDArray[np.float64]
    detail: dict[str, float | str]


def _match(
    family: _Family, tau: NDArray[np.float64], coords: NDArray[np.float64], noise_var: NDArray[np.float64],
    null_draws: NDArray[np.float64],
) -> list[_Match]:
    """Best shape of a family in each scan's smooth unexplained subspace (least squares, one amplitude).

    ``tau`` (n_scans, k, n_shapes) holds the coordinates of the whitened shapes,
    one column each, in each scan's orthonormal basis, that ``coords``
    (n_scans, k) and ``null_draws`` (n_scans, n_draws, k) are given in;
    ``noise_var`` (n_scans,) is each scan's noise variance. ``family.shapes``
    is (n_shapes, n_wl), or (n_scans, n_shapes, n_wl) for shapes made from each scan.
    Every scan's numbers are computed as for that scan alone; the block only
    spares the per-scan calls.
    """
    n_scans, n_draws = null_draws.shape[:2]
    norm2 = np.einsum("nks,nks->ns", tau, tau)
    valid = norm2 > _RANK_TOL * np.maximum(norm2.max(axis=1), np.finfo(float).tiny)[:, None]
    scale = np.where(valid, 1.0 / np.sqrt(np.where(valid, norm2, 1.0)), 0.0)
    z = (coords[:, None, :] @ tau)[:, 0] * scale  # signed amplitude z-score of each shape (in units of the noise sd)
    # The largest squared z-score of each null draw is the square of its largest z (clipped at 0 for
    # one-signed families) or of its smallest: no need to square the whole draws x shapes table.
    # A few scans' tables at a time, each a few MB at most.
    null_best = np.empty((n_scans, n_draws))
    step = max(1, _NULL_TABLE // (n_draws * tau.shape[2]))
    for start in range(0, n_scans, step):
        part = slice(start, start + step)
        z_null = null_draws[part] @ (tau[part] * scale[part, None, :])
        top = np.maximum(z_null.max(axis=2), 0.0)
        null_best[part] = top**2 if family.positive else np.maximum(top, -z_null.min(axis=2)) ** 2
    null_explained = np.mean(null_best, axis=1)
    if family.positive:
        z = np.maximum(z, 0.0)
    rows = np.arange(n_scans)
    best = np.argmax(z**2, axis=1)
    z_best, scale_best = z[rows, best], scale[rows, best]
    amplitude = np.where(valid[rows, best], z_best * scale_best, 0.0)
    se = np.sqrt(noise_var) * scale_best
    matches = []
    for i, b in enumerate(best.tolist()):
        detail = {name: (str(v[b]) if v.dtype.kind in "US" else float(v[b])) for name, v in family.parameters.items()}
        if family.kind == "wavelength-shift":
            detail.update(shift_nm=float(amplitude[i]), shift_se_nm=float(se[i]))
        shape = family.shapes[b] if family.shapes.ndim == 2 else family.shapes[i, b]
        matches.append(
            _Match(family.kind, float(z_best[i] ** 2), float(null_explained[i]), float(amplitude[i]), float(se[i]), shape, detail)
        )
    return matches


@functools.lru_cache(maxsize=8)
def _null_points(n_points: int) -> NDArray[np.float64]:
    """200 fixed draws of white noise on ``n_points`` points (made once per length: a batch has few)."""
    draws = np.random.default_rng(0).standard_normal((200, n_points))
    draws.flags.writeable = False
    return draws


def _diagnose_block(
    grid: NDArray[np.float64], fitted: NDArray[np.float64], sub: _Subspaces, smooth_found: NDArray[np.bool_],
    fixed: list[_Family],
) -> list[Diagnosis]:
    """Diagnoses of a block of flagged scans (``fitted`` and ``smooth_found`` one row per scan of ``sub``).

    A shape's coordinates in a scan's smooth subspace are ``adjoint.T @ shape``
    (:func:`_whiten_adjoint`); those of the fixed shapes come from one matrix
    product for the whole block, and the null draws' from another: per scan the
    products are too narrow (a few dozen columns) for BLAS to run near its speed.
    Each family is matched for the whole block at once (:func:`_match`).
    """
    bases = sub.smooth_orthonormal()
    adjoints = _whiten_adjoint(bases, sub.sd, sub.rho, sub.previous, sub.linked, sub.mask)
    n_scans, n_wl, k = bases.shape
    stacked = np.vstack([family.shapes for family in fixed])
    fixed_tau = (adjoints.transpose(0, 2, 1).reshape(n_scans * k, n_wl) @ stacked.T).reshape(n_scans, k, -1)
    edges = np.cumsum([0] + [family.shapes.shape[0] for family in fixed])
    null_points = _null_points(n_wl)
    null_basis = (null_points @ bases.transpose(1, 0, 2).reshape(n_wl, n_scans * k)).reshape(-1, n_scans, k)
    filled = np.array([np.interp(grid, grid[mask], row[mask]) for row, mask in zip(fitted, sub.mask, strict=True)])
    scan_families = _scan_families(grid, filled)
    scan_shapes = np.concatenate([family.shapes for family in scan_families], axis=1)
    scan_tau = adjoints.transpose(0, 2, 1) @ scan_shapes.transpose(0, 2, 1)
    scan_edges = np.cumsum([0] + [family.shapes.shape[1] for family in scan_families])
    singles = [sub.one(i) for i in range(n_scans)]
    smooth_noise = [_smooth_and_noise(single) for single in singles]
    noise_var = np.array([variance for _, variance in smooth_noise])
    # Fixed pseudo-random draws keep the result reproducible; they only set the look-elsewhere penalty.
    # Drawn per point and projected, so that they do not depend on how the smooth basis happens to be
    # rotated (which varies with the other scans it was made with).
    null_draws = null_basis.transpose(1, 0, 2) * np.sqrt(noise_var)[:, None, None]
    taus = [fixed_tau[:, :, a:b] for a, b in zip(edges[:-1], edges[1:])]
    taus += [scan_tau[:, :, a:b] for a, b in zip(scan_edges[:-1], scan_edges[1:])]
    matches = [
        _match(family, tau, sub.coords, noise_var, null_draws)
        for family, tau in zip(fixed + scan_families, taus, strict=True)
    ]
    return [
        _diagnose(grid, singles[i], bases[i], [found[i] for found in matches], *smooth_noise[i], bool(smooth_found[i]))
        for i in range(n_scans)
    ]


def _smooth_and_noise(sub: _Subspaces) -> tuple[float, float]:
    """Smooth energy of one scan's whitened residual, and its noise variance measured on the rough part.

    Measured on the rough part, a noise-model scale error cancels.
    """
    u, coords = sub.residual[0], sub.coords[0]
    smooth_energy = float(coords @ coords)
    rough_dof = int(sub.mask[0].sum() - sub.design_rank[0] - sub.smooth_rank[0])
    return smooth_energy, max(float(u @ u) - smooth_energy, 0.0) / max(rough_dof, 1)


def _diagnose(
    grid: NDArray[np.float64], sub: _Subspaces, basis: NDArray[np.float64], matches: list[_Match],
    smooth_energy: float, noise_var: float, smooth_found: bool,
) -> Diagnosis:
    """Name the shape family that best matches the smooth unexplained residual of one scan.

    ``basis`` (n_wl, k) is the scan's smooth orthonormal basis, ``matches`` the
    best shape of each family (:func:`_match`), ``smooth_energy`` and
    ``noise_var`` as :func:`_smooth_and_noise` gives them.
    """
    mask = sub.mask[0]
    smooth_residual = _unwhiten(basis @ sub.coords[0], sub.sd[0], sub.rho[0], mask)
    # Penalise each family by what its best shape explains of pure noise, so flexible families do not win on noise.
    ranked = sorted(matches, key=lambda m: m.explained - m.null_explained, reverse=True)
    best, runner = ranked[0], ranked[1]
    share = best.explained / smooth_energy if smooth_energy > 0 else 0.0
    runner_share = runner.explained / smooth_energy if smooth_energy > 0 else 0.0
    z = best.amplitude / best.amplitude_se if best.amplitude_se > 0 else 0.0
    margin = (best.explained - best.null_explained) - (runner.explained - runner.null_explained)
    evidence = margin / noise_var if noise_var > 0 else float("inf")
    peak_nm, residual_peak, lo, hi = _half_window(grid, smooth_residual)

    if not smooth_found or share < 0.5:
        value = residual_peak
        what = (
            "The residual is larger than the noise model allows but has no smooth shape: "
            "a spike, a narrow feature, or a noisier scan than the instrument's usual"
            if not smooth_found
            else f"The library leaves smooth structure unexplained, largest {value:+.2g} absorbance near "
            f"{peak_nm:.0f} nm ({lo:.0f}-{hi:.0f} nm), but it matches none of the usual shapes well "
            f"(best: {_FAMILY_WORDS[best.kind]}, {share:.0%} of it)"
        )
        return Diagnosis(
            kind="unclassified", window_nm=(lo, hi), peak_nm=peak_nm, size_absorbance=value,
            residual_absorbance=residual_peak, confidence="low", share=share, runner_up=best.kind,
            runner_up_share=share, amplitude_z=abs(z), evidence=evidence, detail={}, message=what + ".",
        )

    profile = np.where(mask, best.amplitude * best.shape, np.nan)
    if best.kind == "scatter":
        # Offset and scattering amplitude trade off against each other (a free offset absorbs the flat
        # part), so only the rise across the range is well determined: report that.
        profile = profile - profile[np.flatnonzero(mask)[-1]]
    peak_nm, value, lo, hi = _half_window(grid, profile)
    confidence = _confidence(share, evidence)
    sureness = {"high": "high confidence", "moderate": "moderate confidence", "low": "low confidence, a best guess"}
    d = best.detail
    lead_in = {
        "foreign-band": f"An absorber the library does not hold seems present: a band near {d.get('center_nm', peak_nm):.0f} nm "
        f"({lo:.0f}-{hi:.0f} nm) adding up to {value:.2g} absorbance",
        "scatter": f"A smooth rise toward short wavelengths, as turbidity or scattering gives (about lambda^-"
        f"{d.get('exponent', 4.0):g}), of about {value:.2g} absorbance from {grid[mask][-1]:.0f} to {peak_nm:.0f} nm",
        "wavelength-shift": f"The scan looks shifted by {d.get('shift_nm', 0.0):+.2f} ± {d.get('shift_se_nm', 0.0):.2f} nm "
        f"against the library's wavelength scale (largest effect {value:+.2g} absorbance near {peak_nm:.0f} nm)",
        "nonlinearity": f"The scan falls short of the library where absorbance is highest (up to {abs(value):.2g} "
        f"absorbance near {peak_nm:.0f} nm), as stray light or concentrations beyond the linear range do",
    }[best.kind]
    message = (
        f"{lead_in}; this shape explains {share:.0%} of the unexplained smooth residual "
        f"(next: {_FAMILY_WORDS[runner.kind]}, {runner_share:.0%}) — {sureness[confidence]}."
    )
    return Diagnosis(
        kind=best.kind,  # type: ignore[arg-type]
        window_nm=(lo, hi), peak_nm=peak_nm, size_absorbance=value, residual_absorbance=residual_peak,
        confidence=confidence, share=share, runner_up=runner.kind, runner_up_share=runner_share,
        amplitude_z=abs(z), evidence=evidence, detail=best.detail, message=message,
    )


# --------------------------------------------------------------------------- suspects


def explain_with_suspects(
    wavelengths: ArrayLike,
    measured: ArrayLike,
    design: ArrayLike,
    nonnegative: ArrayLike,
    candidates: ArrayLike,
    candidate_names: Sequence[str],
    noise: NoiseModel,
    *,
    usable: ArrayLike | None = None,
    alpha: float = 0.05,
    smooth_terms: int | None = None,
) -> SuspectReport:
    """Refit each scan with each suspect absorber added, and test whether it explains the residual.

    The fit is done in whitened space (see :func:`prewhiten`, noise level from a
    first unweighted fit), so the residual sums of squares are comparable and
    the extra-sum-of-squares statistic
    ``F = (RSS_0 - RSS_1) / (RSS_1 / (m - rank))`` is a proper nested-model test
    under the correlated, heteroscedastic noise, free of the noise model's
    overall scale. The suspect's amount is constrained to be >= 0, so under the
    null it sits on the boundary half of the time and the null distribution is
    the equal mixture of 0 and F(1, m - rank) (Self & Liang 1987): the p-value is
    ``0.5 * F.sf`` when the amount is positive and 1 when it is zero.

    Parameters
    ----------
    wavelengths : array_like, shape (n_wavelengths,)
        Increasing grid in nm.
    measured : array_like, shape (n_scans, n_wavelengths)
        Measured absorbance (NaN at unusable points).
    design : array_like, shape (n_wavelengths, p) or (n_scans, n_wavelengths, p)
        The library design (absorptivity x path length, baseline columns).
    nonnegative : array_like of bool, shape (p,)
        Which design columns are constrained to be >= 0 (components), the rest
        free (baseline terms).
    candidates : array_like, shape (n_candidates, n_wavelengths)
        Suspect spectra, absorbance per unit amount on this grid (e.g. absorptivity
        x path length, so amounts come out as concentrations).
    candidate_names : sequence of str, length n_candidates
        Their names.
    noise : NoiseModel
        Instrument noise (floor > 0).
    usable : array_like of bool, shape (n_scans, n_wavelengths), optional
        Points to fit.
    alpha : float, default 0.05
        Significance level for naming the best suspect (Bonferroni over suspects)
        and for the screen of what remains.
    smooth_terms : int, optional
        Passed to :func:`screen_residuals` for the remaining-structure screen.

    Returns
    -------
    SuspectReport
    """
    import scipy.optimize  # only for suspects: kept out of the import of every command

    alpha = _check_alpha(alpha)
    grid = _check_grid(wavelengths)
    noise = _check_noise(noise)
    y = _as_float("measured", measured, 2)
    if y.shape[1] != grid.size:
        raise AbsolveError(f"measured has {y.shape[1]} wavelengths, the grid {grid.size}")
    n_scans = y.shape[0]
    x = _check_design(design, n_scans, grid.size)
    p = x.shape[2]
    constrained = np.asarray(nonnegative)
    if constrained.shape != (p,) or constrained.dtype != np.bool_:
        raise AbsolveError(f"nonnegative must be a boolean array with one entry per design column ({p})")
    suspects = _as_float("candidates", candidates, (1, 2))
    suspects = suspects.reshape(1, -1) if suspects.ndim == 1 else suspects
    names = tuple(str(n) for n in candidate_names)
    if suspects.shape[1] != grid.size or len(names) != suspects.shape[0] or len(set(names)) != len(names):
        raise AbsolveError(
            f"candidates {suspects.shape} need {grid.size} wavelengths and one unique name each (got {len(names)})"
        )
    if not np.all(np.isfinite(suspects)):
        raise AbsolveError("candidate spectra hold NaN or infinite values", fix="restrict them to their valid range")
    mask = _usable_points(usable, y.shape, y)
    n_cand = suspects.shape[0]
    lower = np.where(constrained, 0.0, -np.inf)

    # A first unweighted fit only sets the absorbance level the noise sd is evaluated at.
    level = np.empty_like(y)
    for i in range(n_scans):
        rows = mask[i]
        first = scipy.optimize.lsq_linear(x[i, rows], y[i, rows], bounds=(lower, np.inf), method="bvls")
        level[i] = x[i] @ first.x
    rho, previous, _ = _ar_links(grid, mask, noise.correlation_length_nm)
    sd = _noise_sd(noise, level, mask)
    wy = _whiten(y, sd, mask, rho, previous)
    wx = _whiten(x, sd, mask, rho, previous)
    wc = _whiten(np.broadcast_to(suspects.T, (n_scans,) + suspects.T.shape), sd, mask, rho, previous)

    amount = np.full((n_scans, n_cand), np.nan)
    amount_se = np.full((n_scans, n_cand), np.nan)
    f_stat = np.full((n_scans, n_cand), np.nan)
    p_value = np.full((n_scans, n_cand), np.nan)
    coefficients = np.zeros((n_scans, n_cand, p + 1))
    base_coefficients = np.zeros((n_scans, p))
    extended_lower = np.append(lower, 0.0)
    for i in range(n_scans):
        rows = mask[i]
        a, b = wx[i, rows], wy[i, rows]
        base = scipy.optimize.lsq_linear(a, b, bounds=(lower, np.inf), method="bvls")
        base_coefficients[i] = base.x
        rss0 = float(np.sum((a @ base.x - b) ** 2))
        for j in range(n_cand):
            aj = np.column_stack([a, wc[i, rows, j]])
            fit = scipy.optimize.lsq_linear(aj, b, bounds=(extended_lower, np.inf), method="bvls")
            dof = int(rows.sum() - np.linalg.matrix_rank(aj))
            if dof < 1:
                continue
            rss1 = float(np.sum((aj @ fit.x - b) ** 2))
            sigma2 = rss1 / dof
            free = fit.active_mask == 0
            free[-1] = True
            covariance = sigma2 * np.linalg.pinv(aj[:, free].T @ aj[:, free])
            coefficients[i, j] = fit.x
            amount[i, j] = fit.x[-1]
            amount_se[i, j] = float(np.sqrt(covariance[-1, -1]))
            f_stat[i, j] = max(rss0 - rss1, 0.0) / sigma2
            p_value[i, j] = 0.5 * scipy.special.fdtrc(1, dof, f_stat[i, j]) if fit.x[-1] > 0 else 1.0

    with np.errstate(invalid="ignore"):
        top = np.argmax(np.nan_to_num(f_stat, nan=-1.0), axis=1)
    best_p = np.minimum(1.0, n_cand * p_value[np.arange(n_scans), top])
    best = np.where(best_p < alpha, top, -1)
    # What remains: refit with the best suspect (when one is significant) and screen the residual.
    column = np.where((best >= 0)[:, None], suspects[np.maximum(best, 0)], 0.0)
    extended = np.concatenate([x, column[:, :, None]], axis=2)
    chosen = np.where((best >= 0)[:, None], coefficients[np.arange(n_scans), np.maximum(best, 0)], 0.0)
    chosen[:, :p] = np.where((best >= 0)[:, None], chosen[:, :p], base_coefficients)
    fitted = np.einsum("nwp,np->nw", extended, chosen)
    remaining = screen_residuals(
        grid, y - fitted, fitted, extended, noise, usable=mask, alpha=alpha, smooth_terms=smooth_terms
    )
    return SuspectReport(
        candidate_names=names,
        amount=amount,
        amount_se=amount_se,
        f_statistic=f_stat,
        p_value=p_value,
        best=best.astype(np.int64),
        best_p=best_p,
        remaining=remaining,
        alpha=alpha,
    )
