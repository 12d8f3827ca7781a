"""Evaluating a rate map against a sinkhole record: ROC AUC, class densities with exact
Poisson intervals, and class breaks chosen from the record. Pure numpy.

* ROC AUC of a score (the rate) as a predictor of positive cells (cells holding at least one
  sinkhole) against the other mapped cells, ties counted one half (the Mann-Whitney form):
  AUC = P(score_pos > score_neg) + 0.5 P(score_pos = score_neg). Computed in one streaming
  pass: the negatives are placed among the sorted distinct positive scores, so no full sort of
  the map is needed (``AucCounter``).
* Density of a Poisson count k over an area A [km2] with the exact (Garwood 1936) 95 %
  interval: the lower limit L solves P(X >= k | L) = 0.025 (0 for k = 0), the upper U solves
  P(X <= k | U) = 0.025; both by bisection on the Poisson CDF (summed in log space).
* Breaks from the record: start at area quantiles of the rate, then merge neighbouring classes
  whose density falls (pool-adjacent-violators), so densities rise with class.
"""

from __future__ import annotations

import math

import numpy as np

CONFIDENCE = 0.95


class AucCounter:
    """Streaming exact ROC AUC with ties: give the positive scores once, then the scores of
    every cell in pieces (``add``); a cell's positive flag says whether it is one of the positives."""

    def __init__(self, positive_scores):
        pos = np.asarray(positive_scores, dtype=np.float64)
        pos = pos[np.isfinite(pos)]
        self.values, self.pos_counts = np.unique(pos, return_counts=True)
        # positives strictly above each slot j (slot j: between values[j-1] and values[j])
        self._above = np.concatenate((np.cumsum(self.pos_counts[::-1])[::-1], [0])).astype(np.float64)
        self.n_pos = int(pos.size)
        self.n_neg = 0
        self._wins = 0.0

    def add_negatives(self, scores) -> None:
        """Add the scores of negative cells (NaN skipped)."""
        s = np.asarray(scores, dtype=np.float64).ravel()
        s = s[np.isfinite(s)]
        if not s.size:
            return
        self.n_neg += int(s.size)
        if not self.n_pos:
            return
        j = np.searchsorted(self.values, s, side="left")         # values[j-1] < s <= values[j]
        tie = (j < self.values.size) & (self.values[np.minimum(j, self.values.size - 1)] == s)
        # positives above s: those at index j.. minus the tied ones
        above = self._above[j] - np.where(tie, self.pos_counts[np.minimum(j, self.values.size - 1)], 0)
        ties = np.where(tie, self.pos_counts[np.minimum(j, self.values.size - 1)], 0)
        self._wins += float(above.sum()) + 0.5 * float(ties.sum())

    @property
    def auc(self) -> float:
        """AUC in [0, 1]; NaN without positives or negatives."""
        if not self.n_pos or not self.n_neg:
            return float("nan")
        return self._wins / (self.n_pos * self.n_neg)


def roc_auc(scores, labels) -> float:
    """Exact ROC AUC of ``scores`` for binary ``labels`` (1 positive), ties one half; NaN scores dropped."""
    s = np.asarray(scores, dtype=np.float64).ravel()
    y = np.asarray(labels).ravel().astype(bool)
    keep = np.isfinite(s)
    counter = AucCounter(s[keep & y])
    counter.add_negatives(s[keep & ~y])
    return counter.auc


def _log_poisson_cdf(k: int, mean: float) -> float:
    """log P(X <= k) for X ~ Poisson(mean), summed in log space (exact for any k)."""
    if mean <= 0:
        return 0.0
    i = np.arange(k + 1, dtype=np.float64)
    terms = i * math.log(mean) - mean - np.array([math.lgamma(v + 1.0) for v in i])
    top = terms.max()
    return float(top + math.log(np.exp(terms - top).sum()))


def _bisect(f, lo, hi, iterations=200):
    """Root of an increasing function f on [lo, hi] by bisection (relative 1e-12)."""
    for _ in range(iterations):
        mid = 0.5 * (lo + hi)
        if f(mid) > 0:
            hi = mid
        else:
            lo = mid
        if hi - lo <= 1e-12 * max(hi, 1e-300):
            break
    return 0.5 * (lo + hi)


def poisson_interval(count: int, confidence: float = CONFIDENCE) -> tuple[float, float]:
    """Exact (Garwood) interval of a Poisson mean from one observed ``count`` (module docstring)."""
    k = int(count)
    if k < 0:
        raise ValueError("count must be >= 0")
    alpha = (1.0 - confidence) / 2.0
    log_alpha = math.log(alpha)
    hi_bound = k + 20.0 * math.sqrt(k + 1.0) + 20.0
    # upper: P(X <= k | U) = alpha; the CDF falls as the mean rises
    upper = _bisect(lambda m: log_alpha - _log_poisson_cdf(k, m), 0.0, hi_bound)
    if k == 0:
        return 0.0, upper
    # lower: P(X >= k | L) = 1 - P(X <= k-1 | L) = alpha
    lower = _bisect(lambda m: (1.0 - math.exp(_log_poisson_cdf(k - 1, m))) - alpha, 0.0, hi_bound)
    return lower, upper


def class_densities(counts, areas_km2, confidence: float = CONFIDENCE) -> list[dict]:
    """Per class: count, area [km2], density [1/km2] and its exact Poisson interval (NaN where area is 0)."""
    rows = []
    for k, area in zip(counts, areas_km2):
        k, area = int(k), float(area)
        if area > 0:
            lo, hi = poisson_interval(k, confidence)
            rows.append({"count": k, "area_km2": area, "density_per_km2": k / area,
                         "density_ci95_low": lo / area, "density_ci95_high": hi / area})
        else:
            rows.append({"count": k, "area_km2": area, "density_per_km2": float("nan"),
                         "density_ci95_low": float("nan"), "density_ci95_high": float("nan")})
    return rows


def falling_steps(densities) -> list[int]:
    """Indices k where the density of class k is below that of the nearest lower class with area
    (NaN classes skipped): where density does not rise with class."""
    steps, last = [], None
    for k, d in enumerate(densities):
        if not np.isfinite(d):
            continue
        if last is not None and d < last:
            steps.append(k)
        last = d
    return steps


def weighted_quantiles(values, weights, levels) -> np.ndarray:
    """Weighted quantiles (inverse of the weighted CDF, lower value at a step) of finite values."""
    v = np.asarray(values, dtype=np.float64).ravel()
    w = np.asarray(weights, dtype=np.float64).ravel()
    ok = np.isfinite(v) & (w > 0)
    v, w = v[ok], w[ok]
    order = np.argsort(v, kind="stable")
    v, cw = v[order], np.cumsum(w[order])
    cw /= cw[-1]
    idx = np.searchsorted(cw, np.asarray(levels, dtype=np.float64), side="left")
    return v[np.minimum(idx, v.size - 1)]


def breaks_from_record(rate_mm_per_kyr, area_km2, is_sinkhole_count, n_classes: int):
    """Class breaks [mm/kyr] from the record: start at ``n_classes`` equal-area quantiles of the rate
    over the mapped cells, drop repeated breaks, then merge neighbours while a class holds fewer
    sinkholes per km2 than the one below (pool-adjacent-violators), so densities rise.

    ``is_sinkhole_count``: sinkholes per cell (same shape as the rate). Returns
    ``(breaks, quantile_levels, densities)``; the breaks list may be shorter than ``n_classes - 1``.
    """
    rate = np.asarray(rate_mm_per_kyr, dtype=np.float64).ravel()
    area = np.broadcast_to(np.asarray(area_km2, dtype=np.float64), np.shape(rate_mm_per_kyr)).ravel()
    hits = np.asarray(is_sinkhole_count, dtype=np.float64).ravel()
    ok = np.isfinite(rate)
    rate, area, hits = rate[ok], area[ok], hits[ok]
    levels = np.arange(1, n_classes) / n_classes
    candidates = weighted_quantiles(rate, area, levels)
    breaks, kept_levels = [], []
    for b, q in zip(candidates, levels):
        if (not breaks or b > breaks[-1]) and b > rate.min():
            breaks.append(float(b))
            kept_levels.append(float(q))

    def densities(br):
        cls = np.searchsorted(np.asarray(br), rate, side="right")
        a = np.bincount(cls, weights=area, minlength=len(br) + 1)
        c = np.bincount(cls, weights=hits, minlength=len(br) + 1)
        with np.errstate(invalid="ignore", divide="ignore"):
            return np.where(a > 0, c / a, np.nan)

    dens = densities(breaks)
    while breaks:
        steps = falling_steps(dens)
        if not steps:
            break
        k = steps[0]                     # class k falls below class k-1: merge them (drop break k-1)
        del breaks[k - 1]
        del kept_levels[k - 1]
        dens = densities(breaks)
    return breaks, kept_levels, [float(d) for d in dens]
