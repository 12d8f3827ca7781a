"""The execution layer's public face: what the CLI and the library call.

The CLI imports run entry points from here only, so modules inside ``denude.execution``
can move without touching the commands.
"""

from denude.execution.batch import BatchSummary, ZoneSpec, run_batch
from denude.execution.map_run import MapRunSummary, run_map
from denude.execution.plan import limit_malloc_arenas, resolve_grid
from denude.execution.summaries import summarize_outputs
from denude.execution.tiling import DEFAULT_TILE_SIZE
from denude.execution.validation import JobReport, inspect_job, validate_job
from denude.execution.calibration import run_calibration
from denude.execution.uncertainty_run import run_uncertainty
from denude.execution.compare import run_compare

__all__ = ["DEFAULT_TILE_SIZE", "BatchSummary", "JobReport", "MapRunSummary", "ZoneSpec", "inspect_job",
           "limit_malloc_arenas", "resolve_grid", "run_batch", "run_calibration", "run_compare", "run_map",
           "run_uncertainty", "summarize_outputs", "validate_job"]
