"""Output rasters: layer descriptions (``OutputSpec``), layout, creation and COG options, and
``RasterWriter`` (window by window on a writer thread, then overviews or the COG copy).

Compression runs on GDAL's threads (``compression_threads``); blocks are written in a fixed
order, so the bytes of a file depend neither on the number of compute workers nor on threads.
"""

from __future__ import annotations

import queue
import threading
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import rasterio
import rasterio.shutil
from rasterio.errors import RasterioIOError
from rasterio.windows import Window

from denude.errors import InputError, OutputError
from denude.io.grid import Grid
from denude.io.raster_warp import RESAMPLING
from denude.io.styles import write_category_names

#: Rasters with at most this many cells are written in cloud-optimised (COG) layout by default:
#: 2**26 cells = 8192 x 8192 (256 MiB of float32). The COG layout needs a second pass (GDAL's COG
#: driver copies an uncompressed intermediate, which also needs that much temporary disk per
#: output), so larger rasters are plain tiled BigTIFFs with internal overviews instead.
COG_MAX_CELLS = 2**26

COMPRESSIONS = ("deflate", "zstd")
LAYOUTS = ("auto", "cog", "tiled")


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
    """Overview decimation factors 2, 4, ... until the overview fits in one tile: the levels
    GDAL's COG driver makes with OVERVIEWS=AUTO (tests/test_rasters.py compares the files)."""
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


def cog_options(spec: OutputSpec, compress: str, block_size: int, threads: str | None = None,
                overviews: str = "AUTO") -> dict:
    """COG driver options of an output: the same compression, predictor and tiles as
    ``creation_options``; ``overviews``: the driver's OVERVIEWS (AUTO: it makes them with the
    layer's resampling; FORCE_USE_EXISTING: it takes the source's)."""
    if compress not in COMPRESSIONS:
        raise InputError(f"compression {compress!r} is not known; use one of {', '.join(COMPRESSIONS)}")
    return {
        "COMPRESS": compress.upper(),
        "PREDICTOR": "FLOATING_POINT" if np.dtype(spec.dtype).kind == "f" else "STANDARD",
        "BLOCKSIZE": block_size,
        "BIGTIFF": "IF_SAFER",
        "RESAMPLING": spec.overview_resampling.upper(),
        "OVERVIEWS": overviews,
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

    In COG layout the blocks first go uncompressed to ``<path>.partial.tif``, which gets its
    overviews (uncompressed); the COG driver then compresses everything once while it writes
    overviews and data in cloud-optimised order.
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
        # overviews on the file as written (COG: the uncompressed intermediate, whose overviews
        # the COG copy then takes over; the driver building them itself would compress them to
        # a temporary file and again into the COG, about 0.3 s more per float layer of 4096^2)
        ds = self.dataset
        factors = overview_factors(self.grid.height, self.grid.width, self.block_size)
        if factors:
            ds.build_overviews(factors, RESAMPLING[self.spec.overview_resampling])
            if self.layout == "tiled":
                ds.update_tags(ns="rio_overview", resampling=self.spec.overview_resampling)
        ds.close()
        if self.layout != "tiled":
            options = cog_options(self.spec, self.compress, self.block_size, self.options["num_threads"],
                                  overviews="FORCE_USE_EXISTING" if factors else "NONE")
            rasterio.shutil.copy(self.work_path, self.path, driver="COG", **options)
            self.work_path.unlink()
        write_category_names(self.path, list(self.spec.categories))

    def abort(self) -> None:
        """Stop writing and close the file without finishing it (the caller removes it)."""
        if self._thread.is_alive():
            self._finishing = True
            self._queue.put(self._ABORT)
            self._thread.join()
