"""Speciation of a sampled water and its saturation indices (calcite, dolomite, gypsum). Pure numpy.

Given, per sample, temperature, total Ca, Mg and SO4, carbonate alkalinity and pH, the
solver finds the free ions and the ion pairs of the speciated mode (``denude.core.speciation``:
the same constants, ion sizes, b terms and Debye-Hueckel parameters from the dielectric
constant of water) plus the sulfate pairs CaSO4(aq) and MgSO4(aq):

    species  H+, OH-, HCO3-, CO3-2, CO2(aq), Ca+2, Mg+2, SO4-2,
             CaHCO3+, MgHCO3+, CaCO3(aq), MgCO3(aq), CaSO4(aq), MgSO4(aq)

pH fixes a(H+); alkalinity (eq/kg) = m HCO3- + 2 m CO3-2 + m CaHCO3+ + m MgHCO3+
+ 2 m CaCO3 + 2 m MgCO3 + m OH- - m H+ (the carbonate alkalinity as PHREEQC counts it).
An inner fixed point solves the mass balances of Ca, Mg, SO4 and alkalinity at given
activity coefficients; an outer loop updates ionic strength until the saturation indices
settle. Ions not given (Na, K, Cl, ...) are left out of the ionic strength, and the water
is not charge balanced (as in PHREEQC when no charge-balance ion is named).

SI = log10(IAP / K): calcite a(Ca) a(CO3); dolomite a(Ca) a(Mg) a(CO3)^2; gypsum
a(Ca) a(SO4) (water activity taken as 1, < 0.001 log units below 0.05 mol/kg).

Concentrations in mol/kg water: mg/L are converted with 1 kg of water per L (solutes
< 1 g/L change that by < 0.1 %, < 0.0005 log units).

A sample without pH gets NaN saturation indices (the calibration states this rule):
the carbonate speciation cannot be fixed from alkalinity alone.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from denude.core import constants as C
from denude.core.activity import DH_PARAMETERS, log_gamma
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
    vant_hoff_log_k,
)
from denude.core.speciation import DH, _Gammas

#: Mg+2 + SO4-2 = MgSO4(aq): log K25 and reaction enthalpy (kcal/mol), phreeqc.dat.
MG_SO4_PAIR_LOG_K25 = 2.37
MG_SO4_PAIR_DH_KCAL = 4.55

MAX_OUTER_ITERATIONS = 60
MAX_INNER_ITERATIONS = 200
RELATIVE_TOLERANCE = 1e-11

#: How a sample without pH is treated (text for sidecars).
NO_PH_RULE = "samples without pH get no saturation indices (NaN): alkalinity alone does not fix the carbonate speciation"


def log_k_mgso4_pair(temperature_c):
    """log10 K of Mg+2 + SO4-2 = MgSO4(aq), van't Hoff from phreeqc.dat (2.37, 4.55 kcal/mol)."""
    return vant_hoff_log_k(MG_SO4_PAIR_LOG_K25, MG_SO4_PAIR_DH_KCAL, temperature_c)


@dataclass(frozen=True)
class SampleSpeciation:
    """Result per sample (arrays): saturation indices (log10), ionic strength (mol/kg), log10 PCO2 (atm)
    of the water (the CO2 pressure it would be in equilibrium with)."""

    si_calcite: np.ndarray
    si_dolomite: np.ndarray
    si_gypsum: np.ndarray
    ionic_strength_mol_per_kg: np.ndarray
    log_pco2_atm: np.ndarray


def speciate_samples(temperature_c, ca_mol_kg, mg_mol_kg, so4_mol_kg, alkalinity_eq_kg, ph) -> SampleSpeciation:
    """Saturation indices of sampled waters (module docstring). Arrays broadcast; NaN pH -> NaN results."""
    t, ca_t, mg_t, so4_t, alk, ph = (np.asarray(v, dtype=np.float64) for v in
                                     (temperature_c, ca_mol_kg, mg_mol_kg, so4_mol_kg, alkalinity_eq_kg, ph))
    t, ca_t, mg_t, so4_t, alk, ph = np.broadcast_arrays(t, ca_t, mg_t, so4_t, alk, ph)
    shape = t.shape
    t, ca_t, mg_t, so4_t, alk, ph = (v.reshape(-1).copy() for v in (t, ca_t, mg_t, so4_t, alk, ph))
    ok = np.isfinite(t) & np.isfinite(ca_t) & np.isfinite(mg_t) & np.isfinite(so4_t) & np.isfinite(alk) & np.isfinite(ph)
    # safe placeholders where inputs are missing; results are masked at the end
    t[~ok], ca_t[~ok], mg_t[~ok], so4_t[~ok], alk[~ok], ph[~ok] = 10.0, 1e-3, 0.0, 0.0, 2e-3, 7.5

    k1, k2, kw = 10.0 ** log_k1(t), 10.0 ** log_k2(t), 10.0 ** log_k_water(t)
    k_cahco3, k_caco3 = 10.0 ** log_k_cahco3_pair(t), 10.0 ** log_k_caco3_pair(t)
    k_mghco3, k_mgco3 = 10.0 ** log_k_mghco3_pair(t), 10.0 ** log_k_mgco3_pair(t)
    k_caso4, k_mgso4 = 10.0 ** log_k_caso4_pair(t), 10.0 ** log_k_mgso4_pair(t)
    a_h = 10.0 ** (-ph)
    ab = DH_PARAMETERS[DH](t)

    ionic = np.maximum(0.5 * (4 * ca_t + 4 * mg_t + 4 * so4_t + alk), 1e-6)
    m_ca, m_mg, m_so4, m_hco3 = ca_t.copy(), mg_t.copy(), so4_t.copy(), np.maximum(alk, 1e-12)
    previous = np.full(t.shape, np.inf)
    for _ in range(MAX_OUTER_ITERATIONS):
        g = _Gammas(ionic, t, ab)
        g_so4 = 10.0 ** log_gamma(2, C.ION_SIZE_SO4_A, ionic, t, C.B_DOT_SO4, parameters=ab)
        m_h = a_h / g.h
        m_oh = kw / a_h / g.oh
        # CO3 per HCO3 at fixed pH: a_CO3 = K2 a_HCO3 / a_H
        co3_per_hco3 = k2 * g.hco3 / (a_h * g.co3)
        # pair coefficients: m_pair = coef * m_cation * m_anion
        c_cahco3 = k_cahco3 * g.ca * g.hco3 / g.cahco3
        c_mghco3 = k_mghco3 * g.mg * g.hco3 / g.mghco3
        c_caco3 = k_caco3 * g.ca * g.co3 / g.neutral
        c_mgco3 = k_mgco3 * g.mg * g.co3 / g.neutral
        c_caso4 = k_caso4 * g.ca * g_so4 / g.neutral
        c_mgso4 = k_mgso4 * g.mg * g_so4 / g.neutral
        for _ in range(MAX_INNER_ITERATIONS):
            m_co3 = co3_per_hco3 * m_hco3
            new_ca = ca_t / (1.0 + c_cahco3 * m_hco3 + c_caco3 * m_co3 + c_caso4 * m_so4)
            new_mg = mg_t / (1.0 + c_mghco3 * m_hco3 + c_mgco3 * m_co3 + c_mgso4 * m_so4)
            new_so4 = so4_t / (1.0 + c_caso4 * new_ca + c_mgso4 * new_mg)
            # alkalinity: m_HCO3 (1 + 2r + cCaHCO3 mCa + cMgHCO3 mMg + 2 r (cCaCO3 mCa + cMgCO3 mMg)) + OH - H
            per_hco3 = (1.0 + 2.0 * co3_per_hco3 + c_cahco3 * new_ca + c_mghco3 * new_mg
                        + 2.0 * co3_per_hco3 * (c_caco3 * new_ca + c_mgco3 * new_mg))
            new_hco3 = np.maximum(alk - m_oh + m_h, 1e-15) / per_hco3
            step = np.max(np.abs(np.stack([new_ca - m_ca, new_mg - m_mg, new_so4 - m_so4, new_hco3 - m_hco3]))
                          / np.maximum(np.stack([ca_t, mg_t, so4_t, alk]), 1e-30), axis=0)
            m_ca, m_mg, m_so4, m_hco3 = new_ca, new_mg, new_so4, new_hco3
            if not np.any(step > RELATIVE_TOLERANCE):
                break
        m_co3 = co3_per_hco3 * m_hco3
        m_cahco3, m_mghco3 = c_cahco3 * m_ca * m_hco3, c_mghco3 * m_mg * m_hco3
        ionic = 0.5 * (4.0 * (m_ca + m_mg + m_so4 + m_co3) + m_hco3 + m_cahco3 + m_mghco3 + m_h + m_oh)
        iap = np.log10(g.ca * m_ca * g.co3 * m_co3)
        change = np.abs(iap - previous)
        previous = iap
        if not np.any(change > 1e-10):
            break

    g = _Gammas(ionic, t, ab)
    g_so4 = 10.0 ** log_gamma(2, C.ION_SIZE_SO4_A, ionic, t, C.B_DOT_SO4, parameters=ab)
    la_ca, la_mg = np.log10(g.ca * m_ca), np.log10(np.where(mg_t > 0, g.mg * m_mg, np.nan))
    la_co3 = np.log10(g.co3 * m_co3)
    la_so4 = np.log10(np.where(so4_t > 0, g_so4 * m_so4, np.nan))
    si_cal = la_ca + la_co3 - log_k_calcite(t)
    si_dol = la_ca + la_mg + 2.0 * la_co3 - log_k_dolomite(t)
    si_gyp = la_ca + la_so4 - log_k_gypsum(t)
    # H2CO3* activity = a_H a_HCO3 / K1; PCO2 = a_CO2 / KH
    log_pco2 = np.log10(a_h * g.hco3 * m_hco3 / k1) - log_k_henry(t)

    def out(v):
        return np.where(ok, v, np.nan).reshape(shape)

    return SampleSpeciation(out(si_cal), out(si_dol), out(si_gyp), out(ionic), out(log_pco2))
