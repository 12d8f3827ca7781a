"""`denude summarize --points`: the sinkhole_evaluation entry of the sidecar, against
scikit-learn (ROC AUC) and scipy's chi-square quantiles (exact Poisson / Garwood intervals)."""

import json
import warnings

import geopandas
import numpy as np
import pytest
import rasterio
import shapely
from rasterio.transform import from_origin
from typer.testing import CliRunner

from denude.cli.main import app
from denude.core.hazard import classify
from denude.execution import summarize_outputs

sklearn_metrics = pytest.importorskip("sklearn.metrics")
stats = pytest.importorskip("scipy.stats")

runner = CliRunner()
CRS = "EPSG:32632"
X0, Y0, RES = 400000.0, 5200000.0, 100.0
ROWS, COLS = 24, 40
ROCKS = "code,name,mineral,density_g_cm3,purity\n0,insoluble,insoluble,2.65,1.0\n1,limestone,calcite,2.60,0.95\n"


def _write(path, data, nodata, tags=None):
    profile = dict(driver="GTiff", width=COLS, height=ROWS, count=1, dtype=data.dtype, crs=CRS,
                   transform=from_origin(X0, Y0, RES, RES), nodata=nodata)
    with rasterio.open(path, "w", **profile) as ds:
        ds.write(data, 1)
        if tags:
            ds.update_tags(**tags)


@pytest.fixture
def folder(tmp_path):
    out = tmp_path / "map"
    out.mkdir()
    cols = np.arange(COLS)
    rate = np.tile((cols * 5.0).astype(np.float32), (ROWS, 1))      # 0 ... 195 mm/kyr, west to east
    rate[0, 0] = np.nan
    _write(out / "denudation_mm_per_kyr.tif", rate, float("nan"))
    _write(out / "co2_drawdown_t_per_km2_yr.tif", rate * 0.4, float("nan"))
    _write(out / "hazard_class.tif", classify(rate), 255,
           {"class_breaks_mm_per_kyr": "[5.0, 20.0, 50.0, 150.0]"})
    _write(out / "lithology_code.tif", np.ones((ROWS, COLS), np.int32), -2147483648)
    _write(out / "soluble_area_fraction.tif", np.ones((ROWS, COLS), np.float32), float("nan"))
    (out / "rocks.csv").write_text(ROCKS)
    zones = geopandas.GeoDataFrame({"zid": ["Z"]}, geometry=[shapely.box(X0, Y0 - ROWS * RES, X0 + COLS * RES, Y0)], crs=CRS)
    zones.to_file(tmp_path / "zones.gpkg", driver="GPKG")
    return out, tmp_path / "zones.gpkg", rate


def _points(tmp_path, cells, name="sinkholes.gpkg"):
    geoms = [shapely.Point(X0 + (c + 0.5) * RES, Y0 - (r + 0.5) * RES) for r, c in cells]
    geopandas.GeoDataFrame({"sid": list(range(len(geoms)))}, geometry=geoms, crs=CRS).to_file(tmp_path / name, driver="GPKG")
    return tmp_path / name


def test_evaluation_against_references(folder, tmp_path):
    mapdir, zones, rate = folder
    rng = np.random.default_rng(11)
    cells = [(int(r), int(c)) for r, c in zip(rng.integers(0, ROWS, 60), rng.integers(0, COLS, 60))]
    cells += [cells[0]]                                  # two points in one cell
    points = _points(tmp_path, cells)
    with warnings.catch_warnings(record=True) as record:
        warnings.simplefilter("always")
        meta = summarize_outputs(mapdir, zones, points_path=points, out_path=tmp_path / "s.gpkg", workers=1)
    ev = json.loads((tmp_path / "s.summary.json").read_text())["sinkhole_evaluation"]
    assert ev == json.loads(json.dumps(meta["sinkhole_evaluation"]))
    labels = np.zeros(rate.shape, bool)
    for r, c in cells:
        labels[r, c] = True
    ok = np.isfinite(rate)
    # reference: scikit-learn roc_auc_score over the mapped cells
    assert ev["auc"] == pytest.approx(sklearn_metrics.roc_auc_score(labels[ok], rate[ok]), abs=1e-12)
    hz = classify(rate)
    cell_km2 = RES * RES / 1e6
    for k, cls in enumerate(ev["classes"]):
        count = sum(1 for r, c in cells if hz[r, c] == k)
        area = np.count_nonzero(hz == k) * cell_km2
        assert cls["count"] == count
        assert cls["density_per_km2"] == pytest.approx(count / area)
        # reference: Garwood interval from scipy.stats.chi2.ppf
        low = stats.chi2.ppf(0.025, 2 * count) / 2 if count else 0.0
        assert cls["density_ci95_low"] == pytest.approx(low / area, rel=1e-8, abs=1e-12)
        assert cls["density_ci95_high"] == pytest.approx(stats.chi2.ppf(0.975, 2 * count + 2) / 2 / area, rel=1e-8)
    assert [c["name"] for c in ev["classes"]] == ["negligible", "low", "moderate", "high", "very high"]
    assert ev["class_breaks_mm_per_kyr"] == [5.0, 20.0, 50.0, 150.0]
    rises = all(b["density_per_km2"] >= a["density_per_km2"] for a, b in zip(ev["classes"], ev["classes"][1:]))
    assert ev["density_rises_with_class"] == rises
    assert any("does not rise" in str(w.message) for w in record) == (not rises)


def test_warning_when_density_falls_and_breaks_from_record(folder, tmp_path):
    mapdir, zones, rate = folder
    # sinkholes crowd the "moderate" columns (20-50 mm/kyr: columns 4-9) and avoid "high"
    cells = [(r, c) for r in range(0, ROWS, 2) for c in (5, 6, 7, 8)] + [(3, 25), (3, 38)]
    points = _points(tmp_path, cells)
    result = runner.invoke(app, ["summarize", str(mapdir), "--zones", str(zones), "--points", str(points),
                                 "--out", str(tmp_path / "s.gpkg"), "--breaks-from-record", "--workers", "1"])
    assert result.exit_code == 0, result.output
    assert "density does not rise with hazard class" in result.stderr
    ev = json.loads((tmp_path / "s.summary.json").read_text())["sinkhole_evaluation"]
    assert ev["density_rises_with_class"] is False
    rec = ev["record_breaks"]
    dens = [c["density_per_km2"] for c in rec["classes"]]
    assert all(b >= a for a, b in zip(dens, dens[1:]))
    assert sum(c["count"] for c in rec["classes"]) == len(cells)
    assert "breaks_mm_per_kyr" in rec["job_file"]
    assert "breaks from the record" in result.stdout
