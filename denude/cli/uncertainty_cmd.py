"""`denude uncertainty --job JOB.toml --draws N --seed S --out DIR [--zones ZONES.gpkg]`.

Monte Carlo bands of the rates from the input errors in the job file's ``[uncertainty]``
section (and its ``[scenario]``, if any): p05/p50/p95 rasters of the denudation rate and the
CO2 drawdown, ``run.json``, and with ``--zones`` a per-zone table of quantiles and variance shares.
"""

from __future__ import annotations

from pathlib import Path
from typing import Annotated, Optional

import typer

from denude.cli.common import CAUTION, handle_user_errors, progress_callback
from denude.cli.options import Scheduler
from denude.errors import JobFileError


def uncertainty(
    job: Annotated[Path, typer.Option("--job", exists=True, dir_okay=False, help="TOML job file with an [uncertainty] section.")],
    out: Annotated[Path, typer.Option("--out", help="Output folder (refused if it exists, unless --overwrite).")],
    draws: Annotated[int, typer.Option("--draws", min=2, help="Number of Monte Carlo draws, e.g. 64.")] = 64,
    seed: Annotated[int, typer.Option("--seed", min=0, help="Random seed: the same seed gives the same files.")] = 0,
    zones: Annotated[Optional[Path], typer.Option("--zones", exists=True, dir_okay=False, help="Zone polygons (watersheds) for a per-zone table.")] = None,
    zones_layer: Annotated[Optional[str], typer.Option(help="Layer of the zone file.")] = None,
    zones_id_field: Annotated[Optional[str], typer.Option(help="Zone id field (default: feature ids as zone_id).")] = None,
    workers: Annotated[Optional[int], typer.Option("--workers", min=0, max=256, help=(
        "Parallel workers: threads, or with --tile-size local processes (0: tiles in this process); "
        "default the cores available."))] = None,
    tile_size: Annotated[Optional[int], typer.Option("--tile-size", metavar="CELLS", help=(
        "Split the target grid into tiles of this side [cells, a multiple of 16], each a task on local "
        "processes or --scheduler; writes tiles/, one VRT per band and the merged GeoTIFFs."))] = None,
    scheduler: Scheduler = None,
    no_merge: Annotated[bool, typer.Option("--no-merge", help="With --tile-size: keep only the band VRTs over tiles/, no merged GeoTIFFs.")] = False,
    overwrite: Annotated[bool, typer.Option("--overwrite", help="Replace an existing output folder.")] = False,
    quiet: Annotated[bool, typer.Option("--quiet", "-q", help="No progress bar or summary.")] = False,
):
    """Uncertainty bands (p05/p50/p95) of the rates from the input errors of the job file's uncertainty section."""
    from denude.execution import ZoneSpec, run_uncertainty
    from denude.io.jobfile import build_settings
    from denude.io.uncertainty_spec import read_uncertainty

    spec = read_uncertainty(job)
    if spec == type(spec)():
        raise JobFileError(f"job file {job}: no input errors under [uncertainty]; add e.g. runoff_sigma_ln = 0.2")
    # without tiles the workers are threads (settings); with tiles, processes (the run's own
    # argument, where 0 means this process; the run refuses 0 without tiles)
    as_threads = tile_size is None and workers != 0
    settings = build_settings({"out": str(out), "workers": workers if as_threads else None,
                               "overwrite": overwrite or None}, job_file=job)
    zone_spec = ZoneSpec(str(zones.resolve()), zones_layer, zones_id_field) if zones is not None else None
    with progress_callback("tiles" if tile_size else "windows", quiet) as progress:
        summary = run_uncertainty(settings, spec, draws, seed, zone_spec, progress=progress, tile_size=tile_size,
                                  scheduler=scheduler, merge=not no_merge, workers=None if as_threads else workers,
                                  note=None if quiet else typer.echo)
    if not quiet:
        typer.echo(f"{summary.out_dir}: {summary.draws} draws (seed {summary.seed}), "
                   f"{summary.counts['computed']} cells computed")
        for name in summary.outputs:
            typer.echo(f"  wrote {name}")
        typer.echo("The bands cover only the input errors listed under [uncertainty]; not the model's structure or kinetics.")
        typer.echo(CAUTION)


def register(app: typer.Typer) -> None:
    app.command("uncertainty")(handle_user_errors(uncertainty))
