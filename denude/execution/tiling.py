"""Split a target grid into batch tiles on exact integer cell offsets.

Tile (i, j) covers rows ``i * size`` to ``min((i + 1) * size, height)`` and the matching
columns, so adjacent tiles share their edges exactly (no gap, no overlap) and every cell
belongs to exactly one tile. A tile's own grid has the parent's CRS and cell size and the
transform of its window, computed from integer offsets (no rounding drift).
"""

from __future__ import annotations

from dataclasses import dataclass

from rasterio.windows import Window

from denude.errors import InputError
from denude.io.grid import Grid
from denude.registry import DEFAULT_TILE_SIZE  # noqa: F401  (re-exported)

#: Smallest and largest batch tile side [cells]; tiles are multiples of 16 (GeoTIFF blocks).
MIN_TILE_SIZE = 16
MAX_TILE_SIZE = 65536


def check_tile_size(tile_size) -> int:
    """Tile side in cells: a multiple of 16 from 16 to 65536."""
    try:
        size = int(tile_size)
    except (TypeError, ValueError):
        size = -1
    if isinstance(tile_size, bool) or size != tile_size or not (MIN_TILE_SIZE <= size <= MAX_TILE_SIZE) or size % 16:
        raise InputError(
            f"tile size {tile_size!r} must be a multiple of 16 from {MIN_TILE_SIZE} to {MAX_TILE_SIZE} "
            "cells; e.g. --tile-size 4096"
        )
    return size


@dataclass(frozen=True)
class Tile:
    """One batch tile: its row/column in the tile layout and its window of the target grid."""

    row: int
    col: int
    col_off: int       # cells
    row_off: int       # cells
    width: int         # cells
    height: int        # cells
    id_digits: int = 3

    @property
    def id(self) -> str:
        """Folder name, e.g. ``r000_c001``."""
        return f"r{self.row:0{self.id_digits}d}_c{self.col:0{self.id_digits}d}"

    @property
    def window(self) -> Window:
        return Window(self.col_off, self.row_off, self.width, self.height)

    def as_list(self) -> list[int]:
        """[col_off, row_off, width, height] in cells (for the manifest)."""
        return [self.col_off, self.row_off, self.width, self.height]

    def grid(self, parent: Grid) -> Grid:
        """The tile's own grid (same CRS and cell size, shifted origin)."""
        a, b, c, d, e, f = parent.transform
        return Grid(parent.crs_wkt, (a, b, c + a * self.col_off, d, e, f + e * self.row_off), self.width, self.height)


def tile_layout(grid: Grid, tile_size: int) -> tuple[int, int]:
    """(rows, columns) of tiles covering the grid."""
    size = check_tile_size(tile_size)
    return (-(-grid.height // size), -(-grid.width // size))


def make_tiles(grid: Grid, tile_size: int) -> list[Tile]:
    """Every tile of the grid in row-major order."""
    size = check_tile_size(tile_size)
    rows, cols = tile_layout(grid, size)
    digits = max(3, len(str(max(rows, cols) - 1)))
    return [
        Tile(i, j, j * size, i * size, min(size, grid.width - j * size), min(size, grid.height - i * size), digits)
        for i in range(rows)
        for j in range(cols)
    ]


def sub_windows(tile: Tile, block_size: int) -> list[tuple[Window, Window]]:
    """Blocks of a tile as (window in the target grid, window in the tile), row-major."""
    out = []
    for r in range(0, tile.height, block_size):
        for c in range(0, tile.width, block_size):
            w, h = min(block_size, tile.width - c), min(block_size, tile.height - r)
            out.append((Window(tile.col_off + c, tile.row_off + r, w, h), Window(c, r, w, h)))
    return out
