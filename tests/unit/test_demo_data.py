"""The invented demo scenario: deterministic files that parse, and that show what the demo is meant to show.

The demo data are invented; these tests check that the files are stable and
well formed and that they carry the features the walkthrough relies on (a
bent top standard, a foreign band, an over-strong sample), never that absolve
computes correct results from them.
"""

from __future__ import annotations

import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest
from scipy.optimize import nnls

from absolve import demo_data
from absolve.demo_data import DEMO_DYES, DEMO_INSTRUMENT, DemoFiles, bundled_root, demo_grid, generate_demo
from absolve.errors import AbsolveError
from absolve.io.tables import read_concentration_table, read_scan_table

REPOSITORY = Path(__file__).resolve().parents[2]


@pytest.fixture(scope="module")
def generated(tmp_path_factory: pytest.TempPathFactory) -> DemoFiles:
    root = tmp_path_factory.mktemp("demo")
    generate_demo(root)
    return DemoFiles.under(root)


def _bytes(files: DemoFiles) -> dict[str, bytes]:
    return {path.name: path.read_bytes() for path in files.all()}


def test_generation_is_byte_identical_on_rerun(generated: DemoFiles, tmp_path: Path) -> None:
    written = generate_demo(tmp_path)
    assert written == list(DemoFiles.under(tmp_path).all())
    assert _bytes(DemoFiles.under(tmp_path)) == _bytes(generated)
    assert all(b"\r" not in content for content in _bytes(generated).values())


def test_another_seed_gives_other_measurements(generated: DemoFiles, tmp_path: Path) -> None:
    generate_demo(tmp_path, seed=7)
    other = DemoFiles.under(tmp_path)
    assert other.standards.read_bytes() != generated.standards.read_bytes()
    # The absorptivities and the truth are not measurements: the seed leaves them alone.
    assert other.absorptivities.read_bytes() == generated.absorptivities.read_bytes()
    assert other.bath_samples_truth.read_bytes() == generated.bath_samples_truth.read_bytes()


def test_committed_files_equal_a_fresh_generation(generated: DemoFiles) -> None:
    committed = DemoFiles.under(REPOSITORY)
    for fresh, kept in zip(generated.all(), committed.all()):
        assert kept.exists(), f"{kept} is missing: run python -m absolve.demo_data"
        assert kept.read_bytes() == fresh.read_bytes(), f"{kept} drifted: run python -m absolve.demo_data"
    total = sum(path.stat().st_size for path in committed.all())
    assert total < 1_000_000


def test_module_entry_point_writes_the_files(tmp_path: Path, generated: DemoFiles) -> None:
    done = subprocess.run(
        [sys.executable, "-m", "absolve.demo_data", "--root", str(tmp_path)], capture_output=True, text=True, timeout=60
    )
    assert done.returncode == 0, done.stderr
    assert _bytes(DemoFiles.under(tmp_path)) == _bytes(generated)


def test_files_parse_with_the_table_readers(generated: DemoFiles) -> None:
    grid = demo_grid()
    standards = read_scan_table(generated.standards)
    concentrations = read_concentration_table(generated.standards_concentrations)
    codes = {dye.code for dye in DEMO_DYES}
    np.testing.assert_array_equal(standards.wavelengths, grid)
    assert standards.n_scans == 3 * 6 + 3 * 2 + 2
    assert set(concentrations["scan"]) == set(standards.names)
    assert set(concentrations["component"]) == codes
    assert (concentrations["path_length_cm"] == 1.0).all()
    mixed = concentrations.groupby("scan").size()
    assert sorted(mixed[mixed > 1].index) == ["mix-01", "mix-02"]
    assert sum(name.endswith("-dup") for name in standards.names) == 6

    assert read_scan_table(generated.blank).n_scans in (1, 2)
    bath = read_scan_table(generated.bath_samples)
    truth = read_concentration_table(generated.bath_samples_truth)
    assert 8 <= bath.n_scans <= 10
    assert set(truth["scan"]) == set(bath.names)
    assert set(truth["component"]) == codes

    absorptivities = read_scan_table(generated.absorptivities)
    assert absorptivities.names == tuple(dye.code for dye in DEMO_DYES)
    np.testing.assert_allclose(
        absorptivities.values, [dye.absorptivity(grid) for dye in DEMO_DYES], rtol=0, atol=5e-9
    )


def test_percent_transmittance_export_matches_the_absorbance_scans(generated: DemoFiles) -> None:
    text = generated.bath_samples_percent_t.read_text()
    assert ";" in text and "," in text.splitlines()[-1]
    percent = read_scan_table(generated.bath_samples_percent_t, decimal=",", quantity="percent-transmittance")
    bath = read_scan_table(generated.bath_samples).select(percent.names)
    # A = -log10(%T / 100), the definition of absorbance; 3 decimals of %T
    # keep the absorbance to about 1e-5 in this range.
    np.testing.assert_allclose(percent.to_absorbance().values, bath.values, rtol=0, atol=1e-4)


def test_dyes_are_plausible_and_overlap() -> None:
    grid = demo_grid()
    codes = [dye.code for dye in DEMO_DYES]
    assert len(set(codes)) == 3
    assert [dye.colour for dye in DEMO_DYES] == ["yellow", "red", "blue"]
    peaks = np.array([dye.absorptivity(grid).max() for dye in DEMO_DYES])
    molar_masses = np.array([dye.molar_mass for dye in DEMO_DYES])
    assert np.all((molar_masses >= 600) & (molar_masses <= 1100))
    # Molar absorptivity of reactive dyes at their maximum: 1e4-1e5 L mol^-1 cm^-1
    # (common practice, no source); per (mg/L x cm) times g/mol times 1000.
    epsilon = peaks * molar_masses * 1000.0
    assert np.all((epsilon > 1e4) & (epsilon < 1e5))
    # Maxima in the order yellow < red < blue, in the visible bands of those hues
    # (common practice, no source).
    maxima = np.array([grid[dye.absorptivity(grid).argmax()] for dye in DEMO_DYES])
    assert 400 <= maxima[0] <= 450 and 490 <= maxima[1] <= 550 and 580 <= maxima[2] <= 640
    # Neighbouring dyes overlap substantially (cosine of the spectra), but the
    # three stay distinguishable.
    unit = np.array([dye.absorptivity(grid) for dye in DEMO_DYES])
    unit /= np.linalg.norm(unit, axis=1, keepdims=True)
    cosine = unit @ unit.T
    assert cosine[0, 1] > 0.2 and cosine[1, 2] > 0.2
    assert np.linalg.cond(unit.T) < 10
    # The blue has two overlapping bands.
    assert len(DEMO_DYES[2].bands) == 2 and abs(DEMO_DYES[2].bands[0].center_nm - DEMO_DYES[2].bands[1].center_nm) < 60
    lowest = peaks * np.array([dye.standard_levels[0] for dye in DEMO_DYES])
    top = peaks * np.array([dye.standard_levels[-1] for dye in DEMO_DYES])
    assert np.all((lowest >= 0.05) & (lowest <= 0.1))
    assert np.all((top >= 1.6) & (top <= 2.0))


def _expected_sd(true_absorbance: float, relative_preparation: float) -> float:
    """Standard deviation of one measured absorbance: noise, cuvette offset, tilt, preparation."""
    instrument = DEMO_INSTRUMENT
    return float(
        np.sqrt(
            instrument.noise_floor**2
            + (instrument.noise_proportional * true_absorbance) ** 2
            + instrument.baseline_offset_sd**2
            + (2.0 * instrument.baseline_slope_sd) ** 2  # at most 2 x 100 nm from the grid centre
            + (relative_preparation * true_absorbance) ** 2
        )
    )


def test_top_standard_is_bent_by_stray_light_and_low_levels_are_linear(generated: DemoFiles) -> None:
    standards = read_scan_table(generated.standards)
    grid = standards.wavelengths
    s = DEMO_INSTRUMENT.stray_light
    for dye in DEMO_DYES:
        absorptivity = dye.absorptivity(grid)
        peak = absorptivity.argmax()
        for level, concentration in enumerate(dye.standard_levels, start=1):
            measured = standards.select([f"{dye.code}-L{level}"]).values[0, peak]
            true = concentration * absorptivity[peak]
            sd = _expected_sd(true, 0.002)
            if level <= 3:
                assert abs(measured - true) < 4 * sd, (dye.code, level)
            if level == len(dye.standard_levels):
                assert measured / true < 0.97, dye.code
                assert true - measured > 4 * sd, dye.code
                # Stray radiation fraction s: A_obs = -log10((T + s) / (1 + s)) (Skoog, Holler and
                # Crouch, Principles of Instrumental Analysis, stray radiation; from memory).
                bent = -np.log10((10.0**-true + s) / (1.0 + s))
                assert abs(measured - bent) < 4 * sd, dye.code


def test_bath_samples_carry_the_features_the_demo_shows(generated: DemoFiles) -> None:
    bath = read_scan_table(generated.bath_samples)
    standards = read_scan_table(generated.standards)
    design = np.array([dye.absorptivity(bath.wavelengths) for dye in DEMO_DYES]).T
    # Reference solver: scipy.optimize.nnls (Lawson and Hanson).
    rms = {}
    for name, scan in zip(bath.names, bath.values):
        coefficients, _ = nnls(design, scan)
        rms[name] = float(np.sqrt(np.mean((scan - design @ coefficients) ** 2)))
    stages = {"start", "20min", "40min", "60min", "exhaust", "rinse"}
    ordinary = [rms[name] for name in bath.names if name.split("-", 2)[2] in stages]
    assert len(ordinary) == 6
    assert rms["bath-07-carryover"] > 5 * max(ordinary)
    assert rms["bath-08-turbid"] > 2 * max(ordinary)
    turbid = bath.select(["bath-08-turbid"]).values[0]
    coefficients, _ = nnls(design, turbid)
    residual = turbid - design @ coefficients
    assert residual[:20].mean() > residual[-20:].mean()  # scatter rises toward short wavelengths
    assert bath.select(["bath-06-strong"]).values.max() > standards.values.max() + 0.1
    truth = read_concentration_table(generated.bath_samples_truth)
    exhausted = truth[truth["scan"] == "bath-05-exhaust"]["concentration"]
    assert exhausted.min() < 0.05 * exhausted.max()


def test_bundled_root_finds_the_files_in_a_checkout() -> None:
    root = bundled_root()
    assert (root / "reference_spectra" / "standards.csv").is_file()
    assert demo_data.demo_files().standards == root / "reference_spectra" / "standards.csv"


def test_bundled_root_prefers_the_installed_copy(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    package = tmp_path / "site" / "absolve"
    for folder in ("reference_spectra", "examples"):
        (package / "_bundled" / folder).mkdir(parents=True)
    monkeypatch.setattr(demo_data, "__file__", str(package / "demo_data.py"))
    assert bundled_root() == package / "_bundled"


def test_bundled_root_without_files_says_how_to_fix(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    package = tmp_path / "src" / "absolve"
    package.mkdir(parents=True)
    monkeypatch.setattr(demo_data, "__file__", str(package / "demo_data.py"))
    with pytest.raises(AbsolveError, match="bundled demo files are missing.*pip install"):
        bundled_root()
