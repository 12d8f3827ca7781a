"""The per-window step of `denude uncertainty`, shared by the whole-grid run and its tiles:
the band rasters' names and styles, the zone plan, and ``DrawWorker``, which reads one window
of the target grid, runs every draw on it and returns the per-cell quantiles, the window's
counts for the rule book and, with zones, its fixed-point per-(zone, draw) sums.

Windows are always windows of the *target* grid (global rows and columns): the random streams
and the coverage fractions of a cell do not depend on which tile or window holds it.
"""

from __future__ import annotations

import dataclasses
from dataclasses import dataclass

import numpy as np

from denude.core.kernel import BlockCounts
from denude.core.soil_co2 import soil_co2_gain
from denude.core.uncertainty import (
    NODATA, OUT_OF_RANGE, QUANTILE_LABELS, QUANTILES, UNKNOWN_CODE, block_quantiles, draw_block, exact_zeros,
    zone_draw_sums,
)
from denude.execution.plan import ThreadReaders, output_spec
from denude.execution.summaries import zone_extents
from denude.execution.window import WindowResult
from denude.execution.window_inputs import read_window_inputs
from denude.io.coverage import coverage_pairs
from denude.io.jobfile import MapSettings
from denude.io.rasters import RasterWriter

#: Quantity rasters of an uncertainty run: (map layer whose style they share, file stem, unit stem).
BAND_LAYERS = (("denudation", "denudation", "mm_per_kyr"), ("co2_drawdown", "co2_drawdown", "t_per_km2_yr"))


def band_file(layer_stem: str, label: str, unit_stem: str) -> str:
    """File name of one band raster, e.g. ``denudation_p05_mm_per_kyr.tif``."""
    return f"{layer_stem}_{label}_{unit_stem}.tif"


def band_files() -> list[str]:
    """The six band rasters, in writing order."""
    return [band_file(stem, label, unit) for _, stem, unit in BAND_LAYERS for label in QUANTILE_LABELS]


#: How an uncertainty run is made, stated in run.json, the zone sidecar and the band tags.
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
class ZonePlan:
    """The zones of a run on the target grid: the layer (None in tile tasks, which need only
    the geometry), WKB geometries, bounds (zones, 4) and which zones are not empty."""

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


def zone_plan(zones, grid) -> ZonePlan:
    from pyproj import CRS

    from denude.errors import ZoneError
    from denude.io.vectors import read_polygons

    layer = read_polygons(zones.path, zones.layer, zones.id_field, CRS.from_wkt(grid.crs.to_wkt()), what="zone")
    wkbs, bounds, inside = zone_extents(layer.geometry, grid)
    if not inside.any():
        raise ZoneError(f"{zones.path}: no zone overlaps the target grid {tuple(round(v, 6) for v in grid.bounds)}; "
                        "check the zone file and the job cover the same area")
    return ZonePlan(layer, wkbs, bounds, inside)


def window_extent(grid, window):
    t = grid.affine
    xmin = t.c + window.col_off * t.a
    xmax = xmin + window.width * t.a
    ytop = t.f + window.row_off * t.e
    ybot = ytop + window.height * t.e
    return xmin, ybot, xmax, ytop



class DrawWorker:
    """The per-window step of an uncertainty run, called from pool threads: read the window's
    inputs (one ``InputReaders`` per thread), draw, per-cell quantiles, the window's counts for
    the rule book and, with zones, its per-(zone, draw) sums."""

    def __init__(self, plan, settings, spec, seed, lookup, table, zplan, grid, areas_row):
        self.plan, self.settings, self.spec, self.seed = plan, settings, spec, seed
        self.lookup, self.table, self.zplan, self.grid = lookup, table, zplan, grid
        self.areas_row = areas_row
        self.planar = bool(np.all(areas_row == areas_row[0]))
        self._readers = ThreadReaders(plan)

    def close(self) -> None:
        self._readers.close()

    def __call__(self, window):
        settings, lookup, table = self.settings, self.lookup, self.table
        ranges: dict = {}
        inputs = read_window_inputs(self._readers.get(), settings, window, ranges)
        gain = soil_co2_gain(inputs.aet) if settings.pco2_from_aet else None
        block = draw_block(inputs.codes, inputs.runoff, inputs.pco2, inputs.temperature, inputs.fraction, lookup,
                           table, settings.chemistry, spec=self.spec, seed=self.seed, row0=int(window.row_off),
                           col0=int(window.col_off), soil_gain=gain, lithology_valid=inputs.valid, parallel=False)
        shape = inputs.codes.shape
        q_rate, q_co2 = block_quantiles(block, table, parallel=False)
        bands = {"denudation": q_rate.reshape((len(QUANTILES),) + shape),
                 "co2_drawdown": q_co2.reshape((len(QUANTILES),) + shape)}
        check = window_result(window, block, inputs.codes, ranges, lookup)
        partial = self._zone_sums(window, block) if self.zplan is not None else None
        return window, bands, check, block.clipped_draws, partial

    def _zone_sums(self, window, block):
        """(zone indices, {volume, mass, co2: (zones, draws, limbs)}, covered valid area [km2]
        (zones, 1, limbs)) of the zones overlapping the window, fixed-point (``exact_zeros``),
        or None."""
        zplan, n_draws = self.zplan, self.table.density.shape[0]
        xmin, ybot, xmax, ytop = window_extent(self.grid, window)
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


def window_result(window, block, codes, ranges, lookup) -> WindowResult:
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


def add_zone_partial(sums: dict, valid_area: np.ndarray, partial) -> None:
    """Add one window's (or tile's) ``(zone indices, {volume, mass, co2}, area)`` fixed-point
    sums into the run's ``sums`` and ``valid_area`` (exact integer addition: any order gives
    the same result). ``partial`` None: nothing."""
    if partial is None:
        return
    sel, part, area = partial
    for key in sums:
        sums[key][sel] += part[key]
    valid_area[sel] += area


def open_band_writers(writers: dict, folder, grid, settings: MapSettings, layout: str, n_draws: int,
                      seed: int) -> None:
    """Add one RasterWriter per (layer, quantile label) band raster of ``grid`` (the target
    grid or a tile's) in ``folder`` to ``writers``, filled as they open, so that a failure
    aborts those already open."""
    for layer, _, _ in BAND_LAYERS:
        for label in QUANTILE_LABELS:
            spec = band_spec(layer, label, settings, n_draws, seed)
            writers[(layer, label)] = RasterWriter(folder / spec.name, grid, spec, settings.block_size,
                                                   settings.compress, layout)


def write_bands(writers: dict, bands: dict, window) -> None:
    """Queue one window's quantile bands (``DrawWorker``'s ``bands``) to their writers."""
    for layer, _, _ in BAND_LAYERS:
        for j, label in enumerate(QUANTILE_LABELS):
            writers[(layer, label)].write(bands[layer][j], window)
