"""Result files of a quantification: results.csv, fit.csv, fitted/residual spectra, results.json.

All text is produced in memory with fixed float formatting and stable
ordering, so the same inputs give byte-identical files; time stamps live only
in the provenance of results.json and the report.
"""

from __future__ import annotations

import csv
import io
import json
from typing import Any

import numpy as np

from ..inverse import InversePrediction
from ..quantify import MixtureResult

__all__ = ["results_csv", "fit_csv", "spectra_csv", "results_json", "prediction_results_csv", "prediction_fit_csv"]


def _number(value: float, spec: str = ".6g") -> str:
    return format(float(value), spec) if np.isfinite(value) else ""


def _writer() -> tuple[io.StringIO, Any]:
    buffer = io.StringIO()
    return buffer, csv.writer(buffer, lineterminator="\n")


def results_csv(result: MixtureResult) -> str:
    """One row per scan and component: concentration, uncertainties, LOD, flags."""
    buffer, writer = _writer()
    writer.writerow(
        ["scan", "component", "concentration", "std_uncertainty", "expanded_uncertainty", "coverage_factor",
         "unit", "upper_limit", "lod", "loq", "flags"]
    )
    for i, scan in enumerate(result.scan_names):
        for j, component in enumerate(result.components):
            writer.writerow(
                [
                    scan, component,
                    _number(result.concentration[i, j]), _number(result.std_uncertainty[i, j]),
                    _number(result.expanded_uncertainty[i, j]), _number(result.coverage_factor[i, j], ".4g"),
                    result.unit, _number(result.upper_limit[i, j]), _number(result.lod[i, j]), _number(result.loq[i, j]),
                    ";".join(result.flags[i][j]),
                ]
            )
    return buffer.getvalue()


def fit_csv(result: MixtureResult, extra: dict[str, list[str]] | None = None) -> str:
    """One row per scan: residual size, conditioning, interferent verdict, exclusions, flags.

    ``extra`` adds columns (name -> one text per scan), e.g. screening diagnoses.
    """
    buffer, writer = _writer()
    extra = extra or {}
    writer.writerow(
        ["scan", "rms_residual", "condition_number", "interferent", "interferent_p_value", "diagnosis", "diagnosis_confidence",
         "diagnosis_window_nm", "unexplained_absorbance", "residual_p_value", "residual_dof",
         "noise_scale", "points_used", "points_excluded", *extra, "flags"]
    )
    excluded = sum(result.excluded.values())
    diagnoses = result.screening.diagnoses
    for i, scan in enumerate(result.scan_names):
        diagnosis = diagnoses[i]
        writer.writerow(
            [
                scan, _number(result.rms_residual[i]), _number(result.condition_number[i], ".4g"),
                "true" if result.interferent[i] else "false", _number(result.screening.p_value[i], ".4g"),
                "" if diagnosis is None else diagnosis.kind,
                "" if diagnosis is None else diagnosis.confidence,
                "" if diagnosis is None else f"{diagnosis.window_nm[0]:g}-{diagnosis.window_nm[1]:g}",
                "" if diagnosis is None else _number(diagnosis.size_absorbance, ".3g"),
                _number(result.residual_p_value[i], ".4g"),
                int(result.residual_dof[i]), _number(result.noise_scale[i], ".4g"),
                int(result.used[i].sum()), int(excluded[i]), *(values[i] for values in extra.values()),
                ";".join(result.scan_flags[i]),
            ]
        )
    return buffer.getvalue()


def spectra_csv(result: MixtureResult, which: str) -> str:
    """Fitted or residual spectra in the wide scan-table layout (empty cells where a point was not used)."""
    values = result.fitted if which == "fitted" else result.residuals
    buffer, writer = _writer()
    writer.writerow(["wavelength_nm", *result.scan_names])
    # Rounding first, then adding 0.0, writes values that round to zero as "0.000000", never "-0.000000".
    formatted = np.where(np.isfinite(values), np.char.mod("%.6f", np.round(np.nan_to_num(values), 6) + 0.0), "")
    for j, wavelength in enumerate(result.wavelengths):
        # Shortest text that reads back to the same float, as in scan tables: fine grids must not collapse.
        writer.writerow([np.format_float_positional(wavelength, trim="-"), *formatted[:, j]])
    return buffer.getvalue()


def results_json(result: MixtureResult, provenance: dict[str, Any], extra: dict[str, Any] | None = None) -> str:
    """Everything, including the uncertainty budget, as JSON."""
    document = {"format": "absolve-results", "version": 1, **result.summary(), "provenance": provenance}
    if extra:
        document.update(extra)
    return json.dumps(document, indent=1, allow_nan=False) + "\n"


def prediction_results_csv(prediction: InversePrediction) -> str:
    """results.csv for a PLS prediction, in the same columns as for a library.

    The coverage factor is 2 (the leverage-based uncertainty has many degrees
    of freedom); upper limit, LOD and LOQ are not defined for the inverse model
    and stay empty.
    """
    buffer, writer = _writer()
    writer.writerow(
        ["scan", "component", "concentration", "std_uncertainty", "expanded_uncertainty", "coverage_factor",
         "unit", "upper_limit", "lod", "loq", "flags"]
    )
    for i, scan in enumerate(prediction.names):
        for j, component in enumerate(prediction.components):
            flags = []
            if not prediction.complete[i]:
                flags.append("too-few-points")
            if prediction.beyond_range[i, j]:
                flags.append("beyond-calibration")
            u = prediction.std_uncertainty[i, j]
            writer.writerow(
                [scan, component, _number(prediction.concentration[i, j]), _number(u), _number(2.0 * u), "2",
                 prediction.unit, "", "", "", ";".join(flags)]
            )
    return buffer.getvalue()


def prediction_fit_csv(prediction: InversePrediction, n_points: int) -> str:
    """fit.csv for a PLS prediction: Q residual and Hotelling T^2 against their limits.

    ``rms_residual`` is sqrt(Q / n_points), the root mean square of the spectral
    residual outside the model over the model's ``n_points`` wavelengths.
    """
    buffer, writer = _writer()
    writer.writerow(
        ["scan", "rms_residual", "condition_number", "interferent", "q_residual", "q_limit", "hotelling_t2", "t2_limit", "flags"]
    )
    for i, scan in enumerate(prediction.names):
        outside = bool(prediction.outside[i])
        flags = "outside-model" if outside else ""
        if not prediction.complete[i]:
            flags = "too-few-points"
        writer.writerow(
            [scan, _number(np.sqrt(prediction.q_residual[i] / n_points)), "",
             "true" if outside else "false", _number(prediction.q_residual[i]), _number(prediction.q_limit),
             _number(prediction.hotelling_t2[i]), _number(prediction.t2_limit), flags]
        )
    return buffer.getvalue()
