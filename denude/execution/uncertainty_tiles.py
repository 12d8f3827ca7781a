"""`denude uncertainty --tile-size CELLS`: the draws of an uncertainty run over tiles of the
target grid, each tile one task on an engine (local processes by default, ``--workers 0`` in
this process, a Dask cluster with ``--scheduler``), for regions too large for one process.

Each task (``run_draw_tile``) prepares the job again from its settings, runs
``DrawWorker`` over the tile's windows (windows of the *target* grid, so every cell draws the
same random numbers and coverage fractions as in a whole-grid run) and writes the six band
rasters of its tile under ``<staging>/tiles/<tile id>/``; it returns its counts and its
fixed-point zone sums. The driver adds the sums (exact, so any completion order gives the same
table) and writes one VRT per band over the tiles and, unless ``merge=False``, the six merged
GeoTIFFs of a whole-grid run. A whole-grid run and any tiling give the same values bit for bit
(tested). A failed tile fails the run: nothing is kept, as for the whole-grid run.
"""

from __future__ import annotations

import dataclasses
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import rasterio

from denude.core.kernel import BlockCounts
from denude.core.uncertainty import QUANTILE_LABELS, UncertaintySpec, exact_zeros
from denude.errors import DenudeError, TileError, one_line
from denude.execution import engines as _engines
from denude.execution.batch_outputs import TILES_DIR, merge_mosaics, mosaic_vrts
from denude.execution.batch_tile import tile_gdal_env
from denude.execution.plan import prepare_job
from denude.execution.tiling import Tile, sub_windows
from denude.execution.uncertainty_windows import (
    BAND_LAYERS, DrawWorker, ZonePlan, add_zone_partial, band_file, band_spec, open_band_writers, write_bands,
)
from denude.execution.validation import check_window
from denude.io.grid import Grid, cell_areas_km2
from denude.io.jobfile import MapSettings
from denude.io.rasters import choose_layout


@dataclass(frozen=True)
class DrawTileTask:
    """Everything one tile of an uncertainty run needs (no open datasets). Picklable."""

    settings: MapSettings        # validated settings of the run (input units resolved)
    grid: Grid                   # the whole target grid
    tile: Tile
    tiles_dir: str               # folder that receives <tile id>/
    spec: UncertaintySpec
    seed: int
    draws: int
    table: object                # the run's DrawTable (regional draws, per-rock ranges)
    zones: ZonePlan | None       # geometry only (layer None)
    layout: str                  # tile file layout: 'cog' or 'tiled'
    gdal_env: dict = field(default_factory=dict)
    threads: int = 1             # numba threads per task


def tile_error(tile_id: str, exc: BaseException) -> TileError:
    """The one-line error of a tile that failed with something other than a user error."""
    return TileError(f"tile {tile_id}: {type(exc).__name__}: {one_line(exc)}; check the inputs under this tile "
                     "and run again")


def run_draw_tile(task: DrawTileTask) -> dict:
    """Draw and write one tile; returns {tile, counts, clipped_draws, codes_found, zone sums}.
    The same function runs in every engine."""
    with _engines.threads_limited(task.threads):
        return _run_draw_tile(task)


def _run_draw_tile(task: DrawTileTask) -> dict:
    tile, settings = task.tile, task.settings
    folder = Path(task.tiles_dir) / tile.id
    writers: dict = {}
    work = None
    try:
        with rasterio.Env(**task.gdal_env):
            plan = prepare_job(settings, task.grid)
            lookup = plan.rocks.lookup()
            areas_row, _ = cell_areas_km2(task.grid)
            work = DrawWorker(plan, settings, task.spec, task.seed, lookup, task.table, task.zones, task.grid,
                              areas_row)
            folder.mkdir(exist_ok=False)    # not parents: a task that starts after a failed run's
            #                                 staging folder is gone must fail, not create it again
            open_band_writers(writers, folder, tile.grid(task.grid), settings, task.layout, task.draws, task.seed)
            n_zones = len(task.zones.wkbs) if task.zones is not None else 0
            sums = {k: exact_zeros(n_zones, task.draws) for k in ("volume", "mass", "co2")}
            area = exact_zeros(n_zones, 1)
            counts, clipped, found = BlockCounts(), 0, set()
            for grid_window, tile_window in sub_windows(tile, settings.block_size):
                _, bands, check, n_clip, partial = work(grid_window)
                check_window(settings, plan, check, f"tile {tile.id}: ")
                write_bands(writers, bands, tile_window)
                counts, clipped = counts + check.counts, clipped + n_clip
                found.update(check.codes_present)
                add_zone_partial(sums, area, partial)
            for writer in writers.values():
                writer.close()
    except BaseException as exc:
        for writer in writers.values():
            writer.abort()
        if isinstance(exc, DenudeError) or not isinstance(exc, Exception):
            raise
        raise tile_error(tile.id, exc) from None
    finally:
        if work is not None:
            work.close()
    touched = (np.flatnonzero(area.any(axis=(1, 2)) | np.any([v.any(axis=(1, 2)) for v in sums.values()], axis=0))
               if n_zones else np.array([], int))
    return {"tile": tile.id, "counts": counts.as_dict(), "clipped_draws": int(clipped), "codes_found": sorted(found),
            "zones": (touched, {k: v[touched] for k, v in sums.items()}, area[touched])}


def run_draw_tiles(staging: Path, tiles: list[Tile], settings: MapSettings, grid: Grid, layout: str,
                   spec: UncertaintySpec, seed: int, n_draws: int, table, zplan: ZonePlan | None, sums: dict,
                   valid_area: np.ndarray, progress=None, workers=None, scheduler=None, merge: bool = True,
                   note=None):
    """Run every tile on the engine of ``workers`` (local processes, 0: this process) or
    ``scheduler`` (Dask), add their zone sums into ``sums``/``valid_area``, then write the
    band VRTs (and merged GeoTIFFs).
    Returns (BlockCounts total, clipped draws, codes found, output names, engine description)."""
    tiles_dir = staging / TILES_DIR
    tiles_dir.mkdir()
    tile_layout = choose_layout(settings.layout, tiles[0].grid(grid))     # the first tile is a full one
    geometry = dataclasses.replace(zplan, layer=None) if zplan is not None else None
    tasks = [DrawTileTask(settings, grid, t, str(tiles_dir), spec, seed, n_draws, table, geometry, tile_layout,
                          tile_gdal_env(settings)) for t in tiles]
    total, clipped, found = BlockCounts(), 0, set()
    engine = _engines.make_engine(workers, scheduler)
    with engine:
        described = engine.describe()
        if note is not None and engine.dashboard_link:
            note(f"Dask dashboard: {engine.dashboard_link}")
        pending = {engine.submit(run_draw_tile, task): task.tile.id for task in tasks}
        done = 0
        if progress is not None:
            progress(0, len(tasks))
        while pending:
            for handle in engine.wait_any(list(pending)):
                tid = pending.pop(handle)
                ok, value = engine.outcome(handle)
                if not ok:
                    raise value if isinstance(value, DenudeError) else tile_error(tid, value)
                total = total + BlockCounts.from_dict(value["counts"])
                clipped += value["clipped_draws"]
                found.update(value["codes_found"])
                add_zone_partial(sums, valid_area, value["zones"] if zplan is not None else None)
                done += 1
                if progress is not None:
                    progress(done, len(tasks))
    items = [(band_file(stem, label, unit), band_spec(layer, label, settings, n_draws, seed))
             for layer, stem, unit in BAND_LAYERS for label in QUANTILE_LABELS]
    outputs = mosaic_vrts(staging, grid, tiles, {t.id for t in tiles}, items, settings.block_size)
    if merge:
        outputs = merge_mosaics(staging, grid, items, settings.block_size, settings.compress, layout) + outputs
    return total, clipped, found, outputs + [TILES_DIR + "/"], described
