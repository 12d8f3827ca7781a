"""Blocked windows over a target grid, aligned to the output's internal tiles."""

from __future__ import annotations

from rasterio.windows import Window

from denude.errors import InputError

#: Default block (and output tile) size, cells per side. GeoTIFF tiles must be multiples of 16.
DEFAULT_BLOCK_SIZE = 512


def check_block_size(block_size: int) -> int:
    """Block size in cells: a multiple of 16 between 16 and 8192 (GeoTIFF tile rule)."""
    size = int(block_size)
    if size < 16 or size > 8192 or size % 16:
        raise InputError(
            f"block size {block_size} must be a multiple of 16 between 16 and 8192 cells; e.g. 512"
        )
    return size


def block_windows(height: int, width: int, block_size: int = DEFAULT_BLOCK_SIZE) -> list[Window]:
    """Windows of at most ``block_size`` x ``block_size`` cells in row-major order, starting at
    (0, 0) so that every window is exactly one output tile (the last row/column may be smaller)."""
    size = check_block_size(block_size)
    return [
        Window(col, row, min(size, width - col), min(size, height - row))
        for row in range(0, height, size)
        for col in range(0, width, size)
    ]
