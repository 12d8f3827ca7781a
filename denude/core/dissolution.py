"""Equilibrium dissolved load per mineral and chemistry mode, with validity checks.

This is the one entry point the rest of the package uses for chemistry:
``equilibrium_load_mol_per_l(mineral, temperature_c, pco2_atm, chemistry)``.
Cells outside the validity of the constants (temperature outside 0-90 degrees C,
PCO2 <= 0 or > 1 atm) become NaN and are counted in an ``OutOfRangeWarning``.
"""

from __future__ import annotations

import warnings

import numpy as np

from denude.core import closed_form, speciation
from denude.core.activity import water_density_kg_per_l
from denude.core.constants import (
    CHEMISTRY_MODES,
    PCO2_MAX_ATM,
    TEMPERATURE_MAX_C,
    TEMPERATURE_MIN_C,
)
from denude.errors import InputError, OutOfRangeWarning

_LOADS = {"white": closed_form.CLOSED_FORM_LOADS, "speciated": speciation.SPECIATED_LOADS}
SOLUBLE_MINERALS = ("calcite", "dolomite", "gypsum")


def check_chemistry(chemistry: str) -> str:
    """Validate a chemistry mode name; the error lists the valid choices."""
    if chemistry not in CHEMISTRY_MODES:
        raise InputError(f"unknown chemistry {chemistry!r}; choose one of {', '.join(CHEMISTRY_MODES)}")
    return chemistry


def check_mineral(mineral: str) -> str:
    if mineral not in SOLUBLE_MINERALS:
        raise InputError(f"unknown mineral {mineral!r}; choose one of {', '.join(SOLUBLE_MINERALS)}")
    return mineral


def out_of_range_mask(temperature_c, pco2_atm):
    """True where inputs are finite but outside the constants' validity."""
    t = np.asarray(temperature_c, dtype=np.float64)
    p = np.asarray(pco2_atm, dtype=np.float64)
    with np.errstate(invalid="ignore"):
        bad_t = (t < TEMPERATURE_MIN_C) | (t > TEMPERATURE_MAX_C)
        bad_p = (p <= 0.0) | (p > PCO2_MAX_ATM)
    return bad_t | bad_p


def warn_out_of_range(count: int, where: str = "") -> None:
    """Issue the one warning that counts cells made NaN for being out of range."""
    if count:
        warnings.warn(
            OutOfRangeWarning(
                f"{count} cell(s){where} outside the validity of the constants "
                f"(temperature {TEMPERATURE_MIN_C:g}-{TEMPERATURE_MAX_C:g} degrees C, "
                f"0 < PCO2 <= {PCO2_MAX_ATM:g} atm) set to NaN (cells below {TEMPERATURE_MIN_C:g} degrees C "
                "can be taken as 0 degrees C water with --below-freezing zero)"
            ),
            stacklevel=3,
        )


def equilibrium_load_mol_per_kg(mineral, temperature_c, pco2_atm, chemistry="white", warn=True):
    """Equilibrium dissolved mineral, mol of formula units per kg of water.

    Parameters: temperature_c [degrees C], pco2_atm [atm]; broadcast, NaN passes through.
    Out-of-range cells give NaN (and one warning counting them when ``warn``).
    """
    check_mineral(mineral)
    check_chemistry(chemistry)
    t = np.asarray(temperature_c, dtype=np.float64)
    p = np.asarray(pco2_atm, dtype=np.float64)
    t, p = np.broadcast_arrays(t, p)
    shape = t.shape
    # Scalars run through the same 1-D loops as arrays: numpy's vectorised loops and its
    # scalar path may differ in the last bit, and a cell must not depend on its neighbours.
    t, p = t.reshape(-1), p.reshape(-1)
    bad = out_of_range_mask(t, p)
    n_bad = int(np.count_nonzero(bad))
    if n_bad:
        t = np.where(bad, np.nan, t)
        p = np.where(bad, np.nan, p)
        if warn:
            warn_out_of_range(n_bad)
    with np.errstate(invalid="ignore"):
        load = _LOADS[chemistry][mineral](t, p)
    return load.reshape(shape)[()]


def equilibrium_load_mol_per_l(mineral, temperature_c, pco2_atm, chemistry="white", warn=True):
    """Equilibrium dissolved mineral, mol/L: the molal load times the density of water.

    The constants are molal; runoff is a volume, so the load is converted with the
    density of pure water (Kell 1975), ignoring the solute's own volume (< 0.1 % here).
    """
    molal = np.asarray(equilibrium_load_mol_per_kg(mineral, temperature_c, pco2_atm, chemistry, warn))
    t = np.broadcast_to(np.asarray(temperature_c, dtype=np.float64), molal.shape).reshape(-1)
    return (molal.reshape(-1) * water_density_kg_per_l(t)).reshape(molal.shape)[()]
