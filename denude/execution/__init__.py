"""The execution layer's public face: what the CLI and the library call.

The CLI imports run entry points from here only, so modules inside ``denude.execution``
can move without touching the commands. Names are imported on first use (PEP 562), so
`denude map` does not load the batch and summary modules (and numba with them) before it
starts work: numba then loads on a background thread while the inputs are checked.
"""

import importlib

#: Public name -> the module of ``denude.execution`` that defines it.
_HOMES = {
    "inspect_job": "raster_job",
    "limit_malloc_arenas": "raster_job",
    "resolve_grid": "raster_job",
    "run_map": "raster_job",
    "summarize_outputs": "summaries",
    "ZoneSpec": "batch",
    "run_batch": "batch",
    "DEFAULT_TILE_SIZE": "tiling",
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
