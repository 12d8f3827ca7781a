"""Temperature-dependent equilibrium constants (log10, molal standard state).

Plummer & Busenberg (1982), Geochim. Cosmochim. Acta 46, 1011-1040:
``log K = a + b*T + c/T + d*log10(T) + e/T**2`` with T in kelvin, valid 0-90 degrees C
at 1 atm. Dolomite from van't Hoff with log K25 = -17.09 and dH = -9.436 kcal/mol, gypsum
and the ion pairs from the analytic expressions in PHREEQC's phreeqc.dat (Parkhurst &
Appelo 2013), which restate Plummer & Busenberg (1982) for CaHCO3+ and CaCO3(aq).

Every function takes temperature in degrees C (scalar or array) and returns log10 K;
NaN passes through. Range checks are the caller's job (see ``denude.core.validity``).
"""

from __future__ import annotations

import numpy as np

from denude.core.constants import KELVIN_OFFSET

_LN10 = np.log(10.0)
_R_KCAL_PER_MOL_K = 1.98720425864083e-3  # gas constant, kcal mol-1 K-1 (CODATA)
_T25_K = 298.15

# (a, b, c, d, e) for log K = a + bT + c/T + d log T + e/T^2 -- Plummer & Busenberg 1982, Table 2.
PB82_K1 = (-356.3094, -0.06091964, 21834.37, 126.8339, -1684915.0)
PB82_K2 = (-107.8871, -0.03252849, 5151.79, 38.92561, -563713.9)
PB82_KCALCITE = (-171.9065, -0.077993, 2839.319, 71.595, 0.0)
PB82_KH = (108.3865, 0.01985076, -6919.53, -40.45154, 669365.0)
# Ion pair association constants, phreeqc.dat (after Plummer & Busenberg 1982):
# Ca+2 + CO3-2 + H+ = CaHCO3+  and  Ca+2 + CO3-2 = CaCO3(aq)
PB82_CAHCO3 = (1317.0071, 0.34546894, -39916.84, -517.70761, 563713.9)
PB82_CACO3 = (-1228.732, -0.299440, 35512.75, 485.818, 0.0)
# Gypsum CaSO4.2H2O = Ca+2 + SO4-2 + 2H2O, phreeqc.dat analytic (a, b, c, d, e).
GYPSUM = (68.2401, 0.0, -3221.51, -25.0627, 0.0)
# Water: H2O = OH- + H+, phreeqc.dat analytic, with a sixth term f*T^2.
WATER = (293.29227, 0.1360833, -10576.913, -123.73158, 0.0, -6.996455e-5)

DOLOMITE_LOG_K25 = -17.09       # phreeqc.dat (ordered dolomite)
DOLOMITE_DH_KCAL = -9.436        # phreeqc.dat
MG_CO3_PAIR_LOG_K25 = 2.98       # Mg+2 + CO3-2 = MgCO3, phreeqc.dat, analytic 0.9910 + 0.00667 T
MG_HCO3_PAIR = (48.6721, 0.03252849, -2614.335, -18.00263, 563713.9)  # phreeqc.dat
CA_SO4_PAIR_LOG_K25 = 2.25       # Ca+2 + SO4-2 = CaSO4(aq), phreeqc.dat
CA_SO4_PAIR_DH_KCAL = 1.325      # phreeqc.dat


def _kelvin(temperature_c):
    return np.asarray(temperature_c, dtype=np.float64) + KELVIN_OFFSET


def analytic_log_k(coefficients, temperature_c):
    """log10 K from ``a + bT + c/T + d log10 T + e/T^2 (+ f T^2)``; T from degrees C."""
    t_k = _kelvin(temperature_c)
    a, b, c, d, e = coefficients[:5]
    value = a + b * t_k + c / t_k + d * np.log10(t_k) + e / (t_k * t_k)
    if len(coefficients) > 5:
        value = value + coefficients[5] * t_k * t_k
    return value


def vant_hoff_log_k(log_k25, enthalpy_kcal_per_mol, temperature_c):
    """log10 K at t from log K at 25 degrees C and a constant reaction enthalpy (kcal/mol)."""
    t_k = _kelvin(temperature_c)
    return log_k25 - enthalpy_kcal_per_mol / (_LN10 * _R_KCAL_PER_MOL_K) * (1.0 / t_k - 1.0 / _T25_K)


def log_k1(temperature_c):
    """log10 K1 of H2CO3* = H+ + HCO3- (Plummer & Busenberg 1982); -6.352 at 25 degrees C."""
    return analytic_log_k(PB82_K1, temperature_c)


def log_k2(temperature_c):
    """log10 K2 of HCO3- = H+ + CO3-2 (Plummer & Busenberg 1982); -10.329 at 25 degrees C."""
    return analytic_log_k(PB82_K2, temperature_c)


def log_k_calcite(temperature_c):
    """log10 Kc of CaCO3 = Ca+2 + CO3-2 (Plummer & Busenberg 1982); -8.480 at 25 degrees C."""
    return analytic_log_k(PB82_KCALCITE, temperature_c)


def log_k_henry(temperature_c):
    """log10 KH of CO2(g) = CO2(aq), mol kg-1 atm-1 (Plummer & Busenberg 1982); -1.468 at 25 C."""
    return analytic_log_k(PB82_KH, temperature_c)


def log_k_dolomite(temperature_c):
    """log10 K of CaMg(CO3)2 = Ca+2 + Mg+2 + 2CO3-2, van't Hoff from -17.09 and -9.436 kcal/mol."""
    return vant_hoff_log_k(DOLOMITE_LOG_K25, DOLOMITE_DH_KCAL, temperature_c)


def log_k_gypsum(temperature_c):
    """log10 K of CaSO4.2H2O = Ca+2 + SO4-2 + 2H2O (phreeqc.dat analytic); -4.58 at 25 C."""
    return analytic_log_k(GYPSUM, temperature_c)


def log_k_water(temperature_c):
    """log10 Kw of H2O = H+ + OH- (phreeqc.dat analytic); about -14.0 at 25 degrees C."""
    return analytic_log_k(WATER, temperature_c)


def log_k_cahco3_pair(temperature_c):
    """log10 K of Ca+2 + HCO3- = CaHCO3+ (from phreeqc.dat's CO3-based form minus log K2 inverse)."""
    return analytic_log_k(PB82_CAHCO3, temperature_c) + log_k2(temperature_c)


def log_k_caco3_pair(temperature_c):
    """log10 K of Ca+2 + CO3-2 = CaCO3(aq) (Plummer & Busenberg 1982 via phreeqc.dat); 3.224 at 25 C."""
    return analytic_log_k(PB82_CACO3, temperature_c)


def log_k_mghco3_pair(temperature_c):
    """log10 K of Mg+2 + HCO3- = MgHCO3+ (phreeqc.dat analytic, CO3 form plus log K2)."""
    return analytic_log_k(MG_HCO3_PAIR, temperature_c) + log_k2(temperature_c)


def log_k_mgco3_pair(temperature_c):
    """log10 K of Mg+2 + CO3-2 = MgCO3(aq) (phreeqc.dat analytic 0.9910 + 0.00667 T)."""
    return 0.9910 + 0.00667 * _kelvin(temperature_c)


def log_k_caso4_pair(temperature_c):
    """log10 K of Ca+2 + SO4-2 = CaSO4(aq), van't Hoff from phreeqc.dat (2.25, 1.325 kcal/mol)."""
    return vant_hoff_log_k(CA_SO4_PAIR_LOG_K25, CA_SO4_PAIR_DH_KCAL, temperature_c)
