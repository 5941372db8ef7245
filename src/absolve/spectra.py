"""`Spectra`: a batch of scans on one increasing wavelength grid.

Everything downstream works on batches: a single scan is a batch of one.
Values may be absorbance, transmittance (0-1) or percent transmittance;
:meth:`Spectra.to_absorbance` converts with A = -log10(T). Points that cannot
be used (a transmittance at or below zero, i.e. a saturated detector) are
kept as NaN and marked ``False`` in :attr:`Spectra.usable`, never turned
into an infinite absorbance.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass, field
from typing import Literal, get_args

import numpy as np
from numpy.typing import ArrayLike, NDArray

from .errors import AbsolveError

__all__ = ["Quantity", "Spectra", "QUANTITIES", "stack_spectra"]

Quantity = Literal["absorbance", "transmittance", "percent-transmittance"]
QUANTITIES: tuple[str, ...] = get_args(Quantity)


def _readonly(array: NDArray) -> NDArray:
    array.flags.writeable = False
    return array


@dataclass(frozen=True, eq=False)
class Spectra:
    """Scans sharing one wavelength grid.

    Parameters
    ----------
    wavelengths : array_like, shape (n_wavelengths,)
        Strictly increasing wavelengths in nm.
    values : array_like, shape (n_scans, n_wavelengths)
        Measured values in ``quantity``. NaN marks an unusable point.
    names : sequence of str, length n_scans
        Scan names, unique.
    quantity : {"absorbance", "transmittance", "percent-transmittance"}
        What ``values`` hold.
    source : str, optional
        Where the scans came from (a file name), for messages and provenance.

    Examples
    --------
    >>> s = Spectra([400, 500], [[10.0, 100.0]], ["bath-1"], quantity="percent-transmittance")
    >>> s.to_absorbance().values.tolist()
    [[1.0, 0.0]]
    """

    wavelengths: NDArray[np.float64]
    values: NDArray[np.float64]
    names: tuple[str, ...]
    quantity: Quantity = "absorbance"
    source: str | None = None
    usable: NDArray[np.bool_] = field(init=False, repr=False)

    def __init__(
        self,
        wavelengths: ArrayLike,
        values: ArrayLike,
        names: Sequence[str],
        quantity: Quantity = "absorbance",
        source: str | None = None,
    ) -> None:
        grid = np.array(wavelengths, dtype=np.float64).reshape(-1)
        data = np.array(values, dtype=np.float64)
        if data.ndim == 1:
            data = data.reshape(1, -1)
        # The file name, when known, is shown by AbsolveError itself; name the batch only when it is not.
        where = "" if source else "scans: "
        if quantity not in QUANTITIES:
            raise AbsolveError(
                f"unknown quantity {quantity!r}",
                fix="use one of " + ", ".join(QUANTITIES),
                file=source,
            )
        if data.ndim != 2 or data.shape[1] != grid.size:
            raise AbsolveError(
                f"{where}values of shape {data.shape} do not match {grid.size} wavelengths",
                fix="give one value per wavelength for every scan",
                file=source,
            )
        if data.shape[0] == 0 or grid.size == 0:
            raise AbsolveError(f"{where}no scans or no wavelengths", fix="check the file holds data", file=source)
        if not np.all(np.isfinite(grid)):
            raise AbsolveError(f"{where}a wavelength is not a finite number", fix="check the wavelength column", file=source)
        if grid.size > 1 and not np.all(np.diff(grid) > 0):
            raise AbsolveError(
                f"{where}wavelengths are not strictly increasing",
                fix="remove duplicate wavelengths or sort the table",
                file=source,
            )
        if np.any(np.isinf(data)):
            raise AbsolveError(f"{where}infinite value", fix="replace it with a measured number", file=source)
        name_tuple = tuple(str(name) for name in names)
        if len(name_tuple) != data.shape[0]:
            raise AbsolveError(f"{where}{len(name_tuple)} names for {data.shape[0]} scans", file=source)
        if len(set(name_tuple)) != len(name_tuple):
            duplicated = sorted({n for n in name_tuple if name_tuple.count(n) > 1})
            raise AbsolveError(
                f"{where}duplicate scan name {duplicated[0]!r}",
                fix="give every scan a unique name",
                file=source,
            )
        object.__setattr__(self, "wavelengths", _readonly(grid))
        object.__setattr__(self, "values", _readonly(data))
        object.__setattr__(self, "names", name_tuple)
        object.__setattr__(self, "quantity", quantity)
        object.__setattr__(self, "source", source)
        object.__setattr__(self, "usable", _readonly(np.isfinite(data)))

    @property
    def n_scans(self) -> int:
        """Number of scans."""
        return int(self.values.shape[0])

    @property
    def n_wavelengths(self) -> int:
        """Number of grid points."""
        return int(self.wavelengths.size)

    def __len__(self) -> int:
        return self.n_scans

    def __repr__(self) -> str:
        span = f"{self.wavelengths[0]:g}-{self.wavelengths[-1]:g} nm"
        return f"Spectra({self.n_scans} scans x {self.n_wavelengths} wavelengths, {span}, {self.quantity})"

    def _with(self, **changes: object) -> Spectra:
        fields = {
            "wavelengths": self.wavelengths,
            "values": self.values,
            "names": self.names,
            "quantity": self.quantity,
            "source": self.source,
        }
        fields.update(changes)
        return Spectra(**fields)  # type: ignore[arg-type]

    def to_absorbance(self) -> Spectra:
        """Return the scans as absorbance, A = -log10(T).

        Transmittance at or below zero (a saturated detector or a dark-current
        overshoot) has no finite absorbance: such points become NaN and are
        marked unusable in :attr:`usable`, so later steps exclude and report them.
        """
        if self.quantity == "absorbance":
            return self
        transmittance = self.values / 100.0 if self.quantity == "percent-transmittance" else self.values
        with np.errstate(divide="ignore", invalid="ignore"):
            absorbance = np.where(transmittance > 0, -np.log10(np.where(transmittance > 0, transmittance, 1.0)), np.nan)
        return self._with(values=absorbance, quantity="absorbance")

    def count_saturated(self) -> int:
        """Number of unusable (NaN) points across all scans."""
        return int(self.values.size - np.count_nonzero(self.usable))

    def restrict(self, low: float | None = None, high: float | None = None) -> Spectra:
        """Keep only wavelengths in ``[low, high]`` nm."""
        keep = np.ones(self.n_wavelengths, dtype=bool)
        if low is not None:
            keep &= self.wavelengths >= low
        if high is not None:
            keep &= self.wavelengths <= high
        if not keep.any():
            raise AbsolveError(
                f"{self.source or 'scans'}: no wavelength between {low} and {high} nm "
                f"(the scans cover {self.wavelengths[0]:g}-{self.wavelengths[-1]:g} nm)",
                fix="choose a range inside the scanned one",
            )
        return self._with(wavelengths=self.wavelengths[keep], values=self.values[:, keep])

    def select(self, names: Sequence[str]) -> Spectra:
        """Return the named scans, in the order given."""
        index = {name: i for i, name in enumerate(self.names)}
        missing = [name for name in names if name not in index]
        if missing:
            raise AbsolveError(
                f"no scan named {missing[0]!r}", fix="check the scan names (column headers)", file=self.source
            )
        rows = [index[name] for name in names]
        return self._with(values=self.values[rows], names=tuple(names))

    def interpolate(self, grid: ArrayLike) -> Spectra:
        """Linearly interpolate onto ``grid``, which must lie inside this grid.

        Interpolation never extrapolates: a target wavelength outside the
        scanned range is an error. Unusable points stay unusable (NaN spreads
        to the neighbouring target points that depend on them).
        """
        target = np.asarray(grid, dtype=np.float64)
        if target.size == 0:
            raise AbsolveError("no wavelengths to interpolate onto", fix="give a grid with at least one wavelength", file=self.source)
        tolerance = 1e-9 * max(1.0, float(np.abs(self.wavelengths).max()))
        if target[0] < self.wavelengths[0] - tolerance or target[-1] > self.wavelengths[-1] + tolerance:
            raise AbsolveError(
                f"{self.source or 'scans'} cover {self.wavelengths[0]:g}-{self.wavelengths[-1]:g} nm, "
                f"which does not include the requested {target[0]:g}-{target[-1]:g} nm",
                fix="restrict the range to where both grids overlap (--range)",
            )
        if target.shape == self.wavelengths.shape and np.allclose(target, self.wavelengths, rtol=0, atol=tolerance):
            return self
        values = interpolate_rows(self.wavelengths, self.values, target)
        return self._with(wavelengths=target, values=values)

    def subtract_blank(self, blank: Spectra) -> Spectra:
        """Subtract a blank scan (absorbance) from every scan.

        The blank is converted to absorbance and interpolated onto this grid;
        with several blank scans their mean is used.
        """
        mine = self.to_absorbance()
        reference = blank.to_absorbance().interpolate(mine.wavelengths)
        mean_blank = reference.values.mean(axis=0)
        return mine._with(values=mine.values - mean_blank)


def interpolate_rows(x: NDArray[np.float64], rows: NDArray[np.float64], target: NDArray[np.float64]) -> NDArray[np.float64]:
    """Linear interpolation of every row of ``rows`` (sampled at ``x``) onto ``target``.

    ``target`` must lie within ``[x[0], x[-1]]``; the result has shape
    ``(rows.shape[0], target.size)``.
    """
    if x.size == 1:
        return np.repeat(rows[:, :1], target.size, axis=1)
    right = np.clip(np.searchsorted(x, target, side="right"), 1, x.size - 1)
    left = right - 1
    weight = np.clip((target - x[left]) / (x[right] - x[left]), 0.0, 1.0)
    blend = rows[:, left] * (1.0 - weight) + rows[:, right] * weight
    # A target that falls on a grid point takes that point alone, so an
    # unusable (NaN) neighbour does not spread to a usable point.
    return np.where(weight == 0.0, rows[:, left], np.where(weight == 1.0, rows[:, right], blend))


def stack_spectra(batches: Sequence[Spectra]) -> Spectra:
    """Join batches into one, interpolating later batches onto the first grid.

    Scan names must stay unique across batches.
    """
    if not batches:
        raise AbsolveError("no scans given", fix="name at least one scan file")
    first = batches[0].to_absorbance()
    if len(batches) == 1:
        return first
    grid = first.wavelengths
    low = max(batch.wavelengths[0] for batch in batches)
    high = min(batch.wavelengths[-1] for batch in batches)
    grid = grid[(grid >= low) & (grid <= high)]
    if grid.size == 0:
        spans = "; ".join(f"{batch.source or 'scans'} {batch.wavelengths[0]:g}-{batch.wavelengths[-1]:g} nm" for batch in batches)
        raise AbsolveError(
            f"the scan files share no wavelength ({spans})",
            fix="join only scans that cover a common wavelength range",
        )
    parts = [batch.to_absorbance().interpolate(grid) for batch in batches]
    names = [name for part in parts for name in part.names]
    source = ", ".join(dict.fromkeys(part.source or "scans" for part in parts))
    return Spectra(grid, np.vstack([part.values for part in parts]), names, "absorbance", source)
