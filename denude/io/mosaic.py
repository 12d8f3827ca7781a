"""Mosaics of raster tiles as one readable source, and VRT files written without GDAL's Python bindings.

A raster input of ``denude batch`` may be one file, or many tiles given as

* a folder (every ``*.tif`` / ``*.tiff`` in it, sorted by name),
* a quoted glob (``"runoff/*.tif"``, sorted by name),
* a file list (a ``.txt`` or ``.lst`` file with one path per line; ``#`` starts a comment;
  relative paths resolve against the list's folder),
* a VRT (``.vrt``, used as it is).

Folders, globs and lists are turned into a small mosaic VRT (``write_mosaic_vrt``). All tiles must
share CRS, cell size, data type and cell edges (a common pixel lattice); anything else is a
one-line ``InputError`` naming the tile and the fix. The VRT carries an explicit nodata value:
the tiles' common nodata, else NaN for floating-point data or the type's minimum (maximum for
unsigned types) for integers. Tiles whose nodata differs from it are added as masked sources, so
their nodata cells stay nodata. Where tiles overlap, the later tile in name order (for a file
list: list order) wins where it holds data. Overlaps are found from the tiles' bounds (no pixel is
read) and reported as one ``MosaicOverlapWarning`` per mosaic; overlaps thinner than half a cell
(shared edges) are ignored.

``write_vrt`` writes any north-up VRT from integer pixel rectangles (used for the batch output
mosaics, whose tiles share edges exactly). Every file is written under a temporary name, fsynced
and renamed, so no half-written VRT is ever visible under its final name.
"""

from __future__ import annotations

import glob
import math
import os
import warnings
import xml.etree.ElementTree as ET
from dataclasses import dataclass
from pathlib import Path
from xml.sax.saxutils import escape, quoteattr

import numpy as np

from denude.errors import GridError, InputError, MosaicOverlapWarning
from denude.io.outdir import fsync_dir, write_text_atomic  # noqa: F401  (fsync_dir re-exported)

#: Suffixes of tile files picked up from a folder.
TILE_SUFFIXES = (".tif", ".tiff")
#: Suffixes of file lists (one path per line).
LIST_SUFFIXES = (".txt", ".lst")
#: Cell offsets closer than this to a whole number count as aligned [cells].
ALIGN_TOLERANCE_CELLS = 1e-6
#: Tiles overlapping by less than this in either direction do not count as overlapping [cells].
OVERLAP_MIN_CELLS = 0.5

GDAL_TYPES = {
    "uint8": "Byte", "int8": "Int8", "uint16": "UInt16", "int16": "Int16", "uint32": "UInt32",
    "int32": "Int32", "uint64": "UInt64", "int64": "Int64", "float32": "Float32", "float64": "Float64",
}
#: GDAL colour interpretation -> VRT name.
_GLOB_CHARS = set("*?[")


def is_virtual_path(path: str) -> bool:
    """True for GDAL virtual file system paths such as /vsis3/bucket/key.tif."""
    return str(path).startswith("/vsi")


def mosaic_kind(spec: str) -> str:
    """'file', 'vrt', 'folder', 'glob' or 'list' for one raster input value (a path string)."""
    text = str(spec)
    if is_virtual_path(text):
        return "vrt" if text.lower().endswith(".vrt") else "file"
    if any(c in _GLOB_CHARS for c in text) and not Path(text).exists():
        return "glob"
    path = Path(text)
    if path.is_dir():
        return "folder"
    suffix = path.suffix.lower()
    if suffix == ".vrt":
        return "vrt"
    if suffix in LIST_SUFFIXES:
        return "list"
    return "file"


def expand_tiles(spec: str, role: str) -> list[str]:
    """The tile files of a folder, glob or list input (absolute paths, in mosaic order)."""
    kind = mosaic_kind(spec)
    if kind == "folder":
        files = sorted(str(p.resolve()) for p in Path(spec).iterdir()
                       if p.is_file() and p.suffix.lower() in TILE_SUFFIXES)
        if not files:
            raise InputError(f"{role} folder {spec} holds no .tif files; give a folder of GeoTIFF tiles, a glob or a VRT")
        return files
    if kind == "glob":
        files = sorted(str(Path(p).resolve()) for p in glob.glob(str(spec)) if Path(p).is_file())
        if not files:
            raise InputError(f"{role} glob {spec!r} matches no files; check the pattern (quote it so the shell does not expand it)")
        return files
    if kind == "list":
        base = Path(spec).resolve().parent
        try:
            lines = Path(spec).read_text(encoding="utf-8").splitlines()
        except (OSError, UnicodeDecodeError) as exc:
            raise InputError(f"{role} file list {spec} cannot be read ({exc}); give a text file with one raster path per line") from None
        files = []
        for number, line in enumerate(lines, 1):
            item = line.split("#", 1)[0].strip()
            if not item:
                continue
            if is_virtual_path(item):
                files.append(item)
                continue
            path = Path(os.path.expanduser(item))
            path = path if path.is_absolute() else base / path
            if not path.is_file():
                raise InputError(f"{role} file list {spec} line {number}: {path} not found; fix the path or remove the line")
            files.append(str(path.resolve()))
        if not files:
            raise InputError(f"{role} file list {spec} names no rasters; give one raster path per line")
        return files
    return [str(spec)]


# ------------------------------------------------------------------------------ tile metadata
@dataclass(frozen=True)
class TileInfo:
    """What a mosaic VRT needs to know about one tile."""

    path: str
    crs_wkt: str
    transform: tuple          # GDAL-order affine (a, b, c, d, e, f) in CRS units
    width: int                # cells
    height: int               # cells
    dtype: str
    nodata: float | None
    block: tuple              # (x, y) cells


def read_tile_info(path: str, role: str) -> TileInfo:
    """Open one tile and describe it; unreadable or unsuitable tiles are one-line errors."""
    import rasterio
    from rasterio.errors import RasterioIOError

    try:
        with rasterio.open(path) as ds:
            if ds.crs is None:
                raise GridError(f"{role} tile {path} has no CRS; assign one (e.g. gdal_edit.py -a_srs EPSG:xxxx)")
            a, b, _, d, e, _ = tuple(ds.transform)[:6]
            if b or d or a <= 0 or e >= 0:
                raise GridError(f"{role} tile {path} has a rotated or south-up transform; warp it north-up first")
            block = ds.block_shapes[0] if ds.block_shapes else (1, ds.width)
            return TileInfo(str(path), ds.crs.to_wkt(), tuple(ds.transform)[:6], ds.width, ds.height,
                            ds.dtypes[0], None if ds.nodata is None else float(ds.nodata),
                            (int(block[1]), int(block[0])))
    except RasterioIOError:
        raise InputError(f"{role} tile {path} is not a readable raster; replace it or remove it from the mosaic") from None


def default_nodata(dtype: str) -> float:
    """Nodata for a mosaic whose tiles declare none: NaN for floats, the integer type's
    minimum (maximum for unsigned types)."""
    kind = np.dtype(dtype).kind
    if kind == "f":
        return float("nan")
    info = np.iinfo(np.dtype(dtype))
    return float(info.max if kind == "u" else info.min)


def _same_nodata(a, b) -> bool:
    if a is None or b is None:
        return a is b
    return (math.isnan(a) and math.isnan(b)) or a == b


def _fmt_number(value: float, dtype: str) -> str:
    if value is None:
        return ""
    if math.isnan(value):
        return "nan"
    if np.dtype(dtype).kind in "iu" and float(value).is_integer():
        return str(int(value))
    return repr(float(value))


def _fmt_coord(value: float) -> str:
    return repr(float(value))


@dataclass(frozen=True)
class VrtSource:
    """One source rectangle of a VRT band (integer cells)."""

    filename: str
    relative: bool
    width: int                 # source size, cells
    height: int
    dst_x: int                 # destination offset, cells
    dst_y: int
    dtype: str
    block: tuple = (256, 256)
    nodata: float | None = None   # masked source when set


def vrt_xml(crs_wkt: str, transform: tuple, width: int, height: int, dtype: str, nodata,
            sources, description: str = "", tags=(), colormap=None, units: str = "") -> str:
    """The XML text of a one-band VRT (deterministic for the same arguments); ``units`` is the
    band's unit type (as RasterWriter sets it on the GeoTIFFs)."""
    gdal_type = GDAL_TYPES.get(str(dtype))
    if gdal_type is None:
        raise InputError(f"data type {dtype} cannot go into a VRT mosaic; convert the tiles to an integer or float type")
    t = tuple(transform)
    geo = ", ".join(_fmt_coord(v) for v in (t[2], t[0], t[1], t[5], t[3], t[4]))
    lines = [f'<VRTDataset rasterXSize="{int(width)}" rasterYSize="{int(height)}">',
             f"  <SRS>{escape(crs_wkt)}</SRS>",
             f"  <GeoTransform>{geo}</GeoTransform>"]
    if tags:   # dataset-level, as RasterWriter tags the GeoTIFFs
        lines.append("  <Metadata>")
        for key, value in tags:
            lines.append(f"    <MDI key={quoteattr(str(key))}>{escape(str(value))}</MDI>")
        lines.append("  </Metadata>")
    lines.append(f'  <VRTRasterBand dataType="{gdal_type}" band="1">')
    if description:
        lines.append(f"    <Description>{escape(description)}</Description>")
    if nodata is not None:
        lines.append(f"    <NoDataValue>{_fmt_number(nodata, dtype)}</NoDataValue>")
    if units:
        lines.append(f"    <UnitType>{escape(units)}</UnitType>")
    if colormap:
        lines.append("    <ColorInterp>Palette</ColorInterp>")
        lines.append("    <ColorTable>")
        for rgba in colormap:
            c = tuple(int(v) for v in rgba) + (255,) * (4 - len(rgba))
            lines.append(f'      <Entry c1="{c[0]}" c2="{c[1]}" c3="{c[2]}" c4="{c[3]}"/>')
        lines.append("    </ColorTable>")
    for s in sources:
        kind = "ComplexSource" if s.nodata is not None else "SimpleSource"
        src_type = GDAL_TYPES.get(str(s.dtype), gdal_type)
        lines += [
            f"    <{kind}>",
            f'      <SourceFilename relativeToVRT="{1 if s.relative else 0}">{escape(s.filename)}</SourceFilename>',
            "      <SourceBand>1</SourceBand>",
            f'      <SourceProperties RasterXSize="{s.width}" RasterYSize="{s.height}" DataType="{src_type}" '
            f'BlockXSize="{s.block[0]}" BlockYSize="{s.block[1]}"/>',
            f'      <SrcRect xOff="0" yOff="0" xSize="{s.width}" ySize="{s.height}"/>',
            f'      <DstRect xOff="{s.dst_x}" yOff="{s.dst_y}" xSize="{s.width}" ySize="{s.height}"/>',
        ]
        if s.nodata is not None:
            lines.append(f"      <NODATA>{_fmt_number(s.nodata, s.dtype)}</NODATA>")
        lines.append(f"    </{kind}>")
    lines += ["  </VRTRasterBand>", "</VRTDataset>", ""]
    return "\n".join(lines)


@dataclass(frozen=True)
class TileOverlaps:
    """Overlapping tile pairs of a mosaic: how many, and the first pair in mosaic order with the
    size of its overlap [cells of the mosaic grid]."""

    pairs: int
    first: tuple              # (earlier path, later path)
    width_cells: float
    height_cells: float


def find_overlaps(infos: list[TileInfo]) -> TileOverlaps | None:
    """Pairs of tiles whose bounds overlap by at least ``OVERLAP_MIN_CELLS`` in both directions,
    measured in cells of the first tile's grid; None when no pair does. Reads no pixel."""
    if len(infos) < 2:
        return None
    xres, yres = infos[0].transform[0], -infos[0].transform[4]
    left = np.array([i.transform[2] for i in infos]) / xres                    # cells
    right = left + np.array([i.width for i in infos])
    top = -np.array([i.transform[5] for i in infos]) / yres                    # cells, downwards
    bottom = top + np.array([i.height for i in infos])
    order = np.argsort(left, kind="stable")
    sorted_left = left[order]
    pairs, first = 0, None
    for k, i in enumerate(order):
        # sweep over the tiles sorted by left edge: only those starting before tile i ends
        stop = np.searchsorted(sorted_left, right[i] - OVERLAP_MIN_CELLS, side="left")
        others = order[k + 1:stop]
        if others.size == 0:
            continue
        wide = np.minimum(right[i], right[others]) - np.maximum(left[i], left[others])
        high = np.minimum(bottom[i], bottom[others]) - np.maximum(top[i], top[others])
        hit = (wide >= OVERLAP_MIN_CELLS) & (high >= OVERLAP_MIN_CELLS)
        pairs += int(np.count_nonzero(hit))
        for j, w, h in zip(others[hit], wide[hit], high[hit]):
            pair = (min(i, j), max(i, j))
            if first is None or pair < first[0]:
                first = (pair, float(w), float(h))
    if not pairs:
        return None
    (a, b), w, h = first
    return TileOverlaps(pairs, (infos[a].path, infos[b].path), w, h)


def _tile_name(path: str) -> str:
    return Path(path).name or str(path)


def warn_overlaps(overlaps: TileOverlaps, role: str, order: str = "name order") -> None:
    """One ``MosaicOverlapWarning`` line for a mosaic whose tiles overlap."""
    earlier, later = overlaps.first
    warnings.warn(MosaicOverlapWarning(
        f"{role} mosaic: {overlaps.pairs} tile pair(s) overlap, first {_tile_name(earlier)} and "
        f"{_tile_name(later)} by {overlaps.width_cells:.0f} x {overlaps.height_cells:.0f} cells (columns x rows); in an overlap "
        f"the later file in {order} ({_tile_name(later)}) wins where it holds data; give non-overlapping "
        "tiles or a VRT to choose otherwise"), stacklevel=3)


def mosaic_vrt_text(paths: list[str], role: str, order: str = "name order") -> str:
    """The VRT text of a mosaic of tiles (absolute source paths, later ones drawn over earlier
    ones). Checks that every tile shares the first tile's CRS, cell size, data type and cell
    edges, and warns once (``MosaicOverlapWarning``) when tiles overlap; ``order`` names the
    order of ``paths`` in that warning."""
    from rasterio.crs import CRS

    infos = [read_tile_info(p, role) for p in paths]
    first = infos[0]
    crs0 = CRS.from_wkt(first.crs_wkt)
    xres, yres = first.transform[0], first.transform[4]
    for info in infos[1:]:
        if info.crs_wkt != first.crs_wkt and CRS.from_wkt(info.crs_wkt) != crs0:
            raise GridError(
                f"{role} tile {info.path} has a different CRS from {first.path}; reproject the tiles "
                "to one CRS or give a VRT you built yourself"
            )
        if not (math.isclose(info.transform[0], xres, rel_tol=1e-9) and math.isclose(info.transform[4], yres, rel_tol=1e-9)):
            raise GridError(
                f"{role} tile {info.path} has cell size {info.transform[0]:g} x {-info.transform[4]:g}, "
                f"not {xres:g} x {-yres:g} as {first.path}; resample the tiles to one cell size"
            )
        if info.dtype != first.dtype:
            raise InputError(
                f"{role} tile {info.path} has data type {info.dtype}, not {first.dtype} as {first.path}; "
                "convert the tiles to one data type"
            )
    left = min(i.transform[2] for i in infos)
    top = max(i.transform[5] for i in infos)
    offsets = []
    for info in infos:
        col = (info.transform[2] - left) / xres
        row = (info.transform[5] - top) / yres
        if abs(col - round(col)) > ALIGN_TOLERANCE_CELLS or abs(row - round(row)) > ALIGN_TOLERANCE_CELLS:
            raise GridError(
                f"{role} tile {info.path} is not aligned with the cell edges of {first.path} (offset "
                f"{col:.4f}, {row:.4f} cells); warp the tiles to a common grid"
            )
        offsets.append((int(round(col)), int(round(row))))
    overlaps = find_overlaps(infos)
    if overlaps is not None:
        warn_overlaps(overlaps, role, order)
    width = max(c + i.width for (c, _), i in zip(offsets, infos))
    height = max(r + i.height for (_, r), i in zip(offsets, infos))
    nodatas = [i.nodata for i in infos]
    common = nodatas[0] if all(_same_nodata(n, nodatas[0]) for n in nodatas) else None
    nodata = common if common is not None else default_nodata(first.dtype)
    sources = []
    for (col, row), info in zip(offsets, infos):
        masked = info.nodata is not None and (len(infos) > 1 or not _same_nodata(info.nodata, nodata))
        sources.append(VrtSource(info.path, False, info.width, info.height, col, row, info.dtype,
                                 info.block, info.nodata if masked else None))
    transform = (xres, 0.0, left, 0.0, yres, top)
    return vrt_xml(first.crs_wkt, transform, width, height, first.dtype, nodata, sources)


def write_mosaic_vrt(spec: str, role: str, dest) -> str:
    """Resolve one raster input: a plain file or VRT is returned as it is; a folder, glob or file
    list becomes the mosaic VRT ``dest`` (rewritten only when its content changes). Returns the
    path to read."""
    kind = mosaic_kind(spec)
    if kind in ("file", "vrt"):
        return str(spec)
    order = "the list's order" if kind == "list" else "name order"
    text = mosaic_vrt_text(expand_tiles(spec, role), role, order)
    dest = Path(dest)
    dest.parent.mkdir(parents=True, exist_ok=True)
    write_text_atomic(dest, text)
    return str(dest)


def vrt_source_files(path) -> list[str]:
    """Source files named by a VRT (absolute, or /vsi paths as written), in file order; nested
    VRTs are followed. A VRT that cannot be parsed is an InputError."""
    path = Path(path)
    try:
        root = ET.parse(path).getroot()
    except (ET.ParseError, OSError) as exc:
        raise InputError(f"VRT {path} cannot be parsed ({exc}); give a valid GDAL VRT file") from None
    out: list[str] = []
    for element in root.iter("SourceFilename"):
        name = (element.text or "").strip()
        if not name:
            continue
        if element.get("relativeToVRT", "0") == "1" and not is_virtual_path(name):
            name = str((path.parent / name).resolve())
        if name not in out:
            out.append(name)
            if name.lower().endswith(".vrt") and not is_virtual_path(name) and Path(name).is_file():
                out.extend(n for n in vrt_source_files(name) if n not in out)
    return out


def write_vrt(dest, crs_wkt: str, transform: tuple, width: int, height: int, dtype: str, nodata,
              sources, description: str = "", tags=(), colormap=None, units: str = "") -> Path:
    """Write a one-band VRT atomically (see ``vrt_xml``)."""
    text = vrt_xml(crs_wkt, transform, width, height, dtype, nodata, sources, description, tags, colormap, units)
    write_text_atomic(dest, text)
    return Path(dest)
