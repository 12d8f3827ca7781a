"""The plan of a raster job: rock table, target grid, input roles, warp plans, per-thread
readers, output layer descriptions and the GDAL settings of a run.

Built once per run (and once per worker process of a batch); every window reads through it.
"""

from __future__ import annotations

import ctypes
import functools
import json
import os
import sys
import threading
from dataclasses import dataclass

import numpy as np
import rasterio
from rasterio.windows import Window

import denude
from denude.cautions import CAUTION, UPPER_BOUND_NOTE
from denude.core.cover import COVER_CLASS_NAMES, COVER_COLOURS
from denude.core.hazard import DEFAULT_COLOURS
from denude.core.kernel import warm_up
from denude.core.rocks import RockTable
from denude.io.grid import Grid, check_resolution, parse_crs, snap_bounds_outward
from denude.io.jobfile import MapSettings
from denude.io.rasters import (
    GridReader, OutputSpec, check_georeferenced, footprint_in_crs, inspect_raster, open_raster, plan_warp,
)
from denude.io.layer_meta import layer_extras
from denude.io.rock_csv import read_rock_table
from denude.io.table_cache import prime_tables
from denude.registry import INPUT_ROLES, OUTPUT_LAYERS

SOURCES = (
    "White (1984) maximum denudation; Plummer & Busenberg (1982) equilibrium constants; "
    "Brook, Folkoff & Box (1983) soil CO2 when derived from AET"
)

# ----------------------------------------------------------------------- layer descriptions
def output_spec(layer: str, settings: MapSettings) -> OutputSpec:
    """The OutputSpec (file, dtype, nodata, tags, colours) of one output layer."""
    info = OUTPUT_LAYERS[layer]
    tags = {
        "units": info.units,
        "quantity": info.quantity,
        "formula": info.formula,
        "sources": SOURCES,
        "chemistry": settings.chemistry,
        "caution": CAUTION,
        "upper_bound_note": UPPER_BOUND_NOTE,
        "denude_version": denude.__version__,
    }
    colormap = None
    if layer == "hazard":
        names = list(settings.hazard_names)
        tags["class_names"] = json.dumps(names)
        tags["class_breaks_mm_per_kyr"] = json.dumps(list(settings.hazard_breaks_mm_per_kyr))
        for i, name in enumerate(names):
            tags[f"class_{i}"] = name
        colormap = tuple(DEFAULT_COLOURS[i] if i < len(DEFAULT_COLOURS) else (128, 128, 128, 255)
                         for i in range(len(names)))
    elif layer == "covered_karst":
        tags["class_names"] = json.dumps(list(COVER_CLASS_NAMES))
        for i, name in enumerate(COVER_CLASS_NAMES):
            tags[f"class_{i}"] = name
        tags["cover_min_thickness_m"] = repr(float(settings.cover_min_thickness_m))
        tags["cover_rule"] = ("covered where cover thickness > 0 m and >= cover_min_thickness_m; "
                              "the denudation rate does not depend on cover")
        colormap = COVER_COLOURS
    extras = layer_extras(layer, settings, load_rocks(settings) if layer == "lithology" else None)
    tags["sources"] = extras.pop("sources")
    fields = dict(name=info.file, dtype=info.dtype, nodata=info.nodata, colormap=colormap)
    fields.update(extras)
    return OutputSpec(
        overview_resampling=info.overview_resampling, tags=tuple(tags.items()),
        description=f"{info.quantity} [{info.units}]", **fields,
    )


# --------------------------------------------------------------------------- planning
def load_rocks(settings: MapSettings) -> RockTable:
    """The rock table of a job: the CSV given with --rocks, else the built-in table."""
    return RockTable.builtin() if settings.rocks is None else read_rock_table(settings.rocks)


def resolve_grid(settings: MapSettings, lithology=None) -> Grid:
    """The target grid: --grid-like raster, CRS + resolution (+ bounds), or the lithology grid.
    Without bounds, the lithology raster's extent in the target CRS (densified edges), snapped
    outward to whole cells with the origin on multiples of the resolution. ``lithology``: the
    lithology raster, if the caller holds it open."""
    if settings.grid_crs is not None:
        crs = parse_crs(settings.grid_crs, "--grid-crs")
        bounds = settings.grid_bounds
        if bounds is None:
            res = check_resolution(settings.grid_resolution)
            bounds = snap_bounds_outward(footprint_in_crs(settings.lithology, "lithology", crs, lithology), res)
        return Grid.from_bounds(crs, settings.grid_resolution, bounds)
    if settings.grid_like:
        with open_raster(settings.grid_like, "grid") as ds:
            check_georeferenced(ds, f"grid raster {settings.grid_like}")
            return Grid.from_dataset(ds)
    if lithology is not None:
        check_georeferenced(lithology, f"lithology raster {settings.lithology}")
        return Grid.from_dataset(lithology)
    with open_raster(settings.lithology, "lithology") as ds:
        check_georeferenced(ds, f"lithology raster {settings.lithology}")
        return Grid.from_dataset(ds)


def grid_source(settings: MapSettings) -> str:
    """Where the target grid comes from, in words (for `denude check` and run.json)."""
    if settings.grid_like:
        return f"the grid of {settings.grid_like}"
    if settings.grid_crs is None:
        return f"the grid of the lithology raster {settings.lithology}"
    if settings.grid_bounds is not None:
        return "--grid-crs, --grid-resolution and --grid-bounds as given"
    return ("--grid-crs and --grid-resolution; bounds = the lithology raster's extent in that CRS, "
            "snapped outward to whole cells (origin on multiples of the resolution)")


def requested_resampling(settings: MapSettings, role: str) -> str:
    """The resampling asked for one input role: the lithology or continuous setting; 'auto' of
    a role with its own auto rule (``InputRole.auto_resampling``: nearest for the cover, so a
    0/1 mask is not smeared into fractions) becomes that rule."""
    info = INPUT_ROLES[role]
    requested = settings.lithology_resampling if info.categorical else settings.continuous_resampling
    if requested == "auto" and info.auto_resampling is not None:
        return info.auto_resampling
    return requested


def raster_roles(settings: MapSettings) -> dict[str, str]:
    """Role -> path of every raster input the job reads."""
    roles = {}
    for role in INPUT_ROLES:
        value = getattr(settings, role)
        if isinstance(value, str) and not (role == "pco2" and settings.pco2_from_aet):
            roles[role] = value
    return roles


@dataclass(frozen=True)
class JobPlan:
    """Everything a window needs besides the window: picklable, built once per process."""

    settings: MapSettings
    grid: Grid
    warps: dict            # role -> WarpPlan
    rocks: RockTable


def _stamps(settings: MapSettings) -> tuple:
    paths = list(raster_roles(settings).values()) + ([settings.rocks] if settings.rocks else [])
    stamps = []
    for path in paths:
        try:
            st = os.stat(path)
            stamps.append((path, st.st_mtime_ns, st.st_size))
        except OSError:
            stamps.append((path, None, None))
    return tuple(stamps)


def prepare_job(settings: MapSettings, grid: Grid) -> JobPlan:
    """Warp plans and the rock table for a job (cached per process while the files are
    unchanged); the chemistry's load tables made ready (``io.table_cache``)."""
    prime_tables(settings.chemistry)
    return _prepare_job(settings, grid, _stamps(settings))


@functools.lru_cache(maxsize=8)
def _prepare_job(settings: MapSettings, grid: Grid, stamps: tuple) -> JobPlan:
    warps = {}
    for role, path in raster_roles(settings).items():
        warps[role] = plan_warp(inspect_raster(path, role), grid, INPUT_ROLES[role].categorical,
                                requested_resampling(settings, role))
    return JobPlan(settings, grid, warps, load_rocks(settings))


def warm_up_kernel(chemistry: str) -> None:
    """The chemistry's load tables (file cache or build) and the compiled loops loaded
    (``core.kernel.warm_up``): started on a thread of its own while a run validates."""
    prime_tables(chemistry)
    warm_up(chemistry)


def plan_from_report(report) -> JobPlan:
    """The plan of a validated job (a ``JobReport``): its warp plans, no input opened again."""
    warps = {role: item.warp for role, item in report.inputs.items() if item.warp is not None}
    return JobPlan(report.settings, report.grid, warps, report.rocks)


class InputReaders:
    """Open datasets of one thread or process (GDAL handles are not shared across threads)."""

    def __init__(self, plan: JobPlan):
        self.plan = plan
        self._open: dict = {}

    def read(self, role: str, window: Window) -> np.ndarray:
        reader = self._open.get(role)
        if reader is None:
            reader = self._open[role] = GridReader(self.plan.warps[role], self.plan.grid)
        return reader.read(window)

    def close(self) -> None:
        for reader in self._open.values():
            reader.close()
        self._open.clear()


#: glibc malloc tuning of a map process: blocks up to this size come from the heap, not from
#: fresh mmap calls, and up to TRIM bytes of freed heap are kept for reuse. A window's arrays
#: (2 MiB per 512 x 512 float64) then reuse freed memory instead of being mapped, faulted in
#: page by page and unmapped again. Measured on a map run at 4096 x 4096 (2026-12-02): minor
#: page faults 205-211 k -> 102-116 k, system time 0.9 -> 0.8 s on a moderately loaded machine,
#: peak RSS within noise.
MALLOC_MMAP_THRESHOLD_BYTES = 16 * 2**20
MALLOC_TRIM_THRESHOLD_BYTES = 128 * 2**20


def limit_malloc_arenas(arenas: int = 2) -> None:
    """Cap glibc's malloc arenas for this process and keep freed blocks for reuse (Linux only;
    a no-op elsewhere).

    glibc gives busy threads their own arenas, and the numpy blocks freed in each stay
    resident, so peak memory grows with the number of threads. Measured with
    benchmarks/bench_map.py: about 20 % lower peak RSS for a map run. The mmap and trim
    thresholds are fixed (MALLOC_MMAP_THRESHOLD_BYTES, MALLOC_TRIM_THRESHOLD_BYTES) so window
    arrays reuse freed heap. Call it before starting threads; it is process-wide, so the CLI
    (which owns the process) calls it.
    """
    if not sys.platform.startswith("linux"):
        return
    try:
        libc = ctypes.CDLL("libc.so.6")
        libc.mallopt(-8, int(arenas))                         # M_ARENA_MAX
        libc.mallopt(-3, int(MALLOC_MMAP_THRESHOLD_BYTES))    # M_MMAP_THRESHOLD
        libc.mallopt(-1, int(MALLOC_TRIM_THRESHOLD_BYTES))    # M_TRIM_THRESHOLD
    except (OSError, AttributeError):  # pragma: no cover - not glibc
        pass


def gdal_env(settings: MapSettings):
    """GDAL settings of a job: the block cache sized deliberately (GDAL_CACHEMAX is in bytes
    here; GDAL's default is 5 % of RAM, which would let memory grow with raster size)."""
    return rasterio.Env(GDAL_CACHEMAX=settings.gdal_cache_mb * 2**20)


class ThreadReaders:
    """One ``InputReaders`` per worker thread (GDAL handles are not shared across threads)."""

    def __init__(self, plan):
        self.plan = plan
        self._local = threading.local()
        self._all: list[InputReaders] = []
        self._lock = threading.Lock()

    def get(self) -> InputReaders:
        readers = getattr(self._local, "readers", None)
        if readers is None:
            readers = self._local.readers = InputReaders(self.plan)
            with self._lock:
                self._all.append(readers)
        return readers

    def close(self) -> None:
        for readers in self._all:
            readers.close()
