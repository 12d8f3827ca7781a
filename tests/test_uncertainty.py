"""`denude uncertainty`: random streams, analytic and delta-method checks of the draws,
variance shares, reproducibility (tiling, workers, seed) and the command's outputs."""

import csv
import json
import math

import geopandas
import numpy as np
import pytest
import rasterio
from scipy import stats
from shapely.geometry import box
from typer.testing import CliRunner

from denude.cli.main import app
from denude.core.dissolution import equilibrium_load_mol_per_l
from denude.core.rocks import RockTable
from denude.core.uncertainty import (
    UncertaintySpec,
    block_quantiles,
    cell_quantiles,
    draw_block,
    draw_table,
    exact_value,
    exact_zeros,
    key_normal,
    key_uniform,
    regional_normals,
    variance_shares,
    zone_draw_sums,
)
from denude.errors import DenudeError, JobFileError
from denude.execution import ZoneSpec, run_map, run_uncertainty
from denude.execution.uncertainty_run import band_files
from denude.io.jobfile import build_settings
from denude.io.uncertainty_spec import parse_uncertainty, read_uncertainty

from conftest import TEST_CRS, TEST_ORIGIN, TEST_RES

runner = CliRunner()


def lookup_and_table(spec, seed, n):
    rocks = RockTable.builtin()
    lk = rocks.lookup()
    names = [rocks.by_code(int(c)).name for c in lk.codes]
    return lk, draw_table(spec, seed, n, lk.codes, lk.mineral_index, lk.density_g_cm3, lk.purity, names)


# ----------------------------------------------------------------------- random streams
def test_streams_are_uniform_and_normal():
    u = np.array([key_uniform(3, d, 7, 11, 13) for d in range(20000)])
    # Kolmogorov-Smirnov against scipy's uniform and normal (independent library)
    assert stats.kstest(u, "uniform").pvalue > 1e-3
    z = regional_normals(3, 20000, 5)
    assert stats.kstest(z, "norm").pvalue > 1e-3
    assert abs(z.mean()) < 4 / math.sqrt(z.size) and abs(z.std() - 1) < 0.03
    # different streams, draws and cells are uncorrelated (|r| < 4 / sqrt(n): sampling bound)
    assert abs(np.corrcoef(z, regional_normals(3, 20000, 6))[0, 1]) < 4 / math.sqrt(z.size)
    cells = np.array([key_normal(3, 0, 9, r, c) for r in range(100) for c in range(100)])
    assert abs(np.corrcoef(cells[:-1], cells[1:])[0, 1]) < 4 / math.sqrt(cells.size)


def test_stream_values_depend_only_on_their_keys():
    assert key_normal(1, 2, 3, 4, 5) == key_normal(1, 2, 3, 4, 5)
    assert key_normal(1, 2, 3, 4, 5) != key_normal(1, 2, 3, 5, 4)
    assert key_normal(2, 2, 3, 4, 5) != key_normal(1, 2, 3, 4, 5)
    np.testing.assert_array_equal(regional_normals(9, 50, 1), regional_normals(9, 80, 1)[:50])


# -------------------------------------------------------------- analytic and delta method
def test_runoff_only_quantiles_are_lognormal_quantiles_of_the_rate():
    sigma, n = 0.2, 4000
    spec = UncertaintySpec(runoff_sigma_ln=sigma)
    lk, table = lookup_and_table(spec, 11, n)
    codes = np.ones((1, 3), np.int64)                      # limestone
    block = draw_block(codes, 500.0, 0.01, 10.0, 1.0, lk, table, "white", spec=spec, seed=11)
    no_error = UncertaintySpec()
    deterministic = draw_block(codes, 500.0, 0.01, 10.0, 1.0, lk, lookup_and_table(no_error, 11, 1)[1], "white",
                               spec=no_error, seed=11).rate[0, 0]
    q = cell_quantiles(block.rate)[:, 0]
    for value, p in zip(q, (0.05, 0.5, 0.95)):
        # derived: D is linear in runoff, so its p-quantile is D0 exp(sigma z_p) (z_p from scipy)
        z_p = stats.norm.ppf(p)
        expected = deterministic * math.exp(sigma * z_p)
        # sampling error of a sample quantile: sqrt(p (1 - p) / n) / phi(z_p) in z units
        se = math.sqrt(p * (1 - p) / n) / stats.norm.pdf(z_p) * sigma * expected
        assert abs(value - expected) < 4 * se, (p, value, expected)
    # every cell gets the same regional draws; the quantile is numpy's linear one of them
    np.testing.assert_allclose(q, np.quantile(block.rate[0].astype(np.float64), [0.05, 0.5, 0.95]), rtol=1e-6)
    assert np.all(block.rate[0] == block.rate[2])


def _elasticities(t=10.0, p=0.01):
    """d ln c / d ln PCO2 and d ln c / dT of the direct solver, by central differences (derived)."""
    h = 1e-3
    c = lambda tt, pp: float(equilibrium_load_mol_per_l("calcite", tt, pp, "white"))  # noqa: E731
    e_p = (math.log(c(t, p * math.exp(h))) - math.log(c(t, p * math.exp(-h)))) / (2 * h)
    e_t = (math.log(c(t + 0.01, p)) - math.log(c(t - 0.01, p))) / 0.02
    return e_p, e_t


def test_spread_matches_first_order_propagation_and_shares_sum_to_one():
    s_q, s_p, s_t, n = 0.03, 0.03, 0.3, 4000
    spec = UncertaintySpec(runoff_sigma_ln=s_q, pco2_sigma_log10=s_p, temperature_sigma_c=s_t)
    lk, table = lookup_and_table(spec, 5, n)
    block = draw_block(np.ones((1, 1), np.int64), 500.0, 0.01, 10.0, 1.0, lk, table, "white", spec=spec, seed=5)
    rate = block.rate[0].astype(np.float64)
    e_p, e_t = _elasticities()
    # derived: [Ca]eq ~ PCO2^(1/3) at fixed activity coefficients (science notes section 5);
    # more calcium lowers the gammas, so the elasticity is a little above 1/3
    assert 1 / 3 < e_p < 0.4
    assert e_t < 0                                         # retrograde solubility
    # delta method (derived): var(ln D) = s_q^2 + (e_p ln10 s_p)^2 + (e_t s_t)^2
    parts = np.array([s_q**2, (e_p * math.log(10) * s_p) ** 2, (e_t * s_t) ** 2])
    sd_delta = math.sqrt(parts.sum())
    sd_mc = np.log(rate).std()
    assert sd_mc == pytest.approx(sd_delta, rel=0.05)      # sampling error of an sd at n=4000: ~1.1 %
    d0 = float(equilibrium_load_mol_per_l("calcite", 10.0, 0.01, "white")) * 500 * 100.09 / (2.60 * 0.95)
    assert rate.mean() == pytest.approx(d0 * math.exp(sd_delta**2 / 2), rel=3 * sd_delta / math.sqrt(n) + 2e-4)
    shares, r2 = variance_shares(table.inputs, rate)
    assert table.input_names == ["runoff", "pco2", "temperature"]
    assert shares.sum() == pytest.approx(r2) and r2 == pytest.approx(1.0, abs=0.01)  # nearly additive
    np.testing.assert_allclose(shares, parts / parts.sum(), atol=0.03)


def test_soil_co2_coefficient_errors_move_log10_pco2():
    from denude.core.soil_co2 import pco2_from_aet_atm, soil_co2_gain

    s_a, s_b, n, aet = 0.02, 0.03, 4000, 600.0
    spec = UncertaintySpec(soil_co2_intercept_sigma_log10=s_a, soil_co2_amplitude_sigma_log10=s_b)
    rocks = RockTable.builtin()
    lk = rocks.lookup()
    table = draw_table(spec, 8, n, lk.codes, lk.mineral_index, lk.density_g_cm3, lk.purity,
                       [rocks.by_code(int(c)).name for c in lk.codes], pco2_from_aet=True)
    assert table.input_names == ["soil_co2_intercept", "soil_co2_amplitude"]
    g = float(soil_co2_gain(aet))
    p0 = float(pco2_from_aet_atm(aet))
    block = draw_block(np.ones((1, 1), np.int64), 500.0, p0, 10.0, 1.0, lk, table, "white", spec=spec, seed=8,
                       soil_gain=g)
    e_p, _ = _elasticities(10.0, p0)
    # derived: log10 PCO2 = (a + da) + (b + db) g, so sd(ln D) = e_p ln10 sqrt(s_a^2 + (g s_b)^2)
    expected = e_p * math.log(10) * math.sqrt(s_a**2 + (g * s_b) ** 2)
    assert np.log(block.rate[0].astype(np.float64)).std() == pytest.approx(expected, rel=0.05)
    # without AET-derived PCO2 the soil-CO2 errors are not drawn
    plain = draw_table(spec, 8, 10, lk.codes, lk.mineral_index, lk.density_g_cm3, lk.purity,
                       ["x"] * len(lk.codes), pco2_from_aet=False)
    assert plain.input_names == [] and np.all(plain.soil_a == 0)


def test_soil_co2_rate_error_redraws_the_aet_term_of_each_draw():
    # derived from Brook et al. (1983): log10 PCO2 = -3.47 + 2.09 (1 - exp(-k AET)), k = 0.00172
    # per mm; a draw with the rate k * m has PCO2 = 10**(-3.47 + 2.09 (1 - exp(-k m AET))), so
    # its rate is the deterministic rate at that PCO2 (same load table, so to float32 rounding)
    import denude
    from denude.core.soil_co2 import pco2_from_aet_atm, soil_co2_gain

    spec = UncertaintySpec(soil_co2_rate_sigma_ln=0.3)
    rocks = RockTable.builtin()
    lk = rocks.lookup()
    n, aet = 40, np.array([[150.0, 600.0, 1400.0]])
    table = draw_table(spec, 5, n, lk.codes, lk.mineral_index, lk.density_g_cm3, lk.purity,
                       [rocks.by_code(int(c)).name for c in lk.codes], pco2_from_aet=True)
    assert table.input_names == ["soil_co2_rate"]
    m = table.soil_rate
    assert np.all(m > 0) and np.std(np.log(m)) == pytest.approx(0.3, rel=0.35)
    code = int(next(c for c in lk.codes if rocks.by_code(int(c)).mineral == "calcite"))
    codes = np.full(aet.shape, code, np.int64)
    block = draw_block(codes, 500.0, pco2_from_aet_atm(aet), 10.0, 1.0, lk, table, "white", spec=spec, seed=5,
                       soil_gain=soil_co2_gain(aet))
    for d in (0, 7, 23):
        pco2_d = 10.0 ** (-3.47 + 2.09 * (1.0 - np.exp(-0.00172 * m[d] * aet)))
        expected = denude.rates(codes, np.full(aet.shape, 500.0), pco2_d, np.full(aet.shape, 10.0))
        np.testing.assert_allclose(block.rate.reshape(3, n)[:, d], expected["denudation_mm_per_kyr"][0], rtol=2e-6)
    # a larger rate means more soil CO2, hence a larger rate of dissolution, in every cell
    order = np.argsort(m)
    assert np.all(np.diff(block.rate.reshape(3, n)[:, order], axis=1) >= 0)


def test_saturation_ratio_and_rock_ranges_scale_the_rate():
    spec = UncertaintySpec(saturation_ratio=(("dolomite", 0.3, 0.9),),
                           rocks=(("limestone", "purity", 0.85, 1.0), ("limestone", "density_g_cm3", 2.5, 2.7)))
    lk, table = lookup_and_table(spec, 2, 500)
    codes = np.array([[1, 2, 3]])
    block = draw_block(codes, 500.0, 0.01, 10.0, 1.0, lk, table, "white", spec=spec, seed=2)
    base = draw_block(codes, 500.0, 0.01, 10.0, 1.0, lk, lookup_and_table(UncertaintySpec(), 2, 1)[1], "white",
                      spec=UncertaintySpec(), seed=2).rate[:, 0]
    ratio = block.rate[1] / base[1]                       # dolostone: the saturation ratio itself
    assert ratio.min() >= 0.3 - 1e-6 and ratio.max() <= 0.9 + 1e-6
    assert ratio.mean() == pytest.approx(0.6, abs=0.02)   # uniform mean, sampling error ~0.008
    lime = block.rate[0] / base[0]                        # (2.60 x 0.95) / (rho x purity)
    assert lime.min() >= 2.60 * 0.95 / (2.7 * 1.0) - 1e-6 and lime.max() <= 2.60 * 0.95 / (2.5 * 0.85) + 1e-6
    assert np.all(block.rate[2] == base[2])               # gypsum untouched
    # band quantiles of both layers equal numpy's linear quantiles of the draws (limestone's CO2
    # sorted anew: its density and purity vary; dolostone's follows the rate order)
    q_rate, q_co2 = block_quantiles(block, table)
    for k in range(3):
        np.testing.assert_allclose(q_rate[:, k], np.quantile(block.rate[k].astype(float), [0.05, 0.5, 0.95]), rtol=1e-6)
        np.testing.assert_allclose(q_co2[:, k], np.quantile(block.co2[k].astype(float), [0.05, 0.5, 0.95]),
                                   rtol=1e-6, atol=1e-12)


# ------------------------------------------------------------------------- parsing
def test_spec_parsing_and_one_line_errors(tmp_path):
    spec = parse_uncertainty({"runoff_sigma_ln": 0.2, "saturation_ratio": {"dolomite": [0.3, 0.9]},
                              "rocks": {"limestone": {"purity": [0.85, 1.0]}}}, "j.toml")
    assert spec.runoff_sigma_ln == 0.2 and spec.saturation_ratio == (("dolomite", 0.3, 0.9),)
    cases = [({"runoff_sigma": 0.2}, "runoff_sigma_ln"), ({"pco2_sigma_log10": -1}, "outside"),
             ({"saturation_ratio": {"dolomite": [0.9, 0.3]}}, "low > high"),
             ({"saturation_ratio": {"dolomit": [0.3, 0.9]}}, "dolomite"),
             ({"rocks": {"limestone": {"purity": [0.0, 1.0]}}}, "above 0")]
    for table, text in cases:
        with pytest.raises(JobFileError) as err:
            parse_uncertainty(table, "j.toml")
        assert "j.toml" in str(err.value) and text in str(err.value) and "\n" not in str(err.value)


# ------------------------------------------------------------------- the raster run
@pytest.fixture
def job(map_inputs, tmp_path):
    paths = map_inputs["paths"]
    text = f"""
[inputs]
lithology = "{paths['lithology']}"
runoff = "{paths['runoff']}"
pco2 = "{paths['pco2']}"
temperature = "{paths['temperature']}"
[run]
block_size = 16
[uncertainty]
runoff_sigma_ln = 0.2
pco2_sigma_log10 = 0.15
temperature_sigma_c = 1.0
cell_noise = true
[uncertainty.saturation_ratio]
dolomite = [0.3, 0.9]
[uncertainty.rocks.limestone]
purity = [0.85, 1.0]
density_g_cm3 = [2.5, 2.7]
"""
    path = tmp_path / "job.toml"
    path.write_text(text)
    rows, cols = map_inputs["shape"]
    x0, y0 = TEST_ORIGIN
    zones = geopandas.GeoDataFrame(
        {"zone": ["west", "east"]},
        geometry=[box(x0, y0 - rows * TEST_RES, x0 + 30.5 * TEST_RES, y0),
                  box(x0 + 30.5 * TEST_RES, y0 - rows * TEST_RES, x0 + cols * TEST_RES, y0 - 3.3 * TEST_RES)],
        crs=TEST_CRS)
    zpath = tmp_path / "zones.gpkg"
    zones.to_file(zpath, layer="zones")
    return path, ZoneSpec(str(zpath), "zones", "zone")


def _run(job, out, workers=1, block=16, seed=3, draws=24):
    path, zones = job
    settings = build_settings({"out": str(out), "workers": workers, "block_size": block}, job_file=path)
    return run_uncertainty(settings, read_uncertainty(path), draws, seed, zones)


def _read(path):
    with rasterio.open(path) as ds:
        return ds.read(1)


def test_workers_tiling_and_seed_give_identical_results(job, tmp_path):
    one = _run(job, tmp_path / "one", workers=1)
    two = _run(job, tmp_path / "two", workers=2)
    _run(job, tmp_path / "again", workers=2)
    _run(job, tmp_path / "tiled", workers=2, block=32)
    _run(job, tmp_path / "other", seed=4)
    for name in band_files() + ["zones_uncertainty.csv"]:
        a = (tmp_path / "one" / name).read_bytes()
        assert a == (tmp_path / "two" / name).read_bytes(), name
        assert a == (tmp_path / "again" / name).read_bytes(), name
    for name in band_files():
        np.testing.assert_array_equal(_read(tmp_path / "one" / name), _read(tmp_path / "tiled" / name))
        assert not np.array_equal(_read(tmp_path / "one" / name), _read(tmp_path / "other" / name), equal_nan=True)
    # zone sums over other windows: fixed strips of coverage and fixed-point sums, so the same bytes
    assert (tmp_path / "one" / "zones_uncertainty.csv").read_bytes() == \
        (tmp_path / "tiled" / "zones_uncertainty.csv").read_bytes()
    assert one.counts["computed"] == two.counts["computed"] > 0


def test_zone_table_is_the_same_bytes_for_any_window_size(job, tmp_path):
    # windows of 16, 32 and 48 rows and columns add the cells to the zone sums in other groups
    # and orders; fixed-point sums make the table byte for byte the same
    _run(job, tmp_path / "a", workers=1, block=16)
    _run(job, tmp_path / "b", workers=2, block=48)
    _run(job, tmp_path / "c", workers=1, block=32)
    table = (tmp_path / "a" / "zones_uncertainty.csv").read_bytes()
    assert table == (tmp_path / "b" / "zones_uncertainty.csv").read_bytes()
    assert table == (tmp_path / "c" / "zones_uncertainty.csv").read_bytes()


def _run_tiled(job, out, tile_size, workers, merge=True):
    path, zones = job
    settings = build_settings({"out": str(out), "block_size": 16}, job_file=path)
    return run_uncertainty(settings, read_uncertainty(path), 24, 3, zones, tile_size=tile_size, merge=merge,
                           workers=workers)


def _bits(array):
    return array.view(np.uint32) if array.dtype == np.float32 else array


def test_a_tiled_run_equals_the_whole_grid_bit_for_bit(job, tmp_path):
    # the contract: a tiled run, a 1-worker and an N-worker run give identical bytes. Tiles of
    # 16 cells in this process (12 tiles of the 40 x 56 grid) and of 32 cells on two local
    # processes (4 tiles, two of them partial) against the whole grid on one thread.
    _run(job, tmp_path / "whole", workers=1)
    small = _run_tiled(job, tmp_path / "t16", 16, workers=0)
    large = _run_tiled(job, tmp_path / "t32", 32, workers=2)
    assert small.record["tiles"] == 12 and large.record["tiles"] == 4
    assert small.record["engine"].startswith("in this process") and "2 workers" in large.record["engine"]
    for name in band_files() + ["zones_uncertainty.csv"]:
        whole = (tmp_path / "whole" / name).read_bytes()
        assert whole == (tmp_path / "t16" / name).read_bytes(), name
        assert whole == (tmp_path / "t32" / name).read_bytes(), name
    for name in band_files():
        vrt = tmp_path / "t32" / name.replace(".tif", ".vrt")
        with rasterio.open(vrt) as ds:
            assert ds.units == ((ds.tags()["units"]),) and ds.tags()["quantile"] in ("0.05", "0.5", "0.95")
            mosaic = ds.read(1)
        np.testing.assert_array_equal(_bits(mosaic), _bits(_read(tmp_path / "whole" / name)))
    assert small.counts == large.counts == _run(job, tmp_path / "again", workers=2).counts
    assert (tmp_path / "t32" / "tiles" / "r001_c001" / band_files()[0]).is_file()


@pytest.mark.parametrize("workers", [0, 2])
def test_a_failing_tile_fails_the_run_and_leaves_nothing(job, map_inputs, tmp_path, workers):
    # the rock table lacks code 5, which the lithology holds: each window meets it, the first
    # tile reporting it fails the run, and no output folder is left behind
    path, zones = job
    rocks = RockTable.builtin()
    table = tmp_path / "rocks.csv"
    rows = [r for r in rocks.as_rows() if int(r["code"]) != 5]
    with open(table, "w", newline="") as f:
        writer = csv.DictWriter(f, fieldnames=list(rows[0]))
        writer.writeheader()
        writer.writerows(rows)
    settings = build_settings({"out": str(tmp_path / "bad"), "block_size": 16, "rocks": str(table)}, job_file=path)
    with pytest.raises(DenudeError) as err:
        run_uncertainty(settings, read_uncertainty(path), 8, 3, zones, tile_size=16, workers=workers)
    assert "tile r0" in str(err.value) and "5" in str(err.value) and "\n" not in str(err.value)
    assert not (tmp_path / "bad").exists()
    assert not [p for p in tmp_path.iterdir() if p.name.startswith(".bad")]


def test_tiled_cli_keeps_only_vrts_with_no_merge_and_refuses_tile_options_alone(job, tmp_path):
    path, zones = job
    out = tmp_path / "cli"
    result = runner.invoke(app, ["uncertainty", "--job", str(path), "--draws", "8", "--seed", "1", "--out", str(out),
                                 "--tile-size", "32", "--workers", "0", "--no-merge", "-q"])
    assert result.exit_code == 0, result.output
    assert sorted(p.name for p in out.glob("*.vrt")) == sorted(n.replace(".tif", ".vrt") for n in band_files())
    assert not list(out.glob("*.tif")) and len(list((out / "tiles").iterdir())) == 4
    result = runner.invoke(app, ["uncertainty", "--job", str(path), "--draws", "8", "--out", str(tmp_path / "y"),
                                 "--no-merge"])
    assert result.exit_code == 1 and "--tile-size" in result.stderr and not (tmp_path / "y").exists()
    result = runner.invoke(app, ["uncertainty", "--job", str(path), "--draws", "8", "--out", str(tmp_path / "z"),
                                 "--tile-size", "20"])
    assert result.exit_code == 1 and "multiple of 16" in result.stderr and not (tmp_path / "z").exists()
    # --workers 0 means tiles in this process: without tiles it is refused, naming the option, not the job file
    result = runner.invoke(app, ["uncertainty", "--job", str(path), "--draws", "8", "--out", str(tmp_path / "w"),
                                 "--workers", "0"])
    assert result.exit_code == 1 and "--workers 0" in result.stderr and "--tile-size" in result.stderr
    assert "job file" not in result.stderr and len(result.stderr.strip().splitlines()) == 1


@pytest.mark.parametrize("origin, res", [((512345.678, 4301234.567), 30.123457), ((-3.7 + 1 / 7, 41.3 + 1 / 3), 1 / 1200)])
def test_coverage_of_a_cell_does_not_depend_on_the_window(origin, res):
    # the zone sums rely on it: a cell's exactextract coverage fraction computed in any window
    # of the grid equals the one computed over the whole grid, bit for bit (checked here
    # because exactextract does not document it)
    from shapely import MultiPoint, convex_hull, to_wkb

    from denude.io.coverage import coverage_pairs

    rng = np.random.default_rng(1)
    x0, y0 = origin
    n = 200
    poly = convex_hull(MultiPoint([(x0 + rng.uniform(10, 190) * res, y0 - rng.uniform(10, 190) * res) for _ in range(12)]))
    wkbs = np.array([to_wkb(poly)], dtype=object)
    whole = coverage_pairs((x0, y0 - n * res, x0 + n * res, y0), n, n, wkbs, np.arange(1))
    by_cell = dict(zip(whole.cell.tolist(), whole.coverage.tolist()))
    partial = 0
    for r0, c0, h, w in [(0, 0, 100, 100), (16, 32, 48, 80), (100, 100, 100, 100), (7, 13, 150, 170)]:
        part = coverage_pairs((x0 + c0 * res, y0 - (r0 + h) * res, x0 + (c0 + w) * res, y0 - r0 * res), w, h, wkbs,
                              np.arange(1))
        cells = part.cell.astype(np.int64)
        whole_cells = (cells // w + r0) * n + cells % w + c0
        assert [by_cell[c] for c in whole_cells.tolist()] == part.coverage.tolist()
        partial += int(np.count_nonzero(part.coverage < 1))
    assert partial > 100        # the windows cross the polygon's edge


def test_fixed_point_zone_sums_are_exact_and_order_free():
    # reference: math.fsum, the correctly rounded sum of the float64 terms (Python standard
    # library, Shewchuk's algorithm); the limbs truncate each term at 2**-62 absolute
    rng = np.random.default_rng(7)
    n, n_draws = 5000, 3
    rate = (rng.lognormal(2.0, 1.5, (n, n_draws))).astype(np.float32)
    co2 = (rng.lognormal(0.0, 1.0, (n, n_draws))).astype(np.float32)
    rate[::97, :] = np.nan
    coverage = rng.uniform(0.0, 1.0, n)
    rock_row = np.where(rng.uniform(size=n) < 0.2, -1, 0).astype(np.int64)
    density = np.full((n_draws, 1), 2.65)
    area = np.array([0.0009])
    cell = np.arange(n, dtype=np.int32)

    def sums(order):
        out = [exact_zeros(1, n_draws) for _ in range(3)] + [exact_zeros(1, 1)]
        for chunk in np.array_split(order, 7):
            zone_draw_sums(np.zeros(1, np.int64), np.array([0, chunk.size], np.int64), cell[chunk],
                           coverage[chunk], area, n, rate, co2, rock_row, density, *out)
        return out

    forward = sums(np.arange(n))
    shuffled = sums(rng.permutation(n))
    for f, s in zip(forward, shuffled):
        np.testing.assert_array_equal(f, s)
    ok = ~np.isnan(rate[:, 0])
    w = coverage * area[0]
    for d in range(n_draws):
        want = math.fsum((w[ok] * rate[ok, d].astype(np.float64)).tolist())
        assert exact_value(forward[0])[0, d] == pytest.approx(want, rel=1e-15)
        want_co2 = math.fsum((w[ok] * co2[ok, d].astype(np.float64)).tolist())
        assert exact_value(forward[2])[0, d] == pytest.approx(want_co2, rel=1e-15)
    assert exact_value(forward[3])[0, 0] == pytest.approx(math.fsum(w[ok].tolist()), rel=1e-15)


def test_bands_bracket_the_deterministic_map_and_zone_table_columns(job, map_inputs, tmp_path):
    _run(job, tmp_path / "bands", draws=64)
    path, zones = job
    run_map(build_settings({"out": str(tmp_path / "map")}, job_file=path))
    rate = _read(tmp_path / "map" / "denudation_mm_per_kyr.tif")
    p05, p50, p95 = (_read(tmp_path / "bands" / f"denudation_{q}_mm_per_kyr.tif") for q in ("p05", "p50", "p95"))
    codes = _read(tmp_path / "map" / "lithology_code.tif")
    ok = np.isfinite(rate) & (rate > 0) & (codes != 2)   # dolostone: saturation ratio below 1 shifts its band
    assert np.array_equal(np.isfinite(p50), np.isfinite(rate))      # same nodata cells as the map
    assert np.all(p05[ok] <= p50[ok]) and np.all(p50[ok] <= p95[ok])
    assert np.mean((p05[ok] < rate[ok]) & (rate[ok] < p95[ok])) > 0.9
    with rasterio.open(tmp_path / "bands" / "denudation_p95_mm_per_kyr.tif") as ds:
        tags = ds.tags()
        assert tags["units"] == "mm/kyr" and tags["quantile"] == "0.95" and "not a site" in tags["caution"]
    with open(tmp_path / "bands" / "zones_uncertainty.csv", newline="") as handle:
        rows = list(csv.DictReader(handle))
    assert [r["zone"] for r in rows] == ["west", "east"]
    for quantity in ("denudation_mean_mm_per_kyr", "rock_volume_m3_per_yr", "rock_mass_t_per_yr", "co2_drawdown_t_per_yr"):
        for row in rows:
            assert float(row[f"{quantity}_p05"]) < float(row[f"{quantity}_p50"]) < float(row[f"{quantity}_p95"])
    for name in ("runoff", "pco2", "temperature", "purity_limestone", "density_limestone", "saturation_dolomite"):
        assert f"variance_share_{name}" in rows[0]
    # science notes section 10 (derived): with these magnitudes runoff dominates the variance
    shares = {k: float(v) for k, v in rows[0].items() if k.startswith("variance_share_") and k != "variance_share_sum"}
    assert max(shares, key=shares.get) == "variance_share_runoff"
    record = json.loads((tmp_path / "bands" / "run.json").read_text())
    assert record["draws"] == 64 and record["seed"] == 3 and record["command"] == "uncertainty"
    assert record["uncertainty"]["runoff_sigma_ln"] == 0.2
    sidecar = json.loads((tmp_path / "bands" / "zones_uncertainty.summary.json").read_text())
    assert "product measure" in sidecar["method"]["variance_share"]
    assert sum(shares.values()) == pytest.approx(float(rows[0]["variance_share_sum"]))


def test_cli_writes_the_contract_files_and_refuses_a_job_without_errors(job, tmp_path, map_inputs):
    path, zones = job
    out = tmp_path / "cli"
    result = runner.invoke(app, ["uncertainty", "--job", str(path), "--draws", "8", "--seed", "1", "--out", str(out),
                                 "--zones", zones.path, "--zones-id-field", "zone", "--workers", "2"])
    assert result.exit_code == 0, result.output
    for name in band_files() + ["run.json", "zones_uncertainty.gpkg", "zones_uncertainty.csv"]:
        assert (out / name).is_file(), name
    bare = tmp_path / "bare.toml"
    bare.write_text("\n".join(line for line in path.read_text().splitlines()
                              if not line.startswith(("[uncertainty", "runoff_sigma", "pco2_sigma", "temperature_sigma",
                                                      "cell_noise", "dolomite", "purity", "density"))))
    result = runner.invoke(app, ["uncertainty", "--job", str(bare), "--draws", "8", "--out", str(tmp_path / "x")])
    assert result.exit_code == 1 and "no input errors" in result.stderr
    assert len(result.stderr.strip().splitlines()) == 1 and not (tmp_path / "x").exists()
