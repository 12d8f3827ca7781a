"""`denude check`: show what `denude map` would do with the same options; writes nothing."""

# annotations stay objects here: the shared option signature is copied between commands

from typing import Annotated, Optional

import typer

from denude.cli.common import handle_user_errors
from denude.cli.map_cmd import _signature_with, settings_from_options
from denude.execution import inspect_job
from denude.reports.provenance import check_lines

CHECK_EXTRA = {
    "out": (Annotated[Optional[str], typer.Option(help="Also check this output folder would be accepted.")], None),
    "overwrite": (Annotated[bool, typer.Option("--overwrite", help="As for map: an existing --out is accepted.")], False),
}


@handle_user_errors
def _check_body(**kwargs):
    job = kwargs.pop("job", None)
    settings = settings_from_options(job, **kwargs)
    report = inspect_job(settings, for_output=settings.out is not None)
    for line in check_lines(report):
        typer.echo(line)
    typer.echo("check: all checks passed")


def check_command(**kwargs):
    """Print the target grid, each input's CRS/resolution/extent/overlap/value range, lithology
    codes found vs the rock table, and how each input will be resampled. Writes nothing."""
    return _check_body(**kwargs)


check_command.__signature__ = _signature_with(CHECK_EXTRA)


def register(app: typer.Typer) -> None:
    app.command("check")(check_command)
