"""The raster job behind `denude map` and `denude check`.

``inspect_job(settings)`` validates everything and writes nothing; ``run_map(settings)``
validates, then reads, computes and writes one window at a time (windows = output tiles)
on a thread pool, and renames the finished output folder into place.
``compute_window(settings, grid, window)`` is the per-window step: it takes only picklable
arguments, so batch runners can call it from other processes or Dask workers.
"""

from __future__ import annotations

import ctypes
import functools
import json
import math
import os
import shutil
import sys
import threading
import time
import uuid
import warnings
from collections import deque
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass, field
from pathlib import Path
from typing import Callable

import numpy as np
import rasterio
from rasterio.windows import Window

import denude
from denude.cautions import CAUTION, UPPER_BOUND_NOTE
from denude.core.constants import MINERAL_INDEX
from denude.core.dissolution import warn_out_of_range
from denude.core.hazard import DEFAULT_COLOURS, HAZARD_NODATA, classify
from denude.core.kernel import BlockCounts, compute_block, warm_up
from denude.core.rates import runoff_from_water_balance_mm_per_yr, zero_negative_runoff_mm_per_yr
from denude.core.rocks import RockTable
from denude.core.soil_co2 import air_pressure_atm, log10_atm_to_atm, pco2_from_aet_atm, ppmv_to_atm
from denude.errors import CoverageWarning, DenudeWarning, GridError, InputError, OutputError
from denude.execution.blocks import block_windows
from denude.io.grid import Grid, check_resolution, parse_crs, snap_bounds_outward
from denude.io.jobfile import MapSettings, is_constant
from denude.registry import INPUT_ROLES, LAYERS, OUTPUT_LAYERS
from denude.io.mosaic import is_virtual_path
from denude.io.rasters import (
    INT32_NODATA,
    GridReader,
    OutputSpec,
    RasterInfo,
    RasterWriter,
    WarpPlan,
    choose_layout,
    file_sha256,
    footprint_in_crs,
    inspect_raster,
    open_raster,
    overlap_fraction,
    plan_warp,
    sample_value_range,
    unique_codes,
    value_range,
)
from denude.io.rock_csv import read_rock_table, write_rock_table

SOURCES = (
    "White (1984) maximum denudation; Plummer & Busenberg (1982) equilibrium constants; "
    "Brook, Folkoff & Box (1983) soil CO2 when derived from AET"
)

#: A target grid with more than this many times the lithology raster's cells is taken to be a
#: resolution typo (a 100 m grid given as 0.01) rather than deliberate supersampling.
MAX_SUPERSAMPLING = 64

#: Share of computed cells with runoff <= 0 above which a finished run warns.
ZERO_RUNOFF_WARN_SHARE = 0.5

#: A runoff or precipitation field whose largest value is below this (mm/yr) is taken to be
#: in m/yr: even hyper-arid regions have some cells with more (common practice, no source).
MIN_PLAUSIBLE_MAX_MM_PER_YR = 5.0

#: Plausible value bands per input: role -> (low, high, fix when outside). Values outside
#: usually mean wrong units; these are screening limits (common practice, no source).
PLAUSIBLE = {
    "runoff": (0.0, 20000.0, "give runoff in mm/yr (not m/yr or mm/month)"),
    "precipitation": (0.0, 20000.0, "give precipitation in mm/yr"),
    "aet": (0.0, 5000.0, "give actual evapotranspiration in mm/yr"),
    "temperature": (-70.0, 60.0, "give temperature in degrees C (not kelvin or tenths of a degree)"),
    "elevation": (-500.0, 9000.0, "give elevation in metres above sea level"),
    "soluble_fraction": (0.0, 1.0, "give the soluble-area fraction as 0-1 (not percent)"),
    "pco2:atm": (0.0, 1.0, "values above 1 atm look like ppmv: use --pco2-units ppmv"),
    "pco2:ppmv": (1.0, 1e6, "values below 1 ppmv look like atm: use --pco2-units atm"),
    "pco2:log10atm": (-6.0, 0.0, "give log10 of PCO2 in atm (e.g. -2), or use --pco2-units atm"),
}

#: The fix named when runoff has negative cells under the default --negative-runoff error.
NEGATIVE_RUNOFF_FIX = (
    "negative runoff usually means wrong units or a water-balance residual: set those cells to nodata, "
    "or use --negative-runoff zero (job file [run] negative_runoff = \"zero\") to take them as 0 mm/yr"
)


def band_text(low: float, high: float) -> str:
    """'the plausible range LOW to HIGH' (or 'the plausible limit HIGH' without a lower bound)."""
    return f"the plausible limit {high:g}" if low == -math.inf else f"the plausible range {low:g} to {high:g}"


def implausible(role: str, settings: MapSettings, low_value: float, high_value: float):
    """(offending value, band low, band high, fix, unit) when [low_value, high_value] leaves the
    plausible band of ``role`` under these settings, else None. With --negative-runoff zero,
    runoff has no lower bound (negative cells become 0 mm/yr)."""
    key = f"pco2:{settings.pco2_units}" if role == "pco2" else role
    if key not in PLAUSIBLE:
        return None
    low, high, fix = PLAUSIBLE[key]
    if role == "runoff" and settings.negative_runoff == "zero":
        low = -math.inf
    if low_value >= low and high_value <= high:
        return None
    bad = low_value if low_value < low else high_value
    if role == "runoff" and bad < 0:
        fix = NEGATIVE_RUNOFF_FIX
    unit = {"pco2:atm": "atm", "pco2:ppmv": "ppmv", "pco2:log10atm": "log10 atm"}.get(key, INPUT_ROLES[role].unit)
    return bad, low, high, fix, unit


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
    return OutputSpec(
        name=info.file, dtype=info.dtype, nodata=info.nodata,
        overview_resampling=info.overview_resampling, tags=tuple(tags.items()),
        description=f"{info.quantity} [{info.units}]", colormap=colormap,
    )


# --------------------------------------------------------------------------- planning
def load_rocks(settings: MapSettings) -> RockTable:
    """The rock table of a job: the CSV given with --rocks, else the built-in table."""
    return RockTable.builtin() if settings.rocks is None else read_rock_table(settings.rocks)


def resolve_grid(settings: MapSettings) -> Grid:
    """The target grid: --grid-like raster, CRS + resolution (+ bounds), or the lithology grid.
    Without bounds, the lithology raster's extent in the target CRS (densified edges), snapped
    outward to whole cells with the origin on multiples of the resolution."""
    if settings.grid_crs is not None:
        crs = parse_crs(settings.grid_crs, "--grid-crs")
        bounds = settings.grid_bounds
        if bounds is None:
            res = check_resolution(settings.grid_resolution)
            bounds = snap_bounds_outward(footprint_in_crs(settings.lithology, "lithology", crs), res)
        return Grid.from_bounds(crs, settings.grid_resolution, bounds)
    path = settings.grid_like or settings.lithology
    role = "grid" if settings.grid_like else "lithology"
    with open_raster(path, role) as ds:
        if ds.crs is None:
            raise GridError(f"{role} raster {path} has no CRS; assign one (e.g. gdal_edit.py -a_srs EPSG:xxxx)")
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


def raster_roles(settings: MapSettings) -> dict[str, str]:
    """Role -> path of every raster input the job reads."""
    roles = {"lithology": settings.lithology}
    for role in ("runoff", "precipitation", "aet", "temperature", "soluble_fraction", "elevation"):
        value = getattr(settings, role)
        if isinstance(value, str):
            roles[role] = value
    if isinstance(settings.pco2, str) and not settings.pco2_from_aet:
        roles["pco2"] = settings.pco2
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
    """Warp plans and the rock table for a job (cached per process while the files are unchanged)."""
    return _prepare_job(settings, grid, _stamps(settings))


@functools.lru_cache(maxsize=8)
def _prepare_job(settings: MapSettings, grid: Grid, stamps: tuple) -> JobPlan:
    warps = {}
    for role, path in raster_roles(settings).items():
        categorical = INPUT_ROLES[role].categorical
        requested = settings.lithology_resampling if categorical else settings.continuous_resampling
        warps[role] = plan_warp(inspect_raster(path, role), grid, categorical, requested)
    return JobPlan(settings, grid, warps, load_rocks(settings))


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


@dataclass
class WindowResult:
    """Output arrays of one window (layer name -> array) and its cell counts."""

    window: Window
    arrays: dict
    counts: BlockCounts
    value_ranges: dict = field(default_factory=dict)   # role -> (min, max) of raster inputs read
    codes_present: tuple = ()                          # table codes found in the window
    unknown_codes: tuple = ()                          # codes not in the rock table


def _value(readers: InputReaders, settings: MapSettings, role: str, window: Window, ranges: dict | None = None):
    value = settings.pco2 if role == "pco2" else getattr(settings, role)
    if value is None:
        return None
    if is_constant(value):
        return float(value)
    data = readers.read(role, window).astype(np.float64)
    if ranges is not None and np.isfinite(data).any():
        ranges[role] = (float(np.nanmin(data)), float(np.nanmax(data)))
    return data


def _pco2_atm(readers, settings: MapSettings, window: Window, aet, ranges=None):
    if settings.pco2_from_aet:
        return pco2_from_aet_atm(aet)
    raw = _value(readers, settings, "pco2", window, ranges)
    if settings.pco2_units == "atm":
        return raw
    if settings.pco2_units == "log10atm":
        return log10_atm_to_atm(raw)
    if settings.elevation is not None:
        pressure = air_pressure_atm(_value(readers, settings, "elevation", window, ranges))
    else:
        pressure = 1.0 if settings.air_pressure_atm is None else settings.air_pressure_atm
    return ppmv_to_atm(raw, pressure)


def compute_window(settings: MapSettings, grid: Grid, window: Window, readers: InputReaders | None = None,
                   layers=None) -> WindowResult:
    """Read every input for one window of the target grid, run ``compute_block`` and return the
    output arrays (all six layers unless ``layers`` names a subset) and counts.

    Takes only picklable arguments; ``readers`` (open datasets) is an optional per-thread cache.
    """
    plan = prepare_job(settings, grid)
    own = readers is None
    readers = readers or InputReaders(plan)
    ranges: dict = {}
    try:
        codes = readers.read("lithology", window)
        valid = codes != INT32_NODATA
        aet = _value(readers, settings, "aet", window, ranges)
        negative = 0
        if settings.runoff is not None:
            runoff = _value(readers, settings, "runoff", window, ranges)
            if settings.negative_runoff == "zero":
                runoff, negative = zero_negative_runoff_mm_per_yr(runoff, counted=valid)
        else:
            runoff = runoff_from_water_balance_mm_per_yr(
                _value(readers, settings, "precipitation", window, ranges), aet)
        pco2 = _pco2_atm(readers, settings, window, aet, ranges)
        temperature = _value(readers, settings, "temperature", window, ranges)
        fraction = _value(readers, settings, "soluble_fraction", window, ranges)
    finally:
        if own:
            readers.close()
    lookup = plan.rocks.lookup()
    result = compute_block(codes, runoff, pco2, temperature, lookup, settings.chemistry,
                           soluble_fraction=fraction, lithology_valid=valid, warn=False)
    result.counts.negative_runoff = negative
    wanted = set(layers or settings.layers)
    row = lookup.row_index(codes)
    known = valid & (row >= 0)
    present = np.bincount(row[known], minlength=len(lookup.codes)) > 0
    codes_present = tuple(int(c) for c in lookup.codes[present])
    unknown = tuple(int(c) for c in np.unique(codes[valid & (row < 0)])) if result.counts.unknown_code else ()
    arrays = {}
    if "denudation" in wanted:
        arrays["denudation"] = result.denudation_mm_per_kyr
    if "dissolved_load" in wanted:
        arrays["dissolved_load"] = result.dissolved_load_mmol_per_l
    if "co2_drawdown" in wanted:
        arrays["co2_drawdown"] = result.co2_drawdown_t_per_km2_yr
    if "hazard" in wanted:
        arrays["hazard"] = classify(result.denudation_mm_per_kyr, settings.hazard_breaks_mm_per_kyr)
    if "lithology" in wanted:
        arrays["lithology"] = codes
    if "soluble_fraction" in wanted:
        mineral = np.where(known, lookup.mineral_index[np.maximum(row, 0)], 0)
        f = np.broadcast_to(np.asarray(1.0 if fraction is None else fraction, dtype=np.float64), codes.shape)
        out = np.where(known, f, np.nan)
        out = np.where(known & (mineral == MINERAL_INDEX["insoluble"]) & np.isfinite(f), 0.0, out)
        arrays["soluble_fraction"] = out.astype(np.float32)
    return WindowResult(window, arrays, result.counts, ranges, codes_present, unknown)


# ------------------------------------------------------------------------- validation
@dataclass
class InputReport:
    """One input as `denude check` shows it."""

    role: str
    constant: float | None = None
    info: RasterInfo | None = None
    warp: WarpPlan | None = None
    overlap: float | None = None      # fraction of the target grid covered
    value_min: float | None = None
    value_max: float | None = None


@dataclass
class JobReport:
    """The result of validating a job: grid, inputs, codes; nothing written."""

    settings: MapSettings
    grid: Grid
    rocks: RockTable
    inputs: dict = field(default_factory=dict)     # role -> InputReport
    codes_found: list = field(default_factory=list)
    codes_missing: list = field(default_factory=list)
    layout: str = "cog"
    notes: list = field(default_factory=list)


def _check_range(role: str, where: str, low_value: float, high_value: float, settings: MapSettings,
                 whole: bool = True) -> None:
    """Raise a one-line error when values are implausible. ``whole``: the range covers the whole
    input (a constant or a raster-wide scan), not one window, so unit heuristics apply."""
    found = implausible(role, settings, low_value, high_value)
    if whole and role in ("runoff", "precipitation") and 0 < high_value < MIN_PLAUSIBLE_MAX_MM_PER_YR:
        raise InputError(
            f"{where}: largest {role} value {high_value:g} mm/yr is implausibly small; the values look "
            f"like m/yr: give {role} in mm/yr (multiply by 1000)"
        )
    if found is None:
        return
    bad, low, high, fix, unit = found
    if role == "temperature" and high_value > 200:
        fix = "values look like kelvin; convert to degrees C (subtract 273.15)"
    if role == "soluble_fraction" and 1 < high_value <= 100:
        fix = "values look like percent; divide by 100"
    if role == "pco2" and settings.pco2_units == "atm" and high_value <= 0 and low_value >= -6:
        fix = "values look like log10 atm: use --pco2-units log10atm"
    raise InputError(
        f"{where}: {role} value {bad:g} is outside {band_text(low, high)} {unit}; {fix}"
    )


def check_outputs(settings: MapSettings, roles: dict[str, str]) -> None:
    """Refuse an existing output folder (without overwrite) and inputs inside the output folder."""
    if settings.out is None:
        raise OutputError("no output folder given; give --out OUTDIR")
    out = Path(settings.out).resolve()
    if out.exists() and not out.is_dir():
        raise OutputError(f"output {out} exists and is a file; give a folder path for --out")
    if out.exists() and not settings.overwrite:
        raise OutputError(f"output folder {out} already exists; use --overwrite or give a new --out")
    if not out.parent.is_dir():
        raise OutputError(f"parent folder of the output {out.parent} does not exist; create it first")
    paths = dict(roles)
    if settings.rocks:
        paths["rocks"] = settings.rocks
    if settings.job_file:
        paths["job file"] = settings.job_file
    if settings.grid_like:
        paths["grid"] = settings.grid_like
    refuse_inputs_inside(paths, out, "output folder")


def refuse_inputs_inside(paths: dict, out: Path, folder: str) -> None:
    """OutputError when an input path (role -> path; numbers, 'from-aet' and GDAL virtual
    paths are skipped) lies inside or equals the output folder ``out`` (the ``folder`` named)."""
    for role, path in paths.items():
        if not isinstance(path, (str, os.PathLike)) or path == "from-aet" or is_virtual_path(path):
            continue
        p = Path(path).resolve()
        if p == out or out in p.parents:
            raise OutputError(
                f"{role} input {p} is inside (or equal to) the {folder} {out}; outputs would "
                "replace it: give another --out"
            )


#: glibc malloc tuning of a map process: blocks up to this size come from the heap, not from
#: fresh mmap calls, and up to TRIM bytes of freed heap are kept for reuse. A window's arrays
#: (2 MiB per 512 x 512 float64) then reuse freed memory instead of being mapped, faulted in
#: page by page and unmapped again. Measured on a map run at 4096 x 4096 (2026-12-02): minor
#: page faults 205-211 k -> 102-116 k, system time 0.9 -> 0.8 s on a moderately loaded machine
#: (4.8 -> 1.0 s in one pair of runs under heavy load), peak RSS within noise.
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


def inspect_job(settings: MapSettings, for_output: bool = True) -> JobReport:
    """Validate a job without writing anything: inputs exist and are rasters with a CRS, overlap
    the target grid, plausible values, every lithology code in the rock table, output path safe.
    Raises a one-line DenudeError on the first problem; returns the report for `denude check`."""
    with gdal_env(settings):
        return _inspect_job(settings, for_output, scan=True)


def _inspect_job(settings: MapSettings, for_output: bool, scan: bool) -> JobReport:
    """``scan``: read every tile for value ranges and codes (check, dry run); else look at a
    sample only (a run then checks every window as it goes)."""
    rocks = load_rocks(settings)
    roles = raster_roles(settings)
    if for_output:
        check_outputs(settings, roles)
    grid = resolve_grid(settings)
    report = JobReport(settings, grid, rocks, layout=choose_layout(settings.layout, grid))
    if settings.grid_crs is not None and settings.grid_bounds is None:
        l, b, r, t = grid.bounds
        report.notes.append(
            f"target grid bounds ({l:.12g}, {b:.12g}, {r:.12g}, {t:.12g}): the lithology raster's extent in "
            f"{grid.crs_label()}, snapped outward to whole {grid.res[0]:.12g} x {grid.res[1]:.12g} cells")
    # constants first: cheap
    for role in ("runoff", "precipitation", "aet", "pco2", "temperature", "soluble_fraction", "elevation"):
        value = settings.pco2 if role == "pco2" else getattr(settings, role)
        if is_constant(value):
            _check_range(role, f"--{role.replace('_', '-')} {value:g}", value, value, settings)
            report.inputs[role] = InputReport(role, constant=value)
    if settings.air_pressure_atm is not None:
        report.notes.append(f"air pressure {settings.air_pressure_atm:g} atm for ppmv -> atm")
    elif settings.pco2_units == "ppmv" and settings.elevation is None:
        report.notes.append("air pressure 1 atm (sea level) assumed for ppmv -> atm; give --elevation to correct")
    if settings.pco2_from_aet:
        report.notes.append("soil PCO2 derived per cell from AET (Brook, Folkoff & Box 1983)")
    if is_constant(settings.runoff) and settings.runoff < 0:
        report.notes.append(f"runoff {settings.runoff:g} mm/yr is negative: taken as 0 mm/yr (--negative-runoff zero)")
    if settings.pco2_units != "ppmv" and (settings.elevation is not None or settings.air_pressure_atm is not None):
        warnings.warn(DenudeWarning(
            f"elevation / air pressure only convert ppmv PCO2; ignored with --pco2-units {settings.pco2_units}"),
            stacklevel=2)
    for role, path in roles.items():
        categorical = INPUT_ROLES[role].categorical
        info = inspect_raster(path, role)
        requested = settings.lithology_resampling if categorical else settings.continuous_resampling
        warp = plan_warp(info, grid, categorical, requested)
        item = InputReport(role, info=info, warp=warp)
        item.overlap = overlap_fraction(info, grid)
        if role == "lithology" and grid.width * grid.height > MAX_SUPERSAMPLING * info.width * info.height:
            raise GridError(
                f"target grid {grid.width} x {grid.height} cells has over {MAX_SUPERSAMPLING}x the cells of "
                f"the lithology raster {path} ({info.width} x {info.height}); check the target resolution "
                "(in CRS units: metres, or degrees for a geographic CRS)"
            )
        if item.overlap is not None and item.overlap < 0.999:
            warnings.warn(CoverageWarning(
                f"{role} raster {path} covers {100 * item.overlap:.1f} % of the target grid; cells outside "
                "it will be nodata"), stacklevel=2)
        if not categorical:
            lo, hi, n = value_range(path, role) if scan else sample_value_range(path, role)
            if n == 0 and scan:
                raise InputError(f"{role} raster {path} has no valid cells (all nodata); check its nodata value")
            if n:
                item.value_min, item.value_max = lo, hi
                _check_range(role, f"{role} raster {path}", lo, hi, settings)
                if role == "runoff" and lo < 0:
                    report.notes.append(f"runoff raster {path} has negative values (down to {lo:g} mm/yr); "
                                        "they will be taken as 0 mm/yr (--negative-runoff zero)")
        report.inputs[role] = item
    lithology_is_float = not np.issubdtype(np.dtype(report.inputs["lithology"].info.dtype), np.integer)
    if not scan and not lithology_is_float:
        return report
    # A float lithology raster is scanned whole even for a run: a non-integer code must be an
    # error, never truncated into another rock type.
    codes = unique_codes(settings.lithology)
    report.codes_found = codes
    report.codes_missing = rocks.missing_codes(codes)
    if not codes:
        raise InputError(f"lithology raster {settings.lithology} has no valid cells (all nodata); check its nodata value")
    if report.codes_missing:
        raise missing_codes_error(settings.lithology, report.codes_missing, rocks)
    return report


def warn_about_counts(counts: dict) -> None:
    """One-line warnings a finished run owes its user: cells out of the constants' range, and a
    map that is mostly zero because runoff is <= 0 (P < AET, or swapped inputs)."""
    warn_out_of_range(counts.get("out_of_range", 0))
    negative = counts.get("negative_runoff", 0)
    if negative:
        warnings.warn(DenudeWarning(
            f"{negative} map cells had negative runoff and were taken as 0 mm/yr (no dissolution; "
            "--negative-runoff zero); check the runoff input if that many is unexpected"), stacklevel=2)
    computed, zero = counts.get("computed", 0), counts.get("zero_runoff", 0)
    if computed and zero >= ZERO_RUNOFF_WARN_SHARE * computed:
        warnings.warn(DenudeWarning(
            f"{zero} of {computed} computed cells ({100 * zero / computed:.0f} %) have runoff <= 0 and a "
            "rate of 0; check the runoff (or precipitation and AET) inputs and their units"), stacklevel=2)


def missing_codes_error(path, codes, rocks: RockTable) -> InputError:
    shown = ", ".join(str(c) for c in list(codes)[:10])
    return InputError(
        f"lithology raster {path} has code(s) {shown} not in the rock table "
        f"({rocks.source}); add rows for them to the --rocks CSV or set them to nodata"
    )


def check_window(settings: MapSettings, plan: JobPlan, result: WindowResult) -> None:
    """The checks a run makes on every window as it goes: plausible input values (the same
    bands as `denude check`) and lithology codes covered by the rock table."""
    if result.unknown_codes:
        raise missing_codes_error(settings.lithology, result.unknown_codes, plan.rocks)
    for role, (lo, hi) in result.value_ranges.items():
        _check_range(role, f"{role} raster {plan.warps[role].info.path}", lo, hi, settings, whole=False)


# ---------------------------------------------------------------------------- the run
@dataclass
class MapRunSummary:
    """What a finished `denude map` run produced."""

    out_dir: str
    grid: Grid
    counts: BlockCounts
    outputs: list
    wall_time_s: float
    blocks: int
    layout: str
    record: dict


def _staging_dir(out: Path) -> Path:
    staging = out.parent / f".{out.name}.denude-partial-{uuid.uuid4().hex[:8]}"
    try:
        staging.mkdir()
    except OSError as exc:
        raise OutputError(f"cannot create a folder next to {out} ({exc.strerror}); check the parent folder is writable") from None
    return staging


def _commit(staging: Path, out: Path, overwrite: bool) -> None:
    """Rename the finished staging folder to the output folder (replacing it if allowed)."""
    old = None
    if out.exists():
        if not overwrite:
            raise OutputError(f"output folder {out} already exists; use --overwrite or give a new --out")
        old = out.parent / f".{out.name}.denude-old-{uuid.uuid4().hex[:8]}"
        out.rename(old)
    staging.rename(out)
    if old is not None:
        shutil.rmtree(old, ignore_errors=True)


def _json_number(value):
    """A float for JSON: NaN and infinities become strings."""
    if value is None or (isinstance(value, float) and math.isfinite(value)):
        return value
    return str(value)


def _input_records(settings: MapSettings, report: JobReport, hashes: dict) -> dict:
    records = {}
    for role, item in report.inputs.items():
        if item.constant is not None:
            records[role] = {"constant": item.constant, "unit": INPUT_ROLES[role].unit if role != "pco2" else settings.pco2_units}
            continue
        info = item.info
        crs = info.grid.crs
        records[role] = {
            "path": info.path,
            "size_bytes": info.size_bytes,
            "sha256": hashes.get(info.path),
            "crs_wkt": info.crs_wkt,
            "epsg": crs.to_epsg(),
            "width": info.width,
            "height": info.height,
            "resolution": list(info.res),
            "nodata": _json_number(info.nodata),
            "resampling": "none (aligned)" if item.warp.offset is not None else item.warp.resampling,
            "unit": INPUT_ROLES[role].unit if role != "pco2" else settings.pco2_units,
        }
    if settings.rocks:
        records["rocks"] = {"path": settings.rocks, "size_bytes": os.path.getsize(settings.rocks),
                            "sha256": hashes.get(settings.rocks)}
    else:
        records["rocks"] = {"builtin": True}
    if settings.job_file:
        records["job_file"] = {"path": settings.job_file, "size_bytes": os.path.getsize(settings.job_file),
                               "sha256": hashes.get(settings.job_file)}
    return records


def run_map(settings: MapSettings, progress: Callable[[int, int], None] | None = None) -> MapRunSummary:
    """Validate, compute and write every output of a raster job into ``settings.out``.

    Windows are output tiles; ``settings.workers`` threads read and compute windows while the
    calling thread writes them in a fixed order, so any number of workers gives identical
    files. ``progress(done, total)`` is called after each window is written.
    """
    started = time.perf_counter()
    with gdal_env(settings):
        return _run_map(settings, progress, started)


def _run_map(settings: MapSettings, progress, started: float) -> MapRunSummary:
    # load table and compiled loop get ready while the inputs are validated
    threading.Thread(target=warm_up, args=(settings.chemistry,), name="denude-warm-up", daemon=True).start()
    report = _inspect_job(settings, for_output=True, scan=False)
    grid = report.grid
    out = Path(settings.out).resolve()
    windows = block_windows(grid.height, grid.width, settings.block_size)
    layers = [name for name in LAYERS if name in settings.layers]

    hash_paths = sorted({item.info.path for item in report.inputs.values()
                         if item.info is not None and not is_virtual_path(item.info.path)}
                        | {p for p in (settings.rocks, settings.job_file) if p})  # remote inputs: no checksum
    hashes: dict = {}
    hasher = threading.Thread(target=lambda: hashes.update({p: file_sha256(p) for p in hash_paths}), daemon=True)
    hasher.start()

    staging = _staging_dir(out)
    writers = {}
    local = threading.local()
    all_readers: list[InputReaders] = []
    lock = threading.Lock()
    plan = prepare_job(settings, grid)

    def work(window: Window) -> WindowResult:
        readers = getattr(local, "readers", None)
        if readers is None:
            readers = local.readers = InputReaders(plan)
            with lock:
                all_readers.append(readers)
        return compute_window(settings, grid, window, readers, layers)

    total = BlockCounts()
    found: set = set()
    try:
        for name in layers:
            writers[name] = RasterWriter(staging / OUTPUT_LAYERS[name].file, grid, output_spec(name, settings),
                                         settings.block_size, settings.compress, report.layout)
        in_flight = 2 * settings.workers
        with ThreadPoolExecutor(max_workers=settings.workers, thread_name_prefix="denude-window") as pool:
            pending: deque = deque()
            queue = iter(windows)
            for window in queue:
                pending.append(pool.submit(work, window))
                if len(pending) >= in_flight:
                    break
            done = 0
            while pending:
                result = pending.popleft().result()
                check_window(settings, plan, result)
                found.update(result.codes_present)
                nxt = next(queue, None)
                if nxt is not None:
                    pending.append(pool.submit(work, nxt))
                for name, array in result.arrays.items():
                    writers[name].write(array, result.window)
                total = total + result.counts
                done += 1
                if progress is not None:
                    progress(done, len(windows))
        for reader in all_readers:
            reader.close()
        for name in layers:          # overviews / COG copies of all outputs run side by side
            writers[name].finish()
        outputs = [writers[name].close().name for name in layers]
        write_rock_table(report.rocks, staging / "rocks.csv")
        outputs.append("rocks.csv")
        hasher.join()
        wall = time.perf_counter() - started
        record = {
            "tool": "denude",
            "version": denude.__version__,
            "command": "map",
            "caution": CAUTION,
            "upper_bound_note": UPPER_BOUND_NOTE,
            "settings": settings.as_dict(),
            "inputs": _input_records(settings, report, hashes),
            "grid": grid.as_dict(),
            "grid_source": grid_source(settings),
            "layout": report.layout,
            "block_size": settings.block_size,
            "blocks": len(windows),
            "lithology_codes_found": sorted(found),
            "validation": "inputs sampled before the run; every window checked during the run",
            "counts": total.as_dict(),
            "outputs": outputs + ["run.json"],
            "wall_time_s": round(wall, 3),
        }
        (staging / "run.json").write_text(json.dumps(record, indent=2, allow_nan=False) + "\n", encoding="utf-8")
        _commit(staging, out, settings.overwrite)
    except BaseException:
        for reader in all_readers:
            reader.close()
        for writer in writers.values():
            writer.abort()
        shutil.rmtree(staging, ignore_errors=True)
        raise
    warn_about_counts(total.as_dict())
    return MapRunSummary(str(out), grid, total, outputs + ["run.json"], wall, len(windows), report.layout, record)
