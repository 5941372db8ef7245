"""The bad-input corpus, driven through the command line.

Every case is a malformed input a new user can produce. Each must end with
exit status 2 and exactly one ``error:`` line on stderr that names the file
(with line and column where they apply), says what is wrong and, after
" — ", what to do; no traceback; and nothing written: a fresh ``--out``
target does not exist afterwards, and an existing one (with ``--force``)
keeps its bytes.

Text cases live in tests/data/bad_inputs/ (scans/, tables/, beside the good
files in good/ they were cut from); binary junk, long lines and damaged
library and model files are made here from the files the command line wrote.
"""

from __future__ import annotations

import codecs
import json
import pickle
import re
from collections.abc import Callable
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np
import pytest

from _reliability import CORPUS, GOOD, one_error_line, run, snapshot
from absolve.workflow import RESULT_FILES

SAMPLES = str(GOOD / "samples.csv")
STANDARDS = str(GOOD / "standards.csv")
STANDARDS_TABLE = str(GOOD / "standards_concentrations.csv")
MIXTURES = str(GOOD / "mixtures.csv")
MIXTURES_TABLE = str(GOOD / "mixture_concentrations.csv")
SCANS = CORPUS / "scans"
TABLES = CORPUS / "tables"


@dataclass(frozen=True)
class Case:
    """One bad input.

    ``argv`` may hold ``{lib}`` and ``{model}`` (the made library and model),
    ``{bad}`` (the file ``make`` writes) and ``{out}`` (the output target:
    a results folder for quantify, else a file ending in ``out``'s suffix).
    ``named`` is the file the message must name (``None`` for an option),
    ``where`` the ``:line:column`` that must follow it.
    """

    id: str
    argv: tuple[str, ...]
    message: str
    named: str | None
    where: str = ""
    out: str = "results/"
    make: Callable[[Any], bytes] | None = field(default=None, compare=False)
    bad_name: str = "bad.csv"


def quantify(scans: str | Path, *extra: str) -> tuple[str, ...]:
    return ("quantify", str(scans), "--library", "{lib}", "--out", "{out}", *extra)


def calibrate(table: str | Path, scans: str | Path = STANDARDS) -> tuple[str, ...]:
    return ("calibrate", str(scans), "--standards", str(table), "--unit", "mg/L", "--out", "{out}")


def scan_case(id: str, name: str, message: str, where: str = "", *extra: str) -> Case:
    """A defective scan table of the corpus, quantified against the made library."""
    return Case(id, quantify(SCANS / name, *extra), message, f"scans/{name}", where)


def table_case(id: str, name: str, message: str, where: str = "") -> Case:
    """A defective standards table of the corpus, calibrated with the good standards."""
    return Case(id, calibrate(TABLES / name), message, f"tables/{name}", where)


def with_library(library: str = "{bad}") -> tuple[str, ...]:
    return ("quantify", SAMPLES, "--library", library, "--out", "{out}")


def with_model(model: str = "{bad}") -> tuple[str, ...]:
    return ("quantify", SAMPLES, "--model", model, "--out", "{out}")


# ----------------------------------------------------------------- generated inputs


def _junk(made: Any) -> bytes:
    # Random bytes from a fixed seed: what a mis-picked instrument binary looks like to a reader.
    return np.random.default_rng(9).integers(0, 256, 4096, dtype=np.uint8).tobytes()


def _utf16_cut(made: Any) -> bytes:
    # A UTF-16 export whose last character lost a byte (an interrupted copy).
    return codecs.BOM_UTF16_LE + (GOOD / "samples.csv").read_text(encoding="utf-8").encode("utf-16-le")[:-1]


def _long_row(made: Any) -> bytes:
    # 200 000 cells on one line where the header has 4: the message must stay one short line.
    text = (GOOD / "samples.csv").read_text(encoding="utf-8").splitlines()
    text[3] = ",".join(["420"] + ["0.1"] * 199_999)
    return ("\n".join(text) + "\n").encode()


def _long_cell(made: Any) -> bytes:
    text = (GOOD / "samples.csv").read_text(encoding="utf-8").splitlines()
    text[3] = "420," + "x" * 1_000_000 + ",0.1,0.2"
    return ("\n".join(text) + "\n").encode()


def _long_names(made: Any) -> bytes:
    name = "n" * 100_000
    text = (GOOD / "samples.csv").read_text(encoding="utf-8").splitlines()
    text[0] = f"wavelength_nm,{name},sample-2,{name}"
    return ("\n".join(text) + "\n").encode()


def _edited(kind: str, path: str, value: Any = None) -> Callable[[Any], bytes]:
    """A library ('library') or model ('model') file with one key set to ``value`` (or removed when ``value`` is ...)."""

    def make(made: Any) -> bytes:
        document = json.loads(made.library_text if kind == "library" else made.model_text)
        *parents, last = path.split(".")
        node = document
        for key in parents:
            node = node[int(key)] if key.isdigit() else node[key]
        index: Any = int(last) if last.isdigit() else last
        if value is ...:
            del node[index]
        else:
            node[index] = value(node[index]) if callable(value) else value
        # json.dumps writes NaN and Infinity as the bare words a hand edit or another tool leaves.
        return json.dumps(document, indent=1).encode()

    return make


def _truncated(kind: str) -> Callable[[Any], bytes]:
    def make(made: Any) -> bytes:
        text = made.library_text if kind == "library" else made.model_text
        return text[: len(text) // 2].encode()

    return make


def _pickled(protocol: int) -> Callable[[Any], bytes]:
    # Bytes made here and only ever read by absolve as text: nothing unpickles them.
    return lambda made: pickle.dumps({"format": "absolve-library", "version": 1, "components": []}, protocol=protocol)


def _copy(kind: str) -> Callable[[Any], bytes]:
    return lambda made: (made.library_text if kind == "library" else made.model_text).encode()


REBUILD_LIBRARY = "rebuild it with 'absolve calibrate'"
RETRAIN = "'absolve train'"

CASES = [
    # ------------------------------------------------------------ scan tables
    scan_case("scans-empty-file", "empty.csv", "the file holds no data"),
    scan_case("scans-comments-only", "comments_only.csv", "the file holds no data"),
    scan_case("scans-header-only", "header_only.csv", "header but no data rows", ":2"),
    scan_case("scans-non-numeric-cell", "non_numeric.csv", "'abc' is not a number", ":7:3"),
    scan_case("scans-nan-cell", "nan_cell.csv", "'NaN' is not a measured value", ":5:2"),
    scan_case("scans-inf-cell", "inf_cell.csv", "'inf' is not a measured value", ":12:4"),
    scan_case("scans-missing-cell", "missing_cell.csv", "missing value", ":14:2"),
    scan_case("scans-comma-decimal", "comma_decimal.csv", "'0,0011' is not a number — use --decimal ,", ":2:2"),
    scan_case("scans-duplicate-wavelength", "duplicate_wavelength.csv", "wavelength 450 nm appears twice", ":8:1"),
    scan_case("scans-one-wavelength", "one_wavelength.csv", "only one wavelength", ":2"),
    scan_case("scans-short-row", "short_row.csv", "3 cells where the header has 4", ":11"),
    scan_case("scans-duplicate-names", "duplicate_names.csv", "two columns are named 'sample-1'", ":1"),
    scan_case("scans-unnamed-column", "unnamed_column.csv", "column 3 has no header", ":1:3"),
    scan_case("scans-wavenumbers", "wavenumber.csv", "not a UV-Vis wavelength range in nm", ":2:1"),
    scan_case("scans-percent-above-110", "percent_above_110.csv", "percent transmittance up to 125.3", ":18:3", "--quantity", "percent-transmittance"),
    scan_case(
        "scans-percent-read-as-fraction", "percent_t.csv",
        "transmittance up to 100.74 (above 1) — for percent values use --quantity percent-transmittance", ":21:3", "--quantity", "transmittance",
    ),
    scan_case("scans-percent-read-as-absorbance", "percent_t.csv", "absorbance up to 100.74, beyond any photometric range", ":21:3"),
    scan_case("scans-negative-transmittance", "negative_transmittance.csv", "no usable value", "", "--quantity", "transmittance"),
    scan_case("scans-all-saturated", "all_saturated.csv", "no usable value"),
    Case("scans-binary-junk", quantify("{bad}"), "binary content", "{bad}", make=_junk),
    Case("scans-utf16-cut-short", quantify("{bad}"), "binary content", "{bad}", make=_utf16_cut),
    Case("scans-very-long-row", quantify("{bad}"), "200000 cells where the header has 4", "{bad}", ":4", make=_long_row),
    Case("scans-very-long-cell", quantify("{bad}"), "'xxxxxxxx", "{bad}", ":4:2", make=_long_cell),
    Case("scans-very-long-duplicate-names", quantify("{bad}"), "two columns are named 'nnnn", "{bad}", ":1", make=_long_names),
    scan_case("scans-missing-file", "no_such_file.csv", "file not found"),
    scan_case("scans-outside-library", "far_red.csv", "share no wavelength range"),
    Case(
        "scan-files-share-no-wavelength", ("quantify", SAMPLES, str(SCANS / "far_red.csv"), "--library", "{lib}", "--out", "{out}"),
        "the scan files share no wavelength", "scans/far_red.csv",
    ),
    Case("path-length-zero", quantify(SAMPLES, "--path-length", "0"), "the path length must be a positive number", None),
    Case("path-length-negative", quantify(SAMPLES, "--path-length", "-0.5"), "the path length must be a positive number", None),
    # ------------------------------------------------------------ standards and concentration tables
    table_case("standards-unknown-scan", "unknown_scan.csv", "scan 'ghost-7' is not among the scans read", ":14"),
    table_case("standards-unlisted-scan", "unlisted_scan.csv", "scan 'blank-2' has no row in the concentration table"),
    table_case("standards-unknown-component", "unknown_component.csv", "no standard contains 'green'"),
    table_case("standards-negative-concentration", "negative_concentration.csv", "negative concentration -0.6", ":4:3"),
    table_case("standards-missing-concentration", "missing_concentration.csv", "concentration '' is not a number", ":4:3"),
    table_case("standards-path-length-zero", "zero_path_length.csv", "path_length_cm must be positive; got 0", ":3:4"),
    table_case("standards-path-length-negative", "negative_path_length.csv", "path_length_cm must be positive; got -1", ":7:4"),
    table_case("standards-missing-column", "missing_column.csv", "the header lacks the column 'component'", ":1"),
    table_case("standards-repeated-row", "repeated_row.csv", "scan 'red-2' lists component 'red' twice", ":4"),
    table_case("standards-proportional", "proportional.csv", "cannot separate the components"),
    Case(
        "standards-single-level", calibrate(TABLES / "single_level.csv", SCANS / "replicates_one_level.csv"),
        "'red' appears at a single concentration level", "tables/single_level.csv",
    ),
    Case("standards-table-binary", calibrate("{bad}"), "binary content", "{bad}", make=_junk),
    Case("standards-scans-saturated", calibrate(STANDARDS_TABLE, SCANS / "standards_saturated.csv"), "no usable value", "scans/standards_saturated.csv"),
    Case(
        "train-unknown-scan", ("train", MIXTURES, "--concentrations", str(TABLES / "unknown_scan.csv"), "--unit", "mg/L", "--out", "{out}"),
        "is not among the scans read", "tables/unknown_scan.csv", out="model.json",
    ),
    # ------------------------------------------------------------ library files
    Case("library-truncated", with_library(), "not valid JSON", "{bad}", ":", make=_truncated("library"), bad_name="lib.json"),
    Case("library-empty", with_library(), "not valid JSON", "{bad}", ":1:1", make=lambda made: b"", bad_name="lib.json"),
    Case("library-future-version", with_library(), "library format version 99 is not supported", "{bad}", make=_edited("library", "version", 99), bad_name="lib.json"),
    Case("library-nan", with_library(), "components[0].absorptivity: must hold finite numbers only", "{bad}", make=_edited("library", "components.0.absorptivity.3", float("nan")), bad_name="lib.json"),
    Case("library-short-array", with_library(), "components[1].std_error: holds 20 values for 21 wavelengths", "{bad}", make=_edited("library", "components.1.std_error", lambda v: v[:-1]), bad_name="lib.json"),
    Case("library-negative-std-error", with_library(), "standard errors cannot be negative", "{bad}", make=_edited("library", "components.0.std_error.5", -0.001), bad_name="lib.json"),
    Case("library-missing-grid", with_library(), "wavelengths_nm: missing", "{bad}", make=_edited("library", "wavelengths_nm", ...), bad_name="lib.json"),
    Case("library-unsorted-grid", with_library(), "strictly increasing", "{bad}", make=_edited("library", "wavelengths_nm", lambda v: v[::-1]), bad_name="lib.json"),
    Case("library-unknown-unit", with_library(), "'ppq' is not a known concentration unit", "{bad}", make=_edited("library", "unit", "ppq"), bad_name="lib.json"),
    Case("library-absurd-absorptivity", with_library(), "beyond any plausible value", "{bad}", make=_edited("library", "components.0.absorptivity.0", 5.6e296), bad_name="lib.json"),
    Case("library-absurd-noise", with_library(), "noise_model.floor: 1e+300 is beyond any plausible value", "{bad}", make=_edited("library", "noise_model.floor", 1e300), bad_name="lib.json"),
    Case(
        "absorptivity-table-absurd", ("calibrate", "--absorptivities", str(TABLES / "absorptivities_absurd.csv"), "--unit", "mg/L", "--out", "{out}"),
        "absorptivity 1e+300 is beyond any absorber's", "tables/absorptivities_absurd.csv", ":8:3", out="lib.json",
    ),
    Case("library-pickle", with_library(), "pickle", "{bad}", make=_pickled(pickle.HIGHEST_PROTOCOL), bad_name="lib.json"),
    Case("library-pickle-text-protocol", with_library(), "not valid JSON", "{bad}", make=_pickled(0), bad_name="lib.pkl"),
    Case("library-is-a-model", with_library(), "a PLS model goes to --model", "{bad}", make=_copy("model"), bad_name="model.json"),
    Case("check-library-truncated", ("check", SAMPLES, "--library", "{bad}", "--out", "{out}"), "not valid JSON", "{bad}", ":", make=_truncated("library"), bad_name="lib.json"),
    Case("plan-library-future-version", ("plan", "--library", "{bad}", "--count", "2"), "version 99", "{bad}", make=_edited("library", "version", 99), bad_name="lib.json", out=""),
    # ------------------------------------------------------------ model files
    Case("model-truncated", with_model(), "not valid JSON", "{bad}", ":", make=_truncated("model"), bad_name="model.json"),
    Case("model-future-version", with_model(), "format version 99 is not known", "{bad}", make=_edited("model", "version", 99), bad_name="model.json"),
    Case("model-nan", with_model(), "'models[0].coefficients': holds a non-finite number", "{bad}", make=_edited("model", "models.0.coefficients.2", float("nan")), bad_name="model.json"),
    Case("model-wrong-length", with_model(), "'x_mean': has shape 20, expected 21", "{bad}", make=_edited("model", "x_mean", lambda v: v[1:]), bad_name="model.json"),
    Case("model-negative-error", with_model(), "'models[1].rmsecv': must be at least 0", "{bad}", make=_edited("model", "models.1.rmsecv", -0.01), bad_name="model.json"),
    Case("model-missing-key", with_model(), "model key 'models': is missing", "{bad}", make=_edited("model", "models", ...), bad_name="model.json"),
    Case("model-fractional-count", with_model(), "'cross_validation.chosen': must hold whole numbers", "{bad}", make=_edited("model", "cross_validation.chosen.0", 1e300), bad_name="model.json"),
    Case("model-pickle", with_model(), "pickle", "{bad}", make=_pickled(2), bad_name="model.json"),
    Case("model-is-a-library", with_model(), "expected 'absolve-pls-model', found 'absolve-library'", "{bad}", make=_copy("library"), bad_name="lib.json"),
    # ------------------------------------------------------------ JCAMP-DX through convert
    Case(
        "jcamp-truncated", ("convert", "{bad}", "--out", "{out}"), "not closed by ##END=", "{bad}", ":12", out="out.csv", bad_name="cut.jdx",
        make=lambda made: b"##TITLE=cut\n##JCAMP-DX=4.24\n##DATA TYPE=UV/VIS SPECTRUM\n##XUNITS=NANOMETERS\n##YUNITS=ABSORBANCE\n"
        b"##XFACTOR=1\n##YFACTOR=0.001\n##FIRSTX=400\n##LASTX=404\n##NPOINTS=5\n##XYDATA=(X++(Y..Y))\n400 10 12 15",
    ),
    Case("jcamp-binary", ("convert", "{bad}", "--out", "{out}"), "binary", "{bad}", out="out.csv", bad_name="junk.jdx", make=_junk),
]


def _resolve(case: Case, made: Any, folder: Path) -> tuple[list[str], Path | None, Path | None]:
    """argv with placeholders filled, the output target (or None) and the generated input (or None)."""
    bad = None
    if case.make is not None:
        bad = folder / "inputs" / case.bad_name
        bad.parent.mkdir()
        bad.write_bytes(case.make(made))
    out = None if not case.out else folder / case.out.rstrip("/")
    values = {"{lib}": str(made.library), "{model}": str(made.model), "{bad}": str(bad), "{out}": str(out)}
    return [values.get(arg, arg) for arg in case.argv], out, bad


def _check_message(case: Case, line: str, bad: Path | None) -> None:
    assert case.message in line, line
    if case.named is not None:
        named = str(bad) if case.named == "{bad}" else str(CORPUS / case.named)
        assert named in line, line
        if case.where:
            pattern = re.escape(named + case.where) + (r"\d+(:\d+)?: " if case.where == ":" else ": ")
            assert re.search(pattern, line), f"{line!r} does not locate {named}{case.where}"
    problem, dash, fix = line.partition(" — ")
    assert dash and fix.strip(), f"no fix after ' — ': {line}"
    assert len(line) < 600, f"{len(line)} characters"


@pytest.mark.parametrize("case", CASES, ids=[case.id for case in CASES])
def test_bad_input_is_one_error_line_and_writes_nothing(case: Case, made: Any, tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    argv, out, bad = _resolve(case, made, tmp_path)
    before = snapshot(tmp_path)
    code, stdout, err = run(capsys, argv)
    assert code == 2, err
    _check_message(case, one_error_line(err), bad)
    assert "Traceback" not in stdout
    assert out is None or not out.exists()
    assert snapshot(tmp_path) == before


EXISTING = [case for case in CASES if case.out]


@pytest.mark.parametrize("case", EXISTING, ids=[case.id for case in EXISTING])
def test_bad_input_leaves_existing_output_byte_identical_even_with_force(
    case: Case, made: Any, tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    argv, out, bad = _resolve(case, made, tmp_path)
    assert out is not None
    if case.out.endswith("/"):
        out.mkdir()
        for name in RESULT_FILES:
            (out / name).write_bytes(f"earlier {name}\n".encode())
    else:
        out.write_bytes(b"earlier output\n")
    before = snapshot(tmp_path)
    code, _, err = run(capsys, [*argv, "--force"])
    assert code == 2, err
    _check_message(case, one_error_line(err), bad)
    assert snapshot(tmp_path) == before


def test_the_corpus_is_a_catalogue_of_at_least_thirty_distinct_inputs() -> None:
    assert len({case.id for case in CASES}) == len(CASES) >= 30
    committed = {str(path.relative_to(CORPUS)) for path in CORPUS.rglob("*") if path.is_file() and path.parent.name != "good"}
    used = {case.named for case in CASES if case.named is not None and not case.named.startswith("{")}
    used |= {str(Path(arg).relative_to(CORPUS)) for case in CASES for arg in case.argv if arg.startswith(str(CORPUS))}
    # Every committed bad file is exercised (no_such_file.csv is the one that must not exist).
    assert committed <= used
    assert not (SCANS / "no_such_file.csv").exists()


def test_the_good_files_the_cases_were_cut_from_are_accepted(made: Any, tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    # Each case differs from these by one defect, so the defect is what the error is about.
    for argv in (
        quantify(SAMPLES),
        with_model(str(made.model)),
        ("convert", SAMPLES, "--out", str(tmp_path / "converted.jdx")),
        ("check", SAMPLES, "--library", str(made.library)),
        ("plan", "--library", str(made.library), "--count", "3"),
    ):
        out = tmp_path / f"results-{argv[0]}-{len(list(tmp_path.iterdir()))}"
        filled = [str(made.library) if arg == "{lib}" else str(out) if arg == "{out}" else arg for arg in argv]
        code, _, err = run(capsys, filled)
        assert code == 0, (argv, err)


@pytest.mark.parametrize("encoding", ["utf-16-le", "utf-16-be", "utf-16", "utf-32", "utf-8-sig", "latin-1", "cp1252"])
def test_awkward_encodings_are_read_not_refused(encoding: str, tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    # Spreadsheet exports come in UTF-16 without a byte-order mark, UTF-32, or a Latin-1 code page.
    text = (GOOD / "samples.csv").read_text(encoding="utf-8").replace("sample-1", "échantillon-1").replace("sample-2", "µ-probe")
    source = tmp_path / "exported.csv"
    source.write_bytes(text.encode(encoding))
    out = tmp_path / "converted.csv"
    code, _, err = run(capsys, ["convert", source, "--out", out])
    assert code == 0, err
    header = out.read_text(encoding="utf-8").splitlines()[1]
    assert header == "wavelength_nm,échantillon-1,µ-probe,sample-3"


@pytest.mark.parametrize("encoding", ["utf-16-le", "utf-16", "utf-32"])
def test_jcamp_files_in_wide_encodings_are_read(encoding: str, tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    jdx = tmp_path / "samples.jdx"
    assert run(capsys, ["convert", GOOD / "samples.csv", "--out", jdx])[0] == 0
    wide = tmp_path / "wide.jdx"
    wide.write_bytes(jdx.read_text(encoding="utf-8").encode(encoding))
    code, _, err = run(capsys, ["convert", wide, "--out", tmp_path / "back.csv"])
    assert code == 0, err
    assert (tmp_path / "back.csv").read_text(encoding="utf-8").splitlines()[1] == "wavelength_nm,sample-1,sample-2,sample-3"
