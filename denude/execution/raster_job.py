"""The raster job behind `denude map` and `denude check`, by its old module name.

The job now lives in one module per step: ``plan`` (rock table, grid, warp plans, readers,
layer descriptions), ``validation`` (the rule book), ``window`` (the per-window step around
``compute_block``) and ``map_run`` (the run). This module re-exports their names for callers
of the old path; new code imports from those modules or from ``denude.execution``.
"""

from denude.execution.map_run import MapRunSummary, run_map  # noqa: F401
from denude.execution.plan import (  # noqa: F401
    SOURCES, InputReaders, JobPlan, gdal_env, grid_source, limit_malloc_arenas, load_rocks, output_spec,
    plan_from_report, prepare_job, raster_roles, resolve_grid,
)
from denude.execution.validation import (  # noqa: F401
    MAX_SUPERSAMPLING, MIN_PLAUSIBLE_MAX_MM_PER_YR, NEGATIVE_RUNOFF_FIX, PLAUSIBLE, ZERO_RUNOFF_WARN_SHARE,
    InputReport, JobReport, _inspect_job, band_text, check_outputs, check_range, check_window, implausible,
    inspect_job, missing_codes_error, refuse_inputs_inside, validate_job, warn_about_counts,
)
from denude.execution.window import WindowResult, compute_window, run_window  # noqa: F401
