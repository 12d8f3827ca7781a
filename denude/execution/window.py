"""The per-window step around ``compute_block``: read every input of one window of the target
grid through the plan's readers, convert units, run the kernel, derive the output layers.

``compute_window(settings, grid, window)`` takes only picklable arguments, so batch runners can
call it from other processes or Dask workers; ``run_window(plan, window, readers)`` is the same
step for a caller that already holds the plan.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
from rasterio.windows import Window

from denude.core.cover import classify_cover
from denude.core.kernel import BlockCounts, classify_rates, codes_and_soluble_fraction, compute_block
from denude.execution.plan import InputReaders, JobPlan, prepare_job
from denude.execution.window_inputs import read_window_inputs
from denude.io.grid import Grid
from denude.io.jobfile import MapSettings

@dataclass
class WindowResult:
    """Output arrays of one window (layer name -> array) and its cell counts."""

    window: Window
    arrays: dict
    counts: BlockCounts
    value_ranges: dict = field(default_factory=dict)   # role -> (min, max) of raster inputs read
    codes_present: tuple = ()                          # table codes found in the window
    unknown_codes: tuple = ()                          # codes not in the rock table


def compute_window(settings: MapSettings, grid: Grid, window: Window, readers: InputReaders | None = None,
                   layers=None) -> WindowResult:
    """Read every input for one window of the target grid, run ``compute_block`` and return the
    output arrays (the settings' layers unless ``layers`` names a subset) and counts.

    Takes only picklable arguments; ``readers`` (open datasets) is an optional per-thread cache.
    """
    return run_window(prepare_job(settings, grid), window, readers, layers)


def run_window(plan: JobPlan, window: Window, readers: InputReaders | None = None, layers=None) -> WindowResult:
    """``compute_window`` for a caller holding the plan (no lookup of the plan per window)."""
    settings = plan.settings
    own = readers is None
    readers = readers or InputReaders(plan)
    ranges: dict = {}
    wanted = set(layers or settings.layers)
    try:
        inputs = read_window_inputs(readers, settings, window, ranges, with_cover="covered_karst" in wanted)
    finally:
        if own:
            readers.close()
    codes, valid, fraction, cover = inputs.codes, inputs.valid, inputs.fraction, inputs.cover
    lookup = plan.rocks.lookup()
    result = compute_block(codes, inputs.runoff, inputs.pco2, inputs.temperature, lookup, settings.chemistry,
                           soluble_fraction=fraction, lithology_valid=valid, warn=False)
    result.counts.negative_runoff = inputs.negative_runoff
    result.counts.below_freezing = inputs.below_freezing
    result.counts.set_to_nodata = inputs.set_to_nodata
    with_soluble = "soluble_fraction" in wanted or "covered_karst" in wanted
    codes_present, _, soluble = codes_and_soluble_fraction(codes, valid, lookup, fraction, with_soluble)
    unknown = ()
    if result.counts.unknown_code:   # rare: name the codes (numpy)
        unknown = tuple(int(c) for c in np.unique(codes[valid & (lookup.row_index(codes) < 0)]))
    arrays = {}
    if "denudation" in wanted:
        arrays["denudation"] = result.denudation_mm_per_kyr
    if "dissolved_load" in wanted:
        arrays["dissolved_load"] = result.dissolved_load_mmol_per_l
    if "co2_drawdown" in wanted:
        arrays["co2_drawdown"] = result.co2_drawdown_t_per_km2_yr
    if "hazard" in wanted:
        arrays["hazard"] = classify_rates(result.denudation_mm_per_kyr, settings.hazard_breaks_mm_per_kyr)
    if "lithology" in wanted:
        arrays["lithology"] = codes
    if "soluble_fraction" in wanted:
        arrays["soluble_fraction"] = soluble
    if "covered_karst" in wanted:
        # the class reads the soluble fraction as written to its layer (float32), so a
        # summary of the folder sees the same cells as soluble
        if cover is None:
            raise ValueError("the covered_karst layer needs a cover input")
        arrays["covered_karst"] = classify_cover(soluble, cover, settings.cover_min_thickness_m)
    return WindowResult(window, arrays, result.counts, ranges, codes_present, unknown)


