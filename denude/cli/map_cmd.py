"""`denude map`: maps of maximum denudation rate (mm/kyr) and companions from rasters.

Each input is a raster path or a number. Settings may come from a TOML job file
(``--job job.toml``); flags override the file. Exit 0 on success, 1 on a user error.
"""

# annotations stay objects here: the shared option signature is copied between commands

import inspect
from pathlib import Path
from typing import Annotated, Optional

import typer

from denude.cli.common import CAUTION, handle_user_errors, progress_callback
from denude.execution import inspect_job, limit_malloc_arenas, run_map
from denude.io.jobfile import LAYERS, build_settings
from denude.reports.provenance import check_lines, summary_lines

VALUE_HELP = "raster path or number"


def settings_from_options(job: Optional[Path], **flags):
    """MapSettings from the command-line options (None = not given) and an optional job file."""
    grid_bounds = flags.pop("grid_bounds", None)
    if grid_bounds is not None:
        flags["grid_bounds"] = [float(v) for v in grid_bounds.replace(",", " ").split()]
    grid_res = flags.pop("grid_resolution", None)
    if grid_res is not None:
        flags["grid_resolution"] = [float(v) for v in grid_res.replace(",", " ").split()]
    for key in ("overwrite",):
        if flags.get(key) is False:
            flags[key] = None  # an unset boolean flag must not override the job file
    return build_settings({k: v for k, v in flags.items()}, job_file=job)


def map_options(
    lithology: Annotated[Optional[str], typer.Option(help="Lithology codes raster (categorical).")] = None,
    rocks: Annotated[Optional[str], typer.Option(help="Rock table CSV (code,name,mineral,density_g_cm3,purity); built-in table when omitted.")] = None,
    runoff: Annotated[Optional[str], typer.Option(help=f"Runoff, mm/yr ({VALUE_HELP}).")] = None,
    precipitation: Annotated[Optional[str], typer.Option(help=f"Precipitation, mm/yr ({VALUE_HELP}); runoff = P - AET.")] = None,
    aet: Annotated[Optional[str], typer.Option(help=f"Actual evapotranspiration, mm/yr ({VALUE_HELP}).")] = None,
    pco2: Annotated[Optional[str], typer.Option(help=f"Soil PCO2 ({VALUE_HELP}), or 'from-aet' for Brook et al. (1983).")] = None,
    pco2_units: Annotated[Optional[str], typer.Option(help="Units of --pco2: atm, ppmv or log10atm.")] = None,
    elevation: Annotated[Optional[str], typer.Option(help=f"Elevation, m ({VALUE_HELP}); converts ppmv to atm.")] = None,
    air_pressure_atm: Annotated[Optional[float], typer.Option("--air-pressure-atm", "--air-pressure", help="Air pressure, atm, for ppmv PCO2 (default 1).")] = None,
    temperature: Annotated[Optional[str], typer.Option(help=f"Temperature, degrees C ({VALUE_HELP}).")] = None,
    soluble_fraction: Annotated[Optional[str], typer.Option(help=f"Soluble-area fraction 0-1 ({VALUE_HELP}); default 1.")] = None,
    grid_like: Annotated[Optional[str], typer.Option(help="Use this raster's grid as the target grid.")] = None,
    grid_crs: Annotated[Optional[str], typer.Option(help="Target grid CRS, e.g. EPSG:3035.")] = None,
    grid_resolution: Annotated[Optional[str], typer.Option(help="Target cell size in CRS units: 'R' or 'X Y'.")] = None,
    grid_bounds: Annotated[Optional[str], typer.Option(help="Target bounds 'LEFT BOTTOM RIGHT TOP' in CRS units (default: the lithology extent, snapped outward to whole cells).")] = None,
    chemistry: Annotated[Optional[str], typer.Option(help="white (closed form) or speciated.")] = None,
    workers: Annotated[Optional[int], typer.Option(help="Worker threads (default 2).")] = None,
    block_size: Annotated[Optional[int], typer.Option(help="Block and output tile size, cells (default 512).")] = None,
    gdal_cache_mb: Annotated[Optional[int], typer.Option(help="GDAL block cache, MB (default 128).")] = None,
    layers: Annotated[Optional[str], typer.Option(help=f"Comma-separated output layers (default all): {', '.join(LAYERS)}.")] = None,
    layout: Annotated[Optional[str], typer.Option(help="auto (COG up to 8192 x 8192 cells, else tiled BigTIFF), cog or tiled.")] = None,
    compress: Annotated[Optional[str], typer.Option(help="deflate or zstd.")] = None,
    lithology_resampling: Annotated[Optional[str], typer.Option(help="auto, nearest or mode (bilinear is refused).")] = None,
    continuous_resampling: Annotated[Optional[str], typer.Option(help="auto, bilinear, cubic, average or nearest.")] = None,
    negative_runoff: Annotated[Optional[str], typer.Option(help="Negative runoff cells: error (default) or zero (taken as 0 mm/yr, counted in a warning).")] = None,
    job: Annotated[Optional[Path], typer.Option(help="TOML job file with the same settings; flags override it.")] = None,
):
    """Shared options of `denude map` and `denude check` (signature only)."""


def _signature_with(extra: dict) -> inspect.Signature:
    params = list(inspect.signature(map_options).parameters.values())
    for name, (annotation, default) in extra.items():
        params.append(inspect.Parameter(name, inspect.Parameter.KEYWORD_ONLY, default=default, annotation=annotation))
    return inspect.Signature(params)


def _split(kwargs: dict, keys) -> tuple[dict, dict]:
    own = {k: kwargs.pop(k) for k in keys if k in kwargs}
    return own, kwargs


MAP_EXTRA = {
    "out": (Annotated[Optional[str], typer.Option(help="Output folder (must not exist unless --overwrite).")], None),
    "overwrite": (Annotated[bool, typer.Option("--overwrite", help="Replace an existing output folder.")], False),
    "dry_run": (Annotated[bool, typer.Option("--dry-run", help="Validate everything, write nothing.")], False),
    "quiet": (Annotated[bool, typer.Option("--quiet", "-q", help="No progress bar or summary.")], False),
}


@handle_user_errors
def _map_body(**kwargs):
    own, flags = _split(kwargs, ("dry_run", "quiet"))
    job = flags.pop("job", None)
    settings = settings_from_options(job, **flags)
    if own["dry_run"]:
        report = inspect_job(settings, for_output=True)
        if not own["quiet"]:
            for line in check_lines(report):
                typer.echo(line)
            typer.echo("dry run: all checks passed, nothing written")
        return
    limit_malloc_arenas()
    with progress_callback("blocks", own["quiet"]) as progress:
        summary = run_map(settings, progress=progress)
    if not own["quiet"]:
        for line in summary_lines(summary):
            typer.echo(line)
        typer.echo(CAUTION)


def map_command(**kwargs):
    """Map maximum chemical denudation rates (mm/kyr) from runoff, soil CO2, temperature and lithology rasters."""
    return _map_body(**kwargs)


map_command.__signature__ = _signature_with(MAP_EXTRA)


def register(app: typer.Typer) -> None:
    app.command("map")(map_command)
