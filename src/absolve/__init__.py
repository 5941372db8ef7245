"""absolve: quantify overlapping absorbers in UV-Vis scans with honest uncertainties.

Public API
----------
Spectra
    A batch of scans on one wavelength grid.
ReferenceLibrary, NoiseModel, ComponentCalibration
    Absorptivity spectra of the components and how far to trust them.
AbsolveError
    The one exception type for problems with the user's input.
"""

from importlib.metadata import PackageNotFoundError, version

from .errors import AbsolveError
from .library import ComponentCalibration, NoiseModel, ReferenceLibrary, library_from_absorptivities
from .spectra import Spectra

try:
    __version__ = version("absolve")
except PackageNotFoundError:  # running from a source tree that was never installed
    __version__ = "0+unknown"

__all__ = [
    "AbsolveError",
    "ComponentCalibration",
    "NoiseModel",
    "ReferenceLibrary",
    "Spectra",
    "library_from_absorptivities",
    "__version__",
]
