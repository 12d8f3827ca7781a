"""Closed-form equilibrium loads ("white" chemistry): White (1984) and its analogues.

Each function returns the dissolved mineral at equilibrium in mol per kg of water
(formula units of the mineral: mol CaCO3, mol CaMg(CO3)2, mol CaSO4.2H2O) for an open
system at the given soil PCO2. Activity coefficients come from the extended Debye-Hueckel
law, iterated from gamma = 1 with the ionic strength of the dissolved load until every
cell has converged. Inputs broadcast; NaN passes through.

White, W.B. (1984) Rate processes: chemical kinetics and karst landform development.
In LaFleur (ed.) Groundwater as a Geomorphic Agent, 227-248.
"""

from __future__ import annotations

import numpy as np

from denude.core import constants as C
from denude.core.activity import log_gamma
from denude.core.equilibria import (
    log_k1,
    log_k2,
    log_k_calcite,
    log_k_caso4_pair,
    log_k_dolomite,
    log_k_gypsum,
    log_k_henry,
)

#: Relative change in the load at which the activity iteration stops.
RELATIVE_TOLERANCE = 1e-12
#: Hard cap on iterations; realistic cells need 8-12 (science notes section 3).
MAX_ITERATIONS = 60


def _iterate(load_from_ionic_strength, ideal_load):
    """Fixed-point iteration ``m <- f(I(m))`` from the ideal (gamma = 1) load, per cell."""
    load = ideal_load
    for _ in range(MAX_ITERATIONS):
        new = load_from_ionic_strength(load)
        with np.errstate(invalid="ignore", divide="ignore"):
            change = np.abs(new - load) / np.abs(new)
        load = new
        if not np.any(change > RELATIVE_TOLERANCE):  # NaN cells compare False and stop too
            break
    return load


def log_k_star_calcite(temperature_c):
    """log10 of K1 Kc KH / K2, the overall constant of CaCO3 + CO2 + H2O = Ca+2 + 2HCO3-."""
    return log_k1(temperature_c) + log_k_calcite(temperature_c) + log_k_henry(temperature_c) - log_k2(temperature_c)


def calcite_load_mol_per_kg(temperature_c, pco2_atm):
    """Equilibrium dissolved calcite, mol/kg water, White (1984):

    ``[Ca] = (K1 Kc KH PCO2 / (4 K2 gCa gHCO3^2))^(1/3)`` with I = 3 [Ca].
    """
    t = np.asarray(temperature_c, dtype=np.float64)
    p = np.asarray(pco2_atm, dtype=np.float64)
    k_star_p = 10.0 ** log_k_star_calcite(t) * p / 4.0

    def step(m):
        ionic = 3.0 * m
        lg = log_gamma(2, C.ION_SIZE_CA_A, ionic, t) + 2.0 * log_gamma(1, C.ION_SIZE_HCO3_A, ionic, t)
        return np.cbrt(k_star_p / 10.0**lg)

    return _iterate(step, np.cbrt(k_star_p))


def dolomite_load_mol_per_kg(temperature_c, pco2_atm):
    """Equilibrium dissolved dolomite, mol CaMg(CO3)2 per kg water (science notes section 2):

    ``m^6 = K*dol PCO2^2 / (256 gCa gMg gHCO3^4)``, ``K*dol = Kdol K1^2 KH^2 / K2^2``, I = 6 m.
    """
    t = np.asarray(temperature_c, dtype=np.float64)
    p = np.asarray(pco2_atm, dtype=np.float64)
    log_k_star = log_k_dolomite(t) + 2.0 * (log_k1(t) + log_k_henry(t) - log_k2(t))
    base = 10.0**log_k_star * p * p / 256.0

    def step(m):
        ionic = 6.0 * m
        lg = (
            log_gamma(2, C.ION_SIZE_CA_A, ionic, t)
            + log_gamma(2, C.ION_SIZE_MG_A, ionic, t)
            + 4.0 * log_gamma(1, C.ION_SIZE_HCO3_A, ionic, t)
        )
        return (base / 10.0**lg) ** (1.0 / 6.0)

    return _iterate(step, base ** (1.0 / 6.0))


def gypsum_load_mol_per_kg(temperature_c, pco2_atm=None):
    """Equilibrium dissolved gypsum, mol CaSO4.2H2O per kg water; independent of PCO2.

    Free ions from ``gCa gSO4 m^2 = Kgyp`` (I = 4 m_free), plus the CaSO4(aq) ion pair
    ``m_pair = Kpair Kgyp`` (activity of a neutral pair taken as its molality), because the
    pair carries about a third of dissolved gypsum and no useful gypsum model omits it.
    ``pco2_atm`` is accepted (and only broadcast) so all minerals share one signature.
    """
    t = np.asarray(temperature_c, dtype=np.float64)
    if pco2_atm is not None:
        t = t + 0.0 * np.asarray(pco2_atm, dtype=np.float64)
    k_gyp = 10.0 ** log_k_gypsum(t)
    pair = 10.0 ** log_k_caso4_pair(t) * k_gyp

    def step(m_free):
        ionic = 4.0 * m_free
        lg = log_gamma(2, C.ION_SIZE_CA_A, ionic, t) + log_gamma(2, C.ION_SIZE_SO4_A, ionic, t)
        return np.sqrt(k_gyp / 10.0**lg)

    m_free = _iterate(step, np.sqrt(k_gyp))
    return m_free + pair


CLOSED_FORM_LOADS = {
    "calcite": calcite_load_mol_per_kg,
    "dolomite": dolomite_load_mol_per_kg,
    "gypsum": gypsum_load_mol_per_kg,
}
