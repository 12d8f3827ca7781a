"""Input rasters: open and describe them (one georeferencing rule, nodata checks), value ranges
and lithology codes on an open dataset, file hashes. Warping onto the target grid is in
``denude.io.raster_warp``.
"""

from __future__ import annotations

import hashlib
import math
import os
from contextlib import contextmanager
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import rasterio
from rasterio.enums import Resampling
from rasterio.errors import RasterioError, RasterioIOError
from rasterio.windows import Window

from denude.errors import GridError, InputError, RasterReadError
from denude.io.grid import Grid
from denude.io.mosaic import is_virtual_path


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
