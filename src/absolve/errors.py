"""The one exception type users see.

Every problem caused by the user's input (a malformed file, an option out of
range, data that cannot support the requested computation) is raised as an
:class:`AbsolveError`. The command line turns it into a single
``error: ...`` line and exit status 2; any other exception is a bug.
"""

from __future__ import annotations

from os import PathLike

__all__ = ["AbsolveError"]

# A problem text longer than this (a pasted 100 kB cell or header) is cut in the
# middle, so that the message stays one readable line; the full text stays in
# ``AbsolveError.problem``.
_MAX_PROBLEM = 300


class AbsolveError(Exception):
    """A user-facing error that names where the problem is and how to fix it.

    Parameters
    ----------
    problem : str
        What is wrong, in plain words ("non-numeric cell 'abc'").
    fix : str, optional
        What the user should do about it ("use --decimal , for comma decimals").
    file : str or path-like, optional
        The file the problem was found in.
    line, column : int, optional
        1-based position in ``file``.

    Examples
    --------
    >>> str(AbsolveError("non-numeric cell 'x'", fix="check the export", file="a.csv", line=3, column=2))
    "a.csv:3:2: non-numeric cell 'x' — check the export"
    """

    def __init__(
        self,
        problem: str,
        *,
        fix: str | None = None,
        file: str | PathLike[str] | None = None,
        line: int | None = None,
        column: int | None = None,
    ) -> None:
        self.problem = problem
        self.fix = fix
        self.file = None if file is None else str(file)
        self.line = line
        self.column = column
        super().__init__(self.message)

    @property
    def message(self) -> str:
        """The whole message: location, problem and fix on one line."""
        where = ""
        if self.file is not None:
            where = self.file
            if self.line is not None:
                where += f":{self.line}"
                if self.column is not None:
                    where += f":{self.column}"
            where += ": "
        problem = self.problem
        if len(problem) > _MAX_PROBLEM:
            problem = problem[: _MAX_PROBLEM - 80] + " [...] " + problem[-60:]
        text = where + problem
        if self.fix:
            text += " — " + self.fix
        # Every character str.splitlines breaks at (\r, form feed, U+2028, a Latin-1 NEL...) becomes a space.
        return " ".join(text.splitlines())

    def located(self, file: str | PathLike[str], line: int | None = None) -> AbsolveError:
        """Return a copy that names ``file`` (and ``line``) when none was known."""
        return AbsolveError(
            self.problem,
            fix=self.fix,
            file=self.file if self.file is not None else file,
            line=self.line if self.line is not None else line,
            column=self.column,
        )
