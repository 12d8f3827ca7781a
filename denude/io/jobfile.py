"""Settings of a raster job (`denude map`, `denude batch`), from command-line flags and/or a TOML job file.

The job file has the sections ``[inputs]``, ``[grid]``, ``[run]``, ``[hazard]`` and ``[batch]``
(plus ``[uncertainty]`` and ``[scenario]``, parsed in ``io/uncertainty_spec.py``);
``io/job_table.py`` holds ``JOB_TABLE``, the one list of their keys (every key optional except
those a run needs; flags override the file; relative paths resolve against the job file's
folder), and the `denude init` template generated from it. This module loads and checks them
into ``MapSettings``.
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

from denude.core.cover import check_min_thickness
from denude.core.hazard import DEFAULT_BREAKS_MM_PER_KYR, DEFAULT_CLASS_NAMES, check_breaks
from denude.core.scenario import Scenario, scenario_problem
from denude.core.units import require_unit
from denude.errors import DenudeError, InputError, JobFileError
# the table and the starter files moved to io/job_table.py; re-exported for the old import path
from denude.io.job_table import (BATCH_KEYS, BATCH_PATH_KEYS, BATCH_SECTION, JOB_TABLE,  # noqa: F401
                                 JOB_TEMPLATE_NAME, OTHER_SECTIONS, ROCKS_TEMPLATE_NAME, SECTIONS, JobKey,
                                 job_template, write_starter_files)
from denude.registry import (ALL_LAYERS, CHOICES, INPUT_ROLES, LAYERS, OUTPUT_LAYERS, PATH_FIELDS,  # noqa: F401
                             PCO2_FROM_AET, REFUSED_LITHOLOGY_RESAMPLING, UNIT_FIELDS, VALUE_FIELDS,
                             default_layers)


def available_cores() -> int:
    """Cores this process may run on (``os.sched_getaffinity``; ``os.cpu_count`` where that is
    missing): the default number of parallel workers of every command."""
    try:
        return max(1, len(os.sched_getaffinity(0)))
    except AttributeError:  # pragma: no cover - not on Linux
        return max(1, os.cpu_count() or 1)



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
    pco2_units: str | None = None               # None: the raster's declared unit, else atm
    elevation: str | float | None = None        # m above sea level (ppmv -> atm)
    air_pressure_atm: float | None = None       # atm (ppmv -> atm), instead of elevation
    soluble_fraction: str | float | None = None  # 0-1, None = 1
    cover: str | float | None = None            # insoluble cover thickness, m (or a 0/1 mask); None = no cover input
    cover_min_thickness_m: float = 0.0          # m; 0 = any thickness > 0 counts as cover
    rocks: str | None = None
    grid_like: str | None = None
    grid_crs: str | None = None
    grid_resolution: tuple | None = None        # CRS units (x, y)
    grid_bounds: tuple | None = None            # CRS units (left, bottom, right, top)
    out: str | None = None
    chemistry: str = "white"
    overwrite: bool = False
    workers: int = dataclasses.field(default_factory=available_cores)  # threads
    block_size: int = 512                       # cells
    gdal_cache_mb: int = 128                    # MB of GDAL block cache (streaming needs few blocks; bench_map.py)
    layers: tuple | None = None                 # None: the default layers (+ covered_karst with a cover)
    layout: str = "auto"
    compress: str = "deflate"
    lithology_resampling: str = "auto"
    continuous_resampling: str = "auto"
    negative_runoff: str = "error"              # NEGATIVE_RUNOFF
    out_of_range: str = "error"                 # CHOICES["out_of_range"]
    below_freezing: str = "nodata"              # CHOICES["below_freezing"]
    runoff_units: str | None = None             # None: declared unit, else mm/yr
    precipitation_units: str | None = None
    aet_units: str | None = None
    temperature_units: str | None = None        # None: declared unit, else degrees C
    input_units: tuple = ()                     # resolved by validation: ((role, unit, source, declared), ...)
    hazard_breaks_mm_per_kyr: tuple = DEFAULT_BREAKS_MM_PER_KYR
    hazard_names: tuple = DEFAULT_CLASS_NAMES
    scenario: Scenario | None = None            # changes to the inputs (job file [scenario])
    job_file: str | None = None

    def __post_init__(self):
        if self.layers is None:
            object.__setattr__(self, "layers", default_layers(
                role for role in INPUT_ROLES if getattr(self, role, None) is not None))
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


#: How a choice setting is named in its messages when no flag or job key is known.
_CHOICE_WHAT = {"pco2_units": "pco2 units", "negative_runoff": "negative runoff handling",
                "out_of_range": "out-of-range handling", "below_freezing": "below-freezing handling",
                "compress": "compression", "lithology_resampling": "lithology resampling",
                "continuous_resampling": "continuous resampling"}


def _choice(value, choices, what):
    if value not in choices:
        close = difflib.get_close_matches(str(value), choices, n=1)
        hint = f"did you mean {close[0]!r}? " if close else ""
        raise InputError(f"{what} {value!r} is not known; {hint}use one of {', '.join(choices)}")


def check_choice(name: str, value, what: str | None = None) -> None:
    """The one check of a choice setting (``CHOICES[name]``, or the layer names for ``layers``):
    a one-line error naming ``what`` (the flag, the job-file key, or the setting), the nearest
    valid value and all of them."""
    what = what or _CHOICE_WHAT.get(name, name.replace("_", " "))
    if name == "layers":
        if not value:
            raise InputError(f"{what}: no output layers selected; choose from {', '.join(ALL_LAYERS)}")
        for layer in value:
            _choice(layer, tuple(ALL_LAYERS), f"{what}: layer" if what != "layers" else "layer")
        return
    if name == "lithology_resampling" and value in REFUSED_LITHOLOGY_RESAMPLING:
        raise InputError(
            f"{what} {value!r} is refused: interpolating categorical codes invents classes; use nearest "
            "or mode (or auto)"
        )
    _choice(value, CHOICES[name], what)


def check_settings(s: MapSettings) -> None:
    """One-line errors for settings that cannot work together."""
    where = f"job file {s.job_file}: " if s.job_file else ""
    for name in ("chemistry", "pco2_units", "negative_runoff", "out_of_range", "below_freezing", "layers"):
        if getattr(s, name) is not None:
            check_choice(name, getattr(s, name), where + _CHOICE_WHAT.get(name, name))
    for name, role in UNIT_FIELDS.items():
        if name != "pco2_units" and getattr(s, name) is not None:
            require_unit(role, getattr(s, name), where + name)
    for layer in s.layers:
        needs = OUTPUT_LAYERS[layer].needs
        if needs is not None and getattr(s, needs) is None:
            raise InputError(f"{where}layer {layer} needs a {needs} input; give --{needs.replace('_', '-')} "
                             f"(or {needs} in the job file's [inputs]) or drop {layer} from the layers")
    try:
        check_min_thickness(s.cover_min_thickness_m)
    except InputError as exc:
        raise InputError(f"{where}{exc}") from None
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
    if s.pco2_units in ("ppmv", None) and s.elevation is not None and s.air_pressure_atm is not None:
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
    for name in ("layout", "compress", "lithology_resampling", "continuous_resampling"):
        check_choice(name, getattr(s, name), where + _CHOICE_WHAT.get(name, name))
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


def _job_tables(path: Path) -> dict:
    """The raw tables of a job file with every section and key checked against ``JOB_TABLE``:
    an unknown name is an error that suggests the nearest valid one."""
    data = load_toml(path)
    all_keys: dict = {}
    for sec, keys in JOB_TABLE.items():
        for k in keys:
            all_keys.setdefault(k, sec)
    known = (*JOB_TABLE, *OTHER_SECTIONS)
    for section, table in data.items():
        if section in OTHER_SECTIONS:  # checked by io/uncertainty_spec.py
            continue
        if section not in JOB_TABLE:
            close = difflib.get_close_matches(section, list(known), n=1)
            if not isinstance(table, dict) and section in all_keys:
                hint = f"put it under [{all_keys[section]}]"
            else:
                hint = f"did you mean [{close[0]}]?" if close else f"use one of {', '.join('[' + s + ']' for s in known)}"
            raise JobFileError(f"job file {path}: unknown section or key {section!r}; {hint}")
        if not isinstance(table, dict):
            raise JobFileError(f"job file {path}: {section!r} must be a [{section}] table")
        for key in table:
            if key in JOB_TABLE[section]:
                continue
            if key in all_keys:
                hint = f"it belongs in [{all_keys[key]}]"
            else:
                close = difflib.get_close_matches(key, list(JOB_TABLE[section]) + list(all_keys), n=1)
                hint = f"did you mean {close[0]!r}?" if close else f"valid keys: {', '.join(JOB_TABLE[section])}"
            raise JobFileError(f"job file {path}: unknown key {key!r} in [{section}]; {hint}")
    return data


def read_job_file(path) -> dict:
    """Read a TOML job file into {MapSettings field: value}, paths resolved against its folder.
    Unknown sections or keys are errors that suggest the nearest valid name. A [batch] table is
    checked too but left to `read_batch_options` (it holds no MapSettings field)."""
    path = Path(path)
    data = _job_tables(path)
    base = path.resolve().parent
    fields: dict = {"job_file": str(path.resolve())}
    for section, table in data.items():
        if section == "scenario":
            from denude.io.uncertainty_spec import parse_scenario  # lazily: it pulls the numba kernels in

            fields["scenario"] = parse_scenario(table, path)
        if section == BATCH_SECTION or section in OTHER_SECTIONS:
            continue
        for key, value in table.items():
            name = SECTIONS[section][key]
            fields[name] = _coerce(name, value, base, f"job file {path}: [{section}] {key}")
    return fields


def read_batch_options(path) -> dict:
    """The [batch] table of a job file as {key: value} (empty without one): integers, a bool for
    ``merge``, strings, and the vector files (``BATCH_PATH_KEYS``: zones, planning units, sinkhole
    points) as absolute paths resolved against the file's folder."""
    path = Path(path)
    table = _job_tables(path).get(BATCH_SECTION, {})
    base = path.resolve().parent
    out: dict = {}
    for key, value in table.items():
        where = f"job file {path}: [{BATCH_SECTION}] {key}"
        kind = type(JOB_TABLE[BATCH_SECTION][key].example)
        if kind is int and (isinstance(value, bool) or not isinstance(value, int)):
            raise JobFileError(f"{where} = {value!r} must be an integer")
        if kind is bool and not isinstance(value, bool):
            raise JobFileError(f"{where} = {value!r} must be true or false")
        if kind is str and not isinstance(value, str):
            raise JobFileError(f"{where} = {value!r} must be a string")
        out[key] = _parse_path(value, base) if key in BATCH_PATH_KEYS else value
    return out


def _coerce(name: str, value, base: Path | None, where: str):
    """Convert one raw value (TOML or flag) to the MapSettings field type."""
    try:
        if name in UNIT_FIELDS and name != "pco2_units":
            return require_unit(UNIT_FIELDS[name], str(getattr(value, "value", value)), where).name
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
        if name == "cover_min_thickness_m":
            if isinstance(value, bool):
                raise ValueError
            return float(value)
        if name == "overwrite":
            if not isinstance(value, bool):
                raise ValueError
            return value
        if name == "layers":
            items = value.split(",") if isinstance(value, str) else list(value)
            layers = tuple(str(v).strip() for v in items if str(v).strip())
            check_choice(name, layers, where)
            return layers
        if name == "hazard_breaks_mm_per_kyr":
            return tuple(float(v) for v in value)
        if name == "hazard_names":
            return tuple(str(v) for v in value)
        if name in CHOICES:
            text = str(getattr(value, "value", value)).strip().lower()   # a str Enum member or a str
            check_choice(name, text, where)
            return text
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


