"""Result files of a quantification: results.csv, fit.csv, fitted/residual spectra, results.json.

All text is produced with fixed float formatting and stable ordering, so the
same inputs give byte-identical files; time stamps live only in the
provenance of results.json and the report. Columns are formatted a whole
array at a time and rows joined once, so a batch of many thousands of scans
costs no Python work per cell beyond the number's own formatting; the wide
spectra tables can also be had row by row (:func:`spectra_csv_lines`) to be
written without holding their text.
"""

from __future__ import annotations

import contextlib
import csv
import io
import json
import os
import tempfile
from collections.abc import Callable, Iterable, Iterator, Mapping, Sequence
from json.encoder import encode_basestring_ascii
from pathlib import Path
from typing import TYPE_CHECKING, Any, TextIO

import numpy as np
import orjson
from numpy.typing import NDArray

from ..errors import AbsolveError
from ..quantify import MixtureResult
from .files import Content, _umask, check_writable, folders_removed_on_failure, write_all
from .tables import csv_field, fixed_decimal_rows, wide_table_lines

if TYPE_CHECKING:
    from ..inverse import InversePrediction

__all__ = [
    "results_csv", "fit_csv", "spectra_csv", "spectra_csv_lines", "results_json", "scan_json_lines", "write_results_in_chunks", "STREAMED_FILES",
    "prediction_results_csv", "prediction_fit_csv",
]

_RESULTS_HEADER = (
    "scan", "component", "concentration", "std_uncertainty", "expanded_uncertainty", "coverage_factor",
    "unit", "upper_limit", "lod", "loq", "flags",
)


def _number(value: float, spec: str = ".6g") -> str:
    return format(float(value), spec) if np.isfinite(value) else ""


def _numbers(values: NDArray[Any], spec: str = ".6g") -> list[str]:
    """``_number`` of every value of an array, in C order.

    One ``%`` formatting of the whole array: the same C formatter as
    ``format(value, spec)``, without a Python call per value.
    """
    flat = np.ravel(values).astype(np.float64)
    if flat.size == 0:
        return []
    finite = np.isfinite(flat)
    texts = ((f"%{spec}," * flat.size) % tuple(np.where(finite, flat, 0.0).tolist()))[:-1].split(",")
    for i in np.flatnonzero(~finite).tolist():
        texts[i] = ""
    return texts


def _spelt(spell: Callable[[tuple[str, ...]], str], groups: Iterable[tuple[str, ...]]) -> list[str]:
    """``spell`` of each group of words, computed once per distinct group (most scans share a few flag sets)."""
    texts: dict[tuple[str, ...], str] = {}
    return [texts[words] if words in texts else texts.setdefault(words, spell(words)) for words in groups]


def _rows(header: Sequence[str], columns: Sequence[Sequence[str]]) -> str:
    """CSV text: a header line, then one line per position of the (already quoted) columns."""
    lines = [",".join(csv_field(name) for name in header)]
    lines.extend(map(",".join, zip(*columns)))
    return "\n".join(lines) + "\n"


def _writer() -> tuple[io.StringIO, Any]:
    buffer = io.StringIO()
    return buffer, csv.writer(buffer, lineterminator="\n")


def results_csv(result: MixtureResult) -> str:
    """One row per scan and component: concentration, uncertainties, LOD, flags."""
    n_comp = len(result.components)
    flags = _spelt(lambda words: csv_field(";".join(words)), (words for scan in result.flags for words in scan))
    columns = [
        [name for name in map(csv_field, result.scan_names) for _ in range(n_comp)],
        [csv_field(component) for component in result.components] * result.n_scans,
        _numbers(result.concentration),
        _numbers(result.std_uncertainty),
        _numbers(result.expanded_uncertainty),
        _numbers(result.coverage_factor, ".4g"),
        [csv_field(result.unit)] * (result.n_scans * n_comp),
        _numbers(result.upper_limit),
        _numbers(result.lod),
        _numbers(result.loq),
        flags,
    ]
    return _rows(_RESULTS_HEADER, columns)


def fit_csv(result: MixtureResult, extra: dict[str, list[str]] | None = None) -> str:
    """One row per scan: residual size, conditioning, interferent verdict, exclusions, flags.

    ``extra`` adds columns (name -> one text per scan), e.g. screening diagnoses.
    """
    extra = extra or {}
    n = result.n_scans
    kind, confidence, window, size = [""] * n, [""] * n, [""] * n, [""] * n
    for i, diagnosis in enumerate(result.screening.diagnoses):
        if diagnosis is not None:
            kind[i] = csv_field(diagnosis.kind)
            confidence[i] = csv_field(diagnosis.confidence)
            window[i] = f"{diagnosis.window_nm[0]:g}-{diagnosis.window_nm[1]:g}"
            size[i] = _number(diagnosis.size_absorbance, ".3g")
    excluded = sum(result.excluded.values())
    columns = [
        [csv_field(name) for name in result.scan_names],
        _numbers(result.rms_residual),
        _numbers(result.condition_number, ".4g"),
        ["true" if flagged else "false" for flagged in result.interferent.tolist()],
        _numbers(result.screening.p_value, ".4g"),
        kind, confidence, window, size,
        _numbers(result.residual_p_value, ".4g"),
        [str(int(dof)) for dof in result.residual_dof.tolist()],
        _numbers(result.noise_scale, ".4g"),
        [str(int(count)) for count in result.used.sum(axis=1).tolist()],
        [str(int(count)) for count in np.asarray(excluded).tolist()],
        *([csv_field(str(value)) for value in values] for values in extra.values()),
        _spelt(lambda words: csv_field(";".join(words)), result.scan_flags),
    ]
    header = (
        "scan", "rms_residual", "condition_number", "interferent", "interferent_p_value", "diagnosis", "diagnosis_confidence",
        "diagnosis_window_nm", "unexplained_absorbance", "residual_p_value", "residual_dof",
        "noise_scale", "points_used", "points_excluded", *extra, "flags",
    )
    return _rows(header, columns)


def spectra_csv(result: MixtureResult, which: str) -> str:
    """Fitted or residual spectra in the wide scan-table layout (empty cells where a point was not used)."""
    return "".join(spectra_csv_lines(result, which))


def spectra_csv_lines(result: MixtureResult, which: str) -> Iterator[str]:
    """The lines of :func:`spectra_csv`, one wavelength row at a time (for writing a large table in pieces)."""
    values = result.fitted if which == "fitted" else result.residuals
    # Rounding value * 1e6 (np.round's way) writes values that round to zero as "0.000000", never "-0.000000".
    return wide_table_lines("wavelength_nm", result.scan_names, result.wavelengths, values, missing="", rounding="scaled")


def results_json(result: MixtureResult, provenance: dict[str, Any], extra: dict[str, Any] | None = None) -> str:
    """Everything, including the uncertainty budget, as JSON: one line per scan, so large batches stay readable and quick to write.

    ``{"format", "version", "unit", "components", "settings", "scans": [...],
    "provenance", ...extra}``; each scan is the record of
    :meth:`MixtureResult.summary`.
    """
    return _json_head(result) + ",\n".join(scan_json_lines(result)) + _json_tail(provenance, extra)


def _json_head(result: MixtureResult) -> str:
    """The opening of results.json up to its list of scans (the keys of :meth:`MixtureResult.summary` before "scans")."""
    head = {"format": "absolve-results", "version": 1, "unit": result.unit, "components": list(result.components), "settings": dict(result.settings)}
    return json.dumps(head, allow_nan=False)[:-1] + ', "scans": [\n'


def _json_tail(provenance: dict[str, Any], extra: dict[str, Any] | None) -> str:
    """The closing of results.json after its list of scans: provenance and any further entries."""
    tail = {"provenance": provenance, **(extra or {})}
    return "\n], " + json.dumps(tail, indent=1, allow_nan=False)[1:] + "\n"


_LEADING = ("concentration", "std_uncertainty", "expanded_uncertainty", "coverage_factor", "effective_dof")
_TRAILING = ("upper_limit", "lod", "loq", "sensitivity", "selectivity", "variance_inflation")


def scan_json_lines(result: MixtureResult) -> list[str]:
    """The JSON text of each scan record of :meth:`MixtureResult.summary`, made without building the records.

    The text is ``json.dumps`` of the record but for the spelling of some
    numbers: orjson spells a whole array of floats at a time, each as the
    shortest text that reads back to the same float (the digits ``repr``
    finds, written ``2.5e-7`` and ``0.00001`` where ``repr`` writes
    ``2.5e-07`` and ``1e-05``), ``null`` where not finite. Names are escaped
    as by the json module. The texts are poured into one text template per
    component and per scan, several times faster than encoding
    dictionaries for a batch of many thousands of scans.
    """
    n, m = result.n_scans, len(result.components)
    budget = list(result.budget)
    component_template = "".join([
        '{"component": %s, ', *(f'"{key}": %s, ' for key in _LEADING), '"budget": {',
        ", ".join(f'{json.dumps(key)}: %s' for key in budget), "}, ", *(f'"{key}": %s, ' for key in _TRAILING), '"flags": %s}',
    ])
    # One row of numbers per scan and component, in the template's order.
    numbers = np.stack(
        [getattr(result, key) for key in _LEADING] + [result.budget[key] for key in budget] + [getattr(result, key) for key in _TRAILING], axis=-1
    ).reshape(n * m, -1)
    flags = _spelt(lambda words: json.dumps(list(words)), (words for scan in result.flags for words in scan))
    names = [encode_basestring_ascii(name) for name in result.components] * n
    components = [component_template % (name, *row.split(", "), words) for name, row, words in zip(names, _json_rows(numbers), flags)]
    excluded = list(result.excluded)
    scan_template = (
        '{"scan": %s, "components": [%s], "baseline": [%s], "rms_residual": %s, "condition_number": %s, "residual_dof": %s, '
        '"noise_scale": %s, "residual_p_value": %s, "points_used": %s, "excluded": {'
        + ", ".join(f'{json.dumps(key)}: %s' for key in excluded)
        + '}, "interferent": %s, "interferent_p_value": %s, "diagnosis": %s, "flags": %s}'
    )
    diagnoses = ["null" if d is None else json.dumps(d.summary(), allow_nan=False) for d in result.screening.diagnoses]
    scan_columns = [
        [encode_basestring_ascii(name) for name in result.scan_names],
        [", ".join(components[i * m : (i + 1) * m]) for i in range(n)],
        _json_rows(result.baseline),
        _json_texts(result.rms_residual), _json_texts(result.condition_number),
        _integer_texts(result.residual_dof),
        _json_texts(result.noise_scale), _json_texts(result.residual_p_value),
        _integer_texts(result.used.sum(axis=1)),
        *(_integer_texts(result.excluded[key]) for key in excluded),
        ["true" if flagged else "false" for flagged in result.interferent.tolist()],
        _json_texts(result.screening.p_value),
        diagnoses,
        _spelt(lambda words: json.dumps(list(words)), result.scan_flags),
    ]
    return [scan_template % values for values in zip(*scan_columns)]


def _json_texts(values: NDArray[Any]) -> list[str]:
    """JSON text of every value of an array, in C order (``null`` for NaN and infinity)."""
    flat = np.ascontiguousarray(values, dtype=np.float64).reshape(-1)
    return orjson.dumps(flat, option=orjson.OPT_SERIALIZE_NUMPY)[1:-1].decode("ascii").split(",") if flat.size else []


def _json_rows(values: NDArray[Any]) -> list[str]:
    """The JSON texts of each row of a 2-D array joined by ``", "`` (as ``json.dumps`` separates list items)."""
    block = np.ascontiguousarray(values, dtype=np.float64)
    if block.size == 0:
        return [""] * block.shape[0]
    # "[[1.0,2.0],[3.0,4.0]]": no number holds a comma or a bracket, so the rows split at "],[".
    return orjson.dumps(block, option=orjson.OPT_SERIALIZE_NUMPY)[2:-2].decode("ascii").replace(",", ", ").split("], [")


def _integer_texts(values: NDArray[Any]) -> list[str]:
    """Decimal text of every value of an integer-valued array, in C order."""
    return list(map(str, np.ravel(values).astype(np.int64).tolist()))


#: Files :func:`write_results_in_chunks` can write, by name.
STREAMED_FILES = ("results.csv", "fit.csv", "fitted.csv", "residuals.csv", "results.json")


def write_results_in_chunks(
    chunks: Iterable[MixtureResult],
    targets: Mapping[str, Path],
    *,
    provenance: dict[str, Any],
    force: bool = False,
    json_extra: dict[str, Any] | None = None,
    finish: Callable[[], Mapping[Path, Content]] | None = None,
) -> int:
    """Write result files from results handed out chunk by chunk (see :func:`absolve.quantify.quantify_chunks`).

    The files are laid out exactly as :func:`results_csv`, :func:`fit_csv`,
    :func:`spectra_csv` and :func:`results_json` lay out the whole batch's
    result (byte for byte the same given the same numbers), but only one
    chunk is held at a time: memory stays bounded
    whatever the number of scans. Long tables are appended chunk by chunk;
    the wide spectra tables (one column per scan) are written as one column
    block per chunk into scratch files and joined row by row at the end.
    Every file goes to a temporary name beside its target and all are
    renamed only when everything has succeeded (as :func:`absolve.io.files.write_all`).

    Parameters
    ----------
    chunks : iterable of MixtureResult
        Consecutive runs of scans of one batch, in order.
    targets : mapping of str to Path
        File name in :data:`STREAMED_FILES` -> where to write it; any subset.
    provenance : dict
        Recorded in results.json.
    force : bool
        Replace existing files.
    json_extra : dict, optional
        Further top-level entries of results.json (as ``extra`` of :func:`results_json`).
    finish : callable, optional
        Called once every chunk has been written; returns further files
        (path -> content, e.g. a report made from what was gathered on the
        way), written and renamed together with the others, all or none.

    Returns
    -------
    int
        Number of scans written.
    """
    unknown = sorted(set(targets) - set(STREAMED_FILES))
    if unknown:
        raise AbsolveError(f"cannot stream {unknown[0]!r}", fix="choose among " + ", ".join(STREAMED_FILES))
    check_writable(list(targets.values()), force=force)
    folder = Path(next(iter(targets.values()))).parent
    try:
        with folders_removed_on_failure([folder]), contextlib.ExitStack() as stack:
            scratch = Path(stack.enter_context(tempfile.TemporaryDirectory(prefix=".absolve-", dir=folder)))
            temporary = {name: scratch / name for name in targets}
            handles = {name: stack.enter_context(open(path, "w", encoding="utf-8", newline="")) for name, path in temporary.items()}
            names: list[str] = []
            parts: dict[str, list[Path]] = {"fitted.csv": [], "residuals.csv": []}
            wavelengths: NDArray[np.float64] | None = None
            for index, chunk in enumerate(chunks):
                _append_chunk(chunk, index, wavelengths is None, handles, scratch, parts)
                wavelengths = chunk.wavelengths
                names.extend(chunk.scan_names)
                # Let go of the chunk before the next is made: one chunk's spectra at a time.
                del chunk
            if wavelengths is None:
                raise AbsolveError("no scans to write", fix="give at least one scan")
            if "results.json" in handles:
                handles["results.json"].write(_json_tail(provenance, json_extra))
            for name in ("fitted.csv", "residuals.csv"):
                if name in handles:
                    _join_columns(handles[name], "wavelength_nm", names, wavelengths, parts[name], stack)
            for handle in handles.values():
                handle.close()
            for path in temporary.values():
                os.chmod(path, 0o666 & ~_umask())
            others = finish() if finish is not None else {}
            write_all(others, force=force, staged=[(path, targets[name]) for name, path in temporary.items()])
    except OSError as error:
        raise AbsolveError(f"cannot write the results in {folder}: {error.strerror}", fix="check there is free space on the disk and the folder is writable") from None
    return len(names)


def _append_chunk(
    chunk: MixtureResult, index: int, head: bool, handles: Mapping[str, TextIO], scratch: Path, parts: dict[str, list[Path]]
) -> None:
    """Write one chunk: rows of the long tables and results.json, a column block of each wide table."""
    for name, write in (("results.csv", results_csv), ("fit.csv", fit_csv)):
        if name in handles:
            text = write(chunk)
            handles[name].write(text if head else text[text.index("\n") + 1 :])
    for name, which in (("fitted.csv", "fitted"), ("residuals.csv", "residuals")):
        if name in handles:
            part = scratch / f"{which}-{index:06d}.part"
            values = chunk.fitted if which == "fitted" else chunk.residuals
            if values is None:
                raise ValueError(f"chunk {index} holds no {which} spectra")
            with open(part, "wb") as stream:
                # One line per wavelength: the chunk's column block of the table.
                stream.writelines(fixed_decimal_rows(values.T, "", "scaled"))
            parts[name].append(part)
    if "results.json" in handles:
        handles["results.json"].write((_json_head(chunk) if head else ",\n") + ",\n".join(scan_json_lines(chunk)))


def _join_columns(handle: TextIO, first_header: str, names: Sequence[str], wavelengths: NDArray[np.float64], parts: list[Path], stack: contextlib.ExitStack) -> None:
    """The wide table from column blocks: the header, then per wavelength the row's pieces joined.

    The blocks are ASCII, so they are joined as bytes, without decoding and
    encoding the whole table.
    """
    handle.write(",".join(csv_field(name) for name in (first_header, *names)) + "\n")
    handle.flush()
    out = handle.buffer
    with contextlib.ExitStack() as inner:
        blocks = [inner.enter_context(open(part, "rb")) for part in parts]
        for wavelength in wavelengths.tolist():
            pieces = [block.readline()[:-1] for block in blocks]
            out.write(np.format_float_positional(wavelength, trim="-").encode("ascii") + b"," + b",".join(pieces) + b"\n")


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
