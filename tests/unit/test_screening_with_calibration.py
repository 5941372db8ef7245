"""Interferent screening end to end: libraries calibrated from simulated standards, then samples screened.

The screen's own tests use the true noise model; here the noise model, the absorptivities and the
screen's null correction are all learned from noisy standards, as in use. The spectra are invented
(absolve.simulate), so the truth — clean or disturbed — is known for every scan.
"""

from __future__ import annotations

import numpy as np
import pytest

from absolve.calibration import calibrate
from absolve.quantify import quantify
from absolve.simulate import Band, Instrument, band_spectrum, measure, random_absorptivities
from absolve.spectra import Spectra

GRID = np.arange(380.0, 751.0)
INSTRUMENT = Instrument(stray_light=0.0, baseline_offset_sd=0.002)
LEVELS = np.array([2.0, 5.0, 8.0, 12.0, 16.0, 22.0])
N_CALIBRATIONS = 6
N_SCANS = 60


def _flag_rates() -> dict[str, float]:
    rates: dict[str, list[float]] = {}
    for seed in range(N_CALIBRATIONS):
        rng = np.random.default_rng(500 + seed)
        truth = random_absorptivities(GRID, 3, rng) * 0.08
        conc = np.array([np.eye(3)[k] * level for k in range(3) for level in LEVELS])
        standards = Spectra(GRID, measure(GRID, conc @ truth, INSTRUMENT, rng), [f"s{i}" for i in range(len(conc))])
        library = calibrate(standards, conc, ["a", "b", "c"], "mg/L")
        clean = rng.uniform(1.0, 12.0, (N_SCANS, 3)) @ truth
        peak = clean.max(axis=1, keepdims=True)
        bands = np.array([band_spectrum(GRID, [Band(centre, 15.0, 1.0)]) for centre in rng.uniform(450.0, 650.0, N_SCANS)])
        cases = {
            "clean": clean,
            "band 0.5 %": clean + 0.005 * peak * bands,
            "band 1 %": clean + 0.01 * peak * bands,
            "band 2 %": clean + 0.02 * peak * bands,
            "shift 0.5 nm": np.array([np.interp(GRID, GRID + 0.5, row) for row in clean]),
            "turbidity": clean + 0.008 * (400.0 / GRID) ** 4,  # 0.008 absorbance at 400 nm, 0.0005 at 750 nm
        }
        for name, true in cases.items():
            scans = Spectra(GRID, measure(GRID, true, INSTRUMENT, rng), [f"x{i}" for i in range(N_SCANS)])
            rates.setdefault(name, []).append(float(quantify(scans, library).interferent.mean()))
    return {name: float(np.mean(values)) for name, values in rates.items()}


@pytest.mark.slow
def test_false_alarms_and_power_with_learned_libraries() -> None:
    rates = _flag_rates()
    # 360 clean scans: a 5 % rate has a binomial sd of 1.1 %, so 9 % is more than three sd above it.
    assert rates["clean"] <= 0.09, rates
    # Measured when written: clean 1.7 %, band 0.5 % 47.5 %, band 1 % 81 %, band 2 % 99 %, shift 93 %,
    # turbidity 78 % (before the band scan: clean 3.6 %, band 0.5 % about 40 %, 1 % 73 %, 2 % 98 %,
    # shift 94 %, turbidity 74 %). A test that knew each band's exact shape and place would catch
    # 81 % of the 0.5 % bands at alpha = 0.05 but only 54 % at the z of 3.0 that scanning ~100 band
    # positions costs: much of a band like a library spectrum is absorbed by the fit (docs/screening.md).
    assert rates["band 0.5 %"] >= 0.42, rates
    assert rates["band 1 %"] >= 0.75, rates
    assert rates["band 2 %"] >= 0.95, rates
    assert rates["shift 0.5 nm"] >= 0.85, rates
    assert rates["turbidity"] >= 0.7, rates
