"""Warping inputs onto the target grid window by window, and reading input facts."""

import numpy as np
import pytest
import rasterio
from rasterio.enums import Resampling
from rasterio.warp import reproject

from denude.errors import GridError, InputError
from denude.execution.blocks import block_windows
from denude.io.grid import Grid
from denude.io.rasters import (
    INT32_NODATA,
    inspect_raster,
    overview_factors,
    plan_warp,
    read_on_grid,
    unique_codes,
    value_range,
)


def warp_tiled(path, role, grid, categorical, block=16, requested="auto"):
    """Assemble a whole grid from per-window reads."""
    plan = plan_warp(inspect_raster(path, role), grid, categorical, requested)
    out = None
    with rasterio.open(path) as ds:
        for window in block_windows(grid.height, grid.width, block):
            part = read_on_grid(ds, plan, grid, window)
            if out is None:
                out = np.empty(grid.shape, part.dtype)
            r, c = int(window.row_off), int(window.col_off)
            out[r:r + part.shape[0], c:c + part.shape[1]] = part
    return out, plan


def warp_whole(path, role, grid, categorical, requested="auto"):
    plan = plan_warp(inspect_raster(path, role), grid, categorical, requested)
    with rasterio.open(path) as ds:
        return read_on_grid(ds, plan, grid, grid.full_window()), plan


@pytest.fixture
def smooth_field(make_raster):
    """A smooth continuous field (degrees C) on a 60 x 70 grid in UTM metres, nodata -9999 in a corner."""
    yy, xx = np.mgrid[0:60, 0:70]
    data = (5.0 + 0.1 * xx + 0.05 * yy + np.sin(xx / 7.0)).astype(np.float32)
    data[:3, :3] = -9999.0
    return make_raster("field.tif", data, nodata=-9999.0), data


# a target grid in geographic degrees inside the UTM raster above (zone 32, ~46.9 N, ~7.7 E)
def geographic_grid(res=0.0008):
    return Grid.from_bounds("EPSG:4326", res, (7.69, 46.90, 7.75, 46.94))


def test_continuous_from_other_crs_matches_rasterio_reproject(smooth_field):
    path, data = smooth_field
    grid = geographic_grid()
    tiled, plan = warp_tiled(path, "temperature", grid, categorical=False)
    assert plan.resampling == "bilinear" and plan.offset is None
    # reference: rasterio.warp.reproject of the whole array onto the whole grid
    expected = np.full(grid.shape, np.nan, np.float32)
    with rasterio.open(path) as ds:
        reproject(data, expected, src_transform=ds.transform, src_crs=ds.crs, src_nodata=-9999.0,
                  dst_transform=grid.affine, dst_crs=grid.crs, dst_nodata=np.nan,
                  resampling=Resampling.bilinear)
    finite = np.isfinite(expected)
    assert finite.sum() > 0.5 * expected.size
    np.testing.assert_array_equal(np.isfinite(tiled), finite)
    # both use GDAL's approximate transformer (0.125 px) but chunk the grid differently, so
    # values agree to a small fraction of the field's change per cell (about 0.1 per cell here)
    np.testing.assert_allclose(tiled[finite], expected[finite], rtol=0, atol=2e-3)


@pytest.mark.parametrize("res,method", [(0.0008, "bilinear"), (0.004, "average"), (0.0008, "cubic")])
def test_tiled_equals_whole_bit_for_bit(smooth_field, res, method):
    path, _ = smooth_field
    grid = geographic_grid(res)
    requested = "auto" if method != "cubic" else "cubic"
    tiled, plan = warp_tiled(path, "temperature", grid, False, requested=requested)
    whole, _ = warp_whole(path, "temperature", grid, False, requested=requested)
    assert plan.resampling == method
    assert tiled.tobytes() == whole.tobytes()


def test_categorical_keeps_its_class_set(make_raster):
    rng = np.random.default_rng(3)
    codes = rng.choice(np.array([1, 2, 5, 9], dtype=np.int16), size=(60, 70))
    path = make_raster("codes.tif", codes, nodata=-1)
    for res, method in ((0.0008, "nearest"), (0.004, "mode")):
        grid = geographic_grid(res)
        tiled, plan = warp_tiled(path, "lithology", grid, True)
        whole, _ = warp_whole(path, "lithology", grid, True)
        assert plan.resampling == method
        found = set(np.unique(tiled[tiled != INT32_NODATA]).tolist())
        assert found <= {1, 2, 5, 9} and len(found) >= 3
        assert tiled.tobytes() == whole.tobytes()


def test_bilinear_refused_for_categorical(make_raster):
    path = make_raster("codes.tif", np.ones((20, 20), np.int16))
    grid = geographic_grid()
    with pytest.raises(InputError, match="not allowed for a categorical"):
        plan_warp(inspect_raster(path, "lithology"), grid, True, "bilinear")


def test_cells_outside_the_footprint_are_nodata(make_raster):
    # source covers the west half of the target grid only (same CRS, finer, not aligned)
    src = make_raster("half.tif", np.full((20, 10), 7.0, np.float32), res=50.0, origin=(1000.0, 2000.0))
    codes = make_raster("halfcodes.tif", np.full((20, 10), 3, np.uint8), res=50.0, origin=(1000.0, 2000.0))
    grid = Grid.from_bounds("EPSG:32632", 30.0, (1000.0, 1010.0, 1990.0, 2000.0))
    values, _ = warp_tiled(src, "runoff", grid, False)
    classes, _ = warp_tiled(codes, "lithology", grid, True)
    east = grid.affine.c + (np.arange(grid.width) + 0.5) * 30.0 > 1500.0 + 30.0
    assert np.isnan(values[:, east]).all()
    assert (classes[:, east] == INT32_NODATA).all()
    assert (values[:, ~east][:, :10] == 7.0).all()   # never 0 outside, real value inside
    assert (classes[:, :10] == 3).all()


def test_aligned_subgrid_is_a_plain_read(make_raster):
    data = np.arange(30 * 40, dtype=np.float32).reshape(30, 40)
    path = make_raster("big.tif", data, nodata=-1.0)
    # target grid: offset by (2 rows, 3 cols) and reaching 5 columns past the east edge
    grid = Grid(inspect_raster(path, "runoff").crs_wkt, (100.0, 0.0, 400300.0, 0.0, -100.0, 5199800.0), 42, 20)
    out, plan = warp_tiled(path, "runoff", grid, False)
    assert plan.offset == (2, 3)
    np.testing.assert_array_equal(out[:, :37], data[2:22, 3:40])
    assert np.isnan(out[:, 37:]).all()


def test_no_overlap_is_grid_error(make_raster):
    path = make_raster("far.tif", np.ones((10, 10), np.float32), origin=(900000.0, 100000.0))
    grid = Grid.from_bounds("EPSG:32632", 100.0, (0, 0, 1000, 1000))
    with pytest.raises(GridError, match="does not overlap"):
        plan_warp(inspect_raster(path, "runoff"), grid, False)


def test_no_crs_and_not_a_raster(make_raster, tmp_path):
    path = make_raster("nocrs.tif", np.ones((10, 10), np.float32), crs=None)
    with pytest.raises(GridError, match="no CRS"):
        inspect_raster(path, "runoff")
    text = tmp_path / "notes.tif"
    text.write_text("plain text")
    with pytest.raises(InputError, match="not a readable raster"):
        inspect_raster(text, "runoff")
    with pytest.raises(InputError, match="not found"):
        inspect_raster(tmp_path / "missing.tif", "runoff")


def test_unique_codes_and_value_range(make_raster):
    codes = np.zeros((40, 40), np.int16)
    codes[39, 39] = 7        # one cell in the last block
    codes[0, 0] = -1         # nodata
    path = make_raster("codes.tif", codes, nodata=-1)
    assert unique_codes(path) == [0, 7]
    data = np.linspace(-2, 3, 1600, dtype=np.float32).reshape(40, 40)
    data[0, 0] = -9999
    lo, hi, n = value_range(make_raster("v.tif", data, nodata=-9999), "runoff")
    assert n == 1599 and lo == pytest.approx(data.ravel()[1]) and hi == pytest.approx(3.0)


def test_overview_factors_stop_at_one_tile():
    assert overview_factors(64, 48, 16) == [2, 4]      # 64 -> 32 -> 16 (one tile)
    assert overview_factors(16, 16, 16) == []
    assert overview_factors(8192, 8192, 512) == [2, 4, 8, 16]


@pytest.mark.parametrize("layout", ["cog", "tiled"])
def test_compression_threads_do_not_change_the_bytes(tmp_path, monkeypatch, layout):
    """GDAL compresses blocks on several threads (NUM_THREADS) but writes them in a fixed
    order: one thread and all cores give the same file, byte for byte."""
    from rasterio.transform import from_origin

    from denude.io import raster_outputs as rasters
    from denude.io.rasters import OutputSpec, RasterWriter

    grid = Grid(rasterio.crs.CRS.from_epsg(32632).to_wkt(), tuple(from_origin(500000.0, 5200000.0, 10.0, 10.0))[:6],
                80, 64)
    rng = np.random.default_rng(3)
    data = (np.linspace(0, 50, 80)[None, :] + rng.normal(0, 1, (64, 80))).astype(np.float32)
    spec = OutputSpec("rate.tif", "float32", float("nan"), "average", tags=(("units", "mm/kyr"),))
    files = {}
    for threads in ("1", "ALL_CPUS"):
        monkeypatch.setattr(rasters, "GDAL_THREADS", threads)
        options = rasters.creation_options(spec, "deflate", 16)
        assert options["num_threads"] == threads
        assert rasters.cog_options(spec, "deflate", 16)["NUM_THREADS"] == threads
        folder = tmp_path / threads
        folder.mkdir()
        writer = RasterWriter(folder / "rate.tif", grid, spec, 16, "deflate", layout)
        for window in block_windows(64, 80, 16):
            r, c = int(window.row_off), int(window.col_off)
            writer.write(data[r:r + int(window.height), c:c + int(window.width)], window)
        files[threads] = writer.close().read_bytes()
    assert files["1"] == files["ALL_CPUS"]
    with rasterio.Env(GDAL_NUM_THREADS="1"):   # a batch worker's setting wins over all cores
        assert rasters.creation_options(spec, "deflate", 16)["num_threads"] == "1"
        assert rasters.cog_options(spec, "deflate", 16)["NUM_THREADS"] == "1"
    with rasterio.open(tmp_path / "ALL_CPUS" / "rate.tif") as ds:
        np.testing.assert_array_equal(ds.read(1), data)
        assert ds.overviews(1) == rasters.overview_factors(64, 80, 16) == [2, 4, 8]
        assert ds.compression.name == "deflate"


def _write_layer(path, grid, spec, data, layout):
    from denude.io.rasters import RasterWriter

    writer = RasterWriter(path, grid, spec, 16, "deflate", layout)
    for window in block_windows(grid.height, grid.width, 16):
        r, c = int(window.row_off), int(window.col_off)
        writer.write(data[r:r + int(window.height), c:c + int(window.width)], window)
    return writer.close()


def _overview_arrays(path, n_levels):
    out = []
    for level in range(n_levels):
        with rasterio.open(path, overview_level=level) as ds:
            out.append(ds.read(1))
    return out


@pytest.mark.parametrize("height, width", [(64, 80), (16, 16), (17, 16), (33, 100), (200, 31)])
def test_cog_outputs_take_the_overviews_built_on_the_intermediate(tmp_path, height, width):
    """The writer builds overviews on the uncompressed intermediate (GDAL's overview builder,
    the same call as the tiled layout) and has the COG copy take them. References: where
    every level halves the grid exactly, GDAL's COG driver building them itself
    (OVERVIEWS=AUTO) from the same intermediate gives the same file byte for byte; for other
    shapes the COG driver rounds overview sizes down, the overview builder up, so there the
    reference is the tiled layout's overviews, level by level, pixel for pixel."""
    import rasterio.shutil
    from rasterio.transform import from_origin

    from denude.execution.plan import output_spec
    from denude.io import raster_outputs as rasters
    from denude.io.jobfile import build_settings
    from denude.registry import LAYERS

    grid = Grid(rasterio.crs.CRS.from_epsg(32632).to_wkt(), tuple(from_origin(500000.0, 5200000.0, 10.0, 10.0))[:6],
                width, height)
    settings = build_settings({"lithology": "l.tif", "runoff": 500.0, "pco2": 0.01, "temperature": 10.0})
    factors = overview_factors(height, width, 16)
    exact = all(height % f == 0 and width % f == 0 for f in factors)
    rng = np.random.default_rng(5)
    for name in LAYERS:
        spec = output_spec(name, settings)
        if np.dtype(spec.dtype).kind == "f":
            data = (rng.lognormal(3, 1, (height, width))).astype(spec.dtype)
            data[rng.uniform(size=data.shape) < 0.1] = np.nan
        else:
            data = rng.integers(0, 5, (height, width)).astype(spec.dtype)
        folder = tmp_path / name
        folder.mkdir()
        ours = _write_layer(folder / spec.name, grid, spec, data, "cog")
        with rasterio.open(ours) as ds:
            assert ds.overviews(1) == factors
            assert ds.tags(ns="IMAGE_STRUCTURE")["LAYOUT"] == "COG"
            np.testing.assert_array_equal(ds.read(1), data)
            profile = {k: v for k, v in ds.profile.items() if k not in ("compress", "predictor", "interleave")}
            tags, desc, units = ds.tags(), ds.descriptions[0], ds.units[0]
            colormap = ds.colormap(1) if spec.colormap is not None else None
        if exact:   # the same intermediate, the COG driver's own overviews
            work = folder / "reference.partial.tif"
            with rasterio.open(work, "w", **profile) as ds:
                ds.update_tags(**tags)
                if desc:
                    ds.set_band_description(1, desc)
                if units:
                    ds.set_band_unit(1, units)
                if colormap is not None:
                    ds.write_colormap(1, colormap)
                ds.write(data, 1)
            reference = folder / "reference.tif"
            rasterio.shutil.copy(work, reference, driver="COG", **rasters.cog_options(spec, "deflate", 16))
            assert ours.read_bytes() == reference.read_bytes(), (name, height, width)
        (folder / "tiled").mkdir()
        tiled = _write_layer(folder / "tiled" / spec.name, grid, spec, data, "tiled")
        for a, b in zip(_overview_arrays(ours, len(factors)), _overview_arrays(tiled, len(factors))):
            np.testing.assert_array_equal(a, b)
