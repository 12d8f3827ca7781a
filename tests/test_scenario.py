"""Scenarios ([scenario] in the job file) and `denude compare`."""

import csv
import json

import geopandas
import numpy as np
import pytest
import rasterio
from shapely.geometry import box
from typer.testing import CliRunner

from denude.cli.main import app
from denude.core.scenario import Scenario, apply_scenario
from denude.errors import InputError, JobFileError
from denude.execution import ZoneSpec, run_compare, run_map
from denude.io.jobfile import build_settings

from conftest import TEST_CRS, TEST_ORIGIN, TEST_RES

runner = CliRunner()


def _read(path):
    with rasterio.open(path) as ds:
        return ds.read(1)


def _write_job(tmp_path, name, inputs: str, scenario: str = "") -> str:
    path = tmp_path / name
    path.write_text(f"[inputs]\n{inputs}\n" + (f"[scenario]\n{scenario}\n" if scenario else ""))
    return path


@pytest.fixture
def limestone(make_raster):
    return make_raster("limestone.tif", np.ones((20, 24), np.int16), nodata=-1)


def test_apply_scenario_changes_each_input():
    s = Scenario(temperature_delta_c=2.0, precipitation_factor=0.9, aet_factor=1.1)
    t, p, e = apply_scenario(s, temperature_c=np.array([10.0, np.nan]), precipitation_mm_per_yr=1000.0,
                             aet_mm_per_yr=np.array([400.0]))
    np.testing.assert_array_equal(t, [12.0, np.nan])
    assert p == 900.0 and e[0] == pytest.approx(440.0)
    assert apply_scenario(None, temperature_c=1.0) == (1.0, None, None)
    with pytest.raises(ValueError):
        Scenario(runoff_factor=-1.0)


def test_warming_at_fixed_pco2_lowers_calcite_rates_by_what_site_gives(limestone, tmp_path):
    inputs = f'lithology = "{limestone}"\nrunoff = 500\npco2 = 0.01\ntemperature = 10'
    base = _write_job(tmp_path, "base.toml", inputs)
    warm = _write_job(tmp_path, "warm.toml", inputs, "temperature_delta_c = 2.0")
    run_map(build_settings({"out": str(tmp_path / "base")}, job_file=base))
    run_map(build_settings({"out": str(tmp_path / "warm")}, job_file=warm))
    rate_base = _read(tmp_path / "base" / "denudation_mm_per_kyr.tif")
    rate_warm = _read(tmp_path / "warm" / "denudation_mm_per_kyr.tif")
    site = {}
    for t in ("10", "12"):
        result = runner.invoke(app, ["site", "--temperature", t, "--pco2", "0.01", "--runoff", "500",
                                     "--rock", "limestone", "--json"])
        assert result.exit_code == 0, result.output
        site[t] = json.loads(result.stdout)["denudation_mm_per_kyr"]
    # derived from the Plummer & Busenberg (1982) constants: retrograde calcite solubility, so
    # +2 degrees C at fixed PCO2 lowers the rate; the map (load table) matches `denude site`
    # (direct solver) within the table's 1e-4 interpolation error
    assert site["12"] < site["10"]
    np.testing.assert_allclose(rate_warm, site["12"], rtol=2e-4)
    np.testing.assert_allclose(rate_base, site["10"], rtol=2e-4)
    record = json.loads((tmp_path / "warm" / "run.json").read_text())
    assert record["settings"]["scenario"]["temperature_delta_c"] == 2.0

    out = tmp_path / "change"
    result = runner.invoke(app, ["compare", str(tmp_path / "base"), str(tmp_path / "warm"), "--out", str(out)])
    assert result.exit_code == 0, result.output
    ratio = _read(out / "denudation_ratio.tif")
    np.testing.assert_allclose(ratio, site["12"] / site["10"], rtol=3e-4)
    np.testing.assert_allclose(_read(out / "denudation_difference_mm_per_kyr.tif"), site["12"] - site["10"],
                               rtol=5e-3)


def test_water_balance_and_soil_co2_follow_the_scenario(limestone, tmp_path):
    scaled = _write_job(tmp_path, "scaled.toml", f'lithology = "{limestone}"\nprecipitation = 1000\naet = 400\n'
                        'temperature = 10', "precipitation_factor = 0.9\naet_factor = 1.25\npco2_factor = 1.5")
    direct = _write_job(tmp_path, "direct.toml", f'lithology = "{limestone}"\nprecipitation = 900\naet = 500\n'
                        'temperature = 10')
    run_map(build_settings({"out": str(tmp_path / "scaled")}, job_file=scaled))
    run_map(build_settings({"out": str(tmp_path / "direct")}, job_file=direct))
    # runoff = 0.9 x 1000 - 1.25 x 400 = 400 mm/yr; soil PCO2 from AET = 500 (Brook et al. 1983), x 1.5
    load_scaled = _read(tmp_path / "scaled" / "dissolved_load_mmol_per_l.tif")
    load_direct = _read(tmp_path / "direct" / "dissolved_load_mmol_per_l.tif")
    # derived: [Ca]eq ~ PCO2^(1/3) at fixed gammas, a little more with the activity feedback
    assert np.all(load_scaled / load_direct > 1.5 ** (1 / 3))
    assert np.all(load_scaled / load_direct < 1.5 ** 0.4)
    no_pco2 = _write_job(tmp_path, "no_pco2.toml", f'lithology = "{limestone}"\nprecipitation = 1000\naet = 400\n'
                         'temperature = 10', "precipitation_factor = 0.9\naet_factor = 1.25")
    run_map(build_settings({"out": str(tmp_path / "no_pco2")}, job_file=no_pco2))
    for name in ("denudation_mm_per_kyr.tif", "dissolved_load_mmol_per_l.tif"):
        np.testing.assert_array_equal(_read(tmp_path / "no_pco2" / name), _read(tmp_path / "direct" / name))


def test_scenario_errors_name_file_key_and_value(limestone, tmp_path):
    inputs = f'lithology = "{limestone}"\nrunoff = 500\npco2 = 0.01\ntemperature = 10'
    for scenario, text in (("temperature_delta = 2", "temperature_delta_c"),
                           ("runoff_factor = -1", "outside"),
                           ("precipitation_factor = 0.9", "runoff_factor")):
        path = _write_job(tmp_path, "bad.toml", inputs, scenario)
        with pytest.raises((JobFileError, InputError)) as err:
            build_settings({"out": str(tmp_path / "x")}, job_file=path)
        assert str(path) in str(err.value) and text in str(err.value) and "\n" not in str(err.value)


@pytest.fixture
def two_runs(map_inputs, tmp_path):
    p = map_inputs["paths"]
    inputs = (f'lithology = "{p["lithology"]}"\nrunoff = "{p["runoff"]}"\npco2 = "{p["pco2"]}"\n'
              f'temperature = "{p["temperature"]}"')
    run_map(build_settings({"out": str(tmp_path / "base")}, job_file=_write_job(tmp_path, "b.toml", inputs)))
    run_map(build_settings({"out": str(tmp_path / "wet")},
                           job_file=_write_job(tmp_path, "w.toml", inputs, "runoff_factor = 1.2")))
    rows, cols = map_inputs["shape"]
    x0, y0 = TEST_ORIGIN
    zones = geopandas.GeoDataFrame({"zone": ["a", "b"]}, geometry=[
        box(x0, y0 - rows * TEST_RES, x0 + 20.5 * TEST_RES, y0),
        box(x0 + 20.5 * TEST_RES, y0 - rows * TEST_RES, x0 + cols * TEST_RES, y0)], crs=TEST_CRS)
    zpath = tmp_path / "zones.gpkg"
    zones.to_file(zpath, layer="zones")
    return tmp_path / "base", tmp_path / "wet", ZoneSpec(str(zpath), "zones", "zone")


def test_compare_with_itself_and_with_a_wetter_run(two_runs, tmp_path):
    base, wet, zones = two_runs
    same = run_compare(base, base, tmp_path / "same", zones)
    rate = _read(base / "denudation_mm_per_kyr.tif")
    diff = _read(tmp_path / "same" / "denudation_difference_mm_per_kyr.tif")
    ratio = _read(tmp_path / "same" / "denudation_ratio.tif")
    assert np.all(diff[np.isfinite(rate)] == 0) and np.all(np.isnan(diff[np.isnan(rate)]))
    assert np.all(ratio[rate > 0] == 1) and np.all(np.isnan(ratio[rate == 0]))
    with open(tmp_path / "same" / "zones_change.csv", newline="") as handle:
        rows = list(csv.DictReader(handle))
    assert all(float(r["change_rock_volume_m3_per_yr"]) == 0 for r in rows)
    assert "zones_change.csv" in same.outputs

    run_compare(base, wet, tmp_path / "wet_change", zones)
    ratio = _read(tmp_path / "wet_change" / "denudation_ratio.tif")
    # derived: D is linear in runoff, so runoff x 1.2 gives ratio 1.2 (float32 rasters)
    np.testing.assert_allclose(ratio[rate > 0], 1.2, rtol=1e-5)
    with open(tmp_path / "wet_change" / "zones_change.csv", newline="") as handle:
        rows = list(csv.DictReader(handle))
    for row in rows:
        assert float(row["ratio_rock_volume_m3_per_yr"]) == pytest.approx(1.2, rel=1e-5)
        assert float(row["ratio_co2_drawdown_t_per_yr"]) == pytest.approx(1.2, rel=1e-5)
        assert float(row["change_denudation_mean_mm_per_kyr"]) == pytest.approx(
            0.2 * float(row["base_denudation_mean_mm_per_kyr"]), rel=1e-5)


def test_compare_refuses_different_grids(two_runs, make_raster, tmp_path):
    base, _, _ = two_runs
    small = make_raster("small.tif", np.ones((10, 12), np.int16), nodata=-1)
    path = _write_job(tmp_path, "s.toml", f'lithology = "{small}"\nrunoff = 500\npco2 = 0.01\ntemperature = 10')
    run_map(build_settings({"out": str(tmp_path / "small_run")}, job_file=path))
    result = runner.invoke(app, ["compare", str(base), str(tmp_path / "small_run"), "--out", str(tmp_path / "c")])
    assert result.exit_code == 1
    assert "12 x 10 cells" in result.stderr and "56 x 40" in result.stderr
    assert len(result.stderr.strip().splitlines()) == 1 and not (tmp_path / "c").exists()


def test_batch_job_file_carries_the_scenario(limestone, tmp_path):
    from denude.io.jobfile import read_batch_options, read_job_file

    path = tmp_path / "batch.toml"
    path.write_text(f'[inputs]\nlithology = "{limestone}"\nrunoff = 500\npco2 = 0.01\ntemperature = 10\n'
                    "[batch]\ntile_size = 16\n[scenario]\nruntime = 1\n")
    with pytest.raises(JobFileError) as err:
        read_job_file(path)
    assert "runtime" in str(err.value) and str(path) in str(err.value)
    path.write_text(path.read_text().replace("runtime = 1", "runoff_factor = 0.5")
                    + "[uncertainty]\nrunoff_sigma_ln = 0.1\n")
    fields, batch = read_job_file(path), read_batch_options(path)
    assert fields["scenario"] == Scenario(runoff_factor=0.5) and batch["tile_size"] == 16
