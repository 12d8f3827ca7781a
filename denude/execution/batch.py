"""`denude batch`: a raster job split into tiles of the target grid, resumable, on a local
process pool or a Dask cluster.

``run_batch(settings, tile_size, ...)`` resolves mosaic inputs (folders, globs, lists of tiles)
into VRTs under ``OUTDIR/inputs/``, splits the target grid into tiles (``tiling.make_tiles``),
and runs ``run_tile`` once per tile on an engine (``engines``). Each tile writes its own
folder ``OUTDIR/tiles/<tile id>/`` (one GeoTIFF per layer, named like the `denude map`
outputs) under a temporary name and renames it into place when complete. The manifest
(``manifest.json``) records each tile's state and checksums, so running the same job again
skips tiles already done and verified. At the end one VRT per layer (``<layer>.vrt``), an
optional merged cloud-optimised GeoTIFF per layer (``merge=True``), zone summaries merged
from per-tile partial sums (``zones=``: ``zones_summary.csv``, ``.gpkg`` and ``.summary.json``)
and ``run.json`` are written into OUTDIR.

Values equal a whole-region `denude map` run bit for bit: each cell is computed by
``compute_window`` from the same inputs whatever window holds it.
"""

from __future__ import annotations

import io
import json
import os
import shutil
import time
import traceback
import uuid
import zipfile
from dataclasses import dataclass, field
from pathlib import Path
from typing import Callable

import numpy as np

import denude
from denude.errors import DenudeError, InputError, OutputError, RasterReadError
from denude.execution import engines as _engines
from denude.execution.manifest import (
    MANIFEST_NAME, InputStamps, Manifest, job_key, tile_input_sha256, verify_outputs,
)
from denude.execution.tiling import Tile, check_tile_size, make_tiles, sub_windows
from denude.io.grid import Grid
from denude.io.jobfile import MapSettings, is_constant
from denude.registry import LAYERS, OUTPUT_LAYERS, ZONE_LAYERS
from denude.io.mosaic import (
    VrtSource, fsync_dir, mosaic_kind, write_mosaic_vrt, write_text_atomic, write_vrt,
)

TILES_DIR = "tiles"
INPUTS_DIR = "inputs"
ZONES_PARTIAL = "zones_partial.npz"
ZONES_SUMMARY = "zones_summary.csv"
ZONES_GPKG = "zones_summary.gpkg"
ZONES_SIDECAR = "zones_summary.summary.json"
ROCKS_CSV = "rocks.csv"
RUN_JSON = "run.json"
#: Fields of MapSettings that may hold a raster input (path or mosaic spec).
RASTER_FIELDS = ("lithology", "runoff", "precipitation", "aet", "pco2", "elevation", "temperature",
                 "soluble_fraction", "grid_like")
#: Seconds between manifest rewrites while tiles finish (always rewritten at the end).
MANIFEST_INTERVAL_S = 0.2
#: Layers a zone summary reads (the summaries module's required files).



class TileError(DenudeError):
    """One tile failed (unreadable input, implausible values, unknown codes, write error)."""


class BatchError(OutputError):
    """The batch output folder cannot be used (another job, locked)."""


# ----------------------------------------------------------------------------- the tasks
@dataclass(frozen=True)
class ZoneSpec:
    """Zone polygons for per-tile partial sums: vector file, layer and id field."""

    path: str
    layer: str | None = None
    id_field: str | None = None


@dataclass(frozen=True)
class TileTask:
    """Everything one tile needs: paths, windows and settings (no open datasets). Picklable."""

    settings: MapSettings        # input paths resolved (mosaic VRTs)
    grid: Grid                   # the whole target grid
    tile: Tile
    tiles_dir: str
    layers: tuple
    block_size: int              # cells
    layout: str                  # tile file layout: 'cog' or 'tiled'
    gdal_env: dict = field(default_factory=dict)   # GDAL config options, applied with rasterio.Env in the task
    zones: ZoneSpec | None = None
    threads: int = 1             # kernel threads per task


def _stage_name(tile_id: str, kind: str) -> str:
    return f".{tile_id}.{kind}-{uuid.uuid4().hex[:8]}"


def _fsync_file(path) -> None:
    with open(path, "rb") as handle:
        os.fsync(handle.fileno())


def _one_line(exc: BaseException) -> str:
    text = " ".join(str(exc).split())
    return text or type(exc).__name__


def _check_plausible(role: str, path: str, values: np.ndarray, settings: MapSettings, tile_id: str) -> None:
    """Refuse implausible input values in this tile (same bands as `denude map`)."""
    from denude.execution.raster_job import band_text, implausible

    finite = values[np.isfinite(values)]
    if finite.size == 0:
        return
    found = implausible(role, settings, float(finite.min()), float(finite.max()))
    if found is not None:
        bad, low, high, fix, _ = found
        raise TileError(f"tile {tile_id}: {role} raster {path} has value {bad:g} outside {band_text(low, high)}; {fix}")


def _tile_readers(plan, settings: MapSettings, tile_id: str):
    """InputReaders that name the input and tile on a read failure and check value bands."""
    from denude.execution.raster_job import InputReaders

    class TileReaders(InputReaders):
        def read(self, role, window):
            path = self.plan.warps[role].info.path
            try:
                data = super().read(role, window)
            except DenudeError:
                raise
            except Exception as exc:
                raise TileError(
                    f"tile {tile_id}: {role} raster {path} cannot be read in this tile ({_one_line(exc)}); "
                    "check that the input files (or mosaic tiles) under this tile are readable rasters"
                ) from None
            if not self.plan.warps[role].categorical:
                _check_plausible(role, path, data, settings, tile_id)
            return data

    return TileReaders(plan)


def _write_zone_partial(path: Path, state: dict) -> None:
    """The partial sums as an .npz file with fixed timestamps (byte-identical for equal sums)."""
    from numpy.lib import format as npformat

    with zipfile.ZipFile(path, "w", compression=zipfile.ZIP_DEFLATED) as archive:
        for name in sorted(state):
            buffer = io.BytesIO()
            npformat.write_array(buffer, np.ascontiguousarray(state[name]), allow_pickle=False)
            info = zipfile.ZipInfo(f"{name}.npy", date_time=(1980, 1, 1, 0, 0, 0))
            info.compress_type = zipfile.ZIP_DEFLATED
            info.external_attr = 0o644 << 16
            archive.writestr(info, buffer.getvalue())


def _zone_geometries(spec: ZoneSpec, crs_wkt: str):
    from pyproj import CRS

    from denude.io.vectors import read_polygons

    key = (spec, crs_wkt, os.stat(spec.path).st_mtime_ns)
    if key not in _ZONE_CACHE:
        _ZONE_CACHE.clear()
        _ZONE_CACHE[key] = read_polygons(spec.path, spec.layer, spec.id_field, CRS.from_wkt(crs_wkt), what="zone")
    return _ZONE_CACHE[key]


_ZONE_CACHE: dict = {}


def run_tile(task: TileTask) -> dict:
    """Compute and write one tile; returns its record for the manifest (outputs with SHA-256
    and size, cell counts). The tile folder appears under its final name only when complete.
    The same function runs in every engine."""
    previous_threads = _engines.limit_threads(task.threads)
    try:
        return _run_tile(task)
    finally:
        if previous_threads is not None:
            _engines.limit_threads(previous_threads)


def _run_tile(task: TileTask) -> dict:
    import rasterio

    from denude.core.kernel import BlockCounts
    from denude.execution.raster_job import compute_window, output_spec, prepare_job
    from denude.io.rasters import RasterWriter, file_sha256
    from denude.io.rock_csv import write_rock_table

    started = time.perf_counter()
    settings, tile = task.settings, task.tile
    tiles_dir = Path(task.tiles_dir)
    staging = tiles_dir / _stage_name(tile.id, "partial")
    writers = {}
    readers = None
    try:
        with rasterio.Env(**task.gdal_env):
            plan = prepare_job(settings, task.grid)
            rocks = plan.rocks
            staging.mkdir(parents=True)
            tile_grid = tile.grid(task.grid)
            for name in task.layers:
                writers[name] = RasterWriter(staging / OUTPUT_LAYERS[name].file, tile_grid, output_spec(name, settings),
                                             task.block_size, settings.compress, task.layout)
            readers = _tile_readers(plan, settings, tile.id)
            wanted = tuple(dict.fromkeys(tuple(task.layers) + ("lithology",)))
            counts = BlockCounts()
            for grid_window, tile_window in sub_windows(tile, task.block_size):
                result = compute_window(settings, task.grid, grid_window, readers, wanted)
                if result.counts.unknown_code:
                    codes = np.unique(result.arrays["lithology"])
                    missing = rocks.missing_codes([int(c) for c in codes if c != -2147483648])
                    shown = ", ".join(str(c) for c in missing[:10])
                    raise TileError(
                        f"tile {tile.id}: lithology raster {plan.warps['lithology'].info.path} has code(s) "
                        f"{shown} not in the rock table ({rocks.source}); add rows for them to the --rocks CSV "
                        "or set them to nodata"
                    )
                for name in task.layers:
                    writers[name].write(result.arrays[name], tile_window)
                counts = counts + result.counts
            readers.close()
            readers = None
            files = [writers.pop(name).close().name for name in task.layers]
            write_rock_table(rocks, staging / ROCKS_CSV)
            files.append(ROCKS_CSV)
            if task.zones is not None:
                from denude.execution.summaries import zone_partials

                polygons = _zone_geometries(task.zones, task.grid.crs_wkt)
                acc = zone_partials(staging, polygons.geometry)
                _write_zone_partial(staging / ZONES_PARTIAL, acc.state())
                files.append(ZONES_PARTIAL)
        outputs = {}
        for name in files:
            path = staging / name
            _fsync_file(path)
            outputs[name] = {"sha256": file_sha256(path), "size_bytes": path.stat().st_size}
        fsync_dir(staging)
        final = tiles_dir / tile.id
        old = None
        if final.exists():
            old = tiles_dir / _stage_name(tile.id, "old")
            final.rename(old)
        staging.rename(final)
        fsync_dir(tiles_dir)
        if old is not None:
            shutil.rmtree(old, ignore_errors=True)
    except BaseException as exc:
        if readers is not None:
            readers.close()
        for writer in writers.values():
            writer.abort()
        shutil.rmtree(staging, ignore_errors=True)
        if isinstance(exc, DenudeError) or not isinstance(exc, Exception):
            raise
        where = traceback.extract_tb(exc.__traceback__)[-1]
        raise TileError(
            f"tile {tile.id}: {type(exc).__name__}: {_one_line(exc)} (at {Path(where.filename).name}:{where.lineno}); "
            "check the inputs under this tile, then run again with --retry-failed"
        ) from None
    return {"tile": tile.id, "outputs": outputs, "counts": counts.as_dict(),
            "wall_time_s": round(time.perf_counter() - started, 3)}


# ----------------------------------------------------------------------------- the driver
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


def _spec_settings(settings: MapSettings) -> dict:
    return settings.as_dict()


def _check_inputs_outside(settings: MapSettings, out: Path, zones: ZoneSpec | None) -> None:
    paths = {f: getattr(settings, f) for f in RASTER_FIELDS}
    paths["rocks"] = settings.rocks
    paths["job file"] = settings.job_file
    if zones is not None:
        paths["zones"] = zones.path
    from denude.execution.raster_job import refuse_inputs_inside

    refuse_inputs_inside(paths, out, "batch output folder")


def _prepare_out_dir(out: Path, key: str, overwrite: bool) -> Manifest | None:
    """Check the output folder: new, empty, or holding a manifest of the same job (resume).
    Another job's folder is an error unless ``overwrite`` (then it is removed)."""
    if out.exists() and not out.is_dir():
        raise OutputError(f"output {out} exists and is a file; give a folder path for --out")
    if not out.parent.is_dir():
        raise OutputError(f"parent folder of the output {out.parent} does not exist; create it first")
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
    old = out.parent / f".{out.name}.denude-old-{uuid.uuid4().hex[:8]}"
    out.rename(old)
    shutil.rmtree(old, ignore_errors=True)
    return None


class _Lock:
    """An exclusive lock on OUTDIR/.batch.lock (one batch per output folder at a time)."""

    def __init__(self, out: Path):
        self.path = out / ".batch.lock"
        self.handle = None

    def __enter__(self):
        import fcntl

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
        self.handle.close()
        return False


def resolve_inputs(settings: MapSettings, out: Path) -> MapSettings:
    """Settings with every folder/glob/list raster input replaced by a mosaic VRT under
    ``OUTDIR/inputs/`` (files and VRTs stay as they are)."""
    changes = {}
    for name in RASTER_FIELDS:
        value = getattr(settings, name)
        if not isinstance(value, str) or value == "from-aet":
            continue
        if mosaic_kind(value) in ("folder", "glob", "list"):
            changes[name] = write_mosaic_vrt(value, name, out / INPUTS_DIR / f"{name}.vrt")
    return settings.replace(**changes) if changes else settings


def _preflight(settings: MapSettings):
    """Checks that read metadata only (plus a sampled value range where readable): rock
    table, target grid, every input opens, has a CRS and overlaps the grid, constants are
    plausible. Pixel problems of single tiles are reported per tile."""
    from denude.execution.raster_job import band_text, implausible, load_rocks, prepare_job, raster_roles, resolve_grid
    from denude.io.rasters import value_range

    load_rocks(settings)
    grid = resolve_grid(settings)
    plan = prepare_job(settings, grid)
    for role in ("runoff", "precipitation", "aet", "pco2", "temperature", "soluble_fraction", "elevation"):
        value = settings.pco2 if role == "pco2" else getattr(settings, role)
        if is_constant(value):
            found = implausible(role, settings, value, value)
            if found is not None:
                _, low, high, fix, _ = found
                raise InputError(f"--{role.replace('_', '-')} {value:g} is outside {band_text(low, high)}; {fix}")
    for role, path in raster_roles(settings).items():
        if plan.warps[role].categorical:
            continue
        try:
            lo, hi, n = value_range(path, role)
        except RasterReadError:  # unreadable parts (a corrupt mosaic tile): the tiles over them report it
            continue
        except DenudeError:
            raise
        except Exception:  # unreadable parts: the tiles touching them report it
            continue
        if n:
            found = implausible(role, settings, lo, hi)
            if found is not None:
                bad, low, high, fix, _ = found
                raise InputError(f"{role} raster {path}: value {bad:g} is outside {band_text(low, high)}; {fix}")
    return grid, plan


def _gdal_env(settings: MapSettings) -> dict:
    """GDAL config options sent with every task (workers may run on other machines)."""
    return {"GDAL_CACHEMAX": int(settings.gdal_cache_mb) * 2**20, "GDAL_NUM_THREADS": "1",
            "GDAL_DISABLE_READDIR_ON_OPEN": "EMPTY_DIR"}


def _layer_vrts(out: Path, grid: Grid, tiles: list[Tile], done: set, settings: MapSettings, layers) -> list[str]:
    """One VRT per layer over the finished tiles (relative paths, integer offsets)."""
    from denude.execution.raster_job import output_spec

    written = []
    for name in layers:
        info = OUTPUT_LAYERS[name]
        spec = output_spec(name, settings)
        sources = [
            VrtSource(f"{TILES_DIR}/{t.id}/{info.file}", True, t.width, t.height, t.col_off, t.row_off,
                      info.dtype, (min(settings.block_size, t.width), min(settings.block_size, t.height)))
            for t in tiles if t.id in done
        ]
        vrt_name = Path(info.file).with_suffix(".vrt").name
        write_vrt(out / vrt_name, grid.crs_wkt, grid.transform, grid.width, grid.height, info.dtype,
                  info.nodata, sources, spec.description, spec.tags, spec.colormap)
        written.append(vrt_name)
    return written


def _write_rock_table_copy(out: Path, settings: MapSettings) -> str:
    """The rock table used, as OUTDIR/rocks.csv (written to a temporary name, then renamed)."""
    from denude.execution.raster_job import load_rocks
    from denude.io.rock_csv import write_rock_table

    staging = out / f".{ROCKS_CSV}.partial-{uuid.uuid4().hex[:8]}"
    write_rock_table(load_rocks(settings), staging)
    os.replace(staging, out / ROCKS_CSV)
    return ROCKS_CSV


def _merge_layers(out: Path, grid: Grid, settings: MapSettings, layers, layout: str) -> list[str]:
    """One merged GeoTIFF per layer (COG layout up to its size limit), read from the VRTs."""
    import rasterio

    from denude.execution.blocks import block_windows
    from denude.execution.raster_job import output_spec
    from denude.io.rasters import RasterWriter

    staging = out / f".merge-partial-{uuid.uuid4().hex[:8]}"
    staging.mkdir()
    names = []
    try:
        for name in layers:
            info = OUTPUT_LAYERS[name]
            writer = RasterWriter(staging / info.file, grid, output_spec(name, settings), settings.block_size,
                                  settings.compress, layout)
            try:
                with rasterio.open(out / Path(info.file).with_suffix(".vrt").name) as src:
                    for window in block_windows(grid.height, grid.width, settings.block_size):
                        writer.write(src.read(1, window=window), window)
            except BaseException:
                writer.abort()
                raise
            writer.close()
            _fsync_file(staging / info.file)
            names.append(info.file)
        for file in names:
            os.replace(staging / file, out / file)
        fsync_dir(out)
    finally:
        shutil.rmtree(staging, ignore_errors=True)
    return names


def _read_zone_partial(path: Path):
    from denude.core.zonal import ZonalAccumulator

    with np.load(path, allow_pickle=False) as data:
        return ZonalAccumulator.from_state({k: data[k] for k in data.files})


def _zone_summary(out: Path, tiles: list[Tile], zones: ZoneSpec, grid: Grid, settings: MapSettings) -> list[str]:
    """Merge the per-tile partial sums and write ``zones_summary.csv`` (one row per zone), its
    GeoPackage twin ``zones_summary.gpkg`` (layer ``zones``, geometries in the zone file's
    CRS) and the sidecar ``zones_summary.summary.json`` (method, units, caution, provenance),
    all through the writer of `denude summarize`. Returns the file names."""
    from denude.execution.raster_job import load_rocks
    from denude.execution.summaries import (
        COLUMN_UNITS, ZONES_LAYER, cell_area_method, layer_provenance, sidecar_head, sidecar_outputs,
        summary_method, vector_files, write_summary_files, zone_table,
    )
    from denude.io.rasters import file_sha256

    acc = None
    for t in tiles:
        part = _read_zone_partial(out / TILES_DIR / t.id / ZONES_PARTIAL)
        acc = part if acc is None else acc.merge(part)
    rocks = load_rocks(settings)
    lookup = rocks.lookup()
    rock_names = [rocks.by_code(int(c)).name for c in lookup.codes]
    class_names = list(settings.hazard_names)
    cols = acc.finalize(class_names, rock_names, with_points=False)
    cols = {k: v for k, v in cols.items() if not k.startswith("hazard_share_")}
    polygons = _zone_geometries(zones, grid.crs_wkt)
    area_method = cell_area_method(grid)
    tables = {ZONES_LAYER: zone_table(polygons, cols, class_names, area_method, method_column=False)}
    layer_names = {ZONES_LAYER: ZONES_LAYER}
    gpkg, csv, sidecar = out / ZONES_GPKG, out / ZONES_SUMMARY, out / ZONES_SIDECAR
    csv_paths = {ZONES_LAYER: csv}
    method = summary_method(area_method, class_names)
    for absent in ("zone_area_km2", "map_coverage_fraction", "sinkholes"):   # not in the batch table
        method.pop(absent)
    manifest_path = out / MANIFEST_NAME
    hashes = {str(f): file_sha256(f) for f in [*vector_files(Path(zones.path)), out / ROCKS_CSV, manifest_path]}
    meta = {
        **sidecar_head("denude batch"),
        "batch_folder": str(out),
        "outputs": sidecar_outputs(gpkg, tables, layer_names, csv_paths),
        "method": method,
        "zones": {**layer_provenance(zones.path, polygons), "sha256": hashes[str(zones.path)]},
        "batch": {"manifest": str(manifest_path), "manifest_sha256": hashes[str(manifest_path)],
                  "job_key": json.loads(manifest_path.read_text(encoding="utf-8")).get("job_key"),
                  "tiles": len(tiles), "run_record": str(out / RUN_JSON)},
        "raster_crs": grid.crs.to_string(),
        "units": COLUMN_UNITS,
        "inputs": {path: {"sha256": digest} for path, digest in hashes.items()},
    }
    write_summary_files(gpkg, tables, layer_names, csv_paths, sidecar, meta)
    return [ZONES_SUMMARY, ZONES_GPKG, ZONES_SIDECAR]


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
    only the tiles that failed before; ``zones``: polygons summarised per tile and merged
    into ``zones_summary.csv``, ``zones_summary.gpkg`` and ``zones_summary.summary.json``; ``merge``: also write one merged GeoTIFF per layer;
    ``progress(done, total)`` after each tile; ``log(line)`` for notes (dashboard link,
    redone tiles). Tile failures do not raise: see ``BatchSummary.tiles_failed``.
    """
    started = time.perf_counter()
    size = check_tile_size(tile_size)
    if isinstance(retries, bool) or not isinstance(retries, int) or not 0 <= retries <= 100:
        raise InputError(f"retries {retries!r} must be an integer from 0 to 100; e.g. --retries 2")
    if settings.out is None:
        raise OutputError("no output folder given; give --out OUTDIR")
    if isinstance(zones, (str, os.PathLike)):
        zones = ZoneSpec(str(zones))
    if zones is not None:
        if not Path(zones.path).is_file():
            raise InputError(f"zone file {zones.path} not found; give the path of a polygon file (e.g. .gpkg)")
        lacking = [name for name in ZONE_LAYERS if name not in settings.layers]
        if lacking:
            raise InputError(f"--zones needs the layers {', '.join(ZONE_LAYERS)}; add {', '.join(lacking)} to --layers or drop --layers")
        zones = ZoneSpec(str(Path(zones.path).resolve()), zones.layer, zones.id_field)
    if scheduler is None:
        _engines.check_workers(workers)
    else:  # an unusable scheduler fails here, before the output folder exists
        _engines.check_scheduler(scheduler)
    note = log or (lambda line: None)
    out = Path(settings.out).resolve()
    layers = tuple(name for name in LAYERS if name in settings.layers)
    _check_inputs_outside(settings, out, zones)
    key = job_key(_spec_settings(settings), size)
    if dry_run:
        manifest = Manifest.load(out) if out.is_dir() else None
        if manifest is not None and manifest.key != key and not settings.overwrite:
            raise BatchError(f"output folder {out} holds a batch of a different job ({MANIFEST_NAME}); use --overwrite or a new --out")
        resolved = settings
        if any(isinstance(getattr(settings, f), str) and mosaic_kind(getattr(settings, f)) in ("folder", "glob", "list")
               for f in RASTER_FIELDS):
            import tempfile

            with tempfile.TemporaryDirectory() as tmp:
                resolved = resolve_inputs(settings, Path(tmp))
                grid, _ = _preflight(resolved)
        else:
            grid, _ = _preflight(resolved)
        if zones is not None:
            _zone_geometries(zones, grid.crs_wkt)          # bad zone files fail here, not per tile
        tiles = make_tiles(grid, size)
        return BatchSummary(str(out), grid, size, len(tiles), 0, 0, {}, [], "dry run", None, {}, 0.0)

    manifest = _prepare_out_dir(out, key, settings.overwrite)
    out.mkdir(exist_ok=True)
    with _Lock(out):
        resolved = resolve_inputs(settings, out)
        grid, plan = _preflight(resolved)
        if zones is not None:
            _zone_geometries(zones, grid.crs_wkt)          # bad zone files fail here, not per tile
        tiles = make_tiles(grid, size)
        if manifest is None:
            manifest = Manifest.new(out, key, size, grid.as_dict(), layers)
        elif manifest.data.get("grid") != json.loads(json.dumps(grid.as_dict())):
            manifest.data["grid"] = grid.as_dict()
        tiles_dir = out / TILES_DIR
        tiles_dir.mkdir(exist_ok=True)
        for stale in tiles_dir.glob(".*"):          # leftovers of an interrupted run
            shutil.rmtree(stale, ignore_errors=True) if stale.is_dir() else stale.unlink(missing_ok=True)

        from denude.execution.raster_job import raster_roles
        from denude.io.rasters import choose_layout

        stamp_paths = dict(raster_roles(resolved))
        if resolved.rocks:
            stamp_paths["rocks"] = resolved.rocks
        if zones is not None:
            stamp_paths["zones"] = zones.path
        stamps = InputStamps(stamp_paths, grid.crs_wkt)
        res = max(grid.res)
        block = min(resolved.block_size, size)
        tile_layout = choose_layout(resolved.layout, Grid(grid.crs_wkt, grid.transform, min(size, grid.width), min(size, grid.height)))
        extra = {"zones": [zones.layer, zones.id_field] if zones is not None else None}
        input_hash = {}
        for t in tiles:
            tg = t.grid(grid)
            input_hash[t.id] = tile_input_sha256(key, t.as_list(), stamps.for_bounds(tg.bounds, 4 * res), extra)

        known = {t.id for t in tiles}
        for stale_id in [i for i in manifest.tiles if i not in known]:
            del manifest.tiles[stale_id]
        to_run, skipped, corrupt, changed = [], 0, [], 0
        for t in tiles:
            rec = manifest.tiles.get(t.id)
            state = rec.get("state") if rec else None
            if retry_failed and state != "failed":
                continue
            changed += state == "done" and rec.get("input_sha256") != input_hash[t.id]
            if state == "done" and rec.get("input_sha256") == input_hash[t.id]:
                reason = verify_outputs(tiles_dir / t.id, rec.get("outputs") or {})
                if reason is None:
                    skipped += 1
                    continue
                corrupt.append(t.id)
                note(f"tile {t.id}: {reason}; computing it again")
            to_run.append(t)
            manifest.tiles[t.id] = {"window": t.as_list(), "state": "pending", "input_sha256": input_hash[t.id],
                                    "attempts": 0, "error": None, "outputs": {}, "counts": {}}
        if changed:
            note(f"{changed} of {len(tiles)} tiles recomputed: their inputs changed since the last run (content checksums)")
        manifest.save()

        failed: dict = {}
        total = len(to_run)
        engine_name, link = "none (nothing to do)", None
        if to_run:
            engine = _engines.make_engine(workers, scheduler)
            with engine:
                engine_name, link = engine.describe(), engine.dashboard_link
                if link:
                    note(f"Dask dashboard: {link}")
                tasks = {t.id: TileTask(resolved, grid, t, str(tiles_dir), layers, block, tile_layout,
                                        _gdal_env(resolved), zones) for t in to_run}
                attempts = {t.id: 1 for t in to_run}
                pending = {engine.submit(run_tile, tasks[tid]): tid for tid in tasks}
                done_count = 0
                last_save = time.monotonic()
                if progress:
                    progress(0, total)
                while pending:
                    for handle in engine.wait_any(list(pending)):
                        tid = pending.pop(handle)
                        ok, value = engine.outcome(handle)
                        rec = manifest.tiles[tid]
                        rec["attempts"] = attempts[tid]
                        if ok:
                            rec.update(state="done", error=None, outputs=value["outputs"], counts=value["counts"],
                                       wall_time_s=value["wall_time_s"])
                        elif attempts[tid] <= retries:
                            attempts[tid] += 1
                            pending[engine.submit(run_tile, tasks[tid])] = tid
                            continue
                        else:
                            message = _one_line(value) if isinstance(value, DenudeError) else f"tile {tid}: {type(value).__name__}: {_one_line(value)}"
                            rec.update(state="failed", error=message)
                            failed[tid] = message
                        done_count += 1
                        if progress:
                            progress(done_count, total)
                        if time.monotonic() - last_save >= MANIFEST_INTERVAL_S or not ok:
                            manifest.save()
                            last_save = time.monotonic()
        manifest.save()
        for t in tiles:  # failures left from earlier runs (e.g. a run with --retry-failed skipped nothing)
            rec = manifest.tiles.get(t.id, {})
            if rec.get("state") == "failed" and t.id not in failed:
                failed[t.id] = rec.get("error") or f"tile {t.id} failed"
            elif rec.get("state") != "done" and t.id not in failed:
                failed[t.id] = f"tile {t.id} not computed yet; run the batch again"
        done = {t.id for t in tiles if manifest.tiles.get(t.id, {}).get("state") == "done"}
        outputs = _layer_vrts(out, grid, tiles, done, resolved, layers)
        outputs.append(_write_rock_table_copy(out, resolved))  # so `denude summarize OUTDIR` works
        complete = len(done) == len(tiles)
        if complete and zones is not None:
            outputs += _zone_summary(out, tiles, zones, grid, resolved)
        if complete and merge:
            outputs += _merge_layers(out, grid, resolved, layers, choose_layout(resolved.layout, grid))
        counts: dict = {}
        for t in tiles:
            for k, v in (manifest.tiles.get(t.id, {}).get("counts") or {}).items():
                counts[k] = counts.get(k, 0) + int(v)
        wall = time.perf_counter() - started
        from denude.execution.raster_job import grid_source

        record = {
            "tool": "denude", "version": denude.__version__, "command": "batch",
            "settings": settings.as_dict(),
            "resolved_inputs": {f: getattr(resolved, f) for f in RASTER_FIELDS if getattr(resolved, f) != getattr(settings, f)},
            "grid": grid.as_dict(), "grid_source": grid_source(resolved), "tile_size": size, "tiles": len(tiles),
            "tiles_done": len(done), "tiles_run": total, "tiles_skipped": skipped,
            "tiles_failed": dict(sorted(failed.items())), "engine": engine_name,
            "counts": counts, "outputs": outputs + [MANIFEST_NAME, RUN_JSON, TILES_DIR + "/"],
            "manifest": MANIFEST_NAME, "wall_time_s": round(wall, 3),
        }
        write_text_atomic(out / RUN_JSON, json.dumps(record, indent=2, default=str) + "\n")
    from denude.execution.raster_job import warn_about_counts

    warn_about_counts(counts)
    return BatchSummary(str(out), grid, size, len(tiles), total, skipped, dict(sorted(failed.items())), outputs, engine_name, link, counts,
                        wall, corrupt)
