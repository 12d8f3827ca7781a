"""`denude summarize`: per-zone summaries of a `denude map` output folder."""

# annotations stay objects (no `from __future__ import annotations`): typer reads the aliases

from pathlib import Path
from typing import Annotated, Optional

import typer

from denude.cli import options as o
from denude.cli.common import CAUTION, handle_user_errors, progress_callback
import denude.execution as execution   # resolved on use: other commands do not load the summaries
from denude.reports.json_output import summarize_record


def summarize(
    outdir: Annotated[Path, typer.Argument(help="Output folder of 'denude map'.", exists=True, file_okay=False)],
    zones: Annotated[Path, typer.Option(help="Zone polygons (watersheds; may overlap or nest).", exists=True, dir_okay=False)],
    out: Annotated[Path, typer.Option(help="Output GeoPackage (.gpkg); a CSV twin and <stem>.summary.json are written beside it.", dir_okay=False)],
    layer: Annotated[Optional[str], typer.Option(help="Layer of the zone file (needed if it has several).")] = None,
    id_field: Annotated[Optional[str], typer.Option(help="Zone id field (default: feature ids as zone_id).")] = None,
    units: o.Units = None,
    units_layer: o.UnitsLayer = None,
    units_id_field: o.UnitsIdField = None,
    points: o.Points = None,
    points_layer: o.PointsLayer = None,
    breaks_from_record: Annotated[bool, typer.Option(help="With --points: also set hazard class breaks from the sinkhole record (rate quantiles merged until density rises), reported in the sidecar; the map is unchanged.")] = False,
    workers: Annotated[Optional[int], typer.Option(
        "--workers", metavar="N", min=1,
        help="Parallel workers (default: from the grid size and the cores available; 1 on small grids).")] = None,
    highest_class_min_share: Annotated[float, typer.Option(min=0.0, max=1.0, help="Share of a zone (0-1) a hazard class must cover to be its hazard_highest_name.")] = 0.01,
    overwrite: Annotated[bool, typer.Option(help="Replace existing outputs.")] = False,
    quiet: Annotated[bool, typer.Option("--quiet", "-q", help="No progress bar and no summary lines.")] = False,
    as_json: o.AsJson = False,
):
    """Per-zone denudation summaries (mm/kyr, km2, m3/yr, t/yr), planning units and sinkholes."""
    with progress_callback("summarising rows", quiet) as progress:
        meta = execution.summarize_outputs(
            outdir, zones, layer=layer, id_field=id_field, units_path=units, units_layer=units_layer,
            units_id_field=units_id_field, points_path=points, points_layer=points_layer,
            out_path=out, overwrite=overwrite, progress=progress, workers=workers,
            breaks_from_record=breaks_from_record,
            highest_class_min_share=highest_class_min_share,
        )
    if as_json:
        return summarize_record(meta, out)
    if not quiet:
        layers = ", ".join(f"{name} ({count})" for name, count in meta["outputs"]["layers"].items())
        typer.echo(f"wrote {out}: {layers}")
        typer.echo(f"cell areas: {meta['method']['cell_area']}")
        evaluation = meta.get("sinkhole_evaluation")
        if evaluation:
            dens = ", ".join(f"{c['name']} {c['density_per_km2']:.3g}" for c in evaluation["classes"])
            typer.echo(f"sinkholes per km2 by class: {dens}; ROC AUC of the rate {evaluation['auc']:.3f}")
            if "record_breaks" in evaluation:
                typer.echo(f"breaks from the record: {evaluation['record_breaks']['job_file']}")
    typer.echo(CAUTION)
    return None


def register(app: typer.Typer) -> None:
    app.command("summarize")(handle_user_errors(summarize))
