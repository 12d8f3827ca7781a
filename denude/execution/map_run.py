"""`denude map`: validate, then read, compute and write one window at a time (windows = output
tiles) on a thread pool, and rename the finished output folder into place.
"""

from __future__ import annotations

import threading
import time
from collections import deque
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass
from pathlib import Path
from typing import Callable

from rasterio.windows import Window

from denude.core.kernel import BlockCounts
from denude.execution.blocks import block_windows
from denude.execution.plan import ThreadReaders, gdal_env, grid_source, output_spec, plan_from_report, warm_up_kernel
from denude.execution.validation import check_window, validate_job, warn_about_counts
from denude.execution.window import WindowResult, run_window
from denude.io.grid import Grid
from denude.io.jobfile import MapSettings
from denude.io.outdir import commit_dir, make_staging_dir, raise_discarded, remove_dead_staging
from denude.io.raster_outputs import RasterWriter
from denude.io.layer_meta import write_map_styles
from denude.io.rock_csv import write_rock_table
from denude.registry import OUTPUT_LAYERS
from denude.reports.run_record import RUN_RECORD, HashJob, hashed_paths, run_record, write_run_record

# ---------------------------------------------------------------------------- the run
@dataclass
class MapRunSummary:
    """What a finished `denude map` run produced."""

    out_dir: str
    grid: Grid
    counts: BlockCounts
    outputs: list
    wall_time_s: float
    blocks: int
    layout: str
    record: dict



def run_map(settings: MapSettings, progress: Callable[[int, int], None] | None = None) -> MapRunSummary:
    """Validate, compute and write every output of a raster job into ``settings.out``.

    Windows are output tiles; ``settings.workers`` threads read and compute windows while the
    calling thread writes them in a fixed order, so any number of workers gives identical
    files. ``progress(done, total)`` is called after each window is written.
    """
    started = time.perf_counter()
    with gdal_env(settings):
        return _run_map(settings, progress, started)


def _run_map(settings: MapSettings, progress, started: float) -> MapRunSummary:
    # the load table and the compiled loop get ready while the inputs are validated
    threading.Thread(target=warm_up_kernel, args=(settings.chemistry,), name="denude-warm-up", daemon=True).start()
    report = validate_job(settings, for_output=True, scan=False)
    settings = report.settings          # with the input units validation resolved
    grid = report.grid
    out = Path(settings.out).resolve()
    windows = block_windows(grid.height, grid.width, settings.block_size)
    layers = [name for name in OUTPUT_LAYERS if name in settings.layers]
    hashes = HashJob(hashed_paths(settings, report))
    plan = plan_from_report(report)
    remove_dead_staging(out.parent)     # leftovers of killed runs (their owner process is gone)
    staging = make_staging_dir(out)
    writers: dict = {}
    readers = ThreadReaders(plan)
    try:
        for name in layers:
            writers[name] = RasterWriter(staging / OUTPUT_LAYERS[name].file, grid, output_spec(name, settings),
                                         settings.block_size, settings.compress, report.layout)
        total, found = _compute_and_write(plan, windows, layers, readers, writers, progress)
        readers.close()
        for name in layers:          # overviews / COG copies: one at a time (raster_outputs.FINISH_SLOTS)
            writers[name].finish()
        outputs = [writers[name].close().name for name in layers]
        write_rock_table(report.rocks, staging / "rocks.csv")
        outputs += ["rocks.csv", *write_map_styles(staging, settings, report.rocks, layers), RUN_RECORD]
        wall = time.perf_counter() - started
        record = run_record(
            "map", settings, report, hashes.result(), grid, grid_source(settings), total.as_dict(), outputs, wall,
            layout=report.layout, block_size=settings.block_size, blocks=len(windows),
            lithology_codes_found=sorted(found),
            validation="inputs sampled before the run; every window checked during the run",
        )
        write_run_record(staging / RUN_RECORD, record)
        commit_dir(staging, out, settings.overwrite)
    except BaseException as exc:
        readers.close()
        for writer in writers.values():
            writer.abort()
        raise_discarded([(staging, out)], exc)
    warn_about_counts(total.as_dict())
    return MapRunSummary(str(out), grid, total, outputs, wall, len(windows), report.layout, record)


def _compute_and_write(plan, windows, layers, readers: ThreadReaders, writers: dict, progress):
    """Compute windows on ``settings.workers`` threads (at most two per thread in flight) and
    write them in window order on this thread. Returns (total counts, table codes found)."""
    settings = plan.settings

    def work(window: Window) -> WindowResult:
        return run_window(plan, window, readers.get(), layers)

    total = BlockCounts()
    found: set = set()
    in_flight = 2 * settings.workers
    with ThreadPoolExecutor(max_workers=settings.workers, thread_name_prefix="denude-window") as pool:
        pending: deque = deque()
        queue = iter(windows)
        for window in queue:
            pending.append(pool.submit(work, window))
            if len(pending) >= in_flight:
                break
        done = 0
        while pending:
            result = pending.popleft().result()
            check_window(settings, plan, result)
            found.update(result.codes_present)
            nxt = next(queue, None)
            if nxt is not None:
                pending.append(pool.submit(work, nxt))
            for name, array in result.arrays.items():
                writers[name].write(array, result.window)
            total = total + result.counts
            done += 1
            if progress is not None:
                progress(done, len(windows))
    return total, found
