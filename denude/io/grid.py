"""The target grid: CRS, affine transform and size. A small frozen, picklable value object.

Windows are always in integer pixel space of this grid (row/column offsets and sizes).
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
import shapely
from affine import Affine
from pyproj import CRS as ProjCRS
from rasterio.crs import CRS
from rasterio.errors import CRSError
from rasterio.windows import Window

from denude.errors import GridError

#: Largest grid accepted, cells per side (guards against a resolution given in the wrong unit).
MAX_GRID_SIDE = 2_000_000


def parse_crs(value, where: str = "grid") -> CRS:
    """A rasterio CRS from 'EPSG:nnnn', a bare EPSG number, WKT or PROJ text."""
    text = str(value).strip()
    try:
        if text.isdigit():
            return CRS.from_epsg(int(text))
        return CRS.from_user_input(text)
    except (CRSError, ValueError):
        raise GridError(
            f"{where}: CRS {text!r} is not recognised; give e.g. 'EPSG:3035' or a WKT string"
        ) from None


#: A bound within this many cells of a whole multiple of the resolution counts as on it
#: (absorbs floating-point noise from the projection, so a bound is never pushed out a cell).
SNAP_TOLERANCE_CELLS = 1e-9


def check_resolution(resolution) -> tuple[float, float]:
    """A grid resolution (one number or (x, y)) [CRS units] as a positive, finite (x, y) pair."""
    res = resolution if isinstance(resolution, (list, tuple)) else (resolution, resolution)
    try:
        xres, yres = (float(r) for r in res)
    except (TypeError, ValueError):
        raise GridError(f"grid resolution {resolution!r} is not one or two numbers; give e.g. 1000 or '1000 500'") from None
    if not (xres > 0 and yres > 0 and math.isfinite(xres) and math.isfinite(yres)):
        raise GridError(f"grid resolution {resolution!r} must be positive (CRS units)")
    return xres, yres


def snap_bounds_outward(bounds, resolution) -> tuple[float, float, float, float]:
    """(left, bottom, right, top) [CRS units] widened to whole multiples of the resolution
    (x, y) [CRS units]: left and bottom rounded down, right and top rounded up, so the grid's
    origin lies on multiples of the resolution and the bounds still cover ``bounds``."""
    xres, yres = check_resolution(resolution)
    left, bottom, right, top = (float(v) for v in bounds)

    def snap(value, step, outward):
        k = value / step
        near = abs(k - round(k)) <= SNAP_TOLERANCE_CELLS * max(1.0, abs(k))
        return (round(k) if near else outward(k)) * step

    return (snap(left, xres, math.floor), snap(bottom, yres, math.floor),
            snap(right, xres, math.ceil), snap(top, yres, math.ceil))


@dataclass(frozen=True)
class Grid:
    """A north-up raster grid. ``crs_wkt`` keeps it picklable; ``transform`` is 6 GDAL-order
    affine coefficients (a, b, c, d, e, f) in CRS units (metres or degrees)."""

    crs_wkt: str
    transform: tuple
    width: int
    height: int

    def __post_init__(self):
        if not self.crs_wkt:
            raise GridError("target grid has no CRS; give the grid a CRS (e.g. --grid-crs EPSG:3035)")
        if not (0 < self.width <= MAX_GRID_SIDE and 0 < self.height <= MAX_GRID_SIDE):
            raise GridError(
                f"target grid size {self.width} x {self.height} cells is outside 1-{MAX_GRID_SIDE} per "
                "side; check the resolution and its unit (CRS units)"
            )
        a, b, _, d, e, _ = tuple(self.transform)[:6]
        if b != 0 or d != 0 or a <= 0 or e >= 0:
            raise GridError(
                f"target grid transform {tuple(self.transform)[:6]} is rotated or not north-up; "
                "use a north-up grid"
            )
        object.__setattr__(self, "transform", tuple(float(v) for v in tuple(self.transform)[:6]))

    # construction -------------------------------------------------------------------
    @classmethod
    def from_dataset(cls, dataset) -> "Grid":
        """The grid of an open rasterio dataset."""
        if dataset.crs is None:
            raise GridError(f"{dataset.name}: raster has no CRS; assign one (e.g. with gdal_edit -a_srs)")
        return cls(dataset.crs.to_wkt(), tuple(dataset.transform)[:6], dataset.width, dataset.height)

    @classmethod
    def from_bounds(cls, crs, resolution, bounds) -> "Grid":
        """A grid from a CRS, a resolution (one number or (x, y), CRS units) and bounds
        (left, bottom, right, top, CRS units). The right and bottom edges are extended to
        whole cells."""
        crs = crs if isinstance(crs, CRS) else parse_crs(crs)
        xres, yres = check_resolution(resolution)
        try:
            left, bottom, right, top = (float(v) for v in bounds)
        except (TypeError, ValueError):
            raise GridError(
                f"grid bounds {bounds!r} are not numbers; give bounds as left bottom right top"
            ) from None
        if not (right > left and top > bottom):
            raise GridError(
                f"grid bounds {list(bounds)} must be left bottom right top with right > left and top > bottom"
            )
        width = max(1, math.ceil((right - left) / xres - 1e-9))
        height = max(1, math.ceil((top - bottom) / yres - 1e-9))
        return cls(crs.to_wkt(), (xres, 0.0, left, 0.0, -yres, top), width, height)

    # properties ---------------------------------------------------------------------
    @property
    def crs(self) -> CRS:
        return CRS.from_wkt(self.crs_wkt)

    @property
    def affine(self) -> Affine:
        return Affine(*self.transform)

    @property
    def shape(self) -> tuple[int, int]:
        return (self.height, self.width)

    @property
    def res(self) -> tuple[float, float]:
        """Cell size (x, y) in CRS units."""
        return (self.transform[0], -self.transform[4])

    @property
    def bounds(self) -> tuple[float, float, float, float]:
        """(left, bottom, right, top) in CRS units."""
        a, _, c, _, e, f = self.transform
        return (c, f + e * self.height, c + a * self.width, f)

    def window_transform(self, window: Window) -> Affine:
        """Affine transform of a window of this grid (integer offsets)."""
        return self.affine @ Affine.translation(int(window.col_off), int(window.row_off))

    def full_window(self) -> Window:
        return Window(0, 0, self.width, self.height)

    def same_as(self, other: "Grid") -> bool:
        """Same size, same transform and an equal CRS."""
        return (
            self.width == other.width and self.height == other.height
            and all(math.isclose(a, b, rel_tol=0, abs_tol=1e-9 * max(1.0, abs(a)))
                    for a, b in zip(self.transform, other.transform))
            and self.crs == other.crs
        )

    def as_dict(self) -> dict:
        """JSON-ready description (for run.json and `denude check`)."""
        crs = self.crs
        return {
            "crs_wkt": self.crs_wkt,
            "epsg": crs.to_epsg(),
            "transform": list(self.transform),
            "width": self.width,
            "height": self.height,
            "resolution": list(self.res),
            "bounds": list(self.bounds),
        }

    def crs_label(self) -> str:
        """Short CRS name for the terminal: EPSG code, else the start of the CRS string."""
        crs = self.crs
        return f"EPSG:{crs.to_epsg()}" if crs.to_epsg() else crs.to_string()[:40]

    def geometry_text(self) -> str:
        """'CRS, resolution X x Y, bounds (l, b, r, t)' for the terminal."""
        l, b, r, t = self.bounds
        return (f"{self.crs_label()}, resolution {self.res[0]:.12g} x {self.res[1]:.12g}, "
                f"bounds ({l:.12g}, {b:.12g}, {r:.12g}, {t:.12g})")

    def describe(self) -> str:
        """One line for the terminal."""
        return f"{self.width} x {self.height} cells, {self.geometry_text()}"


# -- cell and polygon areas ------------------------------------------------------------------
def zone_areas_km2(geometries, grid: Grid) -> np.ndarray:
    """Whole area of each polygon [km2], inside the map or not, measured like the cells:
    geodesic on the CRS ellipsoid for a geographic raster CRS, else planar in its CRS units."""
    crs = ProjCRS.from_user_input(grid.crs.to_wkt())
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
        geod = ProjCRS.from_user_input(grid.crs.to_wkt()).get_geod()
        return f"geodesic (pyproj.Geod on the {geod.initstring.strip()} ellipsoid, per row)"
    return "planar (|a*e| of the geotransform)"


def cell_areas_km2(grid: Grid) -> tuple[np.ndarray, str]:
    """Area of one cell of each row [km2] (float64, length ``height``) and the method used:
    geodesic on the CRS ellipsoid for a geographic CRS, else planar |a*e| (CRS units in m)."""
    t = grid.affine
    if grid.crs.is_geographic:
        geod = ProjCRS.from_user_input(grid.crs.to_wkt()).get_geod()
        lons = t.c + np.linspace(0.0, t.a, 17)
        edges = np.clip(t.f + np.arange(grid.height + 1) * t.e, -90.0, 90.0)
        areas = np.empty(grid.height)
        for i in range(grid.height):
            top, bottom = edges[i], edges[i + 1]
            ring_lon = np.concatenate((lons, lons[::-1]))
            ring_lat = np.concatenate((np.full(lons.size, top), np.full(lons.size, bottom)))
            areas[i] = abs(geod.polygon_area_perimeter(ring_lon, ring_lat)[0]) / 1e6
        return areas, cell_area_method(grid)
    axes = ProjCRS.from_user_input(grid.crs.to_wkt()).axis_info
    factor = axes[0].unit_conversion_factor if axes else 1.0
    if axes and axes[0].unit_name.lower() in ("degree", "radian", "grad"):
        raise GridError(f"raster CRS axis unit {axes[0].unit_name!r} is not linear; reproject the maps to a metric or geographic CRS")
    area = abs(t.a * t.e - t.b * t.d) * factor * factor / 1e6
    return np.full(grid.height, area), cell_area_method(grid)

