"""`denude summarize`: per-zone summaries of a `denude map` output folder."""

from __future__ import annotations

from pathlib import Path
from typing import Annotated, Optional

import typer

from denude.cli.common import CAUTION, handle_user_errors, progress_callback


def summarize(
    outdir: Annotated[Path, typer.Argument(help="Output folder of 'denude map'.", exists=True, file_okay=False)],
    zones: Annotated[Path, typer.Option(help="Zone polygons (watersheds; may overlap or nest).", exists=True, dir_okay=False)],
    out: Annotated[Path, typer.Option(help="Output GeoPackage (.gpkg); a CSV twin and <stem>.summary.json are written beside it.", dir_okay=False)],
    layer: Annotated[Optional[str], typer.Option(help="Layer of the zone file (needed if it has several).")] = None,
    id_field: Annotated[Optional[str], typer.Option(help="Zone id field (default: feature ids as zone_id).")] = None,
    units: Annotated[Optional[Path], typer.Option(help="Planning-unit polygons (e.g. parcels): written as layer planning_units.", exists=True, dir_okay=False)] = None,
    units_layer: Annotated[Optional[str], typer.Option(help="Layer of the planning-unit file.")] = None,
    units_id_field: Annotated[Optional[str], typer.Option(help="Planning-unit id field.")] = None,
    points: Annotated[Optional[Path], typer.Option(help="Sinkhole points: sampled and counted per zone (layer sinkholes).", exists=True, dir_okay=False)] = None,
    points_layer: Annotated[Optional[str], typer.Option(help="Layer of the sinkhole file.")] = None,
    workers: Annotated[Optional[int], typer.Option(min=1, help="Processes (default: 1 for small grids or fewer than 4 CPUs, else half the CPUs, at most 4).")] = None,
    highest_class_min_share: Annotated[float, typer.Option(min=0.0, max=1.0, help="Share of a zone (0-1) a hazard class must cover to be its hazard_highest_name.")] = 0.01,
    overwrite: Annotated[bool, typer.Option(help="Replace existing outputs.")] = False,
    quiet: Annotated[bool, typer.Option("--quiet", "-q", help="No progress bar and no summary lines.")] = False,
):
    """Per-zone denudation summaries (mm/kyr, km2, m3/yr, t/yr), planning units and sinkholes."""
    from denude.execution import summarize_outputs

    with progress_callback("summarising rows", quiet) as progress:
        meta = summarize_outputs(
            outdir, zones, layer=layer, id_field=id_field, units_path=units, units_layer=units_layer,
            units_id_field=units_id_field, points_path=points, points_layer=points_layer,
            out_path=out, overwrite=overwrite, progress=progress, workers=workers,
            highest_class_min_share=highest_class_min_share,
        )
    if not quiet:
        layers = ", ".join(f"{name} ({count})" for name, count in meta["outputs"]["layers"].items())
        typer.echo(f"wrote {out}: {layers}")
        repaired = meta["zones"]["repaired_geometries"] + meta.get("planning_units", {}).get("repaired_geometries", 0)
        if repaired:
            typer.echo(f"repaired {repaired} invalid geometries (shapely.make_valid)")
        typer.echo(f"cell areas: {meta['method']['cell_area']}")
    typer.echo(CAUTION)


def register(app: typer.Typer) -> None:
    app.command("summarize")(handle_user_errors(summarize))
