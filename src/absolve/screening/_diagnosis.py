"""Diagnosis of flagged scans: the shape family that best matches the smooth unexplained residual."""

from __future__ import annotations

import functools
from collections.abc import Mapping
from dataclasses import dataclass

import numpy as np
from numpy.typing import NDArray

from ._results import Confidence, Diagnosis
from ._subspaces import _RANK_TOL, _Subspaces
from ._whitening import _unwhiten, _whiten_adjoint

# Largest table of null-draw z-scores made at once in the diagnosis (values): about 2 MB.
_NULL_TABLE = 300_000
# Band widths (Gaussian standard deviation, nm) and scattering exponents tried by the diagnosis.
_BAND_WIDTHS_NM = (3.0, 4.5, 6.5, 9.0, 13.0, 18.0, 25.0, 35.0, 50.0)
_SCATTER_EXPONENTS = (0.5, 1.0, 1.5, 2.0, 3.0, 4.0, 5.0)
# (share, evidence) needed for "high" and "moderate" confidence in a diagnosis.
_HIGH = (0.8, 10.0)
_MODERATE = (0.6, 4.0)
_FAMILY_WORDS = {
    "foreign-band": "a foreign absorption band",
    "scatter": "scattering (turbidity)",
    "wavelength-shift": "a wavelength-scale shift",
    "nonlinearity": "a shortfall at high absorbance",
}


@dataclass(frozen=True)
class _Family:
    """Candidate shapes of one kind: ``shapes`` (n_shapes, n_wl), their parameters, and the sign rule.

    A block of scans holds the shapes made from each scan as one family, ``shapes`` (n_scans, n_shapes, n_wl).
    """

    kind: str
    shapes: NDArray[np.float64]
    parameters: Mapping[str, NDArray]
    positive: bool


def _fixed_families(grid: NDArray[np.float64]) -> list[_Family]:
    """Shapes that do not depend on the scan: Gaussian bands on a grid of centres and widths, power-law scattering.

    Made once per grid (a batch screened in blocks asks for the same ones each time); read-only.
    """
    return _fixed_families_on(grid.tobytes())


@functools.lru_cache(maxsize=4)
def _fixed_families_on(grid_bytes: bytes) -> list[_Family]:
    grid = np.frombuffer(grid_bytes, dtype=np.float64)
    span = grid[-1] - grid[0]
    step = max(float(np.median(np.diff(grid))), span / 150.0)
    centres = np.arange(grid[0], grid[-1] + 0.5 * step, step)
    widths = np.array([w for w in _BAND_WIDTHS_NM if w <= span / 3.0] or [span / 6.0])
    c, w = (a.ravel() for a in np.meshgrid(centres, widths, indexing="ij"))
    bands = np.exp(-0.5 * ((grid[None, :] - c[:, None]) / w[:, None]) ** 2)
    exponents = np.array(_SCATTER_EXPONENTS)
    scatter = (grid[None, :] / grid[0]) ** (-exponents[:, None])
    for array in (bands, scatter, c, w, exponents):
        array.flags.writeable = False
    return [
        _Family("foreign-band", bands, {"center_nm": c, "width_nm": w}, True),
        _Family("scatter", scatter, {"exponent": exponents}, True),
    ]


def _scan_families(grid: NDArray[np.float64], fitted: NDArray[np.float64]) -> list[_Family]:
    """Shapes built from the fitted absorbance: wavelength shift and high-absorbance shortfall.

    ``fitted`` is one scan's, shape (n_wl,), giving shapes (n_shapes, n_wl), or a
    block's, (n_scans, n_wl), giving shapes (n_scans, n_shapes, n_wl).
    """
    level = np.clip(fitted, 0.0, None)
    # A shift of +d nm (features at longer wavelengths than the library) turns A(x) into A(x - d) ~ A - d A'.
    shift = -np.gradient(fitted, grid, axis=-1)[..., None, :]
    shortfall = np.stack([-(level**2), -(10.0**level - 1.0) / np.log(10.0)], axis=-2)
    return [
        _Family("wavelength-shift", shift, {}, False),
        _Family("nonlinearity", shortfall, {"shape": np.array(["quadratic", "stray-light"])}, True),
    ]


def _half_window(grid: NDArray[np.float64], profile: NDArray[np.float64]) -> tuple[float, float, float, float]:
    """Peak position, signed peak value and the contiguous half-maximum window around it."""
    size = np.abs(np.nan_to_num(profile))
    peak = int(np.argmax(size))
    below = size < 0.5 * size[peak]
    left, right = np.flatnonzero(below[:peak]), np.flatnonzero(below[peak + 1 :])
    lo = int(left[-1]) + 1 if left.size else 0
    hi = peak + int(right[0]) if right.size else grid.size - 1
    return float(grid[peak]), float(profile[peak]), float(grid[lo]), float(grid[hi])


def _confidence(share: float, evidence: float) -> Confidence:
    """How sure the shape match is: by the share it explains and its evidence over the runner-up.

    Evidence 10 is a likelihood ratio of about 150 to 1, 4 about 7 to 1. The
    thresholds were set so that, on simulated scans, "high" names the right
    kind at least 95 % of the time and "moderate" at least 80 % (docs/screening.md).
    """
    if share >= _HIGH[0] and evidence >= _HIGH[1]:
        return "high"
    if share >= _MODERATE[0] and evidence >= _MODERATE[1]:
        return "moderate"
    return "low"


@dataclass(frozen=True)
class _Match:
    kind: str
    explained: float  # whitened energy the best shape of the family explains
    null_explained: float  # what the best shape would explain of pure noise, on average
    amplitude: float
    amplitude_se: float
    shape: NDArray[np.float64]
    detail: dict[str, float | str]


def _match(
    family: _Family, tau: NDArray[np.float64], coords: NDArray[np.float64], noise_var: NDArray[np.float64],
    null_draws: NDArray[np.float64],
) -> list[_Match]:
    """Best shape of a family in each scan's smooth unexplained subspace (least squares, one amplitude).

    ``tau`` (n_scans, k, n_shapes) holds the coordinates of the whitened shapes,
    one column each, in each scan's orthonormal basis, that ``coords``
    (n_scans, k) and ``null_draws`` (n_scans, n_draws, k) are given in;
    ``noise_var`` (n_scans,) is each scan's noise variance. ``family.shapes``
    is (n_shapes, n_wl), or (n_scans, n_shapes, n_wl) for shapes made from each scan.
    Every scan's numbers are computed as for that scan alone; the block only
    spares the per-scan calls.
    """
    n_scans, n_draws = null_draws.shape[:2]
    norm2 = np.einsum("nks,nks->ns", tau, tau)
    valid = norm2 > _RANK_TOL * np.maximum(norm2.max(axis=1), np.finfo(float).tiny)[:, None]
    scale = np.where(valid, 1.0 / np.sqrt(np.where(valid, norm2, 1.0)), 0.0)
    z = (coords[:, None, :] @ tau)[:, 0] * scale  # signed amplitude z-score of each shape (in units of the noise sd)
    # The largest squared z-score of each null draw is the square of its largest z (clipped at 0 for
    # one-signed families) or of its smallest: no need to square the whole draws x shapes table.
    # A few scans' tables at a time, each a few MB at most.
    null_best = np.empty((n_scans, n_draws))
    step = max(1, _NULL_TABLE // (n_draws * tau.shape[2]))
    for start in range(0, n_scans, step):
        part = slice(start, start + step)
        z_null = null_draws[part] @ (tau[part] * scale[part, None, :])
        top = np.maximum(z_null.max(axis=2), 0.0)
        null_best[part] = top**2 if family.positive else np.maximum(top, -z_null.min(axis=2)) ** 2
    null_explained = np.mean(null_best, axis=1)
    if family.positive:
        z = np.maximum(z, 0.0)
    rows = np.arange(n_scans)
    best = np.argmax(z**2, axis=1)
    z_best, scale_best = z[rows, best], scale[rows, best]
    amplitude = np.where(valid[rows, best], z_best * scale_best, 0.0)
    se = np.sqrt(noise_var) * scale_best
    matches = []
    for i, b in enumerate(best.tolist()):
        detail = {name: (str(v[b]) if v.dtype.kind in "US" else float(v[b])) for name, v in family.parameters.items()}
        if family.kind == "wavelength-shift":
            detail.update(shift_nm=float(amplitude[i]), shift_se_nm=float(se[i]))
        shape = family.shapes[b] if family.shapes.ndim == 2 else family.shapes[i, b]
        matches.append(
            _Match(family.kind, float(z_best[i] ** 2), float(null_explained[i]), float(amplitude[i]), float(se[i]), shape, detail)
        )
    return matches


@functools.lru_cache(maxsize=8)
def _null_points(n_points: int) -> NDArray[np.float64]:
    """200 fixed draws of white noise on ``n_points`` points (made once per length: a batch has few)."""
    draws = np.random.default_rng(0).standard_normal((200, n_points))
    draws.flags.writeable = False
    return draws


def _diagnose_block(
    grid: NDArray[np.float64], fitted: NDArray[np.float64], sub: _Subspaces, smooth_found: NDArray[np.bool_],
    fixed: list[_Family],
) -> list[Diagnosis]:
    """Diagnoses of a block of flagged scans (``fitted`` and ``smooth_found`` one row per scan of ``sub``).

    A shape's coordinates in a scan's smooth subspace are ``adjoint.T @ shape``
    (:func:`_whiten_adjoint`); those of the fixed shapes come from one matrix
    product for the whole block, and the null draws' from another: per scan the
    products are too narrow (a few dozen columns) for BLAS to run near its speed.
    Each family is matched for the whole block at once (:func:`_match`).
    """
    bases = sub.smooth_orthonormal()
    adjoints = _whiten_adjoint(bases, sub.sd, sub.rho, sub.previous, sub.linked, sub.mask)
    n_scans, n_wl, k = bases.shape
    stacked = np.vstack([family.shapes for family in fixed])
    fixed_tau = (adjoints.transpose(0, 2, 1).reshape(n_scans * k, n_wl) @ stacked.T).reshape(n_scans, k, -1)
    edges = np.cumsum([0] + [family.shapes.shape[0] for family in fixed])
    null_points = _null_points(n_wl)
    null_basis = (null_points @ bases.transpose(1, 0, 2).reshape(n_wl, n_scans * k)).reshape(-1, n_scans, k)
    filled = np.array([np.interp(grid, grid[mask], row[mask]) for row, mask in zip(fitted, sub.mask, strict=True)])
    scan_families = _scan_families(grid, filled)
    scan_shapes = np.concatenate([family.shapes for family in scan_families], axis=1)
    scan_tau = adjoints.transpose(0, 2, 1) @ scan_shapes.transpose(0, 2, 1)
    scan_edges = np.cumsum([0] + [family.shapes.shape[1] for family in scan_families])
    singles = [sub.one(i) for i in range(n_scans)]
    smooth_noise = [_smooth_and_noise(single) for single in singles]
    noise_var = np.array([variance for _, variance in smooth_noise])
    # Fixed pseudo-random draws keep the result reproducible; they only set the look-elsewhere penalty.
    # Drawn per point and projected, so that they do not depend on how the smooth basis happens to be
    # rotated (which varies with the other scans it was made with).
    null_draws = null_basis.transpose(1, 0, 2) * np.sqrt(noise_var)[:, None, None]
    taus = [fixed_tau[:, :, a:b] for a, b in zip(edges[:-1], edges[1:])]
    taus += [scan_tau[:, :, a:b] for a, b in zip(scan_edges[:-1], scan_edges[1:])]
    matches = [
        _match(family, tau, sub.coords, noise_var, null_draws)
        for family, tau in zip(fixed + scan_families, taus, strict=True)
    ]
    return [
        _diagnose(grid, singles[i], bases[i], [found[i] for found in matches], *smooth_noise[i], bool(smooth_found[i]))
        for i in range(n_scans)
    ]


def _smooth_and_noise(sub: _Subspaces) -> tuple[float, float]:
    """Smooth energy of one scan's whitened residual, and its noise variance measured on the rough part.

    Measured on the rough part, a noise-model scale error cancels.
    """
    u, coords = sub.residual[0], sub.coords[0]
    smooth_energy = float(coords @ coords)
    rough_dof = int(sub.mask[0].sum() - sub.design_rank[0] - sub.smooth_rank[0])
    return smooth_energy, max(float(u @ u) - smooth_energy, 0.0) / max(rough_dof, 1)


def _diagnose(
    grid: NDArray[np.float64], sub: _Subspaces, basis: NDArray[np.float64], matches: list[_Match],
    smooth_energy: float, noise_var: float, smooth_found: bool,
) -> Diagnosis:
    """Name the shape family that best matches the smooth unexplained residual of one scan.

    ``basis`` (n_wl, k) is the scan's smooth orthonormal basis, ``matches`` the
    best shape of each family (:func:`_match`), ``smooth_energy`` and
    ``noise_var`` as :func:`_smooth_and_noise` gives them.
    """
    mask = sub.mask[0]
    smooth_residual = _unwhiten(basis @ sub.coords[0], sub.sd[0], sub.rho[0], mask)
    # Penalise each family by what its best shape explains of pure noise, so flexible families do not win on noise.
    ranked = sorted(matches, key=lambda m: m.explained - m.null_explained, reverse=True)
    best, runner = ranked[0], ranked[1]
    share = best.explained / smooth_energy if smooth_energy > 0 else 0.0
    runner_share = runner.explained / smooth_energy if smooth_energy > 0 else 0.0
    z = best.amplitude / best.amplitude_se if best.amplitude_se > 0 else 0.0
    margin = (best.explained - best.null_explained) - (runner.explained - runner.null_explained)
    evidence = margin / noise_var if noise_var > 0 else float("inf")
    peak_nm, residual_peak, lo, hi = _half_window(grid, smooth_residual)

    if not smooth_found or share < 0.5:
        value = residual_peak
        what = (
            "The residual is larger than the noise model allows but has no smooth shape: "
            "a spike, a narrow feature, or a noisier scan than the instrument's usual"
            if not smooth_found
            else f"The library leaves smooth structure unexplained, largest {value:+.2g} absorbance near "
            f"{peak_nm:.0f} nm ({lo:.0f}-{hi:.0f} nm), but it matches none of the usual shapes well "
            f"(best: {_FAMILY_WORDS[best.kind]}, {share:.0%} of it)"
        )
        return Diagnosis(
            kind="unclassified", window_nm=(lo, hi), peak_nm=peak_nm, size_absorbance=value,
            residual_absorbance=residual_peak, confidence="low", share=share, runner_up=best.kind,
            runner_up_share=share, amplitude_z=abs(z), evidence=evidence, detail={}, message=what + ".",
        )

    profile = np.where(mask, best.amplitude * best.shape, np.nan)
    if best.kind == "scatter":
        # Offset and scattering amplitude trade off against each other (a free offset absorbs the flat
        # part), so only the rise across the range is well determined: report that.
        profile = profile - profile[np.flatnonzero(mask)[-1]]
    peak_nm, value, lo, hi = _half_window(grid, profile)
    confidence = _confidence(share, evidence)
    sureness = {"high": "high confidence", "moderate": "moderate confidence", "low": "low confidence, a best guess"}
    d = best.detail
    lead_in = {
        "foreign-band": f"An absorber the library does not hold seems present: a band near {d.get('center_nm', peak_nm):.0f} nm "
        f"({lo:.0f}-{hi:.0f} nm) adding up to {value:.2g} absorbance",
        "scatter": f"A smooth rise toward short wavelengths, as turbidity or scattering gives (about lambda^-"
        f"{d.get('exponent', 4.0):g}), of about {value:.2g} absorbance from {grid[mask][-1]:.0f} to {peak_nm:.0f} nm",
        "wavelength-shift": f"The scan looks shifted by {d.get('shift_nm', 0.0):+.2f} ± {d.get('shift_se_nm', 0.0):.2f} nm "
        f"against the library's wavelength scale (largest effect {value:+.2g} absorbance near {peak_nm:.0f} nm)",
        "nonlinearity": f"The scan falls short of the library where absorbance is highest (up to {abs(value):.2g} "
        f"absorbance near {peak_nm:.0f} nm), as stray light or concentrations beyond the linear range do",
    }[best.kind]
    # Families are ranked by what they explain beyond what their best shape explains of pure noise, so a
    # more flexible runner-up can explain a larger share and still rank second: say so rather than leave it odd.
    runner_text = (
        f"next: {_FAMILY_WORDS[runner.kind]}, {runner_share:.0%}" if runner_share < share else
        f"{_FAMILY_WORDS[runner.kind]} explains {runner_share:.0%}, but with more shapes to choose from it also fits more noise"
    )
    message = f"{lead_in}; this shape explains {share:.0%} of the unexplained smooth residual ({runner_text}) — {sureness[confidence]}."

    return Diagnosis(
        kind=best.kind,  # type: ignore[arg-type]
        window_nm=(lo, hi), peak_nm=peak_nm, size_absorbance=value, residual_absorbance=residual_peak,
        confidence=confidence, share=share, runner_up=runner.kind, runner_up_share=runner_share,
        amplitude_z=abs(z), evidence=evidence, detail=best.detail, message=message,
    )
