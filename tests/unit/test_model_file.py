"""Model files: exact round trips, provenance, and a clear error for every kind of damage."""

from __future__ import annotations

import hashlib
import json
from pathlib import Path
from typing import Any

import numpy as np
import pytest

import absolve
from absolve.errors import AbsolveError
from absolve.inverse import InverseModel
from absolve.io.model_file import FORMAT, VERSION, model_to_json, read_model, write_model
from absolve.simulate import Instrument, measure, random_absorptivities
from absolve.spectra import Spectra

GRID = np.arange(420.0, 681.0, 2.0)
NAMES = ("orange", "violet")


def _scans(rng: np.random.Generator, k: np.ndarray, n: int, prefix: str) -> tuple[Spectra, np.ndarray]:
    conc = rng.uniform(0.05, 0.5, (n, 2))
    return Spectra(GRID, measure(GRID, conc @ k, Instrument(baseline_offset_sd=0.01), rng), [f"{prefix}{i}" for i in range(n)]), conc


@pytest.fixture(scope="module")
def data() -> tuple[Spectra, np.ndarray, Spectra]:
    rng = np.random.default_rng(812)
    k = random_absorptivities(GRID, 2, rng)
    train, conc = _scans(rng, k, 24, "std")
    test, _ = _scans(rng, k, 15, "s")
    return train, conc, test


@pytest.fixture(scope="module", params=["none", "second"])
def trained(request: pytest.FixtureRequest, data: tuple[Spectra, np.ndarray, Spectra]) -> InverseModel:
    train, conc, _ = data
    return InverseModel(derivative=request.param, window=9, folds=6).fit(train, conc, NAMES, "umol/L")


@pytest.fixture()
def saved(tmp_path: Path, data: tuple[Spectra, np.ndarray, Spectra]) -> Path:
    train, conc, _ = data
    path = tmp_path / "model.json"
    write_model(InverseModel(derivative="first", window=7).fit(train, conc, NAMES, "mg/L"), path)
    return path


def test_loaded_model_predicts_what_the_trained_one_did(trained: InverseModel, data: tuple[Spectra, np.ndarray, Spectra], tmp_path: Path) -> None:
    _, _, test = data
    path = tmp_path / "m.json"
    write_model(trained, path)
    loaded = read_model(path)
    before, after = trained.predict(test), loaded.predict(test)
    for field in ("concentration", "std_uncertainty", "leverage", "q_residual", "hotelling_t2", "outside", "beyond_range"):
        np.testing.assert_allclose(getattr(after, field), getattr(before, field), rtol=0, atol=1e-12, err_msg=field)
    assert (after.q_limit, after.t2_limit, after.unit, after.components) == (before.q_limit, before.t2_limit, "umol/L", NAMES)
    assert loaded.get_params() == trained.get_params()
    np.testing.assert_array_equal(loaded.cv_.rmsecv, trained.cv_.rmsecv)
    np.testing.assert_array_equal(loaded.cv_.fold_of_scan, trained.cv_.fold_of_scan)
    assert loaded.training_names_ == trained.training_names_
    # Saving the loaded model again gives the same document (apart from the time stamp).
    first, second = json.loads(model_to_json(trained)), json.loads(model_to_json(loaded))
    first["provenance"].pop("created"), second["provenance"].pop("created")
    assert first == second


def test_file_is_plain_versioned_json_with_provenance(data: tuple[Spectra, np.ndarray, Spectra], tmp_path: Path) -> None:
    train, conc, _ = data
    table = tmp_path / "conc.csv"
    table.write_text("scan,component,concentration\nstd0,orange,0.1\n")
    path = tmp_path / "model.json"
    write_model(InverseModel().fit(train, conc, NAMES, "mg/L"), path, inputs=[table])
    document = json.loads(path.read_text(encoding="utf-8"))
    assert (document["format"], document["version"]) == (FORMAT, VERSION) == ("absolve-pls-model", 1)
    provenance = document["provenance"]
    assert provenance["tool_version"] == absolve.__version__
    # Reference digest from the standard library's hashlib.
    assert provenance["inputs"] == [{"file": table.name, "sha256": hashlib.sha256(table.read_bytes()).hexdigest()}]
    assert provenance["created"].endswith("+00:00")
    assert len(document["wavelengths_nm"]) == len(document["x_mean"]) == GRID.size
    assert [m["component"] for m in document["models"]] == list(NAMES)


def test_untrained_model_cannot_be_saved() -> None:
    with pytest.raises(AbsolveError, match="not been trained"):
        model_to_json(InverseModel())


def _damage(path: Path, change: Any) -> None:
    document = json.loads(path.read_text(encoding="utf-8"))
    change(document)
    path.write_text(json.dumps(document), encoding="utf-8")


def _set(keys: tuple[Any, ...], value: Any) -> Any:
    def change(document: Any) -> None:
        for key in keys[:-1]:
            document = document[key]
        document[keys[-1]] = value

    return change


def _drop(keys: tuple[Any, ...]) -> Any:
    def change(document: Any) -> None:
        for key in keys[:-1]:
            document = document[key]
        del document[keys[-1]]

    return change


@pytest.mark.parametrize(
    ("change", "message"),
    [
        (_set(("format",), "some-other-format"), r"model key 'format': expected 'absolve-pls-model'"),
        (_set(("version",), 2), r"model key 'version': format version 2 is not known"),
        (_set(("version",), "1"), r"model key 'version': must be a finite integer"),
        (_drop(("x_mean",)), r"model key 'x_mean': is missing"),
        (_drop(("models", 1, "x_rotations")), r"model key 'models\[1\]\.x_rotations': is missing"),
        (_drop(("diagnostics",)), r"model key 'diagnostics': is missing"),
        (lambda d: d["models"][0]["coefficients"].pop(), r"'models\[0\]\.coefficients': has shape 130, expected 131"),
        (lambda d: d["models"][0]["x_weights"].pop(), r"'models\[0\]\.x_weights': has shape"),
        (lambda d: d["cross_validation"]["fold_of_scan"].pop(), r"'cross_validation\.fold_of_scan': has shape"),
        (_set(("models", 0, "intercept"), None), r"'models\[0\]\.intercept': must be a finite number"),
        (_set(("models", 0, "component"), "green"), r"'models\[0\]\.component': is 'green'"),
        (_set(("diagnostics", "eigenvalues", 0), -1.0), r"'diagnostics\.eigenvalues': must all be positive"),
        (_set(("settings", "derivative"), "third"), r"model key 'settings': The 'derivative' parameter"),
        (_set(("unit",), "furlongs"), r"model key 'unit'"),
        (_set(("x_mean", 3), True), r"'x_mean': holds true/false"),
        (_set(("cross_validation", "chosen", 0), 9), r"'cross_validation\.chosen': does not match"),
    ],
)
def test_damaged_files_name_the_file_and_key(saved: Path, change: Any, message: str) -> None:
    _damage(saved, change)
    with pytest.raises(AbsolveError, match=message) as caught:
        read_model(saved)
    assert caught.value.file == str(saved)
    assert caught.value.fix


def test_non_finite_numbers_are_refused(saved: Path) -> None:
    text = saved.read_text(encoding="utf-8")
    document = json.loads(text)
    document["models"][1]["coefficients"][5] = float("nan")
    saved.write_text(json.dumps(document), encoding="utf-8")  # Python writes NaN, which JSON readers may accept
    with pytest.raises(AbsolveError, match=r"'models\[1\]\.coefficients': holds a non-finite number"):
        read_model(saved)
    document["models"][1]["coefficients"][5] = 0.0
    document["diagnostics"]["q_limit"] = float("inf")
    saved.write_text(json.dumps(document), encoding="utf-8")
    with pytest.raises(AbsolveError, match=r"'diagnostics\.q_limit': must be a finite number"):
        read_model(saved)


def test_truncated_and_foreign_files(saved: Path, tmp_path: Path) -> None:
    text = saved.read_text(encoding="utf-8")
    saved.write_text(text[: len(text) // 2], encoding="utf-8")
    with pytest.raises(AbsolveError, match="not valid JSON") as caught:
        read_model(saved)
    assert caught.value.file == str(saved) and caught.value.line is not None
    listing = tmp_path / "list.json"
    listing.write_text("[1, 2, 3]", encoding="utf-8")
    with pytest.raises(AbsolveError, match="model key 'format'"):
        read_model(listing)
    nested = tmp_path / "nested.json"
    nested.write_text("[" * 100000 + "]" * 100000, encoding="utf-8")
    with pytest.raises(AbsolveError, match="nested too deeply"):
        read_model(nested)
    with pytest.raises(AbsolveError, match="file not found"):
        read_model(tmp_path / "absent.json")
