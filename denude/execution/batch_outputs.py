"""The files a batch writes into its output folder when the tiles are done: one VRT per layer
over the tile folders, the rock table, merged GeoTIFFs (``merge``), and the zone summary, the
same files `denude summarize` writes (zones, planning units, sinkhole points).
"""

from __future__ import annotations

import json
from pathlib import Path

import rasterio
from pyproj import CRS as ProjCRS

from denude.execution.batch_tile import (
    ROCKS_CSV, UNITS_PARTIAL, ZONES_PARTIAL, ZoneSpec, polygons_on_grid, read_zone_partial,
)
from denude.execution.blocks import block_windows
from denude.execution.plan import load_rocks, output_spec
from denude.execution.summaries import (
    SummaryLayers, locate_points, summary_meta, summary_paths, summary_tables,
)
from denude.execution.summary_strips import ZoneSet, sample_points
from denude.execution.tiling import Tile
from denude.io.grid import Grid, cell_areas_km2
from denude.io.jobfile import MapSettings
from denude.io.map_folder import HAZARD_TIF, hazard_class_names, open_map_folder
from denude.io.mosaic import VrtSource, write_vrt
from denude.io.outdir import fsync_dir, fsync_file, make_staging_dir, remove_path, staged_files
from denude.io.rasters import RasterWriter, file_sha256
from denude.io.rock_csv import read_rock_table, write_rock_table
from denude.io.styles import write_category_names
from denude.io.vectors import read_points, vector_files
from denude.registry import OUTPUT_LAYERS
from denude.reports.run_record import RUN_RECORD
from denude.reports.summary_files import UNITS_LAYER, ZONES_LAYER, write_summary_files

TILES_DIR = "tiles"
ZONES_GPKG = "zones_summary.gpkg"
MANIFEST_NAME = "manifest.json"


def layer_vrts(out: Path, grid: Grid, tiles: list[Tile], done: set, settings: MapSettings, layers) -> list[str]:
    """One VRT per layer over the finished tiles (relative paths, integer offsets)."""
    items = [(OUTPUT_LAYERS[name].file, output_spec(name, settings)) for name in layers]
    return mosaic_vrts(out, grid, tiles, done, items, settings.block_size)


def mosaic_vrts(out: Path, grid: Grid, tiles: list[Tile], done: set, items, block_size: int) -> list[str]:
    """One VRT ``OUTDIR/<file stem>.vrt`` per (tile file name, OutputSpec) of ``items`` over
    ``OUTDIR/tiles/<tile id>/<file>`` of the finished tiles (relative paths, integer offsets),
    with the spec's description, tags, colours, band unit and category names. Returns the
    names written."""
    written = []
    for file, spec in items:
        sources = [
            VrtSource(f"{TILES_DIR}/{t.id}/{file}", True, t.width, t.height, t.col_off, t.row_off,
                      spec.dtype, (min(block_size, t.width), min(block_size, t.height)))
            for t in tiles if t.id in done
        ]
        vrt_name = Path(file).with_suffix(".vrt").name
        write_vrt(out / vrt_name, grid.crs_wkt, grid.transform, grid.width, grid.height, spec.dtype,
                  spec.nodata, sources, spec.description, spec.tags, spec.colormap, spec.units)
        written.append(vrt_name)
        if write_category_names(out / vrt_name, list(spec.categories)):   # GDAL reads <vrt>.aux.xml too
            written.append(vrt_name + ".aux.xml")
    return written


def write_rock_table_copy(out: Path, settings: MapSettings) -> str:
    """The rock table used, as OUTDIR/rocks.csv (written to a staging name, then renamed)."""
    with staged_files([out / ROCKS_CSV]) as (tmp,):
        write_rock_table(load_rocks(settings), tmp)
    return ROCKS_CSV


def merge_layers(out: Path, grid: Grid, settings: MapSettings, layers, layout: str) -> list[str]:
    """One merged GeoTIFF per layer (COG layout up to its size limit), read from the VRTs."""
    items = [(OUTPUT_LAYERS[name].file, output_spec(name, settings)) for name in layers]
    return merge_mosaics(out, grid, items, settings.block_size, settings.compress, layout)


def merge_mosaics(out: Path, grid: Grid, items, block_size: int, compress: str, layout: str) -> list[str]:
    """``OUTDIR/<file>`` for each (file name, OutputSpec) of ``items``, read window by window
    from ``OUTDIR/<file stem>.vrt`` (COG layout up to its size limit). All files are written
    under a staging folder first and moved in only when every one is complete."""
    staging = make_staging_dir(out / "merged")
    names = []
    try:
        for file, spec in items:
            writer = RasterWriter(staging / file, grid, spec, block_size, compress, layout)
            try:
                with rasterio.open(out / Path(file).with_suffix(".vrt").name) as src:
                    for window in block_windows(grid.height, grid.width, block_size):
                        writer.write(src.read(1, window=window), window)
            except BaseException:
                writer.abort()
                raise
            writer.close()
            fsync_file(staging / file)
            names.append(file)
        for file in names:
            (staging / file).replace(out / file)
        fsync_dir(out)
    finally:
        remove_path(staging)
    return names


def zone_summary(out: Path, tiles: list[Tile], zones: ZoneSpec, grid: Grid) -> list[str]:
    """Merge the per-tile partial sums of the zones (and planning units), sample the sinkhole
    points from the layer VRTs, and write the files `denude summarize` writes for the same
    layers: ``zones_summary.gpkg``, its CSV twins (``zones_summary.csv``,
    ``zones_summary_planning_units.csv``, ``zones_summary_sinkholes.csv``) and the sidecar
    ``zones_summary.summary.json``. Returns the file names."""
    rocks = read_rock_table(out / ROCKS_CSV)
    lookup = rocks.lookup()
    rock_names = [rocks.by_code(int(c)).name for c in lookup.codes]
    datasets, _ = open_map_folder(out)
    try:
        class_names = hazard_class_names(datasets[HAZARD_TIF])
    finally:
        for ds in datasets.values():
            ds.close()
    _, area_method = cell_areas_km2(grid)
    polygons = {file: polygons_on_grid(path, layer, id_field, what, grid.crs_wkt)
                for file, path, layer, id_field, what in zones.polygon_sets()}
    points = None
    if zones.points is not None:
        points = read_points(zones.points, zones.points_layer, ProjCRS.from_wkt(grid.crs_wkt))
    layers = SummaryLayers(zones.path, polygons[ZONES_PARTIAL], zones.units, polygons.get(UNITS_PARTIAL),
                           zones.points, points)
    sets = []
    for file, name in ((ZONES_PARTIAL, ZONES_LAYER), (UNITS_PARTIAL, UNITS_LAYER)):
        if file not in polygons:
            continue
        acc = None
        for t in tiles:
            part = read_zone_partial(out / TILES_DIR / t.id / file)
            acc = part if acc is None else acc.merge(part)
        sets.append(ZoneSet(name, polygons[file], None, None, None, acc))
    point_rc, point_values = locate_points(points, grid, zones.points)
    if points is not None:
        sample_points(out, point_rc, point_values, lookup)
    tables = summary_tables(sets, layers, point_values, class_names, rock_names, grid, area_method)
    gpkg, csv_paths, sidecar = summary_paths(out / ZONES_GPKG, (zones.units is not None, zones.points is not None))
    manifest_path = out / MANIFEST_NAME
    files = [out / ROCKS_CSV, manifest_path]
    for path in (zones.path, zones.units, zones.points):
        if path is not None:
            files += vector_files(Path(path))
    hashes = {str(f): file_sha256(f) for f in files}
    meta, layer_names = summary_meta("denude batch", "batch_folder", out, gpkg, tables, layers, csv_paths,
                                     area_method, class_names, grid, point_rc,
                                     {path: {"sha256": digest} for path, digest in hashes.items()},
                                     zones_layer_name=ZONES_LAYER)
    meta["zones"]["sha256"] = hashes[str(zones.path)]
    meta["batch"] = {"manifest": str(manifest_path), "manifest_sha256": hashes[str(manifest_path)],
                     "job_key": json.loads(manifest_path.read_text(encoding="utf-8")).get("job_key"),
                     "tiles": len(tiles), "run_record": str(out / RUN_RECORD)}
    write_summary_files(gpkg, tables, layer_names, csv_paths, sidecar, meta)
    return [p.name for p in (*csv_paths.values(), gpkg, sidecar)]
