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

from importlib.metadata import PackageNotFoundError, version

# Defined before the submodules are imported: some of them record it in the files they write.
try:
    __version__ = version("absolve")
except PackageNotFoundError:  # running from a source tree that was never installed
    __version__ = "0+unknown"

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
