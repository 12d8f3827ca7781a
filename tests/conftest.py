"""Shared fixtures: small synthetic GeoTIFFs written to tmp_path (no real places)."""

from __future__ import annotations

import os

import numpy as np
import pytest
import rasterio
from rasterio.transform import from_origin


@pytest.fixture(autouse=True, scope="session")
def _session_table_cache(tmp_path_factory):
    """The load-table file cache (denude.io.table_cache) of the whole session in pytest's own
    temporary folder, not the user's ~/.cache; subprocesses the tests start inherit it."""
    previous = os.environ.get("DENUDE_CACHE_DIR")
    os.environ["DENUDE_CACHE_DIR"] = str(tmp_path_factory.mktemp("table-cache"))
    yield
    if previous is None:
        os.environ.pop("DENUDE_CACHE_DIR", None)
    else:
        os.environ["DENUDE_CACHE_DIR"] = previous


#: Synthetic grid used by most raster tests: UTM-like metres, arbitrary origin.
TEST_CRS = "EPSG:32632"
TEST_ORIGIN = (400000.0, 5200000.0)
TEST_RES = 100.0


@pytest.fixture
def make_raster(tmp_path):
    """Factory: ``make_raster(name, data, crs=..., res=..., origin=..., nodata=..., transform=...)``
    writes a single-band GeoTIFF (tiled 16x16 when large enough) and returns its path."""

    def _make(name, data, *, crs=TEST_CRS, res=TEST_RES, origin=TEST_ORIGIN, nodata=None,
              transform=None, dtype=None, folder=None):
        data = np.asarray(data)
        if dtype is not None:
            data = data.astype(dtype)
        path = (folder or tmp_path) / name
        path.parent.mkdir(parents=True, exist_ok=True)
        if transform is None:
            rx, ry = (res, res) if np.isscalar(res) else res
            transform = from_origin(origin[0], origin[1], rx, ry)
        profile = dict(driver="GTiff", width=data.shape[1], height=data.shape[0], count=1,
                       dtype=data.dtype, transform=transform, nodata=nodata)
        if crs is not None:
            profile["crs"] = crs
        if data.shape[0] >= 16 and data.shape[1] >= 16:
            profile.update(tiled=True, blockxsize=16, blockysize=16, compress="deflate")
        with rasterio.open(path, "w", **profile) as ds:
            ds.write(data, 1)
        return path

    return _make


@pytest.fixture
def map_inputs(make_raster):
    """A consistent small job: 40 x 56 cells, all six built-in codes plus nodata, smooth
    runoff/PCO2/temperature fields on the lithology grid. Returns a dict of paths and arrays."""
    rows, cols = 40, 56
    rng = np.random.default_rng(7)
    codes = rng.integers(0, 6, size=(rows, cols)).astype(np.int16)
    codes[0, :5] = -1                                   # nodata cells
    yy, xx = np.mgrid[0:rows, 0:cols]
    runoff = (200.0 + 10.0 * xx + 3.0 * yy).astype(np.float32)          # mm/yr
    pco2 = (10 ** (-2.5 + 0.02 * xx - 0.01 * yy)).astype(np.float32)     # atm
    temperature = (2.0 + 0.3 * yy + 0.1 * xx).astype(np.float32)         # degrees C
    runoff[5, 7] = -9999.0                                # a nodata cell in runoff
    paths = {
        "lithology": make_raster("lithology.tif", codes, nodata=-1),
        "runoff": make_raster("runoff.tif", runoff, nodata=-9999.0),
        "pco2": make_raster("pco2.tif", pco2, nodata=np.nan),
        "temperature": make_raster("temperature.tif", temperature, nodata=np.nan),
    }
    return {"paths": paths, "codes": codes, "runoff": runoff, "pco2": pco2, "temperature": temperature,
            "shape": (rows, cols)}
