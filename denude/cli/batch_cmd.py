"""`denude batch`: the `denude map` job split into tiles, on a local process pool or a Dask cluster.

Takes every `denude map` option (each raster input may also be a folder, a quoted glob, a
file list or a VRT of tiles) plus the batch options below. Running the same command again
resumes: tiles already done and verified are skipped. Exit 0 when every tile is done, 1 on a
user error or when any tile failed (details in OUTDIR/run.json and OUTDIR/manifest.json).

Job files may hold a ``[batch]`` table: ``tile_size``, ``workers``, ``scheduler``, ``retries``,
``merge``, ``zones``, ``zones_layer``, ``zones_id_field`` (flags override it).
"""

# annotations stay objects here: the shared option signature is copied from `denude map`

import difflib
import inspect
import os
from pathlib import Path
from typing import Annotated, Optional

import typer

from denude.cli.common import CAUTION, handle_user_errors, one_line, progress_callback
from denude.cli.map_cmd import map_options, settings_from_options
from denude.errors import JobFileError
from denude.execution import DEFAULT_TILE_SIZE

BATCH_KEYS = ("tile_size", "workers", "scheduler", "retries", "merge", "zones", "zones_layer", "zones_id_field")

BATCH_EXTRA = {
    "out": (Annotated[Optional[str], typer.Option(help="Output folder (an existing batch of the same job is resumed).")], None),
    "overwrite": (Annotated[bool, typer.Option("--overwrite", help="Replace an output folder that holds another job.")], False),
    "dry_run": (Annotated[bool, typer.Option("--dry-run", help="Validate and show the tile plan, write nothing.")], False),
    "quiet": (Annotated[bool, typer.Option("--quiet", "-q", help="No progress bar or summary.")], False),
    "tile_size": (Annotated[Optional[int], typer.Option("--tile-size", metavar="CELLS", help=f"Batch tile side, cells, a multiple of 16 (default {DEFAULT_TILE_SIZE}).")], None),
    "scheduler": (Annotated[Optional[str], typer.Option("--scheduler", metavar="ADDRESS", help="Run on an existing Dask cluster, e.g. tcp://HOST:8786.")], None),
    "retries": (Annotated[Optional[int], typer.Option("--retries", metavar="N", help="Extra attempts for a failing tile (default 0).")], None),
    "retry_failed": (Annotated[bool, typer.Option("--retry-failed", help="Run only the tiles that failed in an earlier run.")], False),
    "merge": (Annotated[bool, typer.Option("--merge", help="Also write one merged cloud-optimised GeoTIFF per layer.")], False),
    "zones": (Annotated[Optional[str], typer.Option(help="Zone polygons (watersheds): per-tile partial sums merged into zones_summary.csv, .gpkg and .summary.json.")], None),
    "zones_layer": (Annotated[Optional[str], typer.Option(help="Layer of the zone file.")], None),
    "zones_id_field": (Annotated[Optional[str], typer.Option(help="Zone id field (default: feature ids as zone_id).")], None),
}

WORKERS_OPTION = Annotated[Optional[int], typer.Option("--workers", metavar="N", help="Local worker processes (default: cores available; 0 = in this process).")]


def _signature() -> inspect.Signature:
    params = []
    for p in inspect.signature(map_options).parameters.values():
        if p.name == "workers":
            p = p.replace(annotation=WORKERS_OPTION, default=None)
        params.append(p)
    for name, (annotation, default) in BATCH_EXTRA.items():
        params.append(inspect.Parameter(name, inspect.Parameter.KEYWORD_ONLY, default=default, annotation=annotation))
    return inspect.Signature(params)


def _resolve_value(name: str, value, base: Path):
    """A job-file value with a relative path made absolute against the job file's folder."""
    from denude.io.jobfile import PATH_FIELDS, VALUE_FIELDS

    if not isinstance(value, str) or name not in VALUE_FIELDS + PATH_FIELDS:
        return value
    text = value.strip()
    if name in VALUE_FIELDS:
        try:
            float(text)
            return text
        except ValueError:
            pass
        if name == "pco2" and text.lower() in ("from-aet", "aet", "brook1983"):
            return text
    if text.startswith("/vsi"):
        return text
    path = Path(os.path.expanduser(text))
    return str(path if path.is_absolute() else base / path)


def read_batch_job(job: Path):
    """(map fields or None, [batch] table) of a job file. Without a [batch] table the map
    fields are None and the file goes to `build_settings` unchanged; with one, the other
    tables are flattened here (paths resolved against the file's folder)."""
    from denude.io.jobfile import OTHER_SECTIONS, SECTIONS, load_toml

    data = load_toml(job)
    batch = data.pop("batch", None)
    if batch is None:
        return None, {}
    if not isinstance(batch, dict):
        raise JobFileError(f"job file {job}: 'batch' must be a [batch] table")
    for key in batch:
        if key not in BATCH_KEYS:
            close = difflib.get_close_matches(key, BATCH_KEYS, n=1)
            hint = f"did you mean {close[0]!r}?" if close else f"valid keys: {', '.join(BATCH_KEYS)}"
            raise JobFileError(f"job file {job}: unknown key {key!r} in [batch]; {hint}")
    base = job.resolve().parent
    fields = {}
    for section, table in data.items():
        if section in OTHER_SECTIONS:  # parsed in io/uncertainty_spec.py
            if section == "scenario":
                from denude.io.uncertainty_spec import parse_scenario

                fields["scenario"] = parse_scenario(table, job)
            continue
        if section not in SECTIONS or not isinstance(table, dict):
            close = difflib.get_close_matches(section, list(SECTIONS) + ["batch"], n=1)
            hint = f"did you mean [{close[0]}]?" if close else "use [inputs], [grid], [run], [hazard] or [batch]"
            raise JobFileError(f"job file {job}: unknown section or key {section!r}; {hint}")
        for key, value in table.items():
            if key not in SECTIONS[section]:
                close = difflib.get_close_matches(key, list(SECTIONS[section]), n=1)
                hint = f"did you mean {close[0]!r}?" if close else f"valid keys: {', '.join(SECTIONS[section])}"
                raise JobFileError(f"job file {job}: unknown key {key!r} in [{section}]; {hint}")
            name = SECTIONS[section][key]
            fields[name] = _resolve_value(name, value, base)
    if isinstance(batch.get("zones"), str):
        batch["zones"] = _resolve_value("out", batch["zones"], base)
    return fields, batch


@handle_user_errors
def _batch_body(**kwargs):
    from denude.execution import ZoneSpec, run_batch

    own = {k: kwargs.pop(k) for k in ("dry_run", "quiet", "tile_size", "scheduler", "retries", "retry_failed",
                                       "merge", "zones", "zones_layer", "zones_id_field", "workers")}
    job = kwargs.pop("job", None)
    batch = {}
    if job is not None:
        fields, batch = read_batch_job(Path(job))
        if fields is not None:
            from denude.io.jobfile import build_settings

            flags = {k: v for k, v in kwargs.items() if v is not None and v is not False}
            for key in ("grid_bounds", "grid_resolution"):
                if isinstance(flags.get(key), str):
                    flags[key] = [float(v) for v in flags[key].replace(",", " ").split()]
            settings = build_settings({**fields, **flags}).replace(job_file=str(Path(job).resolve()))
        else:
            settings = settings_from_options(job, **kwargs)
    else:
        settings = settings_from_options(None, **kwargs)
    # `is not` rather than `in (None, False)`: 0 == False, and --workers 0 must win over the file
    pick = lambda name, default=None: own[name] if own.get(name) is not None and own.get(name) is not False else batch.get(name, default)  # noqa: E731
    tile_size = pick("tile_size", DEFAULT_TILE_SIZE)
    zones_path = pick("zones")
    zones = ZoneSpec(str(Path(zones_path).resolve()), pick("zones_layer"), pick("zones_id_field")) if zones_path else None
    scheduler = pick("scheduler")
    quiet = own["quiet"]
    log = (lambda line: None) if quiet else (lambda line: typer.echo(line, err=True))
    args = dict(tile_size=tile_size, workers=pick("workers"), scheduler=scheduler, retries=pick("retries", 0),
                retry_failed=own["retry_failed"], zones=zones, merge=bool(pick("merge", False)), log=log,
                dry_run=own["dry_run"])
    with progress_callback("tiles", quiet or own["dry_run"], rate_unit="tiles") as progress:
        summary = run_batch(settings, progress=progress, **args)
    if own["dry_run"]:
        if not quiet:
            rows = -(-summary.grid.height // summary.tile_size)
            cols = -(-summary.grid.width // summary.tile_size)
            typer.echo(f"grid: {summary.grid.describe()}")
            typer.echo(f"tiles: {summary.tiles_total} ({rows} x {cols}) of {summary.tile_size} x {summary.tile_size} cells")
            typer.echo("dry run: all checks passed, nothing written")
        return
    if not quiet:
        typer.echo(f"{summary.out_dir}: {summary.tiles_total} tiles, {summary.tiles_run} computed, "
                   f"{summary.tiles_skipped} already done, {len(summary.tiles_failed)} failed ({summary.engine})")
        for tile_id, message in summary.tiles_failed.items():
            typer.echo(f"  failed {tile_id}: {message}")
        for name in summary.outputs:
            typer.echo(f"  wrote {name}")
        typer.echo(CAUTION)
    if summary.tiles_failed:
        first_id, first = next(iter(summary.tiles_failed.items()))
        typer.echo(
            f"denude: error: {len(summary.tiles_failed)} of {summary.tiles_total} tiles failed (first: {one_line(first)}); "
            "fix the cause and run again with --retry-failed (errors in run.json)", err=True)
        raise typer.Exit(code=1)


def batch_command(**kwargs):
    """Map denudation rates tile by tile (resumable) on local worker processes or a Dask cluster."""
    return _batch_body(**kwargs)


batch_command.__signature__ = _signature()


def register(app: typer.Typer) -> None:
    app.command("batch")(batch_command)
