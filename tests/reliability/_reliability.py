"""Helpers shared by the reliability tests (imported by name; fixtures live in conftest.py)."""

from __future__ import annotations

import os
import sys
from collections.abc import Sequence
from pathlib import Path

import pytest

from absolve.cli import main

CORPUS = Path(__file__).resolve().parents[1] / "data" / "bad_inputs"
GOOD = CORPUS / "good"
# The console script installed beside the running interpreter, as the package's users run it.
CONSOLE_SCRIPT = Path(sys.executable).parent / "absolve"
SLOW = os.environ.get("ABSOLVE_SLOW") == "1"


def run(capsys: pytest.CaptureFixture[str], argv: Sequence[str | Path]) -> tuple[int, str, str]:
    """Run the command line in this process; return (exit status, stdout, stderr)."""
    code = main([str(arg) for arg in argv])
    captured = capsys.readouterr()
    return code, captured.out, captured.err


def one_error_line(err: str) -> str:
    """The single ``error:`` line on stderr (fails when there is anything else, or a traceback)."""
    lines = err.strip("\n").splitlines()
    assert len(lines) == 1, f"expected one stderr line, got:\n{err}"
    assert lines[0].startswith("error: "), err
    assert "Traceback" not in err
    return lines[0]


def snapshot(folder: Path) -> dict[str, bytes]:
    """Every file under ``folder`` (relative path -> bytes), hidden and temporary ones included."""
    return {str(path.relative_to(folder)): path.read_bytes() for path in sorted(folder.rglob("*")) if path.is_file()}


def read_rows(path: Path) -> list[dict[str, str]]:
    """The rows of a CSV file written by absolve, as dicts."""
    import csv
    import io

    return list(csv.DictReader(io.StringIO(path.read_text(encoding="utf-8"))))


def assert_no_bare_gaps(results: Path) -> list[dict[str, str]]:
    """Every empty (NaN) concentration or uncertainty in results.csv has a flag saying why; returns the rows."""
    rows = read_rows(results)
    for row in rows:
        if row["concentration"] == "" or row["std_uncertainty"] == "":
            assert row["flags"], f"unexplained empty cell in {results.name}: {row}"
        for key in ("concentration", "std_uncertainty"):
            assert row[key].lower() not in ("nan", "inf", "-inf"), row
    return rows
