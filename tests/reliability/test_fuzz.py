"""Fuzzing: random and mutated inputs to every reader, to the solver and to quantify.

The contract is the same everywhere: a valid result or :class:`AbsolveError`,
never another exception. Valid results are checked for what "valid" means
(finite increasing grids, no infinities, non-negative concentrations, every
missing concentration explained by a flag). Hypothesis runs under the
derandomised profile of tests/conftest.py.
"""

from __future__ import annotations

import contextlib
import faulthandler
import itertools
import json
import math
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import numpy as np
import pytest
from hypothesis import HealthCheck, event, given, settings
from hypothesis import strategies as st
from hypothesis.extra import numpy as hnp

from _reliability import GOOD
from absolve.errors import AbsolveError
from absolve.inverse import InversePrediction
from absolve.io.jcamp import read_jcamp, write_jcamp
from absolve.io.library_file import read_library
from absolve.io.model_file import read_model
from absolve.io.tables import concentration_matrix, read_concentration_table, read_scan_table, read_scans
from absolve.library import library_from_absorptivities
from absolve.quantify import MixtureResult, quantify
from absolve.solver import solve_nonnegative
from absolve.spectra import Spectra

FUZZ = settings(max_examples=60, suppress_health_check=[HealthCheck.function_scoped_fixture, HealthCheck.too_slow])


@pytest.fixture(scope="module")
def folder(tmp_path_factory: pytest.TempPathFactory) -> Path:
    return tmp_path_factory.mktemp("fuzz")


_names = itertools.count()


def _write(folder: Path, content: bytes, suffix: str) -> Path:
    path = folder / f"case-{next(_names)}{suffix}"
    path.write_bytes(content)
    return path


def _check_spectra(scans: Spectra) -> None:
    """What every Spectra a reader returns must satisfy."""
    assert scans.wavelengths.ndim == 1 and scans.wavelengths.size >= 1
    assert np.all(np.isfinite(scans.wavelengths)) and np.all(np.diff(scans.wavelengths) > 0)
    assert scans.values.shape == (len(scans.names), scans.wavelengths.size)
    assert not np.any(np.isinf(scans.values))
    assert len(set(scans.names)) == len(scans.names)


# ------------------------------------------------------------------ byte-level mutations

# Bytes that mean something to one reader or another: separators, decimal marks, quotes, comments,
# byte-order marks, NUL, old Mac line ends, JSON and JCAMP-DX syntax, words for missing values.
_TOKENS = [b",", b";", b"\t", b" ", b".", b'"', b"#", b"\n", b"\r", b"\r\n", b"\x00", b"\xff\xfe", b"\xef\xbb\xbf", b"\xe9",
           b"NaN", b"inf", b"-", b"1e999", b"saturated", b"{", b"}", b"[", b"]", b":", b"null", b"##", b"=", b"?", b"@", b"%"]

_mutation = st.one_of(
    st.tuples(st.just("flip"), st.integers(0, 1 << 20), st.integers(0, 255)),
    st.tuples(st.just("insert"), st.integers(0, 1 << 20), st.sampled_from(_TOKENS)),
    st.tuples(st.just("delete"), st.integers(0, 1 << 20), st.integers(1, 40)),
    st.tuples(st.just("repeat"), st.integers(0, 1 << 20), st.integers(1, 80)),
    st.tuples(st.just("truncate"), st.integers(0, 1 << 20), st.just(0)),
)


def _mutate(content: bytes, mutations: list[tuple[str, int, Any]]) -> bytes:
    data = bytearray(content)
    for kind, where, what in mutations:
        at = where % (len(data) + 1)
        if kind == "flip" and data:
            data[min(at, len(data) - 1)] = what
        elif kind == "insert":
            data[at:at] = what
        elif kind == "delete":
            del data[at : at + what]
        elif kind == "repeat":
            data[at:at] = data[at : at + what]
        elif kind == "truncate":
            del data[at:]
    return bytes(data)


_mutations = st.lists(_mutation, min_size=1, max_size=5)
_quantity = st.sampled_from([None, "absorbance", "transmittance", "percent-transmittance"])


@given(mutations=_mutations, quantity=_quantity, decimal=st.sampled_from([".", ","]))
@FUZZ
def test_mutated_scan_tables(folder: Path, mutations: list, quantity: Any, decimal: str) -> None:
    path = _write(folder, _mutate((GOOD / "samples.csv").read_bytes(), mutations), ".csv")
    try:
        scans = read_scans([path], decimal=decimal, quantity=quantity)
    except AbsolveError as error:
        event("refused")
        assert error.file is not None and str(path) in error.message
        return
    _check_spectra(scans)


_number = st.floats(-5.0, 5.0).map(lambda v: f"{v:.4f}")
_cell = st.one_of(
    _number, _number, _number,
    st.floats(allow_nan=True, allow_infinity=True).map(repr),
    st.integers(-10, 4000).map(str),
    st.sampled_from(["", "NaN", "n/a", "saturated", "-", "1,5", "0,25", "1e400", "abc", '"q"', "é", " "]),
    st.text(max_size=6),
)


# One cell in ten is something other than a plain number, so that some tables read and others fail late.
_mostly_numbers = st.integers(0, 9).flatmap(lambda k: _cell if k == 0 else _number)


@st.composite
def _table_rows(draw: st.DrawFn) -> list[list[str]]:
    """Rows of one width (a wavelength-like first cell, then values), now and then one ragged row."""
    width = draw(st.integers(1, 5))
    rows = [
        [draw(st.integers(0, 9).flatmap(lambda k: _cell if k == 0 else st.integers(190, 1100).map(str))), *draw(st.lists(_mostly_numbers, min_size=width - 1, max_size=width - 1))]
        for _ in range(draw(st.integers(0, 8)))
    ]
    if rows and draw(st.integers(0, 4)) == 0:
        rows[draw(st.integers(0, len(rows) - 1))].append(draw(_cell))
    return rows


@given(
    rows=_table_rows(),
    delimiter=st.sampled_from([",", ";", "\t", " "]),
    header=st.booleans(),
    encoding=st.sampled_from(["utf-8", "utf-8-sig", "utf-16", "latin-1"]),
    quantity=_quantity,
)
@FUZZ
def test_random_scan_tables(folder: Path, rows: list, delimiter: str, header: bool, encoding: str, quantity: Any) -> None:
    lines = [delimiter.join(row) for row in rows]
    if header and rows:
        lines.insert(0, delimiter.join(["nm", *(f"s{j}" for j in range(len(rows[0]) - 1))]))
    content = "\n".join(lines).encode(encoding, errors="replace")
    path = _write(folder, content, ".txt")
    try:
        scans = read_scans([path], quantity=quantity)
    except AbsolveError as error:
        event("refused")
        assert error.file is not None
        return
    _check_spectra(scans)


@given(mutations=_mutations)
@FUZZ
def test_mutated_concentration_tables(folder: Path, mutations: list) -> None:
    path = _write(folder, _mutate((GOOD / "standards_concentrations.csv").read_bytes(), mutations), ".csv")
    names = read_scan_table(GOOD / "standards.csv").names
    try:
        table = read_concentration_table(path)
        matrix, components = concentration_matrix(table, names)
    except AbsolveError as error:
        event("refused")
        assert error.file == str(path)
        return
    assert matrix.shape == (len(names), len(components))
    assert np.all(np.isfinite(matrix)) and np.all(matrix >= 0)


@pytest.fixture(scope="module")
def jcamp_texts() -> list[bytes]:
    scans = read_scan_table(GOOD / "samples.csv")
    return [write_jcamp(scans).encode(), write_jcamp(scans, compress=True).encode(), write_jcamp(scans.select(["sample-2"]), compress=True).encode()]


@given(which=st.integers(0, 2), mutations=_mutations, quantity=_quantity)
@FUZZ
def test_mutated_jcamp_files(folder: Path, jcamp_texts: list[bytes], which: int, mutations: list, quantity: Any) -> None:
    path = _write(folder, _mutate(jcamp_texts[which], mutations), ".jdx")
    try:
        scans = read_jcamp(path, quantity=quantity)  # may warn of a guessed percent scale: a warning is no failure
    except AbsolveError as error:
        event("refused")
        assert error.file == str(path)
        return
    _check_spectra(scans)


# ------------------------------------------------------------------ structured mutations of JSON documents

_json_value = st.one_of(
    st.none(), st.booleans(), st.integers(-3, 3), st.integers(-(2**70), 2**70),
    st.floats(allow_nan=True, allow_infinity=True), st.text(max_size=8),
    st.lists(st.floats(-2, 2), max_size=4), st.just([]), st.just({}), st.just([[1.0, 2.0]]),
)


def _paths(node: Any, prefix: tuple = ()) -> list[tuple]:
    """Every key path in a JSON document (lists sampled at their ends and middle, to keep the count small)."""
    found = [prefix]
    if isinstance(node, dict):
        for key, value in node.items():
            found += _paths(value, (*prefix, key))
    elif isinstance(node, list) and node:
        for index in sorted({0, len(node) // 2, len(node) - 1}):
            found += _paths(node[index], (*prefix, index))
    return found


def _edit(document: Any, edits: list[tuple[int, str, Any]]) -> Any:
    for choice, kind, value in edits:
        paths = [path for path in _paths(document) if path]
        if not paths:
            return value
        *parents, last = paths[choice % len(paths)]
        node = document
        for key in parents:
            node = node[key]
        if kind == "delete":
            del node[last]
        elif kind == "set":
            node[last] = value
        elif kind == "scale" and isinstance(node[last], (int, float)) and not isinstance(node[last], bool):
            node[last] = node[last] * -1e300
        elif kind == "shorten" and isinstance(node[last], list) and node[last]:
            node[last] = node[last][:-1]
    return document


_edits = st.lists(
    st.tuples(st.integers(0, 10_000), st.sampled_from(["delete", "set", "scale", "shorten"]), _json_value), min_size=1, max_size=3
)


def _use_library(library: Any) -> None:
    """Quantify the good samples with a library the reader accepted: a result or AbsolveError."""
    _check_result(quantify(read_scan_table(GOOD / "samples.csv"), library))


def _use_model(model: Any) -> None:
    """Predict the good samples with a model the reader accepted: a result or AbsolveError."""
    prediction = model.predict(read_scan_table(GOOD / "samples.csv"))
    assert isinstance(prediction, InversePrediction)
    assert prediction.concentration.shape == (3, len(model.components_))
    # results.csv writes a non-finite prediction as an empty cell: a flag must explain each one.
    unexplained = ~np.isfinite(prediction.concentration) & prediction.complete[:, None] & ~prediction.beyond_range
    assert not unexplained.any()


_FILES = {"library": (read_library, _use_library), "model": (read_model, _use_model)}


@contextlib.contextmanager
def _watchdog(seconds: float) -> Iterator[None]:
    """End the test run with every thread's traceback, instead of hanging it, when the block takes over ``seconds``.

    A library edited to hold 1e296 once sent an SVD of infinities into an endless loop inside LAPACK,
    where no Python-level signal handler runs; faulthandler's watchdog thread still does.
    """
    faulthandler.dump_traceback_later(seconds, exit=True)
    try:
        yield
    finally:
        faulthandler.cancel_dump_traceback_later()


def _read_and_use(kind: str, path: Path) -> None:
    reader, use = _FILES[kind]
    try:
        loaded = reader(path)
    except AbsolveError as error:
        event("refused by the reader")
        assert error.file == str(path)
        return
    try:
        with _watchdog(120.0):
            use(loaded)
    except AbsolveError:
        event("refused when used")
        return
    event("used")


@pytest.mark.parametrize("kind", ["library", "model"])
@given(edits=_edits)
@FUZZ
def test_hand_edited_files_are_refused_or_work(folder: Path, made: Any, kind: str, edits: list) -> None:
    document = _edit(json.loads(made.library_text if kind == "library" else made.model_text), edits)
    _read_and_use(kind, _write(folder, json.dumps(document).encode(), ".json"))


@pytest.mark.parametrize("kind", ["library", "model"])
@given(mutations=_mutations)
@FUZZ
def test_mutated_file_bytes(folder: Path, made: Any, kind: str, mutations: list) -> None:
    text = made.library_text if kind == "library" else made.model_text
    _read_and_use(kind, _write(folder, _mutate(text.encode(), mutations), ".json"))


# ------------------------------------------------------------------ the solver and quantify

_moderate = st.floats(-10.0, 10.0)
_entries = st.one_of(_moderate, _moderate, _moderate, st.floats(-1e300, 1e300), st.just(0.0), st.floats(-1e-300, 1e-300))


def _poison(array: np.ndarray, data: st.DataObject) -> np.ndarray:
    """Put a NaN or an infinity somewhere in ``array`` in one draw out of four."""
    value = data.draw(st.sampled_from([None, None, None, np.nan, np.inf, -np.inf]))
    if value is not None:
        array.flat[data.draw(st.integers(0, array.size - 1))] = value
    return array


@given(
    design=hnp.arrays(np.float64, st.tuples(st.integers(1, 20), st.integers(1, 5)), elements=_entries, fill=st.nothing()),
    data=st.data(),
    duplicate=st.booleans(),
    method=st.sampled_from(["auto", "enumerate", "active-set"]),
)
@FUZZ
def test_solver_on_random_designs(design: np.ndarray, data: st.DataObject, duplicate: bool, method: str) -> None:
    design = _poison(design, data)
    if duplicate and design.shape[1] > 1:
        design[:, 1] = design[:, 0]  # two identical columns: a singular design
    n_points, n_params = design.shape
    targets = _poison(data.draw(hnp.arrays(np.float64, st.tuples(st.integers(1, 4), st.just(n_points)), elements=_entries, fill=st.nothing())), data)
    nonnegative = data.draw(hnp.arrays(np.bool_, n_params))
    try:
        solution = solve_nonnegative(design, targets, nonnegative=nonnegative, method=method)  # type: ignore[arg-type]
    except AbsolveError:
        event("refused")
        return
    coefficients = solution.coefficients
    assert coefficients.shape == (targets.shape[0], n_params)
    finite = np.all(np.isfinite(coefficients), axis=1)
    # Overflow of huge inputs may leave a scan non-finite, but never a negative constrained coefficient.
    assert np.all(coefficients[finite][:, nonnegative] >= 0)


def _check_result(result: MixtureResult) -> None:
    """A result table never holds a bare NaN: every missing concentration carries a flag, and values are >= 0."""
    missing = ~np.isfinite(result.concentration)
    for i, j in zip(*np.nonzero(missing)):
        assert result.flags[i][j], (result.scan_names[i], result.components[j])
    assert np.all(result.concentration[~missing] >= 0)
    assert not np.any(np.isinf(result.concentration))


@given(
    n_wl=st.integers(2, 40),
    n_comp=st.integers(1, 4),
    data=st.data(),
    baseline=st.sampled_from(["none", "offset", "linear"]),
    identical=st.booleans(),
)
@FUZZ
def test_quantify_on_random_libraries_and_scans(n_wl: int, n_comp: int, data: st.DataObject, baseline: str, identical: bool) -> None:
    grid = np.arange(n_wl, dtype=np.float64) * data.draw(st.sampled_from([0.5, 1.0, 10.0])) + 400.0
    # Zeros included: a component without signal on the fitted points must be refused or flagged, not crash.
    absorptivity = data.draw(
        hnp.arrays(np.float64, (n_comp, n_wl), elements=st.one_of(st.floats(1e-3, 2), st.floats(1e-3, 1e7), st.just(0.0)), fill=st.nothing())
    )
    if data.draw(st.booleans()):
        absorptivity[-1, : data.draw(st.integers(1, n_wl))] = 0.0  # no signal over part of the grid (or all of it)
    if identical and n_comp > 1:
        absorptivity[1] = absorptivity[0]
    values = data.draw(
        hnp.arrays(np.float64, st.tuples(st.integers(1, 4), st.just(n_wl)), elements=st.one_of(st.floats(-1, 4), st.just(np.nan), st.just(0.0), st.floats(-1e9, 1e9)))
    )
    low = data.draw(st.one_of(st.none(), st.floats(390, 420)))
    high = data.draw(st.one_of(st.none(), st.floats(400, 900)))
    library = library_from_absorptivities(grid, absorptivity, [f"c{k}" for k in range(n_comp)], "mg/L")
    scans = Spectra(grid, values, [f"s{i}" for i in range(values.shape[0])])
    try:
        result = quantify(scans, library, baseline=baseline, wavelength_range=(low, high), path_length=data.draw(st.floats(1e-3, 10)))  # type: ignore[arg-type]
    except AbsolveError:
        event("refused")
        return
    _check_result(result)
    assert not math.isinf(float(np.nansum(result.std_uncertainty)))
