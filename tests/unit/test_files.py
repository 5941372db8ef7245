"""Result files are written whole or not at all, and never over existing files unasked."""

from __future__ import annotations

import hashlib
import os
import stat
from pathlib import Path

import pytest

from absolve.errors import AbsolveError
from absolve.io import files
from absolve.io.files import atomic_write, check_writable, file_sha256, write_all


def _listing(folder: Path) -> list[str]:
    return sorted(path.name for path in folder.iterdir())


def test_atomic_write_text_and_bytes_and_creates_folders(tmp_path: Path) -> None:
    target = tmp_path / "out" / "deeper" / "results.csv"
    atomic_write(target, "scan,value\nä,1\n")
    assert target.read_bytes() == "scan,value\nä,1\n".encode()
    atomic_write(target, b"\x00\x01")
    assert target.read_bytes() == b"\x00\x01"
    assert _listing(target.parent) == ["results.csv"]  # no temporary file left behind


def test_atomic_write_gives_ordinary_permissions(tmp_path: Path) -> None:
    mask = os.umask(0o022)
    try:
        atomic_write(tmp_path / "lib.json", "{}")
    finally:
        os.umask(mask)
    # A new file is readable by the group and others under umask 022, as with open(..., "w").
    assert stat.S_IMODE((tmp_path / "lib.json").stat().st_mode) == 0o644


def test_atomic_write_failure_keeps_the_old_file_and_leaves_no_part(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    target = tmp_path / "lib.json"
    target.write_text("old")

    def broken_replace(source: str, destination: str) -> None:
        raise OSError(28, "No space left on device")

    monkeypatch.setattr(files.os, "replace", broken_replace)
    with pytest.raises(AbsolveError, match="cannot write .*lib.json: No space left on device"):
        atomic_write(target, "new")
    assert target.read_text() == "old"
    assert _listing(tmp_path) == ["lib.json"]


def test_atomic_write_onto_a_folder_is_an_absolve_error(tmp_path: Path) -> None:
    (tmp_path / "taken").mkdir()
    with pytest.raises(AbsolveError, match="cannot write .*taken"):
        atomic_write(tmp_path / "taken", "x")
    assert _listing(tmp_path) == ["taken"]


def test_atomic_write_into_an_unusable_folder_is_an_absolve_error(tmp_path: Path) -> None:
    (tmp_path / "file").write_text("x")
    with pytest.raises(AbsolveError, match="cannot write"):
        atomic_write(tmp_path / "file" / "inside.csv", "y")


def test_check_writable_refuses_existing_files_unless_forced(tmp_path: Path) -> None:
    existing = tmp_path / "results.csv"
    existing.write_text("keep")
    check_writable([tmp_path / "new.csv"], force=False)
    check_writable([existing], force=True)
    with pytest.raises(AbsolveError, match="results.csv already exists — choose another output, or pass --force"):
        check_writable([tmp_path / "new.csv", existing], force=False)


def test_write_all_refuses_existing_files_and_writes_nothing(tmp_path: Path) -> None:
    existing = tmp_path / "fit.csv"
    existing.write_text("old fit")
    planned = {tmp_path / "results.csv": "r", existing: "new fit", tmp_path / "report.html": "<html>"}
    with pytest.raises(AbsolveError, match="fit.csv already exists"):
        write_all(planned, force=False)
    assert _listing(tmp_path) == ["fit.csv"]
    assert existing.read_text() == "old fit"
    write_all(planned, force=True)
    assert existing.read_text() == "new fit"
    assert _listing(tmp_path) == ["fit.csv", "report.html", "results.csv"]


def test_write_all_failure_midway_leaves_no_file(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    real_replace = os.replace
    calls: list[str] = []

    def replace_then_fail(source: str, destination: str) -> None:
        calls.append(str(destination))
        if len(calls) == 2:
            raise OSError(5, "Input/output error")
        real_replace(source, destination)

    monkeypatch.setattr(files.os, "replace", replace_then_fail)
    planned = {tmp_path / "out" / name: "content" for name in ("results.csv", "fit.csv", "report.html")}
    with pytest.raises(AbsolveError, match="Input/output error"):
        write_all(planned, force=False)
    assert len(calls) == 2
    # The first file is removed again, the second never appeared, and the folder made for them is gone.
    assert not (tmp_path / "out").exists()


def test_write_all_interrupted_midway_leaves_no_file(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    real_fdopen = os.fdopen
    opened: list[int] = []

    def fdopen_then_interrupt(handle: int, *args, **kwargs):  # type: ignore[no-untyped-def]
        opened.append(handle)
        if len(opened) == 2:
            os.close(handle)
            raise KeyboardInterrupt
        return real_fdopen(handle, *args, **kwargs)

    monkeypatch.setattr(files.os, "fdopen", fdopen_then_interrupt)
    with pytest.raises(KeyboardInterrupt):
        write_all({tmp_path / "a.csv": "a", tmp_path / "b.csv": "b"}, force=False)
    assert _listing(tmp_path) == []


def test_file_sha256_matches_hashlib(tmp_path: Path) -> None:
    content = os.urandom(3 << 20)  # spans several 1 MiB blocks
    path = tmp_path / "data.bin"
    path.write_bytes(content)
    # hashlib on the whole content is the reference.
    assert file_sha256(path) == hashlib.sha256(content).hexdigest()
    (tmp_path / "empty").write_bytes(b"")
    # SHA-256 of the empty message (from memory).
    assert file_sha256(tmp_path / "empty") == "e3b0c44298fc1c149afbf4c8996fb92427ae41e4649b934ca495991b7852b855"


def test_a_failure_keeps_folders_that_existed_before(tmp_path: Path) -> None:
    kept = tmp_path / "kept"
    kept.mkdir()
    with pytest.raises(KeyboardInterrupt):
        with files.folders_removed_on_failure([kept / "a" / "b", kept]):
            assert (kept / "a" / "b").is_dir()
            raise KeyboardInterrupt
    assert kept.is_dir() and not (kept / "a").exists()
    with files.folders_removed_on_failure([kept / "c"]):
        pass
    assert (kept / "c").is_dir()
