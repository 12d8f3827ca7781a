"""`denude demo`: the whole chain on the bundled demo region, single job and tiled."""

import csv
import json
from pathlib import Path

import numpy as np
import pytest
import rasterio
from typer.testing import CliRunner

from denude.cli.demo_cmd import tile_size_for
from denude.cli.main import app

runner = CliRunner()


def read_csv(path):
    with open(path, newline="") as handle:
        return {row["watershed_id"]: row for row in csv.DictReader(handle)}


@pytest.fixture(scope="module")
def demo_single(tmp_path_factory):
    out = tmp_path_factory.mktemp("demo") / "single"
    result = runner.invoke(app, ["demo", str(out)])
    assert result.exit_code == 0, result.output
    assert "not a site investigation" in result.stdout
    return out


def test_demo_writes_every_output(demo_single):
    out = demo_single
    for name in ("denudation_mm_per_kyr.tif", "dissolved_load_mmol_per_l.tif", "co2_drawdown_t_per_km2_yr.tif",
                 "hazard_class.tif", "run.json", "watershed_summary.gpkg", "watershed_summary.csv",
                 "watershed_summary_planning_units.csv", "watershed_summary_sinkholes.csv",
                 "subwatershed_summary.gpkg"):
        assert (out / name).is_file(), name
    run = json.loads((out / "run.json").read_text())
    assert run["counts"]["computed"] > 0.99 * run["counts"]["cells"]
    with rasterio.open(out / "denudation_mm_per_kyr.tif") as ds:
        rate = ds.read(1)
        lith = rasterio.open(out / "lithology_code.tif").read(1)
    # Plausibility bands (science notes section 5): carbonate rates mostly 10-100 mm/kyr
    # (Ford & Williams 2007, from memory); gypsum an order of magnitude faster.
    limestone = rate[(lith == 1) & np.isfinite(rate) & (rate > 0)]
    assert 10 < np.median(limestone) < 100
    gypsum = rate[(lith == 3) & np.isfinite(rate) & (rate > 0)]
    assert np.median(gypsum) > 5 * np.median(limestone)
    assert np.all(rate[(lith == 0) & np.isfinite(rate)] == 0)


def test_demo_writes_scenario_comparison_and_bands(demo_single):
    out = demo_single
    for name in ("scenario_warming/denudation_mm_per_kyr.tif", "comparison_warming/denudation_ratio.tif",
                 "comparison_warming/denudation_difference_mm_per_kyr.tif", "comparison_warming/zones_change.csv",
                 "uncertainty/denudation_p05_mm_per_kyr.tif", "uncertainty/co2_drawdown_p95_t_per_km2_yr.tif",
                 "uncertainty/zones_uncertainty.csv", "uncertainty/run.json"):
        assert (out / name).is_file(), name
    with rasterio.open(out / "comparison_warming" / "denudation_ratio.tif") as ds:
        ratio = ds.read(1)
    lith = rasterio.open(out / "lithology_code.tif").read(1)
    data = Path(__file__).resolve().parent.parent / "demo_rasters"
    p = rasterio.open(data / "precipitation_mm_per_yr.tif").read(1).astype(np.float64)
    aet = rasterio.open(data / "aet_mm_per_yr.tif").read(1).astype(np.float64)
    # 10 % less precipitation at the same AET: runoff falls by the factor (0.9 P - AET) / (P - AET)
    # (water balance, derived), and D is linear in runoff (derived). +2 C: carbonates (retrograde
    # solubility, derived from Plummer & Busenberg 1982) fall by more than that factor; gypsum
    # (solubility rising with temperature below about 40 C, phreeqc.dat constants) by less
    runoff_factor = (0.9 * p - aet) / (p - aet)
    carbonate = np.isin(lith, (1, 2, 4)) & np.isfinite(ratio)
    assert np.all(ratio[carbonate] < runoff_factor[carbonate])
    assert np.all(runoff_factor[carbonate] < 0.9)
    gypsum = (lith == 3) & np.isfinite(ratio)
    assert np.all((ratio[gypsum] > runoff_factor[gypsum]) & (ratio[gypsum] < 1.05 * runoff_factor[gypsum]))
    run = json.loads((out / "scenario_warming" / "run.json").read_text())
    assert run["settings"]["scenario"]["temperature_delta_c"] == 2.0
    assert run["settings"]["scenario"]["precipitation_factor"] == 0.9


def test_demo_refuses_existing_folder(demo_single):
    result = runner.invoke(app, ["demo", str(demo_single)])
    assert result.exit_code == 1
    assert "--overwrite" in result.stderr and len(result.stderr.strip().splitlines()) == 1


def test_tiled_demo_gives_same_watershed_numbers(demo_single, tmp_path):
    out = tmp_path / "tiled"
    result = runner.invoke(app, ["demo", str(out), "--tiles", "4", "--workers", "1"])
    assert result.exit_code == 0, result.output
    assert len(list((out / "tiles").iterdir())) == 4
    single = read_csv(demo_single / "watershed_summary.csv")
    tiled = read_csv(out / "zones_summary.csv")
    assert single.keys() == tiled.keys()
    for zone, row in single.items():
        for column in ("area_km2", "soluble_area_km2", "denudation_mean_mm_per_kyr", "denudation_p90_mm_per_kyr",
                       "rock_volume_m3_per_yr", "co2_drawdown_t_per_yr", "valid_cells"):
            assert float(tiled[zone][column]) == pytest.approx(float(row[column]), rel=1e-9, abs=1e-9), (zone, column)


def test_tile_size_for():
    assert tile_size_for(600, 500, 4) == 304
    assert tile_size_for(600, 500, 1) == 608
    assert tile_size_for(600, 500, 9) % 16 == 0


def test_summarize_reads_a_batch_folder(demo_single, tmp_path):
    # The VRT mosaics and rocks.csv that `denude batch` writes are a valid summarize input,
    # giving the same numbers as the single-raster map.
    out = tmp_path / "tiled"
    assert runner.invoke(app, ["demo", str(out), "--tiles", "4", "--workers", "1"]).exit_code == 0
    table = tmp_path / "from_batch.gpkg"
    from denude.cli.demo_cmd import find_demo_data

    zones = find_demo_data() / "watersheds.gpkg"
    result = runner.invoke(app, ["summarize", str(out), "--zones", str(zones), "--layer", "watersheds",
                                 "--id-field", "watershed_id", "--out", str(table)])
    assert result.exit_code == 0, result.output
    single = read_csv(demo_single / "watershed_summary.csv")
    batch = read_csv(tmp_path / "from_batch.csv")
    for zone, row in single.items():
        assert float(batch[zone]["rock_volume_m3_per_yr"]) == pytest.approx(float(row["rock_volume_m3_per_yr"]), rel=1e-9)


def test_demo_calibration_recovers_the_invented_ratios(demo_single):
    # The demo's water samples were built backwards from known ratios (scripts/make_demo_samples.py):
    # calibrating the demo map must give them back (rounding of the CSV: 1e-6 relative).
    truth = {}
    with open(_demo_data() / "water_samples_ratios.csv", newline="") as handle:
        for row in csv.DictReader(handle):
            truth[row["watershed_id"]] = float(row["saturation_ratio"])
    got = read_csv(demo_single / "calibration" / "calibration.csv")
    for zone, ratio in truth.items():
        assert got[zone]["ratio_rule"] == "sampled"
        assert float(got[zone]["saturation_ratio"]) == pytest.approx(ratio, rel=1e-4)
        assert -3.0 < float(got[zone]["si_calcite"]) < 0.5
    unsampled = [z for z in got if z not in truth]
    assert unsampled and all(got[z]["ratio_rule"] == "same_rock" for z in unsampled)
    side = json.loads((demo_single / "watershed_summary.summary.json").read_text())["sinkhole_evaluation"]
    assert 0.0 <= side["auc"] <= 1.0 and len(side["classes"]) == 5
    assert (demo_single / "calibration" / "denudation_expected_mm_per_kyr.tif").is_file()


def _demo_data():
    from denude.cli.demo_cmd import find_demo_data

    return find_demo_data()
