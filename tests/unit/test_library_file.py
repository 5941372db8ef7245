"""Library files: exact round trips, a golden file that must keep loading, and every damaged file refused."""

from __future__ import annotations

import copy
import json
import math
import pickle
from collections.abc import Callable
from pathlib import Path
from typing import Any

import numpy as np
import pytest

from absolve.calibration import calibrate
from absolve.errors import AbsolveError
from absolve.io.library_file import FORMAT_NAME, FORMAT_VERSION, library_to_json, read_library, write_library
from absolve.library import ReferenceLibrary, library_from_absorptivities
from absolve.simulate import Instrument

GOLDEN = Path(__file__).resolve().parents[1] / "data" / "library_v1.json"


def _assert_same_library(back: ReferenceLibrary, library: ReferenceLibrary) -> None:
    np.testing.assert_array_equal(back.wavelengths, library.wavelengths)
    np.testing.assert_array_equal(back.absorptivity, library.absorptivity)
    np.testing.assert_array_equal(back.std_error, library.std_error)
    assert back.unit == library.unit
    assert back.linear_limit_absorbance == library.linear_limit_absorbance
    assert back.noise == library.noise
    assert back.stray_light == library.stray_light
    assert back.residual_dof == library.residual_dof
    assert dict(back.provenance) == dict(library.provenance)
    assert back.names == library.names


@pytest.fixture(scope="module")
def calibrated(simulated_standards) -> ReferenceLibrary:
    standards = simulated_standards(11, Instrument(stray_light=0.0), (0.1, 0.3, 0.5, 0.7, 0.9))
    provenance = {"tool": "absolve", "inputs": [{"file": "std.csv", "sha256": "0" * 64}], "options": {"range": None, "unit": "mg/L"}}
    return calibrate(standards.spectra, standards.concentrations, standards.names, "mg/L", molar_masses={"dye-0": 812.6}, provenance=provenance)


def test_round_trip_is_exact(tmp_path: Path, calibrated: ReferenceLibrary) -> None:
    path = tmp_path / "lib.json"
    write_library(calibrated, path)
    back = read_library(path)
    _assert_same_library(back, calibrated)
    assert back.components == calibrated.components  # every calibration detail, warnings included
    assert back.components[0].molar_mass == 812.6
    # Writing what was read gives the same bytes: the format holds no hidden state.
    assert library_to_json(back) == path.read_text(encoding="utf-8")


def test_round_trip_of_given_absorptivities(tmp_path: Path) -> None:
    library = library_from_absorptivities(
        [400.0, 450.5, 500.25], [[1e-300, 12345.678901234567, 0.1], [3.0, 2.0, 1.0]], ["a", "b"], "mol/L",
        molar_masses={"b": 294.18}, linear_limit_absorbance=1.5,
    )
    write_library(library, tmp_path / "given.json")
    back = read_library(tmp_path / "given.json")
    _assert_same_library(back, library)
    assert back.components[1].molar_mass == 294.18
    assert back.components[0].warnings == library.components[0].warnings
    assert back.noise is None


def test_library_json_is_strict_json(calibrated: ReferenceLibrary) -> None:
    text = library_to_json(calibrated)

    def refuse(constant: str) -> None:
        raise AssertionError(f"non-standard JSON constant {constant}")

    document = json.loads(text, parse_constant=refuse)  # the json module is the reference parser
    assert (document["format"], document["version"]) == (FORMAT_NAME, FORMAT_VERSION)


def test_golden_file_of_version_1_loads_with_its_numbers() -> None:
    library = read_library(GOLDEN)
    assert library.unit == "mg/L"
    assert library.names == ("orange-1", "violet-2")
    np.testing.assert_array_equal(library.wavelengths, np.arange(420.0, 601.0, 20.0))
    assert library.absorptivity[0, 2] == pytest.approx(0.04859489972930945, rel=1e-15)
    assert library.absorptivity[1, 7] == pytest.approx(0.04032694122079517, rel=1e-15)
    assert library.std_error[0, 2] == pytest.approx(0.00017368022111854213, rel=1e-15)
    assert library.linear_limit_absorbance == 0.780649
    assert library.residual_dof == 11
    assert library.stray_light == 0.0
    assert library.noise is not None
    assert library.noise.floor == pytest.approx(0.001523029555967365, rel=1e-15)
    assert library.noise.correlation_length_nm == 0.0
    orange, violet = library.components
    assert (orange.molar_mass, violet.molar_mass) == (452.4, None)
    assert (orange.peak_wavelength_nm, violet.peak_wavelength_nm) == (460.0, 560.0)
    assert orange.levels == 6 and orange.concentration_range == (2.0, 16.0)
    assert orange.lack_of_fit_p == pytest.approx(0.4400447252784223, rel=1e-15)
    # Every array equals what the json module reads from the file.
    document = json.loads(GOLDEN.read_text(encoding="utf-8"))
    for row, entry in enumerate(document["components"]):
        np.testing.assert_array_equal(library.absorptivity[row], entry["absorptivity"])
        np.testing.assert_array_equal(library.std_error[row], entry["std_error"])


def test_version_1_file_without_optional_fields_loads(tmp_path: Path) -> None:
    # The first version-1 writer had no stray-light field; calibration details and noise are optional.
    document = json.loads(GOLDEN.read_text(encoding="utf-8"))
    for key in ("stray_light_fraction", "noise_model", "provenance", "residual_dof", "linear_limit_absorbance"):
        del document[key]
    for entry in document["components"]:
        del entry["calibration"]
        del entry["molar_mass"]
    path = tmp_path / "lean.json"
    path.write_text(json.dumps(document), encoding="utf-8")
    library = read_library(path)
    assert library.stray_light == 0.0
    assert library.noise is None
    assert library.linear_limit_absorbance is None
    assert math.isnan(library.components[0].peak_wavelength_nm)


def _golden() -> dict[str, Any]:
    return json.loads(GOLDEN.read_text(encoding="utf-8"))


def _set(path: str, value: Any) -> Callable[[dict[str, Any]], None]:
    """Edit that sets ``document[path]`` (dotted, with list indices) to ``value``."""

    def edit(document: dict[str, Any]) -> None:
        *parents, last = path.split(".")
        node: Any = document
        for key in parents:
            node = node[int(key)] if key.isdigit() else node[key]
        node[int(last) if last.isdigit() else last] = copy.deepcopy(value)

    return edit


def _drop(path: str) -> Callable[[dict[str, Any]], None]:
    def edit(document: dict[str, Any]) -> None:
        *parents, last = path.split(".")
        node: Any = document
        for key in parents:
            node = node[int(key)] if key.isdigit() else node[key]
        del node[last]

    return edit


DAMAGED = [
    ("wrong_format", _set("format", "absolve-model"), r"not an absolve library \(format 'absolve-model'\)"),
    ("no_format", _drop("format"), r"not an absolve library \(format None\)"),
    ("future_version", _set("version", 2), "library format version 2 is not supported"),
    ("text_version", _set("version", "1"), "library format version '1' is not supported"),
    ("boolean_version", _set("version", True), "library format version True is not supported"),
    ("no_grid", _drop("wavelengths_nm"), "wavelengths_nm: missing"),
    ("no_components", _drop("components"), "components: missing"),
    ("no_unit", _drop("unit"), "unit: missing"),
    ("bad_unit", _set("unit", "furlongs"), "'furlongs' is not a known concentration unit"),
    ("empty_components", _set("components", []), "components: expected a non-empty list"),
    ("no_absorptivity", _drop("components.0.absorptivity"), r"components\[0\]\.absorptivity: missing"),
    ("no_std_error", _drop("components.1.std_error"), r"components\[1\]\.std_error: missing"),
    ("no_name", _drop("components.0.name"), r"components\[0\]\.name: missing"),
    ("empty_name", _set("components.0.name", ""), r"components\[0\]\.name: expected a non-empty text"),
    ("same_names", _set("components.1.name", "orange-1"), "component names must be present and unique"),
    ("short_array", _set("components.0.absorptivity", [0.1] * 9), r"components\[0\]\.absorptivity: holds 9 values for 10 wavelengths"),
    ("long_array", _set("components.1.std_error", [0.1] * 11), r"components\[1\]\.std_error: holds 11 values for 10 wavelengths"),
    ("nan", _set("components.0.absorptivity.3", float("nan")), "must hold finite numbers only"),
    ("infinity", _set("components.1.std_error.0", float("inf")), "must hold finite numbers only"),
    ("null_in_array", _set("components.0.absorptivity.1", None), "must hold finite numbers only"),
    ("nested_array", _set("components.0.absorptivity", [[0.1] * 10]), "holds 1 values for 10 wavelengths"),
    ("negative_se", _set("components.0.std_error.4", -1e-6), "standard errors cannot be negative"),
    ("descending_grid", _set("wavelengths_nm", list(range(600, 419, -20))), "at least two strictly increasing wavelengths"),
    ("negative_floor", _set("noise_model.floor", -0.001), "noise_model: noise model floor must be a finite number >= 0"),
    ("text_floor", _set("noise_model.floor", "small"), "noise_model.floor: expected a finite number"),
    ("no_floor", _drop("noise_model.floor"), "noise_model.floor: missing"),
    ("limit_zero", _set("linear_limit_absorbance", 0), "linear_limit_absorbance: must be positive"),
    ("bad_dof", _set("residual_dof", 1.5), "residual_dof: expected a whole number >= 0"),
    ("huge_stray", _set("stray_light_fraction", 0.5), "stray-light fraction must lie in"),
    ("bad_levels", _set("components.0.calibration.levels", "six"), r"calibration\.levels: expected a whole number"),
    ("bad_range", _set("components.0.calibration.concentration_range", [16.0, 2.0]), "expected 0 <= low <= high"),
    ("bad_warnings", _set("components.0.calibration.warnings", "none"), "expected a list of texts"),
    ("bad_provenance", _set("provenance", ["x"]), "provenance: expected an object"),
    ("negative_mass", _set("components.0.molar_mass", -452.4), "molar_mass: must be positive"),
]


@pytest.mark.parametrize(("name", "edit", "message"), DAMAGED, ids=[case[0] for case in DAMAGED])
def test_damaged_documents_are_refused_naming_the_file(tmp_path: Path, name: str, edit, message: str) -> None:
    document = _golden()
    edit(document)
    path = tmp_path / f"{name}.json"
    path.write_text(json.dumps(document), encoding="utf-8")  # json.dumps writes NaN/Infinity as Python's json reads them
    with pytest.raises(AbsolveError, match=message) as caught:
        read_library(path)
    assert caught.value.file == str(path)
    assert str(caught.value).startswith(str(path))


def test_truncated_file_names_file_line_and_column(tmp_path: Path) -> None:
    text = GOLDEN.read_text(encoding="utf-8")
    path = tmp_path / "cut.json"
    path.write_text(text[: len(text) // 2], encoding="utf-8")
    with pytest.raises(AbsolveError, match="not valid JSON") as caught:
        read_library(path)
    assert caught.value.file == str(path)
    assert caught.value.line is not None and caught.value.line > 10
    assert caught.value.column is not None


@pytest.mark.parametrize(
    ("content", "message"),
    [
        (b"", "not valid JSON"),
        (b"[1, 2, 3]", r"not an absolve library \(format 'list'\)"),
        (b"\"absolve-library\"", r"not an absolve library \(format 'str'\)"),
        (b"[" * 100_000, "nested too deeply|not valid JSON"),
        (b"\x00\x01binary", "binary content"),
    ],
)
def test_non_library_files_are_refused(tmp_path: Path, content: bytes, message: str) -> None:
    path = tmp_path / "other.json"
    path.write_bytes(content)
    with pytest.raises(AbsolveError, match=message) as caught:
        read_library(path)
    assert caught.value.file == str(path)


@pytest.mark.parametrize("protocol", range(pickle.HIGHEST_PROTOCOL + 1))
def test_pickle_files_are_refused_without_being_loaded(tmp_path: Path, protocol: int) -> None:
    # The bytes are made here and only ever read as text: nothing unpickles them.
    path = tmp_path / "library.pkl"
    path.write_bytes(pickle.dumps({"format": FORMAT_NAME, "version": FORMAT_VERSION}, protocol=protocol))
    with pytest.raises(AbsolveError) as caught:
        read_library(path)
    assert caught.value.file == str(path)


def test_missing_library_file(tmp_path: Path) -> None:
    with pytest.raises(AbsolveError, match="file not found"):
        read_library(tmp_path / "nowhere.json")
