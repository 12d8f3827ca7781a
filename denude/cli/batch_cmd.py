"""`denude batch`: the `denude map` job split into tiles, on a local process pool or a Dask cluster.

Takes every `denude map` option (each raster input may also be a folder, a quoted glob, a
file list or a VRT of tiles) plus the batch options below. Running the same command again
resumes: tiles already done and verified are skipped. Exit 0 when every tile is done, 1 on a
user error or when any tile failed (details in OUTDIR/run.json and OUTDIR/manifest.json).

Job files may hold a ``[batch]`` table (keys in ``denude.io.job_table.JOB_TABLE``); flags override it.
"""

# annotations stay objects (no `from __future__ import annotations`): typer reads the aliases

from pathlib import Path
from typing import Annotated, Optional

import typer

from denude.cli import options as o
from denude.cli.common import CAUTION, handle_user_errors, one_line, progress_callback
from denude.cli.map_cmd import settings_from_options
from denude.cli.options import Scheduler, TileSize
import denude.execution as execution   # run entry points resolved on use: `denude map` does not load the batch
from denude.execution.tiling import DEFAULT_TILE_SIZE
from denude.io.jobfile import read_batch_options
from denude.reports.json_output import batch_record

BatchOut = Annotated[Optional[str], typer.Option(metavar="DIR", help="Output folder (an existing batch of the same job is resumed).")]
BatchOverwrite = Annotated[bool, typer.Option("--overwrite", help="Replace an output folder that holds another job.")]
BatchDryRun = Annotated[bool, typer.Option("--dry-run", help="Validate and show the tile plan, write nothing.")]
Retries = Annotated[Optional[int], typer.Option("--retries", metavar="N", help="Extra attempts for a failing tile (default 0).")]
RetryFailed = Annotated[bool, typer.Option("--retry-failed", help="Run only the tiles that failed in an earlier run.")]
Merge = Annotated[bool, typer.Option("--merge", help="Also write one merged cloud-optimised GeoTIFF per layer.")]
Zones = Annotated[Optional[str], typer.Option(
    metavar="FILE", help="Zone polygons (watersheds): per-tile partial sums merged into zones_summary.csv, .gpkg and .summary.json.")]
ZonesLayer = Annotated[Optional[str], typer.Option(help="Layer of the zone file.")]
ZonesIdField = Annotated[Optional[str], typer.Option(help="Zone id field (default: feature ids as zone_id).")]


def _pick(flag, table: dict, key: str, default=None):
    """A flag's value over the job file's [batch] value (`is not None`: --workers 0 must win)."""
    if flag is not None and flag is not False:
        return flag
    return table.get(key, default)


@handle_user_errors
def batch_command(
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
    workers: o.BatchWorkers = None,
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
    out: BatchOut = None,
    overwrite: BatchOverwrite = False,
    dry_run: BatchDryRun = False,
    quiet: o.Quiet = False,
    tile_size: TileSize = None,
    scheduler: Scheduler = None,
    retries: Retries = None,
    retry_failed: RetryFailed = False,
    merge: Merge = False,
    zones: Zones = None,
    zones_layer: ZonesLayer = None,
    zones_id_field: ZonesIdField = None,
    units: o.Units = None,
    units_layer: o.UnitsLayer = None,
    units_id_field: o.UnitsIdField = None,
    points: o.Points = None,
    points_layer: o.PointsLayer = None,
    as_json: o.AsJson = False,
):
    """Map denudation rates tile by tile (resumable) on local worker processes or a Dask cluster."""
    values = dict(locals(), workers=None)          # --workers of a batch counts processes, not map threads
    settings = settings_from_options(job, values, out)
    table = read_batch_options(job) if job is not None else {}
    log = (lambda line: None) if quiet or as_json else (lambda line: typer.echo(line, err=True))
    with progress_callback("tiles", quiet or dry_run, rate_unit="tiles") as progress:
        summary = execution.run_batch(
            settings, progress=progress, tile_size=_pick(tile_size, table, "tile_size", DEFAULT_TILE_SIZE),
            workers=_pick(workers, table, "workers"), scheduler=_pick(scheduler, table, "scheduler"),
            retries=_pick(retries, table, "retries", 0), retry_failed=retry_failed, zones=_zone_spec(values, table),
            merge=bool(_pick(merge, table, "merge", False)), log=log, dry_run=dry_run)
    failed = _failure_message(summary)
    if as_json:
        record = batch_record(summary, dry_run=dry_run)
        return {**record, "error": failed} if failed else record
    if not quiet:
        _print_summary(summary, dry_run)
    if failed and not dry_run:
        typer.echo(f"denude: error: {failed}", err=True)
        raise typer.Exit(code=1)
    return None


#: [batch] keys / flags of the zone summary -> ZoneSpec field (the vector files resolved to absolute paths).
_ZONE_FIELDS = {"zones": "path", "zones_layer": "layer", "zones_id_field": "id_field", "units": "units",
                "units_layer": "units_layer", "units_id_field": "units_id_field", "points": "points",
                "points_layer": "points_layer"}
_ZONE_PATHS = ("zones", "units", "points")


def _zone_spec(values: dict, table: dict) -> "Optional[execution.ZoneSpec]":
    """The zone summary of a batch from the flags over the [batch] keys (None without zones)."""
    picked = {key: _pick(values.get(key), table, key) for key in _ZONE_FIELDS}
    if not picked["zones"]:
        return None
    for key in _ZONE_PATHS:
        if picked[key]:
            picked[key] = str(Path(picked[key]).resolve())
    return execution.ZoneSpec(**{_ZONE_FIELDS[key]: value for key, value in picked.items()})


def _print_summary(summary, dry_run: bool) -> None:
    """The terminal lines of a finished (or dry) batch run."""
    if dry_run:
        rows = -(-summary.grid.height // summary.tile_size)
        cols = -(-summary.grid.width // summary.tile_size)
        typer.echo(f"grid: {summary.grid.describe()}")
        typer.echo(f"tiles: {summary.tiles_total} ({rows} x {cols}) of {summary.tile_size} x {summary.tile_size} cells")
        typer.echo("dry run: all checks passed, nothing written")
        return
    typer.echo(f"{summary.out_dir}: {summary.tiles_total} tiles, {summary.tiles_run} computed, "
               f"{summary.tiles_skipped} already done, {len(summary.tiles_failed)} failed ({summary.engine})")
    for tile_id, message in summary.tiles_failed.items():
        typer.echo(f"  failed {tile_id}: {message}")
    for name in summary.outputs:
        typer.echo(f"  wrote {name}")
    typer.echo(CAUTION)


def _failure_message(summary) -> Optional[str]:
    if not summary.tiles_failed:
        return None
    first = next(iter(summary.tiles_failed.values()))
    return (f"{len(summary.tiles_failed)} of {summary.tiles_total} tiles failed (first: {one_line(first)}); "
            "fix the cause and run again with --retry-failed (errors in run.json)")


def register(app: typer.Typer) -> None:
    app.command("batch")(batch_command)
