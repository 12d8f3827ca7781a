"""`denude init DIR`: starter files, so a first run begins from a file rather than many flags.

Writes ``DIR/job.toml`` (every job-file key, commented, generated from the loader's own table)
and ``DIR/rocks.csv`` (an editable copy of the built-in rock table).
"""

# annotations stay objects (no `from __future__ import annotations`): typer reads the aliases

from pathlib import Path
from typing import Annotated

import typer

from denude.cli.common import handle_user_errors
from denude.io.jobfile import write_starter_files


@handle_user_errors
def init_command(
    folder: Annotated[Path, typer.Argument(metavar="DIR", help="Folder for job.toml and rocks.csv (created if needed).")],
    overwrite: Annotated[bool, typer.Option("--overwrite", help="Replace existing job.toml / rocks.csv.")] = False,
):
    """Write a commented job-file template and an editable rock table into DIR."""
    paths = write_starter_files(folder, overwrite=overwrite)
    for path in paths:
        typer.echo(f"wrote {path}")
    typer.echo(f"next: put your rasters beside them, edit {paths[0].name}, then "
               f"`denude check --job {paths[0]}` and `denude map --job {paths[0]}`")


def register(app: typer.Typer) -> None:
    app.command("init")(init_command)
