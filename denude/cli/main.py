"""The ``denude`` command: a small Typer app that assembles one module per command.

Exit codes: 0 success, 1 user error (one line on stderr, no traceback), 2 wrong usage.
"""

from __future__ import annotations

import importlib
import sys

import typer

from denude.errors import DenudeError

app = typer.Typer(
    name="denude",
    help=(
        "Maximum chemical denudation rates (mm/kyr) of limestone, dolomite and gypsum "
        "from runoff, soil CO2 and temperature rasters. Screening estimates only: not a "
        "site investigation."
    ),
    no_args_is_help=True,
    add_completion=False,
    pretty_exceptions_enable=False,
)

#: Command modules, each exposing ``register(app)``. Listed here so names live in one place.
COMMAND_MODULES = (
    "denude.cli.site_cmd",
    "denude.cli.map_cmd",
    "denude.cli.check_cmd",
    "denude.cli.summarize_cmd",
    "denude.cli.batch_cmd",
    "denude.cli.demo_cmd",
)

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
