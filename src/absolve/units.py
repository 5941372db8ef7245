"""Concentration units and molar <-> mass conversion.

Absorptivities are stored "per unit concentration per cm" in the library's
unit, so a library in mol/L holds molar absorptivity epsilon in
L mol^-1 cm^-1 and one in mg/L holds absorbance per (mg/L x cm).
"""

from __future__ import annotations

from typing import Literal, get_args

from .errors import AbsolveError

__all__ = ["Unit", "UNITS", "check_unit", "conversion_factor", "convert", "specific_to_molar_absorptivity"]

Unit = Literal["mol/L", "mmol/L", "umol/L", "g/L", "mg/L", "ug/L"]
UNITS: tuple[str, ...] = get_args(Unit)

# Size of each unit in its base: mol/L for molar units, g/L for mass units.
_SCALE: dict[str, tuple[str, float]] = {
    "mol/L": ("molar", 1.0),
    "mmol/L": ("molar", 1e-3),
    "umol/L": ("molar", 1e-6),
    "g/L": ("mass", 1.0),
    "mg/L": ("mass", 1e-3),
    "ug/L": ("mass", 1e-6),
}
_ALIASES = {"m": "mol/L", "mm": "mmol/L", "um": "umol/L", "µmol/l": "umol/L", "µg/l": "ug/L", "mg/l": "mg/L",
            "g/l": "g/L", "ug/l": "ug/L", "mol/l": "mol/L", "mmol/l": "mmol/L", "umol/l": "umol/L",
            "ppm": "mg/L", "ppb": "ug/L"}


def check_unit(unit: str, *, parameter: str = "unit") -> Unit:
    """Return the canonical spelling of ``unit`` or raise a helpful error.

    Examples
    --------
    >>> check_unit("mg/l")
    'mg/L'
    """
    text = str(unit).strip()
    if text in _SCALE:
        return text  # type: ignore[return-value]
    alias = _ALIASES.get(text.lower())
    if alias is not None:
        return alias  # type: ignore[return-value]
    raise AbsolveError(
        f"the {parameter} {unit!r} is not a known concentration unit",
        fix="use one of " + ", ".join(UNITS),
    )


def conversion_factor(source: str, target: str, molar_mass: float | None = None) -> float:
    """Factor f such that a concentration in ``source`` times f is in ``target``.

    Converting between molar and mass units needs ``molar_mass`` in g/mol.

    Examples
    --------
    >>> conversion_factor("mmol/L", "mg/L", molar_mass=294.18)
    294.18
    """
    kind_from, scale_from = _SCALE[check_unit(source)]
    kind_to, scale_to = _SCALE[check_unit(target)]
    factor = scale_from / scale_to
    if kind_from == kind_to:
        return factor
    if molar_mass is None or not molar_mass > 0:
        raise AbsolveError(
            f"converting {source} to {target} needs the molar mass",
            fix="give the component's molar mass in g/mol",
        )
    return factor * molar_mass if kind_from == "molar" else factor / molar_mass


def convert(value: float, source: str, target: str, molar_mass: float | None = None) -> float:
    """Convert one concentration from ``source`` to ``target`` units."""
    return value * conversion_factor(source, target, molar_mass)


def specific_to_molar_absorptivity(specific_absorbance: float, molar_mass: float) -> float:
    """Molar absorptivity from the specific absorbance A(1 %, 1 cm).

    A(1 %, 1 cm) is the absorbance of a 1 g/100 mL (10 g/L) solution in a
    1 cm cell, so epsilon = A(1 %, 1 cm) x M / 10 in L mol^-1 cm^-1.
    """
    if not molar_mass > 0:
        raise AbsolveError("the molar mass must be positive", fix="give it in g/mol")
    return specific_absorbance * molar_mass / 10.0
