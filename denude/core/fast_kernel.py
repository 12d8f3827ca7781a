"""Compiled per-cell loop behind ``compute_block(method="table")`` (numba).

One fused pass per cell: validity checks, rock lookup by code, bilinear interpolation of
the load table (``denude.core.lookup``; load linear in its value, grid in log PCO2), rate, drawdown. Two builds of the same loop: a
parallel one (numba prange over the cells) for calls from the main thread, and a serial
one that releases the GIL for callers that run blocks on their own worker threads
(numba's default threading layer must not be entered from several threads at once).
"""

from __future__ import annotations

import math
import os
import sys
import types

import numba
import numpy as np

#: Environment variable: "skip" makes numba's one-time BLAS probe report no BLAS (set by the
#: command line, see ``_skip_blas_probe``).
NUMBA_BLAS_PROBE_ENV = "DENUDE_NUMBA_BLAS_PROBE"


def _skip_blas_probe() -> None:
    """Import ``numba.np.arraymath`` with its BLAS probe answering "none". The probe imports
    ``scipy.linalg`` (about 0.17 s, a third of the kernel's warm-up, holding the GIL while the
    run validates its inputs) only so that compiled code may call ``np.dot`` and ``np.linalg``;
    denude's compiled loops call neither. Only the ``denude`` command asks for it (it is this
    process's own business); a library user's numba keeps its BLAS."""
    try:
        import numba.np.linalg as numba_linalg

        probe = numba_linalg.ensure_blas
    except (ImportError, AttributeError):   # another numba layout: its probe runs as usual
        return

    def no_blas():
        raise ImportError("BLAS not probed (denude command line)")

    numba_linalg.ensure_blas = no_blas
    try:
        import numba.np.arraymath  # noqa: F401  (binds and runs the probe once)
    except Exception:   # pragma: no cover - a numba whose arraymath fails this way imports it later, probing
        sys.modules.pop("numba.np.arraymath", None)
    finally:
        numba_linalg.ensure_blas = probe


if os.environ.get(NUMBA_BLAS_PROBE_ENV) == "skip" and "numba.np.arraymath" not in sys.modules:
    _skip_blas_probe()

# numba's own work queue, never OpenMP: GNU OpenMP aborts a process that forks after a
# parallel region has run (process pools, forked test helpers). The parallel build is only
# ever entered from the main thread, which is all the work queue needs.
if numba.config.THREADING_LAYER == "default":
    numba.config.THREADING_LAYER = "workqueue"


# Status codes per cell, shared with the numpy reference path in kernel.py.
COMPUTED, NODATA, UNKNOWN_CODE, OUT_OF_RANGE, BELOW_TABLE, COMPUTED_ZERO_RUNOFF = 0, 1, 2, 3, 4, 5
N_STATUS = 6


def _cell_loop(codes, litho_ok, q, p, t, f, code_min, code_row, row_mineral, row_rate_factor,
               row_co2_factor, tables, t0, dt, lp0, dlp,
               t_min, t_max, p_max, rate, load_mmol, co2, status):
    """Fill rate, load_mmol, co2 and status per cell; return counts of
    (nodata, unknown code, out of range, below table, computed with runoff <= 0)."""
    n = codes.shape[0]
    n_t = tables.shape[1]
    n_p = tables.shape[2]
    n_codes = code_row.shape[0]
    nan = np.float32(np.nan)
    n_nodata = 0
    n_unknown = 0
    n_range = 0
    n_below = 0
    n_zero = 0
    for k in numba.prange(n):
        rate[k] = nan
        load_mmol[k] = nan
        co2[k] = nan
        qk = q[k]
        pk = p[k]
        tk = t[k]
        fk = f[k]
        if not litho_ok[k] or math.isnan(qk) or math.isnan(pk) or math.isnan(tk) or math.isnan(fk):
            status[k] = NODATA
            n_nodata += 1
            continue
        offset = np.int64(codes[k]) - code_min
        row = -1
        if 0 <= offset < n_codes:
            row = code_row[offset]
        if row < 0:
            status[k] = UNKNOWN_CODE
            n_unknown += 1
            continue
        if fk < 0.0 or fk > 1.0:
            status[k] = OUT_OF_RANGE
            n_range += 1
            continue
        mineral = row_mineral[row]
        if mineral != 0 and (tk < t_min or tk > t_max or pk <= 0.0 or pk > p_max):
            status[k] = OUT_OF_RANGE
            n_range += 1
            continue
        if mineral == 0:  # insoluble rock: 0 whatever the climate
            rate[k] = 0.0
            load_mmol[k] = 0.0
            co2[k] = 0.0
            if qk > 0.0:
                status[k] = COMPUTED
            else:
                status[k] = COMPUTED_ZERO_RUNOFF
                n_zero += 1
            continue
        y = (math.log10(pk) - lp0) / dlp
        if y < 0.0:
            status[k] = BELOW_TABLE
            n_below += 1
            continue
        x = (tk - t0) / dt
        i = min(int(x), n_t - 2)
        j = min(int(y), n_p - 2)
        fx = x - i
        fy = y - j
        v = ((1.0 - fx) * ((1.0 - fy) * tables[mineral, i, j] + fy * tables[mineral, i, j + 1])
             + fx * ((1.0 - fy) * tables[mineral, i + 1, j] + fy * tables[mineral, i + 1, j + 1]))
        load = v  # mol/L (the table holds the load itself, interpolated linearly)
        q_eff = qk if qk > 0.0 else 0.0
        load_mmol[k] = load * 1e3
        rate[k] = row_rate_factor[row] * load * q_eff * fk
        co2[k] = row_co2_factor[row] * load * q_eff * fk
        if qk > 0.0:
            status[k] = COMPUTED
        else:
            status[k] = COMPUTED_ZERO_RUNOFF
            n_zero += 1
    return n_nodata, n_unknown, n_range, n_below, n_zero


def _renamed(func, name: str):
    """The same code under another name. numba's on-disk cache is keyed by the function's
    name, not by the build options: two builds of one function would share a cache index, and
    the serial build could load the parallel machine code (a worker thread then enters the
    work queue concurrently and the process aborts)."""
    copy = types.FunctionType(func.__code__, func.__globals__, name, func.__defaults__, func.__closure__)
    copy.__qualname__ = name
    return copy


cell_loop_parallel = numba.njit(parallel=True, cache=True, nogil=True)(_cell_loop)
cell_loop_serial = numba.njit(parallel=False, cache=True, nogil=True)(_renamed(_cell_loop, "_cell_loop_serial"))


def _code_pass(codes, valid, fraction, fraction_const, code_min, code_row, row_mineral, insoluble,
               soluble, present):
    """One pass over a window's codes: mark the table rows present on valid cells (``present``),
    and fill ``soluble`` (float32, when it has cells) with the soluble-area fraction: the
    fraction [0-1] (``fraction`` per cell, or ``fraction_const`` when ``fraction`` is empty) on
    cells of a table code, 0 on insoluble rock (finite fraction), NaN elsewhere. Returns the
    number of valid cells whose code is not in the table."""
    n = codes.shape[0]
    n_codes = code_row.shape[0]
    per_cell = fraction.shape[0] > 0
    want = soluble.shape[0] > 0
    nan = np.float32(np.nan)
    n_unknown = 0
    for k in range(n):
        row = -1
        if valid[k]:
            offset = np.int64(codes[k]) - code_min
            if 0 <= offset < n_codes:
                row = code_row[offset]
            if row < 0:
                n_unknown += 1
            else:
                present[row] = True
        if want:
            if row < 0:
                soluble[k] = nan
            else:
                fk = fraction[k] if per_cell else fraction_const
                if row_mineral[row] == insoluble and math.isfinite(fk):
                    soluble[k] = 0.0
                else:
                    soluble[k] = fk
    return n_unknown


def _classify_loop(rate, breaks, nodata, out):
    """Class index per cell: the number of breaks <= rate (breaks ascending), ``nodata`` for NaN."""
    n_breaks = breaks.shape[0]
    for k in range(rate.shape[0]):
        v = rate[k]
        if math.isnan(v):
            out[k] = nodata
            continue
        c = 0
        while c < n_breaks and breaks[c] <= v:
            c += 1
        out[k] = c


code_pass = numba.njit(cache=True, nogil=True)(_code_pass)
classify_loop = numba.njit(cache=True, nogil=True)(_classify_loop)
