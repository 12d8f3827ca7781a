"""The ``[uncertainty]`` and ``[scenario]`` sections of a TOML job file.

    [uncertainty]
    runoff_sigma_ln = 0.2            # runoff times exp(N(0, sigma)): median factor 1
    pco2_sigma_log10 = 0.15          # PCO2 times 10**N(0, sigma)
    temperature_sigma_c = 1.0        # temperature plus N(0, sigma), degrees C
    cell_noise = false               # true: independent cell-level draws on top of the regional one
    [uncertainty.soil_co2]           # when PCO2 comes from AET (Brook et al. 1983)
    intercept_sigma_log10 = 0.1      # error of the intercept -3.47, log10 atm
    amplitude_sigma_log10 = 0.1      # error of the amplitude 2.09, log10 atm
    rate_sigma_ln = 0.1              # the rate 0.00172 per mm times exp(N(0, sigma))
    [uncertainty.saturation_ratio]   # uniform ranges of real / equilibrium load, 0-1; default 1
    dolomite = [0.3, 0.9]
    [uncertainty.rocks.limestone]    # uniform ranges per rock name of the rock table
    purity = [0.85, 1.0]
    density_g_cm3 = [2.5, 2.7]

    [scenario]                       # applied to the inputs of map, batch and uncertainty
    temperature_delta_c = 2.0
    precipitation_factor = 0.9       # also aet_factor, pco2_factor, runoff_factor

Every problem is a one-line ``JobFileError`` naming the file, the key and the value.
"""

from __future__ import annotations

import difflib
import math

from denude.core.constants import MINERALS
from denude.core.rocks import rock_problem
from denude.core.scenario import SCENARIO_KEYS, Scenario, scenario_problem  # noqa: F401 (re-exported)
from denude.core.uncertainty import UncertaintySpec
from denude.errors import JobFileError

#: Sections of the job file parsed here (``io.jobfile`` lets them through).
SECTIONS = ("uncertainty", "scenario")

#: [uncertainty] sigma keys -> (upper limit, unit, template example, help).
_SIGMAS = {
    "runoff_sigma_ln": (2.0, "1 (natural-log units)", 0.2,
                        "Runoff times exp(N(0, sigma)), natural-log units (median factor 1)."),
    "pco2_sigma_log10": (2.0, "log10 atm", 0.15, "Soil PCO2 times 10**N(0, sigma), log10 atm."),
    "temperature_sigma_c": (20.0, "degrees C", 1.0, "Temperature plus N(0, sigma), degrees C."),
}
_CELL_NOISE_HELP = "true: independent cell-level draws on top of the regional one."
#: [uncertainty.soil_co2] keys -> UncertaintySpec field (errors of Brook et al. 1983; units in _SOIL_UNITS).
_SOIL = {"intercept_sigma_log10": "soil_co2_intercept_sigma_log10",
         "amplitude_sigma_log10": "soil_co2_amplitude_sigma_log10",
         "rate_sigma_ln": "soil_co2_rate_sigma_ln"}
_SOIL_UNITS = {"intercept_sigma_log10": "log10 atm", "amplitude_sigma_log10": "log10 atm",
               "rate_sigma_ln": "1 (natural-log units)"}
_SOIL_HELP = {"intercept_sigma_log10": "Error of the intercept -3.47, log10 atm.",
              "amplitude_sigma_log10": "Error of the amplitude 2.09, log10 atm.",
              "rate_sigma_ln": "The rate 0.00172 per mm of AET times exp(N(0, sigma)), natural-log units."}
#: [uncertainty.rocks.NAME] keys -> (low, high, unit, template example).
_ROCK_RANGES = {"purity": (0.0, 1.0, "fraction 0-1", [0.85, 1.0]),
                "density_g_cm3": (0.5, 5.0, "g/cm3", [2.5, 2.7])}
_ROCK_KEYS = tuple(_ROCK_RANGES)
_TABLES = ("soil_co2", "saturation_ratio", "rocks")
#: The rock the template's [uncertainty.rocks.NAME] example names (one of the built-in table).
_TEMPLATE_ROCK = "limestone"
#: [scenario] template examples that differ from the neutral value (a factor on precipitation or
#: AET would need those inputs, so the template keeps the factors neutral).
_SCENARIO_EXAMPLES = {"temperature_delta_c": 2.0}


def _scenario_limits(key: str) -> tuple[float, float, str]:
    """(low, high, unit) of a [scenario] key."""
    if key == "temperature_delta_c":
        return -30.0, 30.0, "degrees C"
    return 0.0, 10.0, "times the input (1 = unchanged)"


def template_sections() -> list[tuple[str, str | None, list[tuple[str, object, str]]]]:
    """The commented [scenario] and [uncertainty] blocks of the `denude init` template, from the
    key lists this module parses with: (table header, comment or None, [(key, example, help)])."""
    scenario = [(key, _SCENARIO_EXAMPLES.get(key, neutral), f"{what[0].upper()}{what[1:]} "
                 f"({'a factor, 1 = unchanged' if unit == '1' else unit}).")
                for key, (neutral, unit, what) in SCENARIO_KEYS.items()]
    sigmas = [(key, example, help_text) for key, (_, _, example, help_text) in _SIGMAS.items()]
    sigmas.append(("cell_noise", False, _CELL_NOISE_HELP))
    return [
        ("scenario", "Changes to the inputs of map, batch and uncertainty (remove the '# ' to use).", scenario),
        ("uncertainty", "Input errors of `denude uncertainty` (zero sigmas leave an input unperturbed).", sigmas),
        ("uncertainty.soil_co2", "When PCO2 comes from AET (Brook et al. 1983).",
         [(key, 0.1, _SOIL_HELP[key]) for key in _SOIL]),
        ("uncertainty.saturation_ratio", "Uniform ranges of real / equilibrium load, 0-1, per mineral; default 1.",
         [(mineral, [0.5, 1.0], f"Range for {mineral}, fraction 0-1.") for mineral in MINERALS[1:]]),
        (f"uncertainty.rocks.{_TEMPLATE_ROCK}", "Uniform ranges per rock name of the rock table.",
         [(key, example, f"Range of {key}, {unit}.") for key, (_, _, unit, example) in _ROCK_RANGES.items()]),
    ]


def _unknown(where: str, key: str, valid) -> JobFileError:
    close = difflib.get_close_matches(key, list(valid), n=1)
    hint = f"did you mean {close[0]!r}?" if close else f"valid keys: {', '.join(valid)}"
    return JobFileError(f"{where}: unknown key {key!r}; {hint}")


def _number(where: str, key: str, value, low: float, high: float, unit: str) -> float:
    if isinstance(value, bool) or not isinstance(value, (int, float)) or not math.isfinite(value):
        raise JobFileError(f"{where} {key} = {value!r} must be a number ({unit})")
    if not (low <= value <= high):
        raise JobFileError(f"{where} {key} = {value!r} is outside {low:g} to {high:g} {unit}; give it in {unit}")
    return float(value)


def _range(where: str, key: str, value, low: float, high: float, unit: str) -> tuple[float, float]:
    if not (isinstance(value, (list, tuple)) and len(value) == 2):
        raise JobFileError(f"{where} {key} = {value!r} must be a range [low, high] ({unit})")
    lo = _number(where, key, value[0], low, high, unit)
    hi = _number(where, key, value[1], low, high, unit)
    if lo > hi:
        raise JobFileError(f"{where} {key} = {value!r} has low > high; give [low, high]")
    return lo, hi


def parse_uncertainty(table, path) -> UncertaintySpec:
    """An ``UncertaintySpec`` from the raw ``[uncertainty]`` table of job file ``path``."""
    where = f"job file {path}: [uncertainty]"
    if not isinstance(table, dict):
        raise JobFileError(f"job file {path}: 'uncertainty' must be an [uncertainty] table")
    values: dict = {}
    valid = list(_SIGMAS) + ["cell_noise"] + list(_TABLES)
    for key, value in table.items():
        if key in _SIGMAS:
            limit, unit = _SIGMAS[key][:2]
            values[key] = _number(where, key, value, 0.0, limit, unit)
        elif key == "cell_noise":
            if not isinstance(value, bool):
                raise JobFileError(f"{where} cell_noise = {value!r} must be true or false")
            values[key] = value
        elif key == "soil_co2":
            sub = _table(where, key, value)
            for k, v in sub.items():
                if k not in _SOIL:
                    raise _unknown(f"{where[:-1]}.soil_co2]", k, _SOIL)
                values[_SOIL[k]] = _number(f"{where[:-1]}.soil_co2]", k, v, 0.0, 2.0, _SOIL_UNITS[k])
        elif key == "saturation_ratio":
            sub = _table(where, key, value)
            ratios = []
            for mineral, v in sub.items():
                if mineral not in MINERALS[1:]:
                    raise _unknown(f"{where[:-1]}.saturation_ratio]", mineral, MINERALS[1:])
                ratios.append((mineral, *_range(f"{where[:-1]}.saturation_ratio]", mineral, v, 0.0, 1.0, "fraction 0-1")))
            values["saturation_ratio"] = tuple(ratios)
        elif key == "rocks":
            sub = _table(where, key, value)
            rocks = []
            for name, props in sub.items():
                inner = f"{where[:-1]}.rocks.{name}]"
                props = _table(f"{where[:-1]}.rocks]", name, props)
                for k, v in props.items():
                    if k not in _ROCK_KEYS:
                        raise _unknown(inner, k, _ROCK_KEYS)
                    lo, hi = _range(inner, k, v, *_ROCK_RANGES[k][:3])
                    if k == "purity" and lo <= 0:
                        raise JobFileError(f"{inner} purity = {v!r} must be above 0; give [low, high] in 0-1")
                    rocks.append((str(name), k, lo, hi))
            values["rocks"] = tuple(rocks)
        else:
            raise _unknown(where, key, valid)
    return UncertaintySpec(**values)


def _table(where: str, key: str, value) -> dict:
    if not isinstance(value, dict):
        raise JobFileError(f"{where} {key} = {value!r} must be a table ([{where.split('[')[-1][:-1]}.{key}])")
    return value


def check_rock_names(spec: UncertaintySpec, rocks, path) -> None:
    """Every rock named under ``[uncertainty.rocks]`` is in the rock table, and its ranges give
    valid rocks (``rocks``: a RockTable)."""
    names = [r.name for r in rocks]
    for name, key, lo, hi in spec.rocks:
        if name not in names:
            close = difflib.get_close_matches(name, names, n=1)
            hint = f"did you mean {close[0]!r}? " if close else ""
            raise JobFileError(f"job file {path}: [uncertainty.rocks.{name}] names no rock of the rock table "
                               f"({rocks.source}); {hint}use one of {', '.join(names)}")
        rock = rocks.by_name(name)
        for value in (lo, hi):
            density = value if key == "density_g_cm3" else rock.density_g_cm3
            purity = value if key == "purity" else rock.purity
            problem = rock_problem(rock.mineral, density, purity)
            if problem:
                raise JobFileError(f"job file {path}: [uncertainty.rocks.{name}] {key} {value:g}: {problem}")


def parse_scenario(table, path) -> Scenario:
    """A ``Scenario`` from the raw ``[scenario]`` table of job file ``path``."""
    where = f"job file {path}: [scenario]"
    if not isinstance(table, dict):
        raise JobFileError(f"job file {path}: 'scenario' must be a [scenario] table")
    values = {}
    for key, value in table.items():
        if key not in SCENARIO_KEYS:
            raise _unknown(where, key, SCENARIO_KEYS)
        values[key] = _number(where, key, value, *_scenario_limits(key))
    return Scenario(**values)


def read_uncertainty(path) -> UncertaintySpec:
    """The ``[uncertainty]`` section of a job file (an all-zero spec when it has none)."""
    from denude.io.jobfile import load_toml

    data = load_toml(path)
    table = data.get("uncertainty")
    return UncertaintySpec() if table is None else parse_uncertainty(table, path)
