"""Worker processes for figures: fresh interpreters that leave Ctrl-C to this process."""

from __future__ import annotations

import multiprocessing
import signal
from collections.abc import Callable
from concurrent.futures import ProcessPoolExecutor
from typing import Any

__all__ = ["spawned_pool"]


def spawned_pool(workers: int, initializer: Callable[..., None] | None = None, initargs: tuple[Any, ...] = ()) -> ProcessPoolExecutor:
    """A pool of ``workers`` fresh interpreters, each running ``initializer(*initargs)`` first.

    "spawn" is safe whatever threads this process runs (BLAS, a writer); it
    imports the main module again, so a script using the pool must keep its
    work under ``if __name__ == "__main__":``. The workers ignore Ctrl-C: it
    is this process's to handle, and it stops them by shutting the pool down.
    """
    return ProcessPoolExecutor(
        workers, mp_context=multiprocessing.get_context("spawn"), initializer=_started, initargs=(initializer, initargs)
    )


def _started(initializer: Callable[..., None] | None, initargs: tuple[Any, ...]) -> None:
    signal.signal(signal.SIGINT, signal.SIG_IGN)
    if initializer is not None:
        initializer(*initargs)
