"""Spectra: absorbance arithmetic, validation, immutability, restriction, interpolation, stacking."""

from __future__ import annotations

import warnings

import numpy as np
import pytest
from hypothesis import given
from hypothesis import strategies as st
from hypothesis.extra import numpy as hnp

from absolve.errors import AbsolveError
from absolve.spectra import Spectra, interpolate_rows, stack_spectra


@pytest.mark.parametrize(
    ("quantity", "values", "expected"),
    [
        # A = -log10(T): T = 100 % gives 0, 10 % gives 1, 1 % gives 2 (common practice, no source).
        ("percent-transmittance", [100.0, 10.0, 1.0, 0.1], [0.0, 1.0, 2.0, 3.0]),
        ("transmittance", [1.0, 0.1, 0.01, 0.001], [0.0, 1.0, 2.0, 3.0]),
        # Half the light through: A = log10(2) = 0.30103 (common practice, no source).
        ("transmittance", [0.5, 0.5, 0.5, 0.5], [np.log10(2.0)] * 4),
    ],
)
def test_transmittance_to_absorbance(quantity: str, values: list[float], expected: list[float]) -> None:
    scans = Spectra([400, 410, 420, 430], [values], ["s"], quantity=quantity)  # type: ignore[arg-type]
    absorbance = scans.to_absorbance()
    assert absorbance.quantity == "absorbance"
    np.testing.assert_allclose(absorbance.values[0], expected, rtol=0, atol=1e-12)
    assert absorbance.usable.all()


@pytest.mark.parametrize("quantity", ["transmittance", "percent-transmittance"])
def test_zero_or_negative_transmittance_is_unusable_never_infinite(quantity: str) -> None:
    scans = Spectra([400, 410, 420, 430], [[0.0, -0.2, 0.5, np.nan]], ["s"], quantity=quantity)  # type: ignore[arg-type]
    with warnings.catch_warnings():
        warnings.simplefilter("error")  # no divide-by-zero or log warnings either
        absorbance = scans.to_absorbance()
    assert not np.any(np.isinf(absorbance.values))
    assert np.isnan(absorbance.values[0, [0, 1, 3]]).all()
    assert absorbance.usable.tolist() == [[False, False, True, False]]
    assert absorbance.count_saturated() == 3
    expected = -np.log10(0.5 if quantity == "transmittance" else 0.005)
    assert absorbance.values[0, 2] == pytest.approx(expected, abs=1e-12)


def test_absorbance_is_returned_unchanged() -> None:
    scans = Spectra([400, 410], [[0.2, -0.01]], ["s"])
    assert scans.to_absorbance() is scans
    assert scans.usable.all()


def test_one_dimensional_values_are_a_batch_of_one() -> None:
    scans = Spectra([400, 410, 420], [0.1, 0.2, 0.3], ["only"])
    assert scans.values.shape == (1, 3)
    assert (scans.n_scans, scans.n_wavelengths, len(scans)) == (1, 3, 1)
    assert "1 scans x 3 wavelengths, 400-420 nm" in repr(scans)


def test_spectra_copy_the_caller_arrays_and_are_read_only() -> None:
    grid = np.array([400.0, 410.0, 420.0])
    values = np.array([[0.1, 0.2, 0.3]])
    scans = Spectra(grid, values, ["s"])
    grid[0] = 0.0
    values[0, 0] = 99.0
    assert scans.wavelengths[0] == 400.0
    assert scans.values[0, 0] == 0.1
    with pytest.raises(ValueError):
        scans.values[0, 0] = 1.0
    with pytest.raises(ValueError):
        scans.wavelengths[0] = 1.0
    with pytest.raises(AttributeError):
        scans.names = ("other",)  # type: ignore[misc]


@pytest.mark.parametrize(
    ("grid", "values", "names", "message"),
    [
        ([400, 410, 420], [[0.1, 0.2]], ["s"], r"values of shape \(1, 2\) do not match 3 wavelengths"),
        ([400, 400, 420], [[0.1, 0.2, 0.3]], ["s"], "not strictly increasing"),
        ([420, 410, 400], [[0.1, 0.2, 0.3]], ["s"], "not strictly increasing"),
        ([400, np.nan, 420], [[0.1, 0.2, 0.3]], ["s"], "wavelength is not a finite number"),
        ([400, 410, 420], [[0.1, np.inf, 0.3]], ["s"], "infinite value"),
        ([400, 410], [[0.1, 0.2], [0.3, 0.4]], ["s", "s"], "duplicate scan name 's'"),
        ([400, 410], [[0.1, 0.2], [0.3, 0.4]], ["s"], "1 names for 2 scans"),
        ([], [[]], ["s"], "no scans or no wavelengths"),
    ],
)
def test_invalid_spectra_are_refused_naming_the_source_once(grid: list, values: list, names: list, message: str) -> None:
    with pytest.raises(AbsolveError, match=message) as caught:
        Spectra(grid, values, names, source="bath.csv")
    assert caught.value.file == "bath.csv"
    assert str(caught.value).count("bath.csv") == 1


def test_unknown_quantity_is_refused() -> None:
    with pytest.raises(AbsolveError, match="unknown quantity 'absorbtion' — use one of absorbance"):
        Spectra([400, 410], [[0.1, 0.2]], ["s"], quantity="absorbtion")  # type: ignore[arg-type]


def test_restrict_keeps_the_closed_interval() -> None:
    scans = Spectra(np.arange(400.0, 451.0, 10.0), [np.arange(6.0)], ["s"])
    kept = scans.restrict(410, 430)
    assert kept.wavelengths.tolist() == [410.0, 420.0, 430.0]
    assert kept.values.tolist() == [[1.0, 2.0, 3.0]]
    assert scans.restrict(None, 415).wavelengths.tolist() == [400.0, 410.0]
    assert scans.restrict(445, None).wavelengths.tolist() == [450.0]
    with pytest.raises(AbsolveError, match=r"no wavelength between 600 and 700 nm \(the scans cover 400-450 nm\)"):
        scans.restrict(600, 700)


def test_select_reorders_and_refuses_unknown_names() -> None:
    scans = Spectra([400, 410], [[1, 1], [2, 2], [3, 3]], ["a", "b", "c"], source="x.csv")
    chosen = scans.select(["c", "a"])
    assert chosen.names == ("c", "a")
    assert chosen.values[:, 0].tolist() == [3.0, 1.0]
    with pytest.raises(AbsolveError, match="no scan named 'd'"):
        scans.select(["a", "d"])


def test_interpolation_is_exact_for_straight_lines_and_matches_numpy() -> None:
    grid = np.array([400.0, 403.0, 410.0, 425.0])
    values = np.vstack([2.0 + 0.01 * grid, np.sin(grid / 7.0)])
    target = np.linspace(400.0, 425.0, 17)
    result = Spectra(grid, values, ["line", "wave"]).interpolate(target)
    np.testing.assert_allclose(result.values[0], 2.0 + 0.01 * target, rtol=0, atol=1e-12)
    # numpy.interp is the reference for piecewise-linear interpolation.
    np.testing.assert_allclose(result.values[1], np.interp(target, grid, values[1]), rtol=0, atol=1e-12)
    np.testing.assert_array_equal(result.wavelengths, target)


def test_interpolation_onto_the_same_grid_returns_the_scans() -> None:
    scans = Spectra([400, 410, 420], [[1, 2, 3]], ["s"])
    assert scans.interpolate([400.0, 410.0, 420.0]) is scans


@pytest.mark.parametrize("target", [[395.0, 410.0], [400.0, 421.0], []])
def test_interpolation_never_extrapolates(target: list[float]) -> None:
    with pytest.raises(AbsolveError, match="cover 400-420 nm|no wavelengths to interpolate onto"):
        Spectra([400, 410, 420], [[1, 2, 3]], ["s"]).interpolate(target)


def test_unusable_points_spread_only_to_the_targets_that_depend_on_them() -> None:
    scans = Spectra([400, 410, 420, 430], [[1.0, np.nan, 3.0, 4.0]], ["s"])
    result = scans.interpolate([400.0, 405.0, 415.0, 420.0, 425.0, 430.0])
    # 405 and 415 lean on the unusable 410; 400, 420, 425 and 430 do not.
    np.testing.assert_allclose(result.values[0], [1.0, np.nan, np.nan, 3.0, 3.5, 4.0], rtol=0, atol=1e-12)
    assert result.usable.tolist() == [[True, False, False, True, True, True]]


@given(
    steps=hnp.arrays(np.float64, st.integers(2, 20), elements=st.floats(0.1, 20.0)),
    data=st.data(),
)
def test_interpolate_rows_agrees_with_numpy_interp(steps: np.ndarray, data: st.DataObject) -> None:
    x = 200.0 + np.concatenate([[0.0], np.cumsum(steps)])
    rows = data.draw(hnp.arrays(np.float64, (3, x.size), elements=st.floats(-5.0, 5.0)))
    target = np.sort(data.draw(hnp.arrays(np.float64, st.integers(1, 30), elements=st.floats(float(x[0]), float(x[-1])))))
    result = interpolate_rows(x, rows, target)
    for row in range(3):
        # numpy.interp is the reference for piecewise-linear interpolation.
        np.testing.assert_allclose(result[row], np.interp(target, x, rows[row]), rtol=1e-12, atol=1e-12)


def test_subtract_blank_uses_the_mean_blank_on_the_scan_grid() -> None:
    scans = Spectra([400, 410, 420], [[0.5, 0.6, 0.7], [1.0, 1.0, 1.0]], ["a", "b"])
    # Two blank scans in %T on a finer grid: 100 % T and 10 % T average to A = 0.5 everywhere.
    blank = Spectra(np.arange(400.0, 421.0, 5.0), [[100.0] * 5, [10.0] * 5], ["b1", "b2"], quantity="percent-transmittance")
    corrected = scans.subtract_blank(blank)
    np.testing.assert_allclose(corrected.values, [[0.0, 0.1, 0.2], [0.5, 0.5, 0.5]], rtol=0, atol=1e-12)
    assert corrected.names == ("a", "b")


def test_stack_spectra_joins_on_the_common_part_of_the_first_grid() -> None:
    first = Spectra(np.arange(400.0, 441.0, 10.0), [[0.1, 0.2, 0.3, 0.4, 0.5]], ["a"], source="a.csv")
    second = Spectra(np.arange(405.0, 436.0, 5.0), [np.linspace(1.0, 7.0, 7)], ["b"], source="b.csv")
    third = Spectra([400.0, 450.0], [[100.0, 10.0]], ["c"], quantity="percent-transmittance")
    stacked = stack_spectra([first, second, third])
    assert stacked.wavelengths.tolist() == [410.0, 420.0, 430.0]
    assert stacked.names == ("a", "b", "c")
    assert stacked.quantity == "absorbance"
    np.testing.assert_allclose(stacked.values[0], [0.2, 0.3, 0.4], atol=1e-12)
    np.testing.assert_allclose(stacked.values[1], [2.0, 4.0, 6.0], atol=1e-12)
    np.testing.assert_allclose(stacked.values[2], [0.2, 0.4, 0.6], atol=1e-12)  # A runs linearly 0 -> 1 in %T
    assert stacked.source == "a.csv, b.csv, scans"


def test_stack_spectra_refuses_scans_without_a_common_wavelength() -> None:
    first = Spectra([400.0, 410.0], [[0.1, 0.2]], ["a"], source="a.csv")
    far = Spectra([500.0, 510.0], [[0.1, 0.2]], ["b"], source="b.csv")
    with pytest.raises(AbsolveError, match=r"share no wavelength \(a.csv 400-410 nm; b.csv 500-510 nm\)"):
        stack_spectra([first, far])
    between = Spectra([401.0, 409.0], [[0.1, 0.2]], ["b"], source="b.csv")
    with pytest.raises(AbsolveError, match="share no wavelength"):
        stack_spectra([first, between])


def test_stack_spectra_refuses_repeated_names_and_nothing() -> None:
    one = Spectra([400.0, 410.0], [[0.1, 0.2]], ["same"], source="a.csv")
    two = Spectra([400.0, 410.0], [[0.3, 0.4]], ["same"], source="b.csv")
    with pytest.raises(AbsolveError, match="duplicate scan name 'same'"):
        stack_spectra([one, two])
    with pytest.raises(AbsolveError, match="no scans given"):
        stack_spectra([])
