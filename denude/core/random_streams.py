"""Counter-based random streams of the uncertainty run: every number a hash of the integers
(seed, draw, stream, global row, global column), so no state is carried from cell to cell and
the window size, the tiling and the number of workers cannot change a value.

The hash is the splitmix64 finaliser (Steele, Lea & Flood 2014); a uniform in (0, 1) is made
from its top 53 bits, a standard normal by the Box-Muller transform of two such uniforms
(lanes 2s and 2s + 1 of stream s). No I/O.
"""

from __future__ import annotations

import math

import numba
import numpy as np

from denude.core import fast_kernel as _fk  # noqa: F401  (sets numba's threading layer first)

# Stream numbers (each uses lanes 2*s and 2*s + 1). Regional streams have row = col = 0 and
# numbers below CELL_STREAM; rock streams are keyed by rock code, not by table order.
STREAM_RUNOFF, STREAM_PCO2, STREAM_TEMPERATURE, STREAM_SOIL_A, STREAM_SOIL_B = 1, 2, 3, 4, 5
STREAM_SOIL_RATE = 6
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
