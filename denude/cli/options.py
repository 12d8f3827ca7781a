"""Options shared by the commands, as ``Annotated`` aliases (typer's own style).

Names, units and choices come from the library: input roles and layers from
``denude.registry``, choice values from ``registry.CHOICES`` as ``str`` Enums. Units are in
square brackets in the help (the app prints help as plain text, so they stay visible).

``--workers N`` means the same everywhere: how many parallel workers a command uses (threads
for `map`, processes for `batch`, `summarize` and `demo --tiles`); default: the cores available.
"""

from __future__ import annotations

from enum import Enum
from pathlib import Path
from typing import Annotated, Optional

import typer

from denude.registry import ALL_LAYERS, CHOICES, DEFAULT_TILE_SIZE, INPUT_ROLES, LAYERS, PCO2_FROM_AET


def choice_enum(name: str) -> type[Enum]:
    """A ``str`` Enum of the registry's choices for setting ``name`` (first = default)."""
    title = "".join(part.title() for part in name.split("_"))
    return Enum(title, {value: value for value in CHOICES[name]}, type=str)


Chemistry = choice_enum("chemistry")
Pco2Units = choice_enum("pco2_units")
NegativeRunoff = choice_enum("negative_runoff")
OutOfRange = choice_enum("out_of_range")
BelowFreezing = choice_enum("below_freezing")
Layout = choice_enum("layout")
Compress = choice_enum("compress")
LithologyResampling = choice_enum("lithology_resampling")
ContinuousResampling = choice_enum("continuous_resampling")

#: Old spellings still accepted on the command line (hidden from --help): old -> current.
OLD_SPELLINGS = {"--air-pressure-atm": "--air-pressure"}


def rename_old_spellings(args: list[str]) -> list[str]:
    """Command-line words with old option spellings replaced by the current ones."""
    out = []
    for arg in args:
        name, eq, value = arg.partition("=")
        out.append(OLD_SPELLINGS.get(name, name) + eq + value if name in OLD_SPELLINGS else arg)
    return out


def _metavar(enum: type[Enum]) -> str:
    return "<" + "|".join(member.value for member in enum) + ">"


def _role(name: str, what: str = "raster path or number") -> str:
    role = INPUT_ROLES[name]
    unit = "" if role.unit.startswith("see ") else f" [{role.unit}]"
    return f"{role.help.split(',')[0].rstrip('.')}{unit} ({what})."


VALUE = "VALUE"
CHEMISTRY_METAVAR = _metavar(Chemistry)

# ---------------------------------------------------------------- inputs of map, check, batch
Lithology = Annotated[Optional[str], typer.Option(metavar="RASTER", help=INPUT_ROLES["lithology"].help)]
Rocks = Annotated[Optional[str], typer.Option(
    metavar="CSV", help="Rock table CSV (code,name,mineral,density_g_cm3,purity); built-in table when omitted.")]
Runoff = Annotated[Optional[str], typer.Option(metavar=VALUE, help=_role("runoff"))]
Precipitation = Annotated[Optional[str], typer.Option(
    metavar=VALUE, help=_role("precipitation") + " Runoff = P - AET, with --aet.")]
Aet = Annotated[Optional[str], typer.Option(metavar=VALUE, help=_role("aet"))]
Pco2 = Annotated[Optional[str], typer.Option(
    metavar=VALUE, help=f"Soil CO2 partial pressure in --pco2-units (raster path or number), or '{PCO2_FROM_AET}' "
                        "for Brook et al. (1983) from --aet.")]
Pco2UnitsText = Annotated[Optional[str], typer.Option(
    "--pco2-units", metavar=_metavar(Pco2Units),
    help="Units of --pco2 (default: the raster's declared unit, else atm); wins over the raster's metadata, "
         "with a warning.")]
Elevation = Annotated[Optional[str], typer.Option(metavar=VALUE, help=_role("elevation") + " Converts ppmv PCO2 to atm.")]
AirPressure = Annotated[Optional[float], typer.Option(
    "--air-pressure", metavar="ATM", help="Air pressure [atm] for the ppmv PCO2 conversion, instead of --elevation "
                                          "(default 1 atm).")]
Temperature = Annotated[Optional[str], typer.Option(metavar=VALUE, help=_role("temperature"))]
SolubleFraction = Annotated[Optional[str], typer.Option(
    metavar=VALUE, help="Soluble-rock area fraction of each cell [0-1] (raster path or number); default 1.")]
Cover = Annotated[Optional[str], typer.Option(
    metavar=VALUE, help=_role("cover") + " The lithology is read as bedrock; adds the covered_karst layer "
                        "(the rate is unchanged).")]
CoverMinThickness = Annotated[Optional[float], typer.Option(
    "--cover-min-thickness", metavar="M", min=0.0,
    help="Least cover thickness [m] that counts as cover (default 0: any thickness > 0, a mask value of 1).")]

# ---------------------------------------------------------------- target grid
GridLike = Annotated[Optional[str], typer.Option(metavar="RASTER", help="Use this raster's grid as the target grid.")]
GridCrs = Annotated[Optional[str], typer.Option(metavar="CRS", help="Target grid CRS, e.g. EPSG:3035.")]
GridResolution = Annotated[Optional[str], typer.Option(
    metavar="'R' | 'X Y'", help="Target cell size [CRS units].")]
GridBounds = Annotated[Optional[str], typer.Option(
    metavar="'L B R T'", help="Target bounds [CRS units] (default: the lithology extent, snapped outward to whole cells).")]

# ---------------------------------------------------------------- run settings
ChemistryText = Annotated[Optional[str], typer.Option(
    metavar=CHEMISTRY_METAVAR, help="white: White (1984) closed form (default); speciated: full carbonate speciation.")]
BlockSize = Annotated[Optional[int], typer.Option(metavar="CELLS", help="Block and output tile size [cells] (default 512).")]
TileSize = Annotated[Optional[int], typer.Option(
    "--tile-size", metavar="CELLS", help=f"Batch tile side [cells], a multiple of 16 (default {DEFAULT_TILE_SIZE}).")]
Scheduler = Annotated[Optional[str], typer.Option("--scheduler", metavar="ADDRESS", help="Run on an existing Dask cluster, e.g. tcp://HOST:8786.")]
GdalCacheMb = Annotated[Optional[int], typer.Option(metavar="MB", help="GDAL block cache [MB] (default 128).")]
Layers = Annotated[Optional[str], typer.Option(
    metavar="NAME,...", help=f"Comma-separated output layers: {', '.join(ALL_LAYERS)} (default: "
                             f"{', '.join(LAYERS)}, plus covered_karst with --cover).")]
LayoutText = Annotated[Optional[str], typer.Option(
    metavar=_metavar(Layout), help="auto: COG up to 8192 x 8192 cells, else tiled BigTIFF.")]
CompressText = Annotated[Optional[str], typer.Option(metavar=_metavar(Compress), help="Compression (default deflate).")]
LithologyResamplingText = Annotated[Optional[str], typer.Option(
    metavar=_metavar(LithologyResampling), help="Resampling of the lithology codes (interpolating methods are refused).")]
ContinuousResamplingText = Annotated[Optional[str], typer.Option(
    metavar=_metavar(ContinuousResampling), help="Resampling of the continuous inputs.")]
NegativeRunoffText = Annotated[Optional[str], typer.Option(
    metavar=_metavar(NegativeRunoff),
    help="Negative runoff cells: error (default) or zero (taken as 0 mm/yr, counted in a warning).")]
OutOfRangeText = Annotated[Optional[str], typer.Option(
    metavar=_metavar(OutOfRange),
    help="Continuous input cells outside their plausible range or not finite: error (default) or nodata "
         "(counted per input in a warning and in run.json).")]
BelowFreezingText = Annotated[Optional[str], typer.Option(
    metavar=_metavar(BelowFreezing),
    help="Temperature cells below 0 degrees C: nodata (default) or zero (taken as 0 degrees C water, counted).")]


def _units_help(role: str) -> str:
    return (f"Units of --{role.replace('_', '-')}: {', '.join(CHOICES[role + '_units'])} (default: the raster's "
            f"declared unit, else {CHOICES[role + '_units'][0]}); wins over the raster's metadata, with a warning.")


RunoffUnits = Annotated[Optional[str], typer.Option(metavar="UNIT", help=_units_help("runoff"))]
PrecipitationUnits = Annotated[Optional[str], typer.Option(metavar="UNIT", help=_units_help("precipitation"))]
AetUnits = Annotated[Optional[str], typer.Option(metavar="UNIT", help=_units_help("aet"))]
TemperatureUnits = Annotated[Optional[str], typer.Option(metavar="UNIT", help=_units_help("temperature"))]
Job = Annotated[Optional[Path], typer.Option(metavar="TOML", help="TOML job file with the same settings; flags override it.")]

WORKERS_HELP = "Parallel workers (default: the cores available)."
Workers = Annotated[Optional[int], typer.Option("--workers", metavar="N", min=1, help=WORKERS_HELP)]
BatchWorkers = Annotated[Optional[int], typer.Option(
    "--workers", metavar="N", min=0, help="Parallel worker processes (default: the cores available; 0 = in this process).")]

# ---------------------------------------------------------------- command behaviour
Out = Annotated[Optional[str], typer.Option(metavar="DIR", help="Output folder (must not exist unless --overwrite).")]
Overwrite = Annotated[bool, typer.Option("--overwrite", help="Replace an existing output folder.")]
DryRun = Annotated[bool, typer.Option("--dry-run", help="Validate everything, write nothing.")]
Quiet = Annotated[bool, typer.Option("--quiet", "-q", help="No progress bar or summary.")]
AsJson = Annotated[bool, typer.Option(
    "--json", help="Print one JSON object on stdout (what was done, outputs, counts, warnings) and nothing else.")]

# ---------------------------------------------------------------- zone summaries (summarize, batch)
Units = Annotated[Optional[Path], typer.Option(
    help="Planning-unit polygons (e.g. parcels): written as layer planning_units.", exists=True, dir_okay=False)]
UnitsLayer = Annotated[Optional[str], typer.Option(help="Layer of the planning-unit file.")]
UnitsIdField = Annotated[Optional[str], typer.Option(help="Planning-unit id field.")]
Points = Annotated[Optional[Path], typer.Option(
    help="Sinkhole points: sampled and counted per zone (layer sinkholes).", exists=True, dir_okay=False)]
PointsLayer = Annotated[Optional[str], typer.Option(help="Layer of the sinkhole file.")]

#: The map-setting options of map, check and batch (their parameter names = MapSettings fields).
MAP_SETTING_NAMES = (
    "lithology", "rocks", "runoff", "precipitation", "aet", "pco2", "pco2_units", "elevation", "air_pressure",
    "temperature", "soluble_fraction", "cover", "cover_min_thickness", "grid_like", "grid_crs", "grid_resolution", "grid_bounds", "chemistry",
    "workers", "block_size", "gdal_cache_mb", "layers", "layout", "compress", "lithology_resampling",
    "continuous_resampling", "negative_runoff", "out_of_range", "below_freezing", "runoff_units",
    "precipitation_units", "aet_units", "temperature_units", "overwrite",
)


def map_flags(values: dict) -> dict:
    """{MapSettings field: value} from a command's parameters (None = not given): the numbers
    lists of --grid-bounds/--grid-resolution split, an unset --overwrite left to the job file."""
    flags = {name: values.get(name) for name in MAP_SETTING_NAMES}
    flags["air_pressure_atm"] = flags.pop("air_pressure")
    flags["cover_min_thickness_m"] = flags.pop("cover_min_thickness")
    for key in ("grid_bounds", "grid_resolution"):
        if isinstance(flags.get(key), str):
            try:
                flags[key] = [float(v) for v in flags[key].replace(",", " ").split()]
            except ValueError:
                from denude.errors import InputError

                raise InputError(f"--{key.replace('_', '-')} {values[key]!r} is not a list of numbers; "
                                 "give e.g. '1000' or '1000 1000'") from None
    if flags.get("overwrite") is False:
        flags["overwrite"] = None
    return flags
