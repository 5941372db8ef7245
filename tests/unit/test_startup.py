"""Start-up stays quick: each entry point imports only what its job needs."""

from __future__ import annotations

import subprocess
import sys

import pytest

# Modules that take a large share of a second to import and that quantification does not use.
HEAVY = ("scipy.stats", "scipy.optimize", "scipy.signal", "scipy.integrate", "sklearn", "pandas", "matplotlib")


def _imported_after(code: str) -> set[str]:
    probe = code + "\nimport sys\nprint('\\n'.join(sys.modules))\n"
    done = subprocess.run([sys.executable, "-c", probe], capture_output=True, text=True, timeout=120)
    assert done.returncode == 0, done.stderr
    return set(done.stdout.split())


@pytest.mark.parametrize(
    ("code", "allowed"),
    [
        ("import absolve", ()),
        ("from absolve.cli import main\nmain(['--version'])", ()),
        ("from absolve.cli import main\nmain(['quantify', '--help'])", ()),
        # Quantifying (fit, uncertainty, screen) needs scipy.linalg and scipy.special only.
        ("import absolve.quantify, absolve.workflow", ()),
        # The public names still resolve, each loading its own module on first use.
        ("import absolve\nabsolve.calibrate", ("scipy.stats", "scipy.optimize", "scipy.signal", "scipy.integrate")),
    ],
)
def test_entry_points_import_only_what_they_need(code: str, allowed: tuple[str, ...]) -> None:
    modules = _imported_after(code)
    heavy = sorted(name for name in modules if name.split(".")[0] in {h.split(".")[0] for h in HEAVY} and any(
        name == h or name.startswith(h + ".") for h in HEAVY if h not in allowed))
    assert heavy == [], heavy


def test_lazy_public_names_are_the_real_objects() -> None:
    import absolve
    from absolve.quantify import quantify
    from absolve.spectra import Spectra

    assert absolve.quantify is quantify and absolve.Spectra is Spectra
    assert set(absolve.__all__) <= set(dir(absolve))
    with pytest.raises(AttributeError, match="no attribute 'nonexistent'"):
        absolve.nonexistent  # noqa: B018
