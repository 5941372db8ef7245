"""The reference library: absorptivity spectra of the components, and how far to trust them.

A :class:`ReferenceLibrary` holds, per component and wavelength, the
absorbance produced by one unit of concentration in a 1 cm cell (molar
absorptivity epsilon in L mol^-1 cm^-1 when the unit is mol/L), its standard
error, the calibrated concentration range, the linear working range in
absorbance, and a photometric noise model learned from the standards'
residuals. Libraries come from :func:`absolve.calibrate` (standards) or
:func:`absolve.library_from_absorptivities` (known values).
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field
from typing import Any

import numpy as np
from numpy.typing import ArrayLike, NDArray

from .errors import AbsolveError
from .spectra import interpolate_rows
from .units import check_unit

__all__ = ["ComponentCalibration", "NoiseModel", "ReferenceLibrary", "library_from_absorptivities"]


@dataclass(frozen=True)
class NoiseModel:
    """Photometric noise of the instrument, learned from calibration residuals.

    The standard deviation of a measured absorbance A is
    ``sqrt(floor**2 + (proportional * A)**2)``; neighbouring points are
    correlated with coefficient ``exp(-spacing / correlation_length_nm)``
    (a first-order autoregressive process along wavelength), which is how
    instrument smoothing and oversampling show up in residuals.

    Attributes
    ----------
    floor : float
        Noise standard deviation at zero absorbance (absorbance units).
    proportional : float
        Relative noise growth with absorbance (dimensionless).
    correlation_length_nm : float
        Correlation length along wavelength in nm (0 means white noise).
    """

    floor: float
    proportional: float
    correlation_length_nm: float

    def __post_init__(self) -> None:
        for name in ("floor", "proportional", "correlation_length_nm"):
            value = getattr(self, name)
            if not (np.isfinite(value) and value >= 0):
                raise AbsolveError(f"noise model {name} must be a finite number >= 0, got {value!r}")

    def standard_deviation(self, absorbance: ArrayLike) -> NDArray[np.float64]:
        """Noise standard deviation at each absorbance value."""
        a = np.abs(np.asarray(absorbance, dtype=np.float64))
        return np.sqrt(self.floor**2 + (self.proportional * a) ** 2)

    def lag_correlation(self, spacing_nm: float) -> float:
        """Correlation between points ``spacing_nm`` apart (AR(1) coefficient)."""
        if self.correlation_length_nm <= 0:
            return 0.0
        return float(np.exp(-abs(spacing_nm) / self.correlation_length_nm))


@dataclass(frozen=True)
class ComponentCalibration:
    """What the standards said about one component.

    Attributes
    ----------
    name : str
        Component name.
    molar_mass : float or None
        g/mol, when known (needed to report in mass units from a molar library).
    peak_wavelength_nm : float
        Wavelength of the highest absorptivity.
    levels : int
        Number of distinct concentration levels among the standards holding it (0 for known values).
    concentration_range : tuple of float or None
        Lowest and highest concentration among the standards, library unit.
    r_squared : float or None
        Coefficient of determination of the calibration line at the peak.
    intercept, intercept_se, intercept_p : float or None
        Calibration line intercept at the peak (absorbance), its standard error and
        two-sided p-value against zero (a small p points at a blank or baseline problem).
    curvature_p : float or None
        p-value of a quadratic term at the peak (small p: the response bends).
    lack_of_fit_p : float or None
        p-value of the lack-of-fit F test against replicate scatter, when there are replicates.
    linear_limit_absorbance : float or None
        Absorbance above which this component's standards leave the line (None: they never did).
    warnings : tuple of str
        Plain-language warnings about this calibration.
    """

    name: str
    molar_mass: float | None = None
    peak_wavelength_nm: float = float("nan")
    levels: int = 0
    concentration_range: tuple[float, float] | None = None
    r_squared: float | None = None
    intercept: float | None = None
    intercept_se: float | None = None
    intercept_p: float | None = None
    curvature_p: float | None = None
    lack_of_fit_p: float | None = None
    linear_limit_absorbance: float | None = None
    warnings: tuple[str, ...] = ()

    @property
    def expected_concentration(self) -> float | None:
        """The middle of the calibrated range, a sensible default concentration."""
        if self.concentration_range is None:
            return None
        return 0.5 * (self.concentration_range[0] + self.concentration_range[1])


@dataclass(frozen=True, eq=False)
class ReferenceLibrary:
    """Absorptivity spectra of the components on one wavelength grid.

    Attributes
    ----------
    wavelengths : ndarray, shape (n_wavelengths,)
        Increasing grid in nm.
    absorptivity : ndarray, shape (n_components, n_wavelengths)
        Absorbance per (unit concentration x 1 cm).
    std_error : ndarray, shape (n_components, n_wavelengths)
        Standard error of ``absorptivity`` (zeros when unknown).
    unit : str
        Concentration unit the absorptivities refer to.
    components : tuple of ComponentCalibration
        Per-component calibration details, in row order.
    linear_limit_absorbance : float or None
        Measured absorbance above which points are outside the validated working range.
    noise : NoiseModel or None
        Instrument noise learned from the standards.
    stray_light : float
        Stray-light fraction found in the standards; samples are corrected the
        same way before fitting (0: no correction).
    screening_scale : float
        Empirical correction (>= 1) of the interferent screen's null
        distribution, learned from the standards left out one at a time.
    residual_dof : int
        Degrees of freedom of the absorptivity standard errors (0 when unknown).
    provenance : dict
        JSON-safe record of where the library came from.
    """

    wavelengths: NDArray[np.float64]
    absorptivity: NDArray[np.float64]
    std_error: NDArray[np.float64]
    unit: str
    components: tuple[ComponentCalibration, ...]
    linear_limit_absorbance: float | None = None
    noise: NoiseModel | None = None
    stray_light: float = 0.0
    screening_scale: float = 1.0
    residual_dof: int = 0
    provenance: Mapping[str, Any] = field(default_factory=dict)

    def __post_init__(self) -> None:
        grid = np.array(self.wavelengths, dtype=np.float64).reshape(-1)
        k = np.array(self.absorptivity, dtype=np.float64)
        se = np.array(self.std_error, dtype=np.float64)
        if k.ndim == 1:
            k = k.reshape(1, -1)
        if se.ndim == 1:
            se = se.reshape(1, -1)
        if k.shape != (len(self.components), grid.size) or se.shape != k.shape:
            raise AbsolveError(
                f"library arrays of shape {k.shape} and {se.shape} do not match "
                f"{len(self.components)} components x {grid.size} wavelengths"
            )
        if grid.size < 2 or not np.all(np.diff(grid) > 0):
            raise AbsolveError("library wavelengths must be at least two, strictly increasing")
        if not (np.isfinite(self.screening_scale) and 1.0 <= self.screening_scale < 100.0):
            raise AbsolveError(f"screening scale must lie in [1, 100); got {self.screening_scale!r}")
        if not (np.isfinite(self.stray_light) and 0 <= self.stray_light < 0.1):
            raise AbsolveError(f"stray-light fraction must lie in [0, 0.1); got {self.stray_light!r}")
        if not (np.all(np.isfinite(k)) and np.all(np.isfinite(se)) and np.all(se >= 0)):
            raise AbsolveError("library absorptivities and standard errors must be finite (errors >= 0)")
        names = [c.name for c in self.components]
        if len(set(names)) != len(names) or not names:
            raise AbsolveError("library component names must be present and unique")
        object.__setattr__(self, "unit", check_unit(self.unit))
        for name, array in (("wavelengths", grid), ("absorptivity", k), ("std_error", se)):
            array.flags.writeable = False
            object.__setattr__(self, name, array)
        object.__setattr__(self, "provenance", dict(self.provenance))

    @property
    def names(self) -> tuple[str, ...]:
        """Component names in row order."""
        return tuple(c.name for c in self.components)

    @property
    def n_components(self) -> int:
        """Number of components."""
        return len(self.components)

    def component(self, name: str) -> ComponentCalibration:
        """Calibration details of the named component."""
        for info in self.components:
            if info.name == name:
                return info
        raise AbsolveError(f"the library has no component {name!r}", fix="use one of " + ", ".join(self.names))

    def on_grid(self, grid: ArrayLike) -> tuple[NDArray[np.float64], NDArray[np.float64]]:
        """Absorptivity and standard error interpolated onto ``grid`` (inside the library grid only).

        Returns
        -------
        absorptivity, std_error : ndarray, shape (n_components, len(grid))
        """
        target = np.asarray(grid, dtype=np.float64)
        tolerance = 1e-9 * float(self.wavelengths[-1])
        if target[0] < self.wavelengths[0] - tolerance or target[-1] > self.wavelengths[-1] + tolerance:
            raise AbsolveError(
                f"the library covers {self.wavelengths[0]:g}-{self.wavelengths[-1]:g} nm but the scans need "
                f"{target[0]:g}-{target[-1]:g} nm",
                fix="restrict the scans with --range to the library's wavelengths",
            )
        if target.shape == self.wavelengths.shape and np.allclose(target, self.wavelengths, rtol=0, atol=tolerance):
            return np.array(self.absorptivity), np.array(self.std_error)
        return (
            interpolate_rows(self.wavelengths, self.absorptivity, target),
            interpolate_rows(self.wavelengths, self.std_error, target),
        )

    def summary(self) -> dict[str, Any]:
        """JSON-safe summary: per component peak, absorptivity there, levels, range, warnings."""
        rows = []
        for row, info in enumerate(self.components):
            peak = int(np.argmax(self.absorptivity[row]))
            rows.append(
                {
                    "component": info.name,
                    "peak_wavelength_nm": float(self.wavelengths[peak]),
                    "peak_absorptivity": float(self.absorptivity[row, peak]),
                    "peak_std_error": float(self.std_error[row, peak]),
                    "levels": info.levels,
                    "concentration_range": None if info.concentration_range is None else list(info.concentration_range),
                    "r_squared": info.r_squared,
                    "intercept_p": info.intercept_p,
                    "curvature_p": info.curvature_p,
                    "linear_limit_absorbance": info.linear_limit_absorbance,
                    "warnings": list(info.warnings),
                }
            )
        return {
            "unit": self.unit,
            "wavelength_range_nm": [float(self.wavelengths[0]), float(self.wavelengths[-1])],
            "n_wavelengths": int(self.wavelengths.size),
            "linear_limit_absorbance": self.linear_limit_absorbance,
            "stray_light": self.stray_light,
            "components": rows,
        }


def library_from_absorptivities(
    wavelengths: ArrayLike,
    absorptivity: ArrayLike,
    names: Sequence[str],
    unit: str,
    *,
    std_error: ArrayLike | None = None,
    molar_masses: Mapping[str, float] | None = None,
    linear_limit_absorbance: float | None = None,
    provenance: Mapping[str, Any] | None = None,
) -> ReferenceLibrary:
    """Build a library from known absorptivities (e.g. literature molar absorptivities).

    Parameters
    ----------
    wavelengths : array_like, shape (n_wavelengths,)
        Increasing grid in nm.
    absorptivity : array_like, shape (n_components, n_wavelengths)
        Absorbance per (unit concentration x 1 cm) in ``unit``.
    names : sequence of str
        Component names.
    unit : str
        Concentration unit, e.g. ``"mol/L"`` for epsilon in L mol^-1 cm^-1.
    std_error : array_like, optional
        Standard errors; zeros when not given (the uncertainty budget then has no
        absorptivity term, and says so).
    """
    k = np.atleast_2d(np.asarray(absorptivity, dtype=np.float64))
    se = np.zeros_like(k) if std_error is None else np.atleast_2d(np.asarray(std_error, dtype=np.float64))
    grid = np.asarray(wavelengths, dtype=np.float64)
    masses = dict(molar_masses or {})
    components = []
    for row, name in enumerate(names):
        warnings = ("no standards: absorptivities taken as given, without uncertainty",) if std_error is None else ()
        components.append(
            ComponentCalibration(
                name=str(name),
                molar_mass=masses.get(str(name)),
                peak_wavelength_nm=float(grid[int(np.argmax(k[row]))]) if k.shape[1] == grid.size else float("nan"),
                warnings=warnings,
            )
        )
    return ReferenceLibrary(
        wavelengths=grid,
        absorptivity=k,
        std_error=se,
        unit=unit,
        components=tuple(components),
        linear_limit_absorbance=linear_limit_absorbance,
        provenance=dict(provenance or {}),
    )
