"""absolve's batch work holds the BLAS libraries to one thread, and gives the limits back afterwards."""

from __future__ import annotations

import importlib

import numpy as np
import pytest
import scipy.linalg  # noqa: F401  (loads scipy's own BLAS library, which must be limited too)
from threadpoolctl import threadpool_info, threadpool_limits

from absolve._blas import one_blas_thread, single_blas_thread
from absolve.library import library_from_absorptivities
from absolve.quantify import quantify
from absolve.simulate import random_absorptivities
from absolve.spectra import Spectra

# The package's quantify() function hides the module of the same name from attribute access.
quantify_module = importlib.import_module("absolve.quantify")


def _blas_threads() -> dict[str, int]:
    return {entry["filepath"]: entry["num_threads"] for entry in threadpool_info() if entry["user_api"] == "blas"}


@pytest.fixture
def two_blas_threads():  # type: ignore[no-untyped-def]
    """Every BLAS library at two threads (whatever the machine), so that a limit to one is visible."""
    with threadpool_limits(limits=2, user_api="blas"):
        yield


def test_one_blas_thread_limits_every_library_and_restores_them(two_blas_threads) -> None:  # type: ignore[no-untyped-def]
    before = _blas_threads()
    assert before and set(before.values()) == {2}
    with one_blas_thread():
        assert set(_blas_threads().values()) == {1}
    assert _blas_threads() == before


def test_decorated_function_runs_limited_and_returns_its_value(two_blas_threads) -> None:  # type: ignore[no-untyped-def]
    @single_blas_thread
    def seen(offset: int) -> tuple[int, ...]:
        return (*sorted(set(_blas_threads().values())), offset)

    assert seen(7) == (1, 7)
    assert set(_blas_threads().values()) == {2}


def test_quantify_computes_with_one_blas_thread(two_blas_threads, monkeypatch: pytest.MonkeyPatch) -> None:  # type: ignore[no-untyped-def]
    grid = np.arange(400.0, 601.0, 2.0)
    truth = random_absorptivities(grid, 2, np.random.default_rng(3))
    library = library_from_absorptivities(grid, truth, ["a", "b"], "mg/L")
    scans = Spectra(grid, np.array([[0.2, 0.1], [0.05, 0.3]]) @ truth, ["s1", "s2"])
    seen: list[set[int]] = []
    propagate = quantify_module._Job._propagate_block

    def recording(self, *args, **kwargs):  # type: ignore[no-untyped-def]
        seen.append(set(_blas_threads().values()))
        return propagate(self, *args, **kwargs)

    monkeypatch.setattr(quantify_module._Job, "_propagate_block", recording)
    result = quantify(scans, library)
    assert seen and all(threads == {1} for threads in seen)
    np.testing.assert_allclose(result.concentration, [[0.2, 0.1], [0.05, 0.3]], rtol=1e-9)
    assert set(_blas_threads().values()) == {2}
