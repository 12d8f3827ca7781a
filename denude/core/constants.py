"""Physical constants, molar masses and validity limits used by the numeric core.

Sources are given per constant. Temperatures: t in degrees C, T = t + 273.15 K.
"""

KELVIN_OFFSET = 273.15  # K at 0 degrees C (SI definition)

# Molar masses, g/mol (IUPAC standard atomic weights, rounded as in White 1984 / science notes)
MOLAR_MASS_CALCITE_G_PER_MOL = 100.09   # CaCO3
MOLAR_MASS_DOLOMITE_G_PER_MOL = 184.40  # CaMg(CO3)2
MOLAR_MASS_GYPSUM_G_PER_MOL = 172.17    # CaSO4.2H2O
MOLAR_MASS_CO2_G_PER_MOL = 44.01

# Validity of the Plummer & Busenberg (1982) fits: 0-90 degrees C at 1 atm total pressure.
TEMPERATURE_MIN_C = 0.0
TEMPERATURE_MAX_C = 90.0
# Plausible band of an input temperature (screening for wrong units, not validity): below the
# coldest surface air temperatures measured (about -89 degrees C, from memory) or above the boiling
# point of water at 1 atm (100 degrees C, a definition) the values are in another unit (kelvin,
# tenths of a degree). Cells inside this band but outside the validity above are nodata (or, below
# 0 degrees C, taken as 0 degrees C water when asked), never an error.
TEMPERATURE_PLAUSIBLE_MIN_C = -90.0
TEMPERATURE_PLAUSIBLE_MAX_C = 100.0
# Soil CO2 partial pressure must be positive and at most the 1 atm total pressure.
PCO2_MAX_ATM = 1.0

# Ion-size parameters a (angstrom), WATEQ (Truesdell & Jones 1974), as in science notes section 3.
ION_SIZE_CA_A = 5.0
ION_SIZE_MG_A = 5.5
ION_SIZE_HCO3_A = 5.4
ION_SIZE_CO3_A = 5.4
ION_SIZE_SO4_A = 5.0
ION_SIZE_H_A = 9.0
ION_SIZE_OH_A = 3.5
ION_SIZE_CAHCO3_A = 6.0
ION_SIZE_MGHCO3_A = 4.0

# WATEQ "b" (b-dot like) terms of the extended Debye-Hueckel law, kg/mol, as carried by
# PHREEQC's phreeqc.dat (Parkhurst & Appelo 2013); used by the speciated mode only.
B_DOT_CA = 0.165
B_DOT_MG = 0.20
B_DOT_SO4 = -0.04

# Salting-out coefficient for neutral aqueous species, log gamma = 0.1 I (PHREEQC convention,
# Parkhurst & Appelo 2013, eq. for uncharged species).
NEUTRAL_SALTING_KG_PER_MOL = 0.1

# CO2 taken up per mol of mineral dissolved by carbonic acid (science notes section 6).
CO2_PER_MOL = {"calcite": 1.0, "dolomite": 2.0, "gypsum": 0.0, "insoluble": 0.0}

MOLAR_MASS_G_PER_MOL = {
    "calcite": MOLAR_MASS_CALCITE_G_PER_MOL,
    "dolomite": MOLAR_MASS_DOLOMITE_G_PER_MOL,
    "gypsum": MOLAR_MASS_GYPSUM_G_PER_MOL,
    "insoluble": 0.0,
}

#: Minerals the model knows, in the fixed order used by integer mineral indices.
MINERALS = ("insoluble", "calcite", "dolomite", "gypsum")
MINERAL_INDEX = {name: i for i, name in enumerate(MINERALS)}

#: Chemistry modes.
CHEMISTRY_MODES = ("white", "speciated")
