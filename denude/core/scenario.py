"""Scenarios: changes applied to the inputs of a run before any rate is computed. No I/O.

A scenario is a small frozen value (picklable, hashable, recorded in run.json) holding

- ``temperature_delta_c`` [degrees C]: added to the temperature;
- ``precipitation_factor``, ``aet_factor`` [1]: multiply precipitation and actual
  evapotranspiration before runoff = P - AET is formed (and before soil PCO2 is derived from
  AET, so soil CO2 follows a changed AET);
- ``pco2_factor`` [1]: multiplies the soil PCO2, whatever its source;
- ``runoff_factor`` [1]: multiplies the runoff, whatever its source.

``apply_scenario`` is the one place these changes are made; the raster job and the
uncertainty run both call it.
"""

from __future__ import annotations

from dataclasses import asdict, dataclass, fields

import numpy as np

#: Scenario keys (job file ``[scenario]``) -> (neutral value, unit, what it changes).
SCENARIO_KEYS = {
    "temperature_delta_c": (0.0, "degrees C", "added to the temperature"),
    "precipitation_factor": (1.0, "1", "multiplies precipitation (runoff = P - AET)"),
    "aet_factor": (1.0, "1", "multiplies actual evapotranspiration (and soil PCO2 derived from it)"),
    "pco2_factor": (1.0, "1", "multiplies the soil PCO2"),
    "runoff_factor": (1.0, "1", "multiplies the runoff"),
}


@dataclass(frozen=True)
class Scenario:
    """Changes to the inputs of a run (neutral values change nothing)."""

    temperature_delta_c: float = 0.0
    precipitation_factor: float = 1.0
    aet_factor: float = 1.0
    pco2_factor: float = 1.0
    runoff_factor: float = 1.0

    def __post_init__(self):
        for f in fields(self):
            value = getattr(self, f.name)
            if not (isinstance(value, (int, float)) and not isinstance(value, bool) and np.isfinite(value)):
                raise ValueError(f"scenario {f.name} = {value!r} must be a finite number")
            if f.name.endswith("_factor") and value < 0:
                raise ValueError(f"scenario {f.name} = {value!r} must be >= 0")

    @property
    def is_neutral(self) -> bool:
        return all(getattr(self, k) == v[0] for k, v in SCENARIO_KEYS.items())

    def as_dict(self) -> dict:
        """JSON-ready values (every key, neutral ones included)."""
        return {k: float(v) for k, v in asdict(self).items()}

    def changes(self) -> dict:
        """Only the keys that differ from neutral."""
        return {k: float(getattr(self, k)) for k, v in SCENARIO_KEYS.items() if getattr(self, k) != v[0]}


def _scaled(value, factor: float):
    if value is None or factor == 1.0:
        return value
    return np.asarray(value, dtype=np.float64) * factor if not isinstance(value, float) else value * factor


def apply_scenario(scenario: Scenario | None, *, temperature_c=None, precipitation_mm_per_yr=None,
                   aet_mm_per_yr=None):
    """The raw inputs with a scenario's changes: (temperature [degrees C], precipitation
    [mm/yr], AET [mm/yr]); None stays None, arrays broadcast, NaN stays NaN. The runoff and
    PCO2 factors are applied by ``scale_runoff`` and ``scale_pco2`` once runoff and PCO2 are
    formed (runoff may come from P - AET, PCO2 from AET)."""
    if scenario is None:
        return temperature_c, precipitation_mm_per_yr, aet_mm_per_yr
    t = temperature_c
    if t is not None and scenario.temperature_delta_c != 0.0:
        t = (np.asarray(t, dtype=np.float64) + scenario.temperature_delta_c
             if not isinstance(t, float) else t + scenario.temperature_delta_c)
    return (t, _scaled(precipitation_mm_per_yr, scenario.precipitation_factor),
            _scaled(aet_mm_per_yr, scenario.aet_factor))


def scale_runoff(scenario: Scenario | None, runoff_mm_per_yr):
    """Runoff [mm/yr] times the scenario's ``runoff_factor``."""
    return runoff_mm_per_yr if scenario is None else _scaled(runoff_mm_per_yr, scenario.runoff_factor)


def scale_pco2(scenario: Scenario | None, pco2_atm):
    """PCO2 [atm] times the scenario's ``pco2_factor``."""
    return pco2_atm if scenario is None else _scaled(pco2_atm, scenario.pco2_factor)


def scenario_problem(scenario: Scenario | None, has_precipitation: bool, has_aet: bool) -> str | None:
    """Why a scenario cannot apply to a job's inputs (a factor on an input the job lacks), or None."""
    if scenario is None:
        return None
    if scenario.precipitation_factor != 1.0 and not has_precipitation:
        return ("scenario precipitation_factor needs precipitation and aet inputs (runoff = P - AET); "
                "with a runoff input use runoff_factor")
    if scenario.aet_factor != 1.0 and not has_aet:
        return "scenario aet_factor needs an aet input; give aet or remove aet_factor"
    return None
