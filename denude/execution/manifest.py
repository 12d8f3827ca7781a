"""The batch manifest: one JSON file (``OUTDIR/manifest.json``) with the state of every tile.

Layout (format ``denude-batch-manifest/1``)::

    {
      "format": "denude-batch-manifest/1",
      "denude_version": "...",
      "job_key": "<sha256 of the job's settings and tile size>",
      "tile_size": 4096,
      "grid": {... Grid.as_dict() ...},
      "layers": ["denudation", ...],
      "tiles": {
        "r000_c000": {
          "window": [col_off, row_off, width, height],      # cells of the target grid
          "state": "pending" | "done" | "failed",
          "input_sha256": "<sha256 of job key, window and the input files' content stamps>",
          "attempts": 1,                                     # attempts in the last run
          "error": null | "one-line message",
          "outputs": {"denudation_mm_per_kyr.tif": {"sha256": "...", "size_bytes": 123}, ...},
          "counts": {... BlockCounts.as_dict() ...},
          "wall_time_s": 1.23                                # seconds the tile took (informative)
        }, ...
      }
    }

A tile is skipped on a re-run when its state is ``done``, its ``input_sha256`` is the one the
job computes now, and every output file exists with the recorded size and SHA-256. Input
stamps are content, not file times: the SHA-256 of every local input (and of every local
source of a VRT input, and of the local archive behind a ``/vsizip/`` path); for remote
virtual paths (``/vsicurl/``, ``/vsis3/`` ...) the ETag, size and time GDAL reports
(``content_stamp``). A file rewritten with the same size and time is therefore seen. The file
is rewritten atomically (temporary file, fsync, rename) by the batch driver only.
"""

from __future__ import annotations

import hashlib
import json
import math
import os
import xml.etree.ElementTree as ET
from pathlib import Path

import denude
from denude.errors import OutputError
from denude.io.mosaic import is_virtual_path, vrt_source_files, write_text_atomic

FORMAT = "denude-batch-manifest/1"
MANIFEST_NAME = "manifest.json"

#: Settings that do not change any output value or byte (left out of the job key).
RUNTIME_FIELDS = ("out", "overwrite", "workers", "gdal_cache_mb", "job_file")


def canonical_json(value) -> str:
    """Sorted, compact JSON (NaN as a string) for hashing."""
    def fix(v):
        if isinstance(v, float) and not math.isfinite(v):
            return str(v)
        if isinstance(v, dict):
            return {str(k): fix(x) for k, x in v.items()}
        if isinstance(v, (list, tuple)):
            return [fix(x) for x in v]
        return v
    return json.dumps(fix(value), sort_keys=True, separators=(",", ":"))


def sha256_text(text: str) -> str:
    return hashlib.sha256(text.encode("utf-8")).hexdigest()


def job_key(settings_dict: dict, tile_size: int, extra: dict | None = None) -> str:
    """Identity of a batch job: every setting that can change an output, the tile size and
    the denude version. Inputs are named by their (unresolved) paths; their content enters
    the per-tile input checksums instead."""
    kept = {k: v for k, v in settings_dict.items() if k not in RUNTIME_FIELDS}
    return sha256_text(canonical_json({"settings": kept, "tile_size": int(tile_size),
                                       "version": denude.__version__, "extra": extra or {}}))


# --------------------------------------------------------------------------- input stamps
#: Archive handlers whose path holds a local archive file (its content stamps the member).
ARCHIVE_PREFIXES = ("/vsizip/", "/vsitar/", "/vsigzip/", "/vsi7z/", "/vsirar/")
#: HTTP headers GDAL reports for a remote file that identify its content.
REMOTE_HEADERS = ("etag", "content-length", "last-modified", "x-goog-hash", "content-md5")

_SHA_CACHE: dict = {}


def _local_sha256(path: str) -> str | None:
    """SHA-256 of a local file, cached in this process by (path, inode, size, mtime, ctime):
    a rewrite changes ctime even when size and mtime are put back."""
    from denude.io.rasters import file_sha256

    try:
        st = os.stat(path)
    except OSError:
        return None
    key = (os.path.abspath(path), st.st_ino, st.st_size, st.st_mtime_ns, st.st_ctime_ns)
    if key not in _SHA_CACHE:
        try:
            _SHA_CACHE[key] = file_sha256(path)
        except OSError:
            return None
    return _SHA_CACHE[key]


def archive_of(path: str) -> tuple[str, str] | None:
    """(local archive file, member) of a ``/vsizip/``-style path, or None (not an archive
    path, or the archive is itself remote). Both ``/vsizip/{/a/b.zip}/m`` and ``/vsizip//a/b.zip/m``."""
    text = str(path)
    prefix = next((p for p in ARCHIVE_PREFIXES if text.startswith(p)), None)
    if prefix is None:
        return None
    rest = text[len(prefix):]
    if rest.startswith("{") and "}" in rest:
        archive, member = rest[1:].split("}", 1)
        return (archive, member.lstrip("/")) if not is_virtual_path(archive) else None
    if is_virtual_path(rest):
        return None
    parts = Path(rest).parts
    for i in range(1, len(parts) + 1):
        candidate = str(Path(*parts[:i]))
        if os.path.isfile(candidate):
            return candidate, "/".join(parts[i:])
    return None


def remote_headers(path: str) -> dict | None:
    """Content-identifying HTTP headers GDAL reports for a remote virtual path (``ETag``,
    ``Content-Length``, ``Last-Modified`` ...), lower-case keys; None when GDAL gives none.
    Calls GDAL's ``VSIGetFileMetadata(path, "HEADERS")`` through ctypes on the GDAL library
    rasterio loaded (rasterio has no Python face for it)."""
    lib = _gdal_library()
    if lib is None:
        return None
    try:
        from rasterio.env import Env

        with Env():
            result = lib.VSIGetFileMetadata(str(path).encode("utf-8"), b"HEADERS", None)
            if not result:
                return None
            items, i = {}, 0
            while result[i]:
                key, _, value = result[i].decode("utf-8", "replace").partition("=")
                items[key.strip().lower()] = value.strip()
                i += 1
            lib.CSLDestroy(result)
    except Exception:
        return None
    found = {k: items[k] for k in REMOTE_HEADERS if k in items}
    return found or None


_GDAL_LIB: list = []


def _gdal_library():
    """The GDAL shared library rasterio uses, through ctypes (None if it cannot be found)."""
    if _GDAL_LIB:
        return _GDAL_LIB[0]
    lib = None
    try:
        import ctypes
        import glob

        import rasterio

        base = Path(rasterio.__file__).resolve().parent
        candidates = sorted(glob.glob(str(base.parent / "rasterio.libs" / "libgdal*.so*")))
        if not candidates:
            import ctypes.util

            name = ctypes.util.find_library("gdal")
            candidates = [name] if name else []
        if candidates:
            lib = ctypes.CDLL(candidates[0])
            lib.VSIGetFileMetadata.restype = ctypes.POINTER(ctypes.c_char_p)
            lib.VSIGetFileMetadata.argtypes = [ctypes.c_char_p, ctypes.c_char_p, ctypes.c_void_p]
            lib.CSLDestroy.argtypes = [ctypes.POINTER(ctypes.c_char_p)]
    except Exception:
        lib = None
    _GDAL_LIB.append(lib)
    return lib


def content_stamp(path: str) -> list:
    """What identifies one input file's content: ``[path, "sha256", hex]`` for a local file
    (and for the local archive behind ``/vsizip/...``, with the member name), ``[path,
    "remote", {etag, content-length, last-modified ...}]`` for a remote virtual path, and
    ``[path, None, None]`` when nothing can be learnt (missing file; a remote server that
    reports no headers)."""
    text = str(path)
    if is_virtual_path(text):
        archive = archive_of(text)
        if archive is not None:
            digest = _local_sha256(archive[0])
            return [text, "archive-sha256", None if digest is None else [digest, archive[1]]]
        headers = remote_headers(text)
        return [text, "remote", headers] if headers else [text, None, None]
    digest = _local_sha256(text)
    return [text, "sha256", digest] if digest is not None else [text, None, None]


def file_stamp(path: str) -> list:
    """The content stamp of one input (see ``content_stamp``)."""
    return content_stamp(path)


def _vrt_layout(path: str):
    """(geotransform, {source file: (left, bottom, right, top)}) of a VRT, or None."""
    try:
        root = ET.parse(path).getroot()
        gt = [float(v) for v in root.findtext("GeoTransform").split(",")]
        base = Path(path).resolve().parent
        boxes: dict = {}
        for element in root.iter():
            if not element.tag.endswith("Source"):
                continue
            name_el = element.find("SourceFilename")
            rect = element.find("DstRect")
            if name_el is None or rect is None:
                continue
            name = (name_el.text or "").strip()
            if name_el.get("relativeToVRT", "0") == "1" and not is_virtual_path(name):
                name = str((base / name).resolve())
            x0, y0 = float(rect.get("xOff")), float(rect.get("yOff"))
            x1, y1 = x0 + float(rect.get("xSize")), y0 + float(rect.get("ySize"))
            xs = (gt[0] + gt[1] * x0, gt[0] + gt[1] * x1)
            ys = (gt[3] + gt[5] * y0, gt[3] + gt[5] * y1)
            box = (min(xs), min(ys), max(xs), max(ys))
            old = boxes.get(name)
            boxes[name] = box if old is None else (min(old[0], box[0]), min(old[1], box[1]),
                                                   max(old[2], box[2]), max(old[3], box[3]))
        return gt, boxes
    except Exception:  # not a VRT we can lay out: every source counts for every tile
        return None


class InputStamps:
    """Content stamps of every raster input (and every source of a VRT input), built once
    per run; ``for_bounds`` gives the stamps relevant to one tile's extent."""

    def __init__(self, paths: dict, grid_crs_wkt: str):
        self.grid_crs_wkt = grid_crs_wkt
        self.entries = {}
        for role, path in sorted(paths.items()):
            entry = {"file": file_stamp(path)}
            if str(path).lower().endswith(".vrt") and not is_virtual_path(path):
                try:
                    entry["vrt_sha256"] = hashlib.sha256(Path(path).read_bytes()).hexdigest()
                except OSError:
                    entry["vrt_sha256"] = None
                layout = _vrt_layout(path)
                if layout is None:
                    entry["sources"] = [(file_stamp(p), None) for p in vrt_source_files(path)]
                    entry["crs"] = None
                else:
                    entry["sources"] = [(file_stamp(p), box) for p, box in layout[1].items()]
                    entry["crs"] = self._vrt_crs(path)
            self.entries[role] = entry

    @staticmethod
    def _vrt_crs(path):
        try:
            import rasterio

            with rasterio.open(path) as ds:
                return None if ds.crs is None else ds.crs.to_wkt()
        except Exception:
            return None

    def for_bounds(self, bounds, margin: float) -> dict:
        """Stamps for a tile with ``bounds`` (left, bottom, right, top, target CRS units)."""
        out = {}
        for role, entry in self.entries.items():
            item = {"file": entry["file"]}
            if "sources" in entry:
                item["vrt_sha256"] = entry["vrt_sha256"]
                box = self._in_crs(bounds, margin, entry.get("crs"))
                item["sources"] = [s for s, b in entry["sources"] if b is None or box is None or _touch(b, box)]
            out[role] = item
        return out

    def _in_crs(self, bounds, margin, crs_wkt):
        l, b, r, t = bounds
        l, b, r, t = l - margin, b - margin, r + margin, t + margin
        if crs_wkt is None:
            return None
        if crs_wkt == self.grid_crs_wkt:
            return (l, b, r, t)
        try:
            from rasterio.crs import CRS
            from rasterio.warp import transform_bounds

            src, dst = CRS.from_wkt(self.grid_crs_wkt), CRS.from_wkt(crs_wkt)
            if src == dst:
                return (l, b, r, t)
            l2, b2, r2, t2 = transform_bounds(src, dst, l, b, r, t, densify_pts=21)
            pad = 0.05 * max(r2 - l2, t2 - b2)
            return (l2 - pad, b2 - pad, r2 + pad, t2 + pad)
        except Exception:
            return None


def _touch(a, b) -> bool:
    return a[0] <= b[2] and b[0] <= a[2] and a[1] <= b[3] and b[1] <= a[3]


def tile_input_sha256(key: str, window: list, stamps: dict, extra: dict | None = None) -> str:
    """Checksum identifying one tile's inputs: job key, window and input stamps."""
    return sha256_text(canonical_json({"job": key, "window": list(window), "inputs": stamps, "extra": extra or {}}))


# ------------------------------------------------------------------------------- the file
class Manifest:
    """The manifest of one output folder (see the module docstring)."""

    def __init__(self, path, data: dict):
        self.path = Path(path)
        self.data = data

    @classmethod
    def new(cls, out_dir, key: str, tile_size: int, grid: dict, layers) -> "Manifest":
        return cls(Path(out_dir) / MANIFEST_NAME, {
            "format": FORMAT, "denude_version": denude.__version__, "job_key": key,
            "tile_size": int(tile_size), "grid": grid, "layers": list(layers), "tiles": {},
        })

    @classmethod
    def load(cls, out_dir) -> "Manifest | None":
        """The manifest in ``out_dir``, or None when there is none. A manifest that is not
        valid JSON is an OutputError."""
        path = Path(out_dir) / MANIFEST_NAME
        if not path.is_file():
            return None
        try:
            data = json.loads(path.read_text(encoding="utf-8"))
        except (OSError, ValueError, UnicodeDecodeError) as exc:
            raise OutputError(
                f"{path}: manifest cannot be read ({' '.join(str(exc).split())}); use --overwrite to start the batch again"
            ) from None
        if not isinstance(data, dict) or data.get("format") != FORMAT or not isinstance(data.get("tiles"), dict):
            raise OutputError(f"{path}: not a denude batch manifest ({FORMAT}); use --overwrite or another --out")
        return cls(path, data)

    @property
    def key(self) -> str | None:
        return self.data.get("job_key")

    @property
    def tiles(self) -> dict:
        return self.data["tiles"]

    def tile(self, tile_id: str) -> dict:
        return self.tiles.setdefault(tile_id, {"state": "pending"})

    def save(self) -> None:
        """Rewrite the manifest atomically (sorted tiles, stable layout)."""
        self.data["tiles"] = dict(sorted(self.tiles.items()))
        write_text_atomic(self.path, json.dumps(self.data, indent=1, sort_keys=False, allow_nan=False) + "\n")


def verify_outputs(tile_dir, outputs: dict) -> str | None:
    """None when every recorded output of a tile exists with its size and SHA-256; else the
    reason (one line)."""
    from denude.io.rasters import file_sha256

    if not outputs:
        return "no outputs recorded"
    for name, rec in sorted(outputs.items()):
        path = Path(tile_dir) / name
        try:
            size = path.stat().st_size
        except OSError:
            return f"{path} is missing"
        if size != rec.get("size_bytes"):
            return f"{path} has {size} bytes, not {rec.get('size_bytes')}"
        if file_sha256(path) != rec.get("sha256"):
            return f"{path} checksum differs from the manifest"
    return None
