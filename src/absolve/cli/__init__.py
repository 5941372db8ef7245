"""The ``absolve`` command line: a thin layer that parses, calls one library function, and renders."""

import sys

from ._app import app, main

__all__ = ["app", "main", "run"]


def run() -> None:
    """Console-script entry point."""
    sys.exit(main())
