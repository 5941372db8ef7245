"""The diagnosis of a block of flagged scans (absolve.screening) against a straightforward per-scan computation.

The block path whitens and projects every fixed shape for all flagged scans with
one matrix product and reduces the null draws without squaring their whole
table; here each scan is redone alone from the documented definition: a dense
whitening matrix (from the public :func:`prewhiten`), each family's shapes
whitened and put in the scan's smooth orthonormal basis one family at a time,
z-scores, the best squared z-score of each of the 200 fixed null draws. The
scans are simulated with ``absolve.simulate`` (invented absorbers and
disturbances, so every kind of shape is met), some with unusable points.
"""

from __future__ import annotations

import numpy as np
import scipy.optimize

from absolve.library import NoiseModel
from absolve.screening import prewhiten, screen_residuals, smooth_basis
from absolve.screening._diagnosis import _fixed_families, _scan_families
from absolve.screening._subspaces import _default_terms, _subspaces
from absolve.simulate import Instrument, measure, random_absorptivities

GRID = np.arange(400.0, 701.0)
# Invented but typical instrument magnitudes (common practice, no source).
NOISE = NoiseModel(0.0015, 0.004, 3.0)
INSTRUMENT = Instrument(noise_floor=0.0015, noise_proportional=0.004, correlation_length_nm=3.0, stray_light=0.0)


def simulated_batch() -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """Residuals, fitted absorbance, design and usable points of 40 scans with assorted disturbances."""
    rng = np.random.default_rng(5)
    k = random_absorptivities(GRID, 3, np.random.default_rng(1), peak_range=(430.0, 670.0))
    n = 40
    clean = rng.uniform(0.2, 1.0, (n, 3)) @ k
    kind = np.arange(n) % 4
    centre = rng.uniform(450.0, 650.0, (n, 1))
    band = 0.03 * np.exp(-0.5 * ((GRID - centre) / 12.0) ** 2)
    scatter = 0.01 * (GRID / 400.0) ** -4.0
    shifted = rng.uniform(0.2, 1.0, (n, 3)) @ random_absorptivities(GRID - 0.4, 3, np.random.default_rng(1), peak_range=(430.0, 670.0))
    true = np.where((kind == 0)[:, None], clean + band, np.where((kind == 1)[:, None], clean + scatter, clean))
    true = np.where((kind == 2)[:, None], shifted, true)
    measured = measure(GRID, true, INSTRUMENT, rng)
    usable = np.ones(measured.shape, dtype=bool)
    usable[::3, 200:212] = False  # a gap: AR(1) links jump it
    usable[1::5, :15] = False  # a cut short-wavelength end: another point pattern
    ones = np.ones(GRID.size)
    design = np.column_stack([k.T, ones])
    split = np.column_stack([k.T, ones, -ones])
    fitted = np.zeros_like(measured)
    for i in range(n):
        rows = usable[i]
        fitted[i] = split @ scipy.optimize.nnls(split[rows], measured[i, rows])[0]
    return measured - fitted, fitted, design, usable


def straightforward_ranking(
    residual: np.ndarray, fitted: np.ndarray, design: np.ndarray, usable: np.ndarray
) -> tuple[list[tuple[str, float, float]], float, float]:
    """Per family (kind, explained, null explained) of one scan, its smooth energy and its noise variance."""
    basis = smooth_basis(GRID, _default_terms(GRID, design.shape[1]))
    sub = _subspaces(GRID, residual[None], fitted[None], design[None], usable[None], basis, NOISE)
    orthonormal = sub.smooth_orthonormal()[0]
    coords, u = sub.coords[0], sub.residual[0]
    rough_dof = int(usable.sum() - sub.design_rank[0] - sub.smooth_rank[0])
    noise_var = (u @ u - coords @ coords) / rough_dof
    # The whitening matrix, column by column: the whitened unit vectors.
    whitening = prewhiten(GRID, np.eye(GRID.size)[None], fitted[None], NOISE, usable=usable[None])[0]
    null = np.random.default_rng(0).standard_normal((200, GRID.size)) @ orthonormal * np.sqrt(noise_var)
    filled = np.interp(GRID, GRID[usable], fitted[usable])
    ranking = []
    for family in _fixed_families(GRID) + _scan_families(GRID, filled):
        tau = (orthonormal.T @ (whitening @ family.shapes.T)).T  # each shape whitened, then its coordinates
        norm2 = np.sum(tau**2, axis=1)
        valid = norm2 > 1e-9 * norm2.max()
        norm = np.sqrt(np.where(valid, norm2, 1.0))
        z = np.where(valid, tau @ coords / norm, 0.0)
        z_null = np.where(valid[:, None], tau @ null.T / norm[:, None], 0.0)
        if family.positive:
            z, z_null = np.maximum(z, 0.0), np.maximum(z_null, 0.0)
        ranking.append((family.kind, float(np.max(z**2)), float(np.mean(np.max(z_null**2, axis=0)))))
    return ranking, float(coords @ coords), float(noise_var)


def test_block_diagnosis_equals_the_straightforward_per_scan_computation() -> None:
    residual, fitted, design, usable = simulated_batch()
    result = screen_residuals(GRID, residual, fitted, design, NOISE, usable=usable)
    flagged = np.flatnonzero(result.flagged)
    assert flagged.size >= 20
    kinds = set()
    for i in flagged:
        ranking, smooth_energy, noise_var = straightforward_ranking(residual[i], fitted[i], design, usable[i])
        ranked = sorted(ranking, key=lambda m: m[1] - m[2], reverse=True)
        best, runner = ranked[0], ranked[1]
        diagnosis = result.diagnoses[i]
        matched = diagnosis.runner_up if diagnosis.kind == "unclassified" else diagnosis.kind
        kinds.add(matched)
        assert matched == best[0], i
        np.testing.assert_allclose(diagnosis.share, best[1] / smooth_energy, rtol=1e-9)
        evidence = ((best[1] - best[2]) - (runner[1] - runner[2])) / noise_var
        np.testing.assert_allclose(diagnosis.evidence, evidence, rtol=1e-8, atol=1e-9)
        if diagnosis.kind != "unclassified":
            assert diagnosis.runner_up == runner[0]
            np.testing.assert_allclose(diagnosis.runner_up_share, runner[1] / smooth_energy, rtol=1e-9)
    assert {"foreign-band", "scatter", "wavelength-shift"} <= kinds


def test_a_scans_diagnosis_does_not_depend_on_its_block() -> None:
    residual, fitted, design, usable = simulated_batch()
    whole = screen_residuals(GRID, residual, fitted, design, NOISE, usable=usable)
    flagged = np.flatnonzero(whole.flagged)[::-1]  # another order, so other block neighbours
    alone = [screen_residuals(GRID, residual[[i]], fitted[[i]], design, NOISE, usable=usable[[i]]) for i in flagged[:6]]
    reordered = screen_residuals(GRID, residual[flagged], fitted[flagged], design, NOISE, usable=usable[flagged])
    for position, i in enumerate(flagged):
        expected = whole.diagnoses[i].summary()
        others = [reordered.diagnoses[position].summary()] + ([alone[position].diagnoses[0].summary()] if position < 6 else [])
        for other in others:
            assert other["kind"] == expected["kind"] and other["runner_up"] == expected["runner_up"]
            for name in ("share", "runner_up_share", "evidence", "amplitude_z", "size_absorbance", "peak_nm"):
                np.testing.assert_allclose(other[name], expected[name], rtol=1e-8, atol=1e-9, err_msg=name)
