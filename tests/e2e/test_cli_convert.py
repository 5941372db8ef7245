"""``absolve convert``: JCAMP-DX <-> scan tables, driven through the command line."""

from __future__ import annotations

import re
import shutil
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest

from absolve.cli import main
from absolve.io.jcamp import read_jcamp
from absolve.io.tables import read_scan_table

DATA = Path(__file__).resolve().parents[1] / "data" / "jcamp"


def _run(capsys: pytest.CaptureFixture[str], *args: str | Path) -> tuple[int, str]:
    code = main(["convert", *map(str, args)])
    return code, capsys.readouterr().err


def test_jcamp_to_csv_carries_quantity_and_values(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    out = tmp_path / "difdup.csv"
    code, err = _run(capsys, DATA / "difdup.jdx", "--out", out)
    assert code == 0, err
    assert "wrote" in err and "1 scans x 10 wavelengths (absorbance)" in err
    lines = out.read_text().splitlines()
    assert lines[0] == "# quantity: absorbance" and lines[1] == "wavelength_nm,difdup"
    table = read_scan_table(out)
    # Ordinates 10 12 15 15 15 15 13 -4 -4 0 (x 0.001): worked by hand from the JCAMP-DX 1988 compression rules.
    np.testing.assert_allclose(table.values[0], np.array([10, 12, 15, 15, 15, 15, 13, -4, -4, 0]) * 1e-3, rtol=0, atol=1e-9)
    np.testing.assert_allclose(table.wavelengths, np.arange(400.0, 410.0), rtol=0)


def test_percent_table_to_jcamp_and_back(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    source = tmp_path / "bath.csv"
    source.write_text("wavelength,a,b\n400,10,100\n401,50,25\n402,1,20\n")
    jdx = tmp_path / "bath.jdx"
    code, err = _run(capsys, source, "--out", jdx, "--quantity", "percent-transmittance")
    assert code == 0, err
    assert "(transmittance)" in err  # percent is stored as the standard's 0-1 TRANSMITTANCE
    scans = read_jcamp(jdx)
    assert scans.names == ("a", "b") and scans.quantity == "transmittance"
    np.testing.assert_allclose(scans.values, [[0.1, 0.5, 0.01], [1.0, 0.25, 0.2]], rtol=1e-9)

    back = tmp_path / "back.csv"
    code, err = _run(capsys, jdx, "--out", back)
    assert code == 0, err
    assert back.read_text().startswith("# quantity: transmittance\n")
    # Without --quantity the '# quantity:' line is honoured when the table is read again.
    again = tmp_path / "again.jdx"
    code, err = _run(capsys, back, "--out", again)
    assert code == 0, err
    assert "##YUNITS=TRANSMITTANCE" in again.read_text()


def test_to_absorbance_ten_percent_is_one(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    source = tmp_path / "t.jdx"
    source.write_text(
        "##TITLE=sample\n##JCAMP-DX=4.24\n##DATA TYPE=UV/VIS SPECTRUM\n##XUNITS=NANOMETERS\n##YUNITS=%T\n"
        "##FIRSTX=400\n##LASTX=402\n##NPOINTS=3\n##XYDATA=(X++(Y..Y))\n400 10 100 0\n##END=\n"
    )
    out = tmp_path / "a.csv"
    code, err = _run(capsys, source, "--out", out, "--to-absorbance")
    assert code == 0, err
    assert "1 unusable points written as 'saturated' cells" in err
    rows = out.read_text().splitlines()
    assert rows[0] == "# quantity: absorbance"
    cells = [row.split(",")[1] for row in rows[2:]]
    # 10 % -> A = 1, 100 % -> A = 0, 0 % (saturated) -> no absorbance (common practice, no source).
    assert float(cells[0]) == pytest.approx(1.0, abs=1e-6)
    assert float(cells[1]) == pytest.approx(0.0, abs=1e-6)
    assert cells[2] == "saturated"  # read back as an unusable point

    jdx = tmp_path / "a.jdx"
    code, err = _run(capsys, source, "--out", jdx, "--to-absorbance", "--compress")
    assert code == 0, err
    assert "1 unusable points written as ?" in err
    scans = read_jcamp(jdx)
    assert scans.quantity == "absorbance" and scans.usable[0].tolist() == [True, True, False]
    np.testing.assert_allclose(scans.values[0, :2], [1.0, 0.0], rtol=0, atol=1e-6)


def test_comma_decimal_table(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    source = tmp_path / "comma.txt"
    source.write_text("wavelength;dye\n400;0,5\n401;0,25\n")
    out = tmp_path / "comma.dx"
    code, err = _run(capsys, source, "--out", out, "--decimal", ",")
    assert code == 0, err
    np.testing.assert_allclose(read_jcamp(out).values, [[0.5, 0.25]], rtol=1e-9)


def test_never_overwrites_without_force(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    out = tmp_path / "kept.csv"
    out.write_text("precious\n")
    code, err = _run(capsys, DATA / "affn.jdx", "--out", out)
    assert code == 2
    assert "already exists" in err and "--force" in err
    assert out.read_text() == "precious\n"
    code, err = _run(capsys, DATA / "affn.jdx", "--out", out, "--force")
    assert code == 0, err
    assert out.read_text().startswith("# quantity: absorbance\n")


@pytest.mark.parametrize(
    ("args", "message"),
    [
        (["scan.xlsx", "--out", "x.csv"], r"cannot tell the format of the input file 'scan.xlsx'"),
        ([str(DATA / "affn.jdx"), "--out", "x.json"], r"cannot tell the format of the output file 'x.json'"),
        ([str(DATA / "affn.jdx"), "--out", "x.csv", "--quantity", "opacity"], r"--quantity 'opacity' is not known"),
    ],
)
def test_option_errors(tmp_path: Path, capsys: pytest.CaptureFixture[str], args: list[str], message: str, monkeypatch: pytest.MonkeyPatch) -> None:
    monkeypatch.chdir(tmp_path)
    code, err = _run(capsys, *args)
    assert code == 2
    assert err.startswith("error: ") and re.search(message, err), err
    assert not (tmp_path / "x.csv").exists()


def test_malformed_jcamp_gives_file_and_line_and_writes_nothing(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    source = tmp_path / "cut.jdx"
    source.write_text((DATA / "dif.jdx").read_text().replace("404A5", "404A6"))  # a Y-check that does not match
    out = tmp_path / "out.csv"
    code, err = _run(capsys, source, "--out", out)
    assert code == 2
    assert err.startswith(f"error: {source}:17: the Y-check value 16 ")
    assert "Traceback" not in err and not out.exists()


@pytest.mark.slow
def test_console_script_runs(tmp_path: Path) -> None:
    script = shutil.which("absolve", path=str(Path(sys.executable).parent))
    if script is None:
        pytest.skip("the absolve console script is not installed")
    out = tmp_path / "sqz.csv"
    done = subprocess.run([script, "convert", str(DATA / "sqz.jdx"), "--out", str(out)], capture_output=True, text=True, timeout=120)
    assert done.returncode == 0, done.stderr
    assert out.read_text().splitlines()[1] == "wavelength_nm,sqz"
