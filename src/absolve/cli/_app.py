"""The typer application object and the error boundary of the command line.

Each command lives in its own module of this package and registers itself on
:data:`app`. :func:`main` is the console-script entry point: it turns an
:class:`~absolve.errors.AbsolveError` or a usage mistake into one
``error: ...`` line on stderr with exit status 2; anything else is a bug and
keeps its traceback (exit status 1).
"""

from __future__ import annotations

import sys
from collections.abc import Sequence

import typer

from .. import __version__
from ..errors import AbsolveError

try:  # recent typer carries its own copy of click
    from typer._click.exceptions import ClickException, UsageError
except ImportError:  # pragma: no cover - older typer depends on click itself
    from click.exceptions import ClickException, UsageError  # type: ignore[assignment]

app = typer.Typer(
    name="absolve",
    help="Quantify overlapping absorbers in UV-Vis scans with honest uncertainties.",
    add_completion=False,
    no_args_is_help=True,
    pretty_exceptions_enable=False,
    rich_markup_mode=None,
    context_settings={"help_option_names": ["-h", "--help"]},
)


def _show_version(value: bool) -> None:
    if value:
        typer.echo(f"absolve {__version__}")
        raise typer.Exit()


@app.callback()
def _root(
    version: bool = typer.Option(False, "--version", help="Show the version and exit.", callback=_show_version, is_eager=True),
) -> None:
    """Quantify overlapping absorbers in UV-Vis scans with honest uncertainties."""


def fail(error: AbsolveError | str) -> int:
    """Print one ``error:`` line to stderr and return exit status 2."""
    text = error.message if isinstance(error, AbsolveError) else error
    print(f"error: {text}", file=sys.stderr)
    return 2


def main(argv: Sequence[str] | None = None) -> int:
    """Run the command line with ``argv`` (default: ``sys.argv[1:]``) and return the exit status."""
    from . import commands  # noqa: F401  (registers every command on `app`)

    command = typer.main.get_command(app)
    try:
        result = command.main(list(argv) if argv is not None else sys.argv[1:], prog_name="absolve", standalone_mode=False)
    except AbsolveError as error:
        return fail(error)
    except typer.Exit as done:
        return int(done.exit_code)
    except UsageError as error:
        if type(error).__name__ == "NoArgsIsHelpError":  # bare 'absolve': show the help, not an error
            print(error.format_message())
            return 0
        hint = f"run 'absolve {error.ctx.info_name} --help'" if error.ctx and error.ctx.parent else "run 'absolve --help'"
        return fail(f"{error.format_message()} — {hint}")
    except ClickException as error:
        return fail(error.format_message())
    except (typer.Abort, KeyboardInterrupt):
        print("error: interrupted — nothing was written", file=sys.stderr)
        return 130
    except BrokenPipeError:
        return 0
    if result == 130:  # typer turns Ctrl-C inside a command into exit status 130
        print("error: interrupted — nothing was written", file=sys.stderr)
        return 130
    return int(result) if isinstance(result, int) else 0
