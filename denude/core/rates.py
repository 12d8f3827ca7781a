"""Denudation rate, mineral flux and CO2 drawdown from an equilibrium load and runoff.

Units (science notes section 1, derived): load c in mol/L, runoff q in mm/yr (= L m-2 yr-1),
molar mass M in g/mol, density rho in g/cm3. Then ``M c q`` is g m-2 yr-1 (= t km-2 yr-1)
and ``D = M c q / (rho f)`` is mm/kyr (1 mm/kyr = 1 m3 of rock per km2 per year), where f
is the soluble mass fraction (purity) of the rock. Runoff <= 0 gives 0; NaN passes through.
"""

from __future__ import annotations

import numpy as np

from denude.core.constants import MOLAR_MASS_CO2_G_PER_MOL, TEMPERATURE_MIN_C


def effective_runoff_mm_per_yr(runoff_mm_per_yr):
    """Runoff floored at zero (negative or zero runoff carries no dissolved load), mm/yr."""
    q = np.asarray(runoff_mm_per_yr, dtype=np.float64)
    return np.where(q > 0.0, q, np.where(np.isnan(q), np.nan, 0.0))


def zero_negative_runoff_mm_per_yr(runoff_mm_per_yr, counted=None):
    """(runoff with negative values replaced by 0 mm/yr, number of replaced cells) [mm/yr].
    NaN stays NaN. ``counted``: bool mask of the cells to count (default all); every negative
    cell is replaced either way. A scalar is treated as a field of the mask's shape."""
    q = np.asarray(runoff_mm_per_yr, dtype=np.float64)
    negative = q < 0.0
    if counted is not None:
        n = int(np.count_nonzero(np.broadcast_to(negative, np.shape(counted)) & np.asarray(counted, bool)))
    else:
        n = int(np.count_nonzero(negative))
    return np.where(negative, 0.0, q), n


def runoff_from_water_balance_mm_per_yr(precipitation_mm_per_yr, evapotranspiration_mm_per_yr):
    """Runoff = precipitation - actual evapotranspiration, floored at 0, mm/yr."""
    p = np.asarray(precipitation_mm_per_yr, dtype=np.float64)
    e = np.asarray(evapotranspiration_mm_per_yr, dtype=np.float64)
    return effective_runoff_mm_per_yr(p - e)


def mineral_flux_t_per_km2_yr(load_mol_per_l, runoff_mm_per_yr, molar_mass_g_per_mol):
    """Mass of mineral removed in solution, t km-2 yr-1 (= g m-2 yr-1): M c q."""
    q = effective_runoff_mm_per_yr(runoff_mm_per_yr)
    return np.asarray(molar_mass_g_per_mol, dtype=np.float64) * np.asarray(load_mol_per_l) * q


def denudation_mm_per_kyr(load_mol_per_l, runoff_mm_per_yr, molar_mass_g_per_mol, density_g_cm3, purity=1.0):
    """Maximum denudation rate D = M c q / (rho f), mm/kyr (White 1984; science notes 1, 7)."""
    flux = mineral_flux_t_per_km2_yr(load_mol_per_l, runoff_mm_per_yr, molar_mass_g_per_mol)
    return flux / (np.asarray(density_g_cm3, dtype=np.float64) * np.asarray(purity, dtype=np.float64))


def co2_drawdown_t_per_km2_yr(load_mol_per_l, runoff_mm_per_yr, co2_per_mol_mineral):
    """CO2 taken up by dissolution, t CO2 km-2 yr-1: n c q 44.01 (science notes section 6)."""
    q = effective_runoff_mm_per_yr(runoff_mm_per_yr)
    return np.asarray(co2_per_mol_mineral, dtype=np.float64) * np.asarray(load_mol_per_l) * q * MOLAR_MASS_CO2_G_PER_MOL


def take_below_freezing_as_zero(temperature_c, counted):
    """(temperature with cells below 0 degrees C set to 0 degrees C, cells replaced among
    ``counted``) [degrees C]: water below freezing taken as water at 0 degrees C. NaN stays NaN."""
    t = np.asarray(temperature_c, dtype=np.float64)
    with np.errstate(invalid="ignore"):
        cold = t < TEMPERATURE_MIN_C
    n = int(np.count_nonzero(np.broadcast_to(cold, np.shape(counted)) & np.asarray(counted, bool)))
    return np.where(cold, TEMPERATURE_MIN_C, t), n
