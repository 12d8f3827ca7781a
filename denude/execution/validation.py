"""The one rule book of a raster job, used by `check`, `map` and `batch`.

``validate_job`` checks a job without writing anything: output folder safe, rock table, target
grid, every input opens (once) with a CRS and a north-up grid, overlaps the grid, plausible
values (constants, then a sample or a decimated scan of each raster), every lithology code in
the rock table. ``check_window`` applies the same value bands and code rule to each window a
run reads; ``warn_about_counts`` the notes a finished run owes its user.
"""

from __future__ import annotations

import os
import warnings
from concurrent.futures import Future, ThreadPoolExecutor
from contextlib import ExitStack
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from denude.core.constants import TEMPERATURE_MIN_C
from denude.core.dissolution import warn_out_of_range
from denude.core.rocks import RockTable
from denude.core.soil_co2 import sea_level_overstatement
from denude.core.units import convert
from denude.errors import CoverageWarning, DenudeError, DenudeWarning, GridError, InputError, OutputError, RasterReadError
from denude.execution.plan import JobPlan, gdal_env, load_rocks, raster_roles, requested_resampling, resolve_grid
from denude.io.grid import Grid
from denude.io.jobfile import MapSettings, is_constant
from denude.io.mosaic import is_virtual_path
from denude.io.outdir import check_new_folder
from denude.io.rasters import (
    RasterInfo, WarpPlan, choose_layout, decimated_codes, describe_dataset, open_raster, overlap_fraction,
    plan_warp, read_band, sample_value_range, unique_codes, value_range,
)
from denude.io.units import UnitChoice, choose_unit, settings_unit
from denude.registry import INPUT_ROLES, PCO2_FROM_AET, VALUE_FIELDS
from denude.execution.plausibility import (  # noqa: F401 (the bands are part of the rule book's face)
    MAX_SUPERSAMPLING, MIN_PLAUSIBLE_MAX_MM_PER_YR, NEGATIVE_RUNOFF_FIX, OUT_OF_RANGE_FIX, PLAUSIBLE,
    PPMV_WARNING_ELEVATIONS_M, ZERO_RUNOFF_WARN_SHARE, band_text, check_range, implausible, pco2_target,
    value_band,
)

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
    units: dict = field(default_factory=dict)      # role -> UnitChoice of each continuous input

    def resolve_units(self) -> None:
        """Put the units chosen so far into ``settings.input_units`` (what every window reads)."""
        entries = tuple((c.role, c.unit.name, c.source, c.declared) for c in self.units.values())
        if entries != self.settings.input_units:
            self.settings = self.settings.replace(input_units=entries)


def check_outputs(settings: MapSettings, roles: dict[str, str]) -> None:
    """Refuse an existing output folder (without overwrite) and inputs inside the output folder."""
    out = check_new_folder(settings.out, settings.overwrite)
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
        if not isinstance(path, (str, os.PathLike)) or path == PCO2_FROM_AET or is_virtual_path(path):
            continue
        p = Path(path).resolve()
        if p == out or out in p.parents:
            raise OutputError(
                f"{role} input {p} is inside (or equal to) the {folder} {out}; outputs would "
                "replace it: give another --out"
            )


def inspect_job(settings: MapSettings, for_output: bool = True) -> JobReport:
    """Validate a job without writing anything: inputs exist and are rasters with a CRS, overlap
    the target grid, plausible values, every lithology code in the rock table, output path safe.
    Raises a one-line DenudeError on the first problem; returns the report for `denude check`."""
    with gdal_env(settings):
        return validate_job(settings, for_output, scan=True)


def validate_job(settings: MapSettings, for_output: bool, scan: bool, values: str | None = None,
                 tolerant=False) -> JobReport:
    """The rule book. ``scan``: read every block for codes and refuse inputs without valid
    cells (`check`); else codes are scanned only for a float lithology (a run checks every
    window as it goes). ``values``: 'decimated' (a reduced whole read; default with ``scan``)
    or 'sample' (a lattice of small windows; default otherwise). ``tolerant``: unreadable
    pixels are left to the windows that touch them (a batch reports them per tile); True for
    every input, or a set of the roles read so (a batch's mosaics). Each input is opened once."""
    values = values or ("decimated" if scan else "sample")
    rocks = load_rocks(settings)
    roles = raster_roles(settings)
    if for_output:
        check_outputs(settings, roles)
    with ExitStack() as stack:
        lithology = stack.enter_context(open_raster(settings.lithology, "lithology"))
        pool = ThreadPoolExecutor(max_workers=2, thread_name_prefix="denude-sample")
        stack.callback(pool.shutdown, wait=True, cancel_futures=True)
        value_reads = _start_value_reads(pool, roles, values, scan)
        grid = resolve_grid(settings, lithology)
        report = JobReport(settings, grid, rocks, layout=choose_layout(settings.layout, grid))
        if settings.grid_crs is not None and settings.grid_bounds is None:
            l, b, r, t = grid.bounds
            report.notes.append(
                f"target grid bounds ({l:.12g}, {b:.12g}, {r:.12g}, {t:.12g}): the lithology raster's extent in "
                f"{grid.crs_label()}, snapped outward to whole {grid.res[0]:.12g} x {grid.res[1]:.12g} cells")
        _check_constants(report)
        for role, path in roles.items():
            ds = lithology if role == "lithology" else stack.enter_context(open_raster(path, role))
            if role != "lithology":
                _choose_unit(report, role, ds, path)
            report.inputs[role] = _check_raster(report, role, path, ds, value_reads.get(role), scan,
                                                _tolerant(tolerant, role))
        _check_units_together(report)
        _check_codes(report, lithology, scan, _tolerant(tolerant, "lithology"), values)
    return report


def _start_value_reads(pool, roles: dict, values: str, scan: bool) -> dict[str, Future]:
    """The value reads of the raster inputs, started on ``pool`` (own handles, GDAL reads
    release the GIL) so they overlap each other and the checks: for a continuous input a
    decimated read or the lattice sample (``values``), for the lithology the lattice look
    for any valid cell (not with ``scan``, which reads every code). Errors surface where
    the result is taken, in input order."""
    reads = {}
    for role, path in roles.items():
        if INPUT_ROLES[role].categorical:
            if role == "lithology" and not scan:
                reads[role] = pool.submit(sample_value_range, path, role)
        else:
            reads[role] = pool.submit(value_range if values == "decimated" else sample_value_range, path, role)
    return reads


def _tolerant(tolerant, role: str) -> bool:
    """Whether ``role`` is read tolerantly under ``validate_job``'s ``tolerant`` (a bool or a set of roles)."""
    return tolerant if isinstance(tolerant, bool) else role in tolerant


def _choose_unit(report: JobReport, role: str, ds, path) -> UnitChoice:
    """The unit of one input (option > metadata > default), recorded in the report and its
    settings; a conversion is said in one line, an option overriding metadata is warned about."""
    option = getattr(report.settings, f"{role}_units", None)
    choice, warning = choose_unit(role, option, ds, path)
    if warning:
        warnings.warn(DenudeWarning(warning), stacklevel=5)
    report.units[role] = choice
    report.resolve_units()
    if choice.source == "metadata" and not choice.unit.identity:
        message = (f"{role} raster {path} declares unit {choice.declared!r}: values converted from "
                   f"{choice.unit.name} to {choice.unit.target} ({choice.unit.describe()})")
        report.notes.append(message)
        warnings.warn(DenudeWarning(message), stacklevel=5)
    return choice


def _check_units_together(report: JobReport) -> None:
    """Rules across inputs: elevation/pressure only convert ppmv, and ppmv without them is
    converted at sea level (a warning stating the size of that assumption)."""
    settings = report.settings
    target = pco2_target(settings)
    if settings.pco2_from_aet or settings.pco2 is None:
        return
    if target == "ppmv" and settings.elevation is None and settings.air_pressure_atm is None:
        sizes = ", ".join(f"+{100 * float(sea_level_overstatement(z)):.1f} % at {z:,.0f} m"
                          for z in PPMV_WARNING_ELEVATIONS_M)
        message = ("PCO2 in ppmv without --elevation or --air-pressure: converted at 1 atm (sea level); above sea "
                   "level this overstates PCO2 by exp(z / 8400 m) and the carbonate rates by its cube root "
                   f"({sizes}, derived); give --elevation (m) or --air-pressure (atm) to correct")
        report.notes.append(message)
        warnings.warn(DenudeWarning(message), stacklevel=4)
    if target != "ppmv" and (settings.elevation is not None or settings.air_pressure_atm is not None):
        warnings.warn(DenudeWarning(
            f"elevation / air pressure only convert ppmv PCO2; ignored with --pco2-units {settings_unit(settings, 'pco2')[0].name}"),
            stacklevel=4)


#: The name the pre-split module used; kept for callers of the old name.
def _inspect_job(settings: MapSettings, for_output: bool, scan: bool) -> JobReport:
    return validate_job(settings, for_output, scan)


def _check_constants(report: JobReport) -> None:
    """Constants (cheap, checked first) and the notes on unit conversions."""
    for role in VALUE_FIELDS:
        value = getattr(report.settings, role)
        if is_constant(value):
            choice, _ = choose_unit(role, getattr(report.settings, f"{role}_units", None))
            report.units[role] = choice
            report.resolve_units()
            converted = float(convert(value, choice.unit))
            check_range(role, f"--{role.replace('_', '-')} {value:g}", converted, converted, report.settings)
            report.inputs[role] = InputReport(role, constant=value)
    settings = report.settings
    if settings.air_pressure_atm is not None:
        report.notes.append(f"air pressure {settings.air_pressure_atm:g} atm for ppmv -> atm")
    if settings.pco2_from_aet:
        report.notes.append("soil PCO2 derived per cell from AET (Brook, Folkoff & Box 1983)")
    if is_constant(settings.runoff) and settings.runoff < 0:
        report.notes.append(f"runoff {settings.runoff:g} mm/yr is negative: taken as 0 mm/yr (--negative-runoff zero)")


def _check_raster(report: JobReport, role: str, path: str, ds, value_read: Future | None, scan: bool,
                  tolerant: bool) -> InputReport:
    """One raster input, open as ``ds``: georeferencing, warp plan, coverage, value bands
    (``value_read``: its (min, max, valid cells), from ``_start_value_reads``)."""
    settings, grid = report.settings, report.grid
    categorical = INPUT_ROLES[role].categorical
    info = describe_dataset(ds, path, role)
    item = InputReport(role, info=info, warp=plan_warp(info, grid, categorical, requested_resampling(settings, role)))
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
            "it will be nodata"), stacklevel=4)
    if categorical:
        if role == "lithology" and not scan:
            _refuse_all_nodata(role, path, ds, tolerant, value_read)   # `check` scans every code instead
        return item
    try:
        lo, hi, n = value_read.result()
    except RasterReadError:
        if not tolerant:
            raise
        return item          # a corrupt part (e.g. one mosaic tile): the windows (tiles) over it report it
    except DenudeError:
        raise
    except Exception:
        if not tolerant:
            raise
        return item          # unreadable parts: the windows (tiles) touching them report it
    if n == 0 and (scan or not _has_valid_cell(ds, path, role, tolerant)):
        raise no_valid_cells_error(role, path)
    if n:
        unit = settings_unit(settings, role)[0]
        lo, hi = float(convert(lo, unit)), float(convert(hi, unit))
        item.value_min, item.value_max = lo, hi
        check_range(role, f"{role} raster {path}", lo, hi, settings)
        if role == "runoff" and lo < 0:
            fate = ("taken as 0 mm/yr (--negative-runoff zero)" if settings.negative_runoff == "zero"
                    else "nodata (--out-of-range nodata)")
            report.notes.append(f"runoff raster {path} has negative values (down to {lo:g} mm/yr); "
                                f"they will be {fate}")
    return item


def no_valid_cells_error(role: str, path) -> InputError:
    """The one message for a raster input without a single valid cell."""
    return InputError(
        f"{role} raster {path} has no valid cells (every cell is nodata); check its nodata value "
        "or give the right file")


def _has_valid_cell(ds, path, role: str, tolerant: bool) -> bool:
    """Whether band 1 of ``ds`` holds at least one valid (not nodata, finite) cell. Read block by
    block and stopped at the first valid one: called only once a quick look found none, so a
    raster with a small valid patch between the sampled windows is not refused. ``tolerant``:
    an unreadable block counts as possibly valid (the windows or tiles over it report it)."""
    for _, window in ds.block_windows(1):
        try:
            data = read_band(ds, path, role, window=window, masked=True)
        except RasterReadError:
            if tolerant:
                return True
            raise
        if data.dtype.kind == "f":
            data = np.ma.masked_invalid(data)
        if data.count():
            return True
    return False


def _refuse_all_nodata(role: str, path, ds, tolerant: bool, lattice_read: Future) -> None:
    """Refuse a categorical input without valid cells: a quick lattice look (``lattice_read``),
    then (only if it found nothing) the block scan."""
    try:
        n = lattice_read.result()[2]
    except RasterReadError:
        if tolerant:
            return
        raise
    if n == 0 and not _has_valid_cell(ds, path, role, tolerant):
        raise no_valid_cells_error(role, path)


def _read_tolerantly(read, tolerant: bool):
    """``read()``; an unreadable part (not a user error already worded) gives None when
    ``tolerant`` (the windows or tiles over it report it), else the error passes on."""
    try:
        return read()
    except DenudeError:
        raise
    except Exception:
        if not tolerant:
            raise
        return None


def _check_codes(report: JobReport, lithology, scan: bool, tolerant: bool, values: str = "sample") -> None:
    """Every lithology code in the rock table (`check`), and integer codes in a float raster
    (always: a non-integer code must be an error, never truncated into another rock type).
    A run with a decimated value read (`batch`) also reads the codes decimated, so codes missing
    from the rock table fail here with the message `check` and `map` give, not once per tile."""
    settings, rocks = report.settings, report.rocks
    lithology_is_float = not np.issubdtype(np.dtype(report.inputs["lithology"].info.dtype), np.integer)
    if not scan and not lithology_is_float:
        if values == "decimated":
            codes = _read_tolerantly(lambda: decimated_codes(settings.lithology, dataset=lithology), tolerant)
            if codes is None:
                return
            missing = rocks.missing_codes(codes)
            if missing:
                raise missing_codes_error(settings.lithology, missing, rocks)
        return
    codes = _read_tolerantly(lambda: unique_codes(settings.lithology, dataset=lithology), tolerant)
    if codes is None:
        return
    report.codes_found = codes
    report.codes_missing = rocks.missing_codes(codes)
    if not codes:
        raise no_valid_cells_error("lithology", settings.lithology)
    if report.codes_missing and (scan or not tolerant):
        raise missing_codes_error(settings.lithology, report.codes_missing, rocks)


def warn_about_counts(counts: dict) -> None:
    """One-line warnings a finished run owes its user: cells out of the constants' range, and a
    map that is mostly zero because runoff is <= 0 (P < AET, or swapped inputs)."""
    warn_out_of_range(counts.get("out_of_range", 0))
    made_nodata = {role: n for role, n in (counts.get("set_to_nodata") or {}).items() if n}
    if made_nodata:
        per_input = ", ".join(f"{role} {n}" for role, n in made_nodata.items())
        warnings.warn(DenudeWarning(
            f"map cells set to nodata for an input value outside its plausible range or not finite "
            f"(--out-of-range nodata): {per_input}; check those inputs if that many is unexpected"), stacklevel=2)
    cold = counts.get("below_freezing", 0)
    if cold:
        warnings.warn(DenudeWarning(
            f"{cold} map cells had temperature below {TEMPERATURE_MIN_C:g} degrees C and were taken as "
            f"{TEMPERATURE_MIN_C:g} degrees C water (--below-freezing zero)"), stacklevel=2)
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


def missing_codes_error(path, codes, rocks: RockTable, where: str = "") -> InputError:
    """The one message for lithology codes missing from the rock table."""
    shown = ", ".join(str(c) for c in list(codes)[:10])
    return InputError(
        f"{where}lithology raster {path} has code(s) {shown} not in the rock table "
        f"({rocks.source}); add rows for them to the --rocks CSV or set them to nodata"
    )


def check_window(settings: MapSettings, plan: JobPlan, result, where: str = "") -> None:
    """The checks a run makes on every window (a ``WindowResult``) as it goes: plausible input
    values (the same bands as `denude check`) and lithology codes covered by the rock table.
    ``where``: a prefix naming the part of the job (e.g. 'tile r000_c001: ')."""
    if result.unknown_codes:
        raise missing_codes_error(plan.warps["lithology"].info.path, result.unknown_codes, plan.rocks, where)
    for role, (lo, hi) in result.value_ranges.items():
        check_range(role, f"{where}{role} raster {plan.warps[role].info.path}", lo, hi, settings, whole=False)


