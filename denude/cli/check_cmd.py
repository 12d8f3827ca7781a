"""`denude check`: show what `denude map` would do with the same options; writes nothing."""

# annotations stay objects (no `from __future__ import annotations`): typer reads the aliases

from typing import Annotated, Optional

import typer

from denude.cli import options as o
from denude.cli.common import handle_user_errors
from denude.cli.map_cmd import settings_from_options
from denude.execution import inspect_job
from denude.reports.json_output import check_record
from denude.reports.provenance import check_lines

CheckOut = Annotated[Optional[str], typer.Option(metavar="DIR", help="Also check this output folder would be accepted.")]
CheckOverwrite = Annotated[bool, typer.Option("--overwrite", help="As for map: an existing --out is accepted.")]


@handle_user_errors
def check_command(
    lithology: o.Lithology = None,
    rocks: o.Rocks = None,
    runoff: o.Runoff = None,
    precipitation: o.Precipitation = None,
    aet: o.Aet = None,
    pco2: o.Pco2 = None,
    pco2_units: o.Pco2UnitsText = None,
    elevation: o.Elevation = None,
    air_pressure: o.AirPressure = None,
    temperature: o.Temperature = None,
    soluble_fraction: o.SolubleFraction = None,
    cover: o.Cover = None,
    cover_min_thickness: o.CoverMinThickness = None,
    grid_like: o.GridLike = None,
    grid_crs: o.GridCrs = None,
    grid_resolution: o.GridResolution = None,
    grid_bounds: o.GridBounds = None,
    chemistry: o.ChemistryText = None,
    workers: o.Workers = None,
    block_size: o.BlockSize = None,
    gdal_cache_mb: o.GdalCacheMb = None,
    layers: o.Layers = None,
    layout: o.LayoutText = None,
    compress: o.CompressText = None,
    lithology_resampling: o.LithologyResamplingText = None,
    continuous_resampling: o.ContinuousResamplingText = None,
    negative_runoff: o.NegativeRunoffText = None,
    out_of_range: o.OutOfRangeText = None,
    below_freezing: o.BelowFreezingText = None,
    runoff_units: o.RunoffUnits = None,
    precipitation_units: o.PrecipitationUnits = None,
    aet_units: o.AetUnits = None,
    temperature_units: o.TemperatureUnits = None,
    job: o.Job = None,
    out: CheckOut = None,
    overwrite: CheckOverwrite = False,
    as_json: o.AsJson = False,
):
    """Print the target grid, each input's CRS/resolution/extent/overlap/value range, lithology
    codes found vs the rock table, and how each input will be resampled. Writes nothing."""
    settings = settings_from_options(job, locals(), out)
    report = inspect_job(settings, for_output=settings.out is not None)
    if as_json:
        return check_record(report)
    for line in check_lines(report):
        typer.echo(line)
    typer.echo("check: all checks passed")
    return None


def register(app: typer.Typer) -> None:
    app.command("check")(check_command)
