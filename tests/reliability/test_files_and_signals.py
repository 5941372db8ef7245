"""Lost results: writing is all or nothing, existing results need --force, Ctrl-C leaves nothing behind.

Failures are staged by replacing the file writer of absolve.io.files (a full
disk half-way through a file, or Ctrl-C there), for every command that
writes; a real SIGINT is sent to the installed console script part-way
through a run.
"""

from __future__ import annotations

import errno
import os
import signal
import subprocess
import sys
import time
from pathlib import Path
from typing import Any

import numpy as np
import pytest

from _reliability import CONSOLE_SCRIPT, GOOD, one_error_line, run, snapshot, write_large_scan_table
from absolve.io import files, results
from absolve.simulate import Instrument, measure, random_absorptivities
from absolve.workflow import RESULT_FILES

SAMPLES = GOOD / "samples.csv"


def _commands(made: Any, out: Path) -> dict[str, list[str | Path]]:
    """Every command that writes, with the good inputs and ``out`` as its target."""
    return {
        "quantify": ["quantify", SAMPLES, "--library", made.library, "--out", out],
        "quantify-model": ["quantify", SAMPLES, "--model", made.model, "--out", out],
        "calibrate": ["calibrate", GOOD / "standards.csv", "--standards", GOOD / "standards_concentrations.csv", "--unit", "mg/L", "--out", out.with_suffix(".json")],
        "train": ["train", GOOD / "mixtures.csv", "--concentrations", GOOD / "mixture_concentrations.csv", "--unit", "mg/L", "--folds", "4", "--out", out.with_suffix(".json")],
        "convert": ["convert", SAMPLES, "--out", out.with_suffix(".jdx")],
        "check": ["check", SAMPLES, "--library", made.library, "--out", out],
        "plan": ["plan", "--library", made.library, "--count", "3", "--figure", out.with_suffix(".svg")],
    }


COMMANDS = ["quantify", "quantify-model", "calibrate", "train", "convert", "check", "plan"]


class _BrokenStream:
    """A file writer that writes the first half of the data it is given, then fails like ``failure``."""

    def __init__(self, stream: Any, failure: BaseException) -> None:
        self.stream = stream
        self.failure = failure

    def __enter__(self) -> _BrokenStream:
        return self

    def __exit__(self, *exc: object) -> None:
        self.stream.close()

    def close(self) -> None:
        self.stream.close()

    def write(self, data: Any) -> None:
        self.stream.write(data[: len(data) // 2])
        self.stream.flush()
        raise self.failure


def _break_writing(monkeypatch: pytest.MonkeyPatch, failure: BaseException, at: int) -> list[object]:
    """Make the ``at``-th file absolve opens for writing fail half-way; returns the list of files opened.

    Files are opened by the all-or-nothing writer (``absolve.io.files``) and by
    the chunked result writer (``absolve.io.results``); both are counted.
    """
    real_fdopen, real_open = os.fdopen, open
    opened: list[object] = []

    def broken_if_due(stream: Any) -> Any:
        opened.append(stream)
        return _BrokenStream(stream, failure) if len(opened) == at else stream

    def fdopen(handle: int, *args: Any, **kwargs: Any) -> Any:
        return broken_if_due(real_fdopen(handle, *args, **kwargs))

    def open_file(path: Any, mode: str = "r", *args: Any, **kwargs: Any) -> Any:
        stream = real_open(path, mode, *args, **kwargs)
        return broken_if_due(stream) if "w" in mode else stream

    monkeypatch.setattr(files.os, "fdopen", fdopen)
    monkeypatch.setattr(results, "open", open_file, raising=False)
    return opened


FAILURES = {
    "disk-full": (lambda: OSError(errno.ENOSPC, "No space left on device"), 2, "No space left on device"),
    # What Ctrl-C prints is tested on its own below: here only the exit status and the files.
    "ctrl-c": (KeyboardInterrupt, 130, None),
}
INTERRUPT_MESSAGE = "error: interrupted — nothing was written"


@pytest.mark.parametrize("failure", list(FAILURES))
@pytest.mark.parametrize("command", COMMANDS)
def test_a_failure_while_writing_leaves_no_file_and_no_part(
    command: str, failure: str, made: Any, tmp_path: Path, capsys: pytest.CaptureFixture[str], monkeypatch: pytest.MonkeyPatch
) -> None:
    make, status, message = FAILURES[failure]
    # The last file of a run fails: every earlier one is complete on disk by then and must go again.
    opened = _break_writing(monkeypatch, make(), at=3 if command.startswith("quantify") else 1)
    code, _, err = run(capsys, _commands(made, tmp_path / "out")[command])
    assert code == status, err
    if message is not None:
        assert message in one_error_line(err)
    assert "Traceback" not in err
    assert opened, "nothing was written at all"
    left = [path.name for path in tmp_path.rglob("*")]
    assert left == [], left  # no file, and no folder made for the results either


@pytest.mark.parametrize("failure", list(FAILURES))
def test_a_failure_while_writing_keeps_earlier_results_with_force(
    failure: str, made: Any, tmp_path: Path, capsys: pytest.CaptureFixture[str], monkeypatch: pytest.MonkeyPatch
) -> None:
    out = tmp_path / "out"
    assert run(capsys, _commands(made, out)["quantify"])[0] == 0
    before = snapshot(tmp_path)
    make, status, _ = FAILURES[failure]
    _break_writing(monkeypatch, make(), at=4)
    code, _, err = run(capsys, [*_commands(made, out)["quantify"], "--force"])
    assert code == status, err
    # All files are staged before any is renamed: the earlier set stays whole and unmixed.
    assert snapshot(tmp_path) == before


def test_ctrl_c_while_writing_says_nothing_was_written(made: Any, tmp_path: Path, capsys: pytest.CaptureFixture[str], monkeypatch: pytest.MonkeyPatch) -> None:
    _break_writing(monkeypatch, KeyboardInterrupt(), at=1)
    code, _, err = run(capsys, _commands(made, tmp_path / "out")["convert"])
    assert code == 130
    assert one_error_line(err) == INTERRUPT_MESSAGE


@pytest.mark.parametrize("command", COMMANDS)
def test_existing_output_is_never_replaced_without_force(command: str, made: Any, tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    argv = _commands(made, tmp_path / "out")[command]
    code, _, err = run(capsys, argv)
    assert code == 0, err
    first = snapshot(tmp_path)
    code, _, err = run(capsys, argv)
    assert code == 2
    assert "--force" in one_error_line(err)
    assert snapshot(tmp_path) == first
    code, _, err = run(capsys, [*argv, "--force"])
    assert code == 0, err


def test_one_existing_result_file_protects_the_whole_set(made: Any, tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    out = tmp_path / "out"
    out.mkdir()
    (out / "residuals.csv").write_bytes(b"an earlier run's residuals\n")
    code, _, err = run(capsys, _commands(made, out)["quantify"])
    assert code == 2
    assert "residuals.csv already exists" in one_error_line(err)
    assert sorted(path.name for path in out.iterdir()) == ["residuals.csv"]
    assert set(RESULT_FILES) > {"residuals.csv"}


def _large_input(folder: Path, n_scans: int) -> tuple[Path, Path]:
    """An invented 3-component library file (50 wavelengths) and ``n_scans`` simulated scans of mixtures."""
    from absolve.io.library_file import write_library
    from absolve.library import library_from_absorptivities

    rng = np.random.default_rng(21)
    grid = np.linspace(380.0, 750.0, 50)
    absorptivity = random_absorptivities(grid, 3, rng)
    absorptivity /= absorptivity.max(axis=1, keepdims=True)
    library = folder / "library.json"
    write_library(library_from_absorptivities(grid, absorptivity, ["a", "b", "c"], "mg/L"), library)
    scans = folder / "scans.csv"
    write_large_scan_table(scans, grid, measure(grid, rng.uniform(0.05, 0.5, (n_scans, 3)) @ absorptivity, Instrument(), rng))
    return scans, library


def _startup_seconds() -> float:
    """How long the console script takes to start (its imports), measured here on this machine."""
    start = time.monotonic()
    subprocess.run([str(CONSOLE_SCRIPT), "--version"], check=True, capture_output=True)
    return time.monotonic() - start


@pytest.mark.skipif(not CONSOLE_SCRIPT.exists(), reason=f"no installed console script at {CONSOLE_SCRIPT}")
@pytest.mark.skipif(sys.platform == "win32", reason="SIGINT to a child process is a POSIX signal")
def test_sigint_part_way_through_quantify_exits_130_and_leaves_nothing(tmp_path: Path) -> None:
    scans, library = _large_input(tmp_path, 60_000)
    out = tmp_path / "out"
    # Signal once the program is past its imports and busy with the scans (15 s or more of work here).
    delay = _startup_seconds() + 1.0
    child = subprocess.Popen(
        [str(CONSOLE_SCRIPT), "quantify", str(scans), "--library", str(library), "--out", str(out)],
        stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True,
    )
    time.sleep(delay)
    assert child.poll() is None, "the run ended before it could be interrupted"
    child.send_signal(signal.SIGINT)
    _, stderr = child.communicate(timeout=120)
    assert child.returncode == 130, stderr
    assert "Traceback" not in stderr
    assert not out.exists() or list(out.iterdir()) == []
    assert not list(tmp_path.rglob("*.part"))
