"""`denude batch`: a raster job split into tiles of the target grid, resumable, on a local
process pool or a Dask cluster.

``run_batch(settings, tile_size, ...)`` builds a ``BatchJob`` and runs its three steps:

- ``plan``: resolve mosaic inputs (folders, globs, lists of tiles) into VRTs under
  ``OUTDIR/inputs/``, validate the job with the rule book of `denude map`, split the target
  grid into tiles (``tiling.make_tiles``) and pick the tiles to run from the manifest
  (``manifest.json``: each tile's state and checksums, so a rerun skips verified tiles);
- ``run_tiles``: ``batch_tile.run_tile`` once per tile on an engine (``engines``); each tile
  writes ``OUTDIR/tiles/<tile id>/`` under a staging name and renames it when complete;
- ``finish``: one VRT per layer, the rock table, merged GeoTIFFs (``merge=True``), the zone
  summary (``zones=``, the files of `denude summarize`) and ``run.json`` (``batch_outputs``).

Values equal a whole-region `denude map` run bit for bit: each cell is computed by the same
per-window step from the same inputs whatever window holds it.
"""

from __future__ import annotations

import fcntl
import json
import os
import tempfile
import time
from dataclasses import dataclass, field
from pathlib import Path
from typing import Callable

from pyproj import CRS as ProjCRS

from denude.errors import BatchError, DenudeError, InputError, OutputError, TileError, one_line  # noqa: F401
from denude.execution import engines as _engines
from denude.execution.batch_outputs import (
    TILES_DIR, ZONES_GPKG, layer_vrts, merge_layers, write_rock_table_copy, zone_summary,
)
from denude.execution.batch_tile import (  # noqa: F401  (names of the pre-split module)
    ROCKS_CSV, ZONES_PARTIAL, TileTask, ZoneSpec, polygons_on_grid, run_tile, tile_gdal_env,
    zone_geometries,
)
from denude.execution.plan import grid_source, raster_roles
from denude.execution.tiling import Tile, check_tile_size, make_tiles
from denude.core.kernel import BlockCounts
from denude.execution.validation import refuse_inputs_inside, validate_job, warn_about_counts
from denude.execution.manifest import (
    MANIFEST_NAME, InputStamps, Manifest, job_key, tile_input_sha256, verify_outputs,
)
from denude.io.grid import Grid
from denude.io.jobfile import MapSettings
from denude.io.mosaic import mosaic_kind, write_mosaic_vrt
from denude.io.outdir import check_new_folder, discard_folder, remove_dead_staging, remove_path
from denude.io.rasters import choose_layout
from denude.io.vectors import read_points
from denude.registry import INPUT_ROLES, OUTPUT_LAYERS, PCO2_FROM_AET, ZONE_LAYERS
from denude.reports.run_record import RUN_RECORD, HashJob, hashed_paths, run_record, write_run_record

INPUTS_DIR = "inputs"
ZONES_SUMMARY = "zones_summary.csv"
ZONES_SIDECAR = "zones_summary.summary.json"
RUN_JSON = RUN_RECORD
#: Fields of MapSettings that may hold a raster input (path or mosaic spec).
RASTER_FIELDS = tuple(INPUT_ROLES) + ("grid_like",)
#: Seconds between manifest rewrites while tiles finish (always rewritten at the end).
MANIFEST_INTERVAL_S = 0.2
LOCK_NAME = ".batch.lock"


@dataclass
class BatchSummary:
    """What a `denude batch` run did and produced."""

    out_dir: str
    grid: Grid
    tile_size: int
    tiles_total: int
    tiles_run: int                      # tiles attempted in this run
    tiles_skipped: int                  # already done and verified
    tiles_failed: dict                  # tile id -> one-line error
    outputs: list                       # files written into OUTDIR (VRTs, merged COGs, summaries)
    engine: str
    dashboard_link: str | None
    counts: dict
    wall_time_s: float
    redone_corrupt: list = field(default_factory=list)

    @property
    def ok(self) -> bool:
        return not self.tiles_failed



def _check_inputs_outside(settings: MapSettings, out: Path, zones: ZoneSpec | None) -> None:
    paths = {f: getattr(settings, f) for f in RASTER_FIELDS}
    paths["rocks"] = settings.rocks
    paths["job file"] = settings.job_file
    if zones is not None:
        paths.update({"zones": zones.path, "planning units": zones.units, "sinkholes": zones.points})
    refuse_inputs_inside(paths, out, "batch output folder")


def _prepare_out_dir(out: Path, key: str, overwrite: bool) -> Manifest | None:
    """Check the output folder: new, empty, or holding a manifest of the same job (resume).
    Another job's folder is an error unless ``overwrite`` (then it is removed)."""
    check_new_folder(out, overwrite=True)
    if not out.exists():
        return None
    manifest = None
    try:
        manifest = Manifest.load(out)
    except OutputError:
        if not overwrite:
            raise
    if manifest is not None and manifest.key == key:
        return manifest
    if manifest is None and not any(out.iterdir()):
        return None
    if not overwrite:
        what = "a batch of a different job" if manifest is not None else "files that are not a denude batch"
        raise BatchError(
            f"output folder {out} holds {what} ({MANIFEST_NAME}); use --overwrite to replace it or give a new --out"
        )
    discard_folder(out)
    return None


class _Lock:
    """An exclusive lock on OUTDIR/.batch.lock (one batch per output folder at a time); the
    lock file is removed when the batch ends."""

    def __init__(self, out: Path):
        self.path = out / LOCK_NAME
        self.handle = None

    def __enter__(self):
        self.handle = open(self.path, "a+")
        try:
            fcntl.flock(self.handle.fileno(), fcntl.LOCK_EX | fcntl.LOCK_NB)
        except OSError:
            self.handle.close()
            raise BatchError(
                f"output folder {self.path.parent} is in use by another denude batch; wait for it to finish or give another --out"
            ) from None
        return self

    def __exit__(self, *exc):
        try:
            self.path.unlink()        # still holding the lock: no other batch is inside
        except OSError:
            pass
        self.handle.close()
        return False


def resolve_inputs(settings: MapSettings, out: Path) -> MapSettings:
    """Settings with every folder/glob/list raster input replaced by a mosaic VRT under
    ``OUTDIR/inputs/`` (files and VRTs stay as they are)."""
    changes = {}
    for name in RASTER_FIELDS:
        value = getattr(settings, name)
        if not isinstance(value, str) or value == PCO2_FROM_AET:
            continue
        if mosaic_kind(value) in ("folder", "glob", "list"):
            changes[name] = write_mosaic_vrt(value, name, out / INPUTS_DIR / f"{name}.vrt")
    return settings.replace(**changes) if changes else settings


def _preflight(settings: MapSettings):
    """The rule book of `denude map` on the resolved inputs (each opened once; a decimated read
    of each continuous raster). Returns (grid, report). Only mosaics (VRTs) are read tolerantly:
    unreadable pixels of one mosaic tile are left to the batch tiles touching them, which report
    them one by one; a damaged single file fails here, before OUTDIR exists."""
    mosaics = frozenset(role for role, path in raster_roles(settings).items() if mosaic_kind(path) != "file")
    report = validate_job(settings, for_output=False, scan=False, values="decimated", tolerant=mosaics)
    return report.grid, report


def validate_inputs(job: "BatchJob"):
    """The rule book on the job's inputs and zone files, writing nothing under OUTDIR (mosaic
    VRTs go to a temporary folder). Returns (grid, report); report is None for inputs with
    mosaics (they are validated again once their VRTs are written under OUTDIR/inputs/)."""
    if _has_mosaics(job.settings):
        with tempfile.TemporaryDirectory() as tmp:
            grid, _ = _preflight(resolve_inputs(job.settings, Path(tmp)))
        report = None
    else:
        grid, report = _preflight(job.settings)
    _check_zone_files(job.zones, grid)
    return grid, report


def _has_mosaics(settings: MapSettings) -> bool:
    return any(isinstance(getattr(settings, f), str) and mosaic_kind(getattr(settings, f)) in ("folder", "glob", "list")
               for f in RASTER_FIELDS)


def _check_zones(zones, settings: MapSettings) -> ZoneSpec | None:
    """A ZoneSpec with absolute paths, checked before any tile runs."""
    if isinstance(zones, (str, os.PathLike)):
        zones = ZoneSpec(str(zones))
    if zones is None:
        return None
    for what, path in (("zone", zones.path), ("planning-unit", zones.units), ("sinkhole", zones.points)):
        if path is not None and not Path(path).is_file():
            raise InputError(f"{what} file {path} not found; give the path of a vector file (e.g. .gpkg)")
    lacking = [name for name in ZONE_LAYERS if name not in settings.layers]
    if lacking:
        raise InputError(f"--zones needs the layers {', '.join(ZONE_LAYERS)}; add {', '.join(lacking)} to --layers or drop --layers")

    def absolute(path):
        return None if path is None else str(Path(path).resolve())

    return ZoneSpec(absolute(zones.path), zones.layer, zones.id_field, absolute(zones.units), zones.units_layer,
                    zones.units_id_field, absolute(zones.points), zones.points_layer)


def _check_zone_files(zones: ZoneSpec | None, grid: Grid) -> None:
    """Bad zone, planning-unit or point files fail here, not per tile."""
    if zones is None:
        return
    for _, path, layer, id_field, what in zones.polygon_sets():
        polygons_on_grid(path, layer, id_field, what, grid.crs_wkt)
    if zones.points is not None:
        read_points(zones.points, zones.points_layer, ProjCRS.from_wkt(grid.crs_wkt))


# ----------------------------------------------------------------------------- the batch job
class BatchJob:
    """One run of a batch: ``plan`` (inputs, validation, tiles to run), ``run_tiles`` (on an
    engine, recording each tile in the manifest) and ``finish`` (layer VRTs, summaries,
    run.json). Built by ``run_batch`` once its arguments are checked."""

    def __init__(self, settings: MapSettings, size: int, zones: ZoneSpec | None, workers, scheduler,
                 retries: int, retry_failed: bool, merge: bool, progress, note):
        self.settings, self.size, self.zones = settings, size, zones
        self.workers, self.scheduler, self.retries, self.retry_failed = workers, scheduler, retries, retry_failed
        self.merge, self.progress, self.note = merge, progress, note
        self.out = Path(settings.out).resolve()
        self.layers = tuple(name for name in OUTPUT_LAYERS if name in settings.layers)
        self.key = job_key(settings.as_dict(), size)
        self.tiles_dir = self.out / TILES_DIR
        self.failed: dict = {}
        self.to_run: list[Tile] = []
        self.skipped = 0
        self.corrupt: list = []
        self.engine_name, self.link = "none (nothing to do)", None

    # -- plan ------------------------------------------------------------------------------
    def plan(self, manifest: Manifest | None, checked=None) -> None:
        """Resolve inputs, validate, make tiles, and pick the tiles to (re)run. ``checked``: the
        (grid, report) of ``validate_inputs``; its report is reused when it validated these very
        inputs (no mosaics), so they are not validated twice."""
        self.resolved = resolve_inputs(self.settings, self.out)
        if checked is not None and checked[1] is not None and self.resolved is self.settings:
            self.grid, self.report = checked
        else:
            self.grid, self.report = _preflight(self.resolved)
            _check_zone_files(self.zones, self.grid)
        self.resolved = self.report.settings            # with the units validation resolved
        self.hashes = HashJob(hashed_paths(self.resolved, self.report))
        self.tiles = make_tiles(self.grid, self.size)
        if manifest is None:
            manifest = Manifest.new(self.out, self.key, self.size, self.grid.as_dict(), self.layers)
        elif manifest.data.get("grid") != json.loads(json.dumps(self.grid.as_dict())):
            manifest.data["grid"] = self.grid.as_dict()
        self.manifest = manifest
        self.tiles_dir.mkdir(exist_ok=True)
        for stale in self.tiles_dir.glob(".*"):          # leftovers of an interrupted run (we hold the lock)
            remove_path(stale)
        input_hash = self._tile_input_hashes()
        known = {t.id for t in self.tiles}
        for stale_id in [i for i in manifest.tiles if i not in known]:
            del manifest.tiles[stale_id]
        changed = 0
        for t in self.tiles:
            rec = manifest.tiles.get(t.id)
            state = rec.get("state") if rec else None
            if self.retry_failed and state != "failed":
                continue
            changed += state == "done" and rec.get("input_sha256") != input_hash[t.id]
            if state == "done" and rec.get("input_sha256") == input_hash[t.id]:
                reason = verify_outputs(self.tiles_dir / t.id, rec.get("outputs") or {})
                if reason is None:
                    self.skipped += 1
                    continue
                self.corrupt.append(t.id)
                self.note(f"tile {t.id}: {reason}; computing it again")
            self.to_run.append(t)
            manifest.tiles[t.id] = {"window": t.as_list(), "state": "pending", "input_sha256": input_hash[t.id],
                                    "attempts": 0, "error": None, "outputs": {}, "counts": {}}
        if changed:
            self.note(f"{changed} of {len(self.tiles)} tiles recomputed: their inputs changed since the last run "
                      "(content checksums)")
        manifest.save()

    def _tile_input_hashes(self) -> dict:
        """Tile id -> SHA-256 over the job key, the tile window and the stamps of the input
        files under the tile (so a changed input reruns only the tiles it touches)."""
        stamp_paths = dict(raster_roles(self.resolved))
        if self.resolved.rocks:
            stamp_paths["rocks"] = self.resolved.rocks
        if self.zones is not None:
            stamp_paths["zones"] = self.zones.path
            if self.zones.units is not None:
                stamp_paths["planning units"] = self.zones.units
        stamps = InputStamps(stamp_paths, self.grid.crs_wkt)
        res = max(self.grid.res)
        extra = {"zones": [self.zones.layer, self.zones.id_field] if self.zones is not None else None}
        if self.zones is not None and self.zones.units is not None:
            extra["units"] = [self.zones.units_layer, self.zones.units_id_field]
        return {t.id: tile_input_sha256(self.key, t.as_list(), stamps.for_bounds(t.grid(self.grid).bounds, 4 * res), extra)
                for t in self.tiles}

    # -- run -------------------------------------------------------------------------------
    def run_tiles(self) -> None:
        """Every tile to run, on the engine, with retries; the manifest records each outcome."""
        if not self.to_run:
            return
        resolved, size, grid = self.resolved, self.size, self.grid
        block = min(resolved.block_size, size)
        tile_layout = choose_layout(resolved.layout, self.tiles[0].grid(grid))   # the first tile is a full one
        engine = _engines.make_engine(self.workers, self.scheduler)
        with engine:
            self.engine_name, self.link = engine.describe(), engine.dashboard_link
            if self.link:
                self.note(f"Dask dashboard: {self.link}")
            tasks = {t.id: TileTask(resolved, grid, t, str(self.tiles_dir), self.layers, block, tile_layout,
                                    tile_gdal_env(resolved), self.zones) for t in self.to_run}
            attempts = {tid: 1 for tid in tasks}
            pending = {engine.submit(run_tile, tasks[tid]): tid for tid in tasks}
            done_count, last_save = 0, time.monotonic()
            if self.progress:
                self.progress(0, len(tasks))
            while pending:
                for handle in engine.wait_any(list(pending)):
                    tid = pending.pop(handle)
                    ok, value = engine.outcome(handle)
                    if not ok and attempts[tid] <= self.retries:
                        attempts[tid] += 1
                        pending[engine.submit(run_tile, tasks[tid])] = tid
                        continue
                    self._record(tid, attempts[tid], ok, value)
                    done_count += 1
                    if self.progress:
                        self.progress(done_count, len(tasks))
                    if time.monotonic() - last_save >= MANIFEST_INTERVAL_S or not ok:
                        self.manifest.save()
                        last_save = time.monotonic()

    def _record(self, tid: str, attempts: int, ok: bool, value) -> None:
        rec = self.manifest.tiles[tid]
        rec["attempts"] = attempts
        if ok:
            rec.update(state="done", error=None, outputs=value["outputs"], counts=value["counts"],
                       wall_time_s=value["wall_time_s"])
            return
        message = one_line(value) if isinstance(value, DenudeError) else f"tile {tid}: {type(value).__name__}: {one_line(value)}"
        rec.update(state="failed", error=message)
        self.failed[tid] = message

    # -- finish ----------------------------------------------------------------------------
    def finish(self, started: float) -> "BatchSummary":
        """Layer VRTs, rock table, summaries and merged layers when complete, and run.json."""
        manifest, out, tiles = self.manifest, self.out, self.tiles
        manifest.save()
        for t in tiles:  # failures left from earlier runs (e.g. a run with --retry-failed skipped nothing)
            rec = manifest.tiles.get(t.id, {})
            if rec.get("state") == "failed" and t.id not in self.failed:
                self.failed[t.id] = rec.get("error") or f"tile {t.id} failed"
            elif rec.get("state") != "done" and t.id not in self.failed:
                self.failed[t.id] = f"tile {t.id} not computed yet; run the batch again"
        done = {t.id for t in tiles if manifest.tiles.get(t.id, {}).get("state") == "done"}
        outputs = layer_vrts(out, self.grid, tiles, done, self.resolved, self.layers)
        outputs.append(write_rock_table_copy(out, self.resolved))  # so `denude summarize OUTDIR` works
        complete = len(done) == len(tiles)
        if complete and self.zones is not None:
            outputs += zone_summary(out, tiles, self.zones, self.grid)
        if complete and self.merge:
            outputs += merge_layers(out, self.grid, self.resolved, self.layers, choose_layout(self.resolved.layout, self.grid))
        per_tile = [manifest.tiles.get(t.id, {}).get("counts") for t in tiles]
        per_tile = [BlockCounts.from_dict(c) for c in per_tile if c]
        counts: dict = sum(per_tile, BlockCounts()).as_dict() if per_tile else {}
        wall = time.perf_counter() - started
        failed = dict(sorted(self.failed.items()))
        settings, resolved = self.settings, self.resolved
        record = run_record(
            "batch", resolved, self.report, self.hashes.result(), self.grid, grid_source(resolved), counts,
            outputs + [MANIFEST_NAME, RUN_JSON, TILES_DIR + "/"], wall,
            resolved_inputs={f: getattr(resolved, f) for f in RASTER_FIELDS if getattr(resolved, f) != getattr(settings, f)},
            tile_size=self.size, tiles=len(tiles), tiles_done=len(done), tiles_run=len(self.to_run),
            tiles_skipped=self.skipped, tiles_failed=failed, engine=self.engine_name, manifest=MANIFEST_NAME,
        )
        record["settings"] = settings.as_dict()          # as given (mosaic specs), not the resolved VRTs
        write_run_record(out / RUN_JSON, record)
        return BatchSummary(str(out), self.grid, self.size, len(tiles), len(self.to_run), self.skipped, failed,
                            outputs, self.engine_name, self.link, counts, wall, self.corrupt)


def run_batch(
    settings: MapSettings,
    tile_size: int,
    workers: int | None = None,
    scheduler=None,
    retries: int = 0,
    retry_failed: bool = False,
    zones: ZoneSpec | str | None = None,
    progress: Callable[[int, int], None] | None = None,
    merge: bool = False,
    log: Callable[[str], None] | None = None,
    dry_run: bool = False,
) -> BatchSummary:
    """Run (or resume) a tiled batch of the raster job ``settings`` into ``settings.out``.

    ``tile_size``: tile side [cells]; ``workers``: local processes (None = cores available,
    0 = in this process); ``scheduler``: a Dask scheduler address (or cluster object) instead
    of the local pool; ``retries``: extra attempts per failing tile; ``retry_failed``: run
    only the tiles that failed before; ``zones``: a ``ZoneSpec`` (zones, optional planning
    units and sinkhole points) or a zone file, summarised per tile and merged into the files
    `denude summarize` writes, named ``zones_summary.*``; ``merge``: also write one merged
    GeoTIFF per layer; ``progress(done, total)`` after each tile; ``log(line)`` for notes
    (dashboard link, redone tiles). Tile failures do not raise: see ``BatchSummary.tiles_failed``.
    """
    started = time.perf_counter()
    size = check_tile_size(tile_size)
    if isinstance(retries, bool) or not isinstance(retries, int) or not 0 <= retries <= 100:
        raise InputError(f"retries {retries!r} must be an integer from 0 to 100; e.g. --retries 2")
    if settings.out is None:
        raise OutputError("no output folder given; give --out OUTDIR")
    zones = _check_zones(zones, settings)
    if scheduler is None:
        _engines.check_workers(workers)
    else:  # an unusable scheduler fails here, before the output folder exists
        _engines.check_scheduler(scheduler)
    job = BatchJob(settings, size, zones, workers, scheduler, retries, retry_failed, merge, progress,
                   log or (lambda line: None))
    _check_inputs_outside(settings, job.out, zones)
    if dry_run:
        return _dry_run(job)
    checked = validate_inputs(job)       # before OUTDIR is created (or an old one replaced)
    remove_dead_staging(job.out.parent)
    manifest = _prepare_out_dir(job.out, job.key, settings.overwrite)
    job.out.mkdir(exist_ok=True)
    with _Lock(job.out):
        remove_dead_staging(job.out)     # e.g. a merged-layer folder of a killed run
        job.plan(manifest, checked)
        job.run_tiles()
        summary = job.finish(started)
    warn_about_counts(summary.counts)
    return summary


def _dry_run(job: BatchJob) -> BatchSummary:
    """Validate and count tiles; nothing is written."""
    out, settings = job.out, job.settings
    manifest = Manifest.load(out) if out.is_dir() else None
    if manifest is not None and manifest.key != job.key and not settings.overwrite:
        raise BatchError(f"output folder {out} holds a batch of a different job ({MANIFEST_NAME}); use --overwrite or a new --out")
    grid, _ = validate_inputs(job)
    tiles = make_tiles(grid, job.size)
    return BatchSummary(str(out), grid, job.size, len(tiles), 0, 0, {}, [], "dry run", None, {}, 0.0)
