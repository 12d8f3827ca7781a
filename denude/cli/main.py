"""The ``denude`` command: a small Typer app that assembles one module per command.

Exit codes: 0 success, 1 user error (one line on stderr, no traceback), 2 wrong usage.
"""

from __future__ import annotations

import importlib
import os
import sys

import typer
from typer.core import TyperGroup

from denude import __version__
from denude.cli.options import rename_old_spellings
from denude.errors import DenudeError

# the compiled loops use no BLAS: numba need not import scipy.linalg to look for one
# (denude.core.fast_kernel._skip_blas_probe; about 0.17 s of every run's start)
os.environ.setdefault("DENUDE_NUMBA_BLAS_PROBE", "skip")


class OneLineErrorGroup(TyperGroup):
    """A command group whose usage errors are one line on stderr (exit code 2)."""

    def main(self, args=None, prog_name=None, complete_var=None, standalone_mode=True, **extra):
        args = rename_old_spellings(list(sys.argv[1:] if args is None else args))
        try:
            rv = super().main(args=args, prog_name=prog_name, complete_var=complete_var,
                              standalone_mode=False, **extra)
        except typer.TyperException as exc:
            if not standalone_mode:
                raise
            if type(exc).__name__ == "NoArgsIsHelpError":  # bare command: show its help
                exc.show()
                sys.exit(exc.exit_code)
            hint = ""
            ctx = getattr(exc, "ctx", None)
            if ctx is not None:
                hint = f" (see '{ctx.command_path} --help')"
            typer.echo(f"denude: usage error: {' '.join(exc.format_message().split())}{hint}", err=True)
            sys.exit(exc.exit_code)
        except typer.Abort:
            if not standalone_mode:
                raise
            typer.echo("denude: aborted", err=True)
            sys.exit(1)
        if not standalone_mode:
            return rv
        if rv == 130:  # Ctrl-C: typer turns KeyboardInterrupt into exit code 130
            typer.echo("denude: interrupted; outputs are staged, so nothing partial is left under a final name", err=True)
        sys.exit(rv if isinstance(rv, int) else 0)


app = typer.Typer(
    cls=OneLineErrorGroup,
    name="denude",
    help=(
        "Maximum chemical denudation rates (mm/kyr) of limestone, dolomite and gypsum "
        "from runoff, soil CO2 and temperature rasters. Screening estimates only: not a "
        "site investigation."
    ),
    no_args_is_help=True,
    add_completion=False,
    pretty_exceptions_enable=False,
    rich_markup_mode=None,          # plain help text: units in [brackets] stay visible
)

#: Command modules, each exposing ``register(app)``. Listed here so names live in one place.
COMMAND_MODULES = (
    "denude.cli.init_cmd",
    "denude.cli.site_cmd",
    "denude.cli.map_cmd",
    "denude.cli.check_cmd",
    "denude.cli.summarize_cmd",
    "denude.cli.batch_cmd",
    "denude.cli.demo_cmd",
    "denude.cli.calibrate_cmd",
    "denude.cli.report_cmd",
    "denude.cli.uncertainty_cmd",
    "denude.cli.compare_cmd",
)

def _version(value: bool) -> None:
    if value:
        typer.echo(f"denude {__version__}")
        raise typer.Exit()


@app.callback()
def _root(
    version: bool = typer.Option(False, "--version", callback=_version, is_eager=True, help="Show the version and exit."),
) -> None:
    """Maximum chemical denudation rates (mm/kyr) from regional rasters."""


for _name in COMMAND_MODULES:
    try:
        _module = importlib.import_module(_name)
    except ModuleNotFoundError as exc:  # a command not built yet must not break the others
        if exc.name != _name:
            raise
        continue
    _module.register(app)


def fail(message: str) -> None:
    """Print a one-line user error to stderr and exit with code 1."""
    first_line = " ".join(str(message).split())
    typer.echo(f"denude: error: {first_line}", err=True)
    raise SystemExit(1)


def main() -> None:
    """Console entry point: run the app, turning user errors into one-line messages."""
    try:
        app(standalone_mode=True)
    except DenudeError as exc:
        fail(str(exc))
    except KeyboardInterrupt:
        typer.echo("denude: interrupted", err=True)
        sys.exit(130)


if __name__ == "__main__":  # pragma: no cover
    main()
