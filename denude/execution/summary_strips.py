"""The strip pass of a zone summary (``denude.execution.summaries``): the grid read in strips
of whole rows, once per raster, each strip's covered cells (exactextract coverage fractions x
cell areas) added to every zone set's ``ZonalAccumulator``; in this process or spread over a
process pool whose partial sums are merged (the merge a tiled batch uses).
"""

from __future__ import annotations

import concurrent.futures
import multiprocessing
import os
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import rasterio
from rasterio.windows import Window

from denude.core.hazard import HAZARD_NODATA
from denude.core.zonal import ZonalAccumulator
from denude.io.coverage import coverage_pairs
from denude.io.grid import Grid, cell_areas_km2
from denude.io.map_folder import (
    CO2_TIF, COVER_TIF, HAZARD_TIF, LITHOLOGY_TIF, OPTIONAL_FILES, RATE_TIF, ROCKS_CSV, SOLUBLE_TIF, open_map_folder,
    read_layer,
)
from denude.io.rock_csv import read_rock_table

#: Target number of cells per strip (bounds the memory: about 60 bytes per cell).
STRIP_CELLS = 1 << 21
#: GDAL block cache while reading [MB]: every block is read once, so a cache only costs memory.
GDAL_CACHE_MB = 64


@dataclass
class ZoneSet:
    """One set of zones being summed: name, layer, WKB geometries, bounds, non-empty flags, accumulator."""

    name: str
    layer: object            # PolygonLayer
    wkbs: np.ndarray
    bounds: np.ndarray
    nonempty: np.ndarray
    acc: ZonalAccumulator


def _strip_rows(dataset, width) -> int:
    block_h = dataset.block_shapes[0][0] if dataset.block_shapes else 256
    rows = max(1, STRIP_CELLS // max(width, 1))
    return max(block_h, rows // block_h * block_h)


def sample_points(outdir, point_rc, point_values, lookup) -> None:
    """Fill ``point_values`` with the rate, hazard class and rock row of each point's cell,
    reading only the strips of ``outdir`` that hold points."""
    datasets, grid = open_map_folder(Path(outdir))
    try:
        _run_strips(datasets, grid, cell_areas_km2(grid)[0], [], lookup, point_rc, point_values, None)
    finally:
        for ds in datasets.values():
            ds.close()


def strip_plan(grid: Grid, dataset) -> list[tuple[int, int]]:
    """Row ranges [r0, r1) of the strips the grid is read in (whole blocks, ~STRIP_CELLS cells)."""
    rows_per = _strip_rows(dataset, grid.width)
    return [(r0, min(grid.height, r0 + rows_per)) for r0 in range(0, grid.height, rows_per)]


def _run_strips(datasets, grid, areas_row, sets, lookup, point_rc, point_values, progress, strips=None):
    """The single pass over the rasters, strip by strip, feeding every zone set's accumulator.
    The next strip is read on a background thread while the current one is summed.
    ``progress(rows, total)`` is called with the rows of each finished strip."""
    strips = strip_plan(grid, datasets[RATE_TIF]) if strips is None else strips
    t = grid.affine
    xmin, _, xmax, _ = grid.bounds
    planar = bool(np.all(areas_row == areas_row[0]))
    names = (RATE_TIF, HAZARD_TIF, LITHOLOGY_TIF, CO2_TIF, SOLUBLE_TIF) + tuple(n for n in OPTIONAL_FILES if n in datasets)

    plan = []
    for r0, r1 in strips:
        ytop, ybot = t.f + r0 * t.e, t.f + r1 * t.e
        picks = []
        for zs in sets:
            b = zs.bounds
            sel = np.flatnonzero(zs.nonempty & (b[:, 1] < ytop) & (b[:, 3] > ybot))
            if sel.size:
                picks.append((zs, sel))
        pts = np.zeros(0, np.int64)
        if point_rc is not None:
            pts = np.flatnonzero((point_rc[0] >= r0) & (point_rc[0] < r1))
        plan.append((r0, r1, ytop, ybot, picks, pts))

    def read(item):
        r0, r1, _, _, picks, pts = item
        if not picks and not pts.size:
            return None
        window = Window(0, r0, grid.width, r1 - r0)
        wanted = names if picks else names[:3]
        return {name: read_layer(datasets[name], window).ravel() for name in wanted}

    def accumulate(zs, pairs, row_area, data):
        zs.acc.add_runs(
            pairs.run_zone, pairs.run_start, pairs.cell, pairs.coverage, row_area, grid.width, data[RATE_TIF],
            soluble_fraction=data[SOLUBLE_TIF], co2_t_per_km2_yr=data[CO2_TIF],
            hazard_class=data[HAZARD_TIF], lithology_code=data[LITHOLOGY_TIF],
            rock_codes=lookup.codes, rock_density_g_cm3=lookup.density_g_cm3, covered_karst=data.get(COVER_TIF),
        )

    # exactextract holds the GIL; reading (rasterio) and summing (numba, nogil) run beside it
    with rasterio.Env(GDAL_CACHEMAX=GDAL_CACHE_MB), \
            concurrent.futures.ThreadPoolExecutor(max_workers=1) as reader, \
            concurrent.futures.ThreadPoolExecutor(max_workers=1) as summer:
        pending = reader.submit(read, plan[0]) if plan else None
        summing = None
        for k, item in enumerate(plan):
            data = pending.result()
            pending = reader.submit(read, plan[k + 1]) if k + 1 < len(plan) else None
            r0, r1, ytop, ybot, picks, pts = item
            if data is not None and pts.size:
                flat = (point_rc[0][pts] - r0) * grid.width + point_rc[1][pts]
                point_values["rate"][pts] = data[RATE_TIF][flat]
                point_values["hazard"][pts] = data[HAZARD_TIF][flat]
                point_values["rock"][pts] = lookup.row_index(data[LITHOLOGY_TIF][flat])
            row_area = areas_row[:1] if planar else areas_row[r0:r1]
            for zs, sel in picks:
                pairs = coverage_pairs((xmin, ybot, xmax, ytop), grid.width, r1 - r0, zs.wkbs[sel], sel)
                if summing is not None:
                    summing.result()          # one block of pairs in flight bounds the memory
                summing = summer.submit(accumulate, zs, pairs, row_area, data)
            if progress:
                progress(r1 - r0, grid.height)
        if summing is not None:
            summing.result()


def _worker(outdir, strips, payload, point_rc):
    """Process-pool task: summarise some strips of a map folder; return accumulator states
    (one per zone set) and the point samples taken in those strips."""
    datasets, grid = open_map_folder(Path(outdir))
    try:
        lookup = read_rock_table(Path(outdir) / ROCKS_CSV).lookup()
        sets = [ZoneSet(name, None, wkbs, bounds, nonempty, ZonalAccumulator(len(wkbs), n_classes, n_rocks, cover=cover))
                for name, wkbs, bounds, nonempty, n_classes, n_rocks, cover in payload]
        values = None
        if point_rc is not None:
            n = point_rc[0].size
            values = {"rate": np.full(n, np.nan), "hazard": np.full(n, HAZARD_NODATA, np.int64),
                      "rock": np.full(n, -1, np.int64)}
        _run_strips(datasets, grid, cell_areas_km2(grid)[0], sets, lookup, point_rc, values, None, strips)
        return [zs.acc.state() for zs in sets], values
    finally:
        for ds in datasets.values():
            ds.close()


def default_workers(n_strips: int) -> int:
    """Processes for a run: 1 for small grids (< 4 strips) or machines with < 4 CPUs (one
    process already sums on a second thread beside exactextract), else half the CPUs, at most 4."""
    cpus = os.cpu_count() or 1
    return 1 if n_strips < 4 or cpus < 4 else min(4, cpus // 2)


def accumulate_strips(outdir, datasets, grid, areas_row, sets, lookup, point_rc, point_values, progress, workers):
    """Run the strips in this process (workers <= 1) or spread over a process pool, merging
    the partial sums of every worker (the same merge a tiled batch uses)."""
    strips = strip_plan(grid, datasets[RATE_TIF])
    workers = default_workers(len(strips)) if workers is None else int(workers)
    if progress:
        progress(0, grid.height)
    if workers <= 1 or len(strips) < 2:
        done = [0]

        def counted(rows, total):
            done[0] += rows
            progress(done[0], total)

        _run_strips(datasets, grid, areas_row, sets, lookup, point_rc, point_values,
                    counted if progress else None, strips)
        return
    n_chunks = min(len(strips), workers)
    chunks = [list(c) for c in np.array_split(np.arange(len(strips)), n_chunks)]
    payload = [(zs.name, zs.wkbs, zs.bounds, zs.nonempty, zs.acc.n_classes, zs.acc.n_rocks, zs.acc.cover)
               for zs in sets]
    done = 0
    context = multiprocessing.get_context("spawn")
    with concurrent.futures.ProcessPoolExecutor(max_workers=workers, mp_context=context) as pool:
        futures = {pool.submit(_worker, str(outdir), [strips[i] for i in chunk], payload, point_rc):
                   sum(strips[i][1] - strips[i][0] for i in chunk) for chunk in chunks}
        for future in concurrent.futures.as_completed(futures):
            states, values = future.result()
            for zs, state in zip(sets, states):
                zs.acc.merge(ZonalAccumulator.from_state(state))
            if values is not None:
                got = ~np.isnan(values["rate"]) | (values["hazard"] != HAZARD_NODATA) | (values["rock"] >= 0)
                for key in point_values:
                    point_values[key][got] = values[key][got]
            done += futures[future]
            if progress:
                progress(done, grid.height)
