"""Result types of the interferent screen, one frozen dataclass per result.

:class:`Screening` (the tests of each scan), :class:`Diagnosis` (the shape of one flagged scan's
residual), :class:`SuspectReport` (refits with suspects) and :class:`LibraryBias` (a batch's
estimate of the library's error).
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field
from typing import Any, Literal

import numpy as np
import scipy.special
from numpy.typing import NDArray

DiagnosisKind = Literal["foreign-band", "scatter", "wavelength-shift", "nonlinearity", "unclassified"]
Confidence = Literal["high", "moderate", "low"]

# A flagged count whose binomial upper tail at alpha is below this is 'far more than chance'.
_EXCESS_P = 1e-3


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
