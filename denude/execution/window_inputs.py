"""The inputs of one window on the target grid, read and prepared the same way for every run.

``read_window_inputs`` reads the lithology and every value input of a window (rasters through
the run's readers, constants as numbers), converts each to the run's unit (the unit resolved by
validation from an option or the raster's metadata), applies the out-of-range policy
(``--out-of-range nodata``: cells outside an input's band become nodata, counted per input),
applies the job's scenario (``core/scenario.py``: temperature + dT, precipitation x f and AET x f
before runoff = P - AET and before soil PCO2 from AET, then runoff x f and PCO2 x f), takes
water below freezing as 0 degrees C when asked (``--below-freezing zero``), and forms runoff and
PCO2 [atm]. ``denude map``, ``denude batch`` and ``denude uncertainty`` all call it, so each of
these rules is applied in one place.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

from denude.core.rates import (runoff_from_water_balance_mm_per_yr, take_below_freezing_as_zero,
                               zero_negative_runoff_mm_per_yr)
from denude.core.scenario import apply_scenario, scale_pco2, scale_runoff
from denude.core.soil_co2 import pco2_atm_from_units, pco2_from_aet_atm
from denude.core.units import convert
from denude.execution.plausibility import value_band
from denude.io.jobfile import MapSettings, is_constant
from denude.io.units import settings_unit
from denude.registry import INT32_NODATA


@dataclass
class WindowInputs:
    """Aligned inputs of one window: codes [code] (int, INT32_NODATA = nodata), valid (bool),
    runoff [mm/yr], PCO2 [atm], temperature [degrees C], soluble fraction [0-1] or None,
    AET [mm/yr] or None (after the scenario), cover [m] or None (read only when asked), and the
    cells changed by a policy: negative runoff taken as 0, water below 0 C taken as 0 C, and
    cells set to nodata per input (role -> count, on valid lithology)."""

    codes: np.ndarray
    valid: np.ndarray
    runoff: object
    pco2: object
    temperature: object
    fraction: object
    aet: object
    negative_runoff: int = 0
    below_freezing: int = 0
    set_to_nodata: dict = field(default_factory=dict)
    cover: object = None


class _Reads:
    """What one window's reads collect besides the arrays: value ranges (after unit conversion
    and the out-of-range policy), cells made nodata per input, the lithology mask."""

    def __init__(self, valid, ranges: dict | None):
        self.valid = valid
        self.ranges = ranges
        self.set_to_nodata: dict = {}


def input_value(readers, settings: MapSettings, role: str, window, reads: _Reads | None = None):
    """One value input of a window in the run's unit: a float constant, a float64 array, or None
    when not given. Under --out-of-range nodata, cells outside the role's band (or not finite)
    become NaN and are counted on cells with valid lithology; ``reads`` collects (min, max) of
    each raster read (the run's plausibility checks)."""
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


def pco2_atm(readers, settings: MapSettings, window, aet, reads: _Reads | None = None):
    """Soil PCO2 [atm] of a window (before the scenario's PCO2 factor): from AET (Brook et al.
    1983) or the PCO2 input converted from its unit (ppmv at the air pressure of the elevation
    input or --air-pressure, else 1 atm)."""
    if settings.pco2_from_aet:
        return pco2_from_aet_atm(aet)
    raw = input_value(readers, settings, "pco2", window, reads)
    target = settings_unit(settings, "pco2")[0].target
    elevation = (input_value(readers, settings, "elevation", window, reads)
                 if target == "ppmv" and settings.elevation is not None else None)
    return pco2_atm_from_units(raw, target, elevation, settings.air_pressure_atm)


def read_window_inputs(readers, settings: MapSettings, window, ranges: dict | None = None,
                       with_cover: bool = False) -> WindowInputs:
    """Read, check against the policies, apply the scenario to and prepare every input of one
    window (see the module doc). ``ranges`` collects (min, max) per raster input read;
    ``with_cover``: also read the cover input."""
    scenario = settings.scenario
    codes = readers.read("lithology", window)
    valid = codes != INT32_NODATA
    reads = _Reads(valid, ranges)
    temperature = input_value(readers, settings, "temperature", window, reads)
    aet = input_value(readers, settings, "aet", window, reads)
    precipitation = (input_value(readers, settings, "precipitation", window, reads)
                     if settings.runoff is None else None)
    temperature, precipitation, aet = apply_scenario(scenario, temperature_c=temperature,
                                                     precipitation_mm_per_yr=precipitation, aet_mm_per_yr=aet)
    inputs = WindowInputs(codes, valid, None, None, None, None, aet, set_to_nodata=reads.set_to_nodata)
    if settings.runoff is not None:
        runoff = input_value(readers, settings, "runoff", window, reads)
        if settings.negative_runoff == "zero":
            runoff, inputs.negative_runoff = zero_negative_runoff_mm_per_yr(runoff, counted=valid)
    else:
        runoff = runoff_from_water_balance_mm_per_yr(precipitation, aet)
    inputs.runoff = scale_runoff(scenario, runoff)
    inputs.pco2 = scale_pco2(scenario, pco2_atm(readers, settings, window, aet, reads))
    if settings.below_freezing == "zero":
        temperature, inputs.below_freezing = take_below_freezing_as_zero(temperature, valid)
        if is_constant(settings.temperature) and np.ndim(temperature) == 0:
            temperature = float(temperature)
    inputs.temperature = temperature
    inputs.fraction = input_value(readers, settings, "soluble_fraction", window, reads)
    if with_cover:
        inputs.cover = input_value(readers, settings, "cover", window, reads)
    return inputs
