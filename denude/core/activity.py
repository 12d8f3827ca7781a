"""Activity coefficients (extended Debye-Hueckel) and water density.

Two sets of Debye-Hueckel parameters A (kg^0.5 mol^-0.5) and B (kg^0.5 mol^-0.5 angstrom^-1):

* ``"linear"``: linear fits in temperature (degrees C) to the Truesdell-Jones / Garrels-Christ
  tables, within 0.3 % over 0-30 degrees C (science notes section 3). White's closed form
  uses these, as published.
* ``"dielectric"``: from the dielectric constant and density of water,
  A = 1.82483e6 sqrt(rho) / (eps T)^1.5 and B = 50.2916 sqrt(rho) / (eps T)^0.5 (T in K,
  rho in g/cm3; the standard Debye-Hueckel expressions, constants from memory), with eps from
  Malmberg & Maryott (1956) and rho from Kell (1975). Valid well beyond 30 degrees C; the
  speciated mode uses these.
"""

from __future__ import annotations

import numpy as np


def debye_huckel_a(temperature_c):
    """Debye-Hueckel A, kg^0.5 mol^-0.5: 0.4883 + 8.074e-4 t (t in degrees C)."""
    return 0.4883 + 8.074e-4 * np.asarray(temperature_c, dtype=np.float64)


def debye_huckel_b(temperature_c):
    """Debye-Hueckel B, kg^0.5 mol^-0.5 per angstrom: 0.3241 + 1.600e-4 t (t in degrees C)."""
    return 0.3241 + 1.600e-4 * np.asarray(temperature_c, dtype=np.float64)


def water_dielectric_constant(temperature_c):
    """Relative permittivity of water (dimensionless), 0-100 degrees C.

    Malmberg & Maryott (1956), J. Res. Natl. Bur. Stand. 56, 1-8:
    87.740 - 0.40008 t + 9.398e-4 t^2 - 1.410e-6 t^3 (coefficients from memory; checked in
    the tests against the handbook value 78.3 at 25 C)."""
    t = np.asarray(temperature_c, dtype=np.float64)
    return 87.740 - 0.40008 * t + 9.398e-4 * t**2 - 1.410e-6 * t**3


def debye_huckel_a_dielectric(temperature_c):
    """Debye-Hueckel A, kg^0.5 mol^-0.5, from the dielectric constant and density of water."""
    t = np.asarray(temperature_c, dtype=np.float64)
    eps_t = water_dielectric_constant(t) * (t + 273.15)
    return 1.82483e6 * np.sqrt(water_density_kg_per_l(t)) / eps_t**1.5


def debye_huckel_b_dielectric(temperature_c):
    """Debye-Hueckel B, kg^0.5 mol^-0.5 per angstrom, from the dielectric constant and density of water."""
    t = np.asarray(temperature_c, dtype=np.float64)
    eps_t = water_dielectric_constant(t) * (t + 273.15)
    return 50.2916 * np.sqrt(water_density_kg_per_l(t)) / np.sqrt(eps_t)


#: Debye-Hueckel parameter sets by name: functions of temperature (degrees C) giving (A, B).
DH_PARAMETERS = {
    "linear": lambda t: (debye_huckel_a(t), debye_huckel_b(t)),
    "dielectric": lambda t: (debye_huckel_a_dielectric(t), debye_huckel_b_dielectric(t)),
}


def log_gamma(charge, ion_size_a, ionic_strength_mol_per_kg, temperature_c, b_dot=0.0, parameters="linear"):
    """log10 activity coefficient by the extended Debye-Hueckel law.

    ``log g = -A z^2 sqrt(I) / (1 + B a sqrt(I)) + b_dot I``; ``b_dot = 0`` gives the
    classic form used by White's closed form. Ionic strength in mol/kg, ion size in angstrom;
    ``parameters``: "linear" or "dielectric" A and B (module docstring), or an (A, B) pair
    already evaluated at ``temperature_c``.
    """
    a, b = DH_PARAMETERS[parameters](temperature_c) if isinstance(parameters, str) else parameters
    sqrt_i = np.sqrt(ionic_strength_mol_per_kg)
    return -a * charge * charge * sqrt_i / (1.0 + b * ion_size_a * sqrt_i) + b_dot * ionic_strength_mol_per_kg


def gamma(charge, ion_size_a, ionic_strength_mol_per_kg, temperature_c, b_dot=0.0, parameters="linear"):
    """Activity coefficient (dimensionless); see ``log_gamma``."""
    return 10.0 ** log_gamma(charge, ion_size_a, ionic_strength_mol_per_kg, temperature_c, b_dot, parameters)


def water_density_kg_per_l(temperature_c):
    """Density of pure air-free water at 1 atm, kg/L, 0-150 degrees C.

    Kell (1975), J. Chem. Eng. Data 20, 97-105, eq. 16 (coefficients from memory;
    checked in the tests against handbook values 0.99997 at 4 C and 0.99705 at 25 C).
    """
    t = np.asarray(temperature_c, dtype=np.float64)
    numerator = (
        999.83952
        + 16.945176 * t
        - 7.9870401e-3 * t**2
        - 46.170461e-6 * t**3
        + 105.56302e-9 * t**4
        - 280.54253e-12 * t**5
    )
    return numerator / (1.0 + 16.879850e-3 * t) / 1000.0
