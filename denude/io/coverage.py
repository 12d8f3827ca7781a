"""exactextract adapter: coverage fractions of grid cells by polygons, without reading pixels.

A raster source whose values are the flat cell indices of one strip of the grid, and a feature
source over WKB polygons; exactextract's ``values`` and ``coverage`` operations then name the
cells each polygon covers and by what fraction. exactextract is imported lazily on purpose: it
is only needed by zone summaries, and importing it costs start-up time of every command.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np


class _CellIndexSource:
    """exactextract raster source for one strip of the grid whose values are the flat
    (row-major) cell indices of the strip (int32): exactextract's ``values`` operation then
    names the cells it covers, and no pixel of the maps is read by exactextract."""

    def __new__(cls, *args, **kwargs):  # built lazily so importing this module is cheap
        from exactextract.raster import RasterSource

        class CellIndexSource(RasterSource):
            def __init__(self, extent, nx, ny):
                super().__init__()
                self._extent, self._nx, self._ny = extent, nx, ny
                self._index = np.arange(nx * ny, dtype=np.int32).reshape(ny, nx)

            def res(self):
                e = self._extent
                return ((e[2] - e[0]) / self._nx, (e[3] - e[1]) / self._ny)

            def extent(self):
                return self._extent

            def srs_wkt(self):
                return None

            def nodata_value(self):
                return None

            def read_window(self, x0, y0, nx, ny):
                return self._index[y0:y0 + ny, x0:x0 + nx]

        return CellIndexSource(*args, **kwargs)


def _features(wkbs, index):
    from exactextract.feature import Feature, FeatureSource

    class WkbFeature(Feature):
        def __init__(self, wkb, i):
            Feature.__init__(self)
            self._wkb, self._i = wkb, i

        def geometry(self):
            return self._wkb

        def get(self, name):
            return self._i

        def fields(self):
            return ["zone_index"]

        def set_geometry_format(self):
            return "wkb"

    class WkbSource(FeatureSource):
        def __init__(self):
            super().__init__()

        def count(self):
            return len(index)

        def __iter__(self):
            for wkb, i in zip(wkbs, index):
                yield WkbFeature(wkb, int(i))

        def srs_wkt(self):
            return None

    return WkbSource()


@dataclass
class CoveragePairs:
    """Cells covered by zones in one strip, in runs of one zone: pairs
    ``run_start[k]:run_start[k + 1]`` belong to zone ``run_zone[k]``; ``cell`` is the flat
    (row-major) cell index in the strip (int32), ``coverage`` the fraction [0-1] of the cell
    inside the zone (float64)."""

    run_zone: np.ndarray
    run_start: np.ndarray
    cell: np.ndarray
    coverage: np.ndarray

    @property
    def zone(self) -> np.ndarray:
        """Zone index of every pair (int64)."""
        return np.repeat(self.run_zone, np.diff(self.run_start))


def coverage_pairs(extent, nx, ny, wkbs, index) -> CoveragePairs:
    """Coverage fractions of the cells of an ``ny`` x ``nx`` grid (fewer than 2**31 cells) with
    ``extent`` (xmin, ymin, xmax, ymax) by each polygon (WKB), grouped by zone in input order."""
    from exactextract import exact_extract
    from exactextract.feature import JSONFeature
    from exactextract.writer import Writer

    if nx * ny >= 2 ** 31:
        raise ValueError("strip too large for int32 cell indices")
    zones, cells, covs = [], [], []

    class ArrayWriter(Writer):
        """Collects the covered cells and their coverage of each feature, in order."""

        def write(self, feature):
            f = JSONFeature()
            feature.copy_to(f)
            props = f.feature["properties"]
            if len(props["values"]):
                zones.append(props["zone_index"])
                cells.append(props["values"])
                covs.append(props["coverage"])

        def features(self):
            return None

    exact_extract(_CellIndexSource(extent, nx, ny), _features(wkbs, index), ["values", "coverage"],
                  include_cols=["zone_index"], output=ArrayWriter())
    if not cells:
        return CoveragePairs(np.zeros(0, np.int64), np.zeros(1, np.int64), np.zeros(0, np.int32), np.zeros(0, np.float64))
    lengths = np.fromiter((len(c) for c in cells), np.int64, len(cells))
    return CoveragePairs(np.asarray(zones, np.int64), np.r_[0, np.cumsum(lengths)],
                         np.concatenate(cells), np.concatenate(covs).astype(np.float64, copy=False))

