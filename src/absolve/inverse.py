"""Inverse calibration with partial least squares (PLS), for when a library cannot be built.

Classical (library) quantification needs the pure spectrum of every absorber
in the sample. Inverse calibration does not: it learns concentration directly
from whole scans of mixed standards, so it works when only mixture standards
exist, and when an absorber that is not quantified (a matrix colour, turbidity,
a degradation product) is always present and varies: as long as the training
scans span that variation, the model learns to ignore it.

Design choices
--------------
One PLS1 model per component, not one PLS2 model for all.
    Components differ in how hard they are to predict (a component whose band
    sits under two others needs more latent variables than an isolated one),
    and PLS2 forces one compromise number of latent variables on all of them;
    separate PLS1 models let cross-validation choose each component's own
    complexity and keep a poorly predicted component from degrading the
    others. The price is one score space per component, so the spectral
    outlier checks (Q residual, Hotelling T^2) are computed in one shared
    principal-component model of the training spectra instead (below).
Cross-validation folds: venetian blinds over standards.
    Scans with identical concentration rows are replicates of one standard and
    always share a fold (splitting them would let the model see the held-out
    solution and make RMSECV optimistic). Standards, in order of first
    appearance, go to folds 0, 1, ..., K-1, 0, 1, ... Standards are often
    scanned as a rising series; venetian blinds spread every fold over the
    whole design, whereas contiguous blocks would hold out the top or bottom
    of the range and measure extrapolation instead of prediction. With fewer
    standards than folds, each standard is its own fold (leave one standard
    out).
Number of latent variables: the one-standard-error rule.
    The smallest number of latent variables whose cross-validated mean squared
    error lies within one standard error (across folds) of the minimum
    (Hastie, Tibshirani & Friedman, The Elements of Statistical Learning, 2nd
    ed., 2009, section 7.10). It protects against over-fitting as the van der
    Voet (1994) randomisation test does, at no extra cost.
Preprocessing.
    The spectra are always mean-centred (the PLS model has an intercept:
    without it, a background absorber's average contribution would have to be
    modelled by a latent variable); optionally a Savitzky-Golay first or
    second derivative (scipy.signal.savgol_filter, polynomial order 2 or 3)
    removes constant or sloping baselines. Derivatives need an even grid, so
    an uneven training grid is first resampled onto an even one.
Spectral diagnostics from a principal-component model.
    A principal-component model of the preprocessed training spectra, with as
    many components as the most complex PLS1 model, gives one Q residual and
    one Hotelling T^2 per scan with the limits of Jackson & Mudholkar (1979)
    and of the F distribution. A scan beyond either limit is unlike the
    training scans and its concentrations are not to be trusted. Both limits
    assume normally distributed, equally noisy scans: the Q limit uses the
    training residual eigenvalues rescaled by (n - 1) / (n - 1 - A) because
    training residuals understate new-scan residuals; with noise growing with
    absorbance, simulation shows about twice the nominal false-alarm rate.
Prediction uncertainty.
    s_pred = RMSECV * sqrt(1 + h), with h the leverage of the scan in the
    component's PLS1 model including the 1/n of mean-centring (ASTM E1655
    and Olivieri et al., Pure Appl. Chem. 78 (2006) 633, formula from
    memory). RMSECV rather than RMSEC because RMSEC is fitted to the training
    noise and understates the error on new scans.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass, field
from typing import Any, Literal, get_args

import numpy as np
from numpy.typing import ArrayLike, NDArray
from scipy import stats
from scipy.signal import savgol_filter

from .errors import AbsolveError
from .residual_limits import q_limit
from .spectra import Spectra
from .units import check_unit

__all__ = [
    "ComponentModel",
    "CrossValidation",
    "Derivative",
    "InverseModel",
    "InversePrediction",
    "SpectralCheck",
    "hotelling_t2_limit",
    "q_residual_limit",
]

Derivative = Literal["none", "first", "second"]
DERIVATIVES: tuple[str, ...] = get_args(Derivative)
# Savitzky-Golay polynomial order per derivative: one above the derivative
# keeps band shapes while smoothing (common practice, no source).
_POLYORDER = {"none": 0, "first": 2, "second": 3}
_DERIVATIVE_ORDER = {"none": 0, "first": 1, "second": 2}
# Upper bound on latent variables tried when none is given: UV-Vis mixtures of
# up to five absorbers plus backgrounds rarely need more (common practice, no source).
_DEFAULT_MAX_COMPONENTS = 10
# Smallest Savitzky-Golay window: the filter needs more points than its
# polynomial order (3 at most here), and an odd window keeps it centred.
_MIN_WINDOW = 5
# Relative spacing tolerance under which a grid counts as even.
_EVEN_GRID_RTOL = 1e-6

FloatArray = NDArray[np.float64]


def _is_integer(value: object) -> bool:
    return isinstance(value, (int, np.integer)) and not isinstance(value, bool)


def _settings_error(parameter: str, expected: str, got: object, fix: str) -> AbsolveError:
    return AbsolveError(f"The {parameter!r} parameter of InverseModel must be {expected}. Got {got!r} instead.", fix=fix)


def q_residual_limit(residual_eigenvalues: ArrayLike, alpha: float) -> float:
    """Upper limit of the Q residual (squared prediction error) at level ``alpha``.

    Jackson & Mudholkar's (1979) approximation (:func:`absolve.residual_limits.q_limit`).
    When ``h0 = 1 - 2 theta1 theta3 / (3 theta2^2) <= 0`` (one residual
    eigenvalue dominates many small ones) that approximation overstates the
    limit, and Box's (1954) scaled chi-squared ``g chi2(h)`` with
    ``g = theta2 / theta1``, ``h = theta1^2 / theta2`` is used instead (as by
    Nomikos & MacGregor, Technometrics 37 (1995) 41; from memory); ``theta_k``
    is the sum of the k-th powers of the eigenvalues.

    Parameters
    ----------
    residual_eigenvalues : array_like, shape (m,)
        Eigenvalues of the covariance of the training residuals (variances of
        the principal components left out of the model).
    alpha : float
        False-alarm probability, e.g. 0.01.

    Returns
    -------
    float
        The limit, in the units of Q (squared preprocessed absorbance).
    """
    lam = np.asarray(residual_eigenvalues, dtype=np.float64)
    theta1, theta2, theta3 = (float(np.sum(lam**power)) for power in (1, 2, 3))
    h0 = 1.0 - 2.0 * theta1 * theta3 / (3.0 * theta2**2)
    return float(q_limit(lam, alpha, method="jackson-mudholkar" if h0 > 0 else "box"))


def hotelling_t2_limit(n_components: int, n_samples: int, alpha: float) -> float:
    """Upper limit of Hotelling's T^2 for a new observation at level ``alpha``.

    T2_lim = A (n - 1)(n + 1) / (n (n - A)) F_{1-alpha}(A, n - A), for a new
    observation scored against a mean and covariance estimated from n training
    observations (Tracy, Young & Mason, J. Quality Technology 24 (1992) 88;
    Jackson, A User's Guide to Principal Components, 1991; from memory).

    Parameters
    ----------
    n_components : int
        A, the number of principal components.
    n_samples : int
        n, the number of training scans (n > A).
    alpha : float
        False-alarm probability.
    """
    a, n = int(n_components), int(n_samples)
    factor = a * (n - 1) * (n + 1) / (n * (n - a))
    return float(factor * stats.f.ppf(1.0 - alpha, a, n - a))


def preprocess(values: FloatArray, derivative: str, window: int, step_nm: float) -> FloatArray:
    """Apply the derivative preprocessing to rows of absorbance on an even grid.

    Parameters
    ----------
    values : ndarray, shape (n_scans, n_wavelengths)
        Absorbance per cm.
    derivative : {"none", "first", "second"}
        Savitzky-Golay derivative order.
    window : int
        Savitzky-Golay window in grid points (odd).
    step_nm : float
        Grid spacing, so derivatives are per nm.

    Returns
    -------
    ndarray, shape (n_scans, n_wavelengths)
        A new array; ``values`` is not modified.
    """
    if derivative == "none":
        return np.array(values, dtype=np.float64)
    return savgol_filter(
        values, window, _POLYORDER[derivative], deriv=_DERIVATIVE_ORDER[derivative], delta=step_nm, axis=1, mode="interp"
    )


@dataclass(frozen=True, eq=False)
class ComponentModel:
    """The PLS1 model of one component.

    Attributes
    ----------
    name : str
        Component name.
    latent_variables : int
        A, the number of latent variables chosen by cross-validation.
    coefficients : ndarray, shape (n_wavelengths,)
        Regression vector b: concentration = (x - x_mean) @ b + intercept.
    intercept : float
        Mean training concentration.
    x_weights, x_loadings, x_rotations : ndarray, shape (n_wavelengths, A)
        PLS weights W, loadings P and rotations R = W (P^T W)^-1 (scores t = (x - x_mean) @ R).
    y_loadings : ndarray, shape (A,)
        Concentration loadings q.
    score_sum_squares : ndarray, shape (A,)
        Sum of squared training scores per latent variable (PLS scores are
        orthogonal, so this is the diagonal of T^T T), for the leverage.
    rmsec, rmsecv : float
        Root mean squared error of calibration (with n - A - 1 degrees of
        freedom) and of cross-validation, in the model's unit.
    training_range : tuple of float
        Lowest and highest training concentration.
    """

    name: str
    latent_variables: int
    coefficients: FloatArray
    intercept: float
    x_weights: FloatArray
    x_loadings: FloatArray
    x_rotations: FloatArray
    y_loadings: FloatArray
    score_sum_squares: FloatArray
    rmsec: float
    rmsecv: float
    training_range: tuple[float, float]


@dataclass(frozen=True, eq=False)
class CrossValidation:
    """The cross-validation table behind the choice of latent variables.

    Attributes
    ----------
    folds : int
        Number of folds actually used (at most one per standard).
    fold_of_scan : ndarray of int, shape (n_training,)
        Fold each training scan was held out in.
    rmsecv : ndarray, shape (n_components, max_latent + 1)
        RMSECV for 0 (predict the mean), 1, ..., max_latent latent variables.
    mse_standard_error : ndarray, shape (n_components, max_latent + 1)
        Standard error of the cross-validated mean squared error across folds.
    chosen : ndarray of int, shape (n_components,)
        Latent variables chosen per component (one-standard-error rule).
    """

    folds: int
    fold_of_scan: NDArray[np.int64]
    rmsecv: FloatArray
    mse_standard_error: FloatArray
    chosen: NDArray[np.int64]

    @property
    def latent_variables(self) -> NDArray[np.int64]:
        """The numbers of latent variables tried, 0 ... max_latent."""
        return np.arange(self.rmsecv.shape[1])


@dataclass(frozen=True, eq=False)
class SpectralCheck:
    """Principal-component model of the training spectra for the Q and T^2 checks.

    Attributes
    ----------
    loadings : ndarray, shape (n_wavelengths, A)
        Orthonormal principal directions of the preprocessed, centred training spectra.
    eigenvalues : ndarray, shape (A,)
        Variances of the training scores along ``loadings``.
    residual_eigenvalues : ndarray, shape (m,)
        Variances of the left-out principal components of the training scans.
        The Q limit uses them times (n - 1) / (n - 1 - A), see the module notes.
    alpha : float
        False-alarm probability of each limit.
    n_training : int
        Number of training scans.
    q_limit, t2_limit : float
        Limits from :func:`q_residual_limit` and :func:`hotelling_t2_limit`.
    """

    loadings: FloatArray
    eigenvalues: FloatArray
    residual_eigenvalues: FloatArray
    alpha: float
    n_training: int
    q_limit: float
    t2_limit: float


def _json_float(value: float) -> float | None:
    return float(value) if np.isfinite(value) else None


@dataclass(frozen=True, eq=False)
class InversePrediction:
    """Concentrations predicted by an :class:`InverseModel`, with diagnostics.

    Attributes
    ----------
    names : tuple of str
        Scan names, length n_scans.
    components : tuple of str
        Component names, length n_components.
    unit : str
        Concentration unit.
    concentration : ndarray, shape (n_scans, n_components)
        Predicted concentrations (not clipped at zero; NaN for incomplete scans).
    std_uncertainty : ndarray, shape (n_scans, n_components)
        Approximate standard uncertainty RMSECV * sqrt(1 + h).
    leverage : ndarray, shape (n_scans, n_components)
        h of each scan in each component's PLS1 model (including 1/n).
    q_residual : ndarray, shape (n_scans,)
        Squared distance of the preprocessed scan from the training principal-component model.
    q_limit : float
        Upper limit of ``q_residual`` at level ``alpha`` (Jackson & Mudholkar 1979).
    hotelling_t2 : ndarray, shape (n_scans,)
        Hotelling T^2 of the scan in the training principal-component model.
    t2_limit : float
        Upper limit of ``hotelling_t2`` at level ``alpha`` (F distribution).
    outside : ndarray of bool, shape (n_scans,)
        Scan beyond the Q or T^2 limit, or incomplete: unlike the training scans.
    beyond_range : ndarray of bool, shape (n_scans, n_components)
        Predicted concentration outside the training range (extrapolation), or not finite.
    complete : ndarray of bool, shape (n_scans,)
        False when the scan has unusable (saturated) points on the model grid;
        its results are NaN.
    latent_variables : tuple of int
        Latent variables of each component's model.
    alpha : float
        False-alarm probability of each limit.
    """

    names: tuple[str, ...]
    components: tuple[str, ...]
    unit: str
    concentration: FloatArray
    std_uncertainty: FloatArray
    leverage: FloatArray
    q_residual: FloatArray
    q_limit: float
    hotelling_t2: FloatArray
    t2_limit: float
    outside: NDArray[np.bool_]
    beyond_range: NDArray[np.bool_]
    complete: NDArray[np.bool_]
    latent_variables: tuple[int, ...]
    alpha: float
    uncertainty_basis: str = field(default="RMSECV * sqrt(1 + leverage)")

    def summary(self) -> dict[str, Any]:
        """JSON-safe summary: one entry per scan with per-component values, plus the limits."""
        scans = []
        for i, name in enumerate(self.names):
            scans.append(
                {
                    "scan": name,
                    "concentration": {c: _json_float(self.concentration[i, j]) for j, c in enumerate(self.components)},
                    "std_uncertainty": {c: _json_float(self.std_uncertainty[i, j]) for j, c in enumerate(self.components)},
                    "beyond_range": {c: bool(self.beyond_range[i, j]) for j, c in enumerate(self.components)},
                    "q_residual": _json_float(self.q_residual[i]),
                    "hotelling_t2": _json_float(self.hotelling_t2[i]),
                    "outside": bool(self.outside[i]),
                    "complete": bool(self.complete[i]),
                }
            )
        return {
            "method": "PLS1 per component",
            "unit": self.unit,
            "components": list(self.components),
            "latent_variables": dict(zip(self.components, self.latent_variables)),
            "uncertainty_basis": self.uncertainty_basis,
            "alpha": self.alpha,
            "q_limit": self.q_limit,
            "t2_limit": self.t2_limit,
            "scans": scans,
        }

    def report(self) -> str:
        """Plain-text table: one line per scan with concentrations +- uncertainties and flags."""
        lines = [
            f"PLS prediction ({self.unit}); limits at alpha = {self.alpha:g}: "
            f"Q <= {self.q_limit:.4g}, T2 <= {self.t2_limit:.4g}"
        ]
        for i, name in enumerate(self.names):
            parts = []
            for j, component in enumerate(self.components):
                mark = " (beyond training range)" if self.beyond_range[i, j] else ""
                parts.append(f"{component} {self.concentration[i, j]:.4g} +- {self.std_uncertainty[i, j]:.2g}{mark}")
            flag = ""
            if not self.complete[i]:
                flag = "  UNUSABLE POINTS"
            elif self.outside[i]:
                flag = "  UNLIKE TRAINING SCANS"
            lines.append(
                f"{name}: " + "; ".join(parts) + f"  [Q {self.q_residual[i]:.3g}, T2 {self.hotelling_t2[i]:.3g}]{flag}"
            )
        return "\n".join(lines)


class InverseModel:
    """PLS inverse calibration: concentrations learned from scans of mixed standards.

    Parameters
    ----------
    derivative : {"none", "first", "second"}, default "none"
        Savitzky-Golay derivative applied before the PLS models.
    window : int, default 11
        Savitzky-Golay window in grid points (odd; used with a derivative only).
    max_components : int or None, default None
        Most latent variables tried in cross-validation. None: up to 10, fewer
        when the training set is small.
    folds : int, default 10
        Cross-validation folds (venetian blinds over standards; at most one per standard).
    alpha : float, default 0.01
        False-alarm probability of the Q and T^2 limits. Two checks at 0.01
        flag about 2 % of scans that do resemble the training scans.
    wavelength_range : tuple of float or None, default None
        Restrict the model to (low, high) nm, e.g. to leave out saturated points.

    Attributes
    ----------
    wavelengths_ : ndarray, shape (n_wavelengths,)
        Model grid in nm; scans are interpolated onto it.
    components_ : tuple of str
        Component names.
    unit_ : str
        Concentration unit.
    x_mean_ : ndarray, shape (n_wavelengths,)
        Mean preprocessed training spectrum (per cm).
    component_models_ : tuple of ComponentModel
        One PLS1 model per component.
    cv_ : CrossValidation
        Cross-validation table.
    diagnostics_ : SpectralCheck
        Principal-component model and limits for the Q and T^2 checks.
    training_names_ : tuple of str
        Training scan names.
    provenance_ : dict
        JSON-safe record of where the model came from.

    Examples
    --------
    >>> model = InverseModel(derivative="first").fit(spectra, conc, ["red", "blue"], "mg/L")  # doctest: +SKIP
    >>> model.predict(samples).concentration  # doctest: +SKIP
    """

    def __init__(
        self,
        *,
        derivative: Derivative = "none",
        window: int = 11,
        max_components: int | None = None,
        folds: int = 10,
        alpha: float = 0.01,
        wavelength_range: tuple[float, float] | None = None,
    ) -> None:
        self.derivative = derivative
        self.window = window
        self.max_components = max_components
        self.folds = folds
        self.alpha = alpha
        self.wavelength_range = wavelength_range

    def get_params(self) -> dict[str, Any]:
        """The settings given to ``__init__``."""
        return {
            "derivative": self.derivative,
            "window": self.window,
            "max_components": self.max_components,
            "folds": self.folds,
            "alpha": self.alpha,
            "wavelength_range": self.wavelength_range,
        }

    # ------------------------------------------------------------------ checks
    def _check_settings(self) -> None:
        if self.derivative not in DERIVATIVES:
            raise _settings_error("derivative", "one of " + ", ".join(DERIVATIVES), self.derivative, "use --derivative none, first or second")
        if self.derivative != "none" and not (_is_integer(self.window) and self.window >= _MIN_WINDOW and self.window % 2 == 1):
            raise _settings_error("window", f"an odd integer >= {_MIN_WINDOW}", self.window, "give an odd --window such as 11")
        if self.max_components is not None and not (_is_integer(self.max_components) and self.max_components >= 1):
            raise _settings_error("max_components", "an integer >= 1", self.max_components, "give --max-components 1 or more")
        if not (_is_integer(self.folds) and self.folds >= 2):
            raise _settings_error("folds", "an integer >= 2", self.folds, "give --folds 2 or more")
        if not (isinstance(self.alpha, (float, int)) and not isinstance(self.alpha, bool) and 0 < self.alpha < 0.5):
            raise _settings_error("alpha", "a number between 0 and 0.5", self.alpha, "use e.g. 0.01")
        if self.wavelength_range is not None:
            span = np.asarray(self.wavelength_range, dtype=object).reshape(-1)
            numeric = span.size == 2 and all(isinstance(v, (float, int)) and np.isfinite(v) for v in span)
            if not (numeric and span[0] < span[1]):
                raise _settings_error("wavelength_range", "(low, high) in nm with low < high", self.wavelength_range, "give --range LOW:HIGH")

    def _is_fitted(self) -> bool:
        return hasattr(self, "component_models_")

    def _require_fitted(self) -> None:
        if not self._is_fitted():
            raise AbsolveError("this InverseModel has not been trained", fix="call fit() or load a model file first")

    # ------------------------------------------------------------------ learned views
    @property
    def coef_(self) -> FloatArray:
        """Regression vectors, shape (n_components, n_wavelengths)."""
        self._require_fitted()
        return np.vstack([m.coefficients for m in self.component_models_])

    @property
    def intercept_(self) -> FloatArray:
        """Intercepts, shape (n_components,)."""
        self._require_fitted()
        return np.array([m.intercept for m in self.component_models_])

    @property
    def n_latent_(self) -> NDArray[np.int64]:
        """Latent variables per component, shape (n_components,)."""
        self._require_fitted()
        return np.array([m.latent_variables for m in self.component_models_], dtype=np.int64)

    # ------------------------------------------------------------------ fit
    def _model_grid(self, spectra: Spectra) -> FloatArray:
        grid = spectra.wavelengths
        if self.derivative == "none" or grid.size < 3:
            return np.array(grid)
        steps = np.diff(grid)
        step = float(np.median(steps))
        if np.all(np.abs(steps - step) <= _EVEN_GRID_RTOL * step):
            return np.array(grid)
        count = int(round((grid[-1] - grid[0]) / step)) + 1
        return np.linspace(grid[0], grid[-1], count)

    def _absorbance_per_cm(self, spectra: Spectra, path_length_cm: ArrayLike) -> FloatArray:
        """Absorbance per cm on the model grid, shape (n_scans, n_wavelengths)."""
        scans = spectra.to_absorbance().interpolate(self.wavelengths_)
        path = np.broadcast_to(np.asarray(path_length_cm, dtype=np.float64), (scans.n_scans,))
        if not np.all(np.isfinite(path) & (path > 0)):
            raise AbsolveError(
                f"path length must be a positive number of cm for every scan; got {path[~(np.isfinite(path) & (path > 0))][0]!r}",
                fix="check the path_length_cm values",
                file=spectra.source,
            )
        return scans.values / path[:, None]

    def _step_nm(self) -> float:
        grid = self.wavelengths_
        return float((grid[-1] - grid[0]) / (grid.size - 1)) if grid.size > 1 else 1.0

    def fit(
        self,
        spectra: Spectra,
        concentrations: ArrayLike,
        components: Sequence[str],
        unit: str,
        *,
        path_length_cm: ArrayLike = 1.0,
    ) -> InverseModel:
        """Train one PLS1 model per component on scans of standards.

        Parameters
        ----------
        spectra : Spectra
            Training scans (converted to absorbance), n_scans of them.
        concentrations : array_like, shape (n_scans, n_components)
            Concentration of each component in each measured solution, in ``unit``.
            Components not quantified (backgrounds) are simply left out.
        components : sequence of str, length n_components
            Component names.
        unit : str
            Concentration unit (see :mod:`absolve.units`).
        path_length_cm : float or array_like, shape (n_scans,), default 1.0
            Cell path length of each scan; the model works in absorbance per cm.

        Returns
        -------
        InverseModel
            ``self``, trained.
        """
        self._check_settings()
        unit_name = check_unit(unit)
        names = tuple(str(c) for c in components)
        y = np.array(concentrations, dtype=np.float64)
        where = spectra.source or "training scans"
        if y.ndim == 1:
            y = y.reshape(-1, 1)
        if y.shape != (spectra.n_scans, len(names)):
            raise AbsolveError(
                f"{where}: concentrations of shape {y.shape} do not match {spectra.n_scans} scans x {len(names)} components",
                fix="give one concentration per scan and component",
            )
        if not names or len(set(names)) != len(names):
            raise AbsolveError("component names must be present and unique", fix="name every component once")
        if not np.all(np.isfinite(y)) or np.any(y < 0):
            raise AbsolveError("concentrations must be finite numbers >= 0", fix="check the concentration table")
        constant = [names[j] for j in range(len(names)) if np.ptp(y[:, j]) == 0]
        if constant:
            raise AbsolveError(
                f"component {constant[0]!r} has the same concentration in every training scan, so nothing can be learned about it",
                fix="train on standards in which every component's concentration varies",
            )
        scans = spectra.to_absorbance()
        if self.wavelength_range is not None:
            scans = scans.restrict(*self.wavelength_range)
        self.wavelengths_ = self._model_grid(scans)
        absorbance = self._absorbance_per_cm(scans, path_length_cm)
        bad = ~np.all(np.isfinite(absorbance), axis=1)
        if bad.any():
            row = int(np.argmax(bad))
            column = int(np.argmax(~np.isfinite(absorbance[row])))
            raise AbsolveError(
                f"{where}: training scan {scans.names[row]!r} has an unusable (saturated) point near "
                f"{self.wavelengths_[column]:g} nm",
                fix="restrict the wavelength range (--range) to usable points, or leave the scan out",
            )
        if self.derivative != "none" and self.window > absorbance.shape[1]:
            raise _settings_error("window", f"at most the {absorbance.shape[1]} grid points", self.window, "use a smaller --window")
        x = preprocess(absorbance, self.derivative, self.window, self._step_nm())

        fold, n_folds = _assign_folds(y, self.folds)
        if n_folds < 3:
            raise AbsolveError(
                f"{where}: only {n_folds} distinct standards; cross-validation needs at least 3",
                fix="train on more standards with different concentrations",
            )
        smallest_train = int(y.shape[0] - np.bincount(fold).max())
        allowed = min(smallest_train - 1, x.shape[1])
        if self.max_components is not None and self.max_components > allowed:
            raise _settings_error(
                "max_components",
                f"at most {allowed} with {y.shape[0]} training scans in {n_folds} folds",
                self.max_components,
                "lower --max-components or add standards",
            )
        max_lv = self.max_components if self.max_components is not None else min(_DEFAULT_MAX_COMPONENTS, allowed)
        if max_lv < 1:
            raise AbsolveError(f"{where}: too few training scans for cross-validation", fix="add standards")

        mse, se = _cross_validate(x, y, fold, n_folds, max_lv)
        chosen = np.array([_one_standard_error(mse[j], se[j]) for j in range(len(names))], dtype=np.int64)
        self.x_mean_ = x.mean(axis=0)
        self.component_models_ = tuple(
            _fit_component(x, y[:, j], names[j], int(chosen[j]), float(np.sqrt(mse[j, chosen[j]]))) for j in range(len(names))
        )
        self.cv_ = CrossValidation(n_folds, fold, np.sqrt(mse), se, chosen)
        self.diagnostics_ = _spectral_check(x - self.x_mean_, int(chosen.max()), self.alpha)
        self.components_ = names
        self.unit_ = unit_name
        self.training_names_ = scans.names
        self.provenance_ = {"training_source": spectra.source}
        return self

    # ------------------------------------------------------------------ predict
    def predict(self, spectra: Spectra, *, path_length_cm: ArrayLike = 1.0) -> InversePrediction:
        """Predict concentrations of scans, with uncertainties and outlier checks.

        Scans on another grid are interpolated onto the model grid (inside
        their own range only: a model grid not covered by the scans is an
        error).

        Parameters
        ----------
        spectra : Spectra
            Scans to quantify.
        path_length_cm : float or array_like, shape (n_scans,), default 1.0
            Cell path length of each scan.

        Returns
        -------
        InversePrediction
        """
        self._require_fitted()
        absorbance = self._absorbance_per_cm(spectra, path_length_cm)
        complete = np.all(np.isfinite(absorbance), axis=1)
        x = preprocess(absorbance, self.derivative, self.window, self._step_nm())
        centred = x - self.x_mean_
        concentration = centred @ self.coef_.T + self.intercept_
        n_train = self.diagnostics_.n_training
        leverage = np.column_stack(
            [1.0 / n_train + ((centred @ m.x_rotations) ** 2 / m.score_sum_squares).sum(axis=1) for m in self.component_models_]
        )
        rmsecv = np.array([m.rmsecv for m in self.component_models_])
        check = self.diagnostics_
        # A hand-edited model can overflow here; the non-finite results are flagged below, not warned about.
        with np.errstate(over="ignore", invalid="ignore"):
            scores = centred @ check.loadings
            t2 = (scores**2 / check.eigenvalues).sum(axis=1)
            q = ((centred - scores @ check.loadings.T) ** 2).sum(axis=1)
        low = np.array([m.training_range[0] for m in self.component_models_])
        high = np.array([m.training_range[1] for m in self.component_models_])
        with np.errstate(invalid="ignore"):
            outside = ~complete | (q > check.q_limit) | (t2 > check.t2_limit)
            # A complete scan with a non-finite prediction (a model file edited to absurd numbers) is
            # flagged with the extrapolations, so that no result table shows a bare empty cell for it.
            beyond = (concentration < low) | (concentration > high) | (complete[:, None] & ~np.isfinite(concentration))
        return InversePrediction(
            names=spectra.names,
            components=self.components_,
            unit=self.unit_,
            concentration=concentration,
            std_uncertainty=rmsecv * np.sqrt(1.0 + leverage),
            leverage=leverage,
            q_residual=q,
            q_limit=check.q_limit,
            hotelling_t2=t2,
            t2_limit=check.t2_limit,
            outside=outside,
            beyond_range=beyond,
            complete=complete,
            latent_variables=tuple(int(a) for a in self.n_latent_),
            alpha=check.alpha,
        )

    # ------------------------------------------------------------------ views
    def summary(self) -> dict[str, Any]:
        """JSON-safe summary: settings, per-component model quality and the RMSECV curves."""
        self._require_fitted()
        return {
            "method": "PLS1 per component",
            "settings": {**self.get_params(), "wavelength_range": None if self.wavelength_range is None else list(self.wavelength_range)},
            "unit": self.unit_,
            "wavelength_range_nm": [float(self.wavelengths_[0]), float(self.wavelengths_[-1])],
            "n_wavelengths": int(self.wavelengths_.size),
            "n_training": self.diagnostics_.n_training,
            "folds": self.cv_.folds,
            "components": [
                {
                    "component": m.name,
                    "latent_variables": m.latent_variables,
                    "rmsec": m.rmsec,
                    "rmsecv": m.rmsecv,
                    "training_range": list(m.training_range),
                    "rmsecv_curve": self.cv_.rmsecv[j].tolist(),
                }
                for j, m in enumerate(self.component_models_)
            ],
            "q_limit": self.diagnostics_.q_limit,
            "t2_limit": self.diagnostics_.t2_limit,
            "alpha": self.diagnostics_.alpha,
        }

    def report(self) -> str:
        """Plain text: the RMSECV curve per component (chosen point starred) and the model quality."""
        self._require_fitted()
        cv = self.cv_
        width = max(12, *(len(c) + 2 for c in self.components_))
        lines = [
            f"RMSECV ({self.unit_}) by number of latent variables, {cv.folds} folds "
            "(* chosen: fewest within one standard error of the minimum)",
            "LV".rjust(3) + "".join(c.rjust(width) for c in self.components_),
        ]
        for a in cv.latent_variables:
            cells = "".join(
                (f"{cv.rmsecv[j, a]:.4g}" + ("*" if cv.chosen[j] == a else " ")).rjust(width) for j in range(len(self.components_))
            )
            lines.append(f"{a:>3}" + cells)
        lines.append("")
        for m in self.component_models_:
            lines.append(
                f"{m.name}: {m.latent_variables} latent variables, RMSEC {m.rmsec:.4g}, RMSECV {m.rmsecv:.4g} {self.unit_}, "
                f"trained on {m.training_range[0]:.4g}-{m.training_range[1]:.4g} {self.unit_}"
            )
        check = self.diagnostics_
        lines.append(
            f"spectral checks: {check.loadings.shape[1]} principal components, Q limit {check.q_limit:.4g}, "
            f"T2 limit {check.t2_limit:.4g} (alpha {check.alpha:g}); {check.n_training} training scans, "
            f"{self.wavelengths_[0]:g}-{self.wavelengths_[-1]:g} nm, derivative {self.derivative}"
        )
        return "\n".join(lines)


# ---------------------------------------------------------------------- helpers
def _assign_folds(concentrations: FloatArray, folds: int) -> tuple[NDArray[np.int64], int]:
    """Venetian-blind folds over standards (identical concentration rows share a fold).

    Returns the fold of each scan, shape (n_scans,), and the number of folds.
    """
    _, first, group = np.unique(concentrations, axis=0, return_index=True, return_inverse=True)
    # np.unique sorts rows; renumber standards by first appearance so the blinds follow the scan order.
    order = np.argsort(np.argsort(first))
    standard = order[group.reshape(-1)]
    n_folds = int(min(folds, first.size))
    return (standard % n_folds).astype(np.int64), n_folds


def _cross_validate(
    x: FloatArray, y: FloatArray, fold: NDArray[np.int64], n_folds: int, max_lv: int
) -> tuple[FloatArray, FloatArray]:
    """Cross-validated MSE and its standard error for 0 ... max_lv latent variables.

    One PLS1 fit with ``max_lv`` latent variables per fold and component gives
    the predictions for every smaller number too: NIPALS extracts latent
    variables one after another, and P^T W is upper triangular, so the
    rotations of an A-variable model are the first A columns of R.

    Returns
    -------
    mse, standard_error : ndarray, shape (n_components, max_lv + 1)
    """
    from sklearn.cross_decomposition import PLSRegression

    n, n_comp = y.shape
    squared = np.empty((n, n_comp, max_lv + 1))
    for f in range(n_folds):
        test = fold == f
        train = ~test
        centred = x[test] - x[train].mean(axis=0)
        for j in range(n_comp):
            pls = PLSRegression(n_components=max_lv, scale=False).fit(x[train], y[train, j])
            steps = (centred @ pls.x_rotations_) * pls.y_loadings_[0]
            predicted = pls.intercept_[0] + np.concatenate([np.zeros((steps.shape[0], 1)), np.cumsum(steps, axis=1)], axis=1)
            squared[test, j, :] = (predicted - y[test, j, None]) ** 2
    per_fold = np.stack([squared[fold == f].mean(axis=0) for f in range(n_folds)])
    return squared.mean(axis=0), per_fold.std(axis=0, ddof=1) / np.sqrt(n_folds)


def _one_standard_error(mse: FloatArray, standard_error: FloatArray) -> int:
    """Fewest latent variables (>= 1) whose MSE is within one standard error of the best."""
    best = int(np.argmin(mse[1:])) + 1
    threshold = mse[best] + standard_error[best]
    return int(np.flatnonzero(mse[1:] <= threshold)[0]) + 1


def _fit_component(x: FloatArray, y: FloatArray, name: str, latent: int, rmsecv: float) -> ComponentModel:
    """The final PLS1 model of one component on all training scans."""
    from sklearn.cross_decomposition import PLSRegression

    pls = PLSRegression(n_components=latent, scale=False).fit(x, y)
    scores = (x - x.mean(axis=0)) @ pls.x_rotations_
    fitted = pls.predict(x).reshape(-1)
    dof = max(y.size - latent - 1, 1)
    return ComponentModel(
        name=name,
        latent_variables=latent,
        coefficients=pls.coef_[0].copy(),
        intercept=float(pls.intercept_[0]),
        x_weights=pls.x_weights_.copy(),
        x_loadings=pls.x_loadings_.copy(),
        x_rotations=pls.x_rotations_.copy(),
        y_loadings=pls.y_loadings_[0].copy(),
        score_sum_squares=(scores**2).sum(axis=0),
        rmsec=float(np.sqrt(np.sum((fitted - y) ** 2) / dof)),
        rmsecv=rmsecv,
        training_range=(float(y.min()), float(y.max())),
    )


def _spectral_check(centred: FloatArray, n_components: int, alpha: float) -> SpectralCheck:
    """Principal-component model of centred training spectra with Q and T^2 limits."""
    n = centred.shape[0]
    _, singular, vt = np.linalg.svd(centred, full_matrices=False)
    eigenvalues = singular**2 / (n - 1)
    residual = eigenvalues[n_components:]
    # The training residuals were fitted away by a model built on the same
    # scans, so they understate a new scan's residual; rescaling by the
    # residual degrees of freedom (n - 1) / (n - 1 - A) corrects the mean (own
    # choice, checked by simulation: with 15 training scans the uncorrected
    # limit at alpha = 0.05 was exceeded by 26 % of new scans, the corrected one by 4 %).
    dof_scale = (n - 1) / (n - 1 - n_components)
    return SpectralCheck(
        loadings=vt[:n_components].T.copy(),
        eigenvalues=eigenvalues[:n_components].copy(),
        residual_eigenvalues=residual.copy(),
        alpha=float(alpha),
        n_training=n,
        q_limit=q_residual_limit(residual * dof_scale, alpha),
        t2_limit=hotelling_t2_limit(n_components, n, alpha),
    )
