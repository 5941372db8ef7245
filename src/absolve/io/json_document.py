"""Reading absolve's own JSON files (libraries, models): the checks every such file gets first."""

from __future__ import annotations

import json
import os
from pathlib import Path
from typing import Any

from ..errors import AbsolveError
from .files import refuse_pickle
from .tables import read_text

__all__ = ["load_json_document"]


def load_json_document(path: str | os.PathLike[str], *, what: str, maker: str) -> Any:
    """Parse a JSON file that ``maker`` (an absolve command) wrote, refusing anything else clearly.

    Pickles (refused by their header, never loaded), binary content, nesting too deep to be ours
    and broken JSON each raise :class:`AbsolveError` naming the file (and line and column for
    broken JSON). Checking the document's format and contents is the caller's job.
    """
    file = Path(path)
    fix = f"pass a {what} JSON file written by '{maker}'"
    refuse_pickle(file, fix=fix)
    text = read_text(file, expected=f"a {what}", fix=fix)
    try:
        return json.loads(text)
    except RecursionError:
        raise AbsolveError(f"nested too deeply to be a {what}", fix=fix, file=file) from None
    except json.JSONDecodeError as error:
        raise AbsolveError(
            f"not valid JSON ({error.msg})",
            fix=f"the file is truncated or damaged; rebuild it with '{maker}'",
            file=file,
            line=error.lineno,
            column=error.colno,
        ) from None
