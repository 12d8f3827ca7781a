"""Full carbonate speciation ("speciated" chemistry), vectorised over cells.

Solves, per cell, the open system water + mineral + CO2 gas at the given PCO2 with the
species H+, OH-, HCO3-, CO3-2, CO2(aq), Ca+2, Mg+2, CaHCO3+, MgHCO3+, CaCO3(aq),
MgCO3(aq) and exact charge balance; gypsum with Ca+2, SO4-2 and CaSO4(aq). Activity
coefficients: extended Debye-Hueckel with the WATEQ ion sizes and b terms carried by
PHREEQC's phreeqc.dat (Parkhurst & Appelo 2013); neutral species log g = 0.1 I.

With activity coefficients and ion-pair ratios held fixed, charge balance in h = a(H+)
is the quartic ``a4 h^4 + a3 h^3 - a1 h - a0 = 0`` with a_i >= 0, which has exactly one
positive root (Descartes); Newton's method from a point right of the root converges
monotonically because the quartic is convex for h > 0. An outer fixed-point loop updates
ionic strength, activity coefficients and ion-pair ratios until the load converges.

Results are mol of mineral formula units per kg of water.
"""

from __future__ import annotations

import numpy as np

from denude.core import constants as C
from denude.core.activity import DH_PARAMETERS, log_gamma

#: Debye-Hueckel A and B of the speciated mode: from the dielectric constant of water (valid
#: beyond 30 C, where the linear fits of the closed form drift; see denude.core.activity).
DH = "dielectric"
from denude.core.equilibria import (
    log_k1,
    log_k2,
    log_k_caco3_pair,
    log_k_cahco3_pair,
    log_k_calcite,
    log_k_caso4_pair,
    log_k_dolomite,
    log_k_gypsum,
    log_k_henry,
    log_k_mgco3_pair,
    log_k_mghco3_pair,
    log_k_water,
)

RELATIVE_TOLERANCE = 1e-12
MAX_OUTER_ITERATIONS = 80
MAX_NEWTON_ITERATIONS = 60


def _positive_quartic_root(a4, a3, a1, a0):
    """The positive root of a4 h^4 + a3 h^3 - a1 h - a0 = 0 (all coefficients >= 0)."""
    with np.errstate(divide="ignore", invalid="ignore"):
        h = np.maximum(np.cbrt(2.0 * a1 / a4), (2.0 * a0 / a4) ** 0.25)
        for _ in range(MAX_NEWTON_ITERATIONS):
            h2 = h * h
            f = ((a4 * h + a3) * h2 - a1) * h - a0
            df = (4.0 * a4 * h + 3.0 * a3) * h2 - a1
            step = f / df
            h = h - step
            if not np.any(np.abs(step) > 1e-14 * h):
                break
    return h


class _Gammas:
    """Activity coefficients of every charged species at ionic strength I (mol/kg)."""

    def __init__(self, ionic, t, ab):
        self.ca = 10.0 ** log_gamma(2, C.ION_SIZE_CA_A, ionic, t, C.B_DOT_CA, parameters=ab)
        self.mg = 10.0 ** log_gamma(2, C.ION_SIZE_MG_A, ionic, t, C.B_DOT_MG, parameters=ab)
        self.hco3 = 10.0 ** log_gamma(1, C.ION_SIZE_HCO3_A, ionic, t, parameters=ab)
        self.co3 = 10.0 ** log_gamma(2, C.ION_SIZE_CO3_A, ionic, t, parameters=ab)
        self.h = 10.0 ** log_gamma(1, C.ION_SIZE_H_A, ionic, t, parameters=ab)
        self.oh = 10.0 ** log_gamma(1, C.ION_SIZE_OH_A, ionic, t, parameters=ab)
        self.cahco3 = 10.0 ** log_gamma(1, C.ION_SIZE_CAHCO3_A, ionic, t, parameters=ab)
        self.mghco3 = 10.0 ** log_gamma(1, C.ION_SIZE_MGHCO3_A, ionic, t, parameters=ab)
        self.neutral = 10.0 ** (C.NEUTRAL_SALTING_KG_PER_MOL * ionic)


def _carbonate_constants(t, p):
    k1 = 10.0 ** log_k1(t)
    k2 = 10.0 ** log_k2(t)
    a_co2 = 10.0 ** log_k_henry(t) * p
    kw = 10.0 ** log_k_water(t)
    return k1, k2, a_co2, kw


def _speciate_carbonate(temperature_c, pco2_atm, with_magnesium):
    t = np.asarray(temperature_c, dtype=np.float64)
    p = np.asarray(pco2_atm, dtype=np.float64)
    t, p = np.broadcast_arrays(t, p)
    k1, k2, a_co2, kw = _carbonate_constants(t, p)
    k_cahco3 = 10.0 ** log_k_cahco3_pair(t)
    k_caco3 = 10.0 ** log_k_caco3_pair(t)
    if with_magnesium:
        k_mineral = 10.0 ** log_k_dolomite(t)
        k_mghco3 = 10.0 ** log_k_mghco3_pair(t)
        k_mgco3 = 10.0 ** log_k_mgco3_pair(t)
    else:
        k_mineral = 10.0 ** log_k_calcite(t)

    ab = DH_PARAMETERS[DH](t)
    ionic = np.full(t.shape, 3e-3)
    ratio_mg = np.ones(t.shape)  # free Mg / free Ca molality, set by equal totals
    total = np.zeros(t.shape)
    k12a = k1 * k2 * a_co2
    for _ in range(MAX_OUTER_ITERATIONS):
        g = _Gammas(ionic, t, ab)
        if with_magnesium:
            # a_Ca a_Mg a_CO3^2 = Kdol, m_Mg = r m_Ca  ->  m_Ca = A h^2
            coef_ca = np.sqrt(k_mineral / (g.ca * g.mg * ratio_mg)) / k12a
        else:
            # a_Ca a_CO3 = Kc  ->  m_Ca = A h^2
            coef_ca = k_mineral / (k12a * g.ca)
        coef_hco3 = k1 * a_co2 / g.hco3          # m_HCO3 = E / h
        coef_co3 = k12a / g.co3                  # m_CO3 = G / h^2
        coef_cahco3 = k_cahco3 * g.ca * coef_ca * k1 * a_co2 / g.cahco3  # m_CaHCO3 = P1 h
        a4 = 2.0 * coef_ca
        a3 = coef_cahco3 + 1.0 / g.h
        if with_magnesium:
            coef_mg = coef_ca * ratio_mg
            coef_mghco3 = k_mghco3 * g.mg * coef_mg * k1 * a_co2 / g.mghco3
            a4 = a4 + 2.0 * coef_mg
            a3 = a3 + coef_mghco3
        a1 = coef_hco3 + kw / g.oh
        a0 = 2.0 * coef_co3
        h = _positive_quartic_root(a4, a3, a1, a0)

        m_ca = coef_ca * h * h
        m_hco3 = coef_hco3 / h
        m_co3 = coef_co3 / (h * h)
        m_cahco3 = coef_cahco3 * h
        m_caco3 = k_caco3 * g.ca * m_ca * g.co3 * m_co3 / g.neutral
        new_total = m_ca + m_cahco3 + m_caco3
        new_ionic = 0.5 * (4.0 * m_ca + m_cahco3 + h / g.h + m_hco3 + 4.0 * m_co3 + kw / (g.oh * h))
        if with_magnesium:
            m_mg = coef_mg * h * h
            m_mghco3 = coef_mghco3 * h
            m_mgco3 = k_mgco3 * g.mg * m_mg * g.co3 * m_co3 / g.neutral
            total_mg = m_mg + m_mghco3 + m_mgco3
            # equal Ca and Mg totals: r = m_Mg/m_Ca = alpha_Ca / alpha_Mg
            ratio_mg = (new_total / m_ca) / (total_mg / m_mg)
            new_ionic = new_ionic + 0.5 * (4.0 * m_mg + m_mghco3)
            new_total = 0.5 * (new_total + total_mg)
        with np.errstate(invalid="ignore", divide="ignore"):
            change = np.abs(new_total - total) / new_total
        total, ionic = new_total, new_ionic
        if not np.any(change > RELATIVE_TOLERANCE):
            break
    return total


def calcite_load_mol_per_kg(temperature_c, pco2_atm):
    """Equilibrium total dissolved calcite (Ca total), mol/kg water, full speciation."""
    return _speciate_carbonate(temperature_c, pco2_atm, with_magnesium=False)


def dolomite_load_mol_per_kg(temperature_c, pco2_atm):
    """Equilibrium dissolved dolomite (Ca total = Mg total), mol/kg water, full speciation."""
    return _speciate_carbonate(temperature_c, pco2_atm, with_magnesium=True)


def gypsum_load_mol_per_kg(temperature_c, pco2_atm=None):
    """Equilibrium dissolved gypsum (Ca total), mol/kg water: Ca+2, SO4-2 and CaSO4(aq)."""
    t = np.asarray(temperature_c, dtype=np.float64)
    if pco2_atm is not None:
        t = t + 0.0 * np.asarray(pco2_atm, dtype=np.float64)
    k_gyp = 10.0 ** log_k_gypsum(t)
    k_pair = 10.0 ** log_k_caso4_pair(t)
    m_free = np.sqrt(k_gyp)
    total = np.zeros(t.shape)
    ab = DH_PARAMETERS[DH](t)
    for _ in range(MAX_OUTER_ITERATIONS):
        ionic = 4.0 * m_free
        g_ca = 10.0 ** log_gamma(2, C.ION_SIZE_CA_A, ionic, t, C.B_DOT_CA, parameters=ab)
        g_so4 = 10.0 ** log_gamma(2, C.ION_SIZE_SO4_A, ionic, t, C.B_DOT_SO4, parameters=ab)
        m_free = np.sqrt(k_gyp / (g_ca * g_so4))
        new_total = m_free + k_pair * k_gyp / 10.0 ** (C.NEUTRAL_SALTING_KG_PER_MOL * ionic)
        with np.errstate(invalid="ignore", divide="ignore"):
            change = np.abs(new_total - total) / new_total
        total = new_total
        if not np.any(change > RELATIVE_TOLERANCE):
            break
    return total


SPECIATED_LOADS = {
    "calcite": calcite_load_mol_per_kg,
    "dolomite": dolomite_load_mol_per_kg,
    "gypsum": gypsum_load_mol_per_kg,
}
