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
import datetime as _dt
import json
import os
from dataclasses import dataclass
from pathlib import Path
from typing import Callable, Optional

import numpy as np
import shapely

from denude import __version__
from denude.cautions import CAUTION, UPPER_BOUND_NOTE
from denude.core.hazard import DEFAULT_CLASS_NAMES, HAZARD_NODATA, HIGHEST_CLASS_MIN_SHARE
from denude.core.zonal import PERCENTILE_RELATIVE_RESOLUTION, ZonalAccumulator
from denude.io.grid import Grid
from denude.io.rasters import file_sha256
from denude.errors import GridError, InputError, OutputError, ZoneError

#: Raster files of the ``denude map`` output folder read here (DEVELOPERS.md contract).
RATE_TIF = "denudation_mm_per_kyr.tif"
CO2_TIF = "co2_drawdown_t_per_km2_yr.tif"
HAZARD_TIF = "hazard_class.tif"
LITHOLOGY_TIF = "lithology_code.tif"
SOLUBLE_TIF = "soluble_area_fraction.tif"
ROCKS_CSV = "rocks.csv"
REQUIRED_FILES = (RATE_TIF, CO2_TIF, HAZARD_TIF, LITHOLOGY_TIF, SOLUBLE_TIF, ROCKS_CSV)

#: Target number of cells per strip (bounds the memory: about 60 bytes per cell).
STRIP_CELLS = 1 << 21
#: GDAL block cache while reading [MB]: every block is read once, so a cache only costs memory.
GDAL_CACHE_MB = 64

ZONES_LAYER = "zones"
UNITS_LAYER = "planning_units"
POINTS_LAYER = "sinkholes"

#: Units of the output columns (also written to the summary sidecar).
COLUMN_UNITS = {
    "area_km2": "km2", "zone_area_km2": "km2", "map_coverage_fraction": "1", "valid_area_km2": "km2", "soluble_area_km2": "km2",
    "soluble_area_fraction": "1", "valid_cells": "cells", "nodata_cells": "cells",
    "denudation_mean_mm_per_kyr": "mm/kyr", "denudation_std_mm_per_kyr": "mm/kyr",
    "denudation_min_mm_per_kyr": "mm/kyr", "denudation_max_mm_per_kyr": "mm/kyr",
    "denudation_p10_mm_per_kyr": "mm/kyr", "denudation_p50_mm_per_kyr": "mm/kyr",
    "denudation_p90_mm_per_kyr": "mm/kyr", "rock_volume_m3_per_yr": "m3/yr",
    "rock_mass_t_per_yr": "t/yr", "co2_drawdown_t_per_yr": "t/yr",
    "hazard_area_km2_*": "km2", "hazard_share_*": "1", "hazard_max_class": "class index (-1 none)",
    "hazard_max_name": "class name (deprecated: any single cell; use hazard_highest_name)",
    "hazard_dominant_class": "class index (-1 none)", "hazard_dominant_name": "class name (largest area)",
    "hazard_highest_class": "class index (-1 none)",
    "hazard_highest_name": "class name (highest class covering at least the minimum share of area_km2)",
    "dominant_rock": "rock name", "dominant_rock_share": "1", "sinkhole_count": "points",
    "sinkhole_density_per_km2": "1/km2", "sinkhole_mean_rate_mm_per_kyr": "mm/kyr",
    "sinkhole_rate_ratio": "1", "denudation_mm_per_kyr": "mm/kyr",
    "hazard_class": "class index (255 nodata)",
}


# -- grid ---------------------------------------------------------------------------------
def zone_areas_km2(geometries, grid: Grid) -> np.ndarray:
    """Whole area of each polygon [km2], inside the map or not, measured like the cells:
    geodesic on the CRS ellipsoid for a geographic raster CRS, else planar in its CRS units."""
    from pyproj import CRS

    crs = CRS.from_user_input(grid.crs.to_wkt())
    if crs.is_geographic:
        geod = crs.get_geod()
        return np.array([abs(geod.geometry_area_perimeter(g)[0]) / 1e6 if g is not None else 0.0
                         for g in geometries])
    axes = crs.axis_info
    factor = axes[0].unit_conversion_factor if axes else 1.0
    return shapely.area(np.asarray(geometries)) * factor * factor / 1e6


def cell_area_method(grid: Grid) -> str:
    """How ``cell_areas_km2`` measures the cells of ``grid`` (text for the summary sidecar)."""
    if grid.crs.is_geographic:
        from pyproj import CRS

        geod = CRS.from_user_input(grid.crs.to_wkt()).get_geod()
        return f"geodesic (pyproj.Geod on the {geod.initstring.strip()} ellipsoid, per row)"
    return "planar (|a*e| of the geotransform)"


def cell_areas_km2(grid: Grid) -> tuple[np.ndarray, str]:
    """Area of one cell of each row [km2] (float64, length ``height``) and the method used:
    geodesic on the CRS ellipsoid for a geographic CRS, else planar |a*e| (CRS units in m)."""
    t = grid.affine
    if grid.crs.is_geographic:
        from pyproj import CRS

        geod = CRS.from_user_input(grid.crs.to_wkt()).get_geod()
        lons = t.c + np.linspace(0.0, t.a, 17)
        edges = np.clip(t.f + np.arange(grid.height + 1) * t.e, -90.0, 90.0)
        areas = np.empty(grid.height)
        for i in range(grid.height):
            top, bottom = edges[i], edges[i + 1]
            ring_lon = np.concatenate((lons, lons[::-1]))
            ring_lat = np.concatenate((np.full(lons.size, top), np.full(lons.size, bottom)))
            areas[i] = abs(geod.polygon_area_perimeter(ring_lon, ring_lat)[0]) / 1e6
        return areas, cell_area_method(grid)
    from pyproj import CRS

    axes = CRS.from_user_input(grid.crs.to_wkt()).axis_info
    factor = axes[0].unit_conversion_factor if axes else 1.0
    if axes and axes[0].unit_name.lower() in ("degree", "radian", "grad"):
        raise GridError(f"raster CRS axis unit {axes[0].unit_name!r} is not linear; reproject the maps to a metric or geographic CRS")
    area = abs(t.a * t.e - t.b * t.d) * factor * factor / 1e6
    return np.full(grid.height, area), cell_area_method(grid)


class _CellIndexSource:
    """exactextract raster source for one strip of the grid whose values are the flat
    (row-major) cell indices of the strip (int32): exactextract's ``values`` operation then
    names the cells it covers, and no pixel of the maps is read by exactextract."""

    def __new__(cls, *args, **kwargs):  # built lazily so importing this module is cheap
        from exactextract.raster import RasterSource

        class CellIndexSource(RasterSource):
            def __init__(self, extent, nx, ny):
                super().__init__()
                self._extent, self._nx, self._ny = extent, nx, ny
                self._index = np.arange(nx * ny, dtype=np.int32).reshape(ny, nx)

            def res(self):
                e = self._extent
                return ((e[2] - e[0]) / self._nx, (e[3] - e[1]) / self._ny)

            def extent(self):
                return self._extent

            def srs_wkt(self):
                return None

            def nodata_value(self):
                return None

            def read_window(self, x0, y0, nx, ny):
                return self._index[y0:y0 + ny, x0:x0 + nx]

        return CellIndexSource(*args, **kwargs)


def _features(wkbs, index):
    from exactextract.feature import Feature, FeatureSource

    class WkbFeature(Feature):
        def __init__(self, wkb, i):
            Feature.__init__(self)
            self._wkb, self._i = wkb, i

        def geometry(self):
            return self._wkb

        def get(self, name):
            return self._i

        def fields(self):
            return ["zone_index"]

        def set_geometry_format(self):
            return "wkb"

    class WkbSource(FeatureSource):
        def __init__(self):
            super().__init__()

        def count(self):
            return len(index)

        def __iter__(self):
            for wkb, i in zip(wkbs, index):
                yield WkbFeature(wkb, int(i))

        def srs_wkt(self):
            return None

    return WkbSource()


@dataclass
class CoveragePairs:
    """Cells covered by zones in one strip, in runs of one zone: pairs
    ``run_start[k]:run_start[k + 1]`` belong to zone ``run_zone[k]``; ``cell`` is the flat
    (row-major) cell index in the strip (int32), ``coverage`` the fraction [0-1] of the cell
    inside the zone (float64)."""

    run_zone: np.ndarray
    run_start: np.ndarray
    cell: np.ndarray
    coverage: np.ndarray

    @property
    def zone(self) -> np.ndarray:
        """Zone index of every pair (int64)."""
        return np.repeat(self.run_zone, np.diff(self.run_start))


def coverage_pairs(extent, nx, ny, wkbs, index) -> CoveragePairs:
    """Coverage fractions of the cells of an ``ny`` x ``nx`` grid (fewer than 2**31 cells) with
    ``extent`` (xmin, ymin, xmax, ymax) by each polygon (WKB), grouped by zone in input order."""
    from exactextract import exact_extract
    from exactextract.feature import JSONFeature
    from exactextract.writer import Writer

    if nx * ny >= 2 ** 31:
        raise ValueError("strip too large for int32 cell indices")
    zones, cells, covs = [], [], []

    class ArrayWriter(Writer):
        """Collects the covered cells and their coverage of each feature, in order."""

        def write(self, feature):
            f = JSONFeature()
            feature.copy_to(f)
            props = f.feature["properties"]
            if len(props["values"]):
                zones.append(props["zone_index"])
                cells.append(props["values"])
                covs.append(props["coverage"])

        def features(self):
            return None

    exact_extract(_CellIndexSource(extent, nx, ny), _features(wkbs, index), ["values", "coverage"],
                  include_cols=["zone_index"], output=ArrayWriter())
    if not cells:
        return CoveragePairs(np.zeros(0, np.int64), np.zeros(1, np.int64), np.zeros(0, np.int32), np.zeros(0, np.float64))
    lengths = np.fromiter((len(c) for c in cells), np.int64, len(cells))
    return CoveragePairs(np.asarray(zones, np.int64), np.r_[0, np.cumsum(lengths)],
                         np.concatenate(cells), np.concatenate(covs).astype(np.float64, copy=False))


# -- inputs -------------------------------------------------------------------------------
def output_file(outdir: Path, name: str) -> Path:
    """A map layer in ``outdir``: the GeoTIFF of `denude map`, else the VRT mosaic that
    `denude batch` writes under the same stem."""
    path = outdir / name
    if not path.is_file() and path.suffix == ".tif" and path.with_suffix(".vrt").is_file():
        return path.with_suffix(".vrt")
    return path


def _open_outdir(outdir: Path):
    import rasterio

    missing = [name for name in REQUIRED_FILES if not output_file(outdir, name).is_file()]
    if not outdir.is_dir():
        raise InputError(f"{outdir}: not a folder; give the output folder of 'denude map'")
    if missing:
        raise InputError(f"{outdir}: missing {', '.join(missing)}; give the complete output folder of 'denude map' or 'denude batch'")
    datasets = {}
    try:
        for name in REQUIRED_FILES[:-1]:
            try:
                datasets[name] = rasterio.open(output_file(outdir, name))
            except rasterio.errors.RasterioIOError as exc:
                raise InputError(f"{outdir / name}: not a readable raster ({' '.join(str(exc).split())}); rerun 'denude map'") from None
        ref = datasets[RATE_TIF]
        if ref.crs is None:
            raise GridError(f"{outdir / RATE_TIF}: has no CRS; rerun 'denude map' with a target CRS")
        t = ref.transform
        if t.b != 0 or t.d != 0 or t.e >= 0 or t.a <= 0:
            raise GridError(f"{outdir / RATE_TIF}: grid is rotated or not north-up ({tuple(t)[:6]}); warp it to a north-up grid")
        for name, ds in datasets.items():
            if (ds.width, ds.height) != (ref.width, ref.height) or not ds.transform.almost_equals(t) or ds.crs != ref.crs:
                raise GridError(f"{outdir / name}: grid differs from {RATE_TIF}; rerun 'denude map' so all maps share one grid")
    except Exception:
        for ds in datasets.values():
            ds.close()
        raise
    return datasets, Grid.from_dataset(ref)


def hazard_class_names(dataset) -> list[str]:
    """Class names of ``hazard_class.tif``, from its tags (a JSON list or a comma-separated
    value under a key such as ``class_names``), else the built-in names."""
    tags = {**dataset.tags(), **dataset.tags(1)}
    lowered = {k.lower(): v for k, v in tags.items()}
    for key in ("class_names", "hazard_class_names", "hazard_classes", "names", "classes"):
        value = lowered.get(key)
        if not value:
            continue
        try:
            names = json.loads(value)
            if isinstance(names, dict):
                names = [names[k] for k in sorted(names, key=lambda s: int(s))]
        except (ValueError, TypeError):
            sep = "|" if "|" in value else (";" if ";" in value else ",")
            names = [v.strip() for v in value.split(sep)]
        names = [str(n) for n in names if str(n).strip()]
        if names:
            return names
    return list(DEFAULT_CLASS_NAMES)


def vector_files(path: Path) -> list[Path]:
    """A vector file and its sidecars (shapefile parts)."""
    if path.suffix.lower() == ".shp":
        return sorted(p for p in path.parent.glob(path.stem + ".*") if p.is_file())
    return [path]


# -- main entry ---------------------------------------------------------------------------
@dataclass
class _ZoneSet:
    name: str
    layer: object            # PolygonLayer
    wkbs: np.ndarray
    bounds: np.ndarray
    nonempty: np.ndarray
    acc: ZonalAccumulator


def _prepare(name, layer, n_classes, n_rocks, grid):
    geoms = layer.geometry
    nonempty = ~(shapely.is_missing(geoms) | shapely.is_empty(geoms))
    bounds = np.full((len(geoms), 4), np.nan)
    if nonempty.any():
        bounds[nonempty] = shapely.bounds(geoms[nonempty])
    xmin, ymin, xmax, ymax = grid.bounds
    inside = nonempty & (bounds[:, 0] < xmax) & (bounds[:, 2] > xmin) & (bounds[:, 1] < ymax) & (bounds[:, 3] > ymin)
    wkbs = np.empty(len(geoms), dtype=object)
    wkbs[nonempty] = shapely.to_wkb(geoms[nonempty])
    return _ZoneSet(name, layer, wkbs, bounds, inside, ZonalAccumulator(len(geoms), n_classes, n_rocks))


def zone_partials(outdir, geometries, progress=None, workers: Optional[int] = 1) -> ZonalAccumulator:
    """Partial sums over ``geometries`` (shapely polygons in the raster CRS) of one map
    output folder, e.g. one tile of a batch: merge the results of several tiles with
    ``ZonalAccumulator.merge`` and call ``finalize``."""
    from denude.io.rock_csv import read_rock_table

    outdir = Path(outdir)
    datasets, grid = _open_outdir(outdir)
    try:
        lookup = read_rock_table(outdir / ROCKS_CSV).lookup()
        n_classes = len(hazard_class_names(datasets[HAZARD_TIF]))
        layer = _Geoms(np.asarray(geometries, dtype=object))
        zs = _prepare("zones", layer, n_classes, len(lookup.codes), grid)
        _accumulate_strips(outdir, datasets, grid, cell_areas_km2(grid)[0], [zs], lookup, None, None, progress, workers)
        return zs.acc
    finally:
        for ds in datasets.values():
            ds.close()


@dataclass
class _Geoms:
    geometry: np.ndarray


def _strip_rows(dataset, width) -> int:
    block_h = dataset.block_shapes[0][0] if dataset.block_shapes else 256
    rows = max(1, STRIP_CELLS // max(width, 1))
    return max(block_h, rows // block_h * block_h)


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
    highest_class_min_share: float = HIGHEST_CLASS_MIN_SHARE,
) -> dict:
    """Summarise a ``denude map`` output folder over zones, optional planning units and
    sinkhole points, and write ``out_path`` (GeoPackage), CSV twins and a
    ``<stem>.summary.json`` sidecar (provenance, method, units). ``progress(done, total)``
    is called with rows of the grid done. ``workers``: processes (None: ``default_workers``;
    1: in this process). Returns the sidecar content as a dict."""
    from denude.io.rock_csv import read_rock_table
    from denude.io.vectors import check_output_path, read_points, read_polygons

    outdir = Path(outdir)
    out_path = check_output_path(out_path, [zones_path, units_path, points_path])
    csv_paths = {ZONES_LAYER: out_path.with_suffix(".csv")}
    if units_path is not None:
        csv_paths[UNITS_LAYER] = out_path.with_name(out_path.stem + "_planning_units.csv")
    if points_path is not None:
        csv_paths[POINTS_LAYER] = out_path.with_name(out_path.stem + "_sinkholes.csv")
    sidecar = out_path.with_name(out_path.stem + ".summary.json")
    finals = [out_path, *csv_paths.values(), sidecar]
    if not overwrite:
        for item in finals:
            if item.exists():
                raise OutputError(f"{item}: already exists; remove it, choose another output or pass --overwrite")

    datasets, grid = _open_outdir(outdir)
    hasher = concurrent.futures.ThreadPoolExecutor(max_workers=1)
    try:
        input_files = [output_file(outdir, n) for n in REQUIRED_FILES + ("run.json",) if output_file(outdir, n).is_file()]
        for p in (zones_path, units_path, points_path):
            if p is not None and Path(p).exists():
                input_files += vector_files(Path(p))
        hashes = {str(p): hasher.submit(file_sha256, p) for p in input_files}

        rocks = read_rock_table(outdir / ROCKS_CSV)
        lookup = rocks.lookup()
        rock_names = [rocks.by_code(int(c)).name for c in lookup.codes]
        class_names = hazard_class_names(datasets[HAZARD_TIF])
        areas_row, area_method = cell_areas_km2(grid)

        from pyproj import CRS

        target_crs = CRS.from_wkt(grid.crs.to_wkt())
        zones = read_polygons(zones_path, layer, id_field, target_crs, what="zone")
        sets = [_prepare(ZONES_LAYER, zones, len(class_names), len(rock_names), grid)]
        if not sets[0].nonempty.any():
            raise ZoneError(
                f"{zones_path}: no zone overlaps the raster extent {tuple(round(v, 6) for v in grid.bounds)}; "
                "check the zone file and the map output folder cover the same area"
            )
        if units_path is not None:
            units = read_polygons(units_path, units_layer, units_id_field, target_crs, what="planning unit")
            sets.append(_prepare(UNITS_LAYER, units, len(class_names), len(rock_names), grid))
        points = read_points(points_path, points_layer, target_crs) if points_path is not None else None

        point_rc = None
        if points is not None:
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
                import warnings

                from denude.errors import OutOfRangeWarning

                warnings.warn(OutOfRangeWarning(
                    f"{points_path}: {n_outside} of {n_pts} point(s) lie outside the map (or have no "
                    "geometry); they are written with no rate, hazard class 255 and no rock"), stacklevel=2)

        _accumulate_strips(outdir, datasets, grid, areas_row, sets, lookup, point_rc,
                    point_values if points is not None else None, progress, workers)

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
            tables[POINTS_LAYER] = _point_table(points, point_values, class_names, rock_names)

        layer_names = {ZONES_LAYER: zones.layer if zones.layer not in (UNITS_LAYER, POINTS_LAYER) else ZONES_LAYER}
        meta = {
            **sidecar_head("denude summarize"),
            "map_folder": str(outdir.resolve()),
            "outputs": sidecar_outputs(out_path, tables, layer_names, csv_paths),
            "method": {**summary_method(area_method, class_names), "highest_class_min_share": highest_class_min_share},
            "zones": layer_provenance(zones_path, zones),
            "raster_crs": grid.crs.to_string(),
            "units": COLUMN_UNITS,
        }
        if units_path is not None:
            meta["planning_units"] = layer_provenance(units_path, sets[1].layer)
        if points is not None:
            meta["sinkholes"] = {"file": str(points_path), "layer": points.layer, "count": len(points),
                                 "outside_raster": int((point_rc[0] < 0).sum()),
                                 "reprojected_from": points.reprojected_from}
        meta["inputs"] = {p: {"sha256": f.result()} for p, f in hashes.items()}
        write_summary_files(out_path, tables, layer_names, csv_paths, sidecar, meta)
        return meta
    finally:
        hasher.shutdown(wait=True, cancel_futures=True)
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
    from rasterio.windows import Window

    strips = strip_plan(grid, datasets[RATE_TIF]) if strips is None else strips
    t = grid.affine
    xmin, _, xmax, _ = grid.bounds
    planar = bool(np.all(areas_row == areas_row[0]))
    names = (RATE_TIF, HAZARD_TIF, LITHOLOGY_TIF, CO2_TIF, SOLUBLE_TIF)

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
        return {name: datasets[name].read(1, window=window).ravel() for name in wanted}

    def accumulate(zs, pairs, row_area, data):
        zs.acc.add_runs(
            pairs.run_zone, pairs.run_start, pairs.cell, pairs.coverage, row_area, grid.width, data[RATE_TIF],
            soluble_fraction=data[SOLUBLE_TIF], co2_t_per_km2_yr=data[CO2_TIF],
            hazard_class=data[HAZARD_TIF], lithology_code=data[LITHOLOGY_TIF],
            rock_codes=lookup.codes, rock_density_g_cm3=lookup.density_g_cm3,
        )

    # exactextract holds the GIL; reading (rasterio) and summing (numba, nogil) run beside it
    import rasterio

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
    from denude.io.rock_csv import read_rock_table

    datasets, grid = _open_outdir(Path(outdir))
    try:
        lookup = read_rock_table(Path(outdir) / ROCKS_CSV).lookup()
        sets = [_ZoneSet(name, None, wkbs, bounds, nonempty, ZonalAccumulator(len(wkbs), n_classes, n_rocks))
                for name, wkbs, bounds, nonempty, n_classes, n_rocks in payload]
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


def _accumulate_strips(outdir, datasets, grid, areas_row, sets, lookup, point_rc, point_values, progress, workers):
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
    import multiprocessing

    n_chunks = min(len(strips), workers)
    chunks = [list(c) for c in np.array_split(np.arange(len(strips)), n_chunks)]
    payload = [(zs.name, zs.wkbs, zs.bounds, zs.nonempty, zs.acc.n_classes, zs.acc.n_rocks) for zs in sets]
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


# -- outputs (shared with the zone summaries of `denude batch`) ------------------------------
def sidecar_head(tool: str) -> dict:
    """First entries of a ``.summary.json`` sidecar: tool, version, cautions, creation time."""
    return {
        "tool": tool,
        "denude_version": __version__,
        "caution": CAUTION,
        "upper_bound_note": UPPER_BOUND_NOTE,
        "created_utc": _dt.datetime.now(_dt.timezone.utc).isoformat(timespec="seconds"),
    }


def sidecar_outputs(out_path, tables, layer_names, csv_paths) -> dict:
    """The ``outputs`` entry of a sidecar: GeoPackage, its layers with row counts, CSV twins."""
    return {
        "geopackage": str(out_path),
        "layers": {layer_names.get(k, k): len(v) for k, v in tables.items()},
        "csv": {layer_names.get(k, k): str(p) for k, p in csv_paths.items()},
    }


def summary_method(area_method: str, class_names) -> dict:
    """The ``method`` entry of a sidecar: how cells are weighted, measured and summed."""
    return {
        "weighting": "coverage fraction of each cell inside the zone (exactextract) x cell area",
        "cell_area": area_method,
        "cell_counts": "whole cells with coverage > 0 (valid_cells: rate present; nodata_cells: rate NaN)",
        "area_km2": "area of the zone on the raster grid (parts outside the grid not counted)",
        "zone_area_km2": "whole area of the zone polygon, measured like the cells",
        "map_coverage_fraction": "area_km2 / zone_area_km2: below 1 where the zone runs off the map",
        "percentiles": (
            "area-weighted, from a histogram with a zero bin, a (0, 0.01) mm/kyr bin, 4000 "
            "log-spaced bins 0.01-10000 mm/kyr and an overflow bin, interpolated within the "
            f"bin clipped to the exact min/max; resolution {PERCENTILE_RELATIVE_RESOLUTION:.4%} of the value"
        ),
        "rock_volume": "sum of rate [mm/kyr] x covered area [km2]; 1 mm/kyr over 1 km2 = 1 m3/yr",
        "rock_mass": "rock volume x bulk density of the cell's rock type (rocks.csv, g/cm3 = t/m3)",
        "sinkholes": "rate, hazard class and rock of the cell holding each point; a point counts in every zone it intersects",
        "hazard_classes": class_names,
        "hazard_labels": ("hazard_dominant_name: the class of largest area; hazard_highest_name: the highest "
                          "class covering at least highest_class_min_share of area_km2; hazard_max_name "
                          "(any single cell) is deprecated and will be removed in the next release"),
    }


def layer_provenance(file, layer) -> dict:
    """Sidecar entry of a polygon layer (``PolygonLayer``) read from ``file``."""
    return {
        "file": str(file), "layer": layer.layer, "id_field": layer.id_field, "count": len(layer),
        "repaired_geometries": layer.repaired, "reprojected_from": layer.reprojected_from,
    }


def zone_table(layer, cols, class_names, area_method, method_column: bool = True):
    """GeoDataFrame of the zone layer: id, summary columns, method (unless ``method_column``
    is False), geometry (file's CRS)."""
    import geopandas

    from denude.io.vectors import user_attributes

    data = {layer.id_field: layer.frame[layer.id_field].to_numpy()}
    data.update(user_attributes(layer.frame, skip=(layer.id_field,), taken=list(cols) + ["cell_area_method"]))
    data.update(cols)
    if method_column:
        data["cell_area_method"] = np.full(len(layer), "geodesic" if area_method.startswith("geodesic") else "planar", dtype=object)
    return geopandas.GeoDataFrame(data, geometry=list(layer.frame.geometry.values), crs=layer.frame.crs)


def _point_table(points, values, class_names, rock_names):
    import geopandas

    from denude.io.vectors import user_attributes

    frame = points.frame
    data = user_attributes(frame, taken=("denudation_mm_per_kyr", "hazard_class", "hazard_name", "rock"))
    hz = values["hazard"]
    data["denudation_mm_per_kyr"] = values["rate"]
    data["hazard_class"] = hz.astype(np.int64)
    data["hazard_name"] = np.array([class_names[h] if 0 <= h < len(class_names) else "" for h in hz], dtype=object)
    data["rock"] = np.array([rock_names[r] if r >= 0 else "" for r in values["rock"]], dtype=object)
    return geopandas.GeoDataFrame(data, geometry=list(frame.geometry.values), crs=frame.crs)


def write_summary_files(out_path, tables, layer_names, csv_paths, sidecar, meta):
    """Write the GeoPackage ``out_path`` (one layer per table, named by ``layer_names``), the
    CSV twins ``csv_paths`` (the tables without geometry) and the JSON ``sidecar`` under
    temporary names, then rename them all; on failure remove them."""
    from denude.io.vectors import write_layers

    tag = f".partial-{os.getpid()}"
    tmp_gpkg = out_path.with_name("." + out_path.stem + tag + ".gpkg")
    written = []
    try:
        written.append(tmp_gpkg)
        write_layers(tmp_gpkg, {layer_names.get(k, k): v for k, v in tables.items()})
        _style_hook(tmp_gpkg, tables, layer_names, meta)
        moves = [(tmp_gpkg, out_path)]
        for key, path in csv_paths.items():
            tmp = path.with_name("." + path.name + tag)
            written.append(tmp)
            try:
                tables[key].drop(columns=tables[key].geometry.name).to_csv(tmp, index=False)
            except OSError as exc:
                raise OutputError(f"{path}: cannot write ({exc.strerror or exc}); choose a writable folder") from None
            moves.append((tmp, path))
        tmp = sidecar.with_name("." + sidecar.name + tag)
        written.append(tmp)
        try:
            tmp.write_text(json.dumps(meta, indent=2, default=str) + "\n", encoding="utf-8")
        except OSError as exc:
            raise OutputError(f"{sidecar}: cannot write ({exc.strerror or exc}); choose a writable folder") from None
        moves.append((tmp, sidecar))
        for src, dst in moves:
            try:
                os.replace(src, dst)
            except OSError as exc:
                raise OutputError(f"{dst}: cannot be replaced ({exc.strerror or exc}); remove it or choose another output") from None
    except BaseException:
        for item in written:
            try:
                item.unlink()
            except FileNotFoundError:
                pass
        raise


def _style_hook(gpkg, tables, layer_names, meta) -> None:
    """Layer descriptions and default styles (``layer_styles``) of a summary GeoPackage."""
    from denude.io.styles import map_class_scheme, style_summary

    kinds = {ZONES_LAYER: "zones", UNITS_LAYER: "planning_units", POINTS_LAYER: "sinkholes"}
    scheme = map_class_scheme(meta["map_folder"]) if meta.get("map_folder") else None
    breaks, names = scheme if scheme else (None, meta.get("method", {}).get("hazard_classes"))
    style_summary(gpkg, {layer_names.get(k, k): kinds.get(k, "zones") for k in tables},
                  {layer_names.get(k, k): v for k, v in tables.items()}, breaks, names)
