"""`denude summarize` and denude.execution.summaries on small synthetic map output folders."""

import json
import math

import geopandas as gpd
import numpy as np
import pandas as pd
import pyogrio
import pytest
import rasterio
import shapely
import typer
from rasterio.transform import from_origin
from shapely.geometry import Point, Polygon, box
from typer.testing import CliRunner

from denude.cli import summarize_cmd
from denude.core.hazard import DEFAULT_CLASS_NAMES, classify
from denude.core.rocks import RockTable
from denude.execution.summaries import summarize_outputs, zone_partials
from denude.io.grid import cell_areas_km2
from denude.errors import OutOfRangeWarning
from denude.io.grid import Grid
from denude.io.rock_csv import write_rock_table

CRS = "EPSG:32633"
X0, Y0, CELL = 500_000.0, 4_000_000.0, 1000.0   # 1 km cells: 1 cell = 1 km2


def write_tif(path, array, transform, crs, dtype, nodata, tags=None):
    height, width = array.shape
    with rasterio.open(path, "w", driver="GTiff", width=width, height=height, count=1, dtype=dtype,
                       crs=crs, transform=transform, nodata=nodata, tiled=True, blockxsize=16, blockysize=16) as ds:
        ds.write(array.astype(dtype), 1)
        if tags:
            ds.update_tags(**tags)


def make_outdir(path, rate, *, transform=None, crs=CRS, lithology=None, soluble=None, co2=None):
    """A map output folder per the DEVELOPERS.md contract, from a rate array [mm/kyr]."""
    path.mkdir(parents=True, exist_ok=True)
    rate = np.asarray(rate, dtype=np.float32)
    transform = transform or from_origin(X0, Y0, CELL, CELL)
    lithology = np.ones(rate.shape, np.int32) if lithology is None else lithology
    soluble = np.where(np.isnan(rate), np.nan, 1.0) if soluble is None else soluble
    co2 = 0.25 * rate if co2 is None else co2
    write_tif(path / "denudation_mm_per_kyr.tif", rate, transform, crs, "float32", np.nan)
    write_tif(path / "dissolved_load_mmol_per_l.tif", rate / 10, transform, crs, "float32", np.nan)
    write_tif(path / "co2_drawdown_t_per_km2_yr.tif", co2, transform, crs, "float32", np.nan)
    write_tif(path / "hazard_class.tif", classify(rate), transform, crs, "uint8", 255,
              {"class_names": json.dumps(list(DEFAULT_CLASS_NAMES))})
    write_tif(path / "lithology_code.tif", lithology, transform, crs, "int32", -2147483648)
    write_tif(path / "soluble_area_fraction.tif", soluble, transform, crs, "float32", np.nan)
    write_rock_table(RockTable.builtin(), path / "rocks.csv")
    (path / "run.json").write_text("{}")
    return path


def write_zones(path, geoms, ids=None, crs=CRS, layer="zones", field="wid"):
    ids = list(ids) if ids is not None else [f"z{i}" for i in range(len(geoms))]
    gpd.GeoDataFrame({field: ids}, geometry=list(geoms), crs=crs).to_file(path, layer=layer, engine="pyogrio")
    return path


def cell_box(c0, r0, c1, r1):
    """Box over columns c0..c1 and rows r0..r1 (fractional cell indices, rows from the top)."""
    return box(X0 + c0 * CELL, Y0 - r1 * CELL, X0 + c1 * CELL, Y0 - r0 * CELL)


def run(tmp_path, outdir, zones, name="out", **kwargs):
    out = tmp_path / f"{name}.gpkg"
    summarize_outputs(outdir, zones, id_field=kwargs.pop("id_field", "wid"), out_path=out, **kwargs)
    return pd.read_csv(out.with_suffix(".csv")).set_index("wid"), out


def jagged(cx, cy, radius, n=23, seed=0):
    """An irregular star-shaped polygon around (cx, cy)."""
    rng = np.random.default_rng(seed)
    angles = np.sort(rng.uniform(0, 2 * np.pi, n))
    radii = radius * rng.uniform(0.55, 1.0, n)
    return Polygon(np.c_[cx + radii * np.cos(angles), cy + radii * np.sin(angles)])


@pytest.fixture
def smooth(tmp_path):
    """40 x 50 cells: a smooth positive field with a nodata patch."""
    rows, cols = np.mgrid[0:40, 0:50]
    rate = 20 + 0.8 * cols + 15 * np.sin(rows / 6.0) ** 2
    rate[2:6, 30:36] = np.nan
    return make_outdir(tmp_path / "map", rate), rate


# -- analytic checks --------------------------------------------------------------------
def test_linear_ramp_square_mean(tmp_path):
    rate = np.tile(np.arange(20) + 0.5, (10, 1))          # value = column centre
    outdir = make_outdir(tmp_path / "map", rate)
    zones = write_zones(tmp_path / "z.gpkg", [cell_box(2.25, 1.0, 7.75, 6.0)])
    table, _ = run(tmp_path, outdir, zones)
    row = table.loc["z0"]
    # analytic: mean of a linear ramp over a square symmetric about x = 5 is the centre value 5
    assert row.denudation_mean_mm_per_kyr == pytest.approx(5.0, rel=1e-12)
    assert row.area_km2 == pytest.approx(5.5 * 5.0, rel=1e-12)          # analytic: 5.5 km x 5 km
    assert row.valid_cells == 6 * 5                                     # columns 2..7, rows 1..5
    # analytic: sum of rate x covered area = mean x area
    assert row.rock_volume_m3_per_yr == pytest.approx(5.0 * 27.5, rel=1e-12)
    assert row.co2_drawdown_t_per_yr == pytest.approx(0.25 * 5.0 * 27.5, rel=1e-6)
    assert row.denudation_min_mm_per_kyr == 2.5 and row.denudation_max_mm_per_kyr == 7.5


def test_zone_smaller_than_one_cell(tmp_path, smooth):
    outdir, rate = smooth
    zones = write_zones(tmp_path / "z.gpkg", [cell_box(10.2, 7.3, 10.5, 7.9)])
    row = run(tmp_path, outdir, zones)[0].loc["z0"]
    # analytic: 300 m x 600 m; exactextract keeps coverage fractions in float32 (rel. 1e-7)
    assert row.area_km2 == pytest.approx(0.3 * 0.6, rel=1e-6)
    assert row.valid_cells == 1
    for col in ("mean", "p10", "p50", "p90", "min", "max"):
        assert row[f"denudation_{col}_mm_per_kyr"] == pytest.approx(rate[7, 10], rel=1e-6)
    assert row.rock_volume_m3_per_yr == pytest.approx(rate[7, 10] * 0.18, rel=1e-6)


def test_zone_on_cell_edges_and_rasterstats(tmp_path, smooth):
    from rasterstats import zonal_stats

    outdir, rate = smooth
    geoms = [cell_box(3, 4, 7, 7), cell_box(20, 10, 35, 30), cell_box(28, 0, 40, 12)]
    zones = write_zones(tmp_path / "z.gpkg", geoms)
    table = run(tmp_path, outdir, zones)[0]
    assert table.loc["z0", "valid_cells"] == 12 and table.loc["z0", "nodata_cells"] == 0
    assert table.loc["z0", "area_km2"] == pytest.approx(12.0, rel=1e-12)   # analytic: 4 x 3 cells
    ref = zonal_stats(geoms, str(outdir / "denudation_mm_per_kyr.tif"), stats=["mean", "count"])
    for i, stats in enumerate(ref):
        row = table.loc[f"z{i}"]
        # reference: rasterstats zonal_stats (cell-centre rule; equal to coverage on cell-aligned zones)
        assert row.valid_cells == stats["count"]
        assert row.denudation_mean_mm_per_kyr == pytest.approx(stats["mean"], rel=1e-6)
    assert table.loc["z2", "nodata_cells"] == 24                           # the 4 x 6 nodata patch


def test_against_exactextract(tmp_path, smooth):
    from exactextract import exact_extract

    outdir, _ = smooth
    geoms = [jagged(X0 + 12_000, Y0 - 15_000, 9_000, seed=1), jagged(X0 + 33_000, Y0 - 8_000, 8_000, seed=2),
             jagged(X0 + 30_000, Y0 - 27_000, 12_000, seed=3), jagged(X0 + 5_000, Y0 - 35_000, 9_000, seed=4)]
    zones = write_zones(tmp_path / "z.gpkg", geoms)
    table = run(tmp_path, outdir, zones)[0]
    frame = gpd.GeoDataFrame({"wid": [f"z{i}" for i in range(4)]}, geometry=geoms, crs=CRS)
    ref = exact_extract(str(outdir / "denudation_mm_per_kyr.tif"), frame,
                        ["mean", "sum", "count", "quantile(q=0.5)", "quantile(q=0.9)", "min", "max"],
                        include_cols=["wid"], output="pandas").set_index("wid")
    for wid, r in ref.iterrows():
        row = table.loc[wid]
        # reference: exactextract coverage-weighted mean, sum and count (1 km2 cells)
        assert row.denudation_mean_mm_per_kyr == pytest.approx(r["mean"], rel=1e-9)
        assert row.rock_volume_m3_per_yr == pytest.approx(r["sum"], rel=1e-9)
        assert row.valid_area_km2 == pytest.approx(r["count"], rel=1e-9)
        assert row.denudation_min_mm_per_kyr == pytest.approx(r["min"], rel=1e-7)
        assert row.denudation_max_mm_per_kyr == pytest.approx(r["max"], rel=1e-7)
        # reference: exactextract coverage-weighted quantiles; tolerance covers the histogram bin
        # (0.35 %) and the different quantile definitions over a few hundred cells
        assert row.denudation_p50_mm_per_kyr == pytest.approx(r["quantile_50"], rel=0.02)
        assert row.denudation_p90_mm_per_kyr == pytest.approx(r["quantile_90"], rel=0.02)


def test_zone_outside_raster_and_all_nodata(tmp_path):
    rate = np.full((10, 10), 30.0)
    rate[:, 5:] = np.nan
    outdir = make_outdir(tmp_path / "map", rate)
    geoms = [cell_box(0, 0, 5, 10), cell_box(6, 2, 9, 8), cell_box(-30, -30, -20, -20)]
    table = run(tmp_path, outdir, write_zones(tmp_path / "z.gpkg", geoms))[0]
    assert list(table.index) == ["z0", "z1", "z2"]
    nodata, outside = table.loc["z1"], table.loc["z2"]
    assert nodata.valid_cells == 0 and nodata.nodata_cells == 18 and nodata.area_km2 == pytest.approx(18.0)
    assert math.isnan(nodata.denudation_mean_mm_per_kyr) and math.isnan(nodata.denudation_p90_mm_per_kyr)
    assert nodata.rock_volume_m3_per_yr == 0.0
    assert outside.valid_cells == 0 and outside.nodata_cells == 0 and outside.area_km2 == 0.0
    assert math.isnan(outside.denudation_mean_mm_per_kyr)
    assert table.loc["z0", "denudation_mean_mm_per_kyr"] == 30.0


def test_nested_zones_add_up(tmp_path, smooth):
    outdir, _ = smooth
    outer = jagged(X0 + 25_000, Y0 - 20_000, 15_000, seed=7)
    inner = jagged(X0 + 25_000, Y0 - 20_000, 6_000, seed=8)
    ring = outer.difference(inner)
    table = run(tmp_path, outdir, write_zones(tmp_path / "z.gpkg", [outer, inner, ring]))[0]
    # analytic: the outer zone is the union of the inner zone and the ring (tolerance: exactextract
    # keeps coverage fractions in float32)
    for col in ("area_km2", "valid_area_km2", "rock_volume_m3_per_yr", "co2_drawdown_t_per_yr", "rock_mass_t_per_yr"):
        assert table.loc["z0", col] == pytest.approx(table.loc["z1", col] + table.loc["z2", col], rel=1e-6)
    assert table.loc["z0", "area_km2"] == pytest.approx(outer.area / 1e6, rel=1e-6)  # analytic: polygon area


def test_partition_conserves_totals(tmp_path, smooth):
    outdir, rate = smooth
    extent = cell_box(0, 0, 50, 40)
    cut = shapely.LineString([(X0 + 17_300, Y0 + 10), (X0 + 21_100, Y0 - 20_700), (X0 + 15_900, Y0 - 40_010)])
    cut2 = shapely.LineString([(X0 - 10, Y0 - 13_300), (X0 + 50_010, Y0 - 26_600)])
    pieces = list(shapely.get_parts(shapely.polygonize(list(shapely.get_parts(
        shapely.union_all([extent.boundary, cut, cut2]))))))
    assert len(pieces) == 4
    table = run(tmp_path, outdir, write_zones(tmp_path / "z.gpkg", pieces))[0]
    valid = ~np.isnan(rate)
    # analytic: a partition of the grid sums to the grid totals (1 km2 cells); tolerance: float32
    # coverage fractions from exactextract
    assert table.area_km2.sum() == pytest.approx(rate.size, rel=1e-6)
    assert table.valid_cells.sum() > valid.sum()                       # edge cells counted in both pieces
    assert table.valid_area_km2.sum() == pytest.approx(valid.sum(), rel=1e-6)
    assert table.rock_volume_m3_per_yr.sum() == pytest.approx(rate[valid].astype(np.float32).astype(float).sum(), rel=1e-6)
    hazard_cols = [c for c in table.columns if c.startswith("hazard_area_km2_")]
    assert table[hazard_cols].sum().sum() == pytest.approx(valid.sum(), rel=1e-6)


def test_halves_merge_equal_whole(tmp_path, smooth):
    outdir, rate = smooth
    top = make_outdir(tmp_path / "top", rate[:17])
    bottom = make_outdir(tmp_path / "bottom", rate[17:], transform=from_origin(X0, Y0 - 17 * CELL, CELL, CELL))
    geoms = np.array([jagged(X0 + 25_000, Y0 - 20_000, 15_000, seed=s) for s in range(5)], dtype=object)
    whole = zone_partials(outdir, geoms).finalize()
    merged = zone_partials(top, geoms).merge(zone_partials(bottom, geoms)).finalize()
    for name, values in whole.items():
        if values.dtype == object:
            assert list(merged[name]) == list(values)
        else:
            # analytic: partial sums add; only float rounding of the sums differs
            np.testing.assert_allclose(merged[name], values, rtol=1e-12, equal_nan=True)


def test_reprojected_zones_match(tmp_path, smooth):
    outdir, _ = smooth
    geoms = [jagged(X0 + 20_000, Y0 - 20_000, 12_000, seed=11), jagged(X0 + 38_000, Y0 - 10_000, 8_000, seed=12)]
    dense = [g.segmentize(50.0) for g in geoms]
    native = run(tmp_path, outdir, write_zones(tmp_path / "native.gpkg", dense), name="a")[0]
    geographic = gpd.GeoDataFrame({"wid": ["z0", "z1"]}, geometry=dense, crs=CRS).to_crs("EPSG:4326")
    geographic.to_file(tmp_path / "lonlat.gpkg", layer="zones", engine="pyogrio")
    moved, out = run(tmp_path, outdir, tmp_path / "lonlat.gpkg", name="b")
    for col in ("area_km2", "denudation_mean_mm_per_kyr", "rock_volume_m3_per_yr", "denudation_p90_mm_per_kyr"):
        # reference: the same zones given in the raster CRS (round trip through EPSG:4326)
        np.testing.assert_allclose(moved[col], native[col], rtol=1e-5)
    meta = json.loads(out.with_name("b.summary.json").read_text())
    assert meta["zones"]["reprojected_from"] == "EPSG:4326"


def test_geographic_grid_areas_and_weighted_mean(tmp_path):
    from exactextract import exact_extract
    from rasterio.crs import CRS as RioCRS

    # analytic: surface of the WGS 84 ellipsoid, 2 pi a^2 (1 + (1 - e^2)/e atanh e)
    a, f = 6378137.0, 1 / 298.257223563
    e = math.sqrt(f * (2 - f))
    surface_km2 = 2 * math.pi * a**2 * (1 + (1 - e**2) / e * math.atanh(e)) / 1e6
    rows, _ = cell_areas_km2(Grid(RioCRS.from_epsg(4326).to_wkt(), tuple(from_origin(-180, 90, 1.0, 1.0))[:6], 360, 180))
    assert rows.sum() * 360 == pytest.approx(surface_km2, rel=1e-7)

    transform = from_origin(10.0, 60.0, 0.05, 0.05)
    r, c = np.mgrid[0:60, 0:40]
    rate = 10 + r + 0.3 * c
    outdir = make_outdir(tmp_path / "map", rate, transform=transform, crs="EPSG:4326")
    areas, method = cell_areas_km2(Grid(RioCRS.from_epsg(4326).to_wkt(), tuple(transform)[:6], 40, 60))
    assert method.startswith("geodesic")
    write_tif(tmp_path / "area.tif", np.repeat(areas[:, None], 40, axis=1), transform, "EPSG:4326", "float64", None)
    zone = jagged(11.0, 58.5, 0.9, seed=5)
    zones = write_zones(tmp_path / "z.gpkg", [zone], crs="EPSG:4326")
    table, out = run(tmp_path, outdir, zones)
    frame = gpd.GeoDataFrame({"wid": ["z0"]}, geometry=[zone], crs="EPSG:4326")
    ref = exact_extract(str(outdir / "denudation_mm_per_kyr.tif"), frame, ["weighted_mean", "weighted_sum"],
                        weights=str(tmp_path / "area.tif"), output="pandas")
    # reference: exactextract coverage x cell-area weighted mean and sum
    assert table.loc["z0", "denudation_mean_mm_per_kyr"] == pytest.approx(ref["weighted_mean"][0], rel=1e-9)
    assert table.loc["z0", "rock_volume_m3_per_yr"] == pytest.approx(ref["weighted_sum"][0], rel=1e-9)
    # reference: the zone's geodesic area from pyproj.Geod (coverage approximates it to < 0.1 %)
    from pyproj import Geod
    geod_area = abs(Geod(ellps="WGS84").geometry_area_perimeter(zone)[0]) / 1e6
    assert table.loc["z0", "area_km2"] == pytest.approx(geod_area, rel=1e-3)
    assert table.loc["z0", "cell_area_method"] == "geodesic"


def test_rock_mass_dominant_rock_and_hazard(tmp_path):
    rate = np.full((10, 10), 60.0)
    rate[:, :3] = 10.0
    lithology = np.ones((10, 10), np.int32)
    lithology[:, :3] = 3                                          # gypsum, 2.31 g/cm3
    outdir = make_outdir(tmp_path / "map", rate, lithology=lithology)
    table = run(tmp_path, outdir, write_zones(tmp_path / "z.gpkg", [cell_box(0, 0, 5, 10)]))[0]
    row = table.loc["z0"]
    # hand-derived: 30 cells gypsum at 10 mm/kyr x 2.31, 20 cells limestone at 60 x 2.60 (rocks.py)
    assert row.rock_mass_t_per_yr == pytest.approx(30 * 10 * 2.31 + 20 * 60 * 2.60, rel=1e-9)
    assert row.dominant_rock == "gypsum" and row.dominant_rock_share == pytest.approx(0.6)
    assert row.hazard_area_km2_low == pytest.approx(30.0) and row.hazard_area_km2_high == pytest.approx(20.0)
    assert row.hazard_max_class == 3


@pytest.mark.parametrize("workers", [1, 2])
def test_sinkholes_and_planning_units(tmp_path, smooth, monkeypatch, workers):
    import denude.execution.summary_strips as summary_strips

    if workers > 1:
        monkeypatch.setattr(summary_strips, "STRIP_CELLS", 16 * 50)  # 3 strips over 2 processes
    outdir, rate = smooth
    zones = write_zones(tmp_path / "z.gpkg", [cell_box(0, 0, 10, 10), cell_box(10, 0, 20, 10)])
    units = write_zones(tmp_path / "u.gpkg", [cell_box(0, 0, 25, 40), cell_box(25, 0, 50, 40)], ids=[101, 102],
                        layer="parcels", field="parcel")
    pts = [Point(X0 + 2_500, Y0 - 3_500), Point(X0 + 7_200, Y0 - 1_100), Point(X0 + 15_500, Y0 - 9_900),
           Point(X0 - 5_000, Y0)]
    gpd.GeoDataFrame({"name": ["s1", "s2", "s3", "far"]}, geometry=pts, crs=CRS).to_file(tmp_path / "p.gpkg", engine="pyogrio")
    with pytest.warns(OutOfRangeWarning, match="1 of 4 point"):
        table, out = run(tmp_path, outdir, zones, units_path=units, units_id_field="parcel",
                         points_path=tmp_path / "p.gpkg", workers=workers)
    layers = dict(pyogrio.list_layers(out))
    # layer_styles: the default styles a desktop GIS applies on open (an attribute table)
    assert layers == {"zones": "Polygon", "planning_units": "Polygon", "sinkholes": "Point", "layer_styles": None}
    points = gpd.read_file(out, layer="sinkholes").set_index("name")
    # hand-derived: the cell holding each point
    assert points.loc["s1", "denudation_mm_per_kyr"] == pytest.approx(rate[3, 2], rel=1e-6)
    assert points.loc["s3", "denudation_mm_per_kyr"] == pytest.approx(rate[9, 15], rel=1e-6)
    assert points.loc["s1", "hazard_class"] == classify(rate[3, 2])
    assert points.loc["s1", "hazard_name"] == DEFAULT_CLASS_NAMES[classify(rate[3, 2])]
    assert points.loc["s1", "rock"] == "limestone"
    assert math.isnan(points.loc["far", "denudation_mm_per_kyr"]) and points.loc["far", "hazard_class"] == 255
    z0 = table.loc["z0"]
    assert z0.sinkhole_count == 2 and z0.sinkhole_density_per_km2 == pytest.approx(2 / 100)
    mean_pts = (rate[3, 2] + rate[1, 7]) / 2
    assert z0.sinkhole_mean_rate_mm_per_kyr == pytest.approx(mean_pts, rel=1e-6)
    assert z0.sinkhole_rate_ratio == pytest.approx(mean_pts / z0.denudation_mean_mm_per_kyr, rel=1e-6)
    assert table.loc["z1", "sinkhole_count"] == 1
    parcels = pd.read_csv(out.with_name("out_planning_units.csv")).set_index("parcel")
    shares = parcels[[c for c in parcels.columns if c.startswith("hazard_share_")]]
    assert len(shares.columns) == 5
    # analytic: shares of the unit's area; the nodata patch (24 km2) lies in unit 102
    assert shares.loc[101].sum() == pytest.approx(1.0, rel=1e-12)
    assert shares.loc[102].sum() == pytest.approx(1 - 24 / 1000, rel=1e-12)


def test_invalid_geometry_repaired_and_counted(tmp_path, smooth):
    outdir, _ = smooth
    bowtie = Polygon([(X0 + 1000, Y0 - 1000), (X0 + 9000, Y0 - 9000), (X0 + 9000, Y0 - 1000), (X0 + 1000, Y0 - 9000)])
    table, out = run(tmp_path, outdir, write_zones(tmp_path / "z.gpkg", [bowtie, cell_box(1, 1, 4, 4)]))
    meta = json.loads(out.with_name("out.summary.json").read_text())
    assert meta["zones"]["repaired_geometries"] == 1
    # analytic: the bow-tie repairs to two triangles of 16 km2 each
    assert table.loc["z0", "area_km2"] == pytest.approx(32.0, rel=1e-9)


# -- CLI --------------------------------------------------------------------------------
def cli_app():
    app = typer.Typer()

    @app.callback()
    def main():
        """test app"""

    summarize_cmd.register(app)
    return app


def test_cli_writes_contract_outputs(tmp_path, smooth):
    outdir, _ = smooth
    zones = write_zones(tmp_path / "z.gpkg", [cell_box(0, 0, 10, 10), cell_box(5, 5, 30, 30)], layer="sheds")
    out = tmp_path / "result.gpkg"
    result = CliRunner().invoke(cli_app(), ["summarize", str(outdir), "--zones", str(zones), "--id-field", "wid",
                                            "--out", str(out), "--quiet"])
    assert result.exit_code == 0, result.output
    assert "Caution" in result.stdout
    table = gpd.read_file(out, layer="sheds")
    for col in ("wid", "area_km2", "soluble_area_km2", "denudation_mean_mm_per_kyr", "denudation_p90_mm_per_kyr",
                "rock_volume_m3_per_yr", "co2_drawdown_t_per_yr", "valid_cells"):
        assert col in table.columns
    assert len(table) == 2 and (tmp_path / "result.csv").exists()
    meta = json.loads((tmp_path / "result.summary.json").read_text())
    assert len(meta["inputs"][str(zones)]["sha256"]) == 64
    assert meta["method"]["cell_area"].startswith("planar")
    assert sorted(p.name for p in tmp_path.iterdir() if p.name.startswith(".")) == []


@pytest.mark.parametrize("case, words", [
    ("empty", "is empty"),
    ("missing_field", "no field 'wid'"),
    ("duplicate", "duplicate id 'z0'"),
    ("no_crs", "has no CRS"),
    ("no_overlap", "no zone overlaps"),
    ("not_polygons", "must be polygons"),
])
def test_cli_bad_zones_one_line_error(tmp_path, smooth, case, words):
    outdir, _ = smooth
    path = tmp_path / "bad.gpkg"
    inside = cell_box(1, 1, 5, 5)
    if case == "empty":
        gpd.GeoDataFrame({"wid": []}, geometry=[], crs=CRS).to_file(path, layer="zones", engine="pyogrio")
    elif case == "missing_field":
        write_zones(path, [inside], field="name")
    elif case == "duplicate":
        write_zones(path, [inside, inside], ids=["z0", "z0"])
    elif case == "no_crs":
        with pytest.warns(UserWarning):
            write_zones(path, [inside], crs=None)
    elif case == "no_overlap":
        write_zones(path, [cell_box(100, 100, 110, 110)])
    elif case == "not_polygons":
        write_zones(path, [Point(X0, Y0)])
    out = tmp_path / "out.gpkg"
    result = CliRunner().invoke(cli_app(), ["summarize", str(outdir), "--zones", str(path), "--id-field", "wid",
                                            "--out", str(out)])
    assert result.exit_code == 1
    lines = result.stderr.strip().splitlines()
    assert len(lines) == 1 and lines[0].startswith("denude: error:") and words in lines[0]
    assert str(path) in lines[0]
    assert "Traceback" not in result.output
    assert sorted(p.name for p in tmp_path.iterdir()) == ["bad.gpkg", "map"]


def test_cli_refuses_existing_output_and_missing_map(tmp_path, smooth):
    outdir, _ = smooth
    zones = write_zones(tmp_path / "z.gpkg", [cell_box(1, 1, 5, 5)])
    out = tmp_path / "out.gpkg"
    out.write_text("x")
    args = ["summarize", str(outdir), "--zones", str(zones), "--id-field", "wid", "--out", str(out)]
    result = CliRunner().invoke(cli_app(), args)
    assert result.exit_code == 1 and "already exists" in result.stderr and out.read_text() == "x"
    (outdir / "hazard_class.tif").unlink()
    result = CliRunner().invoke(cli_app(), args + ["--overwrite"])
    assert result.exit_code == 1 and "missing hazard_class.tif" in result.stderr


def test_strips_equal_one_strip(tmp_path, smooth, monkeypatch):
    import denude.execution.summaries as summaries
    import denude.execution.summary_strips as summary_strips

    outdir, _ = smooth
    geoms = np.array([jagged(X0 + 25_000, Y0 - 20_000, 15_000, seed=s) for s in range(3)], dtype=object)
    whole = zone_partials(outdir, geoms, workers=1).finalize()
    monkeypatch.setattr(summary_strips, "STRIP_CELLS", 16 * 50)      # 16-row strips: 3 strips
    datasets, grid = summaries.open_map_folder(outdir)
    assert len(summaries.strip_plan(grid, datasets[summaries.RATE_TIF])) == 3
    for ds in datasets.values():
        ds.close()
    got = zone_partials(outdir, geoms, workers=1).finalize()   # the process pool: see the sinkhole test
    for name, values in whole.items():
        if values.dtype == object:
            assert list(got[name]) == list(values)
        else:
            # analytic: partial sums add; only float rounding of the sums differs
            np.testing.assert_allclose(got[name], values, rtol=1e-12, equal_nan=True)


def test_feature_id_field_and_layer_choice(tmp_path, smooth):
    outdir, _ = smooth
    path = tmp_path / "two.gpkg"
    write_zones(path, [cell_box(1, 1, 5, 5)], layer="sheds")
    write_zones(path, [cell_box(2, 2, 6, 6), cell_box(7, 7, 9, 9)], layer="subsheds")
    with pytest.raises(Exception, match="has 2 layers"):
        summarize_outputs(outdir, path, out_path=tmp_path / "a.gpkg")
    summarize_outputs(outdir, path, layer="subsheds", id_field="fid", out_path=tmp_path / "b.gpkg")
    table = pd.read_csv(tmp_path / "b.csv")
    assert table["fid"].tolist() == [1, 2]                       # GeoPackage feature ids
    assert table["area_km2"].tolist() == pytest.approx([16.0, 4.0])  # analytic: 4 x 4 and 2 x 2 cells
    assert dict(pyogrio.list_layers(tmp_path / "b.gpkg"))["subsheds"] == "Polygon"


def test_zone_partly_off_the_map_reports_its_whole_area(tmp_path):
    # analytic: a 4 x 6-cell zone (1 km cells) with half its columns beyond the raster's edge
    rate = np.full((10, 10), 30.0)
    outdir = make_outdir(tmp_path / "map", rate)
    geoms = [cell_box(7, 2, 13, 6), cell_box(0, 0, 5, 10)]
    table = run(tmp_path, outdir, write_zones(tmp_path / "z.gpkg", geoms))[0]
    half, whole = table.loc["z0"], table.loc["z1"]
    assert half.zone_area_km2 == pytest.approx(24.0) and half.area_km2 == pytest.approx(12.0)
    assert half.map_coverage_fraction == pytest.approx(0.5)
    assert whole.map_coverage_fraction == pytest.approx(1.0)
