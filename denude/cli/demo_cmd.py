"""`denude demo OUTDIR`: the whole chain on the bundled (invented) demo region.

Maps the Ketterwold Upland's rasters, then summarises the rates per watershed, per nested
sub-watershed, per planning unit and at the mapped sinkholes (with the sinkhole evaluation),
and calibrates the map against the invented water samples of the watersheds. With ``--tiles N`` the map
runs as a tiled batch (about N tiles) and the watershed summary is merged from per-tile
partial sums.
"""

# annotations stay objects (no `from __future__ import annotations`): typer reads the aliases

import math
from pathlib import Path
from typing import Annotated, Optional

import typer

from denude.cli.common import CAUTION, handle_user_errors
from denude.cli.options import CHEMISTRY_METAVAR, Workers
from denude.errors import InputError

DEMO_FOLDER = "demo_rasters"


def find_demo_data(explicit: Optional[Path] = None) -> Path:
    """The demo data folder: --data, ./demo_rasters, or the one beside the package source."""
    candidates = [explicit] if explicit else [Path.cwd() / DEMO_FOLDER, Path(__file__).resolve().parents[2] / DEMO_FOLDER]
    for folder in candidates:
        if folder is not None and (folder / "job.toml").is_file():
            return folder
    raise InputError(
        f"demo data not found (looked in {', '.join(str(c) for c in candidates)}); run from the "
        "source checkout or pass --data PATH/demo_rasters"
    )


def tile_size_for(width: int, height: int, tiles: int) -> int:
    """Tile edge (cells, a multiple of 16 as GeoTIFF tiling needs) that splits a width x height
    grid into about ``tiles`` square tiles."""
    per_side = max(1, math.ceil(math.sqrt(tiles)))
    return max(16, 16 * math.ceil(max(width, height) / per_side / 16))


def run_demo(out: Path, data: Path, chemistry: str = "white", overwrite: bool = False,
             tiles: int = 0, workers: Optional[int] = None, quiet: bool = False) -> list[str]:
    """Run the demo chain into ``out``; return lines describing what was written."""
    from denude.execution import resolve_grid, run_map
    from denude.execution import summarize_outputs
    from denude.io.jobfile import build_settings

    flags = {"out": str(out), "chemistry": chemistry, "overwrite": overwrite or None,
             "workers": None if tiles and tiles > 1 else workers}
    settings = build_settings(flags, job_file=data / "job.toml")
    watersheds = data / "watersheds.gpkg"
    lines = []
    if tiles and tiles > 1:
        from denude.execution import ZoneSpec, run_batch

        grid = resolve_grid(settings)
        size = tile_size_for(grid.width, grid.height, tiles)
        batch = run_batch(settings, tile_size=size, workers=workers,
                          zones=ZoneSpec(str(watersheds), "watersheds", "watershed_id"))
        if not batch.ok:
            failed = "; ".join(f"{k}: {v}" for k, v in batch.tiles_failed.items())
            raise InputError(f"demo batch: {len(batch.tiles_failed)} tile(s) failed ({failed})")
        lines.append(f"batch: {batch.tiles_total} tiles of {size} cells into {out} ({batch.engine})")
        lines += [f"  {name}" for name in batch.outputs]
        return lines

    summary = run_map(settings)
    lines.append(f"map: {summary.grid.width} x {summary.grid.height} cells into {out}")
    table = out / "watershed_summary.gpkg"
    summarize_outputs(out, watersheds, layer="watersheds", id_field="watershed_id",
                      units_path=data / "planning_units.gpkg", units_layer="planning_units",
                      units_id_field="unit_id", points_path=data / "sinkholes.gpkg",
                      points_layer="sinkholes", out_path=table, overwrite=overwrite)
    lines.append(f"summaries: {table} (layers watersheds, planning_units, sinkholes) and CSV twins")
    nested = out / "subwatershed_summary.gpkg"
    summarize_outputs(out, watersheds, layer="subwatersheds", id_field="watershed_id",
                      out_path=nested, overwrite=overwrite)
    lines.append(f"nested sub-watersheds: {nested}")
    from denude.execution import run_calibration

    calibration = run_calibration(out, data / "water_samples.csv", watersheds, out / "calibration",
                                  layer="watersheds", id_field="watershed_id", overwrite=overwrite)
    lines.append(f"calibration against {calibration['samples']['rows']} invented water samples: {out / 'calibration'}")

    lines += _demo_scenario_and_bands(settings, out, data, overwrite)

    from denude.reports.html_report import build_report

    lines.append(f"report: {build_report(out, out / 'report.html', summary=table).html}")
    return lines


#: The demo's warming scenario: +2 degrees C and 10 % less precipitation. It is mapped from the
#: demo's water balance (precipitation and AET rasters, P - AET = the runoff raster of the
#: baseline), so runoff = 0.9 P - AET falls by more than 10 %.
DEMO_SCENARIO = {"temperature_delta_c": 2.0, "precipitation_factor": 0.9}
#: Draws of the demo's uncertainty bands (few, so the demo stays quick).
DEMO_DRAWS = 32


def _demo_scenario_and_bands(settings, out: Path, data: Path, overwrite: bool) -> list[str]:
    """The warming scenario mapped and compared with the baseline in ``out``, and the
    uncertainty bands of the baseline from the job file's [uncertainty] section."""
    from denude.core.scenario import Scenario
    from denude.execution import ZoneSpec, run_compare, run_map, run_uncertainty
    from denude.io.uncertainty_spec import read_uncertainty

    zones = ZoneSpec(str((data / "watersheds.gpkg").resolve()), "watersheds", "watershed_id")
    warm_dir = out / "scenario_warming"
    run_map(settings.replace(out=str(warm_dir), runoff=None, precipitation=str(data / "precipitation_mm_per_yr.tif"),
                             aet=str(data / "aet_mm_per_yr.tif"), scenario=Scenario(**DEMO_SCENARIO)))
    compare_dir = out / "comparison_warming"
    run_compare(out, warm_dir, compare_dir, zones, overwrite=overwrite)
    bands_dir = out / "uncertainty"
    run_uncertainty(settings.replace(out=str(bands_dir)), read_uncertainty(data / "job.toml"), DEMO_DRAWS, 1, zones)
    return [f"warming scenario (+2 C, precipitation x 0.9): {warm_dir}",
            f"comparison with the baseline: {compare_dir} (difference and ratio rasters, zones_change.csv)",
            f"uncertainty bands ({DEMO_DRAWS} draws): {bands_dir} (p05/p50/p95 rasters, zones_uncertainty.csv)"]


def demo(
    out: Annotated[Path, typer.Argument(help="Output folder (refused if it exists, unless --overwrite).")],
    tiles: Annotated[int, typer.Option(help="Run as a tiled batch of about this many tiles (0 = one raster job).", min=0)] = 0,
    chemistry: Annotated[str, typer.Option(metavar=CHEMISTRY_METAVAR, help="white (closed form) or speciated.")] = "white",
    workers: Workers = None,
    data: Annotated[Optional[Path], typer.Option(help="Demo data folder (default: demo_rasters/ of the checkout).")] = None,
    overwrite: Annotated[bool, typer.Option(help="Replace an existing output folder.")] = False,
    quiet: Annotated[bool, typer.Option("--quiet", "-q", help="Print nothing but errors.")] = False,
):
    """Run the whole chain on the bundled demo region (all data invented)."""
    folder = find_demo_data(data)
    lines = run_demo(out, folder, chemistry=chemistry, overwrite=overwrite, tiles=tiles,
                     workers=workers, quiet=quiet)
    if not quiet:
        typer.echo("demo region: the Ketterwold Upland (invented data)")
        for line in lines:
            typer.echo(line)
        typer.echo(CAUTION)


def register(app: typer.Typer) -> None:
    app.command("demo")(handle_user_errors(demo))
