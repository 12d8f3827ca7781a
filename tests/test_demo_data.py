"""The demo region in demo_rasters/ (the invented Ketterwold Upland): files, grids, ranges.

Ranges are those documented in demo_rasters/README.md; the bands themselves are plausible
values from the science notes sections 4, 5 and 7 (soil PCO2, runoff, rock densities).
"""

import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest

rasterio = pytest.importorskip("rasterio")
pyogrio = pytest.importorskip("pyogrio")

REPO = Path(__file__).resolve().parent.parent
DEMO = REPO / "demo_rasters"
SCRIPT = REPO / "scripts" / "make_demo_region.py"

RASTERS = {
    # name: (dtype, nodata, units, valid min, valid max)
    "lithology.tif": ("uint8", 255, "category", 0, 4),
    "elevation_m.tif": ("float32", -9999.0, "m", 100.0, 2000.0),
    "runoff_mm_per_yr.tif": ("float32", -9999.0, "mm/yr", 150.0, 1200.0),
    "soluble_fraction.tif": ("float32", -9999.0, "1", 0.0, 1.0),
    "temperature_c.tif": ("float32", -9999.0, "degC", 4.0, 14.0),
    "soil_pco2_ppmv.tif": ("float32", -9999.0, "ppmv", 1000.0, 30000.0),
}
VECTORS = {
    # file: {layer: (geometry type, required fields)}
    "watersheds.gpkg": {"watersheds": ("Polygon", {"watershed_id", "name"}),
                        "subwatersheds": ("Polygon", {"watershed_id", "name"})},
    "planning_units.gpkg": {"planning_units": ("Polygon", {"unit_id"})},
    "sinkholes.gpkg": {"sinkholes": ("Point", {"sinkhole_id"})},
}


def test_all_files_exist():
    expected = set(RASTERS) | set(VECTORS) | {"rocks.csv", "README.md"}
    missing = sorted(name for name in expected if not (DEMO / name).is_file())
    assert not missing


def test_folder_under_10_mb():
    total = sum(p.stat().st_size for p in DEMO.rglob("*") if p.is_file())
    assert total < 10 * 1024 * 1024


@pytest.mark.parametrize("name", sorted(RASTERS))
def test_raster_profile_and_range(name):
    dtype, nodata, units, lo, hi = RASTERS[name]
    with rasterio.open(DEMO / name) as src:
        assert src.crs is not None and (src.crs.is_projected or src.crs.is_geographic)
        assert src.dtypes[0] == dtype
        assert src.nodata == nodata
        assert src.tags()["units"] == units
        assert src.profile["tiled"] and src.block_shapes[0] in ((256, 256), (512, 512))
        assert src.compression is not None
        data = src.read(1, masked=True)
    valid = data.compressed()
    assert valid.size > 0.99 * data.size
    assert valid.min() >= lo and valid.max() <= hi


def test_lithology_grid_classes_and_nodata_edge():
    with rasterio.open(DEMO / "lithology.tif") as src:
        assert src.crs.to_epsg() == 32633
        assert src.res == (30.0, 30.0)
        assert (src.width, src.height) == (600, 500)
        codes = src.read(1)
    assert set(np.unique(codes)) == {0, 1, 2, 3, 4, 255}
    rows, cols = np.nonzero(codes == 255)
    assert 0 < rows.size < 1000 and cols.min() >= 590        # a few cells at the east edge


def test_grids_differ_from_lithology_grid():
    with rasterio.open(DEMO / "lithology.tif") as lith:
        bounds, crs = lith.bounds, lith.crs
    with rasterio.open(DEMO / "soil_pco2_ppmv.tif") as src:
        assert src.crs != crs and src.crs.is_geographic
        from rasterio.warp import transform_bounds
        w, s, e, n = transform_bounds(src.crs, crs, *src.bounds)
        assert w < bounds.left and s < bounds.bottom and e > bounds.right and n > bounds.top
    with rasterio.open(DEMO / "temperature_c.tif") as src:
        assert src.res == (250.0, 250.0)
        assert src.bounds.left < bounds.left and src.bounds.top > bounds.top


def test_physical_trends():
    """Temperature falls and runoff rises with elevation (lapse 6.5 C/km, common practice)."""
    with rasterio.open(DEMO / "elevation_m.tif") as src:
        z = src.read(1)
    with rasterio.open(DEMO / "runoff_mm_per_yr.tif") as src:
        q = src.read(1, masked=True)
    ok = ~q.mask
    assert np.corrcoef(z[ok], q.data[ok])[0, 1] > 0.8
    with rasterio.open(DEMO / "temperature_c.tif") as src:
        t = src.read(1)
    assert 9.0 <= t.max() - t.min() <= 10.5                  # about 1.5 km of relief
    with rasterio.open(DEMO / "soluble_fraction.tif") as src:
        f = src.read(1, masked=True)
    with rasterio.open(DEMO / "lithology.tif") as src:
        codes = src.read(1)
    assert np.all(f[codes == 0] == 0.0)
    assert np.all(f.mask == (codes == 255))


def test_rock_table_reads_and_matches_codes():
    from denude.io.rock_csv import read_rock_table

    header = (DEMO / "rocks.csv").read_text(encoding="utf-8").splitlines()[0]
    assert header == "code,name,mineral,density_g_cm3,purity"
    table = read_rock_table(DEMO / "rocks.csv")
    assert table.codes == [0, 1, 2, 3, 4]
    assert table.by_code(4).mineral == "calcite" and table.by_code(4).density_g_cm3 == pytest.approx(1.9)
    assert table.by_code(3).mineral == "gypsum"


@pytest.mark.parametrize("filename", sorted(VECTORS))
def test_vector_layers_and_fields(filename):
    import geopandas as gpd

    layers = {name: kind for name, kind in pyogrio.list_layers(DEMO / filename)}
    for layer, (geom_type, fields) in VECTORS[filename].items():
        assert layers.get(layer) == geom_type
        gdf = gpd.read_file(DEMO / filename, layer=layer)
        assert fields <= set(gdf.columns)
        assert gdf.crs is not None and gdf.geometry.is_valid.all()


def test_vector_contents():
    import geopandas as gpd

    ws = gpd.read_file(DEMO / "watersheds.gpkg", layer="watersheds")
    assert 6 <= len(ws) <= 12 and ws.watershed_id.is_unique
    assert ws.watershed_id.str.fullmatch(r"WS\d\d").all()
    # they partition most of the 18 km x 15 km region without overlapping each other
    assert ws.area.sum() > 0.8 * 18_000 * 15_000
    assert ws.union_all().area == pytest.approx(ws.area.sum(), rel=1e-6)
    sub = gpd.read_file(DEMO / "watersheds.gpkg", layer="subwatersheds")
    by_id = dict(zip(sub.watershed_id, sub.geometry)) | dict(zip(ws.watershed_id, ws.geometry))
    nested = [row for row in sub.itertuples() if row.parent_id in set(sub.watershed_id)]
    assert nested                                          # at least one sub-sub-watershed
    for row in sub.itertuples():
        assert by_id[row.parent_id].buffer(0.05).contains(row.geometry)

    pu = gpd.read_file(DEMO / "planning_units.gpkg", layer="planning_units")
    assert 30 <= len(pu) <= 60 and pu.unit_id.is_unique
    assert pu.crs.to_epsg() == 4326

    sk = gpd.read_file(DEMO / "sinkholes.gpkg", layer="sinkholes")
    assert 80 <= len(sk) <= 200 and sk.sinkhole_id.is_unique
    with rasterio.open(DEMO / "lithology.tif") as src:
        assert sk.crs == src.crs
        codes = np.array([v[0] for v in src.sample(zip(sk.geometry.x, sk.geometry.y))])
    assert np.isin(codes, [1, 3]).mean() > 0.7           # mostly on limestone and gypsum
    assert not np.isin(codes, [1, 3]).all()              # but not only


def test_generator_is_reproducible(tmp_path):
    subprocess.run([sys.executable, str(SCRIPT), str(tmp_path)], check=True,
                   capture_output=True, timeout=120)
    for name in ("lithology.tif", "runoff_mm_per_yr.tif", "soil_pco2_ppmv.tif"):
        assert (tmp_path / name).read_bytes() == (DEMO / name).read_bytes(), name
