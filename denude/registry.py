"""The one registry of names: input roles, output layers and option choices.

Every list of names that two places need lives here once: the job-file checks, the CLI's
choices and help, the raster job and the batch all read it. Imports only the numeric core.
"""

from __future__ import annotations

from dataclasses import dataclass

from denude.core.constants import CHEMISTRY_MODES
from denude.core.cover import COVER_NODATA
from denude.core.hazard import HAZARD_NODATA
from denude.core.soil_co2 import PCO2_UNIT_NAMES
from denude.core.units import unit_names

#: The PCO2 value that asks for Brook et al. (1983) soil CO2 from actual evapotranspiration.
PCO2_FROM_AET = "from-aet"


@dataclass(frozen=True)
class InputRole:
    """One raster (or constant) input of a run."""

    name: str
    categorical: bool
    unit: str                 # the unit the run expects, e.g. "mm/yr"
    help: str                 # one line for --help and the job-file template
    auto_resampling: str | None = None   # what 'auto' continuous resampling means for this role (None: by coarsening)


#: Raster inputs, in the order they are read and reported.
INPUT_ROLES: dict[str, InputRole] = {r.name: r for r in (
    InputRole("lithology", True, "code", "Lithology codes raster (categorical)."),
    InputRole("runoff", False, "mm/yr", "Runoff, mm/yr."),
    InputRole("precipitation", False, "mm/yr", "Precipitation, mm/yr; runoff = P - AET."),
    InputRole("aet", False, "mm/yr", "Actual evapotranspiration, mm/yr."),
    InputRole("pco2", False, "see pco2_units", "Soil PCO2, in --pco2-units; or 'from-aet' for Brook et al. (1983)."),
    InputRole("elevation", False, "m", "Elevation, m above sea level; converts ppmv PCO2 to atm."),
    InputRole("temperature", False, "degrees C", "Temperature, degrees C."),
    InputRole("soluble_fraction", False, "fraction 0-1", "Soluble-area fraction of each cell, 0-1; default 1."),
    # nearest under 'auto': a 0/1 mask stays 0/1 (bilinear would smear its edges into fractions,
    # and any fraction > 0 would then count as cover); thickness only meets a threshold.
    InputRole("cover", False, "m", "Insoluble cover thickness, m (or a 0/1 mask); lithology is then bedrock.",
              auto_resampling="nearest"),
)}

#: Settings fields holding a raster path or a number (the continuous roles).
VALUE_FIELDS = tuple(name for name, role in INPUT_ROLES.items() if not role.categorical)

#: Settings fields holding only a path.
PATH_FIELDS = ("lithology", "rocks", "grid_like", "out")


@dataclass(frozen=True)
class OutputLayer:
    """One output raster of `denude map` (and of each batch tile)."""

    name: str                 # short name for --layers
    file: str                 # file name in the output folder
    dtype: str
    nodata: float
    overview_resampling: str
    units: str
    quantity: str
    formula: str
    needs: str | None = None  # the optional input role the layer needs (not a default layer without it)


INT32_NODATA = -2147483648

#: Output layers selectable with --layers, in their fixed order.
OUTPUT_LAYERS: dict[str, OutputLayer] = {layer.name: layer for layer in (
    OutputLayer(
        "denudation", "denudation_mm_per_kyr.tif", "float32", float("nan"), "average", "mm/kyr",
        "cell-mean maximum chemical denudation rate",
        "D = M [Ca]eq q / (rho purity) x soluble-area fraction"),
    OutputLayer(
        "dissolved_load", "dissolved_load_mmol_per_l.tif", "float32", float("nan"), "average", "mmol/L",
        "equilibrium dissolved mineral load (not scaled by area fraction)",
        "[Ca]eq = (K1 Kc KH PCO2 / (4 K2 gCa gHCO3^2))^(1/3) (calcite; analogues for dolomite, gypsum)"),
    OutputLayer(
        "co2_drawdown", "co2_drawdown_t_per_km2_yr.tif", "float32", float("nan"), "average", "t CO2 km-2 yr-1",
        "CO2 drawn down by dissolution per km2 of cell",
        "n [Ca]eq q 44.01 x soluble-area fraction"),
    OutputLayer(
        "hazard", "hazard_class.tif", "uint8", float(HAZARD_NODATA), "nearest", "class index",
        "dissolution hazard class from the denudation rate", "class k where breaks[k-1] <= D < breaks[k]"),
    OutputLayer(
        "lithology", "lithology_code.tif", "int32", float(INT32_NODATA), "nearest", "code",
        "lithology code on the target grid", "input lithology, nearest/mode resampled"),
    OutputLayer(
        "soluble_fraction", "soluble_area_fraction.tif", "float32", float("nan"), "average", "fraction 0-1",
        "soluble-rock area fraction of each cell", "0 on insoluble rock, else the soluble-area fraction input"),
    OutputLayer(
        "covered_karst", "covered_karst.tif", "uint8", float(COVER_NODATA), "nearest", "class index",
        "soluble bedrock exposed or under insoluble cover (screening flag; the rate is unchanged)",
        "0 no soluble bedrock; 1 soluble fraction > 0 and cover < threshold; 2 soluble fraction > 0 and "
        "cover >= threshold (> 0)", needs="cover"),
)}

#: Short layer name -> file name of every layer --layers accepts, in the fixed order.
ALL_LAYERS: dict[str, str] = {name: layer.file for name, layer in OUTPUT_LAYERS.items()}

#: Short layer name -> file name of the default layers (those needing no optional input):
#: what a run writes when --layers is not given (plus each layer whose input is given).
LAYERS: dict[str, str] = {name: layer.file for name, layer in OUTPUT_LAYERS.items() if layer.needs is None}


def default_layers(given_roles) -> tuple[str, ...]:
    """The default layer names of a run whose optional inputs ``given_roles`` (names) are given."""
    given = set(given_roles)
    return tuple(name for name, layer in OUTPUT_LAYERS.items() if layer.needs is None or layer.needs in given)


#: Default side of a batch tile [cells] (`denude batch`, `denude uncertainty --tile-size`).
DEFAULT_TILE_SIZE = 4096

#: Layers a zone summary reads.
ZONE_LAYERS = ("denudation", "co2_drawdown", "hazard", "lithology", "soluble_fraction")

#: Layers a zone summary reads when the folder has them (their summary columns appear then).
OPTIONAL_ZONE_LAYERS = ("covered_karst",)

#: Option choices: setting name -> the valid values, the first being the default.
CHOICES: dict[str, tuple[str, ...]] = {
    "chemistry": tuple(CHEMISTRY_MODES),
    "pco2_units": PCO2_UNIT_NAMES,
    "negative_runoff": ("error", "zero"),
    "out_of_range": ("error", "nodata"),           # continuous input cells outside their band
    "below_freezing": ("nodata", "zero"),          # temperature cells below 0 degrees C
    "runoff_units": unit_names("runoff"),
    "precipitation_units": unit_names("precipitation"),
    "aet_units": unit_names("aet"),
    "temperature_units": unit_names("temperature"),
    "layout": ("auto", "cog", "tiled"),
    "compress": ("deflate", "zstd"),
    "lithology_resampling": ("auto", "nearest", "mode"),
    "continuous_resampling": ("auto", "bilinear", "cubic", "average", "nearest"),
    "unsampled": ("same-rock", "nodata"),          # denude calibrate: zones without samples
}

#: Settings fields naming the unit of an input -> the role. ``pco2_units`` keeps its own
#: choices (the pressure rule); the others take any spelling of ``core.units`` for the role.
UNIT_FIELDS: dict[str, str] = {"runoff_units": "runoff", "precipitation_units": "precipitation",
                               "aet_units": "aet", "pco2_units": "pco2", "temperature_units": "temperature"}

#: Resampling methods refused for the lithology (they interpolate codes and invent classes).
REFUSED_LITHOLOGY_RESAMPLING = ("bilinear", "cubic", "average", "cubic_spline", "lanczos")

# Named tuples kept for the modules that read them directly.
CHEMISTRIES = CHOICES["chemistry"]
PCO2_UNITS = CHOICES["pco2_units"]
NEGATIVE_RUNOFF = CHOICES["negative_runoff"]
