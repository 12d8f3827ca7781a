"""The execution layer's public face: what the CLI and the library call.

The CLI imports run entry points from here only, so modules inside ``denude.execution``
can move without touching the commands. Names are imported on first use (PEP 562), so
`denude map` does not load the batch, summary and uncertainty modules (and numba with them)
before it starts work: numba then loads on a background thread while the inputs are checked.
"""

import importlib

#: Public name -> the module of ``denude.execution`` that defines it.
_HOMES = {
    "inspect_job": "validation",
    "validate_job": "validation",
    "JobReport": "validation",
    "limit_malloc_arenas": "plan",
    "resolve_grid": "plan",
    "run_map": "map_run",
    "MapRunSummary": "map_run",
    "summarize_outputs": "summaries",
    "ZoneSpec": "batch",
    "run_batch": "batch",
    "BatchSummary": "batch",
    "DEFAULT_TILE_SIZE": "tiling",
    "run_calibration": "calibration",
    "run_uncertainty": "uncertainty_run",
    "run_compare": "compare",
}

__all__ = sorted(_HOMES)


def __getattr__(name: str):
    home = _HOMES.get(name)
    if home is None:
        raise AttributeError(f"module 'denude.execution' has no attribute {name!r}")
    value = getattr(importlib.import_module(f"denude.execution.{home}"), name)
    globals()[name] = value
    return value


def __dir__():
    return sorted(set(globals()) | set(_HOMES))
