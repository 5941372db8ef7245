"""How many threads the BLAS libraries may use during absolve's batch work: one.

The batch computations are many products of small or narrow matrices made
block by block from Python. A second BLAS thread speeds none of them up but
spins while it waits, taking the core that a report's worker process (or a
second job) needs: on 20,000 scans, fitting, the uncertainty budget and the
screen took 8.7 s of processor time with two threads and 5.5 s with one, in
the same wall time or less (docs/performance.md, fifth round).
"""

from __future__ import annotations

import functools
from collections.abc import Callable
from contextlib import AbstractContextManager
from typing import Any, ParamSpec, TypeVar

# scipy brings its own BLAS library: loaded before the controller looks, so it is limited too.
import scipy.linalg  # noqa: F401
from threadpoolctl import ThreadpoolController

__all__ = ["one_blas_thread", "single_blas_thread"]

_Parameters = ParamSpec("_Parameters")
_Returned = TypeVar("_Returned")


@functools.cache
def _controller() -> ThreadpoolController:
    # Looking up the loaded libraries takes milliseconds: once per process.
    return ThreadpoolController()


def one_blas_thread() -> AbstractContextManager[Any]:
    """A context manager that holds every loaded BLAS library to one thread, restoring the limits on exit."""
    return _controller().limit(limits=1, user_api="blas")


def single_blas_thread(function: Callable[_Parameters, _Returned]) -> Callable[_Parameters, _Returned]:
    """Decorator: ``function`` runs under :func:`one_blas_thread`."""

    @functools.wraps(function)
    def limited(*args: _Parameters.args, **kwargs: _Parameters.kwargs) -> _Returned:
        with one_blas_thread():
            return function(*args, **kwargs)

    return limited
