"""Import every command module of this package so that each registers itself on the app."""

import importlib
import pkgutil

from . import __path__ as _package_path

for _module in pkgutil.iter_modules(_package_path):
    if not _module.name.startswith("_") and _module.name != "commands":
        importlib.import_module(f"{__package__}.{_module.name}")
