"""The invented demo scenario: a dye-house lab checking trichromatic exhaust baths.

Everything here is made up for the demonstration: three reactive dyes with
neutral invented codes (a yellow ``YX-112``, a red ``RM-207`` and a blue
``BN-330``), their band shapes and molar masses, the lab's standards and its
bath samples. The scans are simulated with :mod:`absolve.simulate`, so they
carry what real scans carry: photometric noise that grows with absorbance and
is correlated along wavelength, small cuvette offsets, and stray light that
bends the response of the strongest standard and of an over-strong sample.

:func:`generate_demo` writes the bundled files deterministically (fixed seed,
fixed float formatting), so the committed files can be checked against a fresh
run. :func:`bundled_root` finds them at run time, both in an installed wheel
(``absolve/_bundled``) and in a development checkout (the repository root).
Regenerate them with ``python -m absolve.demo_data [--root DIR]``.
"""

from __future__ import annotations

import argparse
from collections.abc import Sequence
from dataclasses import dataclass
from pathlib import Path

import numpy as np
from numpy.typing import ArrayLike, NDArray

from .errors import AbsolveError
from .io.files import atomic_write
from .simulate import Band, Instrument, band_spectrum, measure

__all__ = [
    "DEMO_DYES",
    "DEMO_INSTRUMENT",
    "DEMO_SEED",
    "DEMO_UNIT",
    "DemoDye",
    "DemoFiles",
    "bundled_root",
    "demo_files",
    "demo_grid",
    "generate_demo",
]

DEMO_SEED = 20261202
DEMO_UNIT = "mg/L"


@dataclass(frozen=True)
class DemoDye:
    """One invented reactive dye of the demo.

    Attributes
    ----------
    code : str
        Invented product code, used as the component name everywhere.
    colour : str
        Its hue in plain words.
    molar_mass : float
        Invented molar mass in g/mol.
    bands : tuple of Band
        Absorption bands; heights are absorptivities in absorbance per
        (mg/L x cm).
    standard_levels : tuple of float
        Nominal concentrations (mg/L) of the lab's pure standards, lowest first.
    """

    code: str
    colour: str
    molar_mass: float
    bands: tuple[Band, ...]
    standard_levels: tuple[float, ...]

    def absorptivity(self, wavelengths: ArrayLike) -> NDArray[np.float64]:
        """Absorptivity in absorbance per (mg/L x cm) at ``wavelengths`` (nm), shape (n_wavelengths,)."""
        return band_spectrum(wavelengths, self.bands)


# Broad bands (widths 20-38 nm, long-side tails) so that neighbouring dyes
# overlap as much as real trichromatic reactive dyes do: the yellow's tail
# reaches under the red's shoulder and the red's tail under the blue's first
# band. Peak absorptivities of 0.034-0.041 per (mg/L x cm) correspond to molar
# absorptivities of about 22 000-42 000 L mol^-1 cm^-1 at these molar masses.
DEMO_DYES: tuple[DemoDye, ...] = (
    DemoDye(
        code="YX-112",
        colour="yellow",
        molar_mass=642.5,
        bands=(Band(428.0, 36.0, 0.0300, skew=0.45), Band(398.0, 20.0, 0.0090)),
        standard_levels=(2.0, 5.0, 10.0, 20.0, 36.0, 54.0),
    ),
    DemoDye(
        code="RM-207",
        colour="red",
        molar_mass=871.3,
        bands=(Band(526.0, 32.0, 0.0300, skew=0.2), Band(492.0, 22.0, 0.0120), Band(400.0, 30.0, 0.0020)),
        standard_levels=(2.0, 5.0, 10.0, 20.0, 35.0, 52.0),
    ),
    DemoDye(
        code="BN-330",
        colour="blue",
        molar_mass=1038.6,
        bands=(Band(588.0, 34.0, 0.0220, skew=0.1), Band(630.0, 36.0, 0.0260, skew=0.15)),
        standard_levels=(1.5, 4.0, 8.0, 16.0, 30.0, 45.0),
    ),
)

# Stray light of 0.3 % bends a true absorbance of 1.85 down to about 1.77
# (ratio 0.955), so the top standards sit visibly past the linear range.
DEMO_INSTRUMENT = Instrument(
    noise_floor=0.0012,
    noise_proportional=0.004,
    correlation_length_nm=3.0,
    stray_light=0.003,
    baseline_offset_sd=0.0015,
    baseline_slope_sd=0.0004,
)

# Relative error of preparing a standard by dilution (pipette and flask
# tolerances): the file states the nominal value, the cuvette holds this much
# more or less. Duplicate scans of one standard share it.
_PREPARATION_RSD = 0.002

# Levels (indices into standard_levels) scanned twice, giving the pure error
# for a lack-of-fit test; the top level is included so the bend is testable.
_DUPLICATED_LEVELS = (2, 5)

# Mixed standards: concentrations (mg/L) in DEMO_DYES order.
_MIXED_STANDARDS: tuple[tuple[str, tuple[float, float, float]], ...] = (
    ("mix-01", (10.0, 8.0, 12.0)),
    ("mix-02", (20.0, 5.0, 6.0)),
)


@dataclass(frozen=True)
class _BathSample:
    """One exhaust-bath sample: dye concentrations (mg/L, DEMO_DYES order) and what else is in the cuvette."""

    name: str
    concentrations: tuple[float, float, float]
    foreign_bands: tuple[Band, ...] = ()
    turbidity_at_400nm: float = 0.0


# Scatter from fine suspended matter falls off roughly as wavelength^-n with
# n between 1 and 4 (4 for particles much smaller than the wavelength); 2.5 is
# a middle value (common practice, no source).
_TURBIDITY_EXPONENT = 2.5

_BATH_SAMPLES: tuple[_BathSample, ...] = (
    _BathSample("bath-01-start", (14.0, 10.5, 17.0)),
    _BathSample("bath-02-20min", (8.6, 6.9, 11.2)),
    _BathSample("bath-03-40min", (4.9, 3.8, 6.6)),
    _BathSample("bath-04-60min", (2.7, 1.6, 3.9)),
    _BathSample("bath-05-exhaust", (1.9, 0.08, 2.4)),
    _BathSample("bath-06-strong", (46.0, 40.0, 52.0)),
    # Carry-over of a turquoise dye from the previous lot: a band the
    # library does not know, beyond the blue's maximum.
    _BathSample("bath-07-carryover", (6.2, 4.5, 8.0), foreign_bands=(Band(668.0, 18.0, 0.06, skew=0.1),)),
    _BathSample("bath-08-turbid", (5.5, 4.1, 7.4), turbidity_at_400nm=0.035),
    _BathSample("bath-09-rinse", (0.9, 0.6, 1.3)),
)

# Samples also exported as percent transmittance with semicolons and decimal commas.
_PERCENT_T_SAMPLES = ("bath-02-20min", "bath-05-exhaust")

_HEADER = (
    "# absolve demo data: invented dye-house scenario, simulated scans, not a real measurement",
    "# lab: exhaust-bath control, dye kitchen 2",
    "# instrument: double-beam UV-Vis spectrophotometer, unit DEMO-07",
    "# operator: KM",
    "# date: 2026-12-02",
    "# cell: quartz, path length 10 mm",
    "# slit: 2 nm; scan speed: 480 nm/min; data interval: 1 nm",
)


def demo_grid() -> NDArray[np.float64]:
    """The demo's wavelength grid: 380-750 nm at 1 nm, shape (371,)."""
    return np.arange(380.0, 751.0, 1.0)


@dataclass(frozen=True)
class DemoFiles:
    """Where each demo file is.

    Attributes
    ----------
    standards, standards_concentrations, blank : Path
        Scan table of the standards, their long concentration table, blank scans.
    bath_samples, bath_samples_truth, bath_samples_percent_t : Path
        Bath sample scans (absorbance), their true concentrations, and two of
        them exported as %T with semicolons and decimal commas.
    absorptivities : Path
        Absorptivity table of the three dyes, absorbance per (mg/L x cm).
    """

    standards: Path
    standards_concentrations: Path
    blank: Path
    bath_samples: Path
    bath_samples_truth: Path
    bath_samples_percent_t: Path
    absorptivities: Path

    @classmethod
    def under(cls, root: Path) -> DemoFiles:
        """The demo's file layout under ``root``."""
        standards, examples = root / "reference_spectra", root / "examples"
        return cls(
            standards=standards / "standards.csv",
            standards_concentrations=standards / "standards_concentrations.csv",
            blank=standards / "blank.csv",
            bath_samples=examples / "bath_samples.csv",
            bath_samples_truth=examples / "bath_samples_truth.csv",
            bath_samples_percent_t=examples / "bath_samples_percentT.csv",
            absorptivities=examples / "dye_absorptivities.csv",
        )

    def all(self) -> tuple[Path, ...]:
        """Every file, in a fixed order."""
        return tuple(getattr(self, name) for name in self.__dataclass_fields__)


def bundled_root() -> Path:
    """The folder holding ``reference_spectra/`` and ``examples/`` at run time.

    An installed wheel ships them as ``absolve/_bundled``; a development
    (editable) checkout keeps them at the repository root.

    Raises
    ------
    AbsolveError
        When neither place has them.
    """
    package = Path(__file__).resolve().parent
    for root in (package / "_bundled", package.parents[1]):
        if (root / "reference_spectra").is_dir() and (root / "examples").is_dir():
            return root
    raise AbsolveError(
        f"the bundled demo files are missing (looked in {package / '_bundled'} and {package.parents[1]})",
        fix="reinstall absolve with `pip install .`, or write them with `python -m absolve.demo_data --root DIR`",
    )


def demo_files(root: Path | None = None) -> DemoFiles:
    """Paths of the demo files under ``root`` (default: :func:`bundled_root`)."""
    return DemoFiles.under(bundled_root() if root is None else Path(root))


def _absorptivities(grid: NDArray[np.float64]) -> NDArray[np.float64]:
    """Absorptivities of DEMO_DYES, shape (3, n_wavelengths)."""
    return np.stack([dye.absorptivity(grid) for dye in DEMO_DYES])


def _number(value: float, decimals: int) -> str:
    # Adding 0.0 after rounding turns -0.0 into 0.0, so no "-0.000000" cells.
    return f"{round(float(value), decimals) + 0.0:.{decimals}f}"


def _scan_table(
    grid: NDArray[np.float64],
    values: NDArray[np.float64],
    names: Sequence[str],
    header: Sequence[str],
    *,
    decimals: int = 6,
    delimiter: str = ",",
    decimal: str = ".",
) -> str:
    """Wide scan table text: comment lines, a header row, one row per wavelength."""
    lines = list(header)
    lines.append(delimiter.join(["wavelength_nm", *names]))
    for wavelength, row in zip(grid, values.T):
        cells = [f"{wavelength:.0f}", *(_number(v, decimals) for v in row)]
        lines.append(delimiter.join(cells).replace(".", decimal))
    return "\n".join(lines) + "\n"


def _concentration_table(rows: Sequence[tuple[str, str, float]]) -> str:
    """Long concentration table text ``scan,component,concentration,path_length_cm`` (1 cm cells)."""
    lines = ["scan,component,concentration,path_length_cm"]
    lines += [f"{scan},{component},{_number(value, 3)},1.0" for scan, component, value in rows]
    return "\n".join(lines) + "\n"


def _standards(grid: NDArray[np.float64], rng: np.random.Generator) -> tuple[str, str]:
    """Scan table and concentration table of the standards.

    Pure standards of each dye by level, each duplicate scan right after its
    first scan, then the mixed standards.
    """
    names: list[str] = []
    nominal: list[NDArray[np.float64]] = []
    for index, dye in enumerate(DEMO_DYES):
        for level, concentration in enumerate(dye.standard_levels):
            row = np.zeros(len(DEMO_DYES))
            row[index] = concentration
            names.append(f"{dye.code}-L{level + 1}")
            nominal.append(row)
    names += [name for name, _ in _MIXED_STANDARDS]
    nominal += [np.array(mix) for _, mix in _MIXED_STANDARDS]
    prepared = np.array(nominal) * (1.0 + _PREPARATION_RSD * rng.standard_normal((len(names), 1)))
    repeats = {f"{dye.code}-L{level + 1}" for dye in DEMO_DYES for level in _DUPLICATED_LEVELS}
    scans: list[tuple[str, int]] = []
    for row, name in enumerate(names):
        scans.append((name, row))
        if name in repeats:
            scans.append((f"{name}-dup", row))
    rows = np.array([row for _, row in scans])
    scan_names = [name for name, _ in scans]
    measured = measure(grid, prepared[rows] @ _absorptivities(grid), DEMO_INSTRUMENT, rng)
    table = [
        (scan, dye.code, float(concentration))
        for scan, row in scans
        for dye, concentration in zip(DEMO_DYES, nominal[row])
        if concentration > 0
    ]
    header = (*_HEADER, "# quantity: absorbance against deionised water")
    return _scan_table(grid, measured, scan_names, header), _concentration_table(table)


def _bath_absorbance(grid: NDArray[np.float64]) -> NDArray[np.float64]:
    """True absorbance of each bath sample, shape (n_samples, n_wavelengths)."""
    concentrations = np.array([sample.concentrations for sample in _BATH_SAMPLES])
    true = concentrations @ _absorptivities(grid)
    for row, sample in enumerate(_BATH_SAMPLES):
        true[row] += band_spectrum(grid, sample.foreign_bands)
        true[row] += sample.turbidity_at_400nm * (400.0 / grid) ** _TURBIDITY_EXPONENT
    return true


def generate_demo(root: Path, seed: int = DEMO_SEED) -> list[Path]:
    """Write the demo's standards, blank, bath samples and tables under ``root``.

    The output is byte-identical for the same ``seed``: every file draws
    from its own random stream, and numbers are written with fixed decimals
    (6 for absorbance, 3 for %T and concentrations, 8 for absorptivities).

    Parameters
    ----------
    root : Path
        Folder that receives ``reference_spectra/`` and ``examples/``.
    seed : int
        Seed of the simulated measurements.

    Returns
    -------
    list of Path
        The files written.
    """
    grid = demo_grid()
    files = DemoFiles.under(Path(root))
    standards, concentrations = _standards(grid, np.random.default_rng([seed, 1]))

    blank = measure(grid, np.zeros((2, grid.size)), DEMO_INSTRUMENT, np.random.default_rng([seed, 2]))
    blank_text = _scan_table(grid, blank, ["blank-1", "blank-2"], _HEADER)

    bath_names = [sample.name for sample in _BATH_SAMPLES]
    bath = measure(grid, _bath_absorbance(grid), DEMO_INSTRUMENT, np.random.default_rng([seed, 3]))
    bath_text = _scan_table(grid, bath, bath_names, _HEADER)
    truth = [(s.name, dye.code, c) for s in _BATH_SAMPLES for dye, c in zip(DEMO_DYES, s.concentrations)]

    # The same measurements as a %T export: scanned from long to short
    # wavelengths, semicolons between cells and decimal commas.
    picked = [bath_names.index(name) for name in _PERCENT_T_SAMPLES]
    percent = 100.0 * 10.0 ** -bath[picked]
    percent_header = (*_HEADER, "# quantity: %T; decimal comma; scan direction 750 -> 380 nm")
    percent_text = _scan_table(
        grid[::-1], percent[:, ::-1], _PERCENT_T_SAMPLES, percent_header, decimals=3, delimiter=";", decimal=","
    )

    absorptivity_text = _scan_table(grid, _absorptivities(grid), [dye.code for dye in DEMO_DYES], (), decimals=8)

    contents = {
        files.standards: standards,
        files.standards_concentrations: concentrations,
        files.blank: blank_text,
        files.bath_samples: bath_text,
        files.bath_samples_truth: _concentration_table(truth),
        files.bath_samples_percent_t: percent_text,
        files.absorptivities: absorptivity_text,
    }
    for path, text in contents.items():
        atomic_write(path, text)
    return list(contents)


def _main(argv: Sequence[str] | None = None) -> None:
    parser = argparse.ArgumentParser(prog="python -m absolve.demo_data", description="Write the demo files.")
    parser.add_argument("--root", type=Path, default=Path(__file__).resolve().parents[2],
                        help="folder to write reference_spectra/ and examples/ into (default: the repository root)")
    parser.add_argument("--seed", type=int, default=DEMO_SEED, help="seed of the simulated measurements")
    arguments = parser.parse_args(argv)
    for path in generate_demo(arguments.root, seed=arguments.seed):
        print(path)


if __name__ == "__main__":
    _main()
