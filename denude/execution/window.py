"""The per-window step around ``compute_block``: read every input of one window of the target
grid through the plan's readers, convert units, run the kernel, derive the output layers.

``compute_window(settings, grid, window)`` takes only picklable arguments, so batch runners can
call it from other processes or Dask workers; ``run_window(plan, window, readers)`` is the same
step for a caller that already holds the plan.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
from rasterio.windows import Window

from denude.core.constants import MINERAL_INDEX, TEMPERATURE_MIN_C
from denude.core.hazard import classify
from denude.core.kernel import BlockCounts, compute_block
from denude.core.rates import runoff_from_water_balance_mm_per_yr, zero_negative_runoff_mm_per_yr
from denude.core.soil_co2 import air_pressure_atm, log10_atm_to_atm, pco2_from_aet_atm, ppmv_to_atm
from denude.core.units import convert
from denude.execution.plan import InputReaders, JobPlan, prepare_job
from denude.execution.validation import value_band
from denude.io.grid import Grid
from denude.io.jobfile import MapSettings, is_constant
from denude.io.rasters import INT32_NODATA
from denude.io.units import settings_unit

@dataclass
class WindowResult:
    """Output arrays of one window (layer name -> array) and its cell counts."""

    window: Window
    arrays: dict
    counts: BlockCounts
    value_ranges: dict = field(default_factory=dict)   # role -> (min, max) of raster inputs read
    codes_present: tuple = ()                          # table codes found in the window
    unknown_codes: tuple = ()                          # codes not in the rock table


class _Reads:
    """What one window's reads collect besides the arrays: value ranges (after unit
    conversion and the out-of-range policy), cells made nodata per input, the lithology mask."""

    def __init__(self, valid, ranges: dict | None):
        self.valid = valid
        self.ranges = ranges
        self.set_to_nodata: dict = {}


def _value(readers: InputReaders, settings: MapSettings, role: str, window: Window, reads: _Reads | None = None):
    """One input on the window in the run's unit (a float for a constant). Under
    --out-of-range nodata, cells outside the role's band (or not finite) become NaN and are
    counted on cells with valid lithology."""
    value = settings.pco2 if role == "pco2" else getattr(settings, role)
    if value is None:
        return None
    unit = settings_unit(settings, role)[0]
    if is_constant(value):
        return float(convert(value, unit))
    data = convert(readers.read(role, window).astype(np.float64), unit)
    if reads is None:
        return data
    if settings.out_of_range == "nodata":
        band = value_band(role, settings) or (-np.inf, np.inf)
        with np.errstate(invalid="ignore"):
            bad = ~np.isnan(data) & ~((data >= band[0]) & (data <= band[1]) & np.isfinite(data))
        if bad.any():
            data = np.where(bad, np.nan, data)
            n = int(np.count_nonzero(bad & reads.valid))
            if n:
                reads.set_to_nodata[role] = reads.set_to_nodata.get(role, 0) + n
    if reads.ranges is not None and (~np.isnan(data)).any():
        reads.ranges[role] = (float(np.nanmin(data)), float(np.nanmax(data)))
    return data


def _pco2_atm(readers, settings: MapSettings, window: Window, aet, reads=None):
    if settings.pco2_from_aet:
        return pco2_from_aet_atm(aet)
    raw = _value(readers, settings, "pco2", window, reads)
    target = settings_unit(settings, "pco2")[0].target
    if target == "atm":
        return raw
    if target == "log10atm":
        return log10_atm_to_atm(raw)
    if settings.elevation is not None:
        pressure = air_pressure_atm(_value(readers, settings, "elevation", window, reads))
    else:
        pressure = 1.0 if settings.air_pressure_atm is None else settings.air_pressure_atm
    return ppmv_to_atm(raw, pressure)


def take_below_freezing_as_zero(temperature_c, counted):
    """(temperature with cells below 0 degrees C set to 0 degrees C, cells replaced among
    ``counted``) [degrees C]: water below freezing taken as water at 0 degrees C. NaN stays NaN."""
    t = np.asarray(temperature_c, dtype=np.float64)
    with np.errstate(invalid="ignore"):
        cold = t < TEMPERATURE_MIN_C
    n = int(np.count_nonzero(np.broadcast_to(cold, np.shape(counted)) & np.asarray(counted, bool)))
    return np.where(cold, TEMPERATURE_MIN_C, t), n


def compute_window(settings: MapSettings, grid: Grid, window: Window, readers: InputReaders | None = None,
                   layers=None) -> WindowResult:
    """Read every input for one window of the target grid, run ``compute_block`` and return the
    output arrays (all six layers unless ``layers`` names a subset) and counts.

    Takes only picklable arguments; ``readers`` (open datasets) is an optional per-thread cache.
    """
    return run_window(prepare_job(settings, grid), window, readers, layers)


def _read_inputs(plan: JobPlan, window: Window, readers: InputReaders, ranges: dict):
    """(codes, valid lithology, runoff [mm/yr], PCO2 [atm], temperature [degrees C], soluble
    fraction, extra counts) of one window, in the run's units; constants stay floats."""
    settings = plan.settings
    codes = readers.read("lithology", window)
    valid = codes != INT32_NODATA
    reads = _Reads(valid, ranges)
    aet = _value(readers, settings, "aet", window, reads)
    extra = BlockCounts()
    if settings.runoff is not None:
        runoff = _value(readers, settings, "runoff", window, reads)
        if settings.negative_runoff == "zero":
            runoff, extra.negative_runoff = zero_negative_runoff_mm_per_yr(runoff, counted=valid)
    else:
        runoff = runoff_from_water_balance_mm_per_yr(
            _value(readers, settings, "precipitation", window, reads), aet)
    pco2 = _pco2_atm(readers, settings, window, aet, reads)
    temperature = _value(readers, settings, "temperature", window, reads)
    if settings.below_freezing == "zero":
        temperature, extra.below_freezing = take_below_freezing_as_zero(temperature, valid)
        if is_constant(settings.temperature):
            temperature = float(temperature)
    fraction = _value(readers, settings, "soluble_fraction", window, reads)
    extra.set_to_nodata = reads.set_to_nodata
    return codes, valid, runoff, pco2, temperature, fraction, extra


def run_window(plan: JobPlan, window: Window, readers: InputReaders | None = None, layers=None) -> WindowResult:
    """``compute_window`` for a caller holding the plan (no lookup of the plan per window)."""
    settings = plan.settings
    own = readers is None
    readers = readers or InputReaders(plan)
    ranges: dict = {}
    try:
        codes, valid, runoff, pco2, temperature, fraction, extra = _read_inputs(plan, window, readers, ranges)
    finally:
        if own:
            readers.close()
    lookup = plan.rocks.lookup()
    result = compute_block(codes, runoff, pco2, temperature, lookup, settings.chemistry,
                           soluble_fraction=fraction, lithology_valid=valid, warn=False)
    result.counts.negative_runoff = extra.negative_runoff
    result.counts.below_freezing = extra.below_freezing
    result.counts.set_to_nodata = extra.set_to_nodata
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


