"""`denude uncertainty`: Monte Carlo bands of the rates and what drives them, per cell and per zone.

``run_uncertainty(settings, spec, draws, seed, zones)`` validates the job like `denude map`,
then reads each window of the target grid once (one alignment, one read per input) and runs
every draw on it (``denude.core.uncertainty.draw_block``: the load table looked up again with
each draw's temperature and PCO2, never solved again). Per cell it writes the p05/p50/p95 of
the denudation rate and the CO2 drawdown over the draws; with zones it sums each draw per zone
(exactextract coverage fractions x cell areas, the pairs computed once per window and reused
for every draw) and writes per zone the p05/p50/p95 of the mean rate, rock volume, rock mass and
CO2 drawdown per year, and the first-order variance share of each perturbed input.

Random numbers are keyed on (seed, draw, global row, global column), results are written in a
fixed window order, a cell's coverage fraction does not depend on the window it is computed in
(tested) and zone sums are kept in fixed point (``exact_zeros``), whose addition is exact and
so free of order: 1 and N workers and any window size give identical files.
"""

from __future__ import annotations

import threading
import time
import warnings
from collections import deque
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass
from pathlib import Path
from typing import Callable, Optional

import numpy as np

from denude.core.kernel import BlockCounts
from denude.core.uncertainty import (
    QUANTILE_LABELS, QUANTILES, UncertaintySpec, draw_table, exact_value, exact_zeros, summary_quantiles,
    variance_shares,
)
from denude.errors import DenudeWarning, InputError
from denude.execution.blocks import block_windows
from denude.execution.engines import check_scheduler, check_workers
from denude.execution.plan import gdal_env, grid_source, prepare_job
from denude.execution.tiling import check_tile_size, make_tiles
from denude.execution.uncertainty_tiles import run_draw_tiles
from denude.execution.uncertainty_windows import (  # noqa: F401  (band_files, band_spec: names of this module)
    METHOD, DrawWorker, add_zone_partial, band_files, open_band_writers, write_bands, zone_plan,
)
from denude.execution.validation import check_window, refuse_inputs_inside, validate_job, warn_about_counts
from denude.io.grid import cell_areas_km2
from denude.io.jobfile import MapSettings
from denude.io.mosaic import is_virtual_path
from denude.io.outdir import commit_dir, make_staging_dir, raise_discarded, remove_dead_staging
from denude.io.rasters import file_sha256
from denude.io.uncertainty_spec import check_rock_names
from denude.reports.run_record import RUN_RECORD, run_record, write_run_record
from denude.reports.summary_files import layer_provenance, sidecar_head, write_summary_files, zone_table

#: Per-zone quantities (column stems) and their units.
ZONE_QUANTITIES = {
    "denudation_mean_mm_per_kyr": "mm/kyr",
    "rock_volume_m3_per_yr": "m3/yr",
    "rock_mass_t_per_yr": "t/yr",
    "co2_drawdown_t_per_yr": "t/yr",
}

ZONES_FILE = "zones_uncertainty.gpkg"
MAX_DRAWS = 100000


@dataclass
class UncertaintyRunSummary:
    """What a finished uncertainty run produced."""

    out_dir: str
    draws: int
    seed: int
    outputs: list
    counts: dict
    wall_time_s: float
    record: dict


def run_uncertainty(settings: MapSettings, spec: UncertaintySpec, draws: int, seed: int, zones=None,
                    progress: Optional[Callable[[int, int], None]] = None, tile_size: Optional[int] = None,
                    scheduler: Optional[str] = None, merge: bool = True, workers: Optional[int] = None,
                    note: Optional[Callable[[str], None]] = None) -> UncertaintyRunSummary:
    """Write the band rasters (and with ``zones``, a ``ZoneSpec``, the zone table) into
    ``settings.out``; see the module doc. ``progress(done, total)`` after each window (each
    tile with ``tile_size``: tiles of that side [cells] run as tasks on local processes, of
    ``workers`` processes, default ``settings.workers``, 0 in this process, or on the Dask
    cluster at ``scheduler``; see ``uncertainty_tiles``; ``merge=False`` keeps only the band
    VRTs over the tiles)."""

    if not (isinstance(draws, int) and 2 <= draws <= MAX_DRAWS):
        raise InputError(f"--draws {draws!r} must be an integer from 2 to {MAX_DRAWS}; e.g. 64")
    if not (isinstance(seed, int) and 0 <= seed < 2**63):
        raise InputError(f"--seed {seed!r} must be an integer from 0 to 2**63 - 1")
    if tile_size is None:
        if scheduler is not None or not merge:
            raise InputError("--scheduler and --no-merge need --tile-size; add e.g. --tile-size 4096")
        if workers is not None:
            raise InputError(f"--workers {workers} as tile processes needs --tile-size; without tiles the workers are "
                             "threads of this process: give --workers 1 or more, or add e.g. --tile-size 4096")
    else:
        check_tile_size(tile_size)
        workers = check_workers(settings.workers if workers is None else workers)
        check_scheduler(scheduler)
    started = time.perf_counter()
    tiling = (tile_size, workers, scheduler, merge, note)
    with gdal_env(settings):
        return _run(settings, spec, draws, seed, zones, progress, started, tiling)


def _run(settings, spec, n_draws, seed, zones, progress, started, tiling):
    report = validate_job(settings, for_output=True, scan=False)
    settings = report.settings          # with the input units validation resolved
    if zones is not None:
        refuse_inputs_inside({"zones": zones.path}, Path(settings.out).resolve(), "output folder")
    check_rock_names(spec, report.rocks, settings.job_file or "(none)")
    grid = report.grid
    out = Path(settings.out).resolve()
    windows = block_windows(grid.height, grid.width, settings.block_size)
    plan = prepare_job(settings, grid)
    lookup = plan.rocks.lookup()
    names = [plan.rocks.by_code(int(c)).name for c in lookup.codes]
    table = draw_table(spec, seed, n_draws, lookup.codes, lookup.mineral_index, lookup.density_g_cm3,
                       lookup.purity, names, pco2_from_aet=settings.pco2_from_aet)
    zplan = zone_plan(zones, grid) if zones is not None else None
    areas_row, area_method = cell_areas_km2(grid)
    n_zones = len(zplan.wkbs) if zplan is not None else 0
    sums = {k: exact_zeros(n_zones, n_draws) for k in ("volume", "mass", "co2")}
    valid_area = exact_zeros(n_zones, 1)
    hasher, hashes = _start_hashing(report, settings)
    tile_size, workers, scheduler, merge, note = tiling
    tiles = make_tiles(grid, tile_size) if tile_size is not None else None
    work = DrawWorker(plan, settings, spec, seed, lookup, table, zplan, grid, areas_row) if tiles is None else None
    engine = "threads in this process" if tiles is None else None

    remove_dead_staging(out.parent)
    staging = make_staging_dir(out)
    writers: dict = {}
    outputs: list = []
    try:
        if tiles is None:
            open_band_writers(writers, staging, grid, settings, report.layout, n_draws, seed)
            total, clipped, found = _compute_windows(work, windows, settings, plan, writers, sums, valid_area,
                                                     progress)
            outputs = _finish_band_writers(work, writers)
        else:
            total, clipped, found, outputs, engine = run_draw_tiles(
                staging, tiles, settings, grid, report.layout, spec, seed, n_draws, table, zplan, sums, valid_area,
                progress, workers, scheduler, merge, note)
        counts = {**total.as_dict(), "clipped_draws": int(clipped)}
        if zplan is not None:
            outputs += _write_zone_table(staging, zplan, sums, valid_area, table, area_method, settings, spec,
                                         n_draws, seed, zones)
        hasher.join()
        wall = time.perf_counter() - started
        record = run_record(
            "uncertainty", settings, report, hashes, grid, grid_source(settings), counts, outputs + [RUN_RECORD], wall,
            scenario=settings.scenario.as_dict() if settings.scenario is not None else None,
            uncertainty=spec.as_dict(), draws=n_draws, seed=seed, perturbed_inputs=list(table.input_names),
            method=METHOD, layout=report.layout, block_size=settings.block_size, blocks=len(windows),
            lithology_codes_found=sorted(found), engine=engine,
            tile_size=tile_size, tiles=len(tiles) if tiles is not None else None,
        )
        if zones is not None:
            record["zones"] = {"path": zones.path, "layer": zones.layer, "id_field": zones.id_field}
        write_run_record(staging / RUN_RECORD, record)
        commit_dir(staging, out, settings.overwrite)
    except BaseException as exc:
        if work is not None:
            work.close()
        for writer in writers.values():
            writer.abort()
        raise_discarded([(staging, out)], exc)

    _warn_about_counts(counts)
    return UncertaintyRunSummary(str(out), n_draws, seed, outputs + ["run.json"], counts, wall, record)


def _finish_band_writers(work, writers: dict) -> list:
    """Close the window readers, finish every band raster (overviews, COG copies one at a
    time) and return their file names."""
    work.close()
    for writer in writers.values():
        writer.finish()
    return [writer.close().name for writer in writers.values()]


def _warn_about_counts(counts: dict) -> None:
    """The one-line warnings of a finished run: out-of-range cells, clipped draws."""
    warn_about_counts({"out_of_range": counts["out_of_range"]})
    if counts["clipped_draws"]:
        warnings.warn(DenudeWarning(
            f"{counts['clipped_draws']} cell draws left 0-90 degrees C or 1e-8-1 atm and were clipped to that range; "
            "check the temperature and PCO2 errors under [uncertainty] if that many is unexpected"), stacklevel=3)


def _start_hashing(report, settings):
    """A daemon thread filling {path: SHA-256} of the local input files, the rock table and the
    job file while the draws run; (thread, the dict it fills)."""
    hash_paths = sorted({item.info.path for item in report.inputs.values()
                         if item.info is not None and not is_virtual_path(item.info.path)}
                        | {p for p in (settings.rocks, settings.job_file) if p})
    hashes: dict = {}
    hasher = threading.Thread(target=lambda: hashes.update({p: file_sha256(p) for p in hash_paths}), daemon=True)
    hasher.start()
    return hasher, hashes


def _compute_windows(work, windows, settings, plan, writers, sums, valid_area, progress):
    """Run ``work`` over the windows on a thread pool (at most workers + 1 in flight), check
    and write each result in order on this thread and add its zone sums into ``sums`` and
    ``valid_area``; (BlockCounts total, clipped draws, lithology codes found)."""
    total = BlockCounts()
    clipped = 0
    found: set = set()
    with ThreadPoolExecutor(max_workers=settings.workers, thread_name_prefix="denude-draws") as pool:
        pending: deque = deque()
        queue = iter(windows)
        for window in queue:
            pending.append(pool.submit(work, window))
            if len(pending) >= settings.workers + 1:
                break
        done = 0
        while pending:
            window, bands, check, n_clip, partial = pending.popleft().result()
            check_window(settings, plan, check)
            found.update(check.codes_present)
            nxt = next(queue, None)
            if nxt is not None:
                pending.append(pool.submit(work, nxt))
            write_bands(writers, bands, window)
            total = total + check.counts
            clipped += n_clip
            add_zone_partial(sums, valid_area, partial)
            done += 1
            if progress is not None:
                progress(done, len(windows))
    return total, clipped, found


def zone_columns(sums: dict, valid_area: np.ndarray, inputs: np.ndarray, input_names) -> dict:
    """Per-zone columns from per-(zone, draw) sums: ``<quantity>_p05/_p50/_p95`` and
    ``variance_share_<input>`` (of the mean rate) with their sum; NaN for zones without
    computed cells."""
    n_zones = valid_area.size
    with np.errstate(invalid="ignore", divide="ignore"):
        mean = np.where(valid_area[:, None] > 0, sums["volume"] / valid_area[:, None], np.nan)
    quantity = {"denudation_mean_mm_per_kyr": mean, "rock_volume_m3_per_yr": sums["volume"],
                "rock_mass_t_per_yr": sums["mass"], "co2_drawdown_t_per_yr": sums["co2"]}
    cols: dict = {"valid_area_km2": valid_area}
    has = valid_area > 0
    for name, values in quantity.items():
        q = np.full((len(QUANTILES), n_zones), np.nan)
        if has.any():
            q[:, has] = summary_quantiles(values[has], axis=1)
        for j, label in enumerate(QUANTILE_LABELS):
            cols[f"{name}_{label}"] = q[j]
    shares = np.full((n_zones, len(input_names)), np.nan)
    r2 = np.full(n_zones, np.nan)
    for z in np.flatnonzero(has):
        shares[z], r2[z] = variance_shares(inputs, mean[z])
    for i, name in enumerate(input_names):
        cols[f"variance_share_{name}"] = shares[:, i]
    cols["variance_share_sum"] = r2
    return cols


def _write_zone_table(staging, zplan, sums, valid_area, table, area_method, settings, spec, n_draws, seed, zones):

    cols = zone_columns({k: exact_value(v) for k, v in sums.items()}, exact_value(valid_area)[:, 0],
                        table.inputs, table.input_names)
    frame = zone_table(zplan.layer, cols, [], area_method)
    out_path = staging / ZONES_FILE
    csv_path = staging / "zones_uncertainty.csv"
    sidecar = staging / "zones_uncertainty.summary.json"
    units = {"valid_area_km2": "km2", "variance_share_*": "1 (share of the variance of the mean rate)"}
    for name, unit in ZONE_QUANTITIES.items():
        for label in QUANTILE_LABELS:
            units[f"{name}_{label}"] = unit
    meta = {
        **sidecar_head("denude uncertainty"),
        "draws": n_draws,
        "seed": seed,
        "uncertainty": spec.as_dict(),
        "scenario": settings.scenario.as_dict() if settings.scenario is not None else None,
        "perturbed_inputs": list(table.input_names),
        "method": {**METHOD, "cell_area": area_method},
        "zones": layer_provenance(zones.path, zplan.layer),
        "units": units,
    }
    write_summary_files(out_path, {"zones": frame}, {"zones": "zones"}, {"zones": csv_path}, sidecar, meta)
    return [out_path.name, csv_path.name, sidecar.name]
