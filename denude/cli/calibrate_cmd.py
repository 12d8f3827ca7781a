"""`denude calibrate`: observed solute denudation from water samples against the maximum-rate map."""

from __future__ import annotations

from pathlib import Path
from typing import Annotated, Optional

import typer

from denude.cli.common import CAUTION, handle_user_errors
from denude.registry import CHOICES


def calibrate(
    mapdir: Annotated[Path, typer.Argument(help="Output folder of 'denude map'.", exists=True, file_okay=False)],
    samples: Annotated[Path, typer.Option(help="Water-sample CSV: site_id, zone_id or x,y, temperature_c, ca_mg_l, mg_mg_l, so4_mg_l, alkalinity_mg_l_hco3 (or _caco3), ph, runoff_mm_per_yr or discharge_l_s.", exists=True, dir_okay=False)],
    zones: Annotated[Path, typer.Option(help="Zone polygons (watersheds) the samples drain.", exists=True, dir_okay=False)],
    out: Annotated[Path, typer.Option(help="Output folder: calibration.gpkg, calibration.csv, denudation_expected_mm_per_kyr.tif, calibration.summary.json.")],
    layer: Annotated[Optional[str], typer.Option(help="Layer of the zone file (needed if it has several).")] = None,
    id_field: Annotated[Optional[str], typer.Option(help="Zone id field (default: feature ids as zone_id).")] = None,
    unsampled: Annotated[str, typer.Option(help="Zones without samples: " + " or ".join(CHOICES["unsampled"]) + " (same-rock: area-weighted ratio of the sampled zones of the same dominant soluble rock).")] = CHOICES["unsampled"][0],
    overwrite: Annotated[bool, typer.Option(help="Replace existing outputs.")] = False,
    quiet: Annotated[bool, typer.Option("--quiet", "-q", help="No summary lines.")] = False,
):
    """Observed vs maximum denudation per zone, saturation indices, and an expected-rate map."""
    from denude.execution import run_calibration
    meta = run_calibration(mapdir, samples, zones, out, layer=layer, id_field=id_field,
                           unsampled=unsampled, overwrite=overwrite)
    if not quiet:
        table = meta["table"]
        typer.echo(f"wrote {out}: {meta['samples']['rows']} samples at {meta['samples']['sites']} sites "
                   f"in {meta['samples']['zones_sampled']} of {meta['zones']['count']} zones")
        rules = table["ratio_rule"].value_counts()
        typer.echo("ratio rules: " + ", ".join(f"{k} {v}" for k, v in rules.items()))
    typer.echo(CAUTION)


def register(app: typer.Typer) -> None:
    app.command("calibrate")(handle_user_errors(calibrate))
