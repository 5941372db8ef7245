"""Quantification beyond one machine: the same computation mapped over chunks of a Dask array.

Batches too large for one machine's memory (hyperspectral images, plant-wide
monitoring archives) are held as a Dask array of scans, rows = scans, chunked
along scans only. :func:`quantify_dask` maps the quantification of
:func:`absolve.quantify.quantify` over the chunks with
``dask.array.map_blocks``; Dask's scheduler (local threads, or a
``dask.distributed`` cluster) decides where each chunk runs. Every chunk
gives the numbers the whole batch would give its scans: when the library has
no noise model, the residual statistics it is estimated from are first
summed over all chunks.

Dask is an optional dependency (``pip install absolve[dask]``); it is
imported only when :func:`quantify_dask` is called.

Examples
--------
>>> import dask.array as da  # doctest: +SKIP
>>> scans = da.from_zarr("archive.zarr")  # (n_scans, n_wavelengths), chunks of a few thousand scans  # doctest: +SKIP
>>> result = quantify_dask(scans, wavelengths, library)  # doctest: +SKIP
>>> concentration, flagged = dask.compute(result.concentration, result.interferent)  # doctest: +SKIP
"""

from __future__ import annotations

import functools
from dataclasses import dataclass
from typing import TYPE_CHECKING, Any

import numpy as np
from numpy.typing import ArrayLike, NDArray

from .errors import AbsolveError
from .library import ReferenceLibrary
from .quantify import DEFAULT_CEILING, Baseline, _Job, _Pool, _check_options
from .spectra import QUANTITIES, Quantity, Spectra

if TYPE_CHECKING:
    import dask.array

__all__ = ["DaskQuantification", "quantify_dask"]


@dataclass(frozen=True)
class DaskQuantification:
    """Lazy per-scan results of :func:`quantify_dask` (Dask arrays, nothing computed yet).

    All fields are slices of one array made by a single ``map_blocks``, so
    computing several of them together (``dask.compute(r.concentration,
    r.interferent)``) quantifies each chunk once.

    Attributes
    ----------
    components : tuple of str
    unit : str
    packed : dask.array.Array, shape (n_scans, 3 * n_components + 3)
        Per scan: concentrations, standard uncertainties, expanded
        uncertainties (``n_components`` columns each), then RMS residual,
        interferent p-value and the interferent flag (1.0 or 0.0).
    """

    components: tuple[str, ...]
    unit: str
    packed: dask.array.Array

    @property
    def concentration(self) -> dask.array.Array:
        """Concentrations, shape (n_scans, n_components), in :attr:`unit` (dilution applied)."""
        return self.packed[:, : len(self.components)]

    @property
    def std_uncertainty(self) -> dask.array.Array:
        """Combined standard uncertainties, shape (n_scans, n_components)."""
        m = len(self.components)
        return self.packed[:, m : 2 * m]

    @property
    def expanded_uncertainty(self) -> dask.array.Array:
        """Expanded uncertainties (about 95 %), shape (n_scans, n_components)."""
        m = len(self.components)
        return self.packed[:, 2 * m : 3 * m]

    @property
    def rms_residual(self) -> dask.array.Array:
        """Root-mean-square fit residual, shape (n_scans,)."""
        return self.packed[:, 3 * len(self.components)]

    @property
    def interferent_p_value(self) -> dask.array.Array:
        """p-value of the interferent screen, shape (n_scans,)."""
        return self.packed[:, 3 * len(self.components) + 1]

    @property
    def interferent(self) -> dask.array.Array:
        """True where the screen finds structure the library does not explain, shape (n_scans,)."""
        return self.packed[:, 3 * len(self.components) + 2] > 0.5


def quantify_dask(
    array: dask.array.Array,
    wavelengths: ArrayLike,
    library: ReferenceLibrary,
    *,
    quantity: Quantity = "absorbance",
    baseline: Baseline = "offset",
    wavelength_range: tuple[float | None, float | None] = (None, None),
    path_length: float = 1.0,
    dilution: float = 1.0,
    ceiling: float = DEFAULT_CEILING,
    path_length_tolerance: float = 0.0,
    dilution_tolerance: float = 0.0,
    alpha: float = 0.05,
) -> DaskQuantification:
    """Quantify every scan of a Dask array, chunk by chunk, on whatever scheduler Dask uses.

    Parameters
    ----------
    array : dask.array.Array, shape (n_scans, n_wavelengths)
        Scans as rows. Chunks should split the scans only; a split along
        wavelength is undone (each scan must be whole in one chunk).
    wavelengths : array_like, shape (n_wavelengths,)
        Strictly increasing grid in nm, shared by all scans.
    library : ReferenceLibrary
    quantity : {"absorbance", "transmittance", "percent-transmittance"}
        What the array holds.
    baseline, wavelength_range, path_length, dilution, ceiling, path_length_tolerance, dilution_tolerance, alpha
        As for :func:`absolve.quantify.quantify`.

    Returns
    -------
    DaskQuantification
        Lazy results; nothing is computed until Dask is asked to.

    Raises
    ------
    AbsolveError
        Invalid options, an array that is not 2-D or does not match the grid.
    """
    import dask
    import dask.array as da

    _check_options(baseline, path_length, dilution, ceiling, path_length_tolerance, dilution_tolerance, alpha)
    if quantity not in QUANTITIES:
        raise AbsolveError(f"unknown quantity {quantity!r}", fix="use one of " + ", ".join(QUANTITIES))
    grid = np.asarray(wavelengths, dtype=np.float64).reshape(-1)
    if not isinstance(array, da.Array):
        raise AbsolveError(f"quantify_dask needs a dask array of scans; got {type(array).__name__}", fix="wrap it with dask.array.from_array")
    if array.ndim != 2 or array.shape[1] != grid.size:
        raise AbsolveError(
            f"the array of shape {array.shape} does not hold one scan per row on {grid.size} wavelengths",
            fix="give a 2-D array (n_scans, n_wavelengths) chunked along scans",
        )
    scans = array.astype(np.float64).rechunk({1: -1})
    options: dict[str, Any] = {
        "baseline": baseline, "wavelength_range": wavelength_range, "path_length": path_length, "dilution": dilution,
        "ceiling": ceiling, "tol_b": path_length_tolerance, "tol_d": dilution_tolerance, "alpha": alpha,
    }
    pooled = None
    if library.noise is None:
        # The noise model is estimated from the whole batch's residuals: sum their statistics over all chunks first.
        parts = dask.compute(*[dask.delayed(_chunk_pool)(block, grid, library, quantity, options) for block in scans.to_delayed().ravel()])
        pooled = functools.reduce(_Pool.merge, parts)
    n_columns = 3 * library.n_components + 3
    packed = da.map_blocks(
        _chunk_kernel, scans, grid=grid, library=library, quantity=quantity, options=options, pooled=pooled,
        chunks=(scans.chunks[0], (n_columns,)), dtype=np.float64,
    )
    return DaskQuantification(library.names, library.unit, packed)


def _job(block: NDArray[np.float64], grid: NDArray[np.float64], library: ReferenceLibrary, quantity: Quantity,
         options: dict[str, Any], pooled: _Pool | None) -> _Job:
    # Scan names only need to be unique within the chunk.
    spectra = Spectra(grid, block, [f"scan-{i}" for i in range(block.shape[0])], quantity)
    return _Job(spectra, library, options["baseline"], options["wavelength_range"], options["path_length"], options["dilution"],
                options["ceiling"], options["tol_b"], options["tol_d"], options["alpha"], pooled=pooled)


def _chunk_pool(block: NDArray[np.float64], grid: NDArray[np.float64], library: ReferenceLibrary, quantity: Quantity,
                options: dict[str, Any]) -> _Pool:
    """The residual sums of one chunk (libraries without a noise model)."""
    pool = _job(np.asarray(block), grid, library, quantity, options, None).pool
    assert pool is not None
    return pool


def _chunk_kernel(block: NDArray[np.float64], *, grid: NDArray[np.float64], library: ReferenceLibrary, quantity: Quantity,
                  options: dict[str, Any], pooled: _Pool | None) -> NDArray[np.float64]:
    """Quantify one chunk of scans and pack the per-scan numbers (see :class:`DaskQuantification`)."""
    if block.shape[0] == 0:
        return np.empty((0, 3 * library.n_components + 3))
    job = _job(block, grid, library, quantity, options, pooled)
    result = job.result(0, job.n_scans)
    return np.column_stack([
        result.concentration, result.std_uncertainty, result.expanded_uncertainty,
        result.rms_residual, result.screening.p_value, result.interferent.astype(np.float64),
    ])
