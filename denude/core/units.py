"""Units of the continuous inputs: accepted spellings and the conversion of each to the unit a
run expects (the registry's ``INPUT_ROLES[role].unit``). Pure table and arithmetic, no I/O.

A conversion is linear: ``value_in_target = value * factor + offset``. PCO2 has three targets
(atm, ppmv, log10atm): ppmv keeps the pressure rule of ``soil_co2.pco2_atm_from_units`` and
log10atm its power of ten, so a PCO2 unit converts to one of those three.
"""

from __future__ import annotations

import re
from dataclasses import dataclass

import numpy as np

from denude.core.constants import KELVIN_OFFSET
from denude.errors import InputError


@dataclass(frozen=True)
class Unit:
    """One unit an input may be given in: its canonical name, the unit it converts to, and how."""

    name: str
    target: str
    factor: float = 1.0
    offset: float = 0.0
    spellings: tuple = ()

    @property
    def identity(self) -> bool:
        return self.factor == 1.0 and self.offset == 0.0

    def describe(self) -> str:
        """How the conversion reads in one line, e.g. 'x 12' or '- 273.15'."""
        if self.identity:
            return "no conversion"
        parts = []
        if self.factor != 1.0:
            parts.append(f"x {self.factor:.10g}")
        if self.offset:
            parts.append(f"{'+' if self.offset > 0 else '-'} {abs(self.offset):.10g}")
        return " ".join(parts)


#: Days per year in a per-day conversion: the Julian year of 365.25 days (IAU definition).
DAYS_PER_YEAR = 365.25
#: Months per year: mm/month x 12 is a monthly mean rate times twelve (common practice, no source).
MONTHS_PER_YEAR = 12.0
#: Pascals in one standard atmosphere (SI/CGPM definition: 1 atm = 101 325 Pa).
PA_PER_ATM = 101325.0
#: Metres in one international foot (1959 definition: exactly 0.3048 m).
M_PER_FOOT = 0.3048

_WATER = (
    Unit("mm/yr", "mm/yr", 1.0, 0.0, ("mm/yr", "mm/a", "kg/m2/yr")),
    Unit("mm/month", "mm/yr", MONTHS_PER_YEAR, 0.0, ("mm/month",)),
    Unit("mm/day", "mm/yr", DAYS_PER_YEAR, 0.0, ("mm/day",)),
    Unit("cm/yr", "mm/yr", 10.0, 0.0, ("cm/yr",)),
    Unit("m/yr", "mm/yr", 1000.0, 0.0, ("m/yr",)),
)
_TEMPERATURE = (
    Unit("degC", "degrees C", 1.0, 0.0, ("degc", "c", "celsius", "degreesc", "degreescelsius", "degreec")),
    Unit("K", "degrees C", 1.0, -KELVIN_OFFSET, ("k", "kelvin", "degk")),
    Unit("degF", "degrees C", 5.0 / 9.0, -32.0 * 5.0 / 9.0, ("degf", "f", "fahrenheit", "degreesf")),
)
_PCO2 = (
    Unit("atm", "atm", 1.0, 0.0, ("atm",)),
    Unit("ppmv", "ppmv", 1.0, 0.0, ("ppmv", "ppm", "umol/mol")),
    Unit("uatm", "atm", 1e-6, 0.0, ("uatm",)),
    Unit("Pa", "atm", 1.0 / PA_PER_ATM, 0.0, ("pa",)),
    Unit("hPa", "atm", 100.0 / PA_PER_ATM, 0.0, ("hpa", "mbar")),
    Unit("kPa", "atm", 1000.0 / PA_PER_ATM, 0.0, ("kpa",)),
    Unit("log10atm", "log10atm", 1.0, 0.0, ("log10atm", "log10(atm)", "log(atm)")),
)
_ELEVATION = (
    Unit("m", "m", 1.0, 0.0, ("m", "metre", "meter", "metres", "meters", "masl")),
    Unit("ft", "m", M_PER_FOOT, 0.0, ("ft", "foot", "feet")),
)
_FRACTION = (
    Unit("fraction", "fraction 0-1", 1.0, 0.0, ("1", "fraction", "-", "ratio")),
    Unit("percent", "fraction 0-1", 0.01, 0.0, ("percent", "%", "pct")),
)

#: Role -> the units it accepts (the first is the run's own unit, the default).
UNITS_BY_ROLE: dict[str, tuple[Unit, ...]] = {
    "runoff": _WATER,
    "precipitation": _WATER,
    "aet": _WATER,
    "temperature": _TEMPERATURE,
    "pco2": _PCO2,
    "elevation": _ELEVATION,
    "soluble_fraction": _FRACTION,
    "cover": _ELEVATION,              # insoluble cover thickness: a length, like elevation
}

#: Role -> what the role measures, for messages naming a unit of another role.
_QUANTITY = {"runoff": "a water flux (runoff, precipitation, AET)", "temperature": "a temperature",
             "pco2": "a partial pressure", "elevation": "an elevation", "soluble_fraction": "a fraction",
             "cover": "a cover thickness"}


def normalise_unit(text: str) -> str:
    """A unit spelling reduced for lookup: lower case, no spaces, micro sign as 'u', degree sign
    as 'deg', 'yr-1' style exponents as '/yr', year/month/day abbreviations unified."""
    s = str(text).strip().lower()
    s = s.replace("\u00b5", "u").replace("\u03bc", "u").replace("\u00b0", "deg")
    s = re.sub(r"\s+", " ", s)
    s = re.sub(r"\bper\b", "/", s)
    s = s.replace("^", "").replace("**", "")
    # "mm yr-1", "mm.yr-1", "kg m-2 yr-1" -> "mm/yr", "kg/m2/yr"
    s = re.sub(r"[ .]?([a-z]+)-(\d)", lambda m: "/" + m.group(1) + ("" if m.group(2) == "1" else m.group(2)), s)
    s = s.replace(" ", "").replace("_", "")
    s = re.sub(r"/(years?|a|y)$", "/yr", s)
    s = re.sub(r"/(months?|mon|mo)$", "/month", s)
    s = re.sub(r"/(days?|d)$", "/day", s)
    return s.lstrip("/")


def _spellings(unit: Unit) -> set:
    return {normalise_unit(s) for s in (unit.name, *unit.spellings)}


def find_unit(role: str, text: str) -> Unit | None:
    """The unit of ``role`` spelled ``text`` (any accepted spelling), or None."""
    key = normalise_unit(text)
    for unit in UNITS_BY_ROLE.get(role, ()):
        if key in _spellings(unit):
            return unit
    return None


def default_unit(role: str) -> Unit:
    """The run's own unit of ``role`` (no conversion)."""
    return UNITS_BY_ROLE[role][0]


def unit_names(role: str) -> tuple[str, ...]:
    """Canonical names of the units ``role`` accepts (first = the run's unit)."""
    return tuple(u.name for u in UNITS_BY_ROLE[role])


def other_quantity(role: str, text: str) -> str | None:
    """What ``text`` measures when it is a unit of another kind of input (else None)."""
    for other, quantity in _QUANTITY.items():
        if UNITS_BY_ROLE[other] is not UNITS_BY_ROLE.get(role) and find_unit(other, text) is not None:
            return quantity
    return None


def require_unit(role: str, text: str, where: str) -> Unit:
    """``find_unit`` or a one-line InputError naming ``where`` (a file or an option), the unit
    and the accepted ones."""
    unit = find_unit(role, text)
    if unit is not None:
        return unit
    quantity = other_quantity(role, text)
    what = f"a unit of {quantity}, not of {role}" if quantity else f"not a known unit of {role}"
    raise InputError(
        f"{where}: unit {text!r} is {what}; give {role} in one of "
        f"{', '.join(unit_names(role))} (or set the right unit in the raster's metadata)"
    )


def convert(values, unit: Unit):
    """Values in ``unit`` converted to ``unit.target`` (float64; NaN passes through)."""
    v = np.asarray(values, dtype=np.float64)
    if unit.identity:
        return v
    return v * unit.factor + unit.offset
