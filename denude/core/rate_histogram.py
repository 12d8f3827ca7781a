"""The fixed rate histogram of the zone summaries and its weighted percentiles. numpy and
numba, no I/O.

Percentile resolution: bin 0 holds exact zeros (insoluble rock), bin 1 holds (0, 0.01)
mm/kyr, then 4000 log-spaced bins from 0.01 to 10000 mm/kyr (each 0.35 % wide), and a last
bin for rates >= 10000 mm/kyr. Inside a bin the weight is spread uniformly between the bin
edges clipped to the zone's exact min and max, so a percentile is within one bin width
(0.35 % of the value, or 0.01 mm/kyr below 0.01 mm/kyr) of the exact weighted percentile,
and exact for a zone of constant rate.
"""

from __future__ import annotations

import math

import numba
import numpy as np

#: Lower edge of the log-spaced bins [mm/kyr]; below it (but > 0) is one bin.
RATE_BIN_LOW_MM_PER_KYR = 0.01
#: Upper edge of the log-spaced bins [mm/kyr]; at or above it is one overflow bin.
RATE_BIN_HIGH_MM_PER_KYR = 10000.0
#: Number of log-spaced bins between the low and high edges.
RATE_LOG_BINS = 4000
#: Edges of the log-spaced bins [mm/kyr] (RATE_LOG_BINS + 1 values).
RATE_BIN_EDGES_MM_PER_KYR = np.logspace(
    np.log10(RATE_BIN_LOW_MM_PER_KYR), np.log10(RATE_BIN_HIGH_MM_PER_KYR), RATE_LOG_BINS + 1
)
#: Total histogram bins: zero, (0, low), the log bins, overflow.
N_RATE_BINS = RATE_LOG_BINS + 3
#: Relative width of one log bin (the percentile resolution above 0.01 mm/kyr).
PERCENTILE_RELATIVE_RESOLUTION = float(RATE_BIN_EDGES_MM_PER_KYR[1] / RATE_BIN_EDGES_MM_PER_KYR[0] - 1)

#: Percentiles reported by ``ZonalAccumulator.finalize`` [%].
PERCENTILES = (10, 50, 90)

_LOWER = np.concatenate(([0.0, 0.0], RATE_BIN_EDGES_MM_PER_KYR))            # per bin
_UPPER = np.concatenate(([0.0], RATE_BIN_EDGES_MM_PER_KYR, [np.inf]))



_LOG_LOW = float(np.log10(RATE_BIN_LOW_MM_PER_KYR))
_INV_LOG_STEP = float(RATE_LOG_BINS / (np.log10(RATE_BIN_HIGH_MM_PER_KYR) - np.log10(RATE_BIN_LOW_MM_PER_KYR)))

#: float32 rates are binned through a table indexed by their top bits (sign, exponent and the
#: first 9 mantissa bits: buckets 0.2 % wide, narrower than a bin), then moved up to the
#: exact bin by comparing with the bin edges; the result equals ``rate_bin_index``.
_F32_SHIFT = 14


def _float32_bin_table() -> np.ndarray:
    """Bin (int16) of the lowest float32 of each top-bits bucket (positive floats only)."""
    keys = np.arange(1 << (31 - _F32_SHIFT), dtype=np.uint32)
    with np.errstate(invalid="ignore"):          # the NaN bit patterns of the last buckets
        lowest = (keys << np.uint32(_F32_SHIFT)).view(np.float32).astype(np.float64)
    lowest[~np.isfinite(lowest)] = np.inf
    return rate_bin_index(lowest).astype(np.int16)


@numba.njit(cache=True, nogil=True, error_model="numpy")
def _rate_bin(r, edges, log_low, inv_step):
    """Histogram bin of one rate [mm/kyr] >= 0 (same rule as ``rate_bin_index``)."""
    if r <= 0.0:
        return 0
    n_log = edges.size - 1
    if r < edges[0]:
        return 1
    if r >= edges[n_log]:
        return n_log + 2
    k = int((math.log10(r) - log_low) * inv_step)
    if k < 0:
        k = 0
    if k > n_log - 1:
        k = n_log - 1
    while k > 0 and r < edges[k]:
        k -= 1
    while k < n_log - 1 and r >= edges[k + 1]:
        k += 1
    return k + 2


@numba.njit(cache=True, nogil=True, error_model="numpy")
def _rate_bin_float32(r, bits, bin_table, upper):
    """Histogram bin of one float32 rate r > 0 [mm/kyr] from its bits (uint32) through the
    top-bits table, then up to the exact bin (same rule as ``rate_bin_index``)."""
    b = bin_table[bits >> 14]
    while b < upper.size - 1 and r >= upper[b]:
        b += 1
    return b


def rate_bin_index(rate_mm_per_kyr) -> np.ndarray:
    """Histogram bin (int64) of each finite, non-negative rate [mm/kyr]."""
    rate = np.asarray(rate_mm_per_kyr, dtype=np.float64)
    idx = np.searchsorted(RATE_BIN_EDGES_MM_PER_KYR, rate, side="right") + 1
    return np.where(rate <= 0.0, 0, idx).astype(np.int64)


_F32_BIN_TABLE = _float32_bin_table()
assert _F32_SHIFT == 14  # the kernel shifts by the literal 14

#: Rock codes spanning at most this many values are looked up in a table (else binary search).


def group_bounds(sorted_zone: np.ndarray):
    """Start of each run of equal zone indices in a sorted array, and the run's zone."""
    if sorted_zone.size == 0:
        return np.zeros(0, np.int64), np.zeros(0, np.int64)
    starts = np.flatnonzero(np.r_[True, sorted_zone[1:] != sorted_zone[:-1]])
    return starts, sorted_zone[starts]


def histogram_percentiles(keys, weights, min_rate, max_rate, n_zones: int, percents) -> np.ndarray:
    """Area-weighted percentiles [mm/kyr], shape (n_zones, len(percents)), of a sparse zone
    histogram: sorted unique ``keys`` (zone * N_RATE_BINS + bin) with ``weights`` [km2]; a bin's
    weight is spread uniformly between its edges clipped to the zone's ``min_rate`` and
    ``max_rate`` [mm/kyr]. NaN for zones without entries."""
    percents = np.asarray(percents, dtype=np.float64)
    out = np.full((n_zones, percents.size), np.nan)
    if keys.size == 0:
        return out
    zone = keys // N_RATE_BINS
    bins = keys % N_RATE_BINS
    starts, zones = group_bounds(zone)
    cum = np.cumsum(weights)
    before_group = np.r_[0.0, cum][starts]                  # cum at the start of each zone
    total = np.add.reduceat(weights, starts)
    group_of = np.repeat(np.arange(zones.size), np.diff(np.r_[starts, keys.size]))
    cum_in = cum - before_group[group_of]                   # cumulative weight within zone
    frac = cum_in / total[group_of]
    frac[np.r_[starts[1:] - 1, keys.size - 1]] = 1.0        # last entry of each zone
    position = group_of + frac                              # non-decreasing overall
    zmin, zmax = min_rate[zones], max_rate[zones]
    for j, p in enumerate(percents):
        q = min(max(p / 100.0, 0.0), 1.0)
        target = np.arange(zones.size) + q
        idx = np.searchsorted(position, target - 1e-12 * (q > 0), side="left")
        idx = np.minimum(np.maximum(idx, starts), np.r_[starts[1:], keys.size] - 1)
        w_bin = weights[idx]
        below = cum_in[idx] - w_bin
        t = np.clip((q * total - below) / w_bin, 0.0, 1.0)
        lo = np.clip(_LOWER[bins[idx]], zmin, zmax)
        hi = np.clip(_UPPER[bins[idx]], zmin, zmax)
        out[zones, j] = lo + t * (hi - lo)
    return out
