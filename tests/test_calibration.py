"""`denude calibrate`: observed solute denudation, saturation indices, ratios and the expected map.

The map folders here are written by hand with known rates, so the maximum over each zone is
known exactly and samples generated at known saturation ratios must give those ratios back.
"""

import csv
import json

import geopandas
import numpy as np
import pytest
import rasterio
import shapely
from rasterio.transform import from_origin
from typer.testing import CliRunner

from denude.cli.main import app
from denude.core.water_samples import (apportion_minerals, observed_denudation_mm_per_kyr,
                                       runoff_from_discharge_mm_per_yr)
from denude.errors import InputError
from denude.execution.calibration import run_calibration
from denude.io.samples import read_samples

runner = CliRunner()
CRS = "EPSG:32632"
X0, Y0, RES = 400000.0, 5200000.0, 100.0
ROWS, COLS = 20, 30
# zone A: columns 0-9 limestone at 40 mm/kyr; B: 10-19 dolostone at 20; C: 20-29 limestone at 60
RATES = {"A": 40.0, "B": 20.0, "C": 60.0}
ROCKS = "code,name,mineral,density_g_cm3,purity\n0,insoluble,insoluble,2.65,1.0\n1,limestone,calcite,2.60,0.95\n2,dolostone,dolomite,2.85,0.95\n3,gypsum,gypsum,2.31,0.95\n"


def _write(path, data, nodata):
    profile = dict(driver="GTiff", width=COLS, height=ROWS, count=1, dtype=data.dtype, crs=CRS,
                   transform=from_origin(X0, Y0, RES, RES), nodata=nodata)
    with rasterio.open(path, "w", **profile) as ds:
        ds.write(data, 1)


@pytest.fixture
def map_folder(tmp_path):
    out = tmp_path / "map"
    out.mkdir()
    rate = np.zeros((ROWS, COLS), np.float32)
    lith = np.zeros((ROWS, COLS), np.int32)
    for k, (zone, value) in enumerate(RATES.items()):
        rate[:, 10 * k:10 * (k + 1)] = value
        lith[:, 10 * k:10 * (k + 1)] = 2 if zone == "B" else 1
    _write(out / "denudation_mm_per_kyr.tif", rate, float("nan"))
    _write(out / "co2_drawdown_t_per_km2_yr.tif", rate * 0.4, float("nan"))
    _write(out / "hazard_class.tif", np.full((ROWS, COLS), 2, np.uint8), 255)
    _write(out / "lithology_code.tif", lith, -2147483648)
    _write(out / "soluble_area_fraction.tif", np.ones((ROWS, COLS), np.float32), float("nan"))
    (out / "rocks.csv").write_text(ROCKS)
    zones = geopandas.GeoDataFrame(
        {"watershed_id": list(RATES)},
        geometry=[shapely.box(X0 + 1000 * k, Y0 - 2000, X0 + 1000 * (k + 1), Y0) for k in range(3)], crs=CRS)
    zones.to_file(tmp_path / "zones.gpkg", layer="watersheds", driver="GPKG")
    return out, tmp_path / "zones.gpkg"


def _write_samples(path, rows, alkalinity="alkalinity_mg_l_hco3"):
    header = ["site_id", "zone_id", "temperature_c", "ca_mg_l", "mg_mg_l", "so4_mg_l", alkalinity, "ph",
              "runoff_mm_per_yr", "discharge_l_s"]
    with open(path, "w", newline="") as handle:
        w = csv.writer(handle)
        w.writerow(header)
        for r in rows:
            w.writerow([r.get(h, "") for h in header])
    return path


def test_corbel_formula_from_mass_balance():
    # Corbel (1959): X = 4 E T / 100, X in m3 km-2 yr-1 (= mm/kyr), E runoff in dm/yr, T hardness
    # in mg/L as CaCO3 (from memory). Derivation from the mass balance, at rho = 2.5 g/cm3:
    # T mg/L x (E x 100 mm/yr = E x 100 L m-2 yr-1) = 100 T E mg m-2 yr-1 = 0.1 T E t km-2 yr-1;
    # / 2.5 t/m3 = 0.04 T E m3 km-2 yr-1 = 4 E T / 100.
    for hardness_mg_l_caco3, runoff_dm_per_yr in ((150.0, 5.0), (250.0, 12.0), (40.0, 1.5)):
        ca_mmol_l = hardness_mg_l_caco3 / 100.09
        loads = apportion_minerals(ca_mmol_l, 0.0, 0.0)
        got = observed_denudation_mm_per_kyr(loads, runoff_dm_per_yr * 100.0, {"calcite": 2.5})
        assert got == pytest.approx(4.0 * runoff_dm_per_yr * hardness_mg_l_caco3 / 100.0, rel=1e-12)


def test_non_carbonate_correction():
    # gypsum takes the Ca that balances SO4; dolomite the Ca that balances Mg (common practice, no source)
    loads = apportion_minerals(np.array([3.0, 1.0, 2.0]), np.array([0.5, 0.0, 3.0]), np.array([1.0, 2.0, 0.0]))
    assert loads.gypsum_mmol_l.tolist() == [1.0, 1.0, 0.0]
    assert loads.dolomite_mmol_l.tolist() == [0.5, 0.0, 2.0]
    assert loads.calcite_mmol_l.tolist() == [1.5, 0.0, 0.0]
    assert loads.excess_so4_mmol_l.tolist() == [0.0, 1.0, 0.0]
    assert loads.excess_mg_mmol_l.tolist() == [0.0, 0.0, 1.0]
    # gypsum rate: 172.17 g/mol x 10 mmol/L x 300 mm/yr / 2.3 g/cm3 x 1e-3 (the identity of science notes section 9)
    got = observed_denudation_mm_per_kyr(apportion_minerals(10.0, 0.0, 10.0), 300.0, {"gypsum": 2.3})
    assert got == pytest.approx(172.17 * 10 * 300 / 2.3 * 1e-3)


def test_runoff_from_discharge():
    # 1 L/s from 1 km2 for a year: 31 557 600 L over 1e6 m2 = 31.5576 mm (365.25-day year, common practice)
    assert runoff_from_discharge_mm_per_yr(1.0, 1.0) == pytest.approx(31.5576)


def _ca_for(rate_mm_per_kyr, runoff, molar_mass, density_purity):
    """mmol/L of mineral that gives ``rate`` at ``runoff``: the identity solved for c."""
    return rate_mm_per_kyr * density_purity / (molar_mass * runoff * 1e-3)


def test_recovers_known_ratios(map_folder, tmp_path):
    mapdir, zones = map_folder
    runoff = 400.0
    # zone A at ratio 0.6: calcite; two samples of one site, discharge-weighted (3:1) to the target
    c_a = _ca_for(0.6 * 40.0, runoff, 100.09, 2.60 * 0.95)
    q1, q2 = 30.0, 10.0
    lo = 0.8 * c_a
    hi = (c_a * (q1 + q2) - lo * q1) / q2
    # zone B at ratio 0.3: dolomite, Ca = Mg
    c_b = _ca_for(0.3 * 20.0, runoff, 184.40, 2.85 * 0.95)
    area_m2 = 2e6
    q_runoff = runoff * area_m2 / (365.25 * 86400)     # the discharge that gives 400 mm/yr from 2 km2
    rows = [
        dict(site_id="A1", zone_id="A", temperature_c=9, ca_mg_l=lo * 40.078, mg_mg_l=0, so4_mg_l=0,
             alkalinity_mg_l_hco3=2 * lo * 61.017, ph=7.5, discharge_l_s=q1 / (q1 + q2) * 2 * q_runoff),
        dict(site_id="A1", zone_id="A", temperature_c=9, ca_mg_l=hi * 40.078, mg_mg_l=0, so4_mg_l=0,
             alkalinity_mg_l_hco3=2 * hi * 61.017, ph=7.5, discharge_l_s=q2 / (q1 + q2) * 2 * q_runoff),
        dict(site_id="B1", zone_id="B", temperature_c=8, ca_mg_l=c_b * 40.078, mg_mg_l=c_b * 24.305, so4_mg_l=0,
             alkalinity_mg_l_hco3=4 * c_b * 61.017, ph=7.4, runoff_mm_per_yr=runoff),
    ]
    samples = _write_samples(tmp_path / "samples.csv", rows)
    meta = run_calibration(mapdir, samples, zones, tmp_path / "cal", layer="watersheds", id_field="watershed_id")
    table = meta["table"].set_index("watershed_id")
    assert table.loc["A", "maximum_denudation_mm_per_kyr"] == pytest.approx(40.0, rel=1e-6)
    assert table.loc["A", "saturation_ratio"] == pytest.approx(0.6, rel=1e-6)
    assert table.loc["B", "saturation_ratio"] == pytest.approx(0.3, rel=1e-6)
    assert table.loc["A", "ratio_rule"] == "sampled"
    # zone C (limestone, unsampled) takes A's ratio: the only sampled limestone zone
    assert table.loc["C", "ratio_rule"] == "same_rock"
    assert table.loc["C", "saturation_ratio"] == pytest.approx(0.6, rel=1e-6)
    with open(tmp_path / "cal" / "calibration.csv") as handle:
        rows_out = {r["watershed_id"]: r for r in csv.DictReader(handle)}
    for column in ("observed_denudation_mm_per_kyr", "maximum_denudation_mm_per_kyr", "saturation_ratio",
                   "si_calcite", "si_dolomite", "si_gypsum", "ratio_rule"):
        assert column in rows_out["A"]
    assert float(rows_out["B"]["observed_denudation_mm_per_kyr"]) == pytest.approx(6.0, rel=1e-6)
    with rasterio.open(tmp_path / "cal" / "denudation_expected_mm_per_kyr.tif") as ds:
        expected = ds.read(1)
    assert np.allclose(expected[:, :10], 24.0, rtol=1e-6)
    assert np.allclose(expected[:, 10:20], 6.0, rtol=1e-6)
    assert np.allclose(expected[:, 20:], 36.0, rtol=1e-6)
    side = json.loads((tmp_path / "cal" / "calibration.summary.json").read_text())
    import hashlib
    assert side["samples"]["sha256"] == hashlib.sha256(samples.read_bytes()).hexdigest()
    assert "not a site investigation" in side["caution"]
    assert "gypsum = min(Ca, SO4)" in side["method"]["non_carbonate_correction"]
    assert geopandas.read_file(tmp_path / "cal" / "calibration.gpkg", layer="zones").shape[0] == 3

    # the nodata option leaves unsampled zones empty
    meta = run_calibration(mapdir, samples, zones, tmp_path / "cal2", layer="watersheds", id_field="watershed_id",
                           unsampled="nodata")
    table = meta["table"].set_index("watershed_id")
    assert table.loc["C", "ratio_rule"] == "nodata_option" and np.isnan(table.loc["C", "saturation_ratio"])
    with rasterio.open(tmp_path / "cal2" / "denudation_expected_mm_per_kyr.tif") as ds:
        assert np.isnan(ds.read(1)[:, 20:]).all()


def test_samples_located_by_xy(map_folder, tmp_path):
    mapdir, zones = map_folder
    path = tmp_path / "xy.csv"
    path.write_text("site_id,x,y,temperature_c,ca_mg_l,mg_mg_l,so4_mg_l,alkalinity_mg_l_caco3,runoff_mm_per_yr\n"
                    f"S1,{X0 + 2500},{Y0 - 500},10,50,0,0,125,300\n")
    meta = run_calibration(mapdir, path, zones, tmp_path / "out", layer="watersheds", id_field="watershed_id")
    table = meta["table"].set_index("watershed_id")
    assert table.loc["C", "n_samples"] == 1 and table.loc["A", "n_samples"] == 0
    # no pH: no saturation indices (the stated rule)
    assert np.isnan(table.loc["C", "si_calcite"])


@pytest.mark.parametrize("line, message", [
    ("S1,A,10,abc,0,0,100,7,300", "row 2: column 'ca_mg_l' value 'abc' is not a number"),
    ("S1,A,120,50,0,0,100,7,300", "row 2: column 'temperature_c' value '120' is outside"),
    ("S1,A,10,50,0,0,100,7,", "row 2: no runoff or discharge value"),
    ("S1,Z,10,50,0,0,100,7,300", "row 2: zone_id 'Z' is not in"),
    (",A,10,50,0,0,100,7,300", "row 2: column 'site_id' is empty"),
])
def test_bad_rows_one_line(map_folder, tmp_path, line, message):
    mapdir, zones = map_folder
    path = tmp_path / "bad.csv"
    path.write_text("site_id,zone_id,temperature_c,ca_mg_l,mg_mg_l,so4_mg_l,alkalinity_mg_l_hco3,ph,runoff_mm_per_yr\n" + line + "\n")
    result = runner.invoke(app, ["calibrate", str(mapdir), "--samples", str(path), "--zones", str(zones),
                                 "--layer", "watersheds", "--id-field", "watershed_id", "--out", str(tmp_path / "o")])
    assert result.exit_code == 1
    err = result.stderr.strip()
    assert len(err.splitlines()) == 1 and str(path) in err and message in err, err
    assert not (tmp_path / "o").exists()


def test_missing_columns(tmp_path):
    path = tmp_path / "s.csv"
    path.write_text("site_id,zone_id,temperature_c,ca_mg_l,mg_mg_l,so4_mg_l,runoff_mm_per_yr\nS,A,1,1,1,1,1\n")
    with pytest.raises(InputError, match="alkalinity_mg_l_hco3, alkalinity_mg_l_caco3"):
        read_samples(path)


def test_cli_writes_contract(map_folder, tmp_path):
    mapdir, zones = map_folder
    path = _write_samples(tmp_path / "s.csv", [dict(site_id="A1", zone_id="A", temperature_c=9, ca_mg_l=60, mg_mg_l=2,
                                                  so4_mg_l=10, alkalinity_mg_l_hco3=180, ph=7.6, runoff_mm_per_yr=350)])
    result = runner.invoke(app, ["calibrate", str(mapdir), "--samples", str(path), "--zones", str(zones),
                                 "--layer", "watersheds", "--id-field", "watershed_id", "--out", str(tmp_path / "o")])
    assert result.exit_code == 0, result.output
    assert "not a site investigation" in result.stdout
    for name in ("calibration.gpkg", "calibration.csv", "denudation_expected_mm_per_kyr.tif", "calibration.summary.json"):
        assert (tmp_path / "o" / name).is_file()
    again = runner.invoke(app, ["calibrate", str(mapdir), "--samples", str(path), "--zones", str(zones),
                                "--layer", "watersheds", "--id-field", "watershed_id", "--out", str(tmp_path / "o")])
    assert again.exit_code == 1 and "--overwrite" in again.stderr
