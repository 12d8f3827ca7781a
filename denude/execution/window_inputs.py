"""The inputs of one window on the target grid, read and prepared the same way for every run.

``read_window_inputs`` reads the lithology and every value input of a window (rasters through
the run's readers, constants as numbers), applies the job's scenario (``core/scenario.py``:
temperature + dT, precipitation x f and AET x f before runoff = P - AET and before soil PCO2
from AET, then runoff x f and PCO2 x f), and forms runoff and PCO2 [atm]. ``denude map``,
``denude batch`` and ``denude uncertainty`` all call it, so a scenario is applied in one place.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from denude.core.rates import runoff_from_water_balance_mm_per_yr, zero_negative_runoff_mm_per_yr
from denude.core.scenario import apply_scenario, scale_pco2, scale_runoff
from denude.core.soil_co2 import pco2_atm_from_units, pco2_from_aet_atm
from denude.io.jobfile import MapSettings, is_constant
from denude.registry import INT32_NODATA


@dataclass
class WindowInputs:
    """Aligned inputs of one window: codes [code] (int, INT32_NODATA = nodata), valid (bool),
    runoff [mm/yr], PCO2 [atm], temperature [degrees C], soluble fraction [0-1] or None,
    AET [mm/yr] or None (after the scenario), and the number of negative runoff cells taken as 0."""

    codes: np.ndarray
    valid: np.ndarray
    runoff: object
    pco2: object
    temperature: object
    fraction: object
    aet: object
    negative_runoff: int


def input_value(readers, settings: MapSettings, role: str, window, ranges: dict | None = None):
    """One value input of a window: a float constant, a float64 array, or None when not given.
    ``ranges`` collects (min, max) of each raster read (the run's plausibility checks)."""
    value = settings.pco2 if role == "pco2" else getattr(settings, role)
    if value is None:
        return None
    if is_constant(value):
        return float(value)
    data = readers.read(role, window).astype(np.float64)
    if ranges is not None and np.isfinite(data).any():
        ranges[role] = (float(np.nanmin(data)), float(np.nanmax(data)))
    return data


def pco2_atm(readers, settings: MapSettings, window, aet, ranges=None):
    """Soil PCO2 [atm] of a window (before the scenario's PCO2 factor): from AET (Brook et al.
    1983) or the PCO2 input converted from its units."""
    if settings.pco2_from_aet:
        return pco2_from_aet_atm(aet)
    raw = input_value(readers, settings, "pco2", window, ranges)
    elevation = (input_value(readers, settings, "elevation", window, ranges)
                 if settings.pco2_units == "ppmv" and settings.elevation is not None else None)
    return pco2_atm_from_units(raw, settings.pco2_units, elevation, settings.air_pressure_atm)


def read_window_inputs(readers, settings: MapSettings, window, ranges: dict | None = None) -> WindowInputs:
    """Read, apply the scenario to and prepare every input of one window (see module doc)."""
    scenario = settings.scenario
    codes = readers.read("lithology", window)
    valid = codes != INT32_NODATA
    temperature = input_value(readers, settings, "temperature", window, ranges)
    aet = input_value(readers, settings, "aet", window, ranges)
    precipitation = (input_value(readers, settings, "precipitation", window, ranges)
                     if settings.runoff is None else None)
    temperature, precipitation, aet = apply_scenario(scenario, temperature_c=temperature,
                                                     precipitation_mm_per_yr=precipitation, aet_mm_per_yr=aet)
    negative = 0
    if settings.runoff is not None:
        runoff = input_value(readers, settings, "runoff", window, ranges)
        if settings.negative_runoff == "zero":
            runoff, negative = zero_negative_runoff_mm_per_yr(runoff, counted=valid)
    else:
        runoff = runoff_from_water_balance_mm_per_yr(precipitation, aet)
    runoff = scale_runoff(scenario, runoff)
    pco2 = scale_pco2(scenario, pco2_atm(readers, settings, window, aet, ranges))
    fraction = input_value(readers, settings, "soluble_fraction", window, ranges)
    return WindowInputs(codes, valid, runoff, pco2, temperature, fraction, aet, negative)
