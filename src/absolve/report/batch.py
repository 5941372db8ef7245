"""What a report needs of a batch quantified chunk by chunk, gathered in bounded memory.

A report shows every scan's numbers but draws only a few scans in detail:
the first ``detail`` and up to ``detail`` flagged ones, most strongly
flagged first (:func:`absolve.report.figures.detail_scans`). A batch handed
out in chunks (:func:`absolve.quantify.quantify_chunks`) is gathered here as
its per-scan numbers without the fitted and residual spectra, plus the
spectra of the scans that are, so far, the ones to draw. Memory therefore
grows with the per-scan numbers, not with the spectra, and the choice at the
end is the one :func:`~absolve.report.figures.detail_scans` makes on the
whole batch. The batch overview figures need only a few numbers per scan
(:class:`BatchNumbers`), a few megabytes even at 100,000 scans, so they are
cheap to hand to another process.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

import numpy as np
from numpy.typing import NDArray

from ..library import ReferenceLibrary
from ..quantify import MixtureResult, concatenate_results

__all__ = ["BatchNumbers", "DetailScans", "ReportBatch", "detail_positions", "expected_rms_residual", "flag_strength"]


def expected_rms_residual(result: MixtureResult, library: ReferenceLibrary) -> NDArray[np.float64] | None:
    """Root-mean-square residual each scan would have from instrument noise alone at its fitted absorbance.

    None when the library has no noise model; NaN for scans with no used point.
    """
    if library.noise is None or result.fitted is None:
        return None
    sd = library.noise.standard_deviation(np.nan_to_num(result.fitted))
    counts = result.used.sum(axis=1)
    expected = np.sqrt(np.sum(np.where(result.used, sd**2, 0.0), axis=1) / np.maximum(counts, 1))
    return np.where(counts > 0, expected, np.nan)


@dataclass(frozen=True)
class DetailScans:
    """The scans drawn in detail, with their spectra.

    Attributes
    ----------
    first, flagged : tuple of int
        Batch indices of the first scans and of the flagged scans not among
        them, most strongly flagged first.
    result : MixtureResult
        The result of exactly those scans, ``first`` then ``flagged``.
    """

    first: tuple[int, ...]
    flagged: tuple[int, ...]
    result: MixtureResult

    @property
    def indices(self) -> tuple[int, ...]:
        """Batch index of each scan of :attr:`result`."""
        return self.first + self.flagged


@dataclass(frozen=True)
class BatchNumbers:
    """The per-scan numbers the batch overview figures draw, and nothing else.

    Attributes
    ----------
    scan_names, components : tuple of str
    unit : str
        Concentration unit.
    concentration, expanded_uncertainty : ndarray, shape (n_scans, n_components)
    rms_residual : ndarray, shape (n_scans,)
    interferent : ndarray of bool, shape (n_scans,)
        Flagged by the interferent screen.
    expected_rms : ndarray, shape (n_scans,), or None
        :func:`expected_rms_residual` of each scan (None without a noise model).
    """

    scan_names: tuple[str, ...]
    components: tuple[str, ...]
    unit: str
    concentration: NDArray[np.float64]
    expanded_uncertainty: NDArray[np.float64]
    rms_residual: NDArray[np.float64]
    interferent: NDArray[np.bool_]
    expected_rms: NDArray[np.float64] | None

    @classmethod
    def of(cls, result: MixtureResult, expected_rms: NDArray[np.float64] | None) -> BatchNumbers:
        """The numbers of ``result`` (the arrays are shared, not copied)."""
        return cls(
            result.scan_names, result.components, result.unit, result.concentration,
            result.expanded_uncertainty, result.rms_residual, result.interferent, expected_rms,
        )

    @property
    def n_scans(self) -> int:
        """Number of scans."""
        return len(self.scan_names)


def flag_strength(result: MixtureResult) -> tuple[NDArray[np.bool_], NDArray[np.float64]]:
    """Per scan: flagged (any scan flag or an interferent verdict), and the screen's p-value (NaN as 1) to rank them."""
    flagged = np.fromiter((bool(flags) for flags in result.scan_flags), dtype=bool, count=result.n_scans) | result.interferent
    return flagged, np.nan_to_num(result.screening.p_value, nan=1.0)


def detail_positions(index: NDArray[np.intp], p: NDArray[np.float64], flagged: NDArray[np.bool_], count: int) -> NDArray[np.intp]:
    """Positions of the scans to draw among candidates with batch indices ``index``.

    The first ``count`` scans of the batch in order, then up to ``count``
    flagged scans not among them, most strongly flagged first (smallest
    ``p``, then batch order).
    """
    first = np.flatnonzero(index < count)
    first = first[np.argsort(index[first], kind="stable")]
    others = np.flatnonzero(flagged & (index >= count))
    others = others[np.lexsort((index[others], p[others]))][:count]
    return np.concatenate([first, others])


class ReportBatch:
    """A batch's report material, gathered one chunk of consecutive scans at a time.

    Parameters
    ----------
    library : ReferenceLibrary
        The library the scans were quantified with (its noise model gives the
        expected residual size).
    detail : int
        Draw the first ``detail`` scans and up to ``detail`` flagged ones.
    """

    def __init__(self, library: ReferenceLibrary, detail: int) -> None:
        self.library = library
        self.detail = max(int(detail), 0)
        self.n_scans = 0
        self._parts: list[MixtureResult] = []
        self._expected: list[NDArray[np.float64] | None] = []
        self._kept: MixtureResult | None = None
        self._kept_index = np.zeros(0, dtype=np.intp)
        self._kept_p = np.zeros(0)
        self._kept_flagged = np.zeros(0, dtype=bool)

    @classmethod
    def of(cls, result: MixtureResult, library: ReferenceLibrary, detail: int) -> ReportBatch:
        """The report material of a whole result (with its spectra)."""
        batch = cls(library, detail)
        batch.add(result)
        return batch

    def add(self, chunk: MixtureResult) -> None:
        """Take the next chunk of scans (they follow the scans taken so far)."""
        if chunk.fitted is None:
            raise ValueError("a chunk must hold its fitted and residual spectra")
        index = self.n_scans + np.arange(chunk.n_scans)
        self._parts.append(chunk.without_spectra())
        self._expected.append(expected_rms_residual(chunk, self.library))
        flagged, p = flag_strength(chunk)
        # Candidates from this chunk are chosen by the same rule as from the pool of kept and new ones.
        new = detail_positions(index, p, flagged, self.detail)
        pooled = chunk.take(new) if self._kept is None else concatenate_results([self._kept, chunk.take(new)])
        pool_index = np.concatenate([self._kept_index, index[new]])
        pool_p = np.concatenate([self._kept_p, p[new]])
        pool_flagged = np.concatenate([self._kept_flagged, flagged[new]])
        keep = detail_positions(pool_index, pool_p, pool_flagged, self.detail)
        self._kept = pooled.take(keep)
        self._kept_index, self._kept_p, self._kept_flagged = pool_index[keep], pool_p[keep], pool_flagged[keep]
        self.n_scans += chunk.n_scans

    @property
    def result(self) -> MixtureResult:
        """Every scan's numbers, without the fitted and residual spectra."""
        if not self._parts:
            raise ValueError("no scans were added")
        if len(self._parts) > 1:
            self._parts = [concatenate_results(self._parts)]
        return self._parts[0]

    @property
    def expected_rms(self) -> NDArray[np.float64] | None:
        """:func:`expected_rms_residual` of every scan (None without a noise model)."""
        if any(part is None for part in self._expected):
            return None
        return np.concatenate(self._expected)  # type: ignore[arg-type]

    @property
    def numbers(self) -> BatchNumbers:
        """What the batch overview figures draw of every scan.

        Gathered from the chunks' arrays without joining their whole results
        (:attr:`result`), which would hold every per-scan number twice for a while.
        """
        parts = self._parts
        if not parts:
            raise ValueError("no scans were added")
        if len(parts) == 1:
            return BatchNumbers.of(parts[0], self.expected_rms)

        def joined(name: str) -> NDArray[Any]:
            return np.concatenate([getattr(part, name) for part in parts])

        return BatchNumbers(
            tuple(name for part in parts for name in part.scan_names), parts[0].components, parts[0].unit,
            joined("concentration"), joined("expanded_uncertainty"), joined("rms_residual"), joined("interferent"), self.expected_rms,
        )

    @property
    def details(self) -> DetailScans:
        """The scans to draw in detail, with their spectra."""
        if self._kept is None:
            raise ValueError("no scans were added")
        n_first = int(np.sum(self._kept_index < self.detail))
        indices = self._kept_index.tolist()
        return DetailScans(tuple(indices[:n_first]), tuple(indices[n_first:]), self._kept)
