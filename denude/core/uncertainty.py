"""Monte Carlo uncertainty of the rates: per-draw perturbations, the per-cell draw loop,
per-zone sums and first-order variance shares (the random streams are in
``core/random_streams.py``, the per-cell quantiles in ``core/draw_quantiles.py``). No I/O.

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
# the random streams and the quantiles have modules of their own; re-exported for the old import path
from denude.core.draw_quantiles import (QUANTILE_LABELS, QUANTILES, block_quantiles,  # noqa: F401
                                        cell_quantiles, summary_quantiles)
from denude.core.draw_quantiles import twin as _twin
from denude.core.random_streams import (CELL_STREAM, STREAM_PCO2, STREAM_ROCK, STREAM_RUNOFF,  # noqa: F401
                                        STREAM_SATURATION, STREAM_SOIL_A, STREAM_SOIL_B, STREAM_SOIL_RATE,
                                        STREAM_TEMPERATURE,
                                        key_normal, key_uniform, regional_normals, regional_uniforms)

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
    soil_co2_rate_sigma_ln [1]: the model's rate 0.00172 per mm of AET times exp(N(0, sigma))
    saturation_ratio: ((mineral, low, high), ...) uniform real / equilibrium load, 0-1
    rocks: ((rock name, "purity" | "density_g_cm3", low, high), ...) uniform ranges
    cell_noise: also draw the runoff, PCO2 and temperature errors independently per cell
    """

    runoff_sigma_ln: float = 0.0
    pco2_sigma_log10: float = 0.0
    temperature_sigma_c: float = 0.0
    soil_co2_intercept_sigma_log10: float = 0.0
    soil_co2_amplitude_sigma_log10: float = 0.0
    soil_co2_rate_sigma_ln: float = 0.0
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
            "soil_co2_rate_sigma_ln": self.soil_co2_rate_sigma_ln,
            "cell_noise": self.cell_noise,
            "saturation_ratio": {m: [lo, hi] for m, lo, hi in self.saturation_ratio},
            "rocks": {name: {k: [lo, hi] for n, k, lo, hi in self.rocks if n == name}
                      for name in dict.fromkeys(n for n, _, _, _ in self.rocks)},
        }


@dataclass
class DrawTable:
    """Regional perturbations of every draw, and the per-draw rock factors.

    q_factor [1], dlogp [log10 atm], dtemp [degrees C], soil_a, soil_b [log10 atm], soil_rate
    [1, factor on the rate 0.00172 per mm]: shape (N,)
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
    soil_rate: np.ndarray
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
    soil_rate = np.ones(n_draws)
    if pco2_from_aet:
        soil_a = normal(STREAM_SOIL_A, spec.soil_co2_intercept_sigma_log10, "soil_co2_intercept")
        soil_b = normal(STREAM_SOIL_B, spec.soil_co2_amplitude_sigma_log10, "soil_co2_amplitude")
        soil_rate = np.exp(normal(STREAM_SOIL_RATE, spec.soil_co2_rate_sigma_ln, "soil_co2_rate"))

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
                     np.asarray(soil_rate, float), np.ascontiguousarray(rate_factor), np.ascontiguousarray(co2_factor),
                     np.ascontiguousarray(density), x, input_names)


# ------------------------------------------------------------------------ the draw loop
#: Cell status of the draw loop (shared numbers with ``fast_kernel``).
COMPUTED, NODATA, UNKNOWN_CODE, OUT_OF_RANGE = 0, 1, 2, 3


def _draw_loop(codes, litho_ok, q, p, t, f, g, code_min, code_row, row_mineral,
               q_factor, dlogp, dtemp, soil_a, soil_b, soil_rate, soil_amplitude, rate_factor, co2_factor,
               noise_q, noise_p, noise_t, seed, row0, col0, width,
               tables, t0, dt, lp0, dlp, t_min, t_max, p_max, rate_out, co2_out, status, clipped):
    """Fill rate_out and co2_out (cells x draws, float32, NaN where the base cell is not
    computed), status per cell and the number of clipped draws per cell. ``g`` is the soil-CO2
    gain 1 - exp(-k AET) of the base PCO2 ``p``; a draw's rate factor m gives the gain
    1 - (1 - g)**m = 1 - exp(-m k AET), and the base amplitude ``soil_amplitude`` [log10 atm]
    moves log10 PCO2 by soil_amplitude * (gain - g).

    Long on purpose: this is the compiled numba loop over cells (parallel build) and draws.
    Status checks, perturbation and the bilinear table look-up stay inline in one body so
    numba keeps each cell's values in registers; helper calls per draw would cost speed."""
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
            gd = gk
            if soil_rate[d] != 1.0:
                gd = 1.0 - (1.0 - gk) ** soil_rate[d]
            lpd = lpk + dlogp[d] + soil_a[d] + soil_b[d] * gd + soil_amplitude * (gd - gk)
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
    AET (the amplitude and rate errors act through it), else None. ``rocks``: a ``RockLookup``."""
    from denude.core.kernel import _dense_code_rows
    from denude.core.constants import PCO2_MAX_ATM, TEMPERATURE_MAX_C, TEMPERATURE_MIN_C
    from denude.core.lookup import stacked_tables
    from denude.core.soil_co2 import BROOK_AMPLITUDE_LOG10_ATM

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
         draws.q_factor, draws.dlogp, draws.dtemp, draws.soil_a, draws.soil_b, draws.soil_rate,
         BROOK_AMPLITUDE_LOG10_ATM,
         np.ascontiguousarray(draws.rate_factor.T), np.ascontiguousarray(draws.co2_factor.T),
         spec.runoff_sigma_ln if noise else 0.0, spec.pco2_sigma_log10 if noise else 0.0,
         spec.temperature_sigma_c if noise else 0.0, int(seed), int(row0), int(col0), int(width),
         tables, t0, dt, lp0, dlp, TEMPERATURE_MIN_C, TEMPERATURE_MAX_C, PCO2_MAX_ATM,
         rate, co2, status, clipped)
    rock_row = rocks.row_index(flat_codes) if len(rocks.codes) else np.full(n, -1, np.int64)
    rock_row = np.where(ok, rock_row, -1)
    return DrawBlock(rate, co2, np.ascontiguousarray(rock_row, np.int64), status, int(clipped.sum()))


# ------------------------------------------------------------------------------ zones
#: Zone sums are kept as fixed-point integers so that they do not depend on the order in which
#: cells are added (the window layout, the number of workers): each term v [any unit] is cut
#: into three int64 limbs, floor(v), then two 31-bit fractions, i.e. v truncated to 2**-62
#: absolute; limb sums are exact and associative (for fewer than 2**32 terms per sum and
#: totals below 2**63), so any partition of the cells gives the same integers.
EXACT_LIMBS = 3
_LIMB_SCALE = 2.0 ** 31


@numba.njit(cache=True, nogil=True, inline="always")
def _add_exact(acc, i, j, v):
    """acc[i, j, :] += the fixed-point limbs of v (finite float64)."""
    a = math.floor(v)
    r = (v - a) * _LIMB_SCALE
    b = math.floor(r)
    c = math.floor((r - b) * _LIMB_SCALE)
    acc[i, j, 0] += np.int64(a)
    acc[i, j, 1] += np.int64(b)
    acc[i, j, 2] += np.int64(c)


def exact_zeros(*shape) -> np.ndarray:
    """An empty fixed-point accumulator for sums of the given shape (see ``EXACT_LIMBS``)."""
    return np.zeros(shape + (EXACT_LIMBS,), np.int64)


def exact_value(acc) -> np.ndarray:
    """float64 values of fixed-point accumulators (last axis the limbs)."""
    acc = np.asarray(acc)
    return (acc[..., 0].astype(np.float64) + acc[..., 1].astype(np.float64) / _LIMB_SCALE
            + acc[..., 2].astype(np.float64) / _LIMB_SCALE ** 2)


@numba.njit(cache=True, nogil=True)
def zone_draw_sums(run_zone, run_start, cell, coverage, row_area_km2, width, rate, co2, rock_row,
                   density, volume, mass, co2_sum, valid_area):
    """Add one block's covered cells to per-(zone, draw) fixed-point sums (``exact_zeros``):
    volume [m3/yr] = sum of w x rate [mm/kyr] (1 mm/kyr over 1 km2 = 1 m3/yr), mass [t/yr] =
    volume x density of the draw [g/cm3 = t/m3], co2_sum [t/yr] = sum of w x CO2
    [t km-2 yr-1], valid_area [km2] = sum of w over computed cells (shape (zones, 1, limbs));
    w = coverage x cell area [km2] (``row_area_km2`` per block row, or one value for all)."""
    n_draws = rate.shape[1]
    planar = row_area_km2.shape[0] == 1
    for r in range(run_zone.shape[0]):
        z = run_zone[r]
        for k in range(run_start[r], run_start[r + 1]):
            c = cell[k]
            if math.isnan(rate[c, 0]):
                continue
            w = coverage[k] * (row_area_km2[0] if planar else row_area_km2[c // width])
            _add_exact(valid_area, z, 0, w)
            rr = rock_row[c]
            for d in range(n_draws):
                v = w * rate[c, d]
                _add_exact(volume, z, d, v)
                if rr >= 0:
                    _add_exact(mass, z, d, v * density[d, rr])
                _add_exact(co2_sum, z, d, w * co2[c, d])


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
