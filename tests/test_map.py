"""The raster job as a library: outputs equal the kernel on aligned inputs, tiling and workers
do not change a bit, and the output folder holds what DEVELOPERS.md promises."""

import hashlib
import json
import pickle
from concurrent.futures import ProcessPoolExecutor
import multiprocessing

import numpy as np
import pytest
import rasterio
from rasterio.transform import from_origin

import denude
import denude.errors
from denude.core.hazard import DEFAULT_BREAKS_MM_PER_KYR, DEFAULT_COLOURS, classify
from denude.core.kernel import compute_block
from denude.core.rocks import RockTable
from denude.core.soil_co2 import air_pressure_atm, pco2_from_aet_atm
from denude.execution.raster_job import compute_window, resolve_grid, run_map
from denude.io.jobfile import LAYERS, build_settings
from denude.io.rasters import INT32_NODATA

FILES = list(LAYERS.values())


def read(out, name):
    with rasterio.open(out / name) as ds:
        return ds.read(1)


def settings_for(inputs, out, **extra):
    p = inputs["paths"]
    flags = dict(lithology=str(p["lithology"]), runoff=str(p["runoff"]), pco2=str(p["pco2"]),
                 temperature=str(p["temperature"]), out=str(out), block_size=16)
    flags.update(extra)
    return build_settings(flags)


def f64(array):
    """The job hands compute_block float64 arrays (inputs are read as float32, then widened)."""
    return np.asarray(array, dtype=np.float32).astype(np.float64)


def expected_from_kernel(inputs, **kw):
    codes = inputs["codes"]
    runoff = np.where(inputs["runoff"] == -9999.0, np.nan, inputs["runoff"])
    return compute_block(codes.astype(np.int32), f64(runoff), f64(inputs["pco2"]), f64(inputs["temperature"]),
                         RockTable.builtin().lookup(), lithology_valid=codes != -1, warn=False, **kw)


def assert_same(a, b):
    assert a.dtype == b.dtype and a.shape == b.shape
    assert a.tobytes() == b.tobytes()


def test_every_cell_equals_compute_block(map_inputs, tmp_path):
    out = tmp_path / "out"
    summary = run_map(settings_for(map_inputs, out, workers=2))
    exp = expected_from_kernel(map_inputs)
    assert_same(read(out, "denudation_mm_per_kyr.tif"), exp.denudation_mm_per_kyr)
    assert_same(read(out, "dissolved_load_mmol_per_l.tif"), exp.dissolved_load_mmol_per_l)
    assert_same(read(out, "co2_drawdown_t_per_km2_yr.tif"), exp.co2_drawdown_t_per_km2_yr)
    assert_same(read(out, "hazard_class.tif"), classify(exp.denudation_mm_per_kyr, DEFAULT_BREAKS_MM_PER_KYR))
    codes = map_inputs["codes"]
    # codes 0-5 of the built-in table fit uint8, with 255 kept free for nodata
    assert_same(read(out, "lithology_code.tif"), np.where(codes == -1, 255, codes).astype(np.uint8))
    fraction = read(out, "soluble_area_fraction.tif")
    assert np.isnan(fraction[codes == -1]).all()
    assert (fraction[codes == 0] == 0).all() and (fraction[codes > 0] == 1).all()  # code 0 insoluble
    assert summary.counts.as_dict() == exp.counts.as_dict()
    assert summary.counts.nodata == 6          # 5 lithology nodata + 1 runoff nodata (hand count)
    assert np.isfinite(exp.denudation_mm_per_kyr).sum() == 40 * 56 - 6


def other_crs_temperature(make_raster):
    """Temperature in geographic degrees covering only the north-west of the map grid (EPSG:32632
    400000-405600 E, 5196000-5200000 N is about 7.69-7.77 E, 46.90-46.94 N)."""
    yy, xx = np.mgrid[0:30, 0:40]
    data = (4.0 + 0.2 * xx + 0.1 * yy).astype(np.float32)
    return make_raster("temp_geo.tif", data, crs="EPSG:4326",
                       transform=from_origin(7.685, 46.945, 0.001, 0.001), nodata=np.nan)


def test_tiled_whole_and_workers_identical(map_inputs, make_raster, tmp_path):
    temp = other_crs_temperature(make_raster)
    runs = {}
    for key, block, workers in (("tiled1", 16, 1), ("tiled2", 16, 2), ("whole", 64, 1)):
        out = tmp_path / key
        run_map(settings_for(map_inputs, out, block_size=block, workers=workers, temperature=str(temp)))
        runs[key] = out
    for name in FILES:
        whole = read(runs["whole"], name)
        assert_same(read(runs["tiled1"], name), whole)
        assert_same(read(runs["tiled2"], name), whole)
        # same block size: the files themselves are identical byte for byte
        assert (runs["tiled1"] / name).read_bytes() == (runs["tiled2"] / name).read_bytes()
    rate = read(runs["whole"], "denudation_mm_per_kyr.tif")
    assert np.isnan(rate).any() and np.isfinite(rate).any()   # outside the temperature footprint


def test_outside_an_input_footprint_is_nodata(map_inputs, make_raster, tmp_path):
    temp = other_crs_temperature(make_raster)
    out = tmp_path / "out"
    summary = run_map(settings_for(map_inputs, out, temperature=str(temp)))
    grid = resolve_grid(settings_for(map_inputs, out))
    # where the warped temperature is nodata, every float output is NaN and hazard is 255
    # (reference footprint: rasterio.warp.reproject of the same input onto the same grid)
    with rasterio.open(temp) as src:
        warped = np.full(grid.shape, np.nan, np.float32)
        rasterio.warp.reproject(rasterio.band(src, 1), warped, dst_transform=grid.affine, dst_crs=grid.crs,
                                src_nodata=np.nan, dst_nodata=np.nan,
                                resampling=rasterio.enums.Resampling.bilinear)
    rate = read(out, "denudation_mm_per_kyr.tif")
    hazard = read(out, "hazard_class.tif")
    outside = np.isnan(warped)
    outside[1:-1, 1:-1] &= outside[:-2, 1:-1] & outside[2:, 1:-1] & outside[1:-1, :-2] & outside[1:-1, 2:]
    assert outside.sum() > 100
    assert np.isnan(rate[outside]).all() and (hazard[outside] == 255).all()
    assert summary.counts.nodata >= outside.sum()


def test_output_rasters_describe_themselves(map_inputs, tmp_path):
    for layout in ("cog", "tiled"):
        out = tmp_path / layout
        run_map(settings_for(map_inputs, out, layout=layout))
        with rasterio.open(map_inputs["paths"]["lithology"]) as src:
            crs, transform = src.crs, src.transform
        expected_types = {
            "denudation_mm_per_kyr.tif": ("float32", "mm/kyr"),
            "dissolved_load_mmol_per_l.tif": ("float32", "mmol/L"),
            "co2_drawdown_t_per_km2_yr.tif": ("float32", "t CO2 km-2 yr-1"),
            "hazard_class.tif": ("uint8", "class index"),
            "lithology_code.tif": ("uint8", "code"),
            "soluble_area_fraction.tif": ("float32", "fraction 0-1"),
        }
        for name, (dtype, units) in expected_types.items():
            with rasterio.open(out / name) as ds:
                assert ds.crs == crs and ds.transform == transform
                assert ds.dtypes[0] == dtype
                nodata = {"float32": "nan", "uint8": "255.0", "int32": str(float(INT32_NODATA))}[dtype]
                assert str(ds.nodata) == nodata
                tags = ds.tags()
                assert tags["units"] == units and tags["chemistry"] == "white"
                assert "not a site investigation" in tags["caution"] and "licensed" in tags["caution"]
                assert "undersaturated" in tags["upper_bound_note"]
                assert tags["quantity"] and tags["formula"]
                # sources cite only what the layer used: no chemistry papers on carried inputs
                assert ("White (1984)" in tags["sources"]) == (name not in ("lithology_code.tif", "soluble_area_fraction.tif"))
                assert "Brook" not in tags["sources"]            # PCO2 was a raster, not from AET
                assert ds.units == (units,) and ds.descriptions[0].endswith(f"[{units}]")
                assert ds.overviews(1) == [2, 4]              # 56 x 40 cells, 16-cell tiles
                assert ds.block_shapes[0] == (16, 16)
                structure = ds.tags(ns="IMAGE_STRUCTURE")
                assert structure["COMPRESSION"] == "DEFLATE"
                if dtype == "float32":
                    assert structure["PREDICTOR"] == "3"
                if layout == "cog":
                    assert structure.get("LAYOUT") == "COG"
                if name == "hazard_class.tif":
                    assert json.loads(tags["class_names"]) == ["negligible", "low", "moderate", "high", "very high"]
                    assert json.loads(tags["class_breaks_mm_per_kyr"]) == list(DEFAULT_BREAKS_MM_PER_KYR)
                    assert ds.colormap(1)[3] == DEFAULT_COLOURS[3]
        assert (out / "rocks.csv").read_text().splitlines()[0] == "code,name,mineral,density_g_cm3,purity"


def test_run_json_records_the_run(map_inputs, tmp_path):
    out = tmp_path / "out"
    run_map(settings_for(map_inputs, out))
    record = json.loads((out / "run.json").read_text())
    assert record["version"] == denude.__version__
    lith = map_inputs["paths"]["lithology"]
    assert record["inputs"]["lithology"]["sha256"] == hashlib.sha256(lith.read_bytes()).hexdigest()
    assert record["inputs"]["lithology"]["size_bytes"] == lith.stat().st_size
    assert record["grid"]["width"] == 56 and record["grid"]["height"] == 40
    assert record["grid"]["epsg"] == 32632 and record["grid"]["resolution"] == [100.0, 100.0]
    assert record["settings"]["chemistry"] == "white" and record["settings"]["block_size"] == 16
    counts = record["counts"]
    assert counts["cells"] == 2240 and counts["computed"] + counts["nodata"] + counts["unknown_code"] + counts["out_of_range"] == 2240
    assert record["wall_time_s"] >= 0
    styles = ["denudation_mm_per_kyr.sld", "hazard_class.sld", "lithology_code.sld",
              "hazard_class.tif.aux.xml", "lithology_code.tif.aux.xml"]   # SLD styles, category names
    assert set(record["outputs"]) == set(FILES) | {"rocks.csv", "run.json"} | set(styles)
    assert sorted(p.name for p in out.iterdir()) == sorted(FILES + ["rocks.csv", "run.json"] + styles)
    assert not list(tmp_path.glob(".out.denude-*"))     # no staging folder left


def test_water_balance_and_pco2_from_aet(map_inputs, make_raster, tmp_path):
    shape = map_inputs["shape"]
    precip = np.full(shape, 900.0, np.float32)
    aet = np.linspace(300.0, 1000.0, shape[0] * shape[1], dtype=np.float32).reshape(shape)  # some P < AET
    p = make_raster("p.tif", precip)
    e = make_raster("aet.tif", aet)
    out = tmp_path / "out"
    settings = build_settings(dict(lithology=str(map_inputs["paths"]["lithology"]), precipitation=str(p),
                                   aet=str(e), temperature=12.0, out=str(out), block_size=16))
    assert settings.pco2 == "from-aet"
    run_map(settings)
    codes = map_inputs["codes"]
    exp = compute_block(codes.astype(np.int32), np.maximum(f64(precip) - f64(aet), 0.0),
                        pco2_from_aet_atm(f64(aet)), 12.0, RockTable.builtin().lookup(),
                        lithology_valid=codes != -1, warn=False)
    assert_same(read(out, "denudation_mm_per_kyr.tif"), exp.denudation_mm_per_kyr)
    assert (read(out, "denudation_mm_per_kyr.tif")[(codes > 0) & (precip <= aet)] == 0).all()


def test_pco2_ppmv_with_elevation_and_soluble_fraction(map_inputs, make_raster, tmp_path):
    shape = map_inputs["shape"]
    elevation = np.linspace(0, 2000, shape[0] * shape[1]).reshape(shape).astype(np.float32)
    fraction = np.full(shape, 0.4, np.float32)
    out = tmp_path / "out"
    settings = settings_for(map_inputs, out, pco2="5000", pco2_units="ppmv",
                            elevation=str(make_raster("dem.tif", elevation)),
                            soluble_fraction=str(make_raster("frac.tif", fraction)))
    run_map(settings)
    codes = map_inputs["codes"]
    runoff = np.where(map_inputs["runoff"] == -9999.0, np.nan, map_inputs["runoff"])
    pco2 = 5000e-6 * air_pressure_atm(f64(elevation))
    exp = compute_block(codes.astype(np.int32), f64(runoff), pco2, f64(map_inputs["temperature"]),
                        RockTable.builtin().lookup(), soluble_fraction=f64(fraction),
                        lithology_valid=codes != -1, warn=False)
    assert_same(read(out, "denudation_mm_per_kyr.tif"), exp.denudation_mm_per_kyr)
    frac_out = read(out, "soluble_area_fraction.tif")
    assert (frac_out[codes > 0] == np.float32(0.4)).all() and (frac_out[codes == 0] == 0).all()


def test_rate_only_layer(map_inputs, tmp_path):
    out = tmp_path / "out"
    run_map(settings_for(map_inputs, out, layers="denudation"))
    assert sorted(p.name for p in out.iterdir()) == ["denudation_mm_per_kyr.sld", "denudation_mm_per_kyr.tif",
                                                     "rocks.csv", "run.json"]


def _window_bytes(args):
    settings, grid, window = pickle.loads(args)
    return compute_window(settings, grid, window).arrays["denudation"].tobytes()


def test_compute_window_runs_in_another_process(map_inputs, tmp_path):
    settings = settings_for(map_inputs, tmp_path / "unused")
    grid = resolve_grid(settings)
    window = rasterio.windows.Window(16, 16, 16, 16)
    payload = pickle.dumps((settings, grid, window))
    with ProcessPoolExecutor(1, mp_context=multiprocessing.get_context("fork")) as pool:
        remote = pool.submit(_window_bytes, payload).result()
    exp = expected_from_kernel(map_inputs).denudation_mm_per_kyr[16:32, 16:32]
    assert remote == np.ascontiguousarray(exp).tobytes()


def test_overwrite_replaces_the_folder(map_inputs, tmp_path):
    out = tmp_path / "out"
    out.mkdir()
    (out / "old.txt").write_text("old")
    run_map(settings_for(map_inputs, out, overwrite=True))
    assert not (out / "old.txt").exists() and (out / "run.json").exists()
    assert [p.name for p in tmp_path.iterdir() if p.name.startswith(".")] == []


@pytest.mark.parametrize("problem", ["code", "value"])
def test_problems_found_during_the_run_leave_nothing(map_inputs, make_raster, tmp_path, problem):
    """A run samples inputs up front and checks every window as it goes: a bad cell deep
    inside a raster (missed by the sample) still stops the run with nothing written."""
    codes = map_inputs["codes"].copy()
    runoff = map_inputs["runoff"].copy()
    if problem == "code":
        codes[37, 50] = 77
    else:
        runoff[37, 50] = 99999.0
    lith = make_raster("lith2.tif", codes, nodata=-1)
    run = make_raster("run2.tif", runoff, nodata=-9999.0)
    out = tmp_path / "out"
    settings = settings_for(map_inputs, out, lithology=str(lith), runoff=str(run))
    with pytest.raises(denude.errors.InputError) as info:
        run_map(settings)
    assert ("77" in str(info.value)) if problem == "code" else ("99999" in str(info.value))
    assert not out.exists() and not list(tmp_path.glob(".out.*"))


def test_explicit_and_like_grids_resample_by_kind(map_inputs, make_raster, tmp_path):
    """A coarser target grid (300 m over 100 m inputs): mode for codes, average for fields."""
    out = tmp_path / "coarse"
    settings = settings_for(map_inputs, out, grid_crs="EPSG:32632", grid_resolution=[300.0],
                            grid_bounds=[400000.0, 5196100.0, 405400.0, 5200000.0], block_size=16)
    summary = run_map(settings)
    assert (summary.grid.width, summary.grid.height) == (18, 13)      # 5400/300, 3900/300
    record = json.loads((out / "run.json").read_text())
    assert record["inputs"]["lithology"]["resampling"] == "mode"
    assert record["inputs"]["runoff"]["resampling"] == "average"
    codes = read(out, "lithology_code.tif")
    assert set(np.unique(codes).tolist()) <= {0, 1, 2, 3, 4, 5, 255}
    # the same grid given as a raster
    like = make_raster("like.tif", np.zeros((13, 18), np.uint8), res=300.0)
    out2 = tmp_path / "like"
    run_map(settings_for(map_inputs, out2, grid_like=str(like)))
    for name in FILES:
        assert_same(read(out2, name), read(out, name))


def test_log10_pco2_units(map_inputs, make_raster, tmp_path):
    log_pco2 = np.log10(map_inputs["pco2"].astype(np.float64)).astype(np.float32)
    out = tmp_path / "out"
    run_map(settings_for(map_inputs, out, pco2=str(make_raster("logp.tif", log_pco2)), pco2_units="log10atm"))
    codes = map_inputs["codes"]
    runoff = np.where(map_inputs["runoff"] == -9999.0, np.nan, map_inputs["runoff"])
    exp = compute_block(codes.astype(np.int32), f64(runoff), 10.0 ** f64(log_pco2), f64(map_inputs["temperature"]),
                        RockTable.builtin().lookup(), lithology_valid=codes != -1, warn=False)
    assert_same(read(out, "denudation_mm_per_kyr.tif"), exp.denudation_mm_per_kyr)


def _edge_points_in(crs_from, crs_to, bounds, n=1001):
    """Every edge of a box sampled at n points, projected with pyproj (independent of rasterio)."""
    from pyproj import Transformer

    l, b, r, t = bounds
    xs = np.concatenate([np.linspace(l, r, n), np.full(n, r), np.linspace(l, r, n), np.full(n, l)])
    ys = np.concatenate([np.full(n, b), np.linspace(b, t, n), np.full(n, t), np.linspace(b, t, n)])
    return Transformer.from_crs(crs_from, crs_to, always_xy=True).transform(xs, ys)


def test_grid_bounds_default_to_the_lithology_extent_snapped_outward(map_inputs, tmp_path):
    """Lithology: 56 x 40 cells of 100 m in EPSG:32632 from (400000, 5200000); target EPSG:3035 at 250 m."""
    out = tmp_path / "laea"
    settings = settings_for(map_inputs, out, grid_crs="EPSG:3035", grid_resolution=[250.0])
    grid = resolve_grid(settings)
    # Reference: the lithology's edges projected with pyproj (PROJ) at 1001 points per edge span
    # x 4144651.57-4150310.41 m, y 2646725.73-2650804.28 m; rounded outward to 250 m by hand.
    xs, ys = _edge_points_in("EPSG:32632", "EPSG:3035", (400000.0, 5196000.0, 405600.0, 5200000.0))
    assert (xs.min(), ys.min(), xs.max(), ys.max()) == pytest.approx(
        (4144651.57, 2646725.73, 4150310.41, 2650804.28), abs=0.01)
    assert grid.bounds == (4144500.0, 2646500.0, 4150500.0, 2651000.0)
    assert (grid.width, grid.height) == (24, 18)            # 6000 / 250, 4500 / 250
    l, b, r, t = grid.bounds
    assert l <= xs.min() and r >= xs.max() and b <= ys.min() and t >= ys.max()      # covers the footprint
    assert max(xs.min() - l, ys.min() - b, r - xs.max(), t - ys.max()) < 250.0       # by less than a cell
    with pytest.warns(denude.errors.CoverageWarning):   # the tilted footprint leaves bbox corners empty
        summary = run_map(settings)
    record = json.loads((out / "run.json").read_text())
    assert record["grid"]["bounds"] == [4144500.0, 2646500.0, 4150500.0, 2651000.0]
    assert record["settings"]["grid_bounds"] is None and "snapped outward" in record["grid_source"]
    assert summary.counts.computed > 0.9 * 56 * 40 * (100 * 100) / (250 * 250)


def test_grid_bounds_default_in_degrees(map_inputs):
    """The same lithology on a 0.01 degree EPSG:4326 grid: bounds on multiples of 0.01."""
    grid = resolve_grid(settings_for(map_inputs, "unused", grid_crs="EPSG:4326", grid_resolution=[0.01]))
    xs, ys = _edge_points_in("EPSG:32632", "EPSG:4326", (400000.0, 5196000.0, 405600.0, 5200000.0))
    # pyproj (PROJ): lon 7.68597-7.76037, lat 46.91000-46.94681 -> outward to 7.68, 46.91, 7.77, 46.95 (by hand)
    assert (xs.min(), ys.min(), xs.max(), ys.max()) == pytest.approx((7.68597, 46.91000, 7.76037, 46.94681), abs=1e-5)
    assert grid.bounds == pytest.approx((7.68, 46.91, 7.77, 46.95), abs=1e-12)
    assert (grid.width, grid.height) == (9, 4)


@pytest.fixture
def negative_runoff(map_inputs, make_raster):
    """The job's runoff with a 4 x 5 block of -50 mm/yr cells (all on valid lithology) and one
    -50 cell on lithology nodata (row 0, column 2): 20 map cells with negative runoff."""
    runoff = map_inputs["runoff"].copy()
    runoff[10:14, 20:25] = -50.0
    runoff[0, 2] = -50.0
    assert (map_inputs["codes"][10:14, 20:25] >= 0).all() and map_inputs["codes"][0, 2] == -1
    return runoff, make_raster("runoff_negative.tif", runoff, nodata=-9999.0)


def test_negative_runoff_zero_takes_them_as_zero_and_counts_them(map_inputs, negative_runoff, tmp_path):
    runoff, path = negative_runoff
    out = tmp_path / "out"
    with pytest.warns(denude.errors.DenudeWarning, match="^20 map cells had negative runoff"):
        summary = run_map(settings_for(map_inputs, out, runoff=str(path), negative_runoff="zero"))
    assert summary.counts.negative_runoff == 20
    rate = read(out, "denudation_mm_per_kyr.tif")
    block = rate[10:14, 20:25]
    assert np.isfinite(block).all() and (block == 0.0).all()          # no dissolution, not nodata
    assert np.isfinite(read(out, "dissolved_load_mmol_per_l.tif")[10:14, 20:25]).all()
    # everywhere else the map equals the kernel on the runoff with those cells set to 0 mm/yr
    codes = map_inputs["codes"]
    q = np.where(runoff == -9999.0, np.nan, np.where(runoff < 0, 0.0, runoff))
    expected = compute_block(codes.astype(np.int32), f64(q), f64(map_inputs["pco2"]), f64(map_inputs["temperature"]),
                             RockTable.builtin().lookup(), lithology_valid=codes != -1, warn=False)
    assert_same(rate, expected.denudation_mm_per_kyr)
    record = json.loads((out / "run.json").read_text())
    assert record["settings"]["negative_runoff"] == "zero"
    assert record["counts"]["negative_runoff"] == 20


def test_negative_runoff_error_is_the_default_and_names_the_option(map_inputs, negative_runoff, tmp_path):
    _, path = negative_runoff
    out = tmp_path / "out"
    with pytest.raises(denude.errors.InputError, match=r"runoff value -50 .*--negative-runoff zero"):
        run_map(settings_for(map_inputs, out, runoff=str(path)))
    assert not out.exists() and not [p for p in tmp_path.iterdir() if p.name.startswith(".")]
    with pytest.raises(denude.errors.InputError, match="did you mean 'zero'"):
        settings_for(map_inputs, out, runoff=str(path), negative_runoff="zer")
