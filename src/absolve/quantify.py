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

import dataclasses
from collections.abc import Iterator, Mapping, Sequence
from dataclasses import dataclass, field
from typing import Any, Literal, get_args

import numpy as np
from numpy.typing import NDArray
from scipy import special

from ._blas import single_blas_thread
from .errors import AbsolveError
from .library import NoiseModel, ReferenceLibrary
from .photometry import correct_stray_light
from .noise import ar1_coefficients, correlated_squared_norms, correlated_weighted_norms, effective_points, whiten
from .screening import LibraryBias, Screening, estimate_library_bias, screen_residuals
from .screening._subspaces import _point_patterns as point_patterns
from .solver import MAX_CONDITION, solve_nonnegative
from .spectra import Spectra

__all__ = ["Baseline", "BASELINES", "MixtureResult", "baseline_columns", "concatenate_results", "quantify", "quantify_chunks", "DEFAULT_CEILING"]

Baseline = Literal["none", "offset", "linear"]
BASELINES: tuple[str, ...] = get_args(Baseline)
# Above about 2 absorbance units ordinary instruments see under 1 % of the
# light and stray light dominates (common practice, no source).
DEFAULT_CEILING = 2.0
# Variance inflation above 10 marks harmful collinearity (common practice, no source).
VIF_LIMIT = 10.0
_COVERAGE_PROBABILITY = 0.9545  # the probability that k = 2 gives for a normal distribution (GUM 6.2.2)
_CHUNK = 1024  # scans per block of per-point work, bounding memory (the covariance step holds some 10 values per point)
_SCREEN_BLOCK = 1024  # scans per call of the interferent screen (its working arrays are some 20 times the block's values)
_MIN_SCREEN_POINTS = 10  # fewer wavelengths leave no room for a residual test
# Scans (spread evenly over the batch) from which the library's fixed error is learned: at 4096 the
# estimate's own noise is a fraction of a percent of a scan's, and learning added about 50 MB to the
# peak of a 20,000 x 400 run (measured).
_LIBRARY_ERROR_SCANS = 4096
# A learned library error larger than this many of the calibration's standard errors at its worst
# wavelength is reported as beyond the calibration. Measured on 16 simulated libraries of two dyes
# (standard errors from 14 standards; the largest over 201 correlated points): as calibrated 2.7-7.7
# for all 32 components; with a deliberate 3 % error on one dye's flank (0.5-2.6 % of its peak left in
# the residual by the fit) 5-71, above 10 for 13 of 16. Only gross errors are named.
_BEYOND_CALIBRATION = 10.0


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
    fitted, residuals : ndarray, shape (n_scans, n_wavelengths), or None
        NaN where a point was not used. None in a batch record gathered chunk by
        chunk without them (see :meth:`without_spectra`), which keeps a large
        batch's record a small multiple of its per-scan numbers.
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
    fitted: NDArray[np.float64] | None
    residuals: NDArray[np.float64] | None
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
        # Arrays become nested lists once (NaN and infinity as None); the loop below only assembles records.
        per_component = {
            key: _json_rows(getattr(self, key))
            for key in ("concentration", "std_uncertainty", "expanded_uncertainty", "coverage_factor", "effective_dof", "upper_limit",
                        "lod", "loq", "sensitivity", "selectivity", "variance_inflation")
        }
        budgets = {key: _json_rows(value) for key, value in self.budget.items()}
        per_scan = {
            key: _json_rows(value)
            for key, value in (("rms_residual", self.rms_residual), ("condition_number", self.condition_number),
                               ("noise_scale", self.noise_scale), ("residual_p_value", self.residual_p_value),
                               ("interferent_p_value", self.screening.p_value))
        }
        baselines = _json_rows(self.baseline)
        dofs = self.residual_dof.tolist()
        points = self.used.sum(axis=1).tolist()
        excluded = {key: value.tolist() for key, value in self.excluded.items()}
        interferent = self.interferent.tolist()
        scans = []
        for i, name in enumerate(self.scan_names):
            components = []
            for j, component in enumerate(self.components):
                record: dict[str, Any] = {"component": component}
                for key in ("concentration", "std_uncertainty", "expanded_uncertainty", "coverage_factor", "effective_dof"):
                    record[key] = per_component[key][i][j]
                record["budget"] = {key: value[i][j] for key, value in budgets.items()}
                for key in ("upper_limit", "lod", "loq", "sensitivity", "selectivity", "variance_inflation"):
                    record[key] = per_component[key][i][j]
                record["flags"] = list(self.flags[i][j])
                components.append(record)
            diagnosis = self.screening.diagnoses[i]
            scans.append(
                {
                    "scan": name,
                    "components": components,
                    "baseline": baselines[i],
                    "rms_residual": per_scan["rms_residual"][i],
                    "condition_number": per_scan["condition_number"][i],
                    "residual_dof": int(dofs[i]),
                    "noise_scale": per_scan["noise_scale"][i],
                    "residual_p_value": per_scan["residual_p_value"][i],
                    "points_used": int(points[i]),
                    "excluded": {key: int(value[i]) for key, value in excluded.items()},
                    "interferent": bool(interferent[i]),
                    "interferent_p_value": per_scan["interferent_p_value"][i],
                    "diagnosis": None if diagnosis is None else diagnosis.summary(),
                    "flags": list(self.scan_flags[i]),
                }
            )
        return {"unit": self.unit, "components": list(self.components), "settings": dict(self.settings), "scans": scans}

    def take(self, rows: Sequence[int] | NDArray[np.intp]) -> MixtureResult:
        """The result of the scans ``rows`` (indices into this batch, in the order given)."""
        index = np.asarray(rows, dtype=np.intp).reshape(-1)
        return _take(self, index, _BATCH_FIELDS)

    def without_spectra(self) -> MixtureResult:
        """This result without its fitted and residual spectra (every per-scan number stays)."""
        return dataclasses.replace(self, fitted=None, residuals=None)

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


# Fields that describe the whole batch; every other field holds one entry per scan.
_BATCH_FIELDS = frozenset({"components", "unit", "wavelengths", "settings"})
_SCREENING_BATCH_FIELDS = frozenset({"alpha", "method"})


def _take(record: Any, rows: NDArray[np.intp], batch_fields: frozenset[str]) -> Any:
    """A copy of a per-scan record (MixtureResult or Screening) holding only ``rows``."""
    values = {item.name: _take_entries(getattr(record, item.name), rows) for item in dataclasses.fields(record) if item.name not in batch_fields}
    return dataclasses.replace(record, **values)


def _take_entries(value: Any, rows: NDArray[np.intp]) -> Any:
    if value is None:
        return None
    if isinstance(value, np.ndarray):
        return value[rows]
    if isinstance(value, tuple):
        return tuple(value[i] for i in rows.tolist())
    if isinstance(value, Screening):
        return _take(value, rows, _SCREENING_BATCH_FIELDS)
    return {key: entry[rows] for key, entry in value.items()}


def concatenate_results(parts: Sequence[MixtureResult]) -> MixtureResult:
    """One result from the results of consecutive runs of scans of one batch (e.g. the chunks of :func:`quantify_chunks`).

    Whole-batch fields (components, unit, wavelengths, settings) are taken from
    the first part; fitted and residual spectra are joined only when every part has them.
    """
    if not parts:
        raise AbsolveError("no results to join", fix="give at least one result")
    return _join(parts, _BATCH_FIELDS)


def _join(parts: Sequence[Any], batch_fields: frozenset[str]) -> Any:
    values = {item.name: _join_entries([getattr(part, item.name) for part in parts]) for item in dataclasses.fields(parts[0]) if item.name not in batch_fields}
    return dataclasses.replace(parts[0], **values)


def _join_entries(entries: list[Any]) -> Any:
    first = entries[0]
    if any(entry is None for entry in entries):
        return None
    if isinstance(first, np.ndarray):
        return np.concatenate(entries)
    if isinstance(first, tuple):
        return tuple(item for entry in entries for item in entry)
    if isinstance(first, Screening):
        return _join(entries, _SCREENING_BATCH_FIELDS)
    return {key: np.concatenate([entry[key] for entry in entries]) for key in first}


def _json_rows(values: NDArray[Any]) -> list[Any]:
    """``values.tolist()`` with every non-finite number as None (JSON has no NaN)."""
    array = np.asarray(values, dtype=np.float64)
    finite = np.isfinite(array)
    if finite.all():
        return array.tolist()
    return np.where(finite, array, None).tolist()


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
    learn_library_error: bool = False,
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
    learn_library_error : bool, default False
        Before the interferent screen, learn the library's fixed absorptivity
        error from this batch's residuals and set it aside
        (:func:`absolve.screening.estimate_library_bias`, two passes around a
        screen of up to 4096 scans spread over the batch). It keeps an
        imperfect library from flagging many clean scans, but it also takes
        away an impurity that follows one component in most scans (an impure
        dye lot). Concentrations, uncertainties and the written residuals are
        unchanged; only the screen sees the corrected residuals. What was
        done is recorded in ``settings["library_error"]``.

    Returns
    -------
    MixtureResult

    Notes
    -----
    Scans are processed in blocks (at most a few thousand at a time), so
    working memory beyond the inputs and the result stays bounded; for
    batches whose result does not fit in memory, see :func:`quantify_chunks`.
    """
    job = _Job(spectra, library, baseline, wavelength_range, path_length, dilution, ceiling, path_length_tolerance, dilution_tolerance, alpha,
               learn_library_error=learn_library_error)
    return job.result(0, job.n_scans)


def quantify_chunks(
    spectra: Spectra,
    library: ReferenceLibrary,
    *,
    chunk_scans: int = 4096,
    baseline: Baseline = "offset",
    wavelength_range: tuple[float | None, float | None] = (None, None),
    path_length: float = 1.0,
    dilution: float = 1.0,
    ceiling: float = DEFAULT_CEILING,
    path_length_tolerance: float = 0.0,
    dilution_tolerance: float = 0.0,
    alpha: float = 0.05,
    learn_library_error: bool = False,
) -> Iterator[MixtureResult]:
    """:func:`quantify`, handed out ``chunk_scans`` consecutive scans at a time.

    Each chunk's :class:`MixtureResult` holds the numbers of the
    corresponding scans of ``quantify(spectra, library, ...)``: every scan is
    fitted before the first chunk is made, so what is estimated from the
    whole batch (the noise model, when the library has none, and the
    library's error with ``learn_library_error``) is the same.
    They agree to rounding, not always to the last bit: BLAS products can
    round differently for a different number of rows in a call.
    Only one chunk's fitted and residual spectra exist at a time, so a
    writer that handles the chunks one by one keeps memory bounded whatever
    the batch size. Options are those of :func:`quantify`; they are checked
    here, before the first chunk.

    Parameters
    ----------
    chunk_scans : int, default 4096
        Scans per chunk (the last one may be smaller).

    Yields
    ------
    MixtureResult
        One per chunk, in scan order.
    """
    if isinstance(chunk_scans, bool) or not isinstance(chunk_scans, (int, np.integer)) or chunk_scans < 1:
        raise AbsolveError(f"The 'chunk_scans' parameter of quantify_chunks must be an integer >= 1; got {chunk_scans!r} instead.")
    job = _Job(spectra, library, baseline, wavelength_range, path_length, dilution, ceiling, path_length_tolerance, dilution_tolerance, alpha,
               learn_library_error=learn_library_error)
    return (job.result(start, min(start + int(chunk_scans), job.n_scans)) for start in range(0, job.n_scans, int(chunk_scans)))


def _check_options(baseline: str, path_length: float, dilution: float, ceiling: float, tol_b: float, tol_d: float, alpha: float) -> None:
    if baseline not in BASELINES:
        raise AbsolveError(f"The 'baseline' option must be one of {', '.join(BASELINES)}; got {baseline!r} instead.")
    for name, value in (("path length", path_length), ("dilution", dilution), ("ceiling", ceiling)):
        if not (np.isfinite(value) and value > 0):
            raise AbsolveError(f"the {name} must be a positive number; got {value!r}", fix=f"give the {name} as a number above 0")
    if dilution < 1:
        raise AbsolveError(f"the dilution factor must be >= 1; got {dilution!r}", fix="give how many times the sample was diluted (1 = not diluted)")
    # Beyond these no cell or dilution scheme exists; such a number is a typo (common practice, no source).
    for name, value, top, unit in (("path length", path_length, 100.0, " cm"), ("dilution", dilution, 1e7, "")):
        if value > top:
            raise AbsolveError(f"the {name} {value:g}{unit} is implausibly large", fix=f"check the {name} (at most {top:g}{unit})")
    for name, value in (("path-length tolerance", tol_b), ("dilution tolerance", tol_d)):
        if not (np.isfinite(value) and 0 <= value < 0.5):
            raise AbsolveError(f"the {name} must be a relative standard uncertainty in [0, 0.5); got {value!r}", fix="e.g. 0.002 for 0.2 %")
    if not 0 < alpha < 0.5:
        raise AbsolveError(f"the significance level must lie in (0, 0.5); got {alpha!r}")


class _Accumulator:
    """Per-scan outputs of a block of scans, filled group by group."""

    def __init__(self, n_scans: int, n_comp: int, n_base: int, n_wl: int) -> None:
        nan = np.nan
        self.concentration = np.full((n_scans, n_comp), nan)
        self.budget = {"spectral_noise": np.full((n_scans, n_comp), nan), "absorptivity": np.full((n_scans, n_comp), nan)}
        self.noise_dof = np.full((n_scans, n_comp), np.inf)
        self.at_bound = np.zeros((n_scans, n_comp), dtype=bool)
        self.baseline = np.full((n_scans, n_base), nan)
        self.fitted = np.full((n_scans, n_wl), nan)
        self.rms = np.full(n_scans, nan)
        self.dof = np.zeros(n_scans, dtype=np.int64)
        self.noise_scale = np.full(n_scans, nan)
        self.p_value = np.full(n_scans, nan)
        self.no_model_no_dof = np.zeros(n_scans, dtype=bool)


@dataclass
class _Group:
    """Scans sharing their used points: the design on those points and what follows from it alone."""

    points: NDArray[np.intp]
    rows: NDArray[np.intp]
    design: NDArray[np.float64] | None = None
    phi: NDArray[np.float64] | None = None
    # Pseudo-inverse rows and absorptivity sums per set of free parameters, made once per group.
    propagation: dict[bytes, tuple[NDArray[np.float64], NDArray[np.float64], NDArray[np.float64]]] = field(default_factory=dict)


class _Job:
    """A quantification prepared for a whole batch.

    The preparation finds every scan's used points and fits every scan (a few
    numbers per scan); :meth:`result` then makes the full result of any run
    of consecutive scans, so the batch can be handed out in chunks whose
    numbers do not depend on the chunking (beyond rounding). Per-point arrays
    are only ever made for blocks of scans. ``pooled`` gives batch-wide
    residual sums made elsewhere (the other chunks of a Dask array).
    """

    @single_blas_thread
    def __init__(
        self, spectra: Spectra, library: ReferenceLibrary, baseline: str, wavelength_range: tuple[float | None, float | None],
        path_length: float, dilution: float, ceiling: float, tol_b: float, tol_d: float, alpha: float,
        pooled: _Pool | None = None, learn_library_error: bool = False,
    ) -> None:
        _check_options(baseline, path_length, dilution, ceiling, tol_b, tol_d, alpha)
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
        inside = np.flatnonzero((scans.wavelengths >= low) & (scans.wavelengths <= high))
        if inside.size == 0:
            scans.restrict(low, high)  # raises the error that names the range
        # The grid is increasing, so the range is a slice: the scans are viewed, never copied whole.
        window = slice(int(inside[0]), int(inside[-1]) + 1)
        self.library = library
        self.names = scans.names
        self.grid = scans.wavelengths[window]
        self.measured = scans.values[:, window]
        self.n_scans, n_wl = self.measured.shape
        absorptivity, std_error = library.on_grid(self.grid)
        self.n_comp = library.n_components
        self.design = np.column_stack([absorptivity.T * path_length, baseline_columns(self.grid, baseline)])
        self.std_error = std_error * path_length
        self.options = (baseline, path_length, dilution, ceiling, tol_b, tol_d, alpha)
        self._find_used_points()
        self.pool = pooled if pooled is not None or library.noise is not None else _Pool()
        self._fit(collect=pooled is None and library.noise is None)
        self.library_error = self._learn_library_error() if learn_library_error else None
        # What settings["library_error"] says: None when not asked for, made once for every chunk.
        self.library_error_record = None if not learn_library_error else (
            self.library_error.record() if self.library_error is not None
            else {"applied": False, "message": "library error not learned: too few wavelengths to screen"}
        )

    def corrected(self, values: NDArray[np.float64]) -> NDArray[np.float64]:
        """Measured absorbance with the library's stray-light correction (the values that are fitted)."""
        return correct_stray_light(values, self.library.stray_light)

    def _find_used_points(self) -> None:
        """Used points of every scan, exclusions counted by reason, and the groups of scans sharing used points."""
        limit = self.library.linear_limit_absorbance
        ceiling = self.options[3]
        n = self.n_scans
        self.used = np.empty(self.measured.shape, dtype=bool)
        self.excluded = {name: np.zeros(n, dtype=np.int64) for name in ("unusable", "above_working_range", "above_ceiling")}
        for start in range(0, n, _CHUNK):
            block = slice(start, start + _CHUNK)
            measured = self.measured[block]
            values = self.corrected(measured)
            unusable = ~np.isfinite(values)
            above_range = ~unusable & (values > limit) if limit is not None else np.zeros_like(unusable)
            above_ceiling = ~unusable & (measured > ceiling) & ~above_range
            self.used[block] = ~(unusable | above_range | above_ceiling)
            self.excluded["unusable"][block] = unusable.sum(axis=1)
            self.excluded["above_working_range"][block] = above_range.sum(axis=1)
            self.excluded["above_ceiling"][block] = above_ceiling.sum(axis=1)
        self.group_of = np.empty(n, dtype=np.intp)
        self.groups: list[_Group] = []
        for index, (pattern, rows) in enumerate(point_patterns(self.used)):
            self.group_of[rows] = index
            self.groups.append(_Group(np.flatnonzero(pattern), rows))

    def _fit(self, collect: bool) -> None:
        """Fit every scan: coefficients, bounds, unconstrained estimates, conditioning; pooled residual sums if asked."""
        n, n_comp = self.n_scans, self.n_comp
        n_params = self.design.shape[1]
        nonnegative = np.arange(n_params) < n_comp
        nan = np.nan
        self.coefficients = np.full((n, n_params), nan)
        self.at_bound = np.zeros((n, n_comp), dtype=bool)
        self.unconstrained = np.full((n, n_comp), nan)
        self.condition = np.full(n, nan)
        self.sensitivity = np.full((n, n_comp), nan)
        self.selectivity = np.full((n, n_comp), nan)
        self.vif = np.full((n, n_comp), nan)
        self.failed = np.zeros(n, dtype=bool)
        self.singular = np.zeros(n, dtype=bool)
        for group in self.groups:
            rows = group.rows
            if group.points.size < n_params:
                self.failed[rows] = True
                continue
            design = self.design[group.points]
            norms = np.linalg.norm(design, axis=0)
            if np.any(norms[:n_comp] == 0):
                silent = self.library.names[int(np.flatnonzero(norms[:n_comp] == 0)[0])]
                low, high = self.grid[group.points[0]], self.grid[group.points[-1]]
                raise AbsolveError(
                    f"component {silent!r} has no absorptivity at the used wavelengths ({low:g}-{high:g} nm)",
                    fix="widen --range to where it absorbs, or use a library without it",
                )
            scaled = design / norms
            self.condition[rows] = float(np.linalg.cond(scaled))
            self.sensitivity[rows], self.selectivity[rows], self.vif[rows] = _figures_of_merit(design, n_comp)
            # Beyond the solver's limit the numbers are not worth reporting: a flagged gap, not an error for the whole batch.
            if self.condition[rows[0]] > MAX_CONDITION:
                self.failed[rows] = True
                self.singular[rows] = True
                continue
            group.design = design
            unconstrained = np.linalg.pinv(design)[:n_comp]
            for start in range(0, rows.size, _CHUNK):
                block = rows[start : start + _CHUNK]
                targets = self.corrected(self.measured[np.ix_(block, group.points)])
                solution = solve_nonnegative(design, targets, nonnegative=nonnegative)
                self.coefficients[block] = solution.coefficients
                self.at_bound[block] = solution.at_bound[:, :n_comp]
                self.unconstrained[block] = targets @ unconstrained.T
                if collect:
                    residual = targets - solution.coefficients @ design.T
                    self.pool.add_group(group, residual)
                    self.pool.add_batch(residual, group.points, self.grid.size)
        self.fitted_ok = ~self.failed
        noise = self.library.noise
        for group in self.groups:
            if group.design is not None:
                length = noise.correlation_length_nm if noise is not None else self.pool.group_length(group, self.grid[group.points])
                group.phi = ar1_coefficients(self.grid[group.points], length)

    @single_blas_thread
    def result(self, start: int, stop: int) -> MixtureResult:
        """The full result of scans ``start`` to ``stop - 1``."""
        library = self.library
        baseline, path_length, dilution, ceiling, tol_b, tol_d, alpha = self.options
        n_comp, grid = self.n_comp, self.grid
        n = stop - start
        out = _Accumulator(n, n_comp, self.design.shape[1] - n_comp, grid.size)
        chunk_groups = self.group_of[start:stop]
        order = np.argsort(chunk_groups, kind="stable")
        bounds = np.flatnonzero(np.diff(chunk_groups[order])) + 1
        for local in np.split(order, bounds):
            group = self.groups[chunk_groups[local[0]]]
            if group.design is not None:
                for first in range(0, local.size, _CHUNK):
                    self._propagate_block(out, group, local[first : first + _CHUNK], start)
        failed = self.failed[start:stop]
        used = self.used[start:stop]

        scale = dilution
        concentration = out.concentration * scale
        budget = {key: value * scale for key, value in out.budget.items()}
        budget["path_length"] = np.abs(concentration) * tol_b
        budget["dilution"] = np.abs(concentration) * tol_d
        std_uncertainty = np.sqrt(sum(value**2 for value in budget.values()))
        effective_dof = _welch_satterthwaite(budget, out.noise_dof, library.residual_dof, std_uncertainty)
        coverage = np.where(np.isfinite(effective_dof), special.stdtrit(np.maximum(effective_dof, 1.0), 0.5 + _COVERAGE_PROBABILITY / 2), 2.0)
        coverage = np.where(np.isnan(std_uncertainty), np.nan, coverage)
        upper = np.where(out.at_bound, np.maximum(self.unconstrained[start:stop] * scale, 0.0) + coverage * std_uncertainty, np.nan)
        lod = 3.3 * out.budget["spectral_noise"] * scale
        loq = 10.0 * out.budget["spectral_noise"] * scale
        # One array for the residuals, NaN written in place where a point was not used.
        residuals = self.corrected(self.measured[start:stop]) - out.fitted
        residuals[~used] = np.nan
        screening = self._screen(out, residuals, used, chunk_groups, start, stop)
        interferent = screening.flagged
        excluded = {key: value[start:stop] for key, value in self.excluded.items()}
        flags, scan_flags = _flags(
            out, failed, self.singular[start:stop], self.vif[start:stop], concentration, lod, loq, library, dilution,
            sum(excluded.values()) > 0, interferent,
        )
        return MixtureResult(
            scan_names=self.names[start:stop],
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
            sensitivity=self.sensitivity[start:stop].copy(),
            selectivity=self.selectivity[start:stop].copy(),
            variance_inflation=self.vif[start:stop].copy(),
            baseline=out.baseline,
            fitted=out.fitted,
            residuals=residuals,
            used=used.copy(),
            rms_residual=out.rms,
            condition_number=self.condition[start:stop].copy(),
            residual_dof=out.dof,
            noise_scale=out.noise_scale,
            residual_p_value=out.p_value,
            excluded={key: value.copy() for key, value in excluded.items()},
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
                "linear_limit_absorbance": library.linear_limit_absorbance,
                "path_length_tolerance": tol_b,
                "dilution_tolerance": tol_d,
                "alpha": alpha,
                "noise_model": "calibration" if library.noise is not None else "scan residuals",
                "library_error": self.library_error_record,
            },
        )

    def _propagate_block(self, out: _Accumulator, group: _Group, local: NDArray[np.intp], start: int) -> None:
        """Fitted spectrum, residual test and uncertainty budget of a block of scans sharing used points."""
        assert group.design is not None and group.phi is not None
        n_comp = self.n_comp
        rows = local + start
        points = group.points
        # Runs of consecutive scans and points (the usual case) are sliced: views, not gathered copies.
        row_run, point_run, local_run = _run(rows), _run(points), _run(local)
        targets = self.corrected(self.measured[row_run][:, point_run] if isinstance(row_run, slice) else self.measured[np.ix_(rows, points)])
        coefficients = self.coefficients[rows]
        fitted = coefficients @ group.design.T
        residual = targets - fitted
        out.concentration[local] = coefficients[:, :n_comp]
        out.baseline[local] = coefficients[:, n_comp:]
        out.at_bound[local] = self.at_bound[rows]
        if isinstance(local_run, slice):
            out.fitted[local_run, point_run] = fitted
        else:
            out.fitted[np.ix_(local, points)] = fitted
        out.rms[local] = np.sqrt(np.mean(residual**2, axis=1))
        noise = self.library.noise
        sigma = noise.standard_deviation(fitted) if noise is not None else np.ones_like(fitted)
        # The residual holds the scan's noise and the calibration's absorptivity
        # errors times the concentrations; both are correlated along wavelength.
        se_used = self.std_error[:, points]
        sigma_total = np.sqrt(sigma**2 + (coefficients[:, :n_comp] ** 2) @ (se_used**2)) if noise is not None else sigma
        whitened = whiten(residual / sigma_total, group.phi)
        # Sets of free parameters are few (at most 2^n_comp): one integer code each.
        codes = self.at_bound[rows] @ (1 << np.arange(n_comp))
        for code in np.unique(codes):
            members = np.flatnonzero(codes == code)
            free = np.ones(group.design.shape[1], dtype=bool)
            free[:n_comp] = ~self.at_bound[rows[members[0]]]
            _propagate(out, local[members], group, free, n_comp, sigma[members], whitened[members],
                       se_used, coefficients[members, :n_comp], noise is not None, self.options[-1])

    def _screen(
        self, out: _Accumulator, residuals: NDArray[np.float64], used: NDArray[np.bool_], chunk_groups: NDArray[np.intp], start: int, stop: int,
    ) -> Screening:
        """Interferent screen of every fitted scan of the block (see :mod:`absolve.screening`).

        The residual also holds the calibration's absorptivity errors times the
        concentrations; that variance is added to the noise model's so that an
        imperfect library is not mistaken for an interferent, and when the
        library's fixed error was learned from the batch, it is taken out first.
        Without a noise model in the library, one is estimated from the batch's
        residuals: the screen's main test is a ratio within each scan, so only
        the correlation length matters, and that is a property of the instrument.
        """
        n = stop - start
        if self.grid.size < _MIN_SCREEN_POINTS:
            return _unscreened(n, self.options[-1], f"not screened: {self.grid.size} wavelengths are too few")
        correction = self._library_error_correction(start, stop)
        screened = residuals if correction is None else residuals - correction
        usable = used & np.isfinite(screened) & self.fitted_ok[start:stop, None]
        return self._screen_rows(screened, out.fitted, out.concentration, usable, chunk_groups, diagnose=True)

    def _screen_rows(
        self, residuals: NDArray[np.float64], fitted: NDArray[np.float64], coefficients: NDArray[np.float64], usable: NDArray[np.bool_],
        groups: NDArray[np.intp], *, diagnose: bool,
    ) -> Screening:
        """Screen of the given scans (``coefficients``: the library columns' fitted coefficients), in blocks of bounded size."""
        model = self.library.noise if self.library.noise is not None else self.pool.noise_model(self.grid)
        n = residuals.shape[0]
        # Blocks of scans in used-point order, so that each pattern's geometry is made about once.
        order = np.argsort(groups, kind="stable")
        parts = []
        for first in range(0, n, _SCREEN_BLOCK):
            block = np.sort(order[first : first + _SCREEN_BLOCK])
            extra = np.nan_to_num(coefficients[block]) ** 2 @ self.std_error**2
            parts.append((block, screen_residuals(
                self.grid, np.nan_to_num(residuals[block]), np.nan_to_num(fitted[block]), self.design, model,
                usable=usable[block], alpha=self.options[-1], extra_variance=extra, null_scale=self.library.screening_scale,
                diagnose=diagnose,
            )))
        return _merge_screenings(parts, n)

    def _learn_library_error(self) -> _LearnedError | None:
        """The library's fixed error learned from up to ``_LIBRARY_ERROR_SCANS`` fitted scans spread over the batch.

        Two passes (:func:`absolve.screening.estimate_library_bias`): estimate
        from every scan of the sample, screen the corrected residuals, and
        estimate again without the scans that screen flags, so that scans with
        an interferent do not pull on the estimate. None when the scans have
        too few wavelengths to be screened at all.
        """
        if self.grid.size < _MIN_SCREEN_POINTS:
            return None
        rows = np.flatnonzero(self.fitted_ok)
        if rows.size > _LIBRARY_ERROR_SCANS:
            rows = rows[np.round(np.linspace(0, rows.size - 1, _LIBRARY_ERROR_SCANS)).astype(np.intp)]
        residuals, fitted = self._residuals_of(rows)
        coefficients = self.coefficients[rows, : self.n_comp]
        usable = np.isfinite(residuals)
        first = estimate_library_bias(residuals, coefficients, usable)
        flagged = np.zeros(rows.size, dtype=bool)
        if first.applied:
            flagged = self._screen_rows(first.corrected, fitted, coefficients, usable, self.group_of[rows], diagnose=False).flagged
        final = estimate_library_bias(residuals, coefficients, usable, exclude=flagged)
        return _LearnedError(final, rows, np.where(usable, residuals - final.corrected, 0.0), int(np.count_nonzero(flagged)), self._error_sizes(final))

    def _error_sizes(self, bias: LibraryBias) -> list[dict[str, Any]]:
        """Per component: the learned error's largest size against the peak absorptivity and the calibration's standard error.

        The batch's estimate is far more precise than the calibration's, so a
        library right within its stated uncertainty gives a largest ratio to
        the standard error of a few; past ``_BEYOND_CALIBRATION`` the library
        is off for that component, or something in these scans follows it (an
        impurity of its lot).
        """
        sizes = []
        peaks = np.max(np.abs(self.design[:, : self.n_comp]), axis=0)
        for k, name in enumerate(self.library.names):
            error = np.abs(bias.bias[:, k])
            se = self.std_error[k]
            ratio = np.where(bias.estimated & (se > 0), error / np.where(se > 0, se, 1.0), 0.0)
            sizes.append({
                "component": name,
                "largest_share_of_peak": float(error.max(initial=0.0) / peaks[k]) if peaks[k] > 0 else None,
                "largest_in_standard_errors": float(ratio.max(initial=0.0)) if np.any(se > 0) else None,
            })
        return sizes

    def _residuals_of(self, rows: NDArray[np.intp]) -> tuple[NDArray[np.float64], NDArray[np.float64]]:
        """Residual and fitted spectra of fitted scans ``rows`` on the whole grid (NaN where a point is not used)."""
        residuals = np.full((rows.size, self.grid.size), np.nan)
        fitted = np.full_like(residuals, np.nan)
        groups = self.group_of[rows]
        for index in np.unique(groups):
            group = self.groups[index]
            assert group.design is not None  # fitted scans only
            local = np.flatnonzero(groups == index)
            cells = np.ix_(local, group.points)
            fitted[cells] = self.coefficients[rows[local]] @ group.design.T
            residuals[cells] = self.corrected(self.measured[np.ix_(rows[local], group.points)]) - fitted[cells]
        return residuals, fitted

    def _library_error_correction(self, start: int, stop: int) -> NDArray[np.float64] | None:
        """What the learned library error puts into the residuals of scans ``start`` to ``stop - 1`` (None when not learned)."""
        learned = self.library_error
        if learned is None or not learned.bias.applied:
            return None
        correction = np.nan_to_num(self.coefficients[start:stop, : self.n_comp]) @ learned.bias.bias.T
        # Scans in the estimate are corrected with the estimate made without them (leave-one-out).
        inside = (learned.rows >= start) & (learned.rows < stop)
        correction[learned.rows[inside] - start] = learned.sample_correction[inside]
        return correction


@dataclass(frozen=True)
class _LearnedError:
    """The library's fixed error learned from a sample of the batch (see :meth:`_Job._learn_library_error`)."""

    bias: LibraryBias
    rows: NDArray[np.intp]  # the sampled scans, increasing
    sample_correction: NDArray[np.float64]  # their leave-one-out corrections, (rows.size, n_wavelengths)
    n_flagged: int  # sampled scans the first pass flagged and the final estimate left out
    sizes: list[dict[str, Any]]  # per component, see _Job._error_sizes

    def record(self) -> dict[str, Any]:
        """JSON-safe record: the estimate's summary, the sample, each component's size, and the components beyond the calibration named."""
        record = {**self.bias.summary(), "scans_in_estimate": int(self.rows.size - self.n_flagged), "scans_flagged_first": self.n_flagged}
        beyond = [size for size in self.sizes if (size["largest_in_standard_errors"] or 0.0) > _BEYOND_CALIBRATION]
        for size in beyond:
            record["message"] += (
                f"; for {size['component']} it reaches {100 * size['largest_share_of_peak']:.1f} % of the peak absorptivity, "
                f"{size['largest_in_standard_errors']:.0f} times the calibration's standard error: the library is off for it, "
                "or an impurity follows it in these scans (check standards from another lot tell which)"
            )
        return {**record, "components": self.sizes}


class _Pool:
    """Residual sums over the whole batch, for libraries without a noise model.

    Pooled over scans, the estimates do not depend on how the batch is cut
    into blocks; sums from several parts of a batch (e.g. Dask chunks) add up.
    """

    def __init__(self) -> None:
        self.groups: dict[bytes, list[float]] = {}
        self.square_sum = 0.0
        self.count = 0
        self.lag_sum = 0.0
        self.centred_sum = 0.0

    def add_group(self, group: _Group, residual: NDArray[np.float64]) -> None:
        """The group's lag-one sums (its correlation length sets the group's noise correlation)."""
        lag, square = _lag_sums(residual)
        entry = self.groups.setdefault(group.points.tobytes(), [0.0, 0.0])
        entry[0] += lag
        entry[1] += square

    def add_batch(self, residual: NDArray[np.float64], points: NDArray[np.intp], n_wl: int) -> None:
        """Batch-wide sums: residual energy on used points, lag-one sums with unused points as zeros."""
        self.square_sum += float(np.sum(residual**2))
        self.count += residual.size
        full = np.zeros((residual.shape[0], n_wl))
        full[:, points] = residual
        lag, square = _lag_sums(full)
        self.lag_sum += lag
        self.centred_sum += square

    def merge(self, other: _Pool) -> _Pool:
        """Sums of two parts of a batch."""
        merged = _Pool()
        for source in (self, other):
            for key, (lag, square) in source.groups.items():
                entry = merged.groups.setdefault(key, [0.0, 0.0])
                entry[0] += lag
                entry[1] += square
            merged.square_sum += source.square_sum
            merged.count += source.count
            merged.lag_sum += source.lag_sum
            merged.centred_sum += source.centred_sum
        return merged

    def group_length(self, group: _Group, used_grid: NDArray[np.float64]) -> float:
        lag, square = self.groups.get(group.points.tobytes(), (0.0, 0.0))
        return _correlation_length(lag, square, used_grid)

    def noise_model(self, grid: NDArray[np.float64]) -> NoiseModel:
        """White-or-AR(1) noise model from the batch's residuals, for libraries without one."""
        floor = float(np.sqrt(self.square_sum / self.count)) if self.count else 1e-3
        return NoiseModel(floor=max(floor, 1e-6), proportional=0.0, correlation_length_nm=_correlation_length(self.lag_sum, self.centred_sum, grid))


def _lag_sums(residual: NDArray[np.float64]) -> tuple[float, float]:
    """Sums of lag-one products and of squares of the residual rows, each centred on its mean (0, 0 for fewer than 3 points)."""
    if residual.shape[1] < 3:
        return 0.0, 0.0
    centred = residual - residual.mean(axis=1, keepdims=True)
    return float(np.sum(centred[:, 1:] * centred[:, :-1])), float(np.sum(centred**2))


def _correlation_length(lag: float, square: float, grid: NDArray[np.float64]) -> float:
    """Correlation length from pooled lag-one sums of residuals (no noise model)."""
    if grid.size < 3:
        return 0.0
    rho = lag / square if square > 0 else 0.0
    if rho <= 0.01:
        return 0.0
    return float(-np.median(np.diff(grid)) / np.log(min(rho, 0.99)))


def _merge_screenings(parts: list[tuple[NDArray[np.intp], Screening]], n: int) -> Screening:
    """One screening record from those of blocks of scans (``parts``: the block's positions and its record)."""
    positions = np.concatenate([rows for rows, _ in parts])
    joined = _join([part for _, part in parts], _SCREENING_BATCH_FIELDS)
    # The blocks hold every position once: the inverse permutation puts the scans back in order.
    order = np.empty(n, dtype=np.intp)
    order[positions] = np.arange(positions.size)
    return _take(joined, order, _SCREENING_BATCH_FIELDS)


def _unscreened(n_scans: int, alpha: float, reason: str) -> Screening:
    """A screening record for scans that cannot be tested (too few points): no flags, NaN statistics."""
    nan = np.full(n_scans, np.nan)
    zero = np.zeros(n_scans, dtype=np.int64)
    return Screening(
        statistic=nan, p_value=nan.copy(), flagged=np.zeros(n_scans, dtype=bool), alpha=alpha, method=reason,
        diagnoses=(None,) * n_scans, smooth_p=nan.copy(), omnibus_p=nan.copy(), noise_ratio=nan.copy(),
        durbin_watson=nan.copy(), smooth_dof=zero, rough_dof=zero.copy(),
    )


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


def _run(index: NDArray[np.intp]) -> slice | NDArray[np.intp]:
    """``index`` as a slice when it is a run of consecutive integers, else unchanged."""
    if index.size and index[-1] - index[0] == index.size - 1:
        return slice(int(index[0]), int(index[-1]) + 1)
    return index


def _propagate(
    out: _Accumulator,
    rows: NDArray[np.intp],
    group: _Group,
    free: NDArray[np.bool_],
    n_comp: int,
    sigma: NDArray[np.float64],
    whitened: NDArray[np.float64],
    std_error: NDArray[np.float64],
    concentration: NDArray[np.float64],
    have_model: bool,
    alpha: float,
) -> None:
    """Uncertainty contributions for scans sharing used points and the same free parameters."""
    design, phi = group.design, group.phi
    assert design is not None and phi is not None
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
        out.p_value[rows] = special.chdtrc(dof, chi_square) if dof > 0 else np.nan
        scale = np.maximum(scale, 1.0)
        uses_scan_scale = scale > 1.0
    else:
        out.p_value[rows] = np.nan
        uses_scan_scale = np.ones(len(rows), dtype=bool)
        # Without a noise model the scan's own residual is the only evidence of noise: none left
        # over (no degrees of freedom, or an exactly zero residual) means no uncertainty can be given.
        out.no_model_no_dof[rows] = (dof == 0) | (scale <= 0.0)
    out.noise_scale[rows] = scale
    # Every component gets an uncertainty: one held at the bound gets the one it would have if free.
    key = free.tobytes()
    if key not in group.propagation:
        pinv_all = _pseudo_inverse(design, np.ones_like(free))
        group.propagation[key] = (_pseudo_inverse(design, free), pinv_all, _absorptivity_sums(pinv_all[:n_comp], std_error, phi))
    pinv_free, pinv_all, sums = group.propagation[key]
    # One pass for both sets of rows: the free parameters' and every component's as if free.
    both = np.concatenate([pinv_free, pinv_all[:n_comp]])
    variance = correlated_weighted_norms(both, sigma, phi)
    variance_free, component_variance = variance[:, : pinv_free.shape[0]], variance[:, pinv_free.shape[0] :]
    free_components = np.flatnonzero(free[:n_comp])
    component_variance[:, free_components] = variance_free[:, : free_components.size]
    noise_sd = np.sqrt(component_variance * scale[:, None])
    if not have_model:
        noise_sd[out.no_model_no_dof[rows]] = np.nan
    out.budget["spectral_noise"][rows] = noise_sd
    out.noise_dof[rows] = np.where(uses_scan_scale[:, None], noise_dof, np.inf)
    out.budget["absorptivity"][rows] = np.sqrt(concentration**2 @ sums.T)


def _pseudo_inverse(design: NDArray[np.float64], free: NDArray[np.bool_]) -> NDArray[np.float64]:
    """Rows of (D_F^T D_F)^-1 D_F^T for the free columns, shape (n_free, n_used)."""
    sub = design[:, free]
    return np.linalg.solve(sub.T @ sub, sub.T)


def _absorptivity_sums(pinv_rows: NDArray[np.float64], std_error: NDArray[np.float64], phi: NDArray[np.float64]) -> NDArray[np.float64]:
    """Variance of each component per squared concentration of each other from absorptivity errors, dc = -P (dK c).

    Each component's absorptivity errors are taken as correlated along
    wavelength like the noise of the standards behind them (AR(1)) and
    independent between components; the standard uncertainty of a scan is
    ``sqrt(c**2 @ sums.T)``.
    """
    n_comp = pinv_rows.shape[0]
    # weights[j, k, t] = P[j, t] * se[k, t]
    weights = pinv_rows[:, None, :] * std_error[None, :, :]
    return correlated_squared_norms(weights.reshape(n_comp * n_comp, -1), phi).reshape(n_comp, n_comp)


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
    failed: NDArray[np.bool_],
    singular: NDArray[np.bool_],
    vif: NDArray[np.float64],
    concentration: NDArray[np.float64],
    lod: NDArray[np.float64],
    loq: NDArray[np.float64],
    library: ReferenceLibrary,
    dilution: float,
    excluded_any: NDArray[np.bool_],
    interferent: NDArray[np.bool_],
) -> tuple[tuple[tuple[tuple[str, ...], ...], ...], tuple[tuple[str, ...], ...]]:
    """Keywords per scan and component, and per scan (see :data:`FLAG_TEXT`).

    Decided with array operations; the few distinct combinations are then
    spelt out once each and shared, so a large batch costs no Python work per scan.
    """
    top = np.array([c.concentration_range[1] if c.concentration_range else np.inf for c in library.components])
    failure = np.where(failed, np.where(singular, 1, 2), 0)
    no_dof = (out.dof == 0) & ~failed
    with np.errstate(invalid="ignore"):
        high_vif = (np.fmax.reduce(vif, axis=1, initial=0.0) > VIF_LIMIT) & ~singular
        below_detection = out.at_bound | (concentration < lod)
        below_quantification = concentration < loq
        beyond = concentration / dilution > 1.05 * top
    level = np.where(failed[:, None], 0, np.where(below_detection, 1, np.where(below_quantification, 2, 0)))
    codes = np.column_stack([
        failure, excluded_any, high_vif, interferent, np.where(no_dof, np.where(out.no_model_no_dof, 1, 2), 0),
        failure[:, None] + 3 * level + 9 * beyond,
    ]).astype(np.int64)
    distinct, inverse = np.unique(codes, axis=0, return_inverse=True)
    failures = ("", "ill-conditioned", "too-few-points")
    levels = ("", "below-detection", "below-quantification")
    spelt_flags = []
    spelt_scan = []
    for fail, excluded, vif_high, flagged, dof_code, *components in distinct.tolist():
        words = [failures[fail], "points-excluded" if excluded else "", "ill-conditioned" if vif_high else "",
                 "interferent" if flagged else "", ("", "no-uncertainty", "no-residual-dof")[dof_code]]
        spelt_scan.append(tuple(word for word in words if word))
        spelt_flags.append(tuple(
            tuple(word for word in (failures[code % 3], levels[code // 3 % 3], "beyond-calibration" if code >= 9 else "") if word)
            for code in components
        ))
    index = inverse.ravel().tolist()
    return tuple(spelt_flags[i] for i in index), tuple(spelt_scan[i] for i in index)
