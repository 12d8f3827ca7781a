"""Sinkhole evaluation numerics: ROC AUC against scikit-learn, exact Poisson intervals against
scipy's chi-square quantiles (Garwood 1936: L = chi2(a/2, 2k)/2, U = chi2(1-a/2, 2k+2)/2)."""

import numpy as np
import pytest

sklearn_metrics = pytest.importorskip("sklearn.metrics")
stats = pytest.importorskip("scipy.stats")

from denude.core.evaluation import (AucCounter, breaks_from_record, class_densities, falling_steps,  # noqa: E402
                                    poisson_interval, roc_auc)


@pytest.mark.parametrize("seed", [0, 1, 2])
def test_auc_with_ties_against_sklearn(seed):
    rng = np.random.default_rng(seed)
    scores = np.round(rng.gamma(2.0, 10.0, 4000), 0)       # many ties
    labels = rng.random(4000) < 0.01 + 0.002 * scores
    # reference: scikit-learn roc_auc_score
    assert roc_auc(scores, labels) == pytest.approx(sklearn_metrics.roc_auc_score(labels, scores), abs=1e-12)


def test_auc_streamed_in_pieces_equals_whole():
    rng = np.random.default_rng(5)
    scores = rng.integers(0, 7, 3000).astype(float)
    labels = rng.random(3000) < 0.05
    counter = AucCounter(scores[labels])
    for part in np.array_split(scores[~labels], 7):
        counter.add_negatives(part)
    assert counter.auc == pytest.approx(sklearn_metrics.roc_auc_score(labels, scores), abs=1e-12)


def test_auc_extremes():
    assert roc_auc([1, 2, 3, 4], [0, 0, 1, 1]) == 1.0
    assert roc_auc([1, 2, 3, 4], [1, 1, 0, 0]) == 0.0
    assert roc_auc([2, 2, 2, 2], [1, 0, 0, 1]) == 0.5
    assert np.isnan(roc_auc([1, 2], [0, 0]))


@pytest.mark.parametrize("count", [0, 1, 2, 5, 17, 120, 2500])
def test_garwood_interval_against_chi_square(count):
    lo, hi = poisson_interval(count)
    # reference: scipy.stats.chi2.ppf (Garwood 1936 exact interval)
    ref_lo = stats.chi2.ppf(0.025, 2 * count) / 2 if count else 0.0
    ref_hi = stats.chi2.ppf(0.975, 2 * count + 2) / 2
    assert lo == pytest.approx(ref_lo, rel=1e-8, abs=1e-12)
    assert hi == pytest.approx(ref_hi, rel=1e-8)


def test_class_densities_and_falling_steps():
    rows = class_densities([4, 0, 9], [2.0, 0.0, 3.0])
    assert rows[0]["density_per_km2"] == 2.0
    assert rows[0]["density_ci95_high"] == pytest.approx(stats.chi2.ppf(0.975, 10) / 2 / 2.0, rel=1e-8)
    assert np.isnan(rows[1]["density_per_km2"])
    assert falling_steps([1.0, np.nan, 3.0, 2.0, 4.0]) == [3]
    assert falling_steps([0.1, 0.2, 0.2]) == []


def test_breaks_from_record_make_densities_rise():
    rng = np.random.default_rng(3)
    rate = rng.uniform(0, 100, 20000)
    # sinkholes most likely at middle rates, so plain quantile classes would fall at the top
    p = 0.002 + 0.02 * np.exp(-((rate - 60) / 15) ** 2)
    hits = (rng.random(rate.size) < p).astype(float)
    breaks, levels, dens = breaks_from_record(rate, 0.01, hits, 5)
    assert falling_steps(dens) == []
    assert len(dens) == len(breaks) + 1 and len(levels) == len(breaks)
    assert all(b2 > b1 for b1, b2 in zip(breaks, breaks[1:]))
