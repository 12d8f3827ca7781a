"""Settings of a raster job (`denude map`), from command-line flags and/or a TOML job file.

Job file layout (every key optional except those a run needs; flags override the file;
relative paths resolve against the job file's folder)::

    [inputs]
    lithology = "lithology.tif"        # categorical codes
    rocks = "rocks.csv"                # rock table; built-in table when omitted
    runoff = "runoff.tif"              # mm/yr, raster or number
    precipitation = "p.tif"            # mm/yr, with aet instead of runoff (runoff = P - AET, >= 0)
    aet = "aet.tif"                    # actual evapotranspiration, mm/yr
    pco2 = 0.01                        # soil PCO2; "from-aet" = Brook et al. (1983) from aet
    pco2_units = "atm"                 # atm | ppmv | log10atm
    elevation = "dem.tif"              # m, converts ppmv to atm (or air_pressure_atm)
    air_pressure_atm = 1.0
    temperature = 10.0                 # degrees C
    soluble_fraction = 1.0             # soluble-area fraction of each cell, 0-1

    [grid]                             # default: the lithology raster's grid
    like = "other.tif"                 # or crs + resolution (+ bounds):
    crs = "EPSG:3035"
    resolution = 1000.0                # CRS units; one number or [x, y]
    bounds = [left, bottom, right, top]  # CRS units; default: the lithology extent in crs,
                                       # snapped outward to multiples of the resolution

    [run]
    out = "out"
    chemistry = "white"                # white | speciated
    overwrite = false
    workers = 2
    block_size = 512                   # cells, also the output tile size
    gdal_cache_mb = 128
    layers = ["denudation", ...]       # subset of LAYERS; default all
    layout = "auto"                    # auto | cog | tiled
    compress = "deflate"               # deflate | zstd
    lithology_resampling = "auto"      # auto | nearest | mode
    continuous_resampling = "auto"     # auto | bilinear | cubic | average | nearest
    negative_runoff = "error"          # error | zero (negative runoff cells taken as 0 mm/yr)

    [hazard]
    breaks_mm_per_kyr = [5, 20, 50, 150]
    names = ["negligible", "low", "moderate", "high", "very high"]
"""

from __future__ import annotations

import dataclasses
import difflib
import math
import os
from dataclasses import dataclass
from pathlib import Path

try:  # Python 3.11+
    import tomllib
except ModuleNotFoundError:  # pragma: no cover - Python 3.10
    import tomli as tomllib

from denude.core.hazard import DEFAULT_BREAKS_MM_PER_KYR, DEFAULT_CLASS_NAMES, check_breaks
from denude.core.scenario import Scenario
from denude.errors import DenudeError, InputError, JobFileError

from denude.registry import (CHEMISTRIES, CHOICES, LAYERS, NEGATIVE_RUNOFF, PATH_FIELDS, PCO2_FROM_AET,
                             PCO2_UNITS, REFUSED_LITHOLOGY_RESAMPLING, VALUE_FIELDS)

#: Job-file sections -> {key: MapSettings field}.
SECTIONS = {
    "inputs": {
        "lithology": "lithology", "rocks": "rocks", "runoff": "runoff",
        "precipitation": "precipitation", "aet": "aet", "pco2": "pco2",
        "pco2_units": "pco2_units", "elevation": "elevation",
        "air_pressure_atm": "air_pressure_atm", "temperature": "temperature",
        "soluble_fraction": "soluble_fraction",
    },
    "grid": {"like": "grid_like", "crs": "grid_crs", "resolution": "grid_resolution", "bounds": "grid_bounds"},
    "run": {
        "out": "out", "chemistry": "chemistry", "overwrite": "overwrite", "workers": "workers",
        "block_size": "block_size", "gdal_cache_mb": "gdal_cache_mb", "layers": "layers",
        "layout": "layout", "compress": "compress",
        "lithology_resampling": "lithology_resampling",
        "continuous_resampling": "continuous_resampling",
        "negative_runoff": "negative_runoff",
    },
    "hazard": {"breaks_mm_per_kyr": "hazard_breaks_mm_per_kyr", "names": "hazard_names"},
}

#: Sections parsed elsewhere (``io/uncertainty_spec.py``): [uncertainty] is read by the
#: uncertainty run; [scenario] becomes ``MapSettings.scenario``.
OTHER_SECTIONS = ("uncertainty", "scenario")

@dataclass(frozen=True)
class MapSettings:
    """Every setting of one raster job. Paths are absolute strings; a value field holds a
    path (str) or a constant (float). Picklable, so it can be sent to worker processes."""

    lithology: str
    temperature: str | float                    # degrees C
    runoff: str | float | None = None           # mm/yr
    precipitation: str | float | None = None    # mm/yr
    aet: str | float | None = None              # actual evapotranspiration, mm/yr
    pco2: str | float | None = None             # in pco2_units, or PCO2_FROM_AET
    pco2_units: str = "atm"
    elevation: str | float | None = None        # m above sea level (ppmv -> atm)
    air_pressure_atm: float | None = None       # atm (ppmv -> atm), instead of elevation
    soluble_fraction: str | float | None = None  # 0-1, None = 1
    rocks: str | None = None
    grid_like: str | None = None
    grid_crs: str | None = None
    grid_resolution: tuple | None = None        # CRS units (x, y)
    grid_bounds: tuple | None = None            # CRS units (left, bottom, right, top)
    out: str | None = None
    chemistry: str = "white"
    overwrite: bool = False
    workers: int = 2
    block_size: int = 512                       # cells
    gdal_cache_mb: int = 128                    # MB of GDAL block cache (streaming needs few blocks; bench_map.py)
    layers: tuple = tuple(LAYERS)
    layout: str = "auto"
    compress: str = "deflate"
    lithology_resampling: str = "auto"
    continuous_resampling: str = "auto"
    negative_runoff: str = "error"              # NEGATIVE_RUNOFF
    hazard_breaks_mm_per_kyr: tuple = DEFAULT_BREAKS_MM_PER_KYR
    hazard_names: tuple = DEFAULT_CLASS_NAMES
    scenario: Scenario | None = None            # changes to the inputs (job file [scenario])
    job_file: str | None = None

    def __post_init__(self):
        check_settings(self)

    def replace(self, **changes) -> "MapSettings":
        return dataclasses.replace(self, **changes)

    def as_dict(self) -> dict:
        """JSON-ready settings (for run.json)."""
        out = {}
        for f in dataclasses.fields(self):
            value = getattr(self, f.name)
            if isinstance(value, Scenario):
                value = value.as_dict()
            out[f.name] = list(value) if isinstance(value, tuple) else value
        return out

    @property
    def pco2_from_aet(self) -> bool:
        return self.pco2 == PCO2_FROM_AET

    def input_paths(self) -> dict[str, str]:
        """Role -> path of every raster input (constants left out)."""
        roles = {"lithology": self.lithology, "grid_like": self.grid_like}
        for name in VALUE_FIELDS:
            roles[name] = getattr(self, name)
        return {k: v for k, v in roles.items() if isinstance(v, str) and v != PCO2_FROM_AET}


def is_constant(value) -> bool:
    return isinstance(value, float)


def _choice(value, choices, what):
    if value not in choices:
        close = difflib.get_close_matches(str(value), choices, n=1)
        hint = f"did you mean {close[0]!r}? " if close else ""
        raise InputError(f"{what} {value!r} is not known; {hint}use one of {', '.join(choices)}")


def check_settings(s: MapSettings) -> None:
    """One-line errors for settings that cannot work together."""
    where = f"job file {s.job_file}: " if s.job_file else ""
    _choice(s.chemistry, CHOICES["chemistry"], f"{where}chemistry")
    _choice(s.pco2_units, CHOICES["pco2_units"], f"{where}pco2 units")
    _choice(s.negative_runoff, CHOICES["negative_runoff"], f"{where}negative runoff handling")
    for layer in s.layers:
        _choice(layer, tuple(LAYERS), f"{where}layer")
    if not s.layers:
        raise InputError(f"{where}no output layers selected; choose from {', '.join(LAYERS)}")
    if s.temperature is None:
        raise InputError(f"{where}no temperature given; give --temperature as a raster (degrees C) or a number")
    if s.runoff is None and (s.precipitation is None or s.aet is None):
        raise InputError(
            f"{where}no runoff given; give --runoff (mm/yr) or both --precipitation and --aet (mm/yr)"
        )
    if s.runoff is not None and s.precipitation is not None:
        raise InputError(f"{where}both runoff and precipitation given; give --runoff or --precipitation with --aet, not both")
    if s.pco2 is None:
        raise InputError(
            f"{where}no soil PCO2 given; give --pco2 (raster or number) or --pco2 {PCO2_FROM_AET} with --aet"
        )
    if s.pco2_from_aet and s.aet is None:
        raise InputError(f"{where}--pco2 {PCO2_FROM_AET} needs --aet (actual evapotranspiration, mm/yr)")
    if s.pco2_units == "ppmv" and s.elevation is not None and s.air_pressure_atm is not None:
        raise InputError(f"{where}give either elevation or air_pressure_atm for ppmv PCO2, not both")
    if s.air_pressure_atm is not None and not (0.2 <= s.air_pressure_atm <= 1.1):
        raise InputError(f"{where}air_pressure_atm {s.air_pressure_atm} is outside 0.2-1.1 atm; give the air pressure in atm")
    grid_parts = [s.grid_crs, s.grid_resolution, s.grid_bounds]
    if any(p is not None for p in grid_parts):
        if s.grid_like is not None:
            raise InputError(f"{where}give --grid-like or --grid-crs/--grid-resolution/--grid-bounds, not both")
        missing = [name for name, value in (("--grid-crs", s.grid_crs), ("--grid-resolution", s.grid_resolution))
                   if value is None]
        if missing:
            raise InputError(
                f"{where}a target grid needs both --grid-crs and --grid-resolution; add {' and '.join(missing)} "
                "(--grid-bounds is optional: default the lithology extent)"
            )
    if not (isinstance(s.workers, int) and 1 <= s.workers <= 256):
        raise InputError(f"{where}workers {s.workers!r} must be an integer from 1 to 256")
    if not (isinstance(s.gdal_cache_mb, int) and 16 <= s.gdal_cache_mb <= 65536):
        raise InputError(f"{where}gdal_cache_mb {s.gdal_cache_mb!r} must be an integer from 16 to 65536 (MB)")
    if not (isinstance(s.block_size, int) and 16 <= s.block_size <= 8192 and s.block_size % 16 == 0):
        raise InputError(f"{where}block_size {s.block_size!r} must be a multiple of 16 from 16 to 8192 cells; e.g. 512")
    _choice(s.layout, CHOICES["layout"], f"{where}layout")
    _choice(s.compress, CHOICES["compress"], f"{where}compression")
    if s.lithology_resampling in REFUSED_LITHOLOGY_RESAMPLING:
        raise InputError(
            f"{where}lithology resampling {s.lithology_resampling!r} is refused: interpolating "
            "categorical codes invents classes; use nearest or mode (or auto)"
        )
    _choice(s.lithology_resampling, CHOICES["lithology_resampling"], f"{where}lithology resampling")
    _choice(s.continuous_resampling, CHOICES["continuous_resampling"], f"{where}continuous resampling")
    from denude.io.uncertainty_spec import scenario_problem

    problem = scenario_problem(s.scenario, s.precipitation is not None, s.aet is not None)
    if problem:
        raise InputError(f"{where}{problem}")


def _parse_value(value, field_name: str, base: Path | None):
    """A raster path (absolute str) or a float constant from a flag or job-file value."""
    if value is None:
        return None
    if isinstance(value, bool):
        raise JobFileError(f"{field_name} = {value!r} is not a path or a number")
    if isinstance(value, (int, float)):
        return float(value)
    text = str(value).strip()
    if field_name == "pco2" and text.lower() in (PCO2_FROM_AET, "aet", "brook1983"):
        return PCO2_FROM_AET
    try:
        number = float(text)
    except ValueError:
        return _parse_path(text, base)
    if not math.isfinite(number):
        raise InputError(f"{field_name} {text!r} is not a finite number; give a number or a raster path")
    return number


def _parse_path(value, base: Path | None) -> str:
    """An absolute, normalised local path; GDAL virtual paths (/vsi...) are kept verbatim
    (normalising would merge the '//' of '/vsicurl/https://...' or '/vsizip//abs/a.zip')."""
    if str(value).startswith("/vsi"):
        return str(value)
    path = Path(os.path.expanduser(str(value)))
    if not path.is_absolute():
        path = (base or Path.cwd()) / path
    return str(Path(os.path.normpath(path)))


def load_toml(path) -> dict:
    """The raw tables of a TOML job file, with one-line errors for a missing or malformed file."""
    path = Path(path)
    if not path.is_file():
        raise JobFileError(f"job file {path} not found; give the path of a TOML file")
    try:
        with path.open("rb") as handle:
            return tomllib.load(handle)
    except tomllib.TOMLDecodeError as exc:
        raise JobFileError(f"job file {path} is not valid TOML ({exc}); fix the syntax") from None
    except UnicodeDecodeError:
        raise JobFileError(f"job file {path} is not a UTF-8 text file; give a TOML file") from None


def read_job_file(path) -> dict:
    """Read a TOML job file into {MapSettings field: value}, paths resolved against its folder.
    Unknown sections or keys are errors that suggest the nearest valid name."""
    path = Path(path)
    data = load_toml(path)
    base = path.resolve().parent
    fields: dict = {"job_file": str(path.resolve())}
    all_keys = {k: sec for sec, keys in SECTIONS.items() for k in keys}
    for section, table in data.items():
        if section in OTHER_SECTIONS:
            if section == "scenario":
                from denude.io.uncertainty_spec import parse_scenario

                fields["scenario"] = parse_scenario(table, path)
            continue
        if section not in SECTIONS:
            close = difflib.get_close_matches(section, list(SECTIONS) + list(OTHER_SECTIONS), n=1)
            if not isinstance(table, dict) and section in all_keys:
                hint = f"put it under [{all_keys[section]}]"
            else:
                hint = f"did you mean [{close[0]}]?" if close else f"use one of {', '.join('[' + s + ']' for s in (*SECTIONS, *OTHER_SECTIONS))}"
            raise JobFileError(f"job file {path}: unknown section or key {section!r}; {hint}")
        if not isinstance(table, dict):
            raise JobFileError(f"job file {path}: {section!r} must be a [{section}] table")
        for key, value in table.items():
            if key not in SECTIONS[section]:
                if key in all_keys:
                    hint = f"it belongs in [{all_keys[key]}]"
                else:
                    close = difflib.get_close_matches(key, list(SECTIONS[section]) + list(all_keys), n=1)
                    hint = f"did you mean {close[0]!r}?" if close else f"valid keys: {', '.join(SECTIONS[section])}"
                raise JobFileError(f"job file {path}: unknown key {key!r} in [{section}]; {hint}")
            name = SECTIONS[section][key]
            fields[name] = _coerce(name, value, base, f"job file {path}: [{section}] {key}")
    return fields


def _coerce(name: str, value, base: Path | None, where: str):
    """Convert one raw value (TOML or flag) to the MapSettings field type."""
    try:
        if name in VALUE_FIELDS:
            return _parse_value(value, name, base)
        if name in PATH_FIELDS:
            if not isinstance(value, (str, os.PathLike)):
                raise JobFileError(f"{where} = {value!r} must be a path (a string)")
            return _parse_path(value, base)
        if name in ("grid_resolution",):
            vals = value if isinstance(value, (list, tuple)) else [value]
            vals = tuple(float(v) for v in vals)
            if len(vals) == 1:
                vals = vals * 2
            if len(vals) != 2:
                raise ValueError
            return vals
        if name == "grid_bounds":
            vals = tuple(float(v) for v in value)
            if len(vals) != 4:
                raise ValueError
            return vals
        if name == "grid_crs":
            return str(value)
        if name in ("workers", "block_size", "gdal_cache_mb"):
            if isinstance(value, bool) or (isinstance(value, float) and not value.is_integer()):
                raise ValueError
            return int(value)
        if name == "air_pressure_atm":
            return float(value)
        if name == "overwrite":
            if not isinstance(value, bool):
                raise ValueError
            return value
        if name == "layers":
            items = value.split(",") if isinstance(value, str) else list(value)
            return tuple(str(v).strip() for v in items if str(v).strip())
        if name == "hazard_breaks_mm_per_kyr":
            return tuple(float(v) for v in value)
        if name == "hazard_names":
            return tuple(str(v) for v in value)
        if name in CHOICES:
            return str(value).strip().lower()
    except DenudeError:
        raise
    except (TypeError, ValueError):
        raise JobFileError(f"{where} = {value!r} has the wrong type or length; see `denude map --help`") from None
    return value


def build_settings(flags: dict | None = None, job_file=None) -> MapSettings:
    """MapSettings from a job file (optional) overridden by flags ({field: value}, None = not
    given). Flag paths resolve against the current folder."""
    values: dict = {}
    if job_file is not None:
        values.update(read_job_file(job_file))
    for name, value in (flags or {}).items():
        if value is None:
            continue
        values[name] = _coerce(name, value, None, f"--{name.replace('_', '-')}")
    if "lithology" not in values:
        raise InputError("no lithology raster given; give --lithology L.tif (or lithology in the job file's [inputs])")
    if "temperature" not in values:
        raise InputError("no temperature given; give --temperature as a raster (degrees C) or a number")
    breaks = values.get("hazard_breaks_mm_per_kyr", DEFAULT_BREAKS_MM_PER_KYR)
    names = values.get("hazard_names")
    if names is None:
        names = DEFAULT_CLASS_NAMES if len(breaks) == len(DEFAULT_BREAKS_MM_PER_KYR) else tuple(
            f"class {i}" for i in range(len(breaks) + 1))
        values["hazard_names"] = tuple(names)
    check_breaks(breaks, names)
    if values.get("pco2") is None and values.get("aet") is not None:
        values["pco2"] = PCO2_FROM_AET
    return MapSettings(**values)
