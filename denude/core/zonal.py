"""Per-zone partial sums of the denudation maps, mergeable across tiles. numpy and numba, no I/O.

Every cell enters a zone with a weight ``w = coverage fraction x cell area [km2]``. The
accumulator keeps, per zone, float64 sums that add exactly across blocks and tiles:

* areas [km2]: all cells, cells with a valid rate, soluble rock, per hazard class, per rock row;
  with a covered-karst class per cell (``denude.core.cover``), soluble rock under cover and
  exposed soluble rock (weighted by the soluble fraction, like the soluble area);
* cell counts (cells with coverage > 0, whole cells, valid rate or nodata rate);
* sum(w*D), sum(w*D**2), min(D), max(D) of the rate D [mm/kyr];
* sum(w*D) [m3/yr, since 1 mm/kyr over 1 km2 is 1 m3/yr], sum(w*D*density) [t/yr],
  sum(w*CO2) [t/yr];
* a weighted histogram of D on fixed bins (``RATE_BIN_EDGES_MM_PER_KYR``), for percentiles
  (bins, resolution and percentiles: ``denude.core.rate_histogram``);
* sinkhole points: count, count with a valid rate, sum of their rates.

The per-cell pass is one compiled loop (numba, releases the GIL) over (zone, cell) pairs;
memory: n_zones x 4003 float64 for the histogram while that is at most 2**25 entries
(256 MiB, i.e. up to ~8000 zones), else a sparse histogram (sorted keys) sized by the
(zone, bin) pairs actually present.
"""

from __future__ import annotations

import math

import numba
import numpy as np

from denude.core.hazard import HIGHEST_CLASS_MIN_SHARE
# the histogram bins and percentiles live in core/rate_histogram.py; re-exported for the old import path
from denude.core.rate_histogram import (_F32_BIN_TABLE, _INV_LOG_STEP, _LOG_LOW, _LOWER, _UPPER,  # noqa: F401
                                        N_RATE_BINS, PERCENTILE_RELATIVE_RESOLUTION, RATE_BIN_EDGES_MM_PER_KYR,
                                        RATE_BIN_HIGH_MM_PER_KYR, RATE_BIN_LOW_MM_PER_KYR, RATE_LOG_BINS,
                                        PERCENTILES, _rate_bin, _rate_bin_float32, histogram_percentiles,
                                        rate_bin_index)
# the summary columns of finalize live in core/zone_columns.py
from denude.core.zone_columns import column_label, zone_columns  # noqa: F401
from denude.core.rate_histogram import group_bounds as _group_bounds  # noqa: F401


#: Above this many zone x bin entries the histogram is kept sparse (sorted keys).
DENSE_HISTOGRAM_LIMIT = 1 << 25


@numba.njit(cache=True, nogil=True, error_model="numpy")
def _accumulate(run_zone, run_start, cell, cov, row_area, width, rate, rate_bits, bin_table, upper, fraction, co2,
                hazard, litho, codes, code_table, density_cell, density_rock, n_classes, n_rocks, edges, log_low, inv_step,
                area, valid_area, soluble_area, s_wr, s_wr2, s_wrd, s_co2, vmin, vmax,
                valid_cells, nodata_cells, class_area, rock_area, hist, bins,
                cover_class, covered_area, exposed_area):
    """One pass over (zone, cell) pairs, adding into the accumulator arrays in place. The
    pairs come in runs of one zone: run k holds pairs ``run_start[k]:run_start[k + 1]`` of
    zone ``run_zone[k]``; a run's sums are kept in local variables first. ``rate_bits`` is
    the float32 rate viewed as uint32 (empty for float64 rates: bins then come from log10);
    ``code_table[code - codes[0]]`` is a code's rock row when the codes span a short range
    (empty otherwise: binary search). ``cover_class`` (empty: none) is the covered-karst class
    per cell: class 2 adds w x soluble fraction to ``covered_area``, class 1 to ``exposed_area``.

    Long on purpose: the compiled numba loop over every (zone, cell) pair. All sums of a run
    stay in local variables of one body so numba keeps them in registers and each cell is read
    once; splitting it would add passes over the cells or calls per cell."""
    dense = bins.size == 0
    n_codes = codes.size
    n_bins = upper.size
    by_bits = rate_bits.size > 0
    by_table = code_table.size > 0
    code_lo = codes[0] if n_codes > 0 else 0
    per_row = row_area.size > 1
    has_fraction = fraction.size > 0
    has_co2 = co2.size > 0
    has_hazard = hazard.size > 0
    has_litho = litho.size > 0
    has_dcell = density_cell.size > 0
    has_drock = density_rock.size > 0
    has_cover = cover_class.size > 0
    for k in range(run_zone.size):
        z = run_zone[k]
        t_area = 0.0
        t_valid = 0.0
        t_sol = 0.0
        t_covered = 0.0
        t_exposed = 0.0
        t_co2 = 0.0
        t_wr = 0.0
        t_wr2 = 0.0
        t_wrd = 0.0
        t_min = vmin[z]
        t_max = vmax[z]
        n_valid = 0
        n_nodata = 0
        for i in range(run_start[k], run_start[k + 1]):
            w = cov[i]
            if not w > 0.0:
                if not dense:
                    bins[i] = -1
                continue
            c = cell[i]
            if per_row:
                w *= row_area[c // width]
            else:
                w *= row_area[0]
            t_area += w
            if has_fraction:
                f = fraction[c]
                if f == f:
                    t_sol += w * f
                    if has_cover:
                        kc = cover_class[c]
                        if kc == 2:
                            t_covered += w * f
                        elif kc == 1:
                            t_exposed += w * f
            if has_co2:
                v = co2[c]
                if v == v:
                    t_co2 += w * v
            if has_hazard:
                h = hazard[c]
                if h >= 0 and h < n_classes:
                    class_area[z, h] += w
            rk = -1
            if has_litho:
                code = litho[c]
                if by_table:
                    j = code - code_lo
                    if j >= 0 and j < code_table.size:
                        rk = code_table[j]
                else:
                    lo, hi = 0, n_codes
                    while lo < hi:                      # binary search in the sorted rock codes
                        mid = (lo + hi) // 2
                        if codes[mid] < code:
                            lo = mid + 1
                        else:
                            hi = mid
                    if lo < n_codes and codes[lo] == code:
                        rk = lo
                if rk >= n_rocks:
                    rk = -1
                if rk >= 0:
                    rock_area[z, rk] += w
            r = rate[c]
            if r != r:
                n_nodata += 1
                if not dense:
                    bins[i] = -1
                continue
            n_valid += 1
            t_valid += w
            wr = w * r
            t_wr += wr
            t_wr2 += wr * r
            if has_dcell:
                d = density_cell[c]
                if d == d:
                    t_wrd += wr * d
            elif has_drock and rk >= 0:
                d = density_rock[rk]
                if d == d:
                    t_wrd += wr * d
            if r < t_min:
                t_min = r
            if r > t_max:
                t_max = r
            if r <= 0.0:
                b = 0
            elif by_bits:
                b = _rate_bin_float32(r, rate_bits[c], bin_table, upper)
            else:
                b = _rate_bin(r, edges, log_low, inv_step)
            if dense:
                hist[z, b] += w
            else:
                bins[i] = b
        area[z] += t_area
        valid_area[z] += t_valid
        soluble_area[z] += t_sol
        if has_cover:
            covered_area[z] += t_covered
            exposed_area[z] += t_exposed
        s_co2[z] += t_co2
        s_wr[z] += t_wr
        s_wr2[z] += t_wr2
        s_wrd[z] += t_wrd
        vmin[z] = t_min
        vmax[z] = t_max
        valid_cells[z] += n_valid
        nodata_cells[z] += n_nodata


_CODE_TABLE_SPAN = 1 << 16


def _code_table(codes: np.ndarray) -> np.ndarray:
    """Rock row (int32) by ``code - codes[0]`` (-1: no such code), or empty when the sorted
    ``codes`` span more than ``_CODE_TABLE_SPAN`` values."""
    if codes.size == 0 or codes[-1] - codes[0] >= _CODE_TABLE_SPAN:
        return np.zeros(0, np.int32)
    table = np.full(int(codes[-1] - codes[0]) + 1, -1, np.int32)
    table[codes - codes[0]] = np.arange(codes.size, dtype=np.int32)
    return table



class ZonalAccumulator:
    """Mergeable per-zone partial sums of rate [mm/kyr], areas [km2] and fluxes.

    ``add`` a block of cells, ``merge`` another accumulator over the same zones (e.g. from
    another tile), ``finalize`` to columns. Rates are cell means already scaled by the
    soluble-area fraction, as in the ``denude map`` output folder.
    """

    def __init__(self, n_zones: int, n_classes: int = 0, n_rocks: int = 0, dense_limit: int = DENSE_HISTOGRAM_LIMIT,
                 cover: bool = False):
        self.n_zones = int(n_zones)
        self.cover = bool(cover)        # the covered-karst columns are kept (the folder has the layer)
        self.n_classes = int(n_classes)
        self.n_rocks = int(n_rocks)
        n = self.n_zones
        f = lambda: np.zeros(n, np.float64)  # noqa: E731
        self.area_km2 = f()
        self.valid_area_km2 = f()
        self.soluble_area_km2 = f()
        self.covered_soluble_area_km2 = f()
        self.exposed_soluble_area_km2 = f()
        self.sum_w_rate = f()           # km2 * mm/kyr = m3/yr
        self.sum_w_rate2 = f()          # km2 * (mm/kyr)^2
        self.sum_w_rate_density = f()   # km2 * mm/kyr * t/m3 = t/yr
        self.sum_w_co2 = f()            # km2 * t/km2/yr = t/yr
        self.min_rate = np.full(n, np.inf)
        self.max_rate = np.full(n, -np.inf)
        self.valid_cells = np.zeros(n, np.int64)
        self.nodata_cells = np.zeros(n, np.int64)
        self.class_area_km2 = np.zeros((n, self.n_classes), np.float64)
        self.rock_area_km2 = np.zeros((n, self.n_rocks), np.float64)
        self.point_count = np.zeros(n, np.int64)
        self.point_valid = np.zeros(n, np.int64)
        self.point_sum_rate = f()
        self.dense = n * N_RATE_BINS <= dense_limit
        if self.dense:
            self.hist = np.zeros((n, N_RATE_BINS), np.float64)
        else:
            self.hist_keys = np.zeros(0, np.int64)
            self.hist_weights = np.zeros(0, np.float64)

    # -- accumulation -------------------------------------------------------------------
    def add(self, zone_index, weight_km2, rate_mm_per_kyr, *, soluble_fraction=None,
            co2_t_per_km2_yr=None, density_g_cm3=None, hazard_class=None, rock_index=None, covered_karst=None):
        """Add cells: zone index, weight = coverage x cell area [km2], rate [mm/kyr] (NaN =
        nodata); optional soluble-area fraction [-], CO2 drawdown [t/km2/yr], rock density
        [g/cm3 = t/m3] (NaN = unknown), hazard class (uint8, 255 = nodata) and rock row
        (-1 = none), covered-karst class (uint8: 1 exposed, 2 under cover; see ``add_runs``).
        One entry per (zone, cell) pair; cells with weight 0 are ignored."""
        zone = np.ascontiguousarray(zone_index, dtype=np.int64).ravel()
        n = zone.size
        rocks = None if rock_index is None else np.ascontiguousarray(rock_index, dtype=np.int64).ravel()
        f64 = lambda a: None if a is None else np.asarray(a, dtype=np.float64)  # noqa: E731
        return self.add_cells(
            zone, np.arange(n, dtype=np.int64), weight_km2, np.ones(1), max(n, 1), f64(rate_mm_per_kyr),
            soluble_fraction=f64(soluble_fraction), co2_t_per_km2_yr=f64(co2_t_per_km2_yr),
            hazard_class=None if hazard_class is None else np.asarray(hazard_class, dtype=np.int64),
            lithology_code=rocks,
            rock_codes=np.arange(self.n_rocks, dtype=np.int64) if rocks is not None else None,
            density_g_cm3=density_g_cm3, covered_karst=covered_karst,
        )

    def add_cells(self, zone_index, cell_index, coverage, cell_area_km2_by_row, width, rate_mm_per_kyr, **layers):
        """Add (zone, cell) pairs of one block: ``zone_index`` per pair; see ``add_runs``."""
        zone = np.ascontiguousarray(zone_index, dtype=np.int64).ravel()
        starts, run_zone = _group_bounds(zone)
        return self.add_runs(run_zone, np.r_[starts, zone.size], cell_index, coverage,
                             cell_area_km2_by_row, width, rate_mm_per_kyr, **layers)

    def add_runs(self, run_zone, run_start, cell_index, coverage, cell_area_km2_by_row, width, rate_mm_per_kyr, *,
                 soluble_fraction=None, co2_t_per_km2_yr=None, hazard_class=None, lithology_code=None,
                 rock_codes=None, rock_density_g_cm3=None, density_g_cm3=None, covered_karst=None):
        """Add (zone, cell) pairs of one block in one compiled pass. The pairs come in runs:
        pairs ``run_start[k]:run_start[k + 1]`` belong to zone ``run_zone[k]``
        (``run_start`` has one entry more than ``run_zone``).

        ``cell_index`` (int32 or int64) indexes the flat (row-major, ``width`` columns) block arrays: rate
        [mm/kyr] (NaN = nodata), soluble-area fraction [-], CO2 drawdown [t/km2/yr], hazard
        class (255 = nodata) and lithology code. The weight of a pair is ``coverage`` [0-1]
        x ``cell_area_km2_by_row[cell // width]`` (a length-1 array: the same for all rows).
        A lithology code's rock row is its position in the sorted ``rock_codes`` (-1 if
        absent); its density [g/cm3] is ``rock_density_g_cm3[row]``, or ``density_g_cm3``
        gives a density per cell directly. ``covered_karst``: the covered-karst class per cell
        (uint8, ``denude.core.cover``; used with the soluble fraction, only by an accumulator
        made with ``cover=True``)."""
        e = np.zeros(0, np.float64)
        ei = np.zeros(0, np.int64)
        arr = lambda a, dt: e if a is None else np.ascontiguousarray(a, dtype=dt).ravel()  # noqa: E731
        run_zone = np.ascontiguousarray(run_zone, dtype=np.int64).ravel()
        run_start = np.ascontiguousarray(run_start, dtype=np.int64).ravel()
        cell = np.ascontiguousarray(cell_index).ravel()
        if cell.dtype not in (np.int32, np.int64):
            cell = cell.astype(np.int64)
        cov = np.ascontiguousarray(coverage, dtype=np.float64).ravel()
        rate = np.ascontiguousarray(rate_mm_per_kyr).ravel()
        if rate.dtype not in (np.float32, np.float64):
            rate = rate.astype(np.float64)
        hazard = ei if hazard_class is None or not self.n_classes else np.ascontiguousarray(hazard_class).ravel()
        litho = ei if lithology_code is None or not self.n_rocks else np.ascontiguousarray(lithology_code).ravel()
        codes = ei if rock_codes is None else np.ascontiguousarray(rock_codes, dtype=np.int64).ravel()
        fraction = e if soluble_fraction is None else np.ascontiguousarray(soluble_fraction).ravel()
        co2 = e if co2_t_per_km2_yr is None else np.ascontiguousarray(co2_t_per_km2_yr).ravel()
        cover_class = (np.zeros(0, np.uint8) if covered_karst is None or not self.cover
                       else np.ascontiguousarray(covered_karst, dtype=np.uint8).ravel())
        if run_start.size != run_zone.size + 1 or (run_start.size and (run_start[0] != 0 or run_start[-1] != cell.size)) \
                or cov.size != cell.size or np.any(np.diff(run_start) < 0):
            raise ValueError("zone runs do not cover the pair arrays, or pair arrays of different lengths")
        if cell.size == 0:
            return self
        if (run_zone.min() < 0 or run_zone.max() >= self.n_zones or cell.min() < 0 or cell.max() >= rate.size):
            raise ValueError("zone or cell index out of range")
        hist = self.hist if self.dense else np.zeros((1, 1))
        bins = np.empty(0 if self.dense else cell.size, np.int64)
        rate_bits = rate.view(np.uint32) if rate.dtype == np.float32 else np.zeros(0, np.uint32)
        _accumulate(
            run_zone, run_start, cell, cov, np.ascontiguousarray(cell_area_km2_by_row, dtype=np.float64).ravel(), int(width),
            rate, rate_bits, _F32_BIN_TABLE, _UPPER, fraction, co2, hazard, litho, codes, _code_table(codes),
            arr(density_g_cm3, np.float64),
            arr(rock_density_g_cm3, np.float64), self.n_classes, self.n_rocks,
            RATE_BIN_EDGES_MM_PER_KYR, _LOG_LOW, _INV_LOG_STEP,
            self.area_km2, self.valid_area_km2, self.soluble_area_km2, self.sum_w_rate, self.sum_w_rate2,
            self.sum_w_rate_density, self.sum_w_co2, self.min_rate, self.max_rate, self.valid_cells,
            self.nodata_cells, self.class_area_km2, self.rock_area_km2, hist, bins,
            cover_class, self.covered_soluble_area_km2, self.exposed_soluble_area_km2,
        )
        if not self.dense:
            ok = bins >= 0
            zone = np.repeat(run_zone, np.diff(run_start))[ok]
            weights = cov[ok] * (np.asarray(cell_area_km2_by_row, np.float64).ravel()[cell[ok] // int(width)]
                                 if np.size(cell_area_km2_by_row) > 1 else float(np.ravel(cell_area_km2_by_row)[0]))
            self._sparse_add(zone * N_RATE_BINS + bins[ok], weights)
        return self

    def _sparse_add(self, keys, weights):
        keys = np.concatenate((self.hist_keys, keys))
        weights = np.concatenate((self.hist_weights, weights))
        uniq, inverse = np.unique(keys, return_inverse=True)
        self.hist_keys = uniq
        self.hist_weights = np.bincount(inverse.ravel(), weights, uniq.size)

    def add_points(self, zone_index, rate_mm_per_kyr):
        """Add sampled points (e.g. sinkholes): zone index per (point, zone) pair and the rate
        [mm/kyr] at the point (NaN = nodata)."""
        zone = np.asarray(zone_index, dtype=np.int64).ravel()
        rate = np.asarray(rate_mm_per_kyr, dtype=np.float64).ravel()
        valid = ~np.isnan(rate)
        n = self.n_zones
        self.point_count += np.bincount(zone, minlength=n)
        self.point_valid += np.bincount(zone[valid], minlength=n)
        self.point_sum_rate += np.bincount(zone[valid], rate[valid], n)
        return self

    # -- merging and state ----------------------------------------------------------------
    _SUMS = ("area_km2", "valid_area_km2", "soluble_area_km2", "sum_w_rate", "sum_w_rate2",
             "sum_w_rate_density", "sum_w_co2", "valid_cells", "nodata_cells", "class_area_km2",
             "rock_area_km2", "point_count", "point_valid", "point_sum_rate",
             "covered_soluble_area_km2", "exposed_soluble_area_km2")

    def merge(self, other: "ZonalAccumulator") -> "ZonalAccumulator":
        """Add another accumulator over the same zones (e.g. another tile) into this one."""
        if (other.n_zones, other.n_classes, other.n_rocks) != (self.n_zones, self.n_classes, self.n_rocks):
            raise ValueError("cannot merge zonal partials over different zones, classes or rocks")
        if other.cover != self.cover:
            raise ValueError("cannot merge zonal partials with and without the covered-karst layer")
        for name in self._SUMS:
            getattr(self, name).__iadd__(getattr(other, name))
        np.minimum(self.min_rate, other.min_rate, out=self.min_rate)
        np.maximum(self.max_rate, other.max_rate, out=self.max_rate)
        if self.dense and other.dense:
            self.hist += other.hist
        else:
            keys, weights = other._hist_sparse()
            if self.dense:
                self.hist.ravel()[keys] += weights  # keys are unique
            else:
                self._sparse_add(keys, weights)
        return self

    def _hist_sparse(self):
        """Histogram as (sorted unique keys zone*N_RATE_BINS+bin, weights [km2])."""
        if self.dense:
            flat = self.hist.ravel()
            keys = np.flatnonzero(flat)
            return keys, flat[keys]
        return self.hist_keys, self.hist_weights

    def state(self) -> dict:
        """Partial sums as plain arrays (e.g. for ``np.savez``); see ``from_state``."""
        out = {name: getattr(self, name) for name in self._SUMS}
        out["min_rate"], out["max_rate"] = self.min_rate, self.max_rate
        out["hist_keys"], out["hist_weights"] = self._hist_sparse()
        out["shape"] = np.array([self.n_zones, self.n_classes, self.n_rocks], np.int64)
        out["cover"] = np.array([int(self.cover)], np.int64)
        return out

    @classmethod
    def from_state(cls, state) -> "ZonalAccumulator":
        n_zones, n_classes, n_rocks = (int(v) for v in state["shape"])
        cover = bool(int(np.ravel(state["cover"])[0])) if "cover" in state else False
        acc = cls(n_zones, n_classes, n_rocks, dense_limit=-1, cover=cover)
        for name in cls._SUMS + ("min_rate", "max_rate"):
            if name in state:       # partials written before a sum existed keep its zeros
                setattr(acc, name, np.array(state[name], copy=True))
        acc.hist_keys = np.array(state["hist_keys"], np.int64)
        acc.hist_weights = np.array(state["hist_weights"], np.float64)
        return acc

    # -- results ------------------------------------------------------------------------
    def percentiles(self, percents=PERCENTILES) -> np.ndarray:
        """Area-weighted percentiles of the rate [mm/kyr], shape (n_zones, len(percents));
        NaN for zones without valid cells. Resolution: see the module docstring."""
        keys, weights = self._hist_sparse()
        return histogram_percentiles(keys, weights, self.min_rate, self.max_rate, self.n_zones, percents)

    def finalize(self, class_names=None, rock_names=None, with_points=None,
                 highest_min_share=HIGHEST_CLASS_MIN_SHARE) -> dict[str, np.ndarray]:
        """Columns per zone (name -> array), units in the names. ``class_names`` label the
        hazard columns, ``rock_names`` the rock rows (for ``dominant_rock``); sinkhole columns
        appear if ``with_points`` (default: if any point was added). ``hazard_dominant_*`` is
        the class of largest area, ``hazard_highest_*`` the highest class covering at least
        ``highest_min_share`` (0-1) of ``area_km2``; ``hazard_max_*`` (any single cell) is
        deprecated and kept one release. With ``cover``: ``covered_soluble_area_km2`` and
        ``exposed_soluble_area_km2`` (soluble area under cover / exposed, km2) and
        ``covered_soluble_share`` (covered / (covered + exposed); soluble cells of unknown cover
        are in neither)."""
        return zone_columns(self, class_names, rock_names, with_points, highest_min_share)
