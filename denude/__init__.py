"""denude: maximum chemical denudation rates of soluble bedrock from regional rasters.

The package is layered: ``denude.core`` (pure numpy chemistry and job kernels, no I/O),
``denude.io`` (rasters, vectors, tables, job files), ``denude.execution`` (blocked and
tiled runs, local pool or Dask), ``denude.reports`` and ``denude.cli`` on top.
"""

__version__ = "0.1.0"
