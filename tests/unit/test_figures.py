"""Figures of a quantification: what each draws is checked against the result it was drawn from."""

from __future__ import annotations

import re
import subprocess
import sys
import xml.etree.ElementTree as ET
from dataclasses import replace

import numpy as np
import pytest

from absolve.library import ComponentCalibration, NoiseModel, ReferenceLibrary
from absolve.quantify import MixtureResult, quantify
from absolve.report import figures
from absolve.simulate import Band, Instrument, band_spectrum, measure, random_absorptivities
from absolve.spectra import Spectra

NOISE = NoiseModel(floor=0.002, proportional=0.005, correlation_length_nm=0.0)
NAMES = ("clean", "foreign-band", "clean-2", "clean-3", "strong")


@pytest.fixture(scope="module")
def fitted() -> tuple[MixtureResult, ReferenceLibrary]:
    """Five simulated scans of two invented dyes: one with a foreign band, one saturated past the ceiling."""
    rng = np.random.default_rng(11)
    grid = np.arange(400.0, 601.0, 2.0)
    k = random_absorptivities(grid, 2, rng)
    k = k / k.max(axis=1, keepdims=True)
    components = tuple(ComponentCalibration(name, concentration_range=(0.1, 1.5)) for name in ("dye-a", "dye-b"))
    library = ReferenceLibrary(grid, k, np.zeros_like(k), "mg/L", components, noise=NOISE)
    true = np.array([[0.5, 0.4], [0.3, 0.6], [0.8, 0.2], [0.4, 0.4], [0.9, 0.9]]) @ k
    true[1] += band_spectrum(grid, [Band(560.0, 8.0, 0.08, 0.0)])
    true[4] *= 3.0
    instrument = Instrument(noise_floor=0.002, noise_proportional=0.005, correlation_length_nm=0.0, stray_light=0.0)
    spectra = Spectra(grid, measure(grid, true, instrument, rng), list(NAMES))
    return quantify(spectra, library, baseline="offset", path_length=1.0), library


def _line(ax, label: str) -> np.ndarray:  # type: ignore[no-untyped-def]
    matches = [line for line in ax.get_lines() if line.get_label() == label]
    assert len(matches) == 1, [line.get_label() for line in ax.get_lines()]
    return np.asarray(matches[0].get_ydata(), dtype=float)


def test_the_data_is_as_built(fitted: tuple[MixtureResult, ReferenceLibrary]) -> None:
    result, _ = fitted
    # The figure tests below rely on one flagged scan with a diagnosis and one with unused points.
    assert result.screening.diagnoses[1] is not None and result.screening.diagnoses[1].kind == "foreign-band"
    assert (~result.used[4]).any() and result.used[0].all()


def test_library_plot_draws_each_absorptivity_with_a_two_standard_error_band() -> None:
    grid = np.linspace(400.0, 500.0, 11)
    k = np.vstack([np.linspace(0.1, 1.0, 11), np.linspace(1.0, 0.1, 11)])
    se = np.full_like(k, 0.01)
    library = ReferenceLibrary(grid, k, se, "mmol/L", (ComponentCalibration("a"), ComponentCalibration("b")))
    ax = figures.plot_library(library)
    np.testing.assert_allclose(_line(ax, "a"), k[0], rtol=0, atol=0)
    band = ax.collections[0].get_paths()[0].vertices
    # The band spans k - 2 se to k + 2 se (vertices trace one edge out and the other back).
    assert band[:, 1].max() == pytest.approx(k[0].max() + 0.02, abs=1e-12)
    assert band[:, 1].min() == pytest.approx(k[0].min() - 0.02, abs=1e-12)
    assert ax.get_xlabel() == "wavelength (nm)" and "mmol/L" in ax.get_ylabel()
    error_ax = figures.plot_library_error(library)
    np.testing.assert_allclose(_line(error_ax, "b"), 2 * se[1])


def test_plot_functions_draw_on_the_axes_they_are_given(fitted: tuple[MixtureResult, ReferenceLibrary]) -> None:
    from matplotlib.figure import Figure

    result, library = fitted
    axes = Figure().subplots(2, 3).ravel()
    calls = [
        lambda ax: figures.plot_library(library, ax),
        lambda ax: figures.plot_library_error(library, ax),
        lambda ax: figures.plot_scan_fit(result, library, 0, ax),
        lambda ax: figures.plot_scan_residual(result, library, 0, ax),
        lambda ax: figures.plot_overview(result, ax),
        lambda ax: figures.plot_residual_sizes(result, library, ax),
    ]
    for ax, call in zip(axes, calls):
        assert call(ax) is ax
    assert [ax.has_data() for ax in axes] == [True, False, True, True, True, True]
    # This library has no standard errors: the error panel says so instead of staying blank.
    assert "no standard errors" in axes[1].texts[0].get_text()


def test_fit_plot_decomposes_the_fitted_absorbance_into_components_and_baseline(fitted: tuple[MixtureResult, ReferenceLibrary]) -> None:
    result, library = fitted
    scan = 0
    ax = figures.plot_scan_fit(result, library, scan)
    measured = _line(ax, "measured")
    fit = _line(ax, "fitted")
    np.testing.assert_allclose(measured, result.fitted[scan] + result.residuals[scan])
    np.testing.assert_allclose(fit, result.fitted[scan])
    # Each component's line is concentration x absorptivity x path (Beer-Lambert law), and with the
    # baseline they add up to the fit.
    for j, name in enumerate(result.components):
        np.testing.assert_allclose(_line(ax, name), result.concentration[scan, j] * library.absorptivity[j], rtol=1e-12)
    total = sum(_line(ax, name) for name in result.components) + _line(ax, "baseline")
    np.testing.assert_allclose(total, fit, atol=1e-12)
    np.testing.assert_allclose(_line(ax, "baseline"), result.baseline[scan, 0], atol=1e-12)
    assert ax.get_ylabel() == "absorbance" and ax.get_xlabel() == "wavelength (nm)"
    assert [line.get_color() for line in ax.get_lines() if line.get_label() in result.components] == [
        figures.OKABE_ITO["blue"], figures.OKABE_ITO["orange"]
    ]


def test_fit_plot_shades_the_points_the_fit_did_not_use(fitted: tuple[MixtureResult, ReferenceLibrary]) -> None:
    result, library = fitted
    scan = 4
    ax = figures.plot_scan_fit(result, library, scan)
    grid = result.wavelengths
    spans = [patch.get_x() for patch in ax.patches if np.isfinite(patch.get_x())]
    assert spans, "no shaded span"
    unused = grid[~result.used[scan]]
    # Every unused point lies inside a shaded span, no used point does.
    covered = np.zeros(grid.size, dtype=bool)
    for patch in ax.patches:
        low, width = patch.get_x(), patch.get_width()
        if np.isfinite(low):
            covered |= (grid >= low) & (grid <= low + width)
    assert np.array_equal(covered, ~result.used[scan]), unused


def test_residual_band_is_two_noise_model_standard_deviations_at_the_fitted_absorbance(
    fitted: tuple[MixtureResult, ReferenceLibrary],
) -> None:
    result, library = fitted
    scan = 2
    ax = figures.plot_scan_residual(result, library, scan)
    np.testing.assert_allclose(_line(ax, "residual"), result.residuals[scan])
    upper = ax.collections[0].get_paths()[0].vertices[:, 1].max()
    # sd(A) = sqrt(floor^2 + (proportional A)^2), the library's noise model; the library has no
    # absorptivity errors, so that is the whole band.
    expected = 2 * np.sqrt(NOISE.floor**2 + (NOISE.proportional * result.fitted[scan]) ** 2)
    assert upper == pytest.approx(expected.max(), rel=1e-12)
    assert "absorbance" in ax.get_ylabel() and ax.get_xlabel() == "wavelength (nm)"


def test_residual_plot_shades_the_diagnosed_window_and_shows_the_message(fitted: tuple[MixtureResult, ReferenceLibrary]) -> None:
    result, library = fitted
    diagnosis = result.screening.diagnoses[1]
    assert diagnosis is not None
    ax = figures.plot_scan_residual(result, library, 1)
    shaded = [p for p in ax.patches if p.get_label().startswith("flagged")]
    assert len(shaded) == 1
    assert shaded[0].get_x() == pytest.approx(diagnosis.window_nm[0])
    assert shaded[0].get_x() + shaded[0].get_width() == pytest.approx(diagnosis.window_nm[1])
    assert " ".join(ax.get_title(loc="left").split()) == diagnosis.message
    # The band sits near 560 nm: the shaded window holds it.
    assert diagnosis.window_nm[0] < 560.0 < diagnosis.window_nm[1]


def test_residual_plot_without_noise_model_uses_the_scans_rms(fitted: tuple[MixtureResult, ReferenceLibrary]) -> None:
    result, library = fitted
    bare = replace(library, noise=None)
    ax = figures.plot_scan_residual(result, bare, 0)
    upper = ax.collections[0].get_paths()[0].vertices[:, 1].max()
    assert upper == pytest.approx(2 * result.rms_residual[0], rel=1e-12)


def test_overview_and_residual_sizes_show_every_scan(fitted: tuple[MixtureResult, ReferenceLibrary]) -> None:
    result, library = fitted
    ax = figures.plot_overview(result)
    assert ax.get_ylabel() == "concentration (mg/L)"
    assert [t.get_text() for t in ax.get_xticklabels()] == list(NAMES)
    sizes = figures.plot_residual_sizes(result, library)
    np.testing.assert_allclose(_line(sizes, "rms residual"), result.rms_residual)
    flagged = _line(sizes, "flagged by the\ninterferent screen")
    np.testing.assert_allclose(flagged, result.rms_residual[result.interferent])


def test_overviews_drawn_from_the_batch_numbers_alone_equal_those_drawn_from_the_result(fitted: tuple[MixtureResult, ReferenceLibrary]) -> None:
    from absolve.report.batch import BatchNumbers, expected_rms_residual

    result, library = fitted
    expected = expected_rms_residual(result, library)
    numbers = BatchNumbers.of(result, expected)
    assert numbers.n_scans == result.n_scans == len(NAMES)
    with figures._svg_settings():
        pairs = [
            (figures.plot_overview(result), figures.plot_overview(numbers)),
            (figures.plot_residual_sizes(result, library), figures.plot_residual_sizes(numbers)),
        ]
        for from_result, from_numbers in pairs:
            assert figures.figure_svg(from_numbers.figure, "n") == figures.figure_svg(from_result.figure, "n")
    # The grey marks are the numbers' own expected sizes: no library or spectra needed.
    np.testing.assert_allclose(_line(pairs[1][1], "expected from noise"), expected)  # type: ignore[arg-type]
    assert figures.draw_figure("overview", "overview", library, numbers, None)[0].startswith("<svg")
    with pytest.raises(ValueError, match="cannot draw a 'scan' figure from BatchNumbers"):
        figures.draw_figure("scan-00001", "scan", library, numbers, None)


def test_big_batches_are_drawn_as_an_embedded_image_and_stay_small(fitted: tuple[MixtureResult, ReferenceLibrary]) -> None:
    result, library = fitted
    n = 2000
    rows = np.arange(n) % result.n_scans
    big = replace(
        result,
        scan_names=tuple(f"s{i}" for i in range(n)),
        concentration=result.concentration[rows],
        expanded_uncertainty=result.expanded_uncertainty[rows],
        rms_residual=result.rms_residual[rows],
        fitted=result.fitted[rows],
        used=result.used[rows],
        interferent=result.interferent[rows],
    )
    for ax in (figures.plot_overview(big), figures.plot_residual_sizes(big, library)):
        svg = figures.figure_svg(ax.figure, "big")
        assert svg.count("<image") == 1
        # 2,000 vector markers per series would take well over 100 kB each.
        assert len(svg) < 120_000
    small = figures.figure_svg(figures.plot_overview(result).figure, "small")
    assert "<image" not in small


def test_user_text_with_dollar_signs_is_drawn_literally(fitted: tuple[MixtureResult, ReferenceLibrary]) -> None:
    result, library = fitted
    odd = replace(result, scan_names=(r"$\nosuchcommand$", *result.scan_names[1:]))
    figure = figures.scan_figure(odd, library, 0)
    svg = figures.figure_svg(figure, "odd")  # would raise if '$...$' were parsed as math
    assert svg.startswith("<svg")
    assert figure.axes[0].get_title(loc="left") == r"\$\nosuchcommand\$"


def test_inline_svg_is_deterministic_namespaced_and_well_formed(fitted: tuple[MixtureResult, ReferenceLibrary]) -> None:
    result, library = fitted
    first = figures.figure_svg(figures.scan_figure(result, library, 1), "f1")
    again = figures.figure_svg(figures.scan_figure(result, library, 1), "f1")
    other = figures.figure_svg(figures.scan_figure(result, library, 0), "f2")
    assert first == again
    root = ET.fromstring(first)
    assert root.tag == "{http://www.w3.org/2000/svg}svg"
    ids_first = set(re.findall(r'\bid="([^"]+)"', first))
    ids_other = set(re.findall(r'\bid="([^"]+)"', other))
    assert ids_first and all(i.startswith("f1-") for i in ids_first) and not ids_first & ids_other
    # Every reference points at an id of the same figure.
    references = set(re.findall(r'href="#([^"]+)"', first)) | set(re.findall(r"url\(#([^)]+)\)", first))
    assert references and references <= ids_first
    assert "<!--" not in first and "xlink:" not in first and "<metadata" not in first
    assert re.findall(r"https?://[^\"]+", first) == ["http://www.w3.org/2000/svg"]


def test_figure_files_are_png_or_svg(fitted: tuple[MixtureResult, ReferenceLibrary]) -> None:
    result, library = fitted
    figure = figures.scan_figure(result, library, 0)
    # PNG signature (ISO/IEC 15948, section 5.2).
    assert figures.figure_bytes(figure, "png").startswith(b"\x89PNG\r\n\x1a\n")
    svg = figures.figure_bytes(figure, "svg")
    assert ET.fromstring(svg).tag == "{http://www.w3.org/2000/svg}svg"


def test_detail_scans_are_the_first_ones_then_the_flagged_ones_strongest_first(fitted: tuple[MixtureResult, ReferenceLibrary]) -> None:
    result, _ = fitted
    first, flagged = figures.detail_scans(result, 1)
    assert first == [0]
    # Flagged: scan 1 (interferent, p ~ 0) before scan 4 (points excluded, not screened as interferent).
    assert flagged == [1]
    first, flagged = figures.detail_scans(result, 2)
    assert first == [0, 1] and flagged == [4]
    assert figures.detail_scans(result, 0) == ([], [])


def test_render_figures_places_each_figure_and_reports_progress(fitted: tuple[MixtureResult, ReferenceLibrary]) -> None:
    result, library = fitted
    calls: list[tuple[int, int]] = []
    rendered = figures.render_figures(result, library, detail=2, file_format="png", progress=lambda d, t: calls.append((d, t)))
    assert [f.place for f in rendered] == ["library", "overview", "residual-sizes", "scan", "scan", "scan"]
    assert [f.scan for f in rendered if f.place == "scan"] == [0, 1, 4]
    assert len({f.key for f in rendered}) == len(rendered)
    assert rendered[-1].key == "scan-00005-strong"
    assert all(f.file is not None and f.file.startswith(b"\x89PNG") for f in rendered)
    assert calls == [(k, 6) for k in range(1, 7)]
    message = result.screening.diagnoses[1].message  # type: ignore[union-attr]
    assert message in rendered[4].caption


def test_matplotlib_stays_out_of_the_core_and_pyplot_out_of_everything() -> None:
    code = (
        "import sys\n"
        "import absolve.quantify, absolve.calibration, absolve.workflow, absolve.report.html, absolve.report.figures\n"
        "assert 'matplotlib' not in sys.modules, 'matplotlib imported without drawing'\n"
        "from absolve.library import ReferenceLibrary, ComponentCalibration\n"
        "import numpy as np\n"
        "lib = ReferenceLibrary(np.arange(3.0), np.ones((1, 3)), np.zeros((1, 3)), 'mg/L', (ComponentCalibration('a'),))\n"
        "absolve.report.figures.figure_svg(absolve.report.figures.library_figure(lib), 'x')\n"
        "assert 'matplotlib' in sys.modules and 'matplotlib.pyplot' not in sys.modules, 'pyplot imported'\n"
    )
    done = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, timeout=120)
    assert done.returncode == 0, done.stderr
