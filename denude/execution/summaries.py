"""Per-zone summaries of a ``denude map`` output folder (the library side of ``denude summarize``).

Method, in one pass over the rasters:

1. The grid is cut into strips of whole rows. For each strip, exactextract gives the
   coverage fraction of every cell touched by every zone (``values`` and ``coverage``
   operations over a raster source whose values are the strip's cell indices, so no pixel
   of the maps is read by exactextract; ``values`` of an int32 index is cheaper than its
   ``cell_id`` operation).
2. Each raster of the folder is read strip by strip, once, and the covered cells are
   gathered and added to a ``denude.core.zonal.ZonalAccumulator`` (float64 partial sums and
   a weighted histogram, mergeable across tiles) with weight = coverage x cell area [km2].
3. Cell areas: planar |a*e| for a projected CRS; in a geographic CRS the geodesic area of
   one cell per row on the CRS ellipsoid (pyproj.Geod; it depends on latitude only).

Cell counts (``valid_cells``, ``nodata_cells``) count whole cells with coverage > 0.
``area_km2`` is the zone's area on the raster grid (the part outside the grid is not counted).
exactextract keeps coverage fractions in float32, so areas and sums over partly covered
cells carry a relative error of about 1e-7 (totals over a partition are conserved to that).

Hazard class names are read from the tags of ``hazard_class.tif`` (``class_names``: a JSON
list or comma-separated names, class 0 first); without the tag the built-in names are used.
Large grids can be spread over a process pool (``workers``); each process sums its strips
and the partial sums are merged, exactly as a tiled batch merges its tiles.
"""

from __future__ import annotations

import concurrent.futures
import warnings
from dataclasses import dataclass
from pathlib import Path
from typing import Callable, Optional

import numpy as np
import shapely
from pyproj import CRS as ProjCRS

from denude.core.hazard import HAZARD_NODATA, HIGHEST_CLASS_MIN_SHARE
from denude.core.zonal import ZonalAccumulator
from denude.errors import OutOfRangeWarning, ZoneError
from denude.execution.sinkhole_evaluation import evaluate_sinkholes
from denude.execution.summary_strips import (  # noqa: F401  (strip_plan, default_workers: names of this module)
    ZoneSet, accumulate_strips, default_workers, strip_plan,
)
from denude.io.grid import Grid, cell_areas_km2, zone_areas_km2
from denude.io.map_folder import (
    COVER_TIF, HAZARD_TIF, OPTIONAL_FILES, RATE_TIF, REQUIRED_FILES, ROCKS_CSV, hazard_class_names, open_map_folder,
    output_file,
)
from denude.io.outdir import check_new_files, remove_dead_staging
from denude.io.rasters import file_sha256
from denude.io.rock_csv import read_rock_table
from denude.io.vectors import check_output_path, read_points, read_polygons, vector_files
from denude.reports.run_record import RUN_RECORD
from denude.reports.summary_files import (
    COLUMN_UNITS, POINTS_LAYER, UNITS_LAYER, ZONES_LAYER, layer_provenance, point_table, sidecar_head,
    sidecar_outputs, summary_method, write_summary_files, zone_table,
)


# -- main entry ---------------------------------------------------------------------------
def zone_extents(geoms, grid: Grid):
    """(WKB per zone or None, bounds (n, 4) in grid CRS units (NaN for empty), True where the zone's
    bounds overlap the grid) of polygons ``geoms`` already in the grid's CRS."""
    nonempty = ~(shapely.is_missing(geoms) | shapely.is_empty(geoms))
    bounds = np.full((len(geoms), 4), np.nan)
    if nonempty.any():
        bounds[nonempty] = shapely.bounds(geoms[nonempty])
    xmin, ymin, xmax, ymax = grid.bounds
    inside = nonempty & (bounds[:, 0] < xmax) & (bounds[:, 2] > xmin) & (bounds[:, 1] < ymax) & (bounds[:, 3] > ymin)
    wkbs = np.empty(len(geoms), dtype=object)
    wkbs[nonempty] = shapely.to_wkb(geoms[nonempty])
    return wkbs, bounds, inside


def _prepare(name, layer, n_classes, n_rocks, grid, cover=False):
    wkbs, bounds, inside = zone_extents(layer.geometry, grid)
    return ZoneSet(name, layer, wkbs, bounds, inside, ZonalAccumulator(len(layer.geometry), n_classes, n_rocks, cover=cover))


def zone_partials(outdir, geometries, progress=None, workers: Optional[int] = 1) -> ZonalAccumulator:
    """Partial sums over ``geometries`` (shapely polygons in the raster CRS) of one map
    output folder, e.g. one tile of a batch: merge the results of several tiles with
    ``ZonalAccumulator.merge`` and call ``finalize``."""
    outdir = Path(outdir)
    datasets, grid = open_map_folder(outdir)
    try:
        lookup = read_rock_table(outdir / ROCKS_CSV).lookup()
        n_classes = len(hazard_class_names(datasets[HAZARD_TIF]))
        layer = _Geoms(np.asarray(geometries, dtype=object))
        zs = _prepare("zones", layer, n_classes, len(lookup.codes), grid, cover=COVER_TIF in datasets)
        accumulate_strips(outdir, datasets, grid, cell_areas_km2(grid)[0], [zs], lookup, None, None, progress, workers)
        return zs.acc
    finally:
        for ds in datasets.values():
            ds.close()


@dataclass
class _Geoms:
    geometry: np.ndarray


@dataclass
class SummaryLayers:
    """The vector inputs of a summary, read in the raster CRS: zones, optional planning units
    and sinkhole points (with the file each came from)."""

    zones_path: object
    zones: object                       # PolygonLayer
    units_path: object = None
    units: object = None                # PolygonLayer or None
    points_path: object = None
    points: object = None               # PointLayer or None


def read_summary_layers(grid: Grid, zones_path, layer=None, id_field=None, units_path=None, units_layer=None,
                        units_id_field=None, points_path=None, points_layer=None) -> SummaryLayers:
    """Read zones (refused when none overlaps the grid), planning units and points."""
    target_crs = ProjCRS.from_wkt(grid.crs.to_wkt())
    zones = read_polygons(zones_path, layer, id_field, target_crs, what="zone")
    units = (read_polygons(units_path, units_layer, units_id_field, target_crs, what="planning unit")
             if units_path is not None else None)
    points = read_points(points_path, points_layer, target_crs) if points_path is not None else None
    return SummaryLayers(zones_path, zones, units_path, units, points_path, points)


def zone_sets(layers: SummaryLayers, n_classes: int, n_rocks: int, grid: Grid, cover: bool = False) -> list:
    """One accumulator per polygon layer (zones first, then planning units); ``cover``: the
    folder has the covered-karst layer (its columns are summed)."""
    sets = [_prepare(ZONES_LAYER, layers.zones, n_classes, n_rocks, grid, cover)]
    if not sets[0].nonempty.any():
        raise ZoneError(
            f"{layers.zones_path}: no zone overlaps the raster extent {tuple(round(v, 6) for v in grid.bounds)}; "
            "check the zone file and the map output folder cover the same area"
        )
    if layers.units is not None:
        sets.append(_prepare(UNITS_LAYER, layers.units, n_classes, n_rocks, grid, cover))
    return sets


def locate_points(points, grid: Grid, points_path):
    """(row, col) of the cell holding each point (-1 outside the map) and empty sample arrays
    (rate, hazard class, rock row); (None, None) without points."""
    if points is None:
        return None, None
    n_pts = len(points)
    point_values = {
        "rate": np.full(n_pts, np.nan), "hazard": np.full(n_pts, HAZARD_NODATA, np.int64),
        "rock": np.full(n_pts, -1, np.int64),
    }
    xy = np.full((n_pts, 2), np.nan)
    present = ~(shapely.is_missing(points.geometry) | shapely.is_empty(points.geometry))
    xy[present, 0] = shapely.get_x(points.geometry[present])
    xy[present, 1] = shapely.get_y(points.geometry[present])
    t = grid.affine
    col = np.floor((xy[:, 0] - t.c) / t.a)
    row = np.floor((xy[:, 1] - t.f) / t.e)
    ok = np.isfinite(col) & np.isfinite(row) & (col >= 0) & (col < grid.width) & (row >= 0) & (row < grid.height)
    point_rc = (np.where(ok, row, -1).astype(np.int64), np.where(ok, col, -1).astype(np.int64))
    n_outside = int(np.count_nonzero(~ok))
    if n_outside:
        warnings.warn(OutOfRangeWarning(
            f"{points_path}: {n_outside} of {n_pts} point(s) lie outside the map (or have no "
            "geometry); they are written with no rate, hazard class 255 and no rock"), stacklevel=3)
    return point_rc, point_values


def summary_tables(sets, layers: SummaryLayers, point_values, class_names, rock_names, grid: Grid,
                   area_method: str, highest_class_min_share: float = HIGHEST_CLASS_MIN_SHARE) -> dict:
    """Finished accumulators -> the tables of the summary files (zones, planning units, points).
    ``highest_class_min_share``: the share of a zone's area its highest class must cover (0-1)."""
    points = layers.points
    tables = {}
    for zs in sets:
        if points is not None:
            tree = shapely.STRtree(zs.layer.geometry)
            pidx, zidx = tree.query(points.geometry, predicate="intersects")
            zs.acc.add_points(zidx, point_values["rate"][pidx])
        cols = zs.acc.finalize(class_names, rock_names, with_points=points is not None,
                               highest_min_share=highest_class_min_share)
        if zs.name == ZONES_LAYER:  # shares are asked for planning units only
            cols = {k: v for k, v in cols.items() if not k.startswith("hazard_share_")}
        whole = zone_areas_km2(zs.layer.geometry, grid)
        cols["zone_area_km2"] = whole
        with np.errstate(invalid="ignore", divide="ignore"):
            cols["map_coverage_fraction"] = np.where(whole > 0, np.minimum(cols["area_km2"] / whole, 1.0), 0.0)
        tables[zs.name] = zone_table(zs.layer, cols, class_names, area_method)
    if points is not None:
        tables[POINTS_LAYER] = point_table(points, point_values, class_names, rock_names)
    return tables


def summary_paths(out_path, layers_given: tuple):
    """(GeoPackage, layer -> CSV twin, sidecar) of a summary written to ``out_path``;
    ``layers_given``: (planning units given, points given)."""
    out_path = Path(out_path)
    csv_paths = {ZONES_LAYER: out_path.with_suffix(".csv")}
    if layers_given[0]:
        csv_paths[UNITS_LAYER] = out_path.with_name(out_path.stem + "_planning_units.csv")
    if layers_given[1]:
        csv_paths[POINTS_LAYER] = out_path.with_name(out_path.stem + "_sinkholes.csv")
    return out_path, csv_paths, out_path.with_name(out_path.stem + ".summary.json")


def summary_meta(tool: str, folder_key: str, folder, out_path, tables, layers: SummaryLayers, csv_paths,
                 area_method, class_names, grid: Grid, point_rc, hashes: dict,
                 zones_layer_name: str | None = None,
                 highest_class_min_share: float = HIGHEST_CLASS_MIN_SHARE) -> tuple[dict, dict]:
    """(sidecar, GeoPackage layer names) of a summary (the same keys for `summarize` and `batch --zones`).
    The zone layer keeps the input layer's name unless ``zones_layer_name`` is given."""
    zones = layers.zones
    if zones_layer_name is None:
        zones_layer_name = zones.layer if zones.layer not in (UNITS_LAYER, POINTS_LAYER) else ZONES_LAYER
    layer_names = {ZONES_LAYER: zones_layer_name}
    meta = {
        **sidecar_head(tool),
        folder_key: str(folder),
        "outputs": sidecar_outputs(out_path, tables, layer_names, csv_paths),
        "method": {**summary_method(area_method, class_names), "highest_class_min_share": highest_class_min_share},
        "zones": layer_provenance(layers.zones_path, zones),
        "raster_crs": grid.crs.to_string(),
        "units": COLUMN_UNITS,
    }
    if layers.units is not None:
        meta["planning_units"] = layer_provenance(layers.units_path, layers.units)
    if layers.points is not None:
        points = layers.points
        meta["sinkholes"] = {"file": str(layers.points_path), "layer": points.layer, "count": len(points),
                             "outside_raster": int((point_rc[0] < 0).sum()),
                             "reprojected_from": points.reprojected_from}
    meta["inputs"] = hashes
    return meta, layer_names


def summarize_outputs(
    outdir,
    zones_path,
    layer: Optional[str] = None,
    id_field: Optional[str] = None,
    units_path=None,
    units_layer: Optional[str] = None,
    units_id_field: Optional[str] = None,
    points_path=None,
    points_layer: Optional[str] = None,
    out_path="summary.gpkg",
    overwrite: bool = False,
    progress: Optional[Callable[[int, int], None]] = None,
    workers: Optional[int] = None,
    breaks_from_record: bool = False,
    highest_class_min_share: float = HIGHEST_CLASS_MIN_SHARE,
) -> dict:
    """Summarise a ``denude map`` output folder over zones, optional planning units and
    sinkhole points, and write ``out_path`` (GeoPackage), CSV twins and a
    ``<stem>.summary.json`` sidecar (provenance, method, units). ``progress(done, total)``
    is called with rows of the grid done. ``workers``: processes (None: ``default_workers``;
    1: in this process). With points, the sidecar holds ``sinkhole_evaluation`` (class densities,
    ROC AUC; class breaks set from the record with ``breaks_from_record``). Returns the sidecar content as a dict."""
    outdir = Path(outdir)
    out_path = check_output_path(out_path, [zones_path, units_path, points_path])
    out_path, csv_paths, sidecar = summary_paths(out_path, (units_path is not None, points_path is not None))
    check_new_files([out_path, *csv_paths.values(), sidecar], overwrite)

    remove_dead_staging(out_path.parent)
    datasets, grid = open_map_folder(outdir)
    hasher = concurrent.futures.ThreadPoolExecutor(max_workers=1)
    try:
        input_files = [output_file(outdir, n) for n in REQUIRED_FILES + OPTIONAL_FILES + (RUN_RECORD,)
                       if output_file(outdir, n).is_file()]
        for p in (zones_path, units_path, points_path):
            if p is not None and Path(p).exists():
                input_files += vector_files(Path(p))
        hashes = {str(p): hasher.submit(file_sha256, p) for p in input_files}

        rocks = read_rock_table(outdir / ROCKS_CSV)
        lookup = rocks.lookup()
        rock_names = [rocks.by_code(int(c)).name for c in lookup.codes]
        class_names = hazard_class_names(datasets[HAZARD_TIF])
        areas_row, area_method = cell_areas_km2(grid)
        layers = read_summary_layers(grid, zones_path, layer, id_field, units_path, units_layer, units_id_field,
                                     points_path, points_layer)
        sets = zone_sets(layers, len(class_names), len(rock_names), grid, cover=COVER_TIF in datasets)
        point_rc, point_values = locate_points(layers.points, grid, points_path)
        accumulate_strips(outdir, datasets, grid, areas_row, sets, lookup, point_rc, point_values, progress, workers)
        tables = summary_tables(sets, layers, point_values, class_names, rock_names, grid, area_method,
                                highest_class_min_share)
        meta, layer_names = summary_meta(
            "denude summarize", "map_folder", outdir.resolve(), out_path, tables, layers, csv_paths, area_method,
            class_names, grid, point_rc, {p: {"sha256": f.result()} for p, f in hashes.items()},
            highest_class_min_share=highest_class_min_share)
        if layers.points is not None:
            meta["sinkhole_evaluation"] = evaluate_sinkholes(
                datasets[RATE_TIF], datasets[HAZARD_TIF], areas_row, point_rc, point_values["hazard"],
                class_names, breaks_from_record, str(points_path))
        write_summary_files(out_path, tables, layer_names, csv_paths, sidecar, meta)
        return meta
    finally:
        hasher.shutdown(wait=True, cancel_futures=True)
        for ds in datasets.values():
            ds.close()


