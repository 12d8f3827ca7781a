"""Soil CO2 partial pressure: unit conversions and the Brook et al. (1983) model."""

from __future__ import annotations

import numpy as np

from denude.errors import InputError

#: Scale height for air pressure, m: p = exp(-z / 8400 m) atm (science notes section 4).
AIR_PRESSURE_SCALE_HEIGHT_M = 8400.0


def air_pressure_atm(elevation_m):
    """Air pressure, atm, from elevation above sea level (m): exp(-z / 8400 m)."""
    return np.exp(-np.asarray(elevation_m, dtype=np.float64) / AIR_PRESSURE_SCALE_HEIGHT_M)


def sea_level_overstatement(elevation_m):
    """Relative overstatement of the equilibrium load (and so of the rates) when a PCO2 in ppmv
    at ``elevation_m`` (m) is converted at 1 atm instead of the local air pressure [fraction].

    Derived: PCO2 at 1 atm is 1/p(z) = exp(z / 8400 m) times the true one, and the load goes
    with the cube root of PCO2 (White 1984), so the load is exp(z / 25200 m) - 1 too high.
    """
    return np.asarray(air_pressure_atm(elevation_m), dtype=np.float64) ** (-1.0 / 3.0) - 1.0


def ppmv_to_atm(pco2_ppmv, air_pressure_atm_=1.0):
    """PCO2 in atm from a volume mixing ratio in ppmv and the air pressure in atm."""
    return np.asarray(pco2_ppmv, dtype=np.float64) * 1e-6 * np.asarray(air_pressure_atm_, dtype=np.float64)


def log10_atm_to_atm(log10_pco2_atm):
    """PCO2 in atm from log10 PCO2 (log10 atm)."""
    return 10.0 ** np.asarray(log10_pco2_atm, dtype=np.float64)


#: Brook, Folkoff & Box (1983) coefficients (from memory, science notes section 4):
#: log10 PCO2 [atm] = intercept + amplitude * (1 - exp(-rate * AET [mm/yr])).
BROOK_INTERCEPT_LOG10_ATM = -3.47
BROOK_AMPLITUDE_LOG10_ATM = 2.09
BROOK_RATE_PER_MM = 0.00172


def soil_co2_gain(aet_mm_per_yr):
    """The AET term 1 - exp(-0.00172 AET) of Brook et al. (1983) [1]; negative AET floored at 0."""
    aet = np.asarray(aet_mm_per_yr, dtype=np.float64)
    aet = np.where(aet < 0.0, 0.0, aet)
    return 1.0 - np.exp(-BROOK_RATE_PER_MM * aet)


def pco2_from_aet_atm(aet_mm_per_yr):
    """Soil PCO2, atm, from actual evapotranspiration (mm/yr), Brook, Folkoff & Box (1983):

    ``log10 PCO2 = -3.47 + 2.09 (1 - exp(-0.00172 AET))`` (coefficients from memory,
    science notes section 4). Negative AET is floored at 0.
    """
    return 10.0 ** (BROOK_INTERCEPT_LOG10_ATM + BROOK_AMPLITUDE_LOG10_ATM * soil_co2_gain(aet_mm_per_yr))


#: Units a PCO2 input may be given in (the registry's ``CHOICES["pco2_units"]`` lists the same).
PCO2_UNIT_NAMES = ("atm", "ppmv", "log10atm")


def pco2_atm_from_units(value, units: str, elevation_m=None, air_pressure_atm_=None):
    """PCO2 in atm from a value in ``units`` (atm, ppmv or log10atm); scalar or array.

    ppmv is converted at the air pressure of ``elevation_m`` (m above sea level, exp(-z/8400 m))
    when given, else at ``air_pressure_atm_`` (atm), else at 1 atm (sea level). The one rule the
    site calculator and the raster job share; the elevation/pressure are ignored for atm and
    log10atm (a caller that wants to warn about that does so itself).
    """
    if units == "atm":
        return np.asarray(value, dtype=np.float64)
    if units == "log10atm":
        return log10_atm_to_atm(value)
    if units != "ppmv":
        raise InputError(f"PCO2 units {units!r}: use one of {', '.join(PCO2_UNIT_NAMES)}")
    if elevation_m is not None:
        pressure = air_pressure_atm(elevation_m)
    else:
        pressure = 1.0 if air_pressure_atm_ is None else air_pressure_atm_
    return ppmv_to_atm(value, pressure)
