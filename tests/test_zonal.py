"""Zonal partial sums (denude.core.zonal): percentiles, merging, dense and sparse histograms."""

import numpy as np
import pytest

from denude.core.zonal import (
    N_RATE_BINS,
    PERCENTILE_RELATIVE_RESOLUTION,
    ZonalAccumulator,
    column_label,
    rate_bin_index,
)


def weighted_quantile(values, weights, q):
    """Reference: smallest value whose cumulative weight share reaches q (sorted cumulative weights)."""
    order = np.argsort(values)
    cum = np.cumsum(weights[order]) / weights.sum()
    return values[order][np.searchsorted(cum, q)]


@pytest.fixture
def cells():
    rng = np.random.default_rng(42)
    n = 60_000
    zone = rng.integers(0, 6, n)
    weight = rng.uniform(0.1, 1.0, n)
    rate = rng.gamma(2.0, 20.0, n)
    rate[:300] = np.nan
    rate[300:9000] = 0.0     # insoluble cells
    return zone, weight, rate


def test_bin_index_edges():
    idx = rate_bin_index([0.0, 1e-5, 0.01, 9999.0, 1e4, 5e4])
    assert idx[0] == 0 and idx[1] == 1 and idx[2] == 2
    assert idx[-2] == N_RATE_BINS - 1 and idx[-1] == N_RATE_BINS - 1
    assert idx[3] == N_RATE_BINS - 2


def test_resolution_is_documented_value():
    # analytic: 4000 log bins over 6 decades -> 10**(6/4000) - 1
    assert PERCENTILE_RELATIVE_RESOLUTION == pytest.approx(10 ** (6 / 4000) - 1, rel=1e-9)


def test_sums_mean_std_min_max(cells):
    zone, weight, rate = cells
    acc = ZonalAccumulator(6).add(zone, weight, rate)
    cols = acc.finalize()
    for k in range(6):
        m = (zone == k) & ~np.isnan(rate)
        # analytic: weighted mean / population std from the definition
        mean = np.average(rate[m], weights=weight[m])
        std = np.sqrt(np.average((rate[m] - mean) ** 2, weights=weight[m]))
        assert cols["denudation_mean_mm_per_kyr"][k] == pytest.approx(mean, rel=1e-12)
        assert cols["denudation_std_mm_per_kyr"][k] == pytest.approx(std, rel=1e-9)
        assert cols["denudation_min_mm_per_kyr"][k] == rate[m].min()
        assert cols["denudation_max_mm_per_kyr"][k] == rate[m].max()
        assert cols["valid_cells"][k] == m.sum()
        assert cols["nodata_cells"][k] == ((zone == k) & np.isnan(rate)).sum()
        assert cols["area_km2"][k] == pytest.approx(weight[zone == k].sum(), rel=1e-12)
        assert cols["rock_volume_m3_per_yr"][k] == pytest.approx((weight[m] * rate[m]).sum(), rel=1e-12)


def test_percentiles_within_bin_resolution(cells):
    zone, weight, rate = cells
    cols = ZonalAccumulator(6).add(zone, weight, rate).finalize()
    for k in range(6):
        m = (zone == k) & ~np.isnan(rate)
        for p in (10, 50, 90):
            ref = weighted_quantile(rate[m], weight[m], p / 100)  # reference: sorted cumulative weights
            got = cols[f"denudation_p{p}_mm_per_kyr"][k]
            # one bin of resolution plus the gap between neighbouring sample values
            assert got == pytest.approx(ref, rel=2 * PERCENTILE_RELATIVE_RESOLUTION, abs=0.02)


def test_zero_share_gives_zero_percentile():
    # analytic: 30 % of the area has rate 0, so p10 is exactly 0
    rate = np.r_[np.zeros(30), np.linspace(10, 20, 70)]
    cols = ZonalAccumulator(1).add(np.zeros(100, int), np.ones(100), rate).finalize()
    assert cols["denudation_p10_mm_per_kyr"][0] == 0.0
    assert cols["denudation_p90_mm_per_kyr"][0] > 10


def test_constant_zone_percentiles_exact():
    # analytic: every percentile of a constant is the constant
    cols = ZonalAccumulator(1).add(np.zeros(5, int), np.ones(5), np.full(5, 37.3)).finalize()
    for p in (10, 50, 90):
        assert cols[f"denudation_p{p}_mm_per_kyr"][0] == 37.3


def test_merge_equals_single_pass_and_sparse_equals_dense(cells):
    zone, weight, rate = cells
    whole = ZonalAccumulator(6).add(zone, weight, rate).finalize()
    half = len(zone) // 3
    a = ZonalAccumulator(6).add(zone[:half], weight[:half], rate[:half])
    b = ZonalAccumulator(6, dense_limit=-1).add(zone[half:], weight[half:], rate[half:])
    merged = a.merge(b).finalize()
    sparse = ZonalAccumulator(6, dense_limit=-1).merge(ZonalAccumulator.from_state(a.state())).finalize()
    for name, values in whole.items():
        np.testing.assert_allclose(merged[name], values, rtol=1e-12, equal_nan=True)
        np.testing.assert_allclose(sparse[name], values, rtol=1e-12, equal_nan=True)


def test_classes_rocks_and_empty_zones():
    acc = ZonalAccumulator(3, n_classes=3, n_rocks=2)
    acc.add([0, 0, 0, 1], [1.0, 2.0, 0.5, 1.0], [1.0, 30.0, np.nan, 2.0],
            hazard_class=np.array([0, 2, 255, 0], np.uint8), rock_index=[1, 0, 0, -1],
            density_g_cm3=[2.0, 2.5, np.nan, np.nan], co2_t_per_km2_yr=[1.0, 1.0, np.nan, 4.0],
            soluble_fraction=[1.0, 0.5, np.nan, 0.0])
    cols = acc.finalize(class_names=["low", "mid", "very high"], rock_names=["gypsum", "chalk"])
    assert cols["hazard_area_km2_low"].tolist() == [1.0, 1.0, 0.0]
    assert cols["hazard_area_km2_very_high"].tolist() == [2.0, 0.0, 0.0]
    assert cols["hazard_max_class"].tolist() == [2, 0, -1]
    assert cols["dominant_rock"].tolist() == ["gypsum", "", ""]      # 2.5 km2 of row 0 vs 1 km2 of row 1
    # hand-derived: 1*1*2.0 + 2*30*2.5
    assert cols["rock_mass_t_per_yr"][0] == pytest.approx(152.0)
    assert cols["co2_drawdown_t_per_yr"].tolist() == [3.0, 4.0, 0.0]
    assert cols["soluble_area_km2"].tolist() == [2.0, 0.0, 0.0]
    assert np.isnan(cols["denudation_mean_mm_per_kyr"][2]) and cols["area_km2"][2] == 0.0


def test_points_columns():
    acc = ZonalAccumulator(2).add([0, 0], [1.0, 1.0], [10.0, 30.0])
    acc.add_points([0, 0, 1], [40.0, np.nan, 5.0])
    cols = acc.finalize()
    assert cols["sinkhole_count"].tolist() == [2, 1]
    assert cols["sinkhole_density_per_km2"][0] == pytest.approx(1.0)   # 2 points / 2 km2
    assert cols["sinkhole_rate_ratio"][0] == pytest.approx(2.0)        # 40 / 20
    assert np.isnan(cols["sinkhole_rate_ratio"][1])


def test_column_label():
    assert column_label("very high") == "very_high"
    assert column_label(" Low / moderate ") == "low_moderate"


def test_float32_bin_table_equals_searchsorted_rule():
    # the bits table is an internal shortcut: it must give exactly the bins of rate_bin_index
    from denude.core.zonal import _F32_BIN_TABLE, _UPPER, RATE_BIN_EDGES_MM_PER_KYR, _rate_bin_float32

    rng = np.random.default_rng(5)
    bits = rng.integers(1, 0x7F800000, 400_000, dtype=np.uint32)          # every positive finite float32
    edges32 = RATE_BIN_EDGES_MM_PER_KYR.astype(np.float32)
    near = np.concatenate([np.nextafter(edges32, np.float32(0)), edges32, np.nextafter(edges32, np.float32(np.inf))])
    values = np.concatenate([bits.view(np.float32), near, np.float32([1e-30, 0.01, 1e4, 3.4e38])])
    got = np.array([_rate_bin_float32(float(v), np.float32(v).view(np.uint32), _F32_BIN_TABLE, _UPPER) for v in values])
    np.testing.assert_array_equal(got, rate_bin_index(values.astype(np.float64)))


def test_float32_and_float64_rates_give_the_same_sums():
    rng = np.random.default_rng(8)
    n = 20_000
    zone = np.sort(rng.integers(0, 5, n))
    rate32 = rng.gamma(2.0, 20.0, n).astype(np.float32)
    rate32[::97] = np.nan
    rate32[::53] = 0.0
    cov = rng.uniform(0.01, 1.0, n)
    a = ZonalAccumulator(5).add_cells(zone, np.arange(n), cov, np.ones(1), n, rate32)
    b = ZonalAccumulator(5).add_cells(zone, np.arange(n), cov, np.ones(1), n, rate32.astype(np.float64))
    np.testing.assert_array_equal(a.hist, b.hist)
    np.testing.assert_array_equal(a.sum_w_rate, b.sum_w_rate)


def test_runs_equal_pairs_and_code_lookup_paths_agree():
    rng = np.random.default_rng(9)
    n = 5_000
    zone = np.repeat([2, 0, 2, 1], [1000, 1500, 500, 2000])              # zone 2 comes back: two runs
    cell = rng.permutation(n)
    cov = rng.uniform(0.0, 1.0, n)
    rate = rng.uniform(0.0, 80.0, n)
    short = rng.choice([0, 1, 3], n)
    wide = np.where(short == 3, 300_000, short)                             # same rocks, codes 0, 1, 300000
    kw = dict(rock_density_g_cm3=np.array([2.0, 2.7, 2.3]))
    by_pair = ZonalAccumulator(3, n_rocks=3).add_cells(zone, cell, cov, np.ones(1), n, rate, lithology_code=short,
                                                       rock_codes=np.array([0, 1, 3]), **kw)
    by_run = ZonalAccumulator(3, n_rocks=3).add_runs([2, 0, 2, 1], [0, 1000, 2500, 3000, 5000], cell, cov, np.ones(1), n,
                                                     rate, lithology_code=wide, rock_codes=np.array([0, 1, 300_000]), **kw)
    for name in ("area_km2", "sum_w_rate", "sum_w_rate_density", "rock_area_km2", "hist"):
        np.testing.assert_allclose(getattr(by_run, name), getattr(by_pair, name), rtol=1e-13)
    # hand check: the rock areas of zone 1 are the coverage sums of its cells by code
    z1 = slice(3000, 5000)
    assert by_run.rock_area_km2[1, 2] == pytest.approx(cov[z1][short[cell[z1]] == 3].sum(), rel=1e-12)
