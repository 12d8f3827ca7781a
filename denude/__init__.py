"""denude: maximum chemical denudation rates of soluble bedrock from regional rasters.

The library face (see README, "Use from Python")::

    import denude
    denude.site(temperature_c=10, pco2_atm=0.01, runoff_mm_per_yr=500)      # one site, a dict
    denude.rates(lithology, runoff, pco2, temperature)                       # numpy or xarray
    denude.run_map(denude.build_settings({...}))                             # rasters -> GeoTIFFs
    denude.summarize(outdir, zones_path, out_path=...)                       # per-zone tables
    denude.run_batch(settings, tile_size=4096)                               # tiles, pool or Dask

The package is layered: ``denude.core`` (pure numpy chemistry and job kernels, no I/O),
``denude.io`` (rasters, vectors, tables, job files), ``denude.execution`` (blocked and
tiled runs, local pool or Dask), ``denude.reports`` and ``denude.cli`` on top. Attributes
load on first use, so ``import denude`` stays cheap (no numba, rasterio or xarray).
"""

from __future__ import annotations

import importlib

__version__ = "0.1.0"

#: Public name -> module that defines it (loaded on first access).
_LAZY = {
    "site": ("denude.api", "site"),
    "rates": ("denude.api", "rates"),
    "RockTable": ("denude.core.rocks", "RockTable"),
    "run_map": ("denude.execution", "run_map"),
    "run_batch": ("denude.execution", "run_batch"),
    "summarize": ("denude.execution", "summarize_outputs"),
    "ZoneSpec": ("denude.execution", "ZoneSpec"),
    "MapSettings": ("denude.io.jobfile", "MapSettings"),
    "build_settings": ("denude.io.jobfile", "build_settings"),
    "DenudeError": ("denude.errors", "DenudeError"),
}

__all__ = ["__version__", *_LAZY]


def __getattr__(name: str):
    try:
        module, attr = _LAZY[name]
    except KeyError:
        raise AttributeError(f"module 'denude' has no attribute {name!r}") from None
    value = getattr(importlib.import_module(module), attr)
    globals()[name] = value
    return value


def __dir__():
    return sorted(set(globals()) | set(_LAZY))
