"""Writing result files whole or not at all, never over results without permission; refusing pickles."""

from __future__ import annotations

import hashlib
import os
import tempfile
from collections.abc import Mapping
from pathlib import Path

from ..errors import AbsolveError

__all__ = ["atomic_write", "check_writable", "file_sha256", "refuse_pickle", "write_all"]


def file_sha256(path: str | os.PathLike[str]) -> str:
    """SHA-256 hex digest of a file's bytes, for provenance records."""
    digest = hashlib.sha256()
    with open(path, "rb") as handle:
        for block in iter(lambda: handle.read(1 << 20), b""):
            digest.update(block)
    return digest.hexdigest()


def refuse_pickle(path: str | os.PathLike[str], fix: str) -> None:
    """Refuse a Python pickle (protocol 2 or later) by its first two bytes, without loading it.

    A missing or unreadable file passes; the reader that follows names that problem.
    """
    try:
        with open(path, "rb") as handle:
            head = handle.read(2)
    except OSError:
        return
    if len(head) == 2 and head[0] == 0x80 and 2 <= head[1] <= 5:
        raise AbsolveError("this is a Python pickle, which absolve never loads (loading one can run any code)", fix=fix, file=path)


def check_writable(paths: list[Path], *, force: bool) -> None:
    """Refuse to go on when any of ``paths`` exists and ``force`` is off.

    Call this before any computation so that a refused run costs nothing.
    """
    if force:
        return
    existing = [path for path in paths if path.exists()]
    if existing:
        raise AbsolveError(
            f"{existing[0]} already exists",
            fix="choose another output, or pass --force to replace it",
        )


def atomic_write(path: str | os.PathLike[str], content: str | bytes) -> None:
    """Write ``content`` to ``path`` through a temporary file and a rename.

    Readers see the old file or the new one, never half of one.
    """
    target = Path(path)
    try:
        target.parent.mkdir(parents=True, exist_ok=True)
        data = content.encode("utf-8") if isinstance(content, str) else content
        handle, temporary = tempfile.mkstemp(prefix=f".{target.name}.", suffix=".part", dir=target.parent)
    except OSError as error:
        raise AbsolveError(f"cannot write {target}: {error.strerror}", fix="check the folder exists and is writable") from None
    try:
        with os.fdopen(handle, "wb") as stream:
            stream.write(data)
        # mkstemp creates the file readable by its owner only; give it the
        # permissions an ordinary new file would get, so colleagues can read results.
        os.chmod(temporary, 0o666 & ~_umask())
        os.replace(temporary, target)
    except OSError as error:
        Path(temporary).unlink(missing_ok=True)
        raise AbsolveError(f"cannot write {target}: {error.strerror}", fix="check the path names a file in a writable folder, with free space") from None
    except BaseException:
        Path(temporary).unlink(missing_ok=True)
        raise


def _umask() -> int:
    """The process's file-creation mask (os.umask can only be read by setting it)."""
    mask = os.umask(0o022)
    os.umask(mask)
    return mask


def write_all(files: Mapping[Path, str | bytes], *, force: bool) -> None:
    """Write several files, each atomically, after checking none would be overwritten unasked.

    The contents are all prepared before this is called, so a failure in the
    computation leaves no file behind.
    """
    check_writable(list(files), force=force)
    written: list[Path] = []
    try:
        for path, content in files.items():
            atomic_write(path, content)
            written.append(path)
    except BaseException:
        if not force:
            for path in written:
                path.unlink(missing_ok=True)
        raise
