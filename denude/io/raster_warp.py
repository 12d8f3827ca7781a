"""Warping inputs onto the target grid: footprints, the resampling rule, warp plans and
per-window readers (``GridReader``).

Warping rules (see ``choose_resampling``): categorical inputs use nearest, or mode when the
target cells are coarser than the source cells; bilinear and other interpolating methods are
refused for them. Continuous inputs use bilinear, or average when coarsening. Source and
destination nodata are always passed explicitly, and cells outside an input's footprint
become nodata (NaN, or ``INT32_NODATA`` for codes), never 0.

Block-by-block warping equals whole-raster warping bit for bit: a window is read from a
WarpedVRT that spans the whole target grid, and GDAL warps that VRT in its own fixed blocks,
so a cell's value never depends on the window that asked for it. (Warping each window into
its own array does not have this property: GDAL's approximate transformer and resampling
scale are derived per chunk, and values then differ in the last digits between windows.)
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
from rasterio.enums import Resampling
from rasterio.errors import RasterioError
from rasterio.vrt import WarpedVRT
from rasterio.warp import transform_bounds
from rasterio.windows import Window

from denude.errors import GridError, InputError
from denude.io.grid import Grid
from denude.io.raster_inputs import RasterInfo, _opened, check_georeferenced, open_raster, read_error
from denude.registry import INT32_NODATA


RESAMPLING = {
    "nearest": Resampling.nearest,
    "mode": Resampling.mode,
    "bilinear": Resampling.bilinear,
    "cubic": Resampling.cubic,
    "average": Resampling.average,
}
CATEGORICAL_METHODS = ("nearest", "mode")
CONTINUOUS_METHODS = ("bilinear", "cubic", "average", "nearest")

#: Target cells at least this many times larger than source cells count as coarsening.
COARSENING_RATIO = 1.5

#: Error allowed in the approximate coordinate transformer, pixels (gdalwarp's default; common
#: practice, no source). Consistency between windows does not depend on it (see GridReader).
WARP_TOLERANCE_PX = 0.125
#: Memory for one warp chunk, MB.
WARP_MEM_LIMIT_MB = 64



DENSIFY_POINTS = 21


def footprint_in_crs(path, role: str, crs, dataset=None) -> tuple[float, float, float, float]:
    """A raster's bounds (left, bottom, right, top) transformed into ``crs`` [its units], with
    densified edges. No CRS, an extent that cannot be projected, or one that wraps around the
    antimeridian in ``crs`` is a one-line GridError. ``dataset``: the raster, if already open."""
    with _opened(path, role, dataset) as ds:
        check_georeferenced(ds, f"{role} raster {path}")
        src_crs, src_bounds = ds.crs, tuple(ds.bounds)
    if src_crs == crs:
        return src_bounds
    try:
        left, bottom, right, top = transform_bounds(src_crs, crs, *src_bounds, densify_pts=DENSIFY_POINTS)
    except Exception:  # projection failures depend on PROJ
        left = bottom = right = top = math.nan
    if not all(math.isfinite(v) for v in (left, bottom, right, top)) or right <= left or top <= bottom:
        raise GridError(
            f"{role} raster {path}: its extent cannot be projected to the target CRS as one box "
            "(outside the CRS's area, or across the antimeridian); give --grid-bounds"
        )
    return (left, bottom, right, top)


def footprint_on(info: RasterInfo, grid: Grid) -> tuple[float, float, float, float]:
    """An input's bounds in the target CRS (densified edges)."""
    src = info.grid
    if src.crs == grid.crs:
        return src.bounds
    try:
        return transform_bounds(src.crs, grid.crs, *src.bounds, densify_pts=DENSIFY_POINTS)
    except Exception:  # pragma: no cover - projection failures depend on PROJ
        raise GridError(
            f"{info.role} raster {info.path}: its extent cannot be projected to the target CRS; "
            "check both CRSs"
        ) from None


def overlap_fraction(info: RasterInfo, grid: Grid) -> float:
    """Fraction (0-1) of the target grid's extent covered by the input's footprint."""
    l, b, r, t = footprint_on(info, grid)
    gl, gb, gr, gt = grid.bounds
    w = max(0.0, min(r, gr) - max(l, gl))
    h = max(0.0, min(t, gt) - max(b, gb))
    area = (gr - gl) * (gt - gb)
    return (w * h) / area if area > 0 else 0.0


def source_cell_size_on(info: RasterInfo, grid: Grid) -> float:
    """Approximate source cell size in target CRS units (geometric mean of x and y)."""
    l, b, r, t = footprint_on(info, grid)
    sx = (r - l) / info.width
    sy = (t - b) / info.height
    return math.sqrt(abs(sx * sy))


def is_coarsening(info: RasterInfo, grid: Grid) -> bool:
    """True when target cells are at least COARSENING_RATIO times the source cells."""
    tx, ty = grid.res
    return math.sqrt(tx * ty) >= COARSENING_RATIO * source_cell_size_on(info, grid)


def choose_resampling(info: RasterInfo, grid: Grid, categorical: bool, requested: str = "auto") -> str:
    """The resampling method for one input: 'auto' picks by kind and coarsening."""
    requested = (requested or "auto").lower()
    allowed = CATEGORICAL_METHODS if categorical else CONTINUOUS_METHODS
    if requested == "auto":
        if categorical:
            return "mode" if is_coarsening(info, grid) else "nearest"
        return "average" if is_coarsening(info, grid) else "bilinear"
    if requested not in allowed:
        kind = "categorical" if categorical else "continuous"
        extra = " (interpolating codes would invent classes)" if categorical and requested in RESAMPLING else ""
        raise InputError(
            f"{info.role} raster {info.path}: resampling {requested!r} is not allowed for a {kind} "
            f"input{extra}; use one of auto, {', '.join(allowed)}"
        )
    return requested


def aligned_offset(info: RasterInfo, grid: Grid) -> tuple[int, int] | None:
    """(row, col) offset of the target grid inside the source when both share CRS, cell size
    and cell edges (then reading is a plain window read); else None."""
    s = info.transform
    g = grid.transform
    if not (math.isclose(s[0], g[0], rel_tol=1e-9) and math.isclose(s[4], g[4], rel_tol=1e-9)):
        return None
    col = (g[2] - s[2]) / s[0]
    row = (g[5] - s[5]) / s[4]
    if abs(col - round(col)) > 1e-6 or abs(row - round(row)) > 1e-6:
        return None
    if info.grid.crs != grid.crs:
        return None
    return int(round(row)), int(round(col))


@dataclass(frozen=True)
class WarpPlan:
    """How one input is put on the target grid (picklable)."""

    info: RasterInfo
    categorical: bool
    resampling: str
    offset: tuple[int, int] | None          # set when the input is aligned with the grid
    footprint: tuple[float, float, float, float]  # in target CRS units

    def describe(self) -> str:
        how = "read directly (aligned with the target grid)" if self.offset is not None else f"warped with {self.resampling}"
        kind = "categorical" if self.categorical else "continuous"
        return f"{self.info.role} ({kind}): {how}"


def plan_warp(info: RasterInfo, grid: Grid, categorical: bool, requested: str = "auto") -> WarpPlan:
    """Decide how to bring one input onto the grid; refuses inputs that miss the grid."""
    if overlap_fraction(info, grid) <= 0.0:
        raise GridError(
            f"{info.role} raster {info.path} does not overlap the target grid {grid.bounds}; check "
            "its CRS and extent or choose another grid"
        )
    method = choose_resampling(info, grid, categorical, requested)
    offset = aligned_offset(info, grid)
    return WarpPlan(info, categorical, method, offset, footprint_on(info, grid))


def _dest_dtype(plan: WarpPlan):
    if plan.categorical:
        return np.int32
    return np.float64 if plan.info.dtype == "float64" else np.float32


def _dest_nodata(plan: WarpPlan):
    return INT32_NODATA if plan.categorical else np.nan


def _mark_nodata(plan: WarpPlan, data: np.ndarray, src_nodata) -> np.ndarray:
    """Cast a directly read block to the destination dtype with destination nodata."""
    if plan.categorical and data.dtype.kind == "f":
        bad = ~np.isfinite(data)
        out = np.where(bad, 0, data).astype(np.int32)
        out[bad] = INT32_NODATA
    else:
        out = data.astype(_dest_dtype(plan))
    if src_nodata is not None and not math.isnan(src_nodata):
        if plan.categorical:
            out[data == src_nodata] = INT32_NODATA
        else:
            out[data == src_nodata] = np.nan
    return out


def read_on_grid(dataset, plan: WarpPlan, grid: Grid, window: Window) -> np.ndarray:
    """One window of an input on the target grid: int32 codes (INT32_NODATA = none) for
    categorical inputs, float32/64 values (NaN = none) for continuous ones.

    ``dataset`` is the open input; for a plan that needs warping pass the ``GridReader``
    (or call ``GridReader.read``), which warps through a full-grid WarpedVRT."""
    reader = GridReader(plan, grid, dataset=dataset)
    try:
        return reader.read(window)
    finally:
        reader.close()


class GridReader:
    """Reads windows of one input on the target grid. Not shared between threads.

    Aligned inputs are plain window reads. Other inputs are read through one WarpedVRT
    spanning the whole target grid: GDAL warps such a VRT in fixed blocks, so the value of a
    cell does not depend on which window asked for it (tiled == whole, bit for bit)."""

    def __init__(self, plan: WarpPlan, grid: Grid, dataset=None):
        self.plan = plan
        self.grid = grid
        self._own = dataset is None
        self.dataset = dataset if dataset is not None else open_raster(plan.info.path, plan.info.role)
        self.vrt = None
        self.dtype = _dest_dtype(plan)
        self.nodata = _dest_nodata(plan)

    def _warped(self):
        if self.vrt is None:
            self.vrt = WarpedVRT(
                self.dataset, crs=self.grid.crs, transform=self.grid.affine,
                width=self.grid.width, height=self.grid.height,
                resampling=RESAMPLING[self.plan.resampling],
                src_nodata=self.dataset.nodata, nodata=self.nodata,
                dtype=np.dtype(self.dtype).name, tolerance=WARP_TOLERANCE_PX,
                warp_mem_limit=WARP_MEM_LIMIT_MB,
            )
        return self.vrt

    def read(self, window: Window) -> np.ndarray:
        """One window on the target grid; a GDAL read failure of the input (truncated file,
        corrupt tile, a mosaic tile that cannot be opened) is a one-line InputError naming it."""
        try:
            return self._read(window)
        except (RasterioError, OSError) as exc:
            info = self.plan.info
            where = f" in the window at row {int(window.row_off)}, column {int(window.col_off)} of the target grid"
            raise read_error(info.path, info.role, exc, where) from None

    def _read(self, window: Window) -> np.ndarray:
        plan, grid = self.plan, self.grid
        rows, cols = int(window.height), int(window.width)
        out = np.full((rows, cols), self.nodata, dtype=self.dtype)
        if plan.offset is not None:
            ds = self.dataset
            r0 = int(window.row_off) + plan.offset[0]
            c0 = int(window.col_off) + plan.offset[1]
            rs, re_ = max(r0, 0), min(r0 + rows, ds.height)
            cs, ce = max(c0, 0), min(c0 + cols, ds.width)
            if rs < re_ and cs < ce:
                block = ds.read(1, window=Window(cs, rs, ce - cs, re_ - rs))
                out[rs - r0:re_ - r0, cs - c0:ce - c0] = _mark_nodata(plan, block, ds.nodata)
            return out
        # windows clearly outside the footprint hold nodata only: skip the warp
        transform = grid.window_transform(window)
        wl, wt = transform.c, transform.f
        wr, wb = wl + transform.a * cols, wt + transform.e * rows
        l, b, r, t = plan.footprint
        margin = 2.0 * max(grid.res[0], grid.res[1], (r - l) / plan.info.width, (t - b) / plan.info.height)
        if wr < l - margin or wl > r + margin or wt < b - margin or wb > t + margin:
            return out
        return self._warped().read(1, window=window, out_dtype=self.dtype)

    def close(self) -> None:
        if self.vrt is not None:
            self.vrt.close()
            self.vrt = None
        if self._own:
            self.dataset.close()
