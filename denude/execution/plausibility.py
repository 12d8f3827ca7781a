"""Plausibility bands of the continuous inputs, in the run's units, and the one-line errors
for values outside them (wrong units, wrong sign, not finite). Part of the rule book
(``validation.py``); the window reader (``window_inputs.py``) applies the same bands under
``--out-of-range nodata``.
"""

from __future__ import annotations

import math

from denude.core.constants import TEMPERATURE_PLAUSIBLE_MAX_C, TEMPERATURE_PLAUSIBLE_MIN_C
from denude.errors import InputError
from denude.io.jobfile import MapSettings
from denude.io.units import settings_unit
from denude.registry import INPUT_ROLES

#: A target grid with more than this many times the lithology raster's cells is taken to be a
#: resolution typo (a 100 m grid given as 0.01) rather than deliberate supersampling.
MAX_SUPERSAMPLING = 64

#: Share of computed cells with runoff <= 0 above which a finished run warns.
ZERO_RUNOFF_WARN_SHARE = 0.5

#: A runoff or precipitation field whose largest value is below this (mm/yr) is taken to be
#: in m/yr: even hyper-arid regions have some cells with more (common practice, no source).
MIN_PLAUSIBLE_MAX_MM_PER_YR = 5.0

#: Plausible value bands per input: role -> (low, high, fix when outside). Values outside
#: usually mean wrong units; these are screening limits (common practice, no source).
PLAUSIBLE = {
    "runoff": (0.0, 20000.0, "give runoff in mm/yr (not m/yr or mm/month)"),
    "precipitation": (0.0, 20000.0, "give precipitation in mm/yr"),
    "aet": (0.0, 5000.0, "give actual evapotranspiration in mm/yr"),
    "temperature": (TEMPERATURE_PLAUSIBLE_MIN_C, TEMPERATURE_PLAUSIBLE_MAX_C,
                    "give temperature in degrees C (not kelvin or tenths of a degree), or declare its unit"),
    "elevation": (-500.0, 9000.0, "give elevation in metres above sea level"),
    "soluble_fraction": (0.0, 1.0, "give the soluble-area fraction as 0-1 (not percent)"),
    # the deepest sediment-filled basins hold a few km of fill; more looks like cm or mm
    "cover": (0.0, 5000.0, "give the cover thickness in m (or a 0/1 mask)"),
    "pco2:atm": (0.0, 1.0, "values above 1 atm look like ppmv: use --pco2-units ppmv"),
    "pco2:negative": (0.0, math.inf, "a PCO2 must be positive (negative values often come from an interpolation)"),
    "pco2:ppmv": (1.0, 1e6, "values below 1 ppmv look like atm: use --pco2-units atm"),
    "pco2:log10atm": (-6.0, 0.0, "give log10 of PCO2 in atm (e.g. -2), or use --pco2-units atm"),
}

#: The fix named when runoff has negative cells under the default --negative-runoff error.
NEGATIVE_RUNOFF_FIX = (
    "negative runoff usually means wrong units or a water-balance residual: set those cells to nodata, "
    "or use --negative-runoff zero (job file [run] negative_runoff = \"zero\") to take them as 0 mm/yr"
)

#: Said with every value that the default --out-of-range error refuses.
OUT_OF_RANGE_FIX = "or use --out-of-range nodata (job file [run] out_of_range = \"nodata\") to take such cells as nodata"

#: Relative elevations (m) at which the ppmv-at-sea-level warning states its size.
PPMV_WARNING_ELEVATIONS_M = (1500.0, 2000.0)


def pco2_target(settings: MapSettings) -> str:
    """The PCO2 unit the values are converted to before the pressure rule: atm, ppmv or log10atm."""
    return settings_unit(settings, "pco2")[0].target


def value_band(role: str, settings: MapSettings) -> tuple[float, float] | None:
    """(low, high) plausible band of ``role`` in the run's unit under these settings, or None.
    With --negative-runoff zero, runoff has no lower bound (negative cells become 0 mm/yr)."""
    key = f"pco2:{pco2_target(settings)}" if role == "pco2" else role
    if key not in PLAUSIBLE:
        return None
    low, high, _ = PLAUSIBLE[key]
    if role == "runoff" and settings.negative_runoff == "zero":
        low = -math.inf
    return low, high


def band_text(low: float, high: float) -> str:
    """'the plausible range LOW to HIGH' (or 'the plausible limit HIGH' without a lower bound)."""
    return f"the plausible limit {high:g}" if low == -math.inf else f"the plausible range {low:g} to {high:g}"


def implausible(role: str, settings: MapSettings, low_value: float, high_value: float):
    """(offending value, band low, band high, fix, unit) when [low_value, high_value] leaves the
    plausible band of ``role`` under these settings, else None. With --negative-runoff zero,
    runoff has no lower bound (negative cells become 0 mm/yr)."""
    target = pco2_target(settings)
    key = f"pco2:{target}" if role == "pco2" else role
    band = value_band(role, settings)
    if band is None:
        return None
    low, high = band
    fix = PLAUSIBLE[key][2]
    if low_value >= low and high_value <= high:
        return None
    bad = low_value if low_value < low else high_value
    if role == "runoff" and bad < 0:
        fix = NEGATIVE_RUNOFF_FIX
    if role == "pco2" and bad < 0 and target != "log10atm":
        fix = PLAUSIBLE["pco2:negative"][2]
    unit = {"pco2:atm": "atm", "pco2:ppmv": "ppmv", "pco2:log10atm": "log10 atm"}.get(key, INPUT_ROLES[role].unit)
    return bad, low, high, fix, unit


# ------------------------------------------------------------------------- validation
def check_range(role: str, where: str, low_value: float, high_value: float, settings: MapSettings,
                 whole: bool = True) -> None:
    """Raise a one-line error when values are implausible. ``whole``: the range covers the whole
    input (a constant or a raster-wide scan), not one window, so unit heuristics apply."""
    for value in (low_value, high_value):
        if not math.isfinite(value):
            raise InputError(
                f"{where}: {role} value {value:g} is not a finite number; set those cells to nodata, "
                f"{OUT_OF_RANGE_FIX}")
    found = implausible(role, settings, low_value, high_value)
    if found is not None and settings.out_of_range == "nodata":
        band = value_band(role, settings)
        if not whole or (low_value <= band[1] and high_value >= band[0]):
            found = None      # some cells in the band: the others become nodata, counted per input
    if whole and role in ("runoff", "precipitation") and 0 < high_value < MIN_PLAUSIBLE_MAX_MM_PER_YR:
        raise InputError(
            f"{where}: largest {role} value {high_value:g} mm/yr is implausibly small; the values look "
            f"like m/yr: give {role} in mm/yr (multiply by 1000)"
        )
    if found is None:
        return
    bad, low, high, fix, unit = found
    if role == "temperature" and high_value > 200:
        fix = "values look like kelvin: use --temperature-units K (or subtract 273.15)"
    if role == "soluble_fraction" and 1 < high_value <= 100:
        fix = "values look like percent; divide by 100"
    if role == "pco2" and pco2_target(settings) == "atm" and high_value <= 0 and low_value >= -6:
        fix = "values look like log10 atm: use --pco2-units log10atm"
    tail = f"; {OUT_OF_RANGE_FIX}" if settings.out_of_range == "error" and not where.startswith("--") else ""
    raise InputError(
        f"{where}: {role} value {bad:g} is outside {band_text(low, high)} {unit}; {fix}{tail}"
    )
