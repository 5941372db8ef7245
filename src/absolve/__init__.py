"""absolve: quantify overlapping absorbers in UV-Vis scans with honest uncertainties.

Public API
----------
Spectra
    A batch of scans on one wavelength grid.
ReferenceLibrary, NoiseModel, ComponentCalibration, library_from_absorptivities
    Absorptivity spectra of the components and how far to trust them.
Calibration, calibrate
    Standards into a reference library: absorptivities, working range, noise model.
quantify, MixtureResult
    Concentrations of overlapping absorbers with uncertainty budgets and diagnostics.
screen_residuals, explain_with_suspects, Screening, Diagnosis, SuspectReport
    Interferent screening of fit residuals.
check_scans, CheckResult
    Screening plus candidate interferents, scan by scan.
solve_nonnegative, BatchSolution
    Batch non-negative least squares for scans sharing one design.
InverseModel, InversePrediction
    PLS inverse calibration from mixture standards.
plan_wavelengths, WavelengthPlan
    Analytical wavelengths (or scan windows) that minimise overlap, with a proven optimum.
read_scans, read_scan_table, read_library, write_library, read_model, write_model
    Files in and out.
AbsolveError
    The one exception type for problems with the user's input.
"""

import importlib
import sys
import types
from importlib.metadata import PackageNotFoundError, version
from typing import TYPE_CHECKING, Any

try:
    __version__ = version("absolve")
except PackageNotFoundError:  # running from a source tree that was never installed
    __version__ = "0+unknown"

# Where each public name lives. Submodules are imported on first use (PEP 562), so that
# ``import absolve`` and the command line start quickly and each command loads only what it needs.
_HOMES: dict[str, str] = {
    "Calibration": "calibration",
    "calibrate": "calibration",
    "CheckResult": "checking",
    "check_scans": "checking",
    "AbsolveError": "errors",
    "InverseModel": "inverse",
    "InversePrediction": "inverse",
    "read_library": "io.library_file",
    "write_library": "io.library_file",
    "read_model": "io.model_file",
    "write_model": "io.model_file",
    "read_scan_table": "io.tables",
    "read_scans": "io.tables",
    "ComponentCalibration": "library",
    "NoiseModel": "library",
    "ReferenceLibrary": "library",
    "library_from_absorptivities": "library",
    "WavelengthPlan": "planning",
    "plan_wavelengths": "planning",
    "MixtureResult": "quantify",
    "quantify": "quantify",
    "Diagnosis": "screening",
    "Screening": "screening",
    "SuspectReport": "screening",
    "explain_with_suspects": "screening",
    "screen_residuals": "screening",
    "BatchSolution": "solver",
    "solve_nonnegative": "solver",
    "Spectra": "spectra",
}


def __getattr__(name: str) -> Any:
    home = _HOMES.get(name)
    if home is None:
        raise AttributeError(f"module 'absolve' has no attribute {name!r}")
    value = getattr(importlib.import_module(f".{home}", __name__), name)
    globals()[name] = value
    return value


def __dir__() -> list[str]:
    return sorted({*globals(), *_HOMES})


class _Package(types.ModuleType):
    """The package module: importing a submodule named like a public function (``absolve.quantify``)
    must not replace the function, as the import system would by setting the attribute."""

    def __setattr__(self, name: str, value: Any) -> None:
        if name in _HOMES and isinstance(value, types.ModuleType):
            return
        super().__setattr__(name, value)


sys.modules[__name__].__class__ = _Package


if TYPE_CHECKING:
    from .calibration import Calibration, calibrate
    from .checking import CheckResult, check_scans
    from .errors import AbsolveError
    from .inverse import InverseModel, InversePrediction
    from .io.library_file import read_library, write_library
    from .io.model_file import read_model, write_model
    from .io.tables import read_scan_table, read_scans
    from .library import ComponentCalibration, NoiseModel, ReferenceLibrary, library_from_absorptivities
    from .planning import WavelengthPlan, plan_wavelengths
    from .quantify import MixtureResult, quantify
    from .screening import Diagnosis, Screening, SuspectReport, explain_with_suspects, screen_residuals
    from .solver import BatchSolution, solve_nonnegative
    from .spectra import Spectra

__all__ = [
    "AbsolveError",
    "BatchSolution",
    "Calibration",
    "CheckResult",
    "ComponentCalibration",
    "Diagnosis",
    "InverseModel",
    "InversePrediction",
    "MixtureResult",
    "NoiseModel",
    "ReferenceLibrary",
    "Screening",
    "Spectra",
    "SuspectReport",
    "WavelengthPlan",
    "calibrate",
    "check_scans",
    "explain_with_suspects",
    "library_from_absorptivities",
    "plan_wavelengths",
    "quantify",
    "read_library",
    "read_model",
    "read_scan_table",
    "read_scans",
    "screen_residuals",
    "solve_nonnegative",
    "write_library",
    "write_model",
    "__version__",
]
