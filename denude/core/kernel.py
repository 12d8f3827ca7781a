"""The per-cell job kernel: aligned input arrays in, rate arrays out. No I/O.

``compute_block`` is the single function every runner calls (whole array, one window,
one tile, one Dask chunk), so a tiled run equals a whole-array run bit for bit.

Cell rules:
- a cell is computed only where every input is valid (lithology code present and known,
  runoff, PCO2 and temperature finite, soluble fraction in [0, 1]); else all outputs NaN;
- insoluble rock gives 0 for every output;
- runoff <= 0 gives 0 rate and drawdown (the equilibrium load is still reported);
- temperature or PCO2 outside the constants' validity gives NaN and is counted (except on
  insoluble rock, which gives 0 whatever the climate);
- the soluble-area fraction f_area scales the rate and the CO2 drawdown (cell mean), not
  the dissolved load (a concentration in water draining the soluble part).
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

from denude.core.constants import (CO2_PER_MOL, MINERAL_INDEX, MINERALS, MOLAR_MASS_CO2_G_PER_MOL,
                                   MOLAR_MASS_G_PER_MOL)
from denude.core.dissolution import (
    check_chemistry,
    equilibrium_load_mol_per_l,
    out_of_range_mask,
    warn_out_of_range,
)
from denude.core.rates import (
    co2_drawdown_t_per_km2_yr,
    denudation_mm_per_kyr,
    effective_runoff_mm_per_yr,
)
from denude.core.rocks import RockLookup
from denude.errors import KernelInputError

#: Output layers of the kernel, in a fixed order: name -> (quantity, unit).
OUTPUT_LAYERS = {
    "denudation_mm_per_kyr": ("maximum chemical denudation rate", "mm/kyr"),
    "dissolved_load_mmol_per_l": ("equilibrium dissolved mineral load", "mmol/L"),
    "co2_drawdown_t_per_km2_yr": ("CO2 drawn down by dissolution", "t CO2 km-2 yr-1"),
}


#: Counts the kernel never sets (its callers do), left out of ``as_dict`` while zero.
_CALLER_COUNTS = ("below_freezing", "set_to_nodata")


@dataclass
class BlockCounts:
    """Cell counts of one block; add them up over blocks and tiles."""

    cells: int = 0
    computed: int = 0          # valid output (including insoluble zeros)
    nodata: int = 0            # some input was nodata
    unknown_code: int = 0      # lithology code not in the rock table
    out_of_range: int = 0      # temperature/PCO2/soluble fraction outside validity
    zero_runoff: int = 0       # runoff <= 0 (rate 0)
    negative_runoff: int = 0   # runoff < 0 taken as 0 by the caller (counted there, not here)
    below_freezing: int = 0    # temperature < 0 degrees C taken as 0 degrees C by the caller
    set_to_nodata: dict = field(default_factory=dict)   # input role -> cells made nodata by the caller

    def __add__(self, other: "BlockCounts") -> "BlockCounts":
        values = {k: getattr(self, k) + getattr(other, k) for k in self.__dataclass_fields__ if k != "set_to_nodata"}
        merged = dict(self.set_to_nodata)
        for role, n in other.set_to_nodata.items():
            merged[role] = merged.get(role, 0) + int(n)
        return BlockCounts(**values, set_to_nodata=merged)

    def as_dict(self) -> dict:
        """Plain counts; the caller's ``below_freezing`` and ``set_to_nodata`` only when non-zero
        (a kernel block never has them; run.json always lists them)."""
        out = {k: int(getattr(self, k)) for k in self.__dataclass_fields__ if k not in _CALLER_COUNTS}
        if self.below_freezing:
            out["below_freezing"] = int(self.below_freezing)
        if any(self.set_to_nodata.values()):
            out["set_to_nodata"] = {role: int(n) for role, n in sorted(self.set_to_nodata.items())}
        return out

    @classmethod
    def from_dict(cls, values: dict) -> "BlockCounts":
        """Counts from ``as_dict`` output (unknown keys ignored, missing ones 0)."""
        known = {k: v for k, v in values.items() if k in cls.__dataclass_fields__}
        if "set_to_nodata" in known:
            known["set_to_nodata"] = dict(known["set_to_nodata"])
        return cls(**known)


@dataclass
class BlockResult:
    """Kernel outputs for one block (float32 arrays, NaN where not computed)."""

    denudation_mm_per_kyr: np.ndarray
    dissolved_load_mmol_per_l: np.ndarray
    co2_drawdown_t_per_km2_yr: np.ndarray
    counts: BlockCounts = field(default_factory=BlockCounts)

    def layers(self) -> dict[str, np.ndarray]:
        return {name: getattr(self, name) for name in OUTPUT_LAYERS}


def compute_block(
    lithology_codes,
    runoff_mm_per_yr,
    pco2_atm,
    temperature_c,
    rocks: RockLookup,
    chemistry: str = "white",
    soluble_fraction=None,
    lithology_valid=None,
    warn: bool = True,
    method: str = "table",
) -> BlockResult:
    """Rates for one block of aligned cells.

    Parameters
    ----------
    lithology_codes : int array [code]; cells where ``lithology_valid`` is False are nodata
    runoff_mm_per_yr, pco2_atm, temperature_c : float arrays [mm/yr, atm, degrees C], NaN = nodata
    rocks : RockLookup from the rock table
    chemistry : "white" or "speciated"
    soluble_fraction : float array [0-1] or None (1 everywhere)
    lithology_valid : bool array or None (all valid)
    method : "table" (compiled loop over the load lookup table, the default) or "direct"
        (numpy, solving the chemistry per cell; the reference the table is tested against)
    """
    check_chemistry(chemistry)
    if method == "table":
        return _compute_block_table(lithology_codes, runoff_mm_per_yr, pco2_atm, temperature_c,
                                    rocks, chemistry, soluble_fraction, lithology_valid, warn)
    if method != "direct":
        raise KernelInputError(f"unknown kernel method {method!r}; choose 'table' or 'direct'")
    return _compute_block_direct(lithology_codes, runoff_mm_per_yr, pco2_atm, temperature_c, rocks, chemistry,
                                 soluble_fraction, lithology_valid, warn)


def _compute_block_direct(lithology_codes, runoff_mm_per_yr, pco2_atm, temperature_c, rocks: RockLookup,
                          chemistry: str, soluble_fraction, lithology_valid, warn: bool) -> BlockResult:
    """``compute_block(method="direct")``: numpy, the chemistry solved per cell (the reference)."""
    codes = np.asarray(lithology_codes)
    shape = codes.shape
    q = np.broadcast_to(np.asarray(runoff_mm_per_yr, dtype=np.float64), shape)
    p = np.broadcast_to(np.asarray(pco2_atm, dtype=np.float64), shape)
    t = np.broadcast_to(np.asarray(temperature_c, dtype=np.float64), shape)
    f_area = (
        np.ones(shape) if soluble_fraction is None
        else np.broadcast_to(np.asarray(soluble_fraction, dtype=np.float64), shape)
    )
    litho_ok = np.ones(shape, bool) if lithology_valid is None else np.asarray(lithology_valid, bool)

    row = rocks.row_index(codes)
    known = row >= 0
    inputs_ok = litho_ok & np.isfinite(q) & np.isfinite(p) & np.isfinite(t) & np.isfinite(f_area)
    mineral = np.where(known, rocks.mineral_index[np.maximum(row, 0)], 0)
    bad_fraction = inputs_ok & ((f_area < 0.0) | (f_area > 1.0))
    bad_chem = inputs_ok & out_of_range_mask(t, p) & (mineral != 0)  # insoluble: 0 whatever the climate
    ok = inputs_ok & known & ~bad_fraction & ~bad_chem

    density = rocks.density_g_cm3[np.maximum(row, 0)] if len(rocks.codes) else np.ones(shape)
    purity = rocks.purity[np.maximum(row, 0)] if len(rocks.codes) else np.ones(shape)

    load_mol_per_l = np.full(shape, np.nan)
    rate = np.full(shape, np.nan)
    co2 = np.full(shape, np.nan)
    insoluble = ok & (mineral == 0)
    load_mol_per_l[insoluble] = 0.0
    rate[insoluble] = 0.0
    co2[insoluble] = 0.0
    for index, name in enumerate(MINERALS):
        if name == "insoluble":
            continue
        sel = ok & (mineral == index)
        if not sel.any():
            continue
        load = equilibrium_load_mol_per_l(name, t[sel], p[sel], chemistry, warn=False)
        q_sel = effective_runoff_mm_per_yr(q[sel])
        load_mol_per_l[sel] = load
        rate[sel] = denudation_mm_per_kyr(load, q_sel, MOLAR_MASS_G_PER_MOL[name], density[sel], purity[sel]) * f_area[sel]
        co2[sel] = co2_drawdown_t_per_km2_yr(load, q_sel, CO2_PER_MOL[name]) * f_area[sel]

    n_bad = int(np.count_nonzero((bad_chem | bad_fraction) & litho_ok & known))
    counts = BlockCounts(
        cells=int(codes.size),
        computed=int(np.count_nonzero(ok)),
        nodata=int(np.count_nonzero(~inputs_ok)),
        unknown_code=int(np.count_nonzero(inputs_ok & ~known)),
        out_of_range=n_bad,
        zero_runoff=int(np.count_nonzero(ok & (q <= 0.0))),
    )
    if warn:
        warn_out_of_range(n_bad)
    return BlockResult(
        denudation_mm_per_kyr=rate.astype(np.float32),
        dissolved_load_mmol_per_l=(load_mol_per_l * 1e3).astype(np.float32),
        co2_drawdown_t_per_km2_yr=co2.astype(np.float32),
        counts=counts,
    )


def _flat_float(values, shape, dtype):
    """A contiguous 1-D array of ``dtype`` (no copy when it already is one)."""
    arr = np.asarray(values, dtype=dtype)
    return np.ascontiguousarray(np.broadcast_to(arr, shape)).reshape(-1)


def _fits_int32(codes: np.ndarray) -> bool:
    if codes.size == 0:
        return True
    info = np.iinfo(np.int32)
    return bool(codes.min() >= info.min and codes.max() <= info.max)


def _compute_block_table(lithology_codes, runoff_mm_per_yr, pco2_atm, temperature_c, rocks,
                         chemistry, soluble_fraction, lithology_valid, warn) -> BlockResult:
    import threading

    from denude.core import fast_kernel as fk
    from denude.core.constants import PCO2_MAX_ATM, TEMPERATURE_MAX_C, TEMPERATURE_MIN_C
    from denude.core.lookup import stacked_tables

    codes = np.asarray(lithology_codes)
    if codes.dtype.kind not in "iub":
        raise KernelInputError(
            f"lithology codes have dtype {codes.dtype}; give integer codes (codes are categories, never rounded)")
    shape = codes.shape
    # One dtype per argument kind keeps the number of compiled variants small: int32 codes
    # (int64 if they need it), and float32 inputs unless any input is float64.
    code_dtype = np.int32 if codes.dtype.itemsize < 8 or _fits_int32(codes) else np.int64
    flat_codes = np.ascontiguousarray(codes, dtype=code_dtype).reshape(-1)
    raw = [runoff_mm_per_yr, pco2_atm, temperature_c, 1.0 if soluble_fraction is None else soluble_fraction]
    float_dtype = np.float32 if all(np.asarray(v).dtype == np.float32 for v in raw[:3]) else np.float64
    q, p, t, f = (_flat_float(v, shape, float_dtype) for v in raw)
    litho_ok = (np.ones(shape, bool) if lithology_valid is None
                else np.ascontiguousarray(np.broadcast_to(np.asarray(lithology_valid, bool), shape)))
    litho_ok = litho_ok.reshape(-1)

    code_min, code_row = _dense_code_rows(rocks)
    tables, (t0, dt, lp0, dlp) = stacked_tables(chemistry)
    n = flat_codes.size
    rate = np.empty(n, np.float32)
    load = np.empty(n, np.float32)
    co2 = np.empty(n, np.float32)
    status = np.empty(n, np.uint8)
    loop = fk.cell_loop_parallel if threading.current_thread() is threading.main_thread() else fk.cell_loop_serial
    # Per rock row: rate factor M / (rho purity) [mm/kyr per (mol/L * mm/yr)] and CO2
    # factor n 44.01 [t CO2 km-2 yr-1 per (mol/L * mm/yr)].
    rate_factor = _MOLAR_MASS_BY_INDEX[rocks.mineral_index] / (rocks.density_g_cm3 * rocks.purity)
    co2_factor = _CO2_BY_INDEX[rocks.mineral_index] * MOLAR_MASS_CO2_G_PER_MOL
    tally = np.zeros(fk.N_STATUS, np.int64)
    (tally[fk.NODATA], tally[fk.UNKNOWN_CODE], tally[fk.OUT_OF_RANGE], tally[fk.BELOW_TABLE],
     tally[fk.COMPUTED_ZERO_RUNOFF]) = loop(
        flat_codes, litho_ok, q, p, t, f, code_min, code_row, rocks.mineral_index, rate_factor,
        co2_factor, tables, t0, dt, lp0, dlp, TEMPERATURE_MIN_C, TEMPERATURE_MAX_C, PCO2_MAX_ATM,
        rate, load, co2, status)
    tally[fk.COMPUTED] = n - tally.sum()
    if tally[fk.BELOW_TABLE]:  # PCO2 below 1e-8 atm: solve those few cells directly
        idx = np.flatnonzero(status == fk.BELOW_TABLE)
        sub = compute_block(flat_codes[idx], q[idx], p[idx], t[idx], rocks, chemistry,
                            f[idx], litho_ok[idx], warn=False, method="direct")
        rate[idx] = sub.denudation_mm_per_kyr
        load[idx] = sub.dissolved_load_mmol_per_l
        co2[idx] = sub.co2_drawdown_t_per_km2_yr
        tally[fk.COMPUTED] += sub.counts.computed - sub.counts.zero_runoff
        tally[fk.COMPUTED_ZERO_RUNOFF] += sub.counts.zero_runoff
        tally[fk.OUT_OF_RANGE] += sub.counts.out_of_range
        tally[fk.BELOW_TABLE] = 0
    counts = BlockCounts(
        cells=int(n),
        computed=int(tally[fk.COMPUTED] + tally[fk.COMPUTED_ZERO_RUNOFF]),
        nodata=int(tally[fk.NODATA]),
        unknown_code=int(tally[fk.UNKNOWN_CODE]),
        out_of_range=int(tally[fk.OUT_OF_RANGE]),
        zero_runoff=int(tally[fk.COMPUTED_ZERO_RUNOFF]),
    )
    if warn:
        warn_out_of_range(counts.out_of_range)
    return BlockResult(rate.reshape(shape), load.reshape(shape), co2.reshape(shape), counts)


def warm_up(chemistry: str = "white") -> None:
    """Build the load table of ``chemistry`` and load the compiled cell loop (from numba's
    on-disk cache) by computing one cell, so that the first block of a run does not pay for
    them. Called from a worker thread it loads the serial build, the one worker threads use;
    the dtypes (int32 codes, float64 inputs) are those of a map window. A run starts it on a
    thread of its own while it validates inputs. Errors are left to the real call."""
    from denude.core.rocks import RockTable

    try:
        rocks = RockTable.builtin().lookup()
        one = np.ones(1)
        code = rocks.codes[:1].astype(np.int32)
        result = compute_block(code, 500.0 * one, 0.01 * one, 10.0 * one, rocks, chemistry,
                               lithology_valid=np.ones(1, bool), warn=False)
        codes_and_soluble_fraction(code, np.ones(1, bool), rocks, None)       # the window's passes too
        classify_rates(result.denudation_mm_per_kyr, (1.0,))
    except Exception:  # pragma: no cover - the same call fails again, with its message, in the run
        pass


_MOLAR_MASS_BY_INDEX = np.array([MOLAR_MASS_G_PER_MOL[m] for m in MINERALS], dtype=np.float64)
_CO2_BY_INDEX = np.array([CO2_PER_MOL[m] for m in MINERALS], dtype=np.float64)
#: Codes spanning more than this use a sparse table (searchsorted) instead of a dense one.
_DENSE_CODE_SPAN = 1 << 20


def _dense_code_rows(rocks: RockLookup) -> tuple[int, np.ndarray]:
    """(smallest code, row of each code from it) with -1 for codes not in the table."""
    if len(rocks.codes) == 0:
        return 0, np.full(1, -1, np.int64)
    low, high = int(rocks.codes[0]), int(rocks.codes[-1])
    if high - low >= _DENSE_CODE_SPAN:
        raise KernelInputError(
            f"rock table codes span {low}..{high}; renumber them to span less than {_DENSE_CODE_SPAN}")
    rows = np.full(high - low + 1, -1, np.int64)
    rows[rocks.codes - low] = np.arange(len(rocks.codes))
    return low, rows


def codes_and_soluble_fraction(lithology_codes, lithology_valid, rocks: RockLookup, soluble_fraction=None,
                               with_fraction: bool = True):
    """Table codes present on valid cells, the count of valid cells of codes not in the table,
    and (``with_fraction``) the soluble-area fraction layer [0-1], float32: the fraction (1
    when None) on cells of a table code, 0 on insoluble rock where the fraction is finite, NaN
    elsewhere. One compiled pass (``fast_kernel.code_pass``) instead of several numpy ones;
    tests hold it equal to the numpy expression."""
    from denude.core import fast_kernel as fk

    codes = np.asarray(lithology_codes)
    shape = codes.shape
    code_dtype = np.int32 if codes.dtype.itemsize < 8 or _fits_int32(codes) else np.int64
    flat_codes = np.ascontiguousarray(codes, dtype=code_dtype).reshape(-1)
    valid = np.ascontiguousarray(np.broadcast_to(np.asarray(lithology_valid, bool), shape)).reshape(-1)
    if soluble_fraction is None or np.ndim(soluble_fraction) == 0:
        per_cell = np.empty(0, np.float64)
        const = 1.0 if soluble_fraction is None else float(soluble_fraction)
    else:
        per_cell, const = _flat_float(soluble_fraction, shape, np.float64), 0.0
    code_min, code_row = _dense_code_rows(rocks)
    soluble = np.empty(flat_codes.size if with_fraction else 0, np.float32)
    present = np.zeros(len(rocks.codes), np.bool_)
    n_unknown = fk.code_pass(flat_codes, valid, per_cell, const, code_min, code_row, rocks.mineral_index,
                             MINERAL_INDEX["insoluble"], soluble, present)
    codes_present = tuple(int(c) for c in rocks.codes[present])
    return codes_present, int(n_unknown), (soluble.reshape(shape) if with_fraction else None)


def classify_rates(rate_mm_per_kyr, breaks_mm_per_kyr) -> np.ndarray:
    """``denude.core.hazard.classify`` in one compiled pass (same classes, uint8, 255 = NaN)."""
    from denude.core import fast_kernel as fk
    from denude.core.hazard import HAZARD_NODATA, check_breaks

    breaks = np.asarray(check_breaks(breaks_mm_per_kyr), dtype=np.float64)
    rate = np.asarray(rate_mm_per_kyr)
    if rate.dtype not in (np.float32, np.float64):
        rate = rate.astype(np.float64)
    out = np.empty(rate.shape, np.uint8)
    fk.classify_loop(np.ascontiguousarray(rate).reshape(-1), breaks, np.uint8(HAZARD_NODATA), out.reshape(-1))
    return out
