"""One tile of a batch: ``run_tile(task)`` computes and writes one tile folder of a batch
(the same function runs in every engine: in this process, a local pool, a Dask worker).

The tile folder is written under a staging name and renamed into place when complete, with
the SHA-256 of every file for the manifest. Each window is checked by the same rule book as a
`denude map` run (``validation.check_window``).
"""

from __future__ import annotations

import io
import os
import time
import traceback
import zipfile
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import rasterio
from numpy.lib import format as npformat
from pyproj import CRS as ProjCRS

from denude.core.kernel import BlockCounts
from denude.core.zonal import ZonalAccumulator
from denude.errors import DenudeError, TileError, one_line
from denude.execution import engines as _engines
from denude.execution.plan import InputReaders, output_spec, prepare_job
from denude.execution.summaries import zone_partials
from denude.execution.tiling import Tile, sub_windows
from denude.execution.validation import check_window
from denude.execution.window import run_window
from denude.io.grid import Grid
from denude.io.jobfile import MapSettings
from denude.io.outdir import commit_dir, fsync_dir, fsync_file, make_staging_dir, remove_path
from denude.io.rasters import RasterWriter, file_sha256
from denude.io.rock_csv import write_rock_table
from denude.io.vectors import read_polygons
from denude.registry import OUTPUT_LAYERS

ZONES_PARTIAL = "zones_partial.npz"
UNITS_PARTIAL = "units_partial.npz"
ROCKS_CSV = "rocks.csv"


@dataclass(frozen=True)
class ZoneSpec:
    """Zone polygons for per-tile partial sums: vector file, layer and id field; optional
    planning units (file, layer, id field) summarised the same way, and sinkhole points
    (file, layer) sampled when the batch finishes, as `denude summarize` does."""

    path: str
    layer: str | None = None
    id_field: str | None = None
    units: str | None = None
    units_layer: str | None = None
    units_id_field: str | None = None
    points: str | None = None
    points_layer: str | None = None

    def polygon_sets(self) -> list[tuple[str, str, str | None, str | None, str]]:
        """(partial file, path, layer, id field, what) of each polygon layer summarised per tile."""
        sets = [(ZONES_PARTIAL, self.path, self.layer, self.id_field, "zone")]
        if self.units is not None:
            sets.append((UNITS_PARTIAL, self.units, self.units_layer, self.units_id_field, "planning unit"))
        return sets


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



class TileReaders(InputReaders):
    """InputReaders that name the input and the tile when a read fails."""

    def __init__(self, plan, tile_id: str):
        super().__init__(plan)
        self.tile_id = tile_id

    def read(self, role, window):
        try:
            return super().read(role, window)
        except DenudeError:
            raise
        except Exception as exc:
            raise TileError(
                f"tile {self.tile_id}: {role} raster {self.plan.warps[role].info.path} cannot be read in this tile "
                f"({one_line(exc)}); check that the input files (or mosaic tiles) under this tile are readable rasters"
            ) from None


def write_zone_partial(path: Path, state: dict) -> None:
    """The partial sums as an .npz file with fixed timestamps (byte-identical for equal sums)."""
    with zipfile.ZipFile(path, "w", compression=zipfile.ZIP_DEFLATED) as archive:
        for name in sorted(state):
            buffer = io.BytesIO()
            npformat.write_array(buffer, np.ascontiguousarray(state[name]), allow_pickle=False)
            info = zipfile.ZipInfo(f"{name}.npy", date_time=(1980, 1, 1, 0, 0, 0))
            info.compress_type = zipfile.ZIP_DEFLATED
            info.external_attr = 0o644 << 16
            archive.writestr(info, buffer.getvalue())


def read_zone_partial(path: Path) -> ZonalAccumulator:
    with np.load(path, allow_pickle=False) as data:
        return ZonalAccumulator.from_state({k: data[k] for k in data.files})


_POLYGON_CACHE: dict = {}


def polygons_on_grid(path: str, layer, id_field, what: str, crs_wkt: str):
    """A polygon layer in the grid CRS, read once per process while the file is unchanged."""
    key = (path, layer, id_field, what, crs_wkt, os.stat(path).st_mtime_ns)
    if key not in _POLYGON_CACHE:
        if len(_POLYGON_CACHE) >= 4:
            _POLYGON_CACHE.clear()
        _POLYGON_CACHE[key] = read_polygons(path, layer, id_field, ProjCRS.from_wkt(crs_wkt), what=what)
    return _POLYGON_CACHE[key]


def zone_geometries(spec: ZoneSpec, crs_wkt: str):
    """The zone layer of ``spec`` in the grid CRS."""
    return polygons_on_grid(spec.path, spec.layer, spec.id_field, "zone", crs_wkt)


def run_tile(task: TileTask) -> dict:
    """Compute and write one tile; returns its record for the manifest (outputs with SHA-256
    and size, cell counts). The tile folder appears under its final name only when complete.
    The same function runs in every engine."""
    with _engines.threads_limited(task.threads):
        return _run_tile(task)


def _run_tile(task: TileTask) -> dict:
    started = time.perf_counter()
    tile = task.tile
    tiles_dir = Path(task.tiles_dir)
    final = tiles_dir / tile.id
    staging = None
    writers: dict = {}
    readers = None
    try:
        with rasterio.Env(**task.gdal_env):
            plan = prepare_job(task.settings, task.grid)
            staging = make_staging_dir(final)
            tile_grid = tile.grid(task.grid)
            for name in task.layers:
                writers[name] = RasterWriter(staging / OUTPUT_LAYERS[name].file, tile_grid,
                                             output_spec(name, task.settings), task.block_size,
                                             task.settings.compress, task.layout)
            readers = TileReaders(plan, tile.id)
            counts = _compute_tile(task, plan, readers, writers)
            readers.close()
            readers = None
            files = [writers.pop(name).close().name for name in task.layers]
            write_rock_table(plan.rocks, staging / ROCKS_CSV)
            files.append(ROCKS_CSV)
            files += _tile_zone_partials(task, staging)
        outputs = {}
        for name in files:
            path = staging / name
            fsync_file(path)
            outputs[name] = {"sha256": file_sha256(path), "size_bytes": path.stat().st_size}
        fsync_dir(staging)
        commit_dir(staging, final, overwrite=True, durable=True)
    except BaseException as exc:
        if readers is not None:
            readers.close()
        for writer in writers.values():
            writer.abort()
        if staging is not None:
            remove_path(staging)
        if isinstance(exc, DenudeError) or not isinstance(exc, Exception):
            raise
        where = traceback.extract_tb(exc.__traceback__)[-1]
        raise TileError(
            f"tile {tile.id}: {type(exc).__name__}: {one_line(exc)} (at {Path(where.filename).name}:{where.lineno}); "
            "check the inputs under this tile, then run again with --retry-failed"
        ) from None
    return {"tile": tile.id, "outputs": outputs, "counts": counts.as_dict(),
            "wall_time_s": round(time.perf_counter() - started, 3)}


def _compute_tile(task: TileTask, plan, readers: TileReaders, writers: dict) -> BlockCounts:
    """Every window of the tile: computed, checked by the run's rule book, written."""
    wanted = tuple(dict.fromkeys(tuple(task.layers) + ("lithology",)))
    where = f"tile {task.tile.id}: "
    counts = BlockCounts()
    for grid_window, tile_window in sub_windows(task.tile, task.block_size):
        result = run_window(plan, grid_window, readers, wanted)
        check_window(task.settings, plan, result, where)
        for name in task.layers:
            writers[name].write(result.arrays[name], tile_window)
        counts = counts + result.counts
    return counts


def _tile_zone_partials(task: TileTask, staging: Path) -> list[str]:
    """Per-tile partial sums of each polygon layer of ``task.zones`` (files written)."""
    if task.zones is None:
        return []
    files = []
    for file, path, layer, id_field, what in task.zones.polygon_sets():
        polygons = polygons_on_grid(path, layer, id_field, what, task.grid.crs_wkt)
        acc = zone_partials(staging, polygons.geometry)
        write_zone_partial(staging / file, acc.state())
        files.append(file)
    return files


def tile_gdal_env(settings: MapSettings) -> dict:
    """GDAL config options sent with every task (workers may run on other machines)."""
    return {"GDAL_CACHEMAX": int(settings.gdal_cache_mb) * 2**20, "GDAL_NUM_THREADS": "1",
            "GDAL_DISABLE_READDIR_ON_OPEN": "EMPTY_DIR"}
