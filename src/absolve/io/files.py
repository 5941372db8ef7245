"""Writing result files whole or not at all, never over results without permission; refusing pickles."""

from __future__ import annotations

import contextlib
import hashlib
import os
import tempfile
from collections.abc import Iterable, Iterator, Mapping, Sequence
from pathlib import Path

from ..errors import AbsolveError

__all__ = ["Content", "atomic_write", "check_writable", "file_sha256", "refuse_pickle", "write_all"]

Content = str | bytes | Iterable[str | bytes]
"""What a file receives: text (written as UTF-8), bytes, or an iterable of such chunks.

Chunks are written as they are produced, so a large file need never exist
whole in memory; an exception while producing them counts as a failed write.
"""


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


def atomic_write(path: str | os.PathLike[str], content: Content) -> None:
    """Write ``content`` to ``path`` through a temporary file and a rename.

    Readers see the old file or the new one, never half of one.
    """
    write_all({Path(path): content}, force=True)


def _stage(target: Path, content: Content) -> Path:
    """Write ``content`` to a new temporary file beside ``target`` (``.NAME.*.part``) and return its path.

    The folder exists: :func:`write_all` makes it (see :func:`folders_removed_on_failure`).
    """
    try:
        handle, temporary = tempfile.mkstemp(prefix=f".{target.name}.", suffix=".part", dir=target.parent)
    except OSError as error:
        raise AbsolveError(f"cannot write {target}: {error.strerror}", fix="check the folder exists and is writable") from None
    try:
        with os.fdopen(handle, "wb") as stream:
            for chunk in (content,) if isinstance(content, (str, bytes)) else content:
                stream.write(chunk.encode("utf-8") if isinstance(chunk, str) else chunk)
        # mkstemp creates the file readable by its owner only; give it the
        # permissions an ordinary new file would get, so colleagues can read results.
        os.chmod(temporary, 0o666 & ~_umask())
    except OSError as error:
        Path(temporary).unlink(missing_ok=True)
        raise AbsolveError(f"cannot write {target}: {error.strerror}", fix="check there is free space on the disk") from None
    except BaseException:
        Path(temporary).unlink(missing_ok=True)
        raise
    return Path(temporary)


def _umask() -> int:
    """The process's file-creation mask (os.umask can only be read by setting it)."""
    mask = os.umask(0o022)
    os.umask(mask)
    return mask


@contextlib.contextmanager
def folders_removed_on_failure(folders: Iterable[str | os.PathLike[str]]) -> Iterator[None]:
    """Create ``folders`` (and missing parents); if the block then fails, remove those it created that are left empty.

    A failed or interrupted run leaves no trace, not even an empty results folder.
    """
    folders = [Path(folder) for folder in folders]
    created = sorted({path for folder in folders for path in (folder, *folder.parents) if not path.exists()}, key=lambda path: -len(path.parts))
    for folder in folders:
        try:
            folder.mkdir(parents=True, exist_ok=True)
        except OSError as error:
            _remove_empty(created)
            raise AbsolveError(f"cannot write into {folder}: {error.strerror}", fix="check the folder exists and is writable") from None
    try:
        yield
    except BaseException:
        _remove_empty(created)
        raise


def _remove_empty(folders: list[Path]) -> None:
    """Remove each of ``folders`` (deepest first) that is empty; leave the others."""
    for folder in folders:
        with contextlib.suppress(OSError):
            folder.rmdir()


def write_all(files: Mapping[Path, Content], *, force: bool, staged: Sequence[tuple[Path, Path]] = ()) -> None:
    """Write several files after checking none would be overwritten unasked: all of them, or none.

    The contents are all prepared before this is called, so a failure in the
    computation leaves no file behind. Every file is first written in full
    to a temporary file beside its target; only when all are on disk are
    they renamed into place. A failure or an interruption while writing
    (a full disk, Ctrl-C) therefore removes the temporary files and leaves
    any earlier results untouched, also with ``force``.

    ``staged`` lists files the caller has already written in full, as
    ``(temporary, target)`` pairs on the targets' disk; they are renamed
    with the others, all or none.
    """
    targets = [Path(target) for _, target in staged] + [Path(path) for path in files]
    check_writable(targets, force=force)
    with folders_removed_on_failure([target.parent for target in targets]):
        _write_and_rename(files, targets, [Path(temporary) for temporary, _ in staged], force)


def _write_and_rename(files: Mapping[Path, Content], targets: list[Path], ready: list[Path], force: bool) -> None:
    """Stage every file not yet ``ready`` beside its target, then rename all into place; undo on failure."""
    staged = len(ready)
    replaced: list[Path] = []
    try:
        for target, content in zip(targets[staged:], files.values()):
            ready.append(_stage(target, content))
        for temporary, target in zip(ready, targets):
            try:
                os.replace(temporary, target)
            except OSError as error:
                raise AbsolveError(
                    f"cannot write {target}: {error.strerror}", fix="check the path names a file in a writable folder"
                ) from None
            replaced.append(target)
    except BaseException:
        for temporary in ready:
            temporary.unlink(missing_ok=True)
        # Renames take microseconds, so a failure among them is rare; without
        # force the results already renamed into place are taken away again.
        if not force:
            for target in replaced:
                target.unlink(missing_ok=True)
        raise
