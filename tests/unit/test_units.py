"""Concentration units, molar <-> mass conversion and specific absorbance."""

from __future__ import annotations

import pytest
from hypothesis import given
from hypothesis import strategies as st

from absolve.errors import AbsolveError
from absolve.units import UNITS, check_unit, conversion_factor, convert, specific_to_molar_absorptivity

# Potassium dichromate, K2Cr2O7 (from memory: 294.18 g/mol).
DICHROMATE_MOLAR_MASS = 294.18
# Control of absorbance, European Pharmacopoeia 2.2.25 (from memory): 57.0-63.0 mg/L K2Cr2O7 in
# 0.005 M sulfuric acid; specific absorbance A(1 %, 1 cm) at each wavelength in nm.
DICHROMATE_SPECIFIC_ABSORBANCE = {235: 124.5, 257: 144.5, 313: 48.6, 350: 107.3}


@pytest.mark.parametrize(
    ("text", "canonical"),
    [
        ("mg/L", "mg/L"),
        ("mg/l", "mg/L"),
        (" MG/L ", "mg/L"),
        ("mol/L", "mol/L"),
        ("M", "mol/L"),
        ("mM", "mmol/L"),
        ("uM", "umol/L"),
        ("µmol/L", "umol/L"),
        ("µg/L", "ug/L"),
        # Dilute aqueous solutions: 1 ppm = 1 mg/L, 1 ppb = 1 ug/L (common practice, no source).
        ("ppm", "mg/L"),
        ("ppb", "ug/L"),
    ],
)
def test_check_unit_accepts_spellings(text: str, canonical: str) -> None:
    assert check_unit(text) == canonical


@pytest.mark.parametrize("text", ["", "mg", "mg/kg", "percent", "mol/m3", "nM"])
def test_check_unit_refuses_unknown_units_naming_the_parameter(text: str) -> None:
    with pytest.raises(AbsolveError, match=r"the --unit .* is not a known concentration unit — use one of mol/L"):
        check_unit(text, parameter="--unit")


@pytest.mark.parametrize(
    ("source", "target", "molar_mass", "factor"),
    [
        # SI prefixes (common practice, no source).
        ("mg/L", "ug/L", None, 1e3),
        ("g/L", "mg/L", None, 1e3),
        ("ug/L", "mg/L", None, 1e-3),
        ("mol/L", "umol/L", None, 1e6),
        ("mmol/L", "mol/L", None, 1e-3),
        ("mg/L", "mg/L", None, 1.0),
        # Mass concentration = amount concentration x molar mass (common practice, no source):
        # 1 mmol/L of K2Cr2O7 is 294.18 mg/L.
        ("mmol/L", "mg/L", DICHROMATE_MOLAR_MASS, DICHROMATE_MOLAR_MASS),
        ("mol/L", "g/L", DICHROMATE_MOLAR_MASS, DICHROMATE_MOLAR_MASS),
        ("umol/L", "ug/L", DICHROMATE_MOLAR_MASS, DICHROMATE_MOLAR_MASS),
        ("mg/L", "mmol/L", DICHROMATE_MOLAR_MASS, 1.0 / DICHROMATE_MOLAR_MASS),
        ("mg/L", "umol/L", DICHROMATE_MOLAR_MASS, 1e3 / DICHROMATE_MOLAR_MASS),
        ("g/L", "mol/L", 58.44, 1.0 / 58.44),
    ],
)
def test_conversion_factors(source: str, target: str, molar_mass: float | None, factor: float) -> None:
    assert conversion_factor(source, target, molar_mass) == pytest.approx(factor, rel=1e-12)


def test_convert_scales_one_value() -> None:
    # 60.0 mg/L K2Cr2O7 is 0.20396 mmol/L (60.0 / 294.18).
    assert convert(60.0, "mg/L", "mmol/L", DICHROMATE_MOLAR_MASS) == pytest.approx(60.0 / 294.18, rel=1e-12)
    assert convert(2.5, "mg/L", "ug/L") == pytest.approx(2500.0, rel=1e-12)


@pytest.mark.parametrize("molar_mass", [None, 0.0, -5.0, float("nan")])
def test_molar_to_mass_needs_a_positive_molar_mass(molar_mass: float | None) -> None:
    with pytest.raises(AbsolveError, match="needs the molar mass"):
        conversion_factor("mmol/L", "mg/L", molar_mass)


def test_same_kind_conversion_ignores_the_molar_mass() -> None:
    assert conversion_factor("mg/L", "g/L", molar_mass=None) == pytest.approx(1e-3, rel=1e-12)


def test_unknown_unit_in_conversion_is_refused() -> None:
    with pytest.raises(AbsolveError, match="not a known concentration unit"):
        conversion_factor("mg/dL", "mg/L")


@given(
    source=st.sampled_from(UNITS),
    target=st.sampled_from(UNITS),
    molar_mass=st.floats(min_value=1.0, max_value=5000.0),
    value=st.floats(min_value=1e-6, max_value=1e6),
)
def test_conversion_there_and_back_is_identity(source: str, target: str, molar_mass: float, value: float) -> None:
    there = convert(value, source, target, molar_mass)
    assert convert(there, target, source, molar_mass) == pytest.approx(value, rel=1e-12)


@pytest.mark.parametrize(("wavelength", "specific"), sorted(DICHROMATE_SPECIFIC_ABSORBANCE.items()))
def test_specific_absorbance_to_molar_absorptivity_on_dichromate(wavelength: int, specific: float) -> None:
    # epsilon = A(1 %, 1 cm) x M / 10: A(1 %, 1 cm) is the absorbance of 10 g/L in 1 cm (common practice, no source).
    epsilon = specific_to_molar_absorptivity(specific, DICHROMATE_MOLAR_MASS)
    assert epsilon == pytest.approx(specific * 29.418, rel=1e-12)
    # The same solution two ways: 60.0 mg/L (the middle of the 57.0-63.0 mg/L control solution, EP 2.2.25,
    # from memory) as molar concentration times epsilon, and as g/100 mL times the specific absorbance.
    molar = convert(60.0, "mg/L", "mol/L", DICHROMATE_MOLAR_MASS)
    by_epsilon = epsilon * molar * 1.0
    by_specific = specific * convert(60.0, "mg/L", "g/L") / 10.0
    assert by_epsilon == pytest.approx(by_specific, rel=1e-12)


def test_dichromate_control_solution_absorbances() -> None:
    # At 60.0 mg/L the control solution reads about 0.75 at 235 nm, 0.87 at 257 nm, 0.29 at 313 nm and
    # 0.64 at 350 nm (A = A(1 %, 1 cm) x 0.0060 g/100 mL; EP 2.2.25 values from memory).
    expected = {235: 0.747, 257: 0.867, 313: 0.2916, 350: 0.6438}
    molar = convert(60.0, "mg/L", "mol/L", DICHROMATE_MOLAR_MASS)
    for wavelength, specific in DICHROMATE_SPECIFIC_ABSORBANCE.items():
        epsilon = specific_to_molar_absorptivity(specific, DICHROMATE_MOLAR_MASS)
        assert epsilon * molar == pytest.approx(expected[wavelength], abs=5e-4)


@pytest.mark.parametrize("molar_mass", [0.0, -294.18, float("nan")])
def test_specific_absorbance_needs_a_positive_molar_mass(molar_mass: float) -> None:
    with pytest.raises(AbsolveError, match="molar mass must be positive"):
        specific_to_molar_absorptivity(124.5, molar_mass)
