"""Shared fixtures and the deterministic hypothesis profile used by every test module."""

from __future__ import annotations

from collections.abc import Callable
from pathlib import Path

import numpy as np
import pytest
from hypothesis import settings

from absolve.demo_data import DemoFiles, demo_files
from absolve.simulate import Instrument, measure, random_absorptivities
from absolve.spectra import Spectra

# Derandomized so that a run is reproducible on every machine; no deadline
# because the shared test machine is busy and timing would make tests flaky.
settings.register_profile("absolve", derandomize=True, deadline=None, max_examples=50)
settings.load_profile("absolve")

WriteFile = Callable[..., Path]


@pytest.fixture
def write_file(tmp_path: Path) -> WriteFile:
    """Write text (encoded as ``encoding``) or bytes to ``tmp_path / name`` and return the path."""

    def write(name: str, content: str | bytes, encoding: str = "utf-8") -> Path:
        path = tmp_path / name
        path.write_bytes(content.encode(encoding) if isinstance(content, str) else content)
        return path

    return write


@pytest.fixture(scope="session")
def demo() -> DemoFiles:
    """Paths of the bundled demo files."""
    return demo_files()


class SimulatedStandards:
    """Pure standards of ``n_components`` invented absorbers measured on a simulated instrument.

    The absorptivity spectra are invented (``absolve.simulate.random_absorptivities``,
    rescaled to a peak of 1 per unit concentration per cm), so the truth is known exactly.

    Attributes
    ----------
    grid : ndarray, shape (n_wavelengths,)
    truth : ndarray, shape (n_components, n_wavelengths)
    concentrations : ndarray, shape (n_standards, n_components)
    spectra : Spectra
        Measured absorbance of every standard.
    """

    def __init__(
        self,
        seed: int,
        instrument: Instrument,
        levels: tuple[float, ...],
        *,
        n_components: int = 2,
        replicates: int = 1,
        blanks: int = 2,
        grid: np.ndarray | None = None,
    ) -> None:
        rng = np.random.default_rng(seed)
        self.grid = np.arange(400.0, 601.0, 1.0) if grid is None else grid
        truth = random_absorptivities(self.grid, n_components, rng)
        self.truth = truth / truth.max(axis=1, keepdims=True)
        rows = [
            [level if j == k else 0.0 for j in range(n_components)]
            for k in range(n_components)
            for level in levels
            for _ in range(replicates)
        ]
        rows += [[0.0] * n_components] * blanks
        self.concentrations = np.array(rows)
        measured = measure(self.grid, self.concentrations @ self.truth, instrument, rng)
        self.spectra = Spectra(self.grid, measured, [f"std-{i:02d}" for i in range(len(rows))])
        self.names = tuple(f"dye-{k}" for k in range(n_components))


@pytest.fixture(scope="session")
def simulated_standards() -> type[SimulatedStandards]:
    """Factory of :class:`SimulatedStandards` (call it with a seed, an Instrument and the levels)."""
    return SimulatedStandards
