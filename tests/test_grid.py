"""Target grid value object and blocked windows."""

import pickle

import pytest
from rasterio.windows import Window

from denude.errors import GridError, InputError
from denude.execution.blocks import block_windows
from denude.io.grid import Grid, parse_crs, snap_bounds_outward


def test_from_bounds_extends_to_whole_cells():
    # 1050 m / 100 m = 10.5 cells -> 11 (hand-derived)
    grid = Grid.from_bounds("EPSG:32632", 100.0, (400000, 5199000, 401050, 5200000))
    assert (grid.width, grid.height) == (11, 10)
    assert grid.res == (100.0, 100.0)
    assert grid.bounds == (400000.0, 5199000.0, 401100.0, 5200000.0)
    assert grid.crs.to_epsg() == 32632


def test_snap_bounds_outward_to_multiples_of_the_resolution():
    # hand-derived: 1234.5 -> 1000, 5678.9 -> 6000 (down / up to 1000); 250 m in y
    assert snap_bounds_outward((1234.5, -260.0, 5678.9, 740.0), (1000.0, 250.0)) == (1000.0, -500.0, 6000.0, 750.0)
    # bounds already on the lattice stay put, also with floating-point noise from a projection
    assert snap_bounds_outward((2000.0000000001, 0.0, 2999.9999999999, 500.0), (1000.0, 250.0)) == (
        2000.0, 0.0, 3000.0, 500.0)
    with pytest.raises(GridError, match="must be positive"):
        snap_bounds_outward((0, 0, 1, 1), (0.0, 1.0))


def test_window_transform_is_integer_offset():
    grid = Grid.from_bounds("EPSG:32632", (100.0, 50.0), (0, 0, 1000, 1000))
    t = grid.window_transform(Window(3, 4, 2, 2))
    assert (t.c, t.f) == (300.0, 1000.0 - 4 * 50.0)  # hand-derived


def test_grid_is_picklable_and_hashable():
    grid = Grid.from_bounds(parse_crs("32632"), 10, (0, 0, 100, 100))
    again = pickle.loads(pickle.dumps(grid))
    assert again == grid and hash(again) == hash(grid)
    assert grid.as_dict()["epsg"] == 32632 and grid.as_dict()["width"] == 10


@pytest.mark.parametrize("crs,res,bounds", [
    ("EPSG:32632", -5, (0, 0, 10, 10)),
    ("EPSG:32632", 1, (10, 0, 0, 10)),
    ("not-a-crs", 1, (0, 0, 10, 10)),
    ("EPSG:32632", 1e-9, (0, 0, 1e6, 1e6)),
])
def test_bad_grids_are_one_line_errors(crs, res, bounds):
    with pytest.raises(GridError) as info:
        Grid.from_bounds(crs, res, bounds)
    assert "\n" not in str(info.value)


def test_block_windows_tile_the_grid_exactly():
    windows = block_windows(40, 56, 16)
    assert len(windows) == 3 * 4
    assert sum(w.width * w.height for w in windows) == 40 * 56
    assert windows[0] == Window(0, 0, 16, 16)
    assert windows[-1] == Window(48, 32, 8, 8)
    assert all(w.col_off % 16 == 0 and w.row_off % 16 == 0 for w in windows)


def test_block_size_must_suit_geotiff_tiles():
    with pytest.raises(InputError):
        block_windows(10, 10, 100)
