"""A detailed interferent check: screening verdicts, diagnoses, and suspects tested one by one.

:func:`check_scans` quantifies the scans against the library (which screens
every residual, see :mod:`absolve.screening`) and, when candidate
interferents are given, refits each scan with each candidate added and
tests whether it explains what the library did not
(:func:`absolve.screening.explain_with_suspects`).
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

import numpy as np
from numpy.typing import NDArray

from .errors import AbsolveError
from .library import ReferenceLibrary
from .photometry import correct_stray_light
from .quantify import Baseline, MixtureResult, baseline_columns, quantify
from .screening import SuspectReport, explain_with_suspects
from .spectra import Spectra

__all__ = ["CheckResult", "check_scans"]


@dataclass(frozen=True, eq=False)
class CheckResult:
    """Screening of every scan, with the suspects' refits when candidates were given.

    Attributes
    ----------
    mixture : MixtureResult
        The quantification, whose ``screening`` holds verdicts and diagnoses.
    suspects : SuspectReport or None
        Per scan and candidate: amount, standard error, F and p; the best candidate.
    """

    mixture: MixtureResult
    suspects: SuspectReport | None

    def rows(self) -> list[dict[str, Any]]:
        """One JSON-safe record per scan: verdict, p-value, diagnosis and best suspect."""
        screening = self.mixture.screening
        records = []
        best = self.suspects.best_names if self.suspects is not None else None
        for i, name in enumerate(self.mixture.scan_names):
            diagnosis = screening.diagnoses[i]
            record: dict[str, Any] = {
                "scan": name,
                "interferent": bool(screening.flagged[i]),
                "p_value": _finite(screening.p_value[i]),
                "rms_residual": _finite(self.mixture.rms_residual[i]),
                "diagnosis": None if diagnosis is None else diagnosis.kind,
                "confidence": None if diagnosis is None else diagnosis.confidence,
                "window_nm": None if diagnosis is None else [float(v) for v in diagnosis.window_nm],
                "unexplained_absorbance": None if diagnosis is None else _finite(diagnosis.size_absorbance),
                "message": None if diagnosis is None else diagnosis.message,
            }
            if self.suspects is not None and best is not None:
                j = int(self.suspects.best[i])
                record["suspect"] = best[i]
                record["suspect_amount"] = None if j < 0 else _finite(self.suspects.amount[i, j])
                record["suspect_amount_se"] = None if j < 0 else _finite(self.suspects.amount_se[i, j])
                record["suspect_p_value"] = _finite(self.suspects.best_p[i])
            records.append(record)
        return records


def _finite(value: float) -> float | None:
    number = float(value)
    return number if np.isfinite(number) else None


def check_scans(
    spectra: Spectra,
    library: ReferenceLibrary,
    *,
    suspects: Spectra | None = None,
    suspect_unit_per_cm: bool = True,
    baseline: Baseline = "offset",
    wavelength_range: tuple[float | None, float | None] = (None, None),
    path_length: float = 1.0,
    alpha: float = 0.05,
    learn_library_error: bool = False,
) -> CheckResult:
    """Screen every scan against the library, and test candidate interferents.

    Parameters
    ----------
    spectra : Spectra
        Scans to check.
    library : ReferenceLibrary
        The components expected in them.
    suspects : Spectra, optional
        Candidate interferent spectra (absorbance per unit amount per cm when
        ``suspect_unit_per_cm``; otherwise as measured, amounts then come out
        as multiples of the candidate scan), interpolated onto the scans' grid.
    learn_library_error : bool, default False
        Set the library's fixed error, learned from these scans, aside before
        the screen (see :func:`absolve.quantify.quantify`); the suspects are
        tested on the uncorrected scans.
    """
    mixture = quantify(
        spectra, library, baseline=baseline, wavelength_range=wavelength_range, path_length=path_length, alpha=alpha,
        learn_library_error=learn_library_error,
    )
    if suspects is None:
        return CheckResult(mixture, None)
    if library.noise is None:
        raise AbsolveError(
            "testing suspects needs the library's noise model",
            fix="build the library from standards with 'absolve calibrate SCANS --standards ...'",
        )
    grid = mixture.wavelengths
    low, high = suspects.wavelengths[0], suspects.wavelengths[-1]
    if grid[0] < low or grid[-1] > high:
        raise AbsolveError(
            f"the suspects cover {low:g}-{high:g} nm but the fit uses {grid[0]:g}-{grid[-1]:g} nm",
            fix="restrict the fit with --range to the suspects' wavelengths",
            file=suspects.source,
        )
    candidates = suspects.to_absorbance().interpolate(grid).values
    if not np.all(np.isfinite(candidates)):
        raise AbsolveError("a suspect spectrum has unusable points in the fitted range", fix="give complete suspect spectra", file=suspects.source)
    if suspect_unit_per_cm:
        candidates = candidates * path_length
    design = _design(library, grid, baseline, path_length)
    measured = correct_stray_light(spectra.to_absorbance().restrict(grid[0], grid[-1]).interpolate(grid).values, library.stray_light)
    nonnegative = np.arange(design.shape[1]) < library.n_components
    report = explain_with_suspects(
        grid, np.where(mixture.used, measured, np.nan), design, nonnegative, candidates, suspects.names, library.noise,
        usable=mixture.used, alpha=alpha,
    )
    return CheckResult(mixture, report)


def _design(library: ReferenceLibrary, grid: NDArray[np.float64], baseline: str, path_length: float) -> NDArray[np.float64]:
    absorptivity, _ = library.on_grid(grid)
    return np.column_stack([absorptivity.T * path_length, baseline_columns(grid, baseline)])

