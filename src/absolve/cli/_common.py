"""Small pieces shared by the commands: option parsing, provenance, file reading."""

from __future__ import annotations

import datetime as _dt
import platform
from collections.abc import Sequence
from pathlib import Path
from typing import Annotated, Any, Optional

import typer

from .. import __version__
from ..errors import AbsolveError
from ..io.files import file_sha256

__all__ = [
    "BaselineOption", "DecimalOption", "FitRangeOption", "KeepRangeOption", "PathLengthOption", "QuantityOption",
    "parse_range", "provenance", "say",
]

# Options several commands share, spelt once (typer reads them from the annotations).
BaselineOption = Annotated[str, typer.Option("--baseline", help="Baseline terms: none, offset or linear.")]
PathLengthOption = Annotated[float, typer.Option("--path-length", help="Cell path length in cm.")]
QuantityOption = Annotated[Optional[str], typer.Option("--quantity", help="absorbance, transmittance or percent-transmittance.")]
DecimalOption = Annotated[str, typer.Option("--decimal", help="Decimal mark of the scan tables ('.' or ',').")]
FitRangeOption = Annotated[Optional[str], typer.Option("--range", help="Use wavelengths LOW:HIGH nm.")]
KeepRangeOption = Annotated[Optional[str], typer.Option("--range", help="Keep wavelengths LOW:HIGH nm.")]
LearnLibraryErrorOption = Annotated[bool, typer.Option(
    "--learn-library-error",
    help="Learn the library's fixed absorptivity error from this batch (35+ scans) and set it aside before the interferent "
    "screen: fewer false alarms from an imperfect library, but an impurity that follows one component in most scans goes unseen.",
)]


def parse_range(text: str | None, option: str = "--range") -> tuple[float | None, float | None]:
    """Parse ``"A:B"`` (either side may be empty) into wavelengths in nm."""
    if text is None:
        return None, None
    parts = text.split(":")
    if len(parts) != 2:
        raise AbsolveError(f"{option} {text!r} is not of the form LOW:HIGH", fix=f"write e.g. {option} 400:700")
    try:
        low = float(parts[0]) if parts[0].strip() else None
        high = float(parts[1]) if parts[1].strip() else None
    except ValueError:
        raise AbsolveError(f"{option} {text!r} holds something that is not a number", fix=f"write e.g. {option} 400:700") from None
    if low is not None and high is not None and not low < high:
        raise AbsolveError(f"{option} {text!r}: the low end must be below the high end", fix=f"write e.g. {option} 400:700")
    return low, high


def provenance(inputs: Sequence[str | Path], options: dict[str, Any]) -> dict[str, Any]:
    """Record of input files (with SHA-256), options, tool version and time."""
    return {
        "tool": "absolve",
        "version": __version__,
        "python": platform.python_version(),
        "created": _dt.datetime.now(_dt.timezone.utc).isoformat(timespec="seconds"),
        "inputs": [{"file": Path(p).name, "sha256": file_sha256(p)} for p in inputs],
        "options": {key: (str(value) if isinstance(value, Path) else value) for key, value in options.items()},
    }


def say(text: str, *, quiet: bool = False) -> None:
    """Print a progress or status message to stderr (never data)."""
    import sys

    if not quiet:
        print(text, file=sys.stderr)
