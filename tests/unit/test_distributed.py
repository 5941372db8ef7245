"""The Dask kernel: chunks of a Dask array quantified on Dask's local schedulers equal plain quantify.

The reference is absolve's own single-call ``quantify`` on the same scans (itself checked against
scipy and statsmodels in test_quantify.py); the scans are invented (absolve.simulate) with a few
saturated points and exclusions, so chunks hold different used-point patterns.
"""

from __future__ import annotations

import dataclasses
import subprocess
import sys

import numpy as np
import pytest

from absolve.errors import AbsolveError
from absolve.library import NoiseModel, library_from_absorptivities
from absolve.quantify import quantify
from absolve.simulate import Instrument, measure, random_absorptivities
from absolve.spectra import Spectra

da = pytest.importorskip("dask.array")
dask = pytest.importorskip("dask")

from absolve.distributed import quantify_dask  # noqa: E402  (needs dask, skipped above without it)

GRID = np.arange(420.0, 620.0, 1.5)
NOISE = NoiseModel(floor=0.0015, proportional=0.004, correlation_length_nm=3.0)


def _case(seed: int = 31) -> tuple[np.ndarray, object]:
    """130 invented scans of three absorbers (with a free offset), some beyond the linear limit, one saturated."""
    rng = np.random.default_rng(seed)
    absorptivity = random_absorptivities(GRID, 3, rng)
    library = dataclasses.replace(library_from_absorptivities(GRID, absorptivity, ["a", "b", "c"], "mg/L", linear_limit_absorbance=1.1), noise=NOISE)
    concentration = rng.uniform(0.0, 0.9, (130, 3)) * (rng.random((130, 3)) < 0.8)
    values = measure(GRID, concentration @ absorptivity, Instrument(baseline_offset_sd=0.003), rng)
    values[7, 40:44] = np.nan
    return values, library


def _compare(values: np.ndarray, library, chunks: int, scheduler: str, **options) -> None:  # type: ignore[no-untyped-def]
    whole = quantify(Spectra(GRID, values, [f"s{i}" for i in range(len(values))]), library, **options)
    lazy = quantify_dask(da.from_array(values, chunks=(chunks, -1)), GRID, library, **options)
    with dask.config.set(scheduler=scheduler):
        concentration, std, expanded, rms, p_value, flagged = dask.compute(
            lazy.concentration, lazy.std_uncertainty, lazy.expanded_uncertainty, lazy.rms_residual, lazy.interferent_p_value, lazy.interferent
        )
    assert len({tuple(row) for row in whole.used}) >= 3  # chunks see different used-point patterns
    # Reference: quantify on the whole batch. The fits are per scan, so chunking changes nothing but
    # the rounding of BLAS products over a different number of rows.
    np.testing.assert_allclose(concentration, whole.concentration, rtol=1e-12, atol=1e-15)
    np.testing.assert_allclose(std, whole.std_uncertainty, rtol=1e-10, atol=1e-15)
    np.testing.assert_allclose(expanded, whole.expanded_uncertainty, rtol=1e-10, atol=1e-15)
    np.testing.assert_allclose(rms, whole.rms_residual, rtol=1e-12)
    np.testing.assert_allclose(p_value, whole.screening.p_value, rtol=1e-8, atol=1e-15)
    np.testing.assert_array_equal(flagged, whole.interferent)


@pytest.mark.parametrize("scheduler", ["synchronous", "threads"])
def test_chunks_on_the_local_scheduler_equal_plain_quantify(scheduler: str) -> None:
    values, library = _case()
    _compare(values, library, 32, scheduler, path_length_tolerance=0.01)


def test_without_a_noise_model_the_batch_estimate_is_pooled_over_all_chunks() -> None:
    values, library = _case(32)
    _compare(values, dataclasses.replace(library, noise=None), 45, "synchronous")


def test_transmittance_arrays_and_lazy_results() -> None:
    values, library = _case(33)
    lazy = quantify_dask(da.from_array(10.0 ** -values, chunks=(50, 40)), GRID, library, quantity="transmittance")
    assert lazy.packed.chunks[0] == (50, 50, 30) and lazy.concentration.shape == (130, 3)
    whole = quantify(Spectra(GRID, 10.0 ** -values, [f"s{i}" for i in range(130)], "transmittance"), library)
    with dask.config.set(scheduler="synchronous"):
        np.testing.assert_allclose(lazy.concentration.compute(), whole.concentration, rtol=1e-9, atol=1e-12)


def test_bad_arrays_and_options_are_refused_before_anything_runs() -> None:
    values, library = _case()
    with pytest.raises(AbsolveError, match="does not hold one scan per row"):
        quantify_dask(da.from_array(values[:, :-1]), GRID, library)
    with pytest.raises(AbsolveError, match="needs a dask array"):
        quantify_dask(values, GRID, library)  # type: ignore[arg-type]
    with pytest.raises(AbsolveError, match="'baseline' option"):
        quantify_dask(da.from_array(values), GRID, library, baseline="cubic")  # type: ignore[arg-type]


def test_the_default_import_path_does_not_import_dask() -> None:
    code = "import sys, absolve, absolve.quantify; print('dask' in sys.modules)"
    shown = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True).stdout.strip()
    assert shown == "False"
