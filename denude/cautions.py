"""Cautions carried by every output (terminal, raster tags, run records, summary tables).

Plain text with no imports, so every layer can use it.
"""

CAUTION = (
    "Caution: screening estimate of potential (maximum) dissolution, not a site "
    "investigation; defer to local codes and licensed geological and geotechnical practice."
)

#: Why the rates are an upper bound; dolomite in particular.
UPPER_BOUND_NOTE = (
    "Maximum rates: runoff is assumed saturated with the mineral at the soil PCO2. Real waters "
    "are often undersaturated (dolomite dissolves slowly and rarely reaches equilibrium), so "
    "actual rates are usually lower; local conditions can concentrate dissolution far above them."
)
