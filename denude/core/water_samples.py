"""Observed solute denudation from measured water chemistry (the solute-load method). Pure numpy.

The observed rate is the identity of the maximum rate (science notes sections 1 and 9) with
the measured dissolved mineral load instead of the equilibrium one:

    D_obs [mm/kyr] = sum over minerals m of  M_m [g/mol] * c_m [mmol/L] * q [mm/yr] / (rho_m * f_m) / 1000

(g/mol * mmol/L * L m-2 yr-1 = mg m-2 yr-1; / (rho [g/cm3] * 1e6 g/m3) / 1000 = m/yr; * 1e6 =
mm/kyr; so the factor is 1e-3 overall), with rho_m * f_m the bulk density times the soluble
mass fraction of the rock that holds mineral m (impure rock lowers faster, as in the map).

Apportioning the measured ions to minerals (the non-carbonate correction; common practice,
no source, stated in every calibration sidecar):

1. gypsum = min(Ca, SO4) (mmol/L): the sulfate is taken to come from gypsum, with the
   calcium that balances it. Sulfate above the calcium (e.g. from pyrite oxidation or
   rain) is left out and counted.
2. dolomite = min(Mg, Ca - gypsum): magnesium is taken to come from dolomite, with an
   equal amount of calcium. Magnesium above that calcium (e.g. from silicates) is left out.
3. calcite = Ca - gypsum - dolomite: the rest of the calcium.

Ca, Mg and SO4 here are what the water carries from the rock: correct for rain or
sea-spray input before, if it matters.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from denude.core.constants import (
    MOLAR_MASS_CALCITE_G_PER_MOL,
    MOLAR_MASS_DOLOMITE_G_PER_MOL,
    MOLAR_MASS_GYPSUM_G_PER_MOL,
)

#: Molar masses of the ions, g/mol (IUPAC standard atomic weights, rounded; common practice).
MOLAR_MASS_CA_G_PER_MOL = 40.078
MOLAR_MASS_MG_G_PER_MOL = 24.305
MOLAR_MASS_SO4_G_PER_MOL = 96.06
MOLAR_MASS_HCO3_G_PER_MOL = 61.017
#: Equivalent weight of CaCO3 for alkalinity and hardness "as CaCO3", g/eq (100.09 / 2).
EQUIVALENT_WEIGHT_CACO3_G_PER_EQ = MOLAR_MASS_CALCITE_G_PER_MOL / 2.0

#: Seconds in a year (365.25 days), s/yr.
SECONDS_PER_YEAR = 365.25 * 86400.0

#: How the measured ions are apportioned (text for sidecars).
APPORTIONING_RULE = (
    "gypsum = min(Ca, SO4); dolomite = min(Mg, Ca - gypsum); calcite = Ca - gypsum - dolomite "
    "(mmol/L). Sulfate is taken to come from gypsum with the calcium that balances it (the "
    "non-carbonate correction); magnesium from dolomite with an equal amount of calcium; "
    "sulfate or magnesium beyond that is left out and counted as excess_so4_mmol_l / excess_mg_mmol_l."
)


def mg_per_l_to_mmol_per_l(value_mg_per_l, molar_mass_g_per_mol):
    """mg/L -> mmol/L."""
    return np.asarray(value_mg_per_l, dtype=np.float64) / molar_mass_g_per_mol


def alkalinity_meq_per_l(value_mg_per_l, as_what: str):
    """Alkalinity in meq/L from mg/L "as HCO3" (61.017 mg per meq) or "as CaCO3" (50.045 mg per meq)."""
    weights = {"hco3": MOLAR_MASS_HCO3_G_PER_MOL, "caco3": EQUIVALENT_WEIGHT_CACO3_G_PER_EQ}
    return np.asarray(value_mg_per_l, dtype=np.float64) / weights[as_what.lower()]


def runoff_from_discharge_mm_per_yr(discharge_l_per_s, area_km2):
    """Runoff [mm/yr] of a catchment from its mean discharge [L/s] and area [km2]: L/m2 = mm."""
    q = np.asarray(discharge_l_per_s, dtype=np.float64) * SECONDS_PER_YEAR
    return q / (np.asarray(area_km2, dtype=np.float64) * 1e6)


@dataclass(frozen=True)
class MineralLoads:
    """Dissolved mineral formula units apportioned from the ions, mmol/L (arrays)."""

    calcite_mmol_l: np.ndarray
    dolomite_mmol_l: np.ndarray
    gypsum_mmol_l: np.ndarray
    excess_mg_mmol_l: np.ndarray
    excess_so4_mmol_l: np.ndarray


def apportion_minerals(ca_mmol_l, mg_mmol_l, so4_mmol_l) -> MineralLoads:
    """Split measured Ca, Mg and SO4 (mmol/L) into gypsum, dolomite and calcite (module docstring)."""
    ca = np.asarray(ca_mmol_l, dtype=np.float64)
    mg = np.asarray(mg_mmol_l, dtype=np.float64)
    so4 = np.asarray(so4_mmol_l, dtype=np.float64)
    gypsum = np.minimum(ca, so4)
    rest = ca - gypsum
    dolomite = np.minimum(mg, rest)
    calcite = rest - dolomite
    return MineralLoads(calcite, dolomite, gypsum, mg - dolomite, so4 - gypsum)


def observed_denudation_mm_per_kyr(loads: MineralLoads, runoff_mm_per_yr, rock_density_purity_g_cm3):
    """Observed solute denudation rate [mm/kyr] (module docstring formula).

    ``rock_density_purity_g_cm3``: mapping mineral -> bulk density x purity [g/cm3] of the
    rock that holds it (scalars or arrays). A mineral with zero load needs no entry.
    """
    q = np.asarray(runoff_mm_per_yr, dtype=np.float64)
    parts = (
        ("calcite", MOLAR_MASS_CALCITE_G_PER_MOL, loads.calcite_mmol_l),
        ("dolomite", MOLAR_MASS_DOLOMITE_G_PER_MOL, loads.dolomite_mmol_l),
        ("gypsum", MOLAR_MASS_GYPSUM_G_PER_MOL, loads.gypsum_mmol_l),
    )
    total = np.zeros(np.broadcast(q, loads.calcite_mmol_l).shape)
    for mineral, molar_mass, load in parts:
        load = np.asarray(load, dtype=np.float64)
        if mineral not in rock_density_purity_g_cm3:
            if np.any(load > 0):
                raise KeyError(f"no rock density for {mineral}")
            continue
        rho_f = np.asarray(rock_density_purity_g_cm3[mineral], dtype=np.float64)
        with np.errstate(invalid="ignore", divide="ignore"):
            total = total + np.where(load > 0, molar_mass * load * q / rho_f * 1e-3, 0.0)
    return total


def flux_weighted_mean(values, weights):
    """Discharge-weighted mean of ``values`` (1-D); equal weights where all weights are missing."""
    v = np.asarray(values, dtype=np.float64)
    w = np.asarray(weights, dtype=np.float64)
    ok = np.isfinite(v)
    if not ok.any():
        return float("nan")
    wv = w[ok]
    if not np.all(np.isfinite(wv)) or wv.sum() <= 0:
        return float(np.mean(v[ok]))
    return float(np.sum(v[ok] * wv) / wv.sum())
