"""Mosaic VRTs of tile folders, globs and lists: same cells as the source raster, explicit
nodata, one-line errors for tiles that do not fit together; tiling on integer offsets."""

import warnings

import numpy as np
import pytest
import rasterio
from rasterio.transform import from_origin

from denude.errors import GridError, InputError, MosaicOverlapWarning
from denude.execution.tiling import check_tile_size, make_tiles, sub_windows
from denude.io.grid import Grid
from denude.io.mosaic import (
    TileInfo, default_nodata, expand_tiles, find_overlaps, mosaic_kind, mosaic_vrt_text, vrt_source_files,
    write_mosaic_vrt,
)

CRS = "EPSG:32632"
X0, Y0, RES = 400000.0, 5200000.0, 100.0   # m


def write_tif(path, data, col=0, row=0, nodata=None, crs=CRS, res=RES, dx=0.0):
    path.parent.mkdir(parents=True, exist_ok=True)
    with rasterio.open(path, "w", driver="GTiff", width=data.shape[1], height=data.shape[0], count=1,
                       dtype=data.dtype, crs=crs, nodata=nodata,
                       transform=from_origin(X0 + col * RES + dx, Y0 - row * RES, res, res)) as ds:
        ds.write(data, 1)
    return path


def cut(folder, data, cuts_r, cuts_c, nodata=None, prefix="t"):
    """Write ``data`` as tiles split at the given row/column offsets (uneven on purpose)."""
    paths = []
    rows = [0, *cuts_r, data.shape[0]]
    cols = [0, *cuts_c, data.shape[1]]
    for i in range(len(rows) - 1):
        for j in range(len(cols) - 1):
            piece = data[rows[i]:rows[i + 1], cols[j]:cols[j + 1]]
            paths.append(write_tif(folder / f"{prefix}_{i}_{j}.tif", piece, cols[j], rows[i], nodata))
    return paths


@pytest.fixture
def ramp():
    data = np.arange(40 * 56, dtype=np.float32).reshape(40, 56)
    data[3, 4] = -9999.0
    return data


def read_all(path):
    with rasterio.open(path) as ds:
        return ds.read(1), ds.nodata, ds.transform, ds.crs


def test_folder_mosaic_equals_source(tmp_path, ramp):
    cut(tmp_path / "tiles", ramp, [17], [23, 40], nodata=-9999.0)
    vrt = write_mosaic_vrt(str(tmp_path / "tiles"), "runoff", tmp_path / "m.vrt")
    data, nodata, transform, crs = read_all(vrt)
    assert data.tobytes() == ramp.tobytes()
    assert nodata == -9999.0
    assert tuple(transform)[:6] == (RES, 0.0, X0, 0.0, -RES, Y0)
    assert crs.to_epsg() == 32632
    assert len(vrt_source_files(vrt)) == 6


def test_glob_and_list_give_the_same_vrt(tmp_path, ramp):
    paths = cut(tmp_path / "tiles", ramp, [20], [28], nodata=-9999.0)
    by_glob = mosaic_vrt_text(expand_tiles(str(tmp_path / "tiles" / "t_*.tif"), "runoff"), "runoff")
    listing = tmp_path / "tiles.txt"
    listing.write_text("# tiles\n" + "\n".join(f"tiles/{p.name}" for p in paths) + "\n\n")
    assert mosaic_kind(str(listing)) == "list"
    assert mosaic_kind(str(tmp_path / "tiles" / "*.tif")) == "glob"
    by_list = mosaic_vrt_text(expand_tiles(str(listing), "runoff"), "runoff")
    assert by_glob == by_list
    vrt = tmp_path / "m.vrt"
    vrt.write_text(by_list)
    assert read_all(vrt)[0].tobytes() == ramp.tobytes()


def test_mosaic_rewritten_only_when_changed(tmp_path, ramp):
    cut(tmp_path / "tiles", ramp, [20], [28], nodata=-9999.0)
    dest = tmp_path / "m.vrt"
    write_mosaic_vrt(str(tmp_path / "tiles"), "runoff", dest)
    before = dest.stat().st_mtime_ns
    write_mosaic_vrt(str(tmp_path / "tiles"), "runoff", dest)
    assert dest.stat().st_mtime_ns == before
    assert not list(tmp_path.glob(".m.vrt.partial-*"))


def test_tiles_with_different_nodata_keep_nodata(tmp_path):
    left = np.full((8, 8), 5.0, np.float32)
    left[0, 0] = -1.0
    right = np.full((8, 8), 7.0, np.float32)
    right[1, 1] = -9999.0
    write_tif(tmp_path / "t" / "a.tif", left, 0, 0, nodata=-1.0)
    write_tif(tmp_path / "t" / "b.tif", right, 8, 0, nodata=-9999.0)
    data, nodata, _, _ = read_all(write_mosaic_vrt(str(tmp_path / "t"), "runoff", tmp_path / "m.vrt"))
    assert np.isnan(nodata)                     # no common nodata: NaN for float tiles
    assert np.isnan(data[0, 0]) and np.isnan(data[1, 9])
    assert data[0, 1] == 5.0 and data[0, 8] == 7.0
    assert np.count_nonzero(np.isnan(data)) == 2


def test_integer_tiles_without_nodata_get_type_minimum(tmp_path):
    codes = np.arange(64, dtype=np.int16).reshape(8, 8)
    write_tif(tmp_path / "t" / "a.tif", codes, 0, 0)
    write_tif(tmp_path / "t" / "b.tif", codes, 0, 16)          # leaves a gap of 8 rows
    data, nodata, _, _ = read_all(write_mosaic_vrt(str(tmp_path / "t"), "lithology", tmp_path / "m.vrt"))
    assert nodata == default_nodata("int16") == -32768
    assert data.shape == (24, 8)
    assert np.all(data[8:16] == -32768)
    assert np.array_equal(data[16:], codes)


@pytest.mark.parametrize("kind, words", [
    ("crs", "different CRS"),
    ("res", "cell size"),
    ("shift", "not aligned"),
    ("dtype", "data type"),
])
def test_tiles_that_do_not_fit_are_one_line_errors(tmp_path, kind, words):
    a = np.ones((8, 8), np.float32)
    write_tif(tmp_path / "t" / "a.tif", a)
    b = a.astype(np.float64) if kind == "dtype" else a
    write_tif(tmp_path / "t" / "b.tif", b, 8, 0, crs="EPSG:32633" if kind == "crs" else CRS,
              res=50.0 if kind == "res" else RES, dx=30.0 if kind == "shift" else 0.0)
    with pytest.raises((GridError, InputError)) as info:
        write_mosaic_vrt(str(tmp_path / "t"), "runoff", tmp_path / "m.vrt")
    message = str(info.value)
    assert words in message and "b.tif" in message and "\n" not in message
    assert not (tmp_path / "m.vrt").exists()


def test_empty_folder_glob_and_garbage_tile(tmp_path):
    (tmp_path / "empty").mkdir()
    with pytest.raises(InputError, match="no .tif files"):
        expand_tiles(str(tmp_path / "empty"), "runoff")
    with pytest.raises(InputError, match="matches no files"):
        expand_tiles(str(tmp_path / "none" / "*.tif"), "runoff")
    (tmp_path / "bad").mkdir()
    (tmp_path / "bad" / "x.tif").write_bytes(b"not a raster" * 10)
    with pytest.raises(InputError, match="x.tif is not a readable raster"):
        write_mosaic_vrt(str(tmp_path / "bad"), "runoff", tmp_path / "m.vrt")


def test_tiles_partition_the_grid_on_integer_offsets():
    grid = Grid(rasterio.crs.CRS.from_string(CRS).to_wkt(), (RES, 0.0, X0, 0.0, -RES, Y0), 80, 64)
    tiles = make_tiles(grid, 32)
    assert [t.id for t in tiles] == ["r000_c000", "r000_c001", "r000_c002", "r001_c000", "r001_c001", "r001_c002"]
    cover = np.zeros((64, 80), np.int64)
    for t in tiles:
        cover[t.row_off:t.row_off + t.height, t.col_off:t.col_off + t.width] += 1
    assert np.all(cover == 1)
    a, b = tiles[0].grid(grid), tiles[1].grid(grid)
    assert a.bounds[2] == b.bounds[0] == X0 + 32 * RES            # shared edge, exactly
    assert tiles[2].width == 16 and tiles[2].grid(grid).bounds[2] == grid.bounds[2]
    blocks = sub_windows(tiles[4], 16)
    assert len(blocks) == 4 and blocks[0][0].col_off == 32 and blocks[0][1].col_off == 0
    for bad in (0, 40, 17.5, "x", True):
        with pytest.raises(InputError, match="multiple of 16"):
            check_tile_size(bad)


# ------------------------------------------------------------------------- overlaps
def test_overlapping_tiles_warn_once_and_the_later_tile_wins(tmp_path):
    a = np.full((8, 10), 1.0, np.float32)           # rows 0-8, cols 0-10
    b = np.full((8, 8), 2.0, np.float32)            # rows 3-11, cols 6-14: 4 x 5 cells over a
    b[4, 1] = -1.0                                  # nodata inside the overlap (row 7, col 7)
    c = np.full((4, 4), 3.0, np.float32)            # rows 0-4, cols 12-16: 2 x 1 cells over b
    write_tif(tmp_path / "t" / "a.tif", a, 0, 0, nodata=-1.0)
    write_tif(tmp_path / "t" / "b.tif", b, 6, 3, nodata=-1.0)
    write_tif(tmp_path / "t" / "c.tif", c, 12, 0, nodata=-1.0)
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        vrt = write_mosaic_vrt(str(tmp_path / "t"), "runoff", tmp_path / "m.vrt")
    found = [w for w in caught if issubclass(w.category, MosaicOverlapWarning)]
    assert len(found) == 1
    message = str(found[0].message)
    assert message.startswith("runoff mosaic: 2 tile pair(s) overlap, first a.tif and b.tif by 4 x 5 cells")
    assert "later file in name order (b.tif) wins" in message and "VRT" in message and "\n" not in message
    data = read_all(vrt)[0]
    assert data.shape == (11, 16)
    expected = np.full((5, 4), 2.0, np.float32)
    expected[4, 1] = 1.0                            # b has no data there: a shows through
    assert np.array_equal(data[3:8, 6:10], expected)
    assert np.all(data[3, 12:14] == 3.0)            # c over b
    assert np.all(data[4:11, 12:14] == 2.0) and data[0, 0] == 1.0 and data[10, 0] == -1.0


def test_edge_sharing_tiles_do_not_warn(tmp_path, ramp):
    cut(tmp_path / "tiles", ramp, [17], [23, 40], nodata=-9999.0)
    a = np.ones((8, 8), np.float32)
    write_tif(tmp_path / "near" / "a.tif", a)
    write_tif(tmp_path / "near" / "b.tif", a, 8, 0, dx=-1e-5)    # 1e-7 cells over a: a shared edge
    with warnings.catch_warnings():
        warnings.simplefilter("error", MosaicOverlapWarning)
        tiled = write_mosaic_vrt(str(tmp_path / "tiles"), "runoff", tmp_path / "m.vrt")
        near = write_mosaic_vrt(str(tmp_path / "near"), "runoff", tmp_path / "n.vrt")
    assert read_all(tiled)[0].tobytes() == ramp.tobytes()
    assert read_all(near)[0].shape == (8, 16)


def test_overlap_pairs_counted_over_a_grid_of_tiles():
    """3 x 3 tiles of 10 cells, each one cell wider and taller than its slot: 6 side-by-side,
    6 stacked and 8 diagonal neighbours overlap."""
    wkt = rasterio.crs.CRS.from_string(CRS).to_wkt()
    infos = [TileInfo(f"t{i}{j}.tif", wkt, (RES, 0.0, X0 + 10 * j * RES, 0.0, -RES, Y0 - 10 * i * RES),
                      11, 11, "float32", None, (11, 1)) for i in range(3) for j in range(3)]
    found = find_overlaps(infos[::-1])                            # order of the sweep does not matter
    assert found.pairs == 20
    assert found.first == ("t22.tif", "t21.tif") and (found.width_cells, found.height_cells) == (1.0, 11.0)
    assert find_overlaps(infos[:1]) is None
    edge = [TileInfo(p, wkt, (RES, 0.0, X0 + 10 * k * RES, 0.0, -RES, Y0), 10, 10, "float32", None, (10, 1))
            for k, p in enumerate(("a.tif", "b.tif"))]
    assert find_overlaps(edge) is None
