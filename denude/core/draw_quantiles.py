"""Per-cell and per-zone quantiles over the draws of the uncertainty run (numba loops), and
``twin``, the serial copy of a parallel numba function with cache entries of its own. No I/O.
"""

from __future__ import annotations

import math

import numba
import numpy as np

from denude.core import fast_kernel as _fk  # noqa: F401  (sets numba's threading layer first)

#: Quantiles written per cell and per zone [probability].
QUANTILES = (0.05, 0.50, 0.95)
QUANTILE_LABELS = ("p05", "p50", "p95")


def twin(func, suffix: str):
    """A copy of ``func`` under another name. numba keys its on-disk cache by the function's
    name and signature, not by the parallel flag, so a serial and a parallel build of one
    function would be taken for each other (and a "serial" call from a worker thread would
    enter the threading layer); a twin gets cache entries of its own."""
    import types

    name = func.__name__ + suffix
    code = func.__code__.replace(co_name=name, co_qualname=name)
    copy = types.FunctionType(code, func.__globals__, name, func.__defaults__, func.__closure__)
    copy.__qualname__ = name
    return copy


# ------------------------------------------------------------------------- quantiles
#: Cells per chunk of the quantile loop (one scratch buffer per chunk).
_QUANTILE_CHUNK = 1024


@numba.njit(cache=True, nogil=True)
def _sorted_quantiles(values, k, buf, perm, probs, out):
    """Quantiles of values[k, :] into out[:, k]; buf and perm are scratch, perm carrying the
    previous cell's order: insertion sort from it moves few elements when neighbouring cells
    order their draws alike (regional draws), and the sorted values do not depend on it."""
    m = values.shape[1]
    for i in range(m):
        buf[i] = values[k, perm[i]]
    for i in range(1, m):
        v = buf[i]
        pv = perm[i]
        j = i - 1
        while j >= 0 and buf[j] > v:
            buf[j + 1] = buf[j]
            perm[j + 1] = perm[j]
            j -= 1
        buf[j + 1] = v
        perm[j + 1] = pv
    for j in range(probs.shape[0]):
        h = (m - 1) * probs[j]
        lo = int(math.floor(h))
        hi = min(lo + 1, m - 1)
        a = np.float64(buf[lo])
        out[j, k] = a + (h - lo) * (np.float64(buf[hi]) - a)


def _quantiles(values, probs, out, follow, rock_row, row_ratio, out_follow):
    """Per-cell quantiles of ``values`` into ``out``; with ``follow`` also those of a second
    (cells, draws) array ``out_follow``: where its ratio to ``values`` is one constant per
    rock (``row_ratio`` finite) they are the first quantiles times it, else sorted anew."""
    n = values.shape[0]
    m = values.shape[1]
    n_chunks = (n + _QUANTILE_CHUNK - 1) // _QUANTILE_CHUNK
    for c in numba.prange(n_chunks):
        buf = np.empty(m, np.float32)
        perm = np.arange(m)
        perm2 = np.arange(m)
        for k in range(c * _QUANTILE_CHUNK, min(n, (c + 1) * _QUANTILE_CHUNK)):
            if m == 0 or math.isnan(values[k, 0]):
                for j in range(probs.shape[0]):
                    out[j, k] = np.nan
                    if follow.shape[0]:
                        out_follow[j, k] = np.nan
                continue
            _sorted_quantiles(values, k, buf, perm, probs, out)
            if follow.shape[0]:
                r = rock_row[k]
                ratio = row_ratio[r] if r >= 0 else np.nan
                if math.isnan(ratio):
                    _sorted_quantiles(follow, k, buf, perm2, probs, out_follow)
                else:
                    for j in range(probs.shape[0]):
                        out_follow[j, k] = out[j, k] * ratio


_quantiles_parallel = numba.njit(parallel=True, cache=True, nogil=True)(_quantiles)
_quantiles_serial = numba.njit(parallel=False, cache=True, nogil=True)(twin(_quantiles, "_serial"))  # see twin


def cell_quantiles(values, probs=QUANTILES, parallel: bool = True) -> np.ndarray:
    """Per-cell quantiles of (cells, draws) values: (len(probs), cells) float32, by linear
    interpolation between order statistics (numpy's default ``linear`` method, Hyndman & Fan
    type 7); NaN where a cell is nodata (its first draw NaN)."""
    values = np.ascontiguousarray(values)
    out = np.empty((len(probs), values.shape[0]), np.float32)
    none = np.zeros((0, 0), np.float32)
    (_quantiles_parallel if parallel else _quantiles_serial)(
        values, np.asarray(probs, np.float64), out, none, np.zeros(0, np.int64), np.zeros(0), none)
    return out


def block_quantiles(block: "DrawBlock", draws: "DrawTable", probs=QUANTILES, parallel: bool = True):
    """(rate quantiles, CO2 quantiles), each (len(probs), cells) float32, of one DrawBlock. For
    rocks whose CO2 / rate ratio is the same in every draw (no density or purity range) the CO2
    quantiles are the rate quantiles times that ratio (quantiles commute with a positive
    factor); for the others the CO2 draws are sorted anew."""
    with np.errstate(invalid="ignore", divide="ignore"):
        ratio = draws.co2_factor / draws.rate_factor          # (draws, rows)
    row_ratio = np.full(ratio.shape[1], np.nan)
    for r in range(ratio.shape[1]):
        col = ratio[:, r]
        if np.all(np.isfinite(col)) and np.all(col == col[0]) and col[0] >= 0:
            row_ratio[r] = col[0]
    n = block.rate.shape[0]
    out_rate = np.empty((len(probs), n), np.float32)
    out_co2 = np.empty((len(probs), n), np.float32)
    (_quantiles_parallel if parallel else _quantiles_serial)(
        block.rate, np.asarray(probs, np.float64), out_rate, block.co2, block.rock_row, row_ratio, out_co2)
    return out_rate, out_co2


def summary_quantiles(values, probs=QUANTILES, axis=-1) -> np.ndarray:
    """Quantiles over draws (numpy ``linear`` method), NaN-free input assumed."""
    return np.quantile(np.asarray(values, np.float64), probs, axis=axis)
