"""`denude compare BASE_DIR SCENARIO_DIR --out DIR [--zones ZONES.gpkg]`: the change between two
map output folders on one grid (difference and ratio rasters, per-zone change table)."""

from __future__ import annotations

from pathlib import Path
from typing import Annotated, Optional

import typer

from denude.cli.common import CAUTION, handle_user_errors


def compare(
    base: Annotated[Path, typer.Argument(help="Output folder of the baseline 'denude map' run.")],
    scenario: Annotated[Path, typer.Argument(help="Output folder of the scenario 'denude map' run.")],
    out: Annotated[Path, typer.Option("--out", help="Output folder (refused if it exists, unless --overwrite).")],
    zones: Annotated[Optional[Path], typer.Option("--zones", exists=True, dir_okay=False, help="Zone polygons for a per-zone change table.")] = None,
    zones_layer: Annotated[Optional[str], typer.Option(help="Layer of the zone file.")] = None,
    zones_id_field: Annotated[Optional[str], typer.Option(help="Zone id field (default: feature ids as zone_id).")] = None,
    overwrite: Annotated[bool, typer.Option("--overwrite", help="Replace an existing output folder.")] = False,
    quiet: Annotated[bool, typer.Option("--quiet", "-q", help="Print nothing but errors.")] = False,
):
    """Difference (scenario - base) and ratio (scenario / base) of two map runs, per cell and per zone."""
    from denude.execution import ZoneSpec, run_compare

    zone_spec = ZoneSpec(str(zones.resolve()), zones_layer, zones_id_field) if zones is not None else None
    summary = run_compare(base, scenario, out, zone_spec, overwrite=overwrite)
    if not quiet:
        typer.echo(f"{summary.out_dir}: {scenario} against {base}")
        for name in summary.outputs:
            typer.echo(f"  wrote {name}")
        typer.echo(CAUTION)


def register(app: typer.Typer) -> None:
    app.command("compare")(handle_user_errors(compare))
