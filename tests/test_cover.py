"""Covered karst: the cover input, the ``covered_karst`` layer and its summary columns.

Every expected value here is derived by hand from the rule in ``denude.core.cover`` (source:
"derived"): class 0 where the soluble-area fraction is 0, 2 where it is > 0 and the cover is
> 0 m and >= the threshold, 1 where it is > 0 under thinner (or no) cover, 255 where unknown.
"""

import hashlib
import json

import numpy as np
import pandas as pd
import pytest
import rasterio
from rasterio.transform import from_origin
from shapely.geometry import box
from typer.testing import CliRunner

from denude.cli.main import app
from denude.core.cover import COVER_CLASS_NAMES, classify_cover
from denude.core.zonal import ZonalAccumulator
from denude.errors import InputError
from denude.execution.batch import TILES_DIR, ZoneSpec, run_batch
from denude.execution.map_run import run_map
from denude.execution.summaries import summarize_outputs
from denude.execution.validation import inspect_job
from denude.io.jobfile import LAYERS, build_settings
from denude.io.styles import read_category_names

CRS = "EPSG:32632"
X0, Y0 = 400000.0, 5200000.0


def read(path):
    with rasterio.open(path) as ds:
        return ds.read(1)


def flags(paths, out, **extra):
    base = dict(lithology=str(paths["lithology"]), runoff=str(paths["runoff"]), pco2=str(paths["pco2"]),
                temperature=str(paths["temperature"]), out=str(out), block_size=16)
    base.update(extra)
    return base


@pytest.fixture
def covered(map_inputs, make_raster):
    """``map_inputs`` (40 x 56 cells of 100 m, codes 0-5 + nodata) plus a cover thickness
    raster [m] (0 on the west third, 0.5-12 m elsewhere, a nodata patch) and a 0/1 mask."""
    rows, cols = map_inputs["shape"]
    yy, xx = np.mgrid[0:rows, 0:cols]
    thickness = np.where(xx < 18, 0.0, 0.5 + 0.2 * (xx - 18) + 0.05 * yy).astype(np.float32)
    thickness[30:34, 40:46] = np.nan
    mask = ((xx // 7 + yy // 5) % 2).astype(np.uint8)
    paths = dict(map_inputs["paths"])
    paths["cover"] = make_raster("cover_m.tif", thickness, nodata=np.nan)
    paths["mask"] = make_raster("cover_mask.tif", mask, nodata=255)
    return {**map_inputs, "paths": paths, "thickness": thickness, "mask": mask}


# ---------------------------------------------------------------------------- the rule
def test_class_codes_on_a_hand_built_case():
    # soluble fraction: insoluble rock, soluble (whole and partial), unknown (NaN)
    fraction = np.array([[0.0, 1.0, 0.4, np.nan],
                         [1.0, 0.0, 1.0, 0.25]])
    thickness = np.array([[3.0, 3.0, 0.0, 3.0],
                          [np.nan, np.nan, 1.5, 2.0]])
    # derived from the rule: insoluble -> 0 even under cover or with cover nodata; soluble and
    # thickness > 0 -> 2; soluble and 0 m -> 1; soluble with cover nodata -> 255
    expected = np.array([[0, 2, 1, 255],
                         [255, 0, 2, 2]], np.uint8)
    got = classify_cover(fraction, thickness)
    assert got.dtype == np.uint8
    np.testing.assert_array_equal(got, expected)
    # a 2 m threshold: 1.5 m no longer counts, exactly 2 m and 3 m do
    expected_2m = np.array([[0, 2, 1, 255],
                            [255, 0, 1, 2]], np.uint8)
    np.testing.assert_array_equal(classify_cover(fraction, thickness, 2.0), expected_2m)
    # a 0/1 mask and a constant broadcast
    np.testing.assert_array_equal(classify_cover([0.0, 1.0, 1.0], [1, 1, 0]), [0, 2, 1])
    np.testing.assert_array_equal(classify_cover(fraction[1], 1.0), [2, 0, 2, 2])
    with pytest.raises(InputError, match="must be a number >= 0"):
        classify_cover(fraction, thickness, -1.0)


# ---------------------------------------------------------------------------- map runs
def test_cover_adds_the_layer_and_leaves_the_rates_byte_identical(covered, tmp_path):
    p = covered["paths"]
    plain = run_map(build_settings(flags(p, tmp_path / "plain")))
    with_cover = run_map(build_settings(flags(p, tmp_path / "cover", cover=str(p["cover"]))))
    assert "covered_karst.tif" not in plain.outputs
    assert [o for o in plain.outputs if o.endswith(".tif")] == list(LAYERS.values())
    assert [o for o in with_cover.outputs if o.endswith(".tif")] == list(LAYERS.values()) + ["covered_karst.tif"]
    for file in LAYERS.values():          # the rate and every other layer: same bytes
        assert (tmp_path / "plain" / file).read_bytes() == (tmp_path / "cover" / file).read_bytes(), file

    out = tmp_path / "cover"
    classes = read(out / "covered_karst.tif")
    soluble = read(out / "soluble_area_fraction.tif")
    t = covered["thickness"]
    expected = np.full(classes.shape, 255, np.uint8)          # derived: the rule, written out
    expected[soluble == 0] = 0
    expected[(soluble > 0) & ~np.isnan(t)] = 1
    expected[(soluble > 0) & (t > 0)] = 2
    np.testing.assert_array_equal(classes, expected)
    assert {0, 1, 2, 255} <= set(np.unique(classes).tolist())
    with rasterio.open(out / "covered_karst.tif") as ds:
        assert ds.dtypes[0] == "uint8" and ds.nodata == 255
        assert ds.colormap(1)[2] != ds.colormap(1)[1]
        tags = ds.tags()
        assert json.loads(tags["class_names"]) == list(COVER_CLASS_NAMES)
        assert "not a site investigation" in tags["caution"]
    assert read_category_names(out / "covered_karst.tif") == list(COVER_CLASS_NAMES)
    assert (out / "covered_karst.sld").is_file() and "covered_karst.sld" in with_cover.outputs

    record = json.loads((out / "run.json").read_text())
    cover_record = record["inputs"]["cover"]
    assert cover_record["sha256"] == hashlib.sha256(p["cover"].read_bytes()).hexdigest()
    assert cover_record["unit"] == "m" and cover_record["resampling"] == "none (aligned)"
    assert record["settings"]["cover"] == str(p["cover"]) and record["settings"]["cover_min_thickness_m"] == 0.0
    assert "covered_karst" in record["settings"]["layers"]


def test_threshold_and_mask(covered, tmp_path):
    p = covered["paths"]
    run_map(build_settings(flags(p, tmp_path / "t", cover=str(p["cover"]), cover_min_thickness_m=4.0,
                                 layers="soluble_fraction,covered_karst")))
    classes = read(tmp_path / "t" / "covered_karst.tif")
    soluble = read(tmp_path / "t" / "soluble_area_fraction.tif") > 0
    t = covered["thickness"]
    np.testing.assert_array_equal(classes == 2, soluble & (t >= 4.0))
    np.testing.assert_array_equal(classes == 1, soluble & (t < 4.0))
    with rasterio.open(tmp_path / "t" / "covered_karst.tif") as ds:
        assert float(ds.tags()["cover_min_thickness_m"]) == 4.0

    run_map(build_settings(flags(p, tmp_path / "m", cover=str(p["mask"]), layers="soluble_fraction,covered_karst")))
    classes = read(tmp_path / "m" / "covered_karst.tif")
    soluble = read(tmp_path / "m" / "soluble_area_fraction.tif") > 0
    np.testing.assert_array_equal(classes == 2, soluble & (covered["mask"] == 1))
    np.testing.assert_array_equal(classes == 1, soluble & (covered["mask"] == 0))


def test_layer_needs_a_cover_and_cover_values_are_checked(covered, tmp_path, make_raster):
    p = covered["paths"]
    with pytest.raises(InputError, match="covered_karst needs a cover input"):
        build_settings(flags(p, tmp_path / "x", layers="denudation,covered_karst"))
    with pytest.raises(InputError, match="minimum thickness"):
        build_settings(flags(p, tmp_path / "x", cover=str(p["cover"]), cover_min_thickness_m=-2))
    negative = make_raster("negative_cover.tif", -covered["thickness"] - 1, nodata=np.nan)
    with pytest.raises(InputError, match=r"cover value -?\d.* is outside the plausible range 0 to 5000 m"):
        inspect_job(build_settings(flags(p, tmp_path / "x", cover=str(negative))))


def test_cover_on_another_grid_is_warped_nearest(covered, tmp_path, make_raster):
    """A 0/1 mask on a 50 m grid offset by 30 m: each 100 m target cell takes the source cell
    holding its centre (nearest), so the output keeps 0/1 edges; an explicit bilinear smears
    them and any fraction > 0 then counts as cover (a superset of the nearest cover)."""
    p = covered["paths"]
    rows, cols = covered["shape"]
    fine = np.zeros((2 * rows + 4, 2 * cols + 4), np.uint8)
    yy, xx = np.mgrid[0:fine.shape[0], 0:fine.shape[1]]
    fine[((xx // 9) + (yy // 6)) % 2 == 1] = 1
    sx0, sy0 = X0 - 70.0, Y0 + 70.0                         # source origin, 50 m cells
    mask = make_raster("fine_mask.tif", fine, res=50.0, origin=(sx0, sy0), nodata=255)
    run_map(build_settings(flags(p, tmp_path / "n", cover=str(mask), layers="soluble_fraction,covered_karst")))
    classes = read(tmp_path / "n" / "covered_karst.tif")
    soluble = read(tmp_path / "n" / "soluble_area_fraction.tif") > 0
    # derived: target centre (X0 + 100 (c + 0.5), Y0 - 100 (r + 0.5)) lies in source cell
    # col floor((x - sx0) / 50), row floor((sy0 - y) / 50)
    ty, tx = np.mgrid[0:rows, 0:cols]
    scol = np.floor((X0 + 100.0 * (tx + 0.5) - sx0) / 50.0).astype(int)
    srow = np.floor((sy0 - (Y0 - 100.0 * (ty + 0.5))) / 50.0).astype(int)
    nearest = fine[srow, scol]
    np.testing.assert_array_equal(classes[soluble] == 2, nearest[soluble] == 1)
    record = json.loads((tmp_path / "n" / "run.json").read_text())
    assert record["inputs"]["cover"]["resampling"] == "nearest"

    run_map(build_settings(flags(p, tmp_path / "b", cover=str(mask), continuous_resampling="bilinear",
                                 layers="soluble_fraction,covered_karst")))
    smeared = read(tmp_path / "b" / "covered_karst.tif")
    assert json.loads((tmp_path / "b" / "run.json").read_text())["inputs"]["cover"]["resampling"] == "bilinear"
    assert np.all(smeared[classes == 2] == 2)                        # superset of the nearest cover
    assert np.count_nonzero(smeared == 2) > np.count_nonzero(classes == 2)


# ---------------------------------------------------------------------------- summaries
def test_summary_columns_against_a_hand_computation(make_raster, tmp_path):
    """1 km cells (1 cell = 1 km2), a 3 x 4 map; zone A = the whole top row plus half of the
    second row (grid-aligned box edges), zone B = columns 2-3 of rows 1-2."""
    codes = np.array([[1, 1, 0, 3],
                      [1, 2, 2, 0],
                      [5, 5, 3, 3]], np.int16)
    fraction = np.array([[1.0, 0.5, 1.0, 0.8],
                         [0.6, 1.0, 0.3, 1.0],
                         [1.0, 1.0, 0.5, 0.9]], np.float32)
    thickness = np.array([[4.0, 0.0, 2.0, 7.0],
                          [1.0, np.nan, 0.0, 3.0],
                          [0.0, 2.5, 6.0, 0.0]], np.float32)
    kw = dict(res=1000.0, origin=(X0, Y0))
    paths = {"lithology": make_raster("l.tif", codes, nodata=-1, **kw),
             "soluble_fraction": make_raster("f.tif", fraction, nodata=np.nan, **kw),
             "cover": make_raster("c.tif", thickness, nodata=np.nan, **kw)}
    out = tmp_path / "map"
    run_map(build_settings(dict(lithology=str(paths["lithology"]), soluble_fraction=str(paths["soluble_fraction"]),
                                cover=str(paths["cover"]), runoff=400.0, pco2=0.01, temperature=8.0, out=str(out))))
    zones = tmp_path / "zones.gpkg"
    import geopandas as gpd

    gpd.GeoDataFrame({"wid": ["A", "B"]}, geometry=[box(X0, Y0 - 1500.0, X0 + 4000.0, Y0),
                                                   box(X0 + 2000.0, Y0 - 3000.0, X0 + 4000.0, Y0 - 1000.0)],
                     crs=CRS).to_file(zones, layer="zones", engine="pyogrio")
    summarize_outputs(out, zones, id_field="wid", out_path=tmp_path / "s.gpkg", workers=1)
    table = pd.read_csv(tmp_path / "s.csv").set_index("wid")
    # derived by hand (km2 = coverage x 1 km2 x soluble fraction):
    # zone A, row 0: (1,lime,1.0,4 m) covered 1.0; (lime,0.5,0 m) exposed 0.5; insoluble; (gypsum,0.8,7 m) covered 0.8
    #         row 1 at coverage 0.5: (lime,0.6,1 m) covered 0.3; (dolo,1.0,nodata) neither; (dolo,0.3,0 m)
    #         exposed 0.15; insoluble
    #   covered 1.0 + 0.8 + 0.3 = 2.1, exposed 0.65, share 2.1 / 2.75
    # zone B, rows 1-2, cols 2-3: (dolo,0.3,0 m) exposed 0.3; insoluble; (gypsum,0.5,6 m) covered 0.5;
    #         (gypsum,0.9,0 m) exposed 0.9: covered 0.5, exposed 1.2
    assert table.loc["A", "covered_soluble_area_km2"] == pytest.approx(2.1, rel=1e-6)
    assert table.loc["A", "exposed_soluble_area_km2"] == pytest.approx(0.65, rel=1e-6)
    assert table.loc["A", "covered_soluble_share"] == pytest.approx(2.1 / 2.75, rel=1e-6)
    assert table.loc["B", "covered_soluble_area_km2"] == pytest.approx(0.5, rel=1e-6)
    assert table.loc["B", "exposed_soluble_area_km2"] == pytest.approx(1.2, rel=1e-6)
    assert table.loc["B", "covered_soluble_share"] == pytest.approx(0.5 / 1.7, rel=1e-6)
    # soluble area of A also counts the soluble cell of unknown cover: 2.1 + 0.65 + 0.5 x 1.0
    assert table.loc["A", "soluble_area_km2"] == pytest.approx(3.25, rel=1e-6)
    meta = json.loads((tmp_path / "s.summary.json").read_text())
    assert meta["units"]["covered_soluble_area_km2"] == "km2" and meta["units"]["covered_soluble_share"] == "1"
    assert "cover-collapse" in meta["method"]["covered_karst"]
    assert any(key.endswith("covered_karst.tif") for key in meta["inputs"])

    # a folder without the layer has none of the columns
    run_map(build_settings(dict(lithology=str(paths["lithology"]), runoff=400.0, pco2=0.01, temperature=8.0,
                                out=str(tmp_path / "plain"))))
    summarize_outputs(tmp_path / "plain", zones, id_field="wid", out_path=tmp_path / "p.gpkg", workers=1)
    assert not any("covered" in c for c in pd.read_csv(tmp_path / "p.csv").columns)


def test_accumulator_cover_sums_merge_and_round_trip():
    """Two halves added to two accumulators and merged equal one accumulator over all cells;
    the state round-trips; a state from before the cover sums reads as no cover."""
    zone = np.array([0, 0, 1, 1, 1, 0])
    weight = np.array([1.0, 2.0, 0.5, 1.0, 4.0, 0.25])
    rate = np.ones(6)
    fraction = np.array([1.0, 0.5, 1.0, 0.0, 0.2, 1.0])
    classes = np.array([2, 1, 2, 0, 1, 255], np.uint8)
    whole = ZonalAccumulator(2, cover=True).add(zone, weight, rate, soluble_fraction=fraction, covered_karst=classes)
    a = ZonalAccumulator(2, cover=True).add(zone[:3], weight[:3], rate[:3], soluble_fraction=fraction[:3],
                                            covered_karst=classes[:3])
    b = ZonalAccumulator(2, cover=True).add(zone[3:], weight[3:], rate[3:], soluble_fraction=fraction[3:],
                                            covered_karst=classes[3:])
    merged = ZonalAccumulator.from_state(a.state()).merge(ZonalAccumulator.from_state(b.state()))
    for acc in (whole, merged):
        cols = acc.finalize()
        # derived: zone 0 covered 1.0 x 1.0, exposed 2.0 x 0.5; zone 1 covered 0.5, exposed 4.0 x 0.2
        np.testing.assert_allclose(cols["covered_soluble_area_km2"], [1.0, 0.5])
        np.testing.assert_allclose(cols["exposed_soluble_area_km2"], [1.0, 0.8])
        np.testing.assert_allclose(cols["covered_soluble_share"], [0.5, 0.5 / 1.3])
    old = {k: v for k, v in whole.state().items()
           if k not in ("cover", "covered_soluble_area_km2", "exposed_soluble_area_km2")}
    restored = ZonalAccumulator.from_state(old)
    assert not restored.cover and "covered_soluble_share" not in restored.finalize()
    with pytest.raises(ValueError, match="covered-karst"):
        whole.merge(restored)


# ---------------------------------------------------------------------------- batch
def test_batch_equals_map_for_the_layer_and_its_zone_columns(covered, tmp_path):
    import geopandas as gpd

    p = covered["paths"]
    whole = tmp_path / "whole"
    run_map(build_settings(flags(p, whole, cover=str(p["cover"]))))
    zones = tmp_path / "zones.gpkg"
    gpd.GeoDataFrame({"wid": ["a", "b"]}, geometry=[box(X0 + 250, Y0 - 3150, X0 + 3420, Y0 - 120),
                                                   box(X0 + 1530, Y0 - 3990, X0 + 5570, Y0 - 1710)],
                     crs=CRS).to_file(zones, layer="zones", engine="pyogrio")
    out = tmp_path / "batch"
    summary = run_batch(build_settings(flags(p, out, cover=str(p["cover"]))), 32, workers=0,
                        zones=ZoneSpec(str(zones), None, "wid"))
    assert "covered_karst.vrt" in summary.outputs
    np.testing.assert_array_equal(read(out / "covered_karst.vrt"), read(whole / "covered_karst.tif"))
    assert (out / TILES_DIR / "r000_c001" / "covered_karst.tif").is_file()
    summarize_outputs(whole, zones, id_field="wid", out_path=tmp_path / "w.gpkg", workers=1)
    tiled = pd.read_csv(out / "zones_summary.csv")
    single = pd.read_csv(tmp_path / "w.csv")
    for column in ("covered_soluble_area_km2", "exposed_soluble_area_km2", "covered_soluble_share"):
        assert tiled[column].notna().all() and (tiled["covered_soluble_area_km2"] > 0).all()
        np.testing.assert_allclose(tiled[column], single[column], rtol=1e-9, err_msg=column)


# ---------------------------------------------------------------------------- CLI and job file
def invoke(args):
    return CliRunner().invoke(app, [str(a) for a in args])


def test_cli_option_and_job_file_key(covered, tmp_path):
    p = covered["paths"]
    out = tmp_path / "cli"
    result = invoke(["map", "--lithology", p["lithology"], "--runoff", p["runoff"], "--pco2", p["pco2"],
                                      "--temperature", p["temperature"], "--cover", p["cover"],
                                      "--cover-min-thickness", "4", "--out", out, "--quiet"])
    assert result.exit_code == 0, result.output
    assert (out / "covered_karst.tif").is_file()
    assert json.loads((out / "run.json").read_text())["settings"]["cover_min_thickness_m"] == 4.0

    job = tmp_path / "job.toml"
    job.write_text(
        "[inputs]\n"
        f"lithology = \"{p['lithology'].name}\"\nrunoff = \"{p['runoff'].name}\"\npco2 = \"{p['pco2'].name}\"\n"
        f"temperature = \"{p['temperature'].name}\"\ncover = \"{p['cover'].name}\"\ncover_min_thickness_m = 4.0\n"
        "[run]\nout = \"job_out\"\nblock_size = 16\n")
    result = invoke(["map", "--job", job, "--quiet"])
    assert result.exit_code == 0, result.output
    np.testing.assert_array_equal(read(tmp_path / "job_out" / "covered_karst.tif"), read(out / "covered_karst.tif"))

    result = invoke(["check", "--lithology", p["lithology"], "--runoff", p["runoff"], "--pco2",
                                      p["pco2"], "--temperature", p["temperature"], "--cover", p["cover"], "--json"])
    assert result.exit_code == 0, result.output
    assert "cover" in json.loads(result.stdout)["inputs"]

    result = invoke(["map", "--lithology", p["lithology"], "--runoff", p["runoff"], "--pco2",
                                      p["pco2"], "--temperature", p["temperature"], "--layers", "covered_karst",
                                      "--out", tmp_path / "bad"])
    assert result.exit_code == 1
    assert result.stderr.strip().startswith("denude: error:") and "--cover" in result.stderr
    assert not (tmp_path / "bad").exists()
