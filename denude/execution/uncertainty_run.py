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

import dataclasses
import json
import threading
import time
from collections import deque
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass
from pathlib import Path
from typing import Callable, Optional

import numpy as np

import denude
from denude.cautions import CAUTION, UPPER_BOUND_NOTE
from denude.core.kernel import BlockCounts
from denude.core.soil_co2 import soil_co2_gain
from denude.core.uncertainty import (
    NODATA,
    OUT_OF_RANGE,
    QUANTILE_LABELS,
    QUANTILES,
    UNKNOWN_CODE,
    UncertaintySpec,
    block_quantiles,
    draw_block,
    draw_table,
    exact_value,
    exact_zeros,
    summary_quantiles,
    variance_shares,
    zone_draw_sums,
)
from denude.errors import InputError
from denude.execution.blocks import block_windows
from denude.execution.plan import InputReaders, gdal_env, grid_source, output_spec, prepare_job
from denude.execution.summaries import zone_extents
from denude.execution.validation import check_window, refuse_inputs_inside, validate_job, warn_about_counts
from denude.execution.window import WindowResult
from denude.execution.window_inputs import read_window_inputs
from denude.io.coverage import coverage_pairs
from denude.io.grid import cell_areas_km2
from denude.io.outdir import commit_dir, make_staging_dir, raise_discarded, remove_dead_staging
from denude.reports.run_record import RUN_RECORD, run_record, write_run_record
from denude.reports.summary_files import layer_provenance, sidecar_head, write_summary_files, zone_table
from denude.io.jobfile import MapSettings
from denude.io.mosaic import is_virtual_path
from denude.io.rasters import RasterWriter, file_sha256
from denude.io.uncertainty_spec import check_rock_names

#: Quantity rasters of an uncertainty run: (map layer whose style they share, file stem, unit stem).
BAND_LAYERS = (("denudation", "denudation", "mm_per_kyr"), ("co2_drawdown", "co2_drawdown", "t_per_km2_yr"))

#: Per-zone quantities (column stems) and their units.
ZONE_QUANTITIES = {
    "denudation_mean_mm_per_kyr": "mm/kyr",
    "rock_volume_m3_per_yr": "m3/yr",
    "rock_mass_t_per_yr": "t/yr",
    "co2_drawdown_t_per_yr": "t/yr",
}

ZONES_FILE = "zones_uncertainty.gpkg"
MAX_DRAWS = 100000


def band_file(layer_stem: str, label: str, unit_stem: str) -> str:
    """File name of one band raster, e.g. ``denudation_p05_mm_per_kyr.tif``."""
    return f"{layer_stem}_{label}_{unit_stem}.tif"


def band_files() -> list[str]:
    """The six band rasters, in writing order."""
    return [band_file(stem, label, unit) for _, stem, unit in BAND_LAYERS for label in QUANTILE_LABELS]


METHOD = {
    "draws": ("Monte Carlo: each draw applies one regional perturbation per input (errors of a regional "
              "data set are correlated in space), plus independent cell-level draws of the runoff, PCO2 and "
              "temperature errors when cell_noise is true"),
    "random_streams": ("counter based: splitmix64 hash of (seed, draw, stream, global row, global column) to "
                       "uniforms (top 53 bits), Box-Muller to normals; independent of tiling and workers"),
    "chemistry": ("the load table of the deterministic kernel (bilinear in temperature and log10 PCO2) looked "
                  "up with each draw's temperature and PCO2; draws leaving 0-90 degrees C or 1e-8-1 atm are "
                  "clipped to the table edge and counted (counts.clipped_draws)"),
    "cell_quantiles": "per cell over the draws, linear interpolation between order statistics (numpy 'linear')",
    "zone_quantities": ("per draw: coverage fraction (exactextract) x cell area weighted sums over the zone; mean "
                        "rate = rock volume / covered area of computed cells; rock mass = volume x the draw's "
                        "bulk density of each cell's rock"),
    "zone_quantiles": "over the draws of the zone quantity, numpy 'linear' quantiles",
    "variance_share": ("first-order share of the variance of the zone's mean rate over the draws, from a "
                       "least-squares fit of the mean rate on the regional draws of each input (normal variates; "
                       "uniform values for ranges): Pratt's product measure, standardised regression coefficient "
                       "x correlation of the input with the mean rate (= the squared standardised coefficient "
                       "for uncorrelated inputs). The shares sum to the fit's R^2 (variance_share_sum); "
                       "1 - sum is what a linear fit misses (curvature, interactions, cell-level noise)"),
    "covers": ("only the listed input errors; not the structure of the model (White 1984 equilibrium, "
               "open-system CO2), not kinetics, not errors of the lithology map; rates stay an upper bound "
               "unless a saturation ratio is given"),
}


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


@dataclass
class _ZonePlan:
    layer: object            # PolygonLayer
    wkbs: np.ndarray
    bounds: np.ndarray
    nonempty: np.ndarray


def band_spec(layer: str, label: str, settings: MapSettings, draws: int, seed: int):
    """The OutputSpec of one band raster: the map layer's style (dtype, nodata, overviews, units,
    caution) with the quantile in the name, description and tags."""

    stem, unit_stem = next((s, u) for l, s, u in BAND_LAYERS if l == layer)
    base = output_spec(layer, settings)
    tags = dict(base.tags)
    prob = QUANTILES[QUANTILE_LABELS.index(label)]
    tags["quantity"] = f"{tags['quantity']}, {label} over {draws} Monte Carlo draws"
    tags.update({"quantile": f"{prob:g}", "draws": str(draws), "seed": str(seed),
                 "uncertainty_method": METHOD["cell_quantiles"], "uncertainty_covers": METHOD["covers"]})
    return dataclasses.replace(base, name=band_file(stem, label, unit_stem), tags=tuple(tags.items()),
                               description=f"{base.description} {label}")


def _zone_plan(zones, grid) -> _ZonePlan:
    from pyproj import CRS

    from denude.errors import ZoneError
    from denude.io.vectors import read_polygons

    layer = read_polygons(zones.path, zones.layer, zones.id_field, CRS.from_wkt(grid.crs.to_wkt()), what="zone")
    wkbs, bounds, inside = zone_extents(layer.geometry, grid)
    if not inside.any():
        raise ZoneError(f"{zones.path}: no zone overlaps the target grid {tuple(round(v, 6) for v in grid.bounds)}; "
                        "check the zone file and the job cover the same area")
    return _ZonePlan(layer, wkbs, bounds, inside)


def _window_extent(grid, window):
    t = grid.affine
    xmin = t.c + window.col_off * t.a
    xmax = xmin + window.width * t.a
    ytop = t.f + window.row_off * t.e
    ybot = ytop + window.height * t.e
    return xmin, ybot, xmax, ytop


def run_uncertainty(settings: MapSettings, spec: UncertaintySpec, draws: int, seed: int, zones=None,
                    progress: Optional[Callable[[int, int], None]] = None) -> UncertaintyRunSummary:
    """Write the band rasters (and with ``zones``, a ``ZoneSpec``, the zone table) into
    ``settings.out``; see the module doc. ``progress(done, total)`` after each window."""

    if not (isinstance(draws, int) and 2 <= draws <= MAX_DRAWS):
        raise InputError(f"--draws {draws!r} must be an integer from 2 to {MAX_DRAWS}; e.g. 64")
    if not (isinstance(seed, int) and 0 <= seed < 2**63):
        raise InputError(f"--seed {seed!r} must be an integer from 0 to 2**63 - 1")
    started = time.perf_counter()
    with gdal_env(settings):
        return _run(settings, spec, draws, seed, zones, progress, started)


def _run(settings, spec, n_draws, seed, zones, progress, started):
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
    zplan = _zone_plan(zones, grid) if zones is not None else None
    areas_row, area_method = cell_areas_km2(grid)
    n_zones = len(zplan.wkbs) if zplan is not None else 0
    sums = {k: exact_zeros(n_zones, n_draws) for k in ("volume", "mass", "co2")}
    valid_area = exact_zeros(n_zones, 1)
    hasher, hashes = _start_hashing(report, settings)
    work = _DrawWorker(plan, settings, spec, seed, lookup, table, zplan, grid, areas_row)

    remove_dead_staging(out.parent)
    staging = make_staging_dir(out)
    writers: dict = {}
    outputs: list = []
    try:
        _open_band_writers(writers, staging, grid, settings, report.layout, n_draws, seed)
        total, clipped, found = _compute_windows(work, windows, settings, plan, writers, sums, valid_area, progress)
        work.close()
        for writer in writers.values():
            writer.finish()
        outputs = [writer.close().name for writer in writers.values()]
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
            lithology_codes_found=sorted(found),
        )
        if zones is not None:
            record["zones"] = {"path": zones.path, "layer": zones.layer, "id_field": zones.id_field}
        write_run_record(staging / RUN_RECORD, record)
        commit_dir(staging, out, settings.overwrite)
    except BaseException as exc:
        work.close()
        for writer in writers.values():
            writer.abort()
        raise_discarded([(staging, out)], exc)

    warn_about_counts({"out_of_range": counts["out_of_range"]})
    if counts["clipped_draws"]:
        import warnings

        from denude.errors import DenudeWarning

        warnings.warn(DenudeWarning(
            f"{counts['clipped_draws']} cell draws left 0-90 degrees C or 1e-8-1 atm and were clipped to that range; "
            "check the temperature and PCO2 errors under [uncertainty] if that many is unexpected"), stacklevel=2)
    return UncertaintyRunSummary(str(out), n_draws, seed, outputs + ["run.json"], counts, wall, record)


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


def _open_band_writers(writers: dict, staging, grid, settings, layout, n_draws: int, seed: int) -> None:
    """Add one RasterWriter per (layer, quantile label) band raster, in the staging folder, to
    ``writers`` (filled as they open, so a failure aborts those already open)."""
    for layer, stem, unit in BAND_LAYERS:
        for label in QUANTILE_LABELS:
            spec_out = band_spec(layer, label, settings, n_draws, seed)
            writers[(layer, label)] = RasterWriter(staging / spec_out.name, grid, spec_out, settings.block_size,
                                                   settings.compress, layout)


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
            for layer, _, _ in BAND_LAYERS:
                for j, label in enumerate(QUANTILE_LABELS):
                    writers[(layer, label)].write(bands[layer][j], window)
            total = total + check.counts
            clipped += n_clip
            if partial is not None:
                sel, part, area = partial
                for key in sums:
                    sums[key][sel] += part[key]
                valid_area[sel] += area
            done += 1
            if progress is not None:
                progress(done, len(windows))
    return total, clipped, found


class _DrawWorker:
    """The per-window step of an uncertainty run, called from pool threads: read the window's
    inputs (one ``InputReaders`` per thread), draw, per-cell quantiles, the window's counts for
    the rule book and, with zones, its per-(zone, draw) sums."""

    def __init__(self, plan, settings, spec, seed, lookup, table, zplan, grid, areas_row):
        self.plan, self.settings, self.spec, self.seed = plan, settings, spec, seed
        self.lookup, self.table, self.zplan, self.grid = lookup, table, zplan, grid
        self.areas_row = areas_row
        self.planar = bool(np.all(areas_row == areas_row[0]))
        self._local = threading.local()
        self._lock = threading.Lock()
        self._all_readers: list = []

    def close(self) -> None:
        for readers in self._all_readers:
            readers.close()

    def _readers(self):
        readers = getattr(self._local, "readers", None)
        if readers is None:
            readers = self._local.readers = InputReaders(self.plan)
            with self._lock:
                self._all_readers.append(readers)
        return readers

    def __call__(self, window):
        settings, lookup, table = self.settings, self.lookup, self.table
        ranges: dict = {}
        inputs = read_window_inputs(self._readers(), settings, window, ranges)
        gain = soil_co2_gain(inputs.aet) if settings.pco2_from_aet else None
        block = draw_block(inputs.codes, inputs.runoff, inputs.pco2, inputs.temperature, inputs.fraction, lookup,
                           table, settings.chemistry, spec=self.spec, seed=self.seed, row0=int(window.row_off),
                           col0=int(window.col_off), soil_gain=gain, lithology_valid=inputs.valid, parallel=False)
        shape = inputs.codes.shape
        q_rate, q_co2 = block_quantiles(block, table, parallel=False)
        bands = {"denudation": q_rate.reshape((len(QUANTILES),) + shape),
                 "co2_drawdown": q_co2.reshape((len(QUANTILES),) + shape)}
        check = _window_result(window, block, inputs.codes, ranges, lookup)
        partial = self._zone_sums(window, block) if self.zplan is not None else None
        return window, bands, check, block.clipped_draws, partial

    def _zone_sums(self, window, block):
        """(zone indices, {volume, mass, co2: (zones, draws, limbs)}, covered valid area [km2]
        (zones, 1, limbs)) of the zones overlapping the window, fixed-point (``exact_zeros``),
        or None."""
        zplan, n_draws = self.zplan, self.table.density.shape[0]
        xmin, ybot, xmax, ytop = _window_extent(self.grid, window)
        b = zplan.bounds
        sel = np.flatnonzero(zplan.nonempty & (b[:, 0] < xmax) & (b[:, 2] > xmin) & (b[:, 1] < ytop) & (b[:, 3] > ybot))
        if not sel.size:
            return None
        pairs = coverage_pairs((xmin, ybot, xmax, ytop), int(window.width), int(window.height),
                               zplan.wkbs[sel], np.arange(sel.size))
        areas_row = self.areas_row
        row_area = areas_row[:1] if self.planar else areas_row[int(window.row_off):int(window.row_off + window.height)]
        part = {k: exact_zeros(sel.size, n_draws) for k in ("volume", "mass", "co2")}
        area = exact_zeros(sel.size, 1)
        zone_draw_sums(pairs.run_zone, pairs.run_start, pairs.cell, pairs.coverage,
                       np.ascontiguousarray(row_area, np.float64), int(window.width), block.rate, block.co2,
                       block.rock_row, self.table.density, part["volume"], part["mass"], part["co2"], area)
        return sel, part, area


def _window_result(window, block, codes, ranges, lookup) -> WindowResult:
    """The window's counts, rock codes present and unknown codes, for ``check_window``."""
    status = block.status
    counts = BlockCounts(cells=int(status.size), computed=int(np.count_nonzero(status == 0)),
                         nodata=int(np.count_nonzero(status == NODATA)),
                         unknown_code=int(np.count_nonzero(status == UNKNOWN_CODE)),
                         out_of_range=int(np.count_nonzero(status == OUT_OF_RANGE)))
    known = block.rock_row >= 0
    present = np.bincount(block.rock_row[known], minlength=len(lookup.codes)) > 0
    unknown = ()
    if counts.unknown_code:
        flat = codes.reshape(-1)
        unknown = tuple(int(c) for c in np.unique(flat[status == UNKNOWN_CODE]))
    return WindowResult(window, {}, counts, ranges, tuple(int(c) for c in lookup.codes[present]), unknown)


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
