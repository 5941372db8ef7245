"""Helpers shared by the reliability tests (imported by name; fixtures live in conftest.py)."""

from __future__ import annotations

import os
import signal
import subprocess
import sys
import tempfile
import time
from collections.abc import Sequence
from pathlib import Path

import numpy as np
import pytest

from absolve.cli import main

CORPUS = Path(__file__).resolve().parents[1] / "data" / "bad_inputs"
GOOD = CORPUS / "good"
# The console script installed beside the running interpreter, as the package's users run it.
CONSOLE_SCRIPT = Path(sys.executable).parent / "absolve"
SLOW = os.environ.get("ABSOLVE_SLOW") == "1"
PAGE_BYTES = os.sysconf("SC_PAGE_SIZE") if hasattr(os, "sysconf") else 4096


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


def write_large_scan_table(path: Path, grid: np.ndarray, absorbance: np.ndarray, *, block: int = 4096) -> None:
    """Write scans (rows of ``absorbance``) as a wide scan table with 4 decimals, fast.

    Formatting 37 million numbers one by one takes minutes; here every cell is
    the same 7 characters (sign or leading zero, one digit, point, four
    decimals), built digit by digit with numpy, a block of wavelengths at a time.

    Parameters
    ----------
    grid : ndarray, shape (n_wavelengths,)
        Whole-nanometre wavelengths.
    absorbance : ndarray, shape (n_scans, n_wavelengths)
        Values in (-10, 10).
    """

    n_scans = absorbance.shape[0]
    with open(path, "wb") as stream:
        stream.write(("wavelength_nm," + ",".join(f"scan-{i:06d}" for i in range(n_scans)) + "\n").encode())
        for start in range(0, grid.size, max(1, block * 64 // n_scans)):
            rows = absorbance[:, start : start + max(1, block * 64 // n_scans)].T  # (wavelengths, scans)
            counts = np.rint(np.abs(rows) * 1e4).astype(np.int64)
            cells = np.empty(rows.shape + (8,), dtype=np.uint8)
            cells[..., 0] = np.where(rows < 0, ord("-"), ord("0"))
            cells[..., 1] = 48 + counts // 10_000 % 10
            cells[..., 2] = ord(".")
            for place, power in enumerate((1000, 100, 10, 1), start=3):
                cells[..., place] = 48 + counts // power % 10
            cells[..., 7] = ord(",")
            cells[:, -1, 7] = ord("\n")
            for wavelength, row in zip(grid[start : start + rows.shape[0]], cells):
                stream.write(f"{wavelength:g},".encode())
                stream.write(row.tobytes())


def tree_resident_bytes(root: int) -> int:
    """Resident memory of a process and all its descendants (a worker process counts), from /proc; 0 without it."""
    parent: dict[int, int] = {}
    resident: dict[int, int] = {}
    for entry in Path("/proc").glob("[0-9]*"):
        try:
            stat = (entry / "stat").read_text()
            # Fields after the parenthesised command name: state, parent id, ...; resident pages is the 24th field of stat.
            fields = stat[stat.rindex(")") + 2 :].split()
            parent[int(entry.name)], resident[int(entry.name)] = int(fields[1]), int(fields[21]) * PAGE_BYTES
        except (OSError, ValueError, IndexError):
            continue
    tree, added = {root}, {root}
    while added:
        added = {pid for pid, ppid in parent.items() if ppid in tree} - tree
        tree |= added
    return sum(resident.get(pid, 0) for pid in tree)


def run_sampling_memory(command: Sequence[str | Path], timeout: float) -> tuple[subprocess.CompletedProcess[str], float]:
    """Run a command; its result and the peak of its process tree's summed resident memory, sampled every 20 ms.

    Output goes to temporary files, not pipes, so a chatty command cannot stall on a full pipe
    while it is being sampled; past ``timeout`` seconds its whole process group is killed.
    """
    with tempfile.TemporaryFile("w+") as out, tempfile.TemporaryFile("w+") as err:
        child = subprocess.Popen([str(part) for part in command], stdout=out, stderr=err, text=True, start_new_session=True)
        peak = 0
        deadline = time.monotonic() + timeout
        while child.poll() is None:
            if time.monotonic() > deadline:
                os.killpg(child.pid, signal.SIGKILL)
                child.wait()
                break
            peak = max(peak, tree_resident_bytes(child.pid))
            time.sleep(0.02)
        out.seek(0)
        err.seek(0)
        return subprocess.CompletedProcess(child.args, child.returncode, out.read(), err.read()), float(peak)
