"""The library face: denude.site and denude.rates (numpy, xarray, Dask-backed xarray)."""

import json
import subprocess
import sys

import numpy as np
import pytest
from typer.testing import CliRunner

import denude
import denude.api
import denude.errors
from denude.cli.main import app
from denude.core.kernel import compute_block
from denude.core.rocks import RockTable

VARIABLES = ("denudation_mm_per_kyr", "dissolved_load_mmol_per_l", "co2_drawdown_t_per_km2_yr")


@pytest.fixture
def fields():
    """A 30 x 40 field: all built-in codes, smooth climate, a NaN runoff cell and an
    out-of-range temperature cell."""
    rng = np.random.default_rng(3)
    yy, xx = np.mgrid[0:30, 0:40]
    codes = rng.integers(0, 6, size=(30, 40)).astype(np.int32)
    runoff = 150.0 + 12.0 * xx + 4.0 * yy                        # mm/yr
    runoff[4, 5] = np.nan
    pco2 = 10 ** (-2.8 + 0.03 * xx - 0.01 * yy)                   # atm
    temperature = 1.0 + 0.5 * yy + 0.2 * xx                       # degrees C
    temperature[0, 0] = 95.0                                      # outside 0-90 C: NaN with a warning
    fraction = np.clip(0.2 + 0.02 * xx, 0, 1)
    return codes, runoff, pco2, temperature, fraction


def reference(codes, runoff, pco2, temperature, fraction=None, chemistry="white"):
    return compute_block(codes, runoff, pco2, temperature, RockTable.builtin().lookup(), chemistry,
                         soluble_fraction=fraction, warn=False)


def test_import_denude_is_cheap():
    code = ("import sys, denude; heavy = [m for m in ('numba', 'rasterio', 'xarray', 'geopandas') if m in sys.modules];"
            "print(heavy, sorted(denude.__all__))")
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True).stdout
    assert out.startswith("[]")
    for name in ("site", "rates", "run_map", "summarize", "run_batch", "MapSettings", "build_settings", "ZoneSpec"):
        assert name in out and getattr(denude, name) is not None


def test_rates_numpy_equals_compute_block(fields):
    codes, runoff, pco2, temperature, fraction = fields
    for chemistry in ("white", "speciated"):
        with pytest.warns(denude.errors.OutOfRangeWarning):
            got = denude.rates(codes, runoff, pco2, temperature, chemistry=chemistry, soluble_fraction=fraction)
        want = reference(codes, runoff, pco2, temperature, fraction, chemistry)
        assert set(got) == set(VARIABLES)
        for name in VARIABLES:
            assert isinstance(got[name], np.ndarray) and got[name].dtype == np.float32
            np.testing.assert_array_equal(got[name], getattr(want, name))
    assert np.isnan(got["denudation_mm_per_kyr"][0, 0]) and np.isnan(got["denudation_mm_per_kyr"][4, 5])


def test_rates_numbers_match_the_site(fields):
    # one cell of the array path against the site calculator (White 1984 worked example's conditions)
    got = denude.rates(np.array([[1]]), 500.0, 0.01, 10.0)
    one = denude.site(temperature_c=10, pco2_atm=0.01, runoff_mm_per_yr=500, rock="limestone")
    assert got["denudation_mm_per_kyr"][0, 0] == pytest.approx(one["denudation_mm_per_kyr"], rel=1e-4)


def _dataarrays(fields, chunks=None):
    xr = pytest.importorskip("xarray")
    codes, runoff, pco2, temperature, fraction = fields
    coords = {"y": 5200000.0 - 100.0 * np.arange(30), "x": 400000.0 + 100.0 * np.arange(40), "band": 1}
    attrs = {"crs": "EPSG:32632", "source": "synthetic test field"}
    make = lambda a, name: xr.DataArray(a, dims=("y", "x"), coords=coords, name=name, attrs=attrs)  # noqa: E731
    arrays = [make(codes, "lithology"), make(runoff, "runoff"), make(pco2, "pco2"), make(temperature, "temperature"),
              make(fraction, "fraction")]
    if chunks:
        arrays = [a.chunk(chunks) for a in arrays]
    return arrays


def test_rates_xarray_keeps_coords_and_attrs(fields):
    lith, runoff, pco2, temperature, fraction = _dataarrays(fields)
    with pytest.warns(denude.errors.OutOfRangeWarning):
        ds = denude.rates(lith, runoff, pco2, temperature, soluble_fraction=fraction)
    want = reference(*fields)
    assert type(ds).__name__ == "Dataset" and set(ds.data_vars) == set(VARIABLES)
    for name in VARIABLES:
        np.testing.assert_array_equal(ds[name].values, getattr(want, name))
    np.testing.assert_array_equal(ds["x"].values, lith["x"].values)
    np.testing.assert_array_equal(ds["y"].values, lith["y"].values)
    assert int(ds["band"]) == 1
    assert ds.attrs["crs"] == "EPSG:32632" and ds.attrs["source"] == "synthetic test field"
    assert ds["denudation_mm_per_kyr"].attrs["units"] == "mm/kyr"
    assert ds["dissolved_load_mmol_per_l"].attrs["units"] == "mmol/L"
    assert ds["co2_drawdown_t_per_km2_yr"].attrs["units"] == "t CO2 km-2 yr-1"


def test_rates_dask_is_lazy_and_identical(fields):
    pytest.importorskip("dask.array")
    lith, runoff, pco2, temperature, fraction = _dataarrays(fields, chunks={"y": 7, "x": 16})
    calls = []
    original = denude.api.compute_block

    def counting(*args, **kwargs):
        calls.append(args[0].shape)
        return original(*args, **kwargs)

    denude.api.compute_block = counting
    try:
        ds = denude.rates(lith, runoff, pco2, temperature, soluble_fraction=fraction)
        assert calls == [] or all(0 in shape or shape == (1, 1) for shape in calls)   # nothing computed yet
        data = ds["denudation_mm_per_kyr"].data
        assert type(data).__module__.startswith("dask") and data.chunks == ((7, 7, 7, 7, 2), (16, 16, 8))
        with pytest.warns(denude.errors.OutOfRangeWarning):
            computed = ds.compute()
    finally:
        denude.api.compute_block = original
    assert len([s for s in calls if s not in ((0, 0), (1, 1))]) == 15             # one kernel call per chunk
    want = reference(*fields)
    for name in VARIABLES:
        np.testing.assert_array_equal(computed[name].values, getattr(want, name))


def test_site_has_the_keys_of_site_json():
    cli = json.loads(CliRunner().invoke(app, ["site", "--temperature", "10", "--pco2", "0.01", "--runoff", "500",
                                             "--json"]).stdout)
    lib = denude.site(temperature_c=10, pco2_atm=0.01, runoff_mm_per_yr=500, rock="limestone", chemistry="white")
    assert set(cli) <= set(lib)
    assert lib == cli                      # same numbers: the CLI calls the library
    # worked example, science notes section 1 (see tests/test_site_cli.py): 2.0736 mmol/kg at 10 C, 0.01 atm
    assert lib["dissolved_load_mmol_per_l"] == pytest.approx(2.0736 * 0.9997, rel=2e-4)


@pytest.mark.parametrize("kwargs, words", [
    ({"temperature_c": 120}, "temperature_c 120"),
    ({"pco2_atm": 400}, "pco2_atm is 400 atm"),
    ({"rock": "granit"}, "unknown rock"),
    ({"chemistry": "fast"}, "use one of white, speciated"),
])
def test_site_errors_are_user_errors(kwargs, words):
    args = {"temperature_c": 10, "pco2_atm": 0.01, "runoff_mm_per_yr": 500, **kwargs}
    with pytest.raises(denude.DenudeError, match=words):
        denude.site(**args)


def test_kernel_from_worker_threads_matches_the_main_thread(fields):
    # the serial build for worker threads must not load the parallel build from numba's cache
    from concurrent.futures import ThreadPoolExecutor

    codes, runoff, pco2, temperature, fraction = fields
    want = reference(codes, runoff, pco2, temperature, fraction)
    with ThreadPoolExecutor(2) as pool:
        results = list(pool.map(lambda _: reference(codes, runoff, pco2, temperature, fraction), range(6)))
    for got in results:
        np.testing.assert_array_equal(got.denudation_mm_per_kyr, want.denudation_mm_per_kyr)
