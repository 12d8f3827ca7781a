"""`denude map`: maps of maximum denudation rate (mm/kyr) and companions from rasters.

Each input is a raster path or a number. Settings may come from a TOML job file
(``--job job.toml``); flags override the file. Exit 0 on success, 1 on a user error.
"""

# annotations stay objects (no `from __future__ import annotations`): typer reads the aliases

from pathlib import Path
from typing import Optional

import typer

from denude.cli import options as o
from denude.cli.common import CAUTION, handle_user_errors, progress_callback
from denude.execution import inspect_job, limit_malloc_arenas, run_map
from denude.io.jobfile import MapSettings, build_settings
from denude.reports.json_output import check_record, map_record
from denude.reports.provenance import check_lines, summary_lines


def settings_from_options(job: Optional[Path], values: dict, out: Optional[str] = None) -> MapSettings:
    """MapSettings from a command's parameters (``values``: name -> value, None = not given)
    over an optional job file."""
    flags = o.map_flags(values)
    flags["out"] = out
    return build_settings(flags, job_file=job)


@handle_user_errors
def map_command(
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
    out: o.Out = None,
    overwrite: o.Overwrite = False,
    dry_run: o.DryRun = False,
    quiet: o.Quiet = False,
    as_json: o.AsJson = False,
):
    """Map maximum chemical denudation rates (mm/kyr) from runoff, soil CO2, temperature and lithology rasters."""
    settings = settings_from_options(job, locals(), out)
    if dry_run:
        report = inspect_job(settings, for_output=True)
        if as_json:
            return {**check_record(report, command="map")}
        if not quiet:
            for line in check_lines(report):
                typer.echo(line)
            typer.echo("dry run: all checks passed, nothing written")
        return None
    limit_malloc_arenas()
    with progress_callback("blocks", quiet) as progress:
        summary = run_map(settings, progress=progress)
    if as_json:
        return map_record(summary)
    if not quiet:
        for line in summary_lines(summary):
            typer.echo(line)
        typer.echo(CAUTION)
    return None


def register(app: typer.Typer) -> None:
    app.command("map")(map_command)
