"""Interferent check with suspects: the right candidate is named, with an amount within its uncertainty.

The spectra are invented (absolve.simulate), so the truth is known; no check value comes from the demo data.
"""

from __future__ import annotations

import numpy as np
import pytest

from absolve.calibration import calibrate
from absolve.checking import check_scans
from absolve.errors import AbsolveError
from absolve.library import library_from_absorptivities
from absolve.simulate import Band, Instrument, band_spectrum, measure, random_absorptivities
from absolve.spectra import Spectra

GRID = np.arange(400.0, 701.0)
INSTRUMENT = Instrument(stray_light=0.0, baseline_offset_sd=0.002)


@pytest.fixture(scope="module")
def setting():  # type: ignore[no-untyped-def]
    rng = np.random.default_rng(11)
    truth = random_absorptivities(GRID, 3, rng) * 0.08
    levels = np.array([2.0, 5.0, 8.0, 12.0, 16.0, 22.0])
    conc = np.array([np.eye(3)[k] * level for k in range(3) for level in levels])
    standards = Spectra(GRID, measure(GRID, conc @ truth, INSTRUMENT, rng), [f"s{i}" for i in range(len(conc))])
    library = calibrate(standards, conc, ["a", "b", "c"], "mg/L")
    foreign = band_spectrum(GRID, [Band(610.0, 14.0, 0.02)])  # absorbance per unit amount
    decoy = band_spectrum(GRID, [Band(450.0, 20.0, 0.02)])
    mixtures = rng.uniform(2.0, 10.0, (40, 3))
    amounts = np.where(np.arange(40) < 20, 1.5, 0.0)  # half the scans carry the foreign absorber
    measured = measure(GRID, mixtures @ truth + amounts[:, None] * foreign, INSTRUMENT, rng)
    scans = Spectra(GRID, measured, [f"x{i}" for i in range(40)])
    suspects = Spectra(GRID, np.vstack([decoy, foreign]), ["decoy", "foreign"])
    return library, scans, suspects, amounts


def test_the_suspect_that_is_present_is_named_with_its_amount(setting) -> None:  # type: ignore[no-untyped-def]
    library, scans, suspects, amounts = setting
    result = check_scans(scans, library, suspects=suspects)
    report = result.suspects
    assert report is not None
    carrying = amounts > 0
    best = np.array(report.best_names, dtype=object)
    assert np.mean(best[carrying] == "foreign") >= 0.9
    # Clean scans: a suspect named no more often than a small false-alarm rate allows.
    assert np.mean(best[~carrying] != None) <= 0.2  # noqa: E711
    found = report.amount[carrying, 1]
    z = (found - 1.5) / report.amount_se[carrying, 1]
    assert np.abs(np.mean(z)) < 1.0 and np.std(z) < 2.0


def test_rows_carry_verdicts_and_diagnoses(setting) -> None:  # type: ignore[no-untyped-def]
    library, scans, _, amounts = setting
    result = check_scans(scans, library)
    rows = result.rows()
    flagged = np.array([row["interferent"] for row in rows])
    assert flagged[amounts > 0].mean() >= 0.9
    assert flagged[amounts == 0].mean() <= 0.2
    window = [row["window_nm"] for row, carries in zip(rows, amounts > 0) if carries and row["window_nm"]]
    # The unexplained band sits near 610 nm.
    assert np.median([0.5 * (low + high) for low, high in window]) == pytest.approx(610.0, abs=15.0)


def test_suspects_need_a_noise_model(setting) -> None:  # type: ignore[no-untyped-def]
    library, scans, suspects, _ = setting
    plain = library_from_absorptivities(library.wavelengths, library.absorptivity, library.names, "mg/L")
    with pytest.raises(AbsolveError, match="noise model"):
        check_scans(scans, plain, suspects=suspects)
