"""Rasters: open and describe inputs, warp one window onto the target grid, write outputs.

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

import hashlib
import math
import os
import queue
import threading
from contextlib import contextmanager
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import rasterio
import rasterio.shutil
from rasterio.enums import Resampling
from rasterio.errors import RasterioError, RasterioIOError
from rasterio.vrt import WarpedVRT
from rasterio.warp import transform_bounds
from rasterio.windows import Window

from denude.errors import GridError, InputError, OutputError, RasterReadError
from denude.io.grid import Grid
from denude.io.mosaic import is_virtual_path
from denude.io.styles import write_category_names
from denude.registry import INT32_NODATA

#: Resampling methods by name; the CLI and job file take these names.
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

#: Rasters with at most this many cells are written in cloud-optimised (COG) layout by default:
#: 2**26 cells = 8192 x 8192 (256 MiB of float32). The COG layout needs a second pass (GDAL's COG
#: driver copies an uncompressed intermediate, which also needs that much temporary disk per
#: output), so larger rasters are plain tiled BigTIFFs with internal overviews instead.
COG_MAX_CELLS = 2**26

#: Error allowed in the approximate coordinate transformer, pixels (gdalwarp's default; common
#: practice, no source). Consistency between windows does not depend on it (see GridReader).
WARP_TOLERANCE_PX = 0.125
#: Memory for one warp chunk, MB.
WARP_MEM_LIMIT_MB = 64

COMPRESSIONS = ("deflate", "zstd")
LAYOUTS = ("auto", "cog", "tiled")


# ---------------------------------------------------------------------------------- inputs
@dataclass(frozen=True)
class RasterInfo:
    """What `denude check` and the run record need to know about one input raster."""

    role: str
    path: str
    crs_wkt: str
    transform: tuple
    width: int
    height: int
    dtype: str
    nodata: float | None
    size_bytes: int | None          # None for GDAL virtual paths (/vsis3/, /vsicurl/, ...)

    @property
    def grid(self) -> Grid:
        return Grid(self.crs_wkt, self.transform, self.width, self.height)

    @property
    def res(self) -> tuple[float, float]:
        return self.grid.res

    def describe(self) -> str:
        return (f"{self.role}: {self.path} ({self.width} x {self.height}, {self.dtype}, nodata "
                f"{self.nodata}, {self.grid.geometry_text()})")


def open_raster(path, role: str):
    """Open a raster for reading; a missing or unreadable file is a one-line InputError.
    GDAL virtual paths (/vsis3/..., /vsicurl/..., /vsizip/...) are handed to GDAL as they are
    (no local existence check); one GDAL cannot open is an InputError naming the path."""
    if is_virtual_path(path):
        text = str(path)
        try:
            return rasterio.open(text)
        except (RasterioError, OSError):
            raise InputError(
                f"{role} raster {text} cannot be opened by GDAL; check the address (bucket, key, URL or "
                "archive member) and the credentials in the environment (e.g. AWS_ACCESS_KEY_ID)"
            ) from None
    path = Path(path)
    if not path.exists():
        raise InputError(f"{role} raster {path} not found; give the path of an existing GeoTIFF or a number")
    if path.is_dir():
        raise InputError(f"{role} raster {path} is a folder; give the path of a raster file")
    try:
        return rasterio.open(path)
    except RasterioIOError:
        raise InputError(
            f"{role} raster {path} is not a readable raster; give a GeoTIFF (or other GDAL raster)"
        ) from None


def _gdal_reason(exc: BaseException) -> str:
    """The most telling one-line text of a GDAL read failure (rasterio chains GDAL's own
    message as the cause of its generic 'Read failed')."""
    texts = []
    while exc is not None and len(texts) < 4:
        text = " ".join(str(exc).split())
        if text and "See previous exception" not in text:
            texts.append(text)
        exc = exc.__cause__ or exc.__context__
    return (texts[0] if texts else "read failed")[:160]


def read_error(path, role: str, exc: BaseException, where: str = "") -> RasterReadError:
    """A one-line InputError for a raster whose data cannot be read (truncated file, corrupt
    or missing tile, unreachable virtual path), naming the file and GDAL's reason."""
    return RasterReadError(
        f"{role} raster {path} cannot be read{where} ({_gdal_reason(exc)}); the file is truncated or "
        "corrupt: copy or export it again (gdalinfo -checksum shows which blocks fail)"
    )


def read_band(ds, path, role: str, **kwargs) -> np.ndarray:
    """``ds.read(1, **kwargs)``; a GDAL read failure is a one-line InputError naming the file."""
    try:
        return ds.read(1, **kwargs)
    except (RasterioError, OSError) as exc:
        raise read_error(path, role, exc) from None


def dtype_limits(dtype: str) -> tuple[float, float]:
    """(lowest, highest) value a raster data type can hold (floats: their finite range)."""
    kind = np.dtype(dtype)
    if kind.kind in "iu":
        info = np.iinfo(kind)
    else:
        info = np.finfo(kind)
    return float(info.min), float(info.max)


def declared_nodata(ds) -> float | None:
    """The nodata value band 1 declares. rasterio reports None for a value the data type cannot
    hold (e.g. -9999 on uint8), so then the value is read from a VRT description of the band
    (metadata only, in a temporary folder)."""
    if ds.nodata is not None:
        return float(ds.nodata)
    import tempfile
    import xml.etree.ElementTree as ET

    try:
        with tempfile.TemporaryDirectory(prefix="denude-nodata-") as tmp:
            probe = os.path.join(tmp, "probe.vrt")
            rasterio.shutil.copy(ds, probe, driver="VRT")
            band = ET.parse(probe).getroot().find("VRTRasterBand")
            text = None if band is None else band.findtext("NoDataValue")
    except Exception:  # no VRT description: trust rasterio's answer
        return None
    try:
        return None if text is None else float(text)
    except ValueError:
        return None


def check_nodata_fits(path, role: str, dtype: str, nodata) -> None:
    """A declared nodata value the band's data type cannot hold (e.g. -9999 on uint8, or a
    fraction on integers) is a one-line InputError naming the file and the value: GDAL would
    otherwise compare cells with a value no cell can have, and real nodata cells pass as data."""
    if nodata is None or math.isnan(nodata) or np.dtype(dtype).kind not in "iuf":
        return
    low, high = dtype_limits(dtype)
    fits = low <= nodata <= high if math.isfinite(nodata) else np.dtype(dtype).kind == "f"
    if fits and np.dtype(dtype).kind in "iu" and nodata != round(nodata):
        fits = False
    if not fits:
        raise InputError(
            f"{role} raster {path} declares nodata {nodata:g}, which its data type {dtype} cannot hold "
            f"({low:g} to {high:g}); set a nodata value inside that range (e.g. gdal_edit.py -a_nodata "
            f"{high:g} {Path(str(path)).name}) or none"
        )


def check_georeferenced(ds, what: str, fix_crs: str = "assign one (e.g. gdal_edit.py -a_srs EPSG:xxxx)",
                        fix_rotated: str = "warp it north-up first") -> None:
    """The one rule on an open raster's georeferencing: a CRS and a north-up, unrotated grid.
    ``what`` names the raster in the message (e.g. 'runoff raster PATH')."""
    if ds.crs is None:
        raise GridError(f"{what} has no CRS; {fix_crs}")
    a, b, _, d, e, _ = tuple(ds.transform)[:6]
    if b or d or a <= 0 or e >= 0:
        raise GridError(f"{what} has a rotated or south-up transform; {fix_rotated}")


def describe_dataset(ds, path, role: str) -> RasterInfo:
    """``RasterInfo`` of an open input raster; no CRS or a rotated grid is a GridError."""
    check_georeferenced(ds, f"{role} raster {path}")
    if ds.count < 1:
        raise InputError(f"{role} raster {path} has no bands; give a single-band raster")
    check_nodata_fits(path, role, ds.dtypes[0], declared_nodata(ds))
    return RasterInfo(
        role=role, path=str(path), crs_wkt=ds.crs.to_wkt(), transform=tuple(ds.transform)[:6],
        width=ds.width, height=ds.height, dtype=ds.dtypes[0],
        nodata=None if ds.nodata is None else float(ds.nodata),
        size_bytes=None if is_virtual_path(path) else os.path.getsize(path),
    )


def inspect_raster(path, role: str) -> RasterInfo:
    """Describe an input raster; no CRS or a rotated grid is a GridError."""
    with open_raster(path, role) as ds:
        return describe_dataset(ds, path, role)


@contextmanager
def _opened(path, role: str, dataset=None):
    """``dataset`` when the caller holds it open, else the raster opened for this call."""
    if dataset is not None:
        yield dataset
        return
    with open_raster(path, role) as ds:
        yield ds


#: Points added along each edge when projecting an extent (curved edges in the target CRS).
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


def value_range(path, role: str, max_side: int = 1024, dataset=None) -> tuple[float, float, int]:
    """(min, max, valid cells) of band 1 from a decimated read (at most max_side per side),
    nodata and NaN excluded; (nan, nan, 0) when nothing is valid."""
    with _opened(path, role, dataset) as ds:
        step = max(1, math.ceil(max(ds.width, ds.height) / max_side))
        shape = (max(1, ds.height // step), max(1, ds.width // step))
        data = read_band(ds, path, role, out_shape=shape, masked=True, resampling=Resampling.nearest)
        values = np.ma.masked_invalid(data.astype(np.float64)).compressed()
    if values.size == 0:
        return (math.nan, math.nan, 0)
    return (float(values.min()), float(values.max()), int(values.size))


def sample_value_range(path, role: str, samples_per_side: int = 4, side: int = 64,
                       dataset=None) -> tuple[float, float, int]:
    """(min, max, valid cells) from a lattice of small windows (a quick look before a run;
    `value_range` reads every tile). Nodata and NaN excluded."""
    lo, hi, n = math.inf, -math.inf, 0
    with _opened(path, role, dataset) as ds:
        for i in range(samples_per_side):
            for j in range(samples_per_side):
                h, w = min(side, ds.height), min(side, ds.width)
                row = (ds.height - h) * i // max(samples_per_side - 1, 1)
                col = (ds.width - w) * j // max(samples_per_side - 1, 1)
                data = read_band(ds, path, role, window=Window(col, row, w, h), masked=True)
                values = np.ma.masked_invalid(data.astype(np.float64)).compressed()
                if values.size:
                    lo, hi, n = min(lo, float(values.min())), max(hi, float(values.max())), n + values.size
    return (lo, hi, n) if n else (math.nan, math.nan, 0)


def decimated_codes(path, role: str = "lithology", max_side: int = 1024, dataset=None) -> list[int]:
    """Codes in a decimated read of band 1 (nearest, at most ``max_side`` cells per side;
    nodata and NaN excluded): every code of a small raster, the common codes of a large one."""
    with _opened(path, role, dataset) as ds:
        step = max(1, math.ceil(max(ds.width, ds.height) / max_side))
        shape = (max(1, ds.height // step), max(1, ds.width // step))
        data = ds.read(1, out_shape=shape, masked=True, resampling=Resampling.nearest)
    values = data.compressed()
    if values.dtype.kind == "f":
        values = values[np.isfinite(values)]
        values = values[values == np.round(values)]
    return sorted(int(v) for v in np.unique(values))


def unique_codes(path, role: str = "lithology", dataset=None) -> list[int]:
    """Every code in band 1, read block by block (nodata and NaN excluded). Non-integer
    values anywhere in a float raster are an error naming one of them."""
    found: set[int] = set()
    with _opened(path, role, dataset) as ds:
        nodata = ds.nodata
        is_float = not np.issubdtype(np.dtype(ds.dtypes[0]), np.integer)
        for _, window in ds.block_windows(1):
            vals = np.unique(read_band(ds, path, role, window=window))
            if nodata is not None:
                vals = vals[vals != nodata]
            if vals.dtype.kind == "f":
                vals = vals[np.isfinite(vals)]
            if is_float and vals.size and np.any(vals != np.round(vals)):
                example = float(vals[vals != np.round(vals)][0])
                raise InputError(
                    f"{role} raster {path} holds non-integer code {example:g}; give integer lithology "
                    "codes (codes are categories: they are never rounded)"
                )
            found.update(int(v) for v in vals)
    return sorted(found)


def file_sha256(path, chunk_bytes: int = 4 * 2**20) -> str:
    """Hex SHA-256 of a file, read in chunks."""
    digest = hashlib.sha256()
    with open(path, "rb") as handle:
        while chunk := handle.read(chunk_bytes):
            digest.update(chunk)
    return digest.hexdigest()


# --------------------------------------------------------------------------------- outputs
@dataclass(frozen=True)
class OutputSpec:
    """One output raster: file name, dtype, nodata, overview resampling, tags, colour table."""

    name: str
    dtype: str
    nodata: float
    overview_resampling: str        # "average" (continuous) or "nearest" (classes, codes)
    tags: tuple = ()                # (key, value) pairs written to the dataset metadata
    description: str = ""
    colormap: tuple | None = None   # RGBA per class index
    units: str = ""                 # GDAL band unit type (e.g. "mm/kyr")
    categories: tuple = ()          # GDAL category names: entry k names value k
    source_nodata: float | None = None  # nodata of the arrays handed in, when it differs from ``nodata``


def overview_factors(height: int, width: int, block_size: int) -> list[int]:
    """Overview decimation factors 2, 4, ... until the overview fits in one tile."""
    factors = []
    f = 2
    while max(height, width) / (f // 2) > block_size:
        factors.append(f)
        f *= 2
    return factors


def choose_layout(layout: str, grid: Grid) -> str:
    """'cog' or 'tiled'; 'auto' is COG up to COG_MAX_CELLS cells."""
    if layout not in LAYOUTS:
        raise InputError(f"layout {layout!r} is not known; use one of {', '.join(LAYOUTS)}")
    if layout == "auto":
        return "cog" if grid.width * grid.height <= COG_MAX_CELLS else "tiled"
    return layout


#: Threads GDAL compresses with (its NUM_THREADS creation option): every core, unless the
#: GDAL_NUM_THREADS config option is set (batch workers set it to 1: their processes already
#: fill the cores). Compression runs blocks side by side and writes them in their fixed
#: order, so the bytes of a file do not depend on it (checked in tests/test_rasters.py).
GDAL_THREADS = "ALL_CPUS"


def compression_threads() -> str:
    """NUM_THREADS for output compression: GDAL_NUM_THREADS when configured, else GDAL_THREADS."""
    from rasterio.env import get_gdal_config

    configured = get_gdal_config("GDAL_NUM_THREADS")
    return str(configured) if configured not in (None, "") else GDAL_THREADS


def creation_options(spec: OutputSpec, compress: str, block_size: int, threads: str | None = None) -> dict:
    """GTiff creation options of a tiled output (compression, predictor, tiles, BigTIFF when
    needed, compression threads: ``threads`` or ``compression_threads()``)."""
    if compress not in COMPRESSIONS:
        raise InputError(f"compression {compress!r} is not known; use one of {', '.join(COMPRESSIONS)}")
    floating = np.dtype(spec.dtype).kind == "f"
    return {
        "compress": compress,
        "predictor": 3 if floating else 2,
        "tiled": True,
        "blockxsize": block_size,
        "blockysize": block_size,
        "bigtiff": "IF_SAFER",
        "num_threads": threads or compression_threads(),
    }


def cog_options(spec: OutputSpec, compress: str, block_size: int, threads: str | None = None) -> dict:
    """COG driver options of an output: the same compression, predictor and tiles as
    ``creation_options``, overviews made by the driver with the layer's resampling."""
    if compress not in COMPRESSIONS:
        raise InputError(f"compression {compress!r} is not known; use one of {', '.join(COMPRESSIONS)}")
    return {
        "COMPRESS": compress.upper(),
        "PREDICTOR": "FLOATING_POINT" if np.dtype(spec.dtype).kind == "f" else "STANDARD",
        "BLOCKSIZE": block_size,
        "BIGTIFF": "IF_SAFER",
        "RESAMPLING": spec.overview_resampling.upper(),
        "OVERVIEWS": "AUTO",
        "NUM_THREADS": threads or compression_threads(),
    }


#: At most this many outputs build overviews / COG copies at the same time; the others wait.
#: One keeps peak memory flat (measured with benchmarks/bench_map.py at 16384 x 16384: 669 MiB
#: with one slot, 766 MiB with two, and no slower, as overview building is mostly I/O bound).
FINISH_SLOTS = threading.BoundedSemaphore(1)


class RasterWriter:
    """Writes one output raster window by window, then adds overviews (and the COG layout).

    Windows are handed to a writer thread of this raster through a short FIFO queue, so the
    compression of different outputs runs in parallel with each other and with the compute
    workers, while each file still receives its blocks in one fixed order (identical bytes
    whatever the number of workers). ``finish()`` starts overviews / the COG copy in that
    thread; ``close()`` waits for it and returns the final path.

    In COG layout the blocks first go uncompressed to ``<path>.partial.tif``; the COG driver
    then compresses once while it writes overviews and data in cloud-optimised order.
    """

    _STOP, _ABORT = object(), object()

    def __init__(self, path, grid: Grid, spec: OutputSpec, block_size: int, compress: str = "deflate",
                 layout: str = "cog", queue_size: int = 4):
        self.path = Path(path)
        self.spec = spec
        self.grid = grid
        self.block_size = block_size
        self.compress = compress
        self.layout = layout
        self.options = creation_options(spec, compress, block_size)
        if layout == "cog":
            self.work_path = self.path.with_name(self.path.name + ".partial.tif")
            options = {k: v for k, v in self.options.items() if k not in ("compress", "predictor", "num_threads")}
        else:
            self.work_path = self.path
            options = self.options
        try:
            self.dataset = rasterio.open(
                self.work_path, "w", driver="GTiff", width=grid.width, height=grid.height, count=1,
                dtype=spec.dtype, crs=grid.crs, transform=grid.affine, nodata=spec.nodata, **options,
            )
        except RasterioIOError as exc:
            raise OutputError(f"{self.work_path}: cannot create the output raster ({exc}); check the folder is writable") from None
        self._describe(self.dataset)
        self._queue: queue.Queue = queue.Queue(maxsize=queue_size)
        self._error: BaseException | None = None
        self._finishing = False
        self._thread = threading.Thread(target=self._run, name=f"denude-write-{self.path.stem}", daemon=True)
        self._thread.start()

    def _describe(self, ds) -> None:
        ds.update_tags(**dict(self.spec.tags))
        if self.spec.description:
            ds.set_band_description(1, self.spec.description)
        if self.spec.units:
            ds.set_band_unit(1, self.spec.units)
        if self.spec.colormap is not None:
            ds.write_colormap(1, {i: tuple(rgba) for i, rgba in enumerate(self.spec.colormap)})

    def _run(self) -> None:
        try:
            while True:
                item = self._queue.get()
                if item is self._ABORT:
                    self.dataset.close()
                    return
                if item is self._STOP:
                    break
                array, window = item
                if self.spec.source_nodata is not None:   # e.g. int32 codes into a uint8 raster
                    array = np.where(array == self.spec.source_nodata, self.spec.nodata, array)
                self.dataset.write(array.astype(self.spec.dtype, copy=False), 1, window=window)
            with FINISH_SLOTS:
                self._finish_file()
        except BaseException as exc:  # handed to the caller in close()
            self._error = exc
            try:
                self.dataset.close()
            except Exception:  # pragma: no cover
                pass
            while True:  # keep draining so a producer never blocks on a dead writer
                if self._queue.get() in (self._STOP, self._ABORT):
                    return

    def write(self, array: np.ndarray, window: Window) -> None:
        """Queue one window (blocks when the writer is several windows behind)."""
        if self._error is not None:
            self.close()
        self._queue.put((array, window))

    def finish(self) -> None:
        """Start the final steps (overviews, COG copy) in the writer thread."""
        if not self._finishing:
            self._finishing = True
            self._queue.put(self._STOP)

    def close(self) -> Path:
        """Wait for the file to be complete; returns the final path."""
        self.finish()
        self._thread.join()
        if self._error is not None:
            error, self._error = self._error, None
            if isinstance(error, OSError):   # RasterioIOError is one; ENOSPC from a plain write too
                reason = " ".join(str(error).split())[:160] or type(error).__name__
                raise OutputError(
                    f"{self.path.name}: writing into {self.path.parent} failed ({reason}); check free disk space "
                    "(e.g. df -h) and that the folder is writable"
                ) from None
            raise error
        return self.path

    def _finish_file(self) -> None:
        ds = self.dataset
        resampling = RESAMPLING[self.spec.overview_resampling]
        if self.layout == "tiled":
            factors = overview_factors(self.grid.height, self.grid.width, self.block_size)
            if factors:
                ds.build_overviews(factors, resampling)
                ds.update_tags(ns="rio_overview", resampling=self.spec.overview_resampling)
            ds.close()
            write_category_names(self.path, list(self.spec.categories))
            return
        ds.close()
        rasterio.shutil.copy(self.work_path, self.path, driver="COG",
                             **cog_options(self.spec, self.compress, self.block_size, self.options["num_threads"]))
        self.work_path.unlink()
        write_category_names(self.path, list(self.spec.categories))

    def abort(self) -> None:
        """Stop writing and close the file without finishing it (the caller removes it)."""
        if self._thread.is_alive():
            self._finishing = True
            self._queue.put(self._ABORT)
            self._thread.join()
