"""Monte Carlo uncertainty of the rates: random streams, per-draw perturbations, the per-cell
draw loop, per-cell quantiles, per-zone sums and first-order variance shares. No I/O.

Random streams are counter based: every number is a hash (splitmix64 finaliser, Steele,
Lea & Flood 2014) of the integers (seed, draw, stream, global row, global column), turned
into a uniform in (0, 1) from its top 53 bits, and into a standard normal by the Box-Muller
transform of two such uniforms (lanes 0 and 1 of the stream). No state is carried from cell
to cell, so the window size, the tiling and the number of workers cannot change a value.

A draw applies one regional perturbation per input (the errors of a regional data set are
correlated in space): runoff times exp(N(0, sigma_ln)), log10 PCO2 plus N(0, sigma_log10),
temperature plus N(0, sigma_c), the soil-CO2 model's intercept and amplitude plus normal
errors when PCO2 comes from AET, per rock a uniform purity and density, per mineral a uniform
saturation ratio (real / equilibrium load). With ``cell_noise`` each cell adds its own
independent draws of the runoff, PCO2 and temperature errors (same sigmas) on top.

The chemistry of each draw is read from the load table of the deterministic kernel
(``denude.core.lookup.stacked_tables``, bilinear in temperature and log10 PCO2): perturbed
inputs are looked up again, the equilibria are never solved again. Perturbed temperature and
PCO2 are clipped to the table (0-90 degrees C, 1e-8 to 1 atm) and the clipped draws counted.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field

import numba
import numpy as np

from denude.core import fast_kernel as _fk  # noqa: F401  (sets numba's threading layer first)
from denude.core.constants import CO2_PER_MOL, MINERALS, MOLAR_MASS_CO2_G_PER_MOL, MOLAR_MASS_G_PER_MOL

#: Quantiles written per cell and per zone [probability].
QUANTILES = (0.05, 0.50, 0.95)
QUANTILE_LABELS = ("p05", "p50", "p95")

# Stream numbers (each uses lanes 2*s and 2*s + 1). Regional streams have row = col = 0 and
# numbers below CELL_STREAM; rock streams are keyed by rock code, not by table order.
STREAM_RUNOFF, STREAM_PCO2, STREAM_TEMPERATURE, STREAM_SOIL_A, STREAM_SOIL_B = 1, 2, 3, 4, 5
STREAM_SATURATION = 16          # + mineral index
STREAM_ROCK = 1 << 24           # + 2 * code (purity) or + 2 * code + 1 (density)
CELL_STREAM = 1 << 40           # + 1 runoff, + 2 PCO2, + 3 temperature

_M1 = np.uint64(0xBF58476D1CE4E5B9)
_M2 = np.uint64(0x94D049BB133111EB)
_GOLDEN = np.uint64(0x9E3779B97F4A7C15)
_S30, _S27, _S31, _S11 = np.uint64(30), np.uint64(27), np.uint64(31), np.uint64(11)
_TWO_POW_M53 = 1.0 / 9007199254740992.0


@numba.njit(cache=True, nogil=True)
def _mix(z):
    z = (z ^ (z >> _S30)) * _M1
    z = (z ^ (z >> _S27)) * _M2
    return z ^ (z >> _S31)


@numba.njit(cache=True, nogil=True)
def key_uniform(seed, draw, lane, row, col):
    """Uniform in (0, 1) from the integers (seed, draw, lane, row, col) (all >= 0)."""
    h = _mix(np.uint64(seed) + _GOLDEN)
    h = _mix(h ^ (np.uint64(draw) + _GOLDEN))
    h = _mix(h ^ (np.uint64(lane) + _GOLDEN))
    h = _mix(h ^ (np.uint64(row) + _GOLDEN))
    h = _mix(h ^ (np.uint64(col) + _GOLDEN))
    return (np.float64(h >> _S11) + 0.5) * _TWO_POW_M53


@numba.njit(cache=True, nogil=True)
def key_normal(seed, draw, stream, row, col):
    """Standard normal from (seed, draw, stream, row, col): Box-Muller of lanes 2s and 2s+1."""
    u1 = key_uniform(seed, draw, 2 * stream, row, col)
    u2 = key_uniform(seed, draw, 2 * stream + 1, row, col)
    return math.sqrt(-2.0 * math.log(u1)) * math.cos(2.0 * math.pi * u2)


@numba.njit(cache=True)
def _regional(seed, n_draws, stream, normal):
    out = np.empty(n_draws)
    for d in range(n_draws):
        out[d] = key_normal(seed, d, stream, 0, 0) if normal else key_uniform(seed, d, 2 * stream, 0, 0)
    return out


def regional_normals(seed: int, n_draws: int, stream: int) -> np.ndarray:
    """Standard normals of draws 0..n-1 of one regional stream (float64)."""
    return _regional(int(seed), int(n_draws), int(stream), True)


def regional_uniforms(seed: int, n_draws: int, stream: int) -> np.ndarray:
    """Uniforms in (0, 1) of draws 0..n-1 of one regional stream (float64)."""
    return _regional(int(seed), int(n_draws), int(stream), False)


# ------------------------------------------------------------------------------ the spec
@dataclass(frozen=True)
class UncertaintySpec:
    """Input errors of an uncertainty run (job file ``[uncertainty]``). Zero sigmas and
    missing ranges leave an input unperturbed.

    runoff_sigma_ln [1]: runoff times exp(N(0, sigma)) (log-normal, median factor 1)
    pco2_sigma_log10 [log10 atm]: PCO2 times 10**N(0, sigma)
    temperature_sigma_c [degrees C]: temperature plus N(0, sigma)
    soil_co2_intercept_sigma_log10, soil_co2_amplitude_sigma_log10 [log10 atm]: normal errors of
        the intercept (-3.47) and amplitude (2.09) of Brook et al. (1983), when PCO2 comes from AET
    saturation_ratio: ((mineral, low, high), ...) uniform real / equilibrium load, 0-1
    rocks: ((rock name, "purity" | "density_g_cm3", low, high), ...) uniform ranges
    cell_noise: also draw the runoff, PCO2 and temperature errors independently per cell
    """

    runoff_sigma_ln: float = 0.0
    pco2_sigma_log10: float = 0.0
    temperature_sigma_c: float = 0.0
    soil_co2_intercept_sigma_log10: float = 0.0
    soil_co2_amplitude_sigma_log10: float = 0.0
    saturation_ratio: tuple = ()
    rocks: tuple = ()
    cell_noise: bool = False

    def as_dict(self) -> dict:
        return {
            "runoff_sigma_ln": self.runoff_sigma_ln,
            "pco2_sigma_log10": self.pco2_sigma_log10,
            "temperature_sigma_c": self.temperature_sigma_c,
            "soil_co2_intercept_sigma_log10": self.soil_co2_intercept_sigma_log10,
            "soil_co2_amplitude_sigma_log10": self.soil_co2_amplitude_sigma_log10,
            "cell_noise": self.cell_noise,
            "saturation_ratio": {m: [lo, hi] for m, lo, hi in self.saturation_ratio},
            "rocks": {name: {k: [lo, hi] for n, k, lo, hi in self.rocks if n == name}
                      for name in dict.fromkeys(n for n, _, _, _ in self.rocks)},
        }


@dataclass
class DrawTable:
    """Regional perturbations of every draw, and the per-draw rock factors.

    q_factor [1], dlogp [log10 atm], dtemp [degrees C], soil_a, soil_b [log10 atm]: shape (N,)
    rate_factor [mm/kyr per (mol/L * mm/yr)], co2_factor [t CO2 km-2 yr-1 per (mol/L * mm/yr)],
    density [g/cm3]: shape (N, rock rows), saturation ratio included in the first two
    inputs: (N, k) values of the perturbed inputs (normal variates or uniform values) and
    input_names their names, for the variance shares.
    """

    q_factor: np.ndarray
    dlogp: np.ndarray
    dtemp: np.ndarray
    soil_a: np.ndarray
    soil_b: np.ndarray
    rate_factor: np.ndarray
    co2_factor: np.ndarray
    density: np.ndarray
    inputs: np.ndarray
    input_names: list = field(default_factory=list)

    @property
    def n_draws(self) -> int:
        return int(self.q_factor.size)


def draw_table(spec: UncertaintySpec, seed: int, n_draws: int, codes, minerals, density_g_cm3,
               purity, names, pco2_from_aet: bool = False) -> DrawTable:
    """The regional perturbations of draws 0..n-1 for a rock table given by its rows
    (``codes``, mineral index, density [g/cm3], purity [1], rock ``names``)."""
    codes = np.asarray(codes, np.int64)
    minerals = np.asarray(minerals, np.int64)
    n_rows = codes.size
    inputs, input_names = [], []
    zeros = np.zeros(n_draws)

    def normal(stream, sigma, name):
        if sigma <= 0:
            return zeros.copy()
        z = regional_normals(seed, n_draws, stream)
        inputs.append(z)
        input_names.append(name)
        return sigma * z

    q_factor = np.exp(normal(STREAM_RUNOFF, spec.runoff_sigma_ln, "runoff"))
    dlogp = normal(STREAM_PCO2, spec.pco2_sigma_log10, "pco2")
    dtemp = normal(STREAM_TEMPERATURE, spec.temperature_sigma_c, "temperature")
    soil_a = soil_b = zeros
    if pco2_from_aet:
        soil_a = normal(STREAM_SOIL_A, spec.soil_co2_intercept_sigma_log10, "soil_co2_intercept")
        soil_b = normal(STREAM_SOIL_B, spec.soil_co2_amplitude_sigma_log10, "soil_co2_amplitude")

    density = np.tile(np.asarray(density_g_cm3, np.float64), (n_draws, 1))
    purity_d = np.tile(np.asarray(purity, np.float64), (n_draws, 1))
    for name, key, lo, hi in spec.rocks:
        rows = [i for i in range(n_rows) if names[i] == name]
        for i in rows:
            stream = STREAM_ROCK + 2 * int(codes[i]) + (0 if key == "purity" else 1)
            u = regional_uniforms(seed, n_draws, stream)
            value = lo + (hi - lo) * u
            (purity_d if key == "purity" else density)[:, i] = value
            if hi > lo:
                inputs.append(value)
                input_names.append(f"{key.split('_')[0]}_{name}" if len(rows) == 1 else f"{key.split('_')[0]}_{name}_{codes[i]}")
    saturation = np.ones((n_draws, len(MINERALS)))
    for mineral, lo, hi in spec.saturation_ratio:
        m = MINERALS.index(mineral)
        u = regional_uniforms(seed, n_draws, STREAM_SATURATION + m)
        saturation[:, m] = lo + (hi - lo) * u
        if hi > lo:
            inputs.append(saturation[:, m].copy())
            input_names.append(f"saturation_{mineral}")
    molar = np.array([MOLAR_MASS_G_PER_MOL[m] for m in MINERALS])[minerals]
    co2_per = np.array([CO2_PER_MOL[m] for m in MINERALS])[minerals] * MOLAR_MASS_CO2_G_PER_MOL
    sat_rows = saturation[:, minerals] if n_rows else np.ones((n_draws, 0))
    rate_factor = molar[None, :] / (density * purity_d) * sat_rows
    co2_factor = co2_per[None, :] * sat_rows
    x = np.column_stack(inputs) if inputs else np.zeros((n_draws, 0))
    return DrawTable(q_factor, dlogp, dtemp, np.asarray(soil_a, float), np.asarray(soil_b, float),
                     np.ascontiguousarray(rate_factor), np.ascontiguousarray(co2_factor),
                     np.ascontiguousarray(density), x, input_names)


# ------------------------------------------------------------------------ the draw loop
#: Cell status of the draw loop (shared numbers with ``fast_kernel``).
COMPUTED, NODATA, UNKNOWN_CODE, OUT_OF_RANGE = 0, 1, 2, 3


def _draw_loop(codes, litho_ok, q, p, t, f, g, code_min, code_row, row_mineral,
               q_factor, dlogp, dtemp, soil_a, soil_b, rate_factor, co2_factor,
               noise_q, noise_p, noise_t, seed, row0, col0, width,
               tables, t0, dt, lp0, dlp, t_min, t_max, p_max, rate_out, co2_out, status, clipped):
    """Fill rate_out and co2_out (cells x draws, float32, NaN where the base cell is not
    computed), status per cell and the number of clipped draws per cell."""
    n = codes.shape[0]
    n_draws = q_factor.shape[0]
    n_t = tables.shape[1]
    n_p = tables.shape[2]
    n_codes = code_row.shape[0]
    lp_max = math.log10(p_max)
    inv_dt = 1.0 / dt
    inv_dlp = 1.0 / dlp
    noisy = noise_q > 0.0 or noise_p > 0.0 or noise_t > 0.0
    for k in numba.prange(n):
        clipped[k] = 0
        qk = q[k]
        pk = p[k]
        tk = t[k]
        fk = f[k]
        st = COMPUTED
        row = -1
        if not litho_ok[k] or math.isnan(qk) or math.isnan(pk) or math.isnan(tk) or math.isnan(fk) or math.isnan(g[k]):
            st = NODATA
        else:
            offset = np.int64(codes[k]) - code_min
            if 0 <= offset < n_codes:
                row = code_row[offset]
            if row < 0:
                st = UNKNOWN_CODE
            elif fk < 0.0 or fk > 1.0:
                st = OUT_OF_RANGE
            elif row_mineral[row] != 0 and (tk < t_min or tk > t_max or pk <= 0.0 or pk > p_max):
                st = OUT_OF_RANGE
        status[k] = st
        if st != COMPUTED:
            for d in range(n_draws):
                rate_out[k, d] = np.nan
                co2_out[k, d] = np.nan
            continue
        mineral = row_mineral[row]
        if mineral == 0:
            for d in range(n_draws):
                rate_out[k, d] = 0.0
                co2_out[k, d] = 0.0
            continue
        lpk = math.log10(pk)
        gk = g[k]
        grow = row0 + k // width
        gcol = col0 + k % width
        n_clip = 0
        rf = rate_factor[row]
        cf = co2_factor[row]
        for d in range(n_draws):
            td = tk + dtemp[d]
            lpd = lpk + dlogp[d] + soil_a[d] + soil_b[d] * gk
            qd = qk * q_factor[d]
            if noisy:
                if noise_t > 0.0:
                    td += noise_t * key_normal(seed, d, CELL_STREAM + 3, grow, gcol)
                if noise_p > 0.0:
                    lpd += noise_p * key_normal(seed, d, CELL_STREAM + 2, grow, gcol)
                if noise_q > 0.0:
                    qd *= math.exp(noise_q * key_normal(seed, d, CELL_STREAM + 1, grow, gcol))
            if td < t_min or td > t_max or lpd < lp0 or lpd > lp_max:
                n_clip += 1
                td = min(max(td, t_min), t_max)
                lpd = min(max(lpd, lp0), lp_max)
            x = (td - t0) * inv_dt
            y = (lpd - lp0) * inv_dlp
            i = min(int(x), n_t - 2)
            j = min(int(y), n_p - 2)
            fx = x - i
            fy = y - j
            load = ((1.0 - fx) * ((1.0 - fy) * tables[mineral, i, j] + fy * tables[mineral, i, j + 1])
                    + fx * ((1.0 - fy) * tables[mineral, i + 1, j] + fy * tables[mineral, i + 1, j + 1]))
            q_eff = qd if qd > 0.0 else 0.0
            base = load * q_eff * fk
            rate_out[k, d] = rf[d] * base
            co2_out[k, d] = cf[d] * base
        clipped[k] = n_clip


def _twin(func, suffix: str):
    """A copy of ``func`` under another name. numba keys its on-disk cache by the function's
    name and signature, not by the parallel flag, so a serial and a parallel build of one
    function would be taken for each other (and a "serial" call from a worker thread would
    enter the threading layer); a twin gets cache entries of its own."""
    import types

    name = func.__name__ + suffix
    code = func.__code__.replace(co_name=name, co_qualname=name)
    twin = types.FunctionType(code, func.__globals__, name, func.__defaults__, func.__closure__)
    twin.__qualname__ = name
    return twin


draw_loop_parallel = numba.njit(parallel=True, cache=True, nogil=True)(_draw_loop)
draw_loop_serial = numba.njit(parallel=False, cache=True, nogil=True)(_twin(_draw_loop, "_serial"))


@dataclass
class DrawBlock:
    """Per-draw outputs of one block: rate [mm/kyr] and CO2 drawdown [t CO2 km-2 yr-1] as
    (cells, draws) float32 (NaN = nodata), rock row per cell (-1 none), status, clipped draws."""

    rate: np.ndarray
    co2: np.ndarray
    rock_row: np.ndarray
    status: np.ndarray
    clipped_draws: int


def draw_block(lithology_codes, runoff_mm_per_yr, pco2_atm, temperature_c, soluble_fraction, rocks,
               draws: DrawTable, chemistry: str, *, spec: UncertaintySpec, seed: int, row0: int = 0,
               col0: int = 0, soil_gain=None, lithology_valid=None, parallel: bool = True) -> DrawBlock:
    """All draws of one block of aligned cells (2-D arrays of one shape, or scalars for the
    value inputs). ``row0``, ``col0``: the block's first global row and column (cell-level
    noise is keyed on them). ``soil_gain``: 1 - exp(-0.00172 AET) per cell when PCO2 comes from
    AET (the amplitude error multiplies it), else None. ``rocks``: a ``RockLookup``."""
    from denude.core.kernel import _dense_code_rows
    from denude.core.constants import PCO2_MAX_ATM, TEMPERATURE_MAX_C, TEMPERATURE_MIN_C
    from denude.core.lookup import stacked_tables

    codes = np.asarray(lithology_codes)
    shape = codes.shape
    width = shape[-1] if codes.ndim == 2 else max(codes.size, 1)

    def flat(v, default=None):
        v = default if v is None else v
        return np.ascontiguousarray(np.broadcast_to(np.asarray(v, np.float64), shape)).reshape(-1)

    flat_codes = np.ascontiguousarray(codes, np.int64).reshape(-1)
    ok = (np.ones(shape, bool) if lithology_valid is None
          else np.ascontiguousarray(np.broadcast_to(np.asarray(lithology_valid, bool), shape))).reshape(-1)
    q, p, t = flat(runoff_mm_per_yr), flat(pco2_atm), flat(temperature_c)
    f, g = flat(soluble_fraction, 1.0), flat(soil_gain, 0.0)
    code_min, code_row = _dense_code_rows(rocks)
    tables, (t0, dt, lp0, dlp) = stacked_tables(chemistry)
    n, n_draws = flat_codes.size, draws.n_draws
    rate = np.empty((n, n_draws), np.float32)
    co2 = np.empty((n, n_draws), np.float32)
    status = np.empty(n, np.uint8)
    clipped = np.empty(n, np.int32)
    noise = spec.cell_noise
    loop = draw_loop_parallel if parallel else draw_loop_serial
    loop(flat_codes, ok, q, p, t, f, g, code_min, code_row, rocks.mineral_index,
         draws.q_factor, draws.dlogp, draws.dtemp, draws.soil_a, draws.soil_b,
         np.ascontiguousarray(draws.rate_factor.T), np.ascontiguousarray(draws.co2_factor.T),
         spec.runoff_sigma_ln if noise else 0.0, spec.pco2_sigma_log10 if noise else 0.0,
         spec.temperature_sigma_c if noise else 0.0, int(seed), int(row0), int(col0), int(width),
         tables, t0, dt, lp0, dlp, TEMPERATURE_MIN_C, TEMPERATURE_MAX_C, PCO2_MAX_ATM,
         rate, co2, status, clipped)
    rock_row = rocks.row_index(flat_codes) if len(rocks.codes) else np.full(n, -1, np.int64)
    rock_row = np.where(ok, rock_row, -1)
    return DrawBlock(rate, co2, np.ascontiguousarray(rock_row, np.int64), status, int(clipped.sum()))


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
_quantiles_serial = numba.njit(parallel=False, cache=True, nogil=True)(_twin(_quantiles, "_serial"))  # see _twin


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


# ------------------------------------------------------------------------------ zones
@numba.njit(cache=True, nogil=True)
def zone_draw_sums(run_zone, run_start, cell, coverage, row_area_km2, width, rate, co2, rock_row,
                   density, volume, mass, co2_sum, valid_area):
    """Add one block's covered cells to per-(zone, draw) sums: volume [m3/yr] = sum of
    w x rate [mm/kyr] (1 mm/kyr over 1 km2 = 1 m3/yr), mass [t/yr] = volume x density of the
    draw [g/cm3 = t/m3], co2_sum [t/yr] = sum of w x CO2 [t km-2 yr-1], valid_area [km2] = sum
    of w over computed cells; w = coverage x cell area [km2] (``row_area_km2`` per block row,
    or one value for all)."""
    n_draws = rate.shape[1]
    planar = row_area_km2.shape[0] == 1
    for r in range(run_zone.shape[0]):
        z = run_zone[r]
        for k in range(run_start[r], run_start[r + 1]):
            c = cell[k]
            if math.isnan(rate[c, 0]):
                continue
            w = coverage[k] * (row_area_km2[0] if planar else row_area_km2[c // width])
            valid_area[z] += w
            rr = rock_row[c]
            for d in range(n_draws):
                v = w * rate[c, d]
                volume[z, d] += v
                if rr >= 0:
                    mass[z, d] += v * density[d, rr]
                co2_sum[z, d] += w * co2[c, d]


def variance_shares(inputs, y):
    """First-order variance shares of ``y`` (N draws) over the columns of ``inputs`` (N x k),
    from a least-squares fit of y on the inputs: Pratt's product measure
    d_i = SRC_i x r(x_i, y), with SRC_i = b_i sd(x_i) / sd(y) the standardised regression
    coefficient. For inputs uncorrelated in the sample d_i = SRC_i^2, the variance fraction of a
    model linear in independent inputs; the d_i always sum to the fit's R^2 (about 1 for a
    nearly additive model; the rest is curvature, interactions and cell-level noise). A tiny
    share may come out slightly negative from sampling. Returns (shares (k,), R^2); NaN when y
    does not vary."""
    x = np.asarray(inputs, np.float64)
    y = np.asarray(y, np.float64)
    k = x.shape[1]
    sd_y = y.std()
    if k == 0 or not np.isfinite(sd_y) or sd_y <= 0 or y.size <= k + 1:
        return np.full(k, np.nan), float("nan")
    xc = x - x.mean(axis=0)
    yc = y - y.mean()
    coef, *_ = np.linalg.lstsq(xc, yc, rcond=None)
    sd_x = x.std(axis=0)
    src = coef * sd_x / sd_y
    with np.errstate(invalid="ignore", divide="ignore"):
        r = (xc.T @ yc) / (y.size * sd_x * sd_y)
    resid = yc - xc @ coef
    r2 = 1.0 - float(resid @ resid) / float(yc @ yc)
    return src * r, r2


def summary_quantiles(values, probs=QUANTILES, axis=-1) -> np.ndarray:
    """Quantiles over draws (numpy ``linear`` method), NaN-free input assumed."""
    return np.quantile(np.asarray(values, np.float64), probs, axis=axis)
