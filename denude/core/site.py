"""Rates at a single site: the site calculator's library function (no I/O)."""

from __future__ import annotations

from dataclasses import asdict, dataclass

import numpy as np

from denude.core.constants import (CO2_PER_MOL, MOLAR_MASS_G_PER_MOL, PCO2_MAX_ATM, TEMPERATURE_MAX_C,
                                   TEMPERATURE_MIN_C)
from denude.core.dissolution import equilibrium_load_mol_per_l
from denude.core.rates import (
    co2_drawdown_t_per_km2_yr,
    denudation_mm_per_kyr,
    effective_runoff_mm_per_yr,
    mineral_flux_t_per_km2_yr,
)
from denude.core.rocks import RockType
from denude.errors import InputError


@dataclass(frozen=True)
class SiteResult:
    """Rates at one site (units in the field names)."""

    rock: str
    mineral: str
    chemistry: str
    temperature_c: float
    pco2_atm: float
    runoff_mm_per_yr: float
    density_g_cm3: float
    purity: float
    soluble_fraction: float
    dissolved_load_mmol_per_l: float
    mineral_flux_t_per_km2_yr: float
    rock_mass_t_per_km2_yr: float
    denudation_mm_per_kyr: float
    co2_drawdown_t_per_km2_yr: float

    def as_dict(self) -> dict:
        return asdict(self)


def check_site_runoff(runoff_mm_per_yr) -> float:
    """The runoff of one site [mm/yr] if it is finite and >= 0; else a one-line InputError."""
    q = float(runoff_mm_per_yr)
    if not np.isfinite(q):
        raise InputError(f"runoff {q!r} mm/yr is not a finite number; give the site's runoff in mm/yr (e.g. --runoff 400)")
    if q < 0.0:
        raise InputError(
            f"runoff {q:g} mm/yr is negative; give runoff >= 0 mm/yr (precipitation minus actual "
            "evapotranspiration; 0 means no dissolution)"
        )
    return q


def site_rates(
    rock: RockType,
    temperature_c: float,
    pco2_atm: float,
    runoff_mm_per_yr: float,
    chemistry: str = "white",
    soluble_fraction: float = 1.0,
) -> SiteResult:
    """Maximum denudation, mineral flux and CO2 drawdown at one site.

    temperature_c [degrees C], pco2_atm [atm], runoff_mm_per_yr [mm/yr], soluble_fraction [0-1]
    (share of the site's area that is soluble rock). Out-of-range temperature or PCO2 give
    NaN (with a warning from the core). Negative or non-finite runoff is an InputError: at one
    site it is almost always a sign error or wrong units, never "no dissolution".
    """
    check_site_runoff(runoff_mm_per_yr)
    q = float(effective_runoff_mm_per_yr(runoff_mm_per_yr))
    if rock.mineral == "insoluble":
        load = 0.0
    else:
        load = float(equilibrium_load_mol_per_l(rock.mineral, temperature_c, pco2_atm, chemistry))
    molar_mass = MOLAR_MASS_G_PER_MOL[rock.mineral]
    flux = float(mineral_flux_t_per_km2_yr(load, q, molar_mass)) * soluble_fraction
    rate = float(denudation_mm_per_kyr(load, q, molar_mass, rock.density_g_cm3, rock.purity)) * soluble_fraction
    co2 = float(co2_drawdown_t_per_km2_yr(load, q, CO2_PER_MOL[rock.mineral])) * soluble_fraction
    return SiteResult(
        rock=rock.name,
        mineral=rock.mineral,
        chemistry=chemistry,
        temperature_c=float(temperature_c),
        pco2_atm=float(pco2_atm),
        runoff_mm_per_yr=q,
        density_g_cm3=rock.density_g_cm3,
        purity=rock.purity,
        soluble_fraction=float(soluble_fraction),
        dissolved_load_mmol_per_l=load * 1e3,
        mineral_flux_t_per_km2_yr=flux,
        rock_mass_t_per_km2_yr=flux / rock.purity,
        denudation_mm_per_kyr=rate,
        co2_drawdown_t_per_km2_yr=co2,
    )


def finite_or_none(value: float):
    """JSON has no NaN: map non-finite numbers to None."""
    return float(value) if np.isfinite(value) else None


def check_site_inputs(temperature_c: float, pco2_atm: float, temperature_name: str = "temperature_c",
                      pco2_name: str = "pco2_atm", pco2_hint: str = "") -> None:
    """One-line errors for a site outside the validity of the constants: temperature
    0-90 degrees C, 0 < PCO2 <= 1 atm. ``*_name`` say how the caller names the value (a
    flag or an argument); ``pco2_hint`` is added to the PCO2 message."""
    if not (TEMPERATURE_MIN_C <= temperature_c <= TEMPERATURE_MAX_C):
        raise InputError(
            f"{temperature_name} {temperature_c} degrees C is outside {TEMPERATURE_MIN_C:g}-{TEMPERATURE_MAX_C:g} "
            "degrees C, the validity of the constants"
        )
    if not (0.0 < pco2_atm <= PCO2_MAX_ATM):
        raise InputError(f"{pco2_name} is {pco2_atm:g} atm, outside 0 < PCO2 <= 1 atm{pco2_hint}")
