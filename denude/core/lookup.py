"""Lookup tables of the equilibrium load for fast per-cell evaluation.

For each (mineral, chemistry) the direct solver is evaluated once on a regular grid in
temperature (0-90 degrees C, step 0.5) and log10 PCO2 (-8 to 0, step 0.02), storing
log10 of the load in mol/L. ``LoadTable.interpolate_mol_per_l`` interpolates the log
bilinearly (relative error < 1e-4 against the direct solver); the compiled kernel
interpolates the load itself between the same nodes (saving a power per cell), with a
relative error below 1e-4 everywhere on the grid (tests/test_lookup.py;
benchmarks/bench_chemistry.py reports it on random inputs).
Cells with PCO2 below the table (< 1e-8 atm) are left to the direct solver by the caller.
"""

from __future__ import annotations

import functools
import threading
from dataclasses import dataclass

import numpy as np

from denude.core.constants import TEMPERATURE_MAX_C, TEMPERATURE_MIN_C
from denude.core.dissolution import check_chemistry, check_mineral, equilibrium_load_mol_per_l

TEMPERATURE_STEP_C = 0.5
LOG_PCO2_MIN = -8.0
LOG_PCO2_MAX = 0.0
LOG_PCO2_STEP = 0.02


@dataclass(frozen=True)
class LoadTable:
    """log10 load [mol/L] on a regular (temperature [C], log10 PCO2 [atm]) grid."""

    log_load: np.ndarray      # float64, shape (n_t, n_p)
    t0_c: float
    dt_c: float
    lp0: float
    dlp: float

    def interpolate_mol_per_l(self, temperature_c, pco2_atm):
        """Bilinear interpolation in (t, log10 PCO2); NaN outside the table (numpy, any shape)."""
        t = np.asarray(temperature_c, dtype=np.float64)
        lp = np.log10(np.asarray(pco2_atm, dtype=np.float64))
        n_t, n_p = self.log_load.shape
        x = (t - self.t0_c) / self.dt_c
        y = (lp - self.lp0) / self.dlp
        inside = (x >= 0) & (x <= n_t - 1) & (y >= 0) & (y <= n_p - 1)
        x = np.where(inside, x, 0.0)
        y = np.where(inside, y, 0.0)
        i = np.minimum(x.astype(np.int64), n_t - 2)
        j = np.minimum(y.astype(np.int64), n_p - 2)
        fx = x - i
        fy = y - j
        tab = self.log_load
        v = (
            (1 - fx) * (1 - fy) * tab[i, j]
            + fx * (1 - fy) * tab[i + 1, j]
            + (1 - fx) * fy * tab[i, j + 1]
            + fx * fy * tab[i + 1, j + 1]
        )
        return np.where(inside, 10.0**v, np.nan)


@functools.lru_cache(maxsize=None)
def load_table(mineral: str, chemistry: str) -> LoadTable:
    """The lookup table for one mineral and chemistry mode (built once per process)."""
    check_mineral(mineral)
    check_chemistry(chemistry)
    (n_t, n_p), _ = stacked_grid()
    t = TEMPERATURE_MIN_C + TEMPERATURE_STEP_C * np.arange(n_t)
    lp = LOG_PCO2_MIN + LOG_PCO2_STEP * np.arange(n_p)
    tt, ll = np.meshgrid(t, lp, indexing="ij")
    if mineral == "gypsum":  # independent of PCO2: solve once per temperature
        column = equilibrium_load_mol_per_l(mineral, t, 0.01, chemistry, warn=False)
        load = np.repeat(column[:, None], n_p, axis=1)
    else:
        load = equilibrium_load_mol_per_l(mineral, tt, 10.0**ll, chemistry, warn=False)
    return LoadTable(np.log10(load), TEMPERATURE_MIN_C, TEMPERATURE_STEP_C, LOG_PCO2_MIN, LOG_PCO2_STEP)


#: Held while tables are built: worker threads asking at once wait for one build instead of
#: each building its own copy.
_BUILD_LOCK = threading.Lock()
#: chemistry -> (stacked loads, grid): built here or seeded (``seed_stacked_tables``).
_STACKED: dict = {}


def stacked_tables(chemistry: str) -> tuple[np.ndarray, tuple[float, float, float, float]]:
    """Loads [mol/L] (not their logs) of all minerals stacked by mineral index (0 = insoluble,
    all zero), for the compiled kernel: interpolating the load linearly between log10 PCO2
    nodes 0.02 apart adds at most (ln 10 / 3)^2 h^2 / 8 = 3e-5 relative error (derived).
    Built once per process and chemistry, whichever thread asks first."""
    with _BUILD_LOCK:
        tables = _STACKED.get(chemistry)
        if tables is None:
            tables = _STACKED[chemistry] = _build_stacked_tables(chemistry)
        return tables


def has_stacked_tables(chemistry: str) -> bool:
    """Whether this process holds the stacked tables of ``chemistry`` already."""
    return chemistry in _STACKED


def stacked_grid() -> tuple[tuple[int, int], tuple[float, float, float, float]]:
    """((n_t, n_p), (t0 [C], dt [C], lp0, dlp [log10 atm])) of every load table."""
    n_t = int(round((TEMPERATURE_MAX_C - TEMPERATURE_MIN_C) / TEMPERATURE_STEP_C)) + 1
    n_p = int(round((LOG_PCO2_MAX - LOG_PCO2_MIN) / LOG_PCO2_STEP)) + 1
    return (n_t, n_p), (TEMPERATURE_MIN_C, TEMPERATURE_STEP_C, LOG_PCO2_MIN, LOG_PCO2_STEP)


def seed_stacked_tables(chemistry: str, stack: np.ndarray) -> None:
    """Take ``stack`` (float32, (minerals, n_t, n_p), on this module's grid) as this process's
    stacked tables of ``chemistry``, e.g. read back from a file cache of the same build
    (``denude.io.table_cache``); ValueError for another shape or dtype. Tables already held
    are kept."""
    from denude.core.constants import MINERALS

    check_chemistry(chemistry)
    shape, expected = stacked_grid()
    if stack.shape != (len(MINERALS),) + shape or stack.dtype != np.float32:
        raise ValueError(f"stacked tables of shape {stack.shape}, {stack.dtype}; "
                         f"expected {(len(MINERALS),) + shape}, float32")
    with _BUILD_LOCK:
        _STACKED.setdefault(chemistry, (np.ascontiguousarray(stack), expected))


def _build_stacked_tables(chemistry: str) -> tuple[np.ndarray, tuple[float, float, float, float]]:
    from denude.core.constants import MINERALS

    tables = [load_table(m, chemistry) for m in MINERALS[1:]]
    first = tables[0]
    stack = np.empty((len(MINERALS),) + first.log_load.shape)
    stack[0] = 0.0
    for k, tab in enumerate(tables, start=1):
        stack[k] = 10.0**tab.log_load
    # float32 halves the cache footprint of the random gathers; rounding (6e-8) is far
    # below the interpolation error.
    return np.ascontiguousarray(stack, dtype=np.float32), (first.t0_c, first.dt_c, first.lp0, first.dlp)
