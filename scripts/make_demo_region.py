#!/usr/bin/env python
"""Generate the demo region of ``denude``: the Ketterwold Upland, an invented karst upland.

Every value written by this script is invented for the demo; nothing is measured.

Usage::

    python scripts/make_demo_region.py [OUT_DIR] [--seed N]

``OUT_DIR`` defaults to ``demo_rasters/`` beside this script's folder. The output is
deterministic: a seeded numpy generator, fixed GDAL creation options, no timestamps in
raster metadata and a fixed GeoPackage date, so re-running gives byte-identical rasters.

How the region is built
-----------------------
All fields are analytic functions of map coordinates (metres, EPSG:32633). Smooth random
relief is a seeded sum of sinusoids, so any grid in any CRS samples the same surface; the
coarse grids average a few sub-cell samples per cell.

* elevation: a broad dome, a chalk-capped knoll, two valleys cut into the dome, relief noise.
* lithology: a tilted stratigraphic "height" folded along strike and offset by a fault,
  cut into limestone / dolostone / thin insoluble bands; a gypsum lens; the chalk outlier on
  the knoll; insoluble cover (valley fill) along the valley floors; a ragged strip of nodata
  at the east edge.
* temperature: 15.3 C at sea level, lapse 6.5 C/km.
* runoff: rises with elevation, a little wetter on the west (windward) side.
* soil PCO2: high under valley soils, low on high bare ground.
"""

from __future__ import annotations

import argparse
import csv
import math
from pathlib import Path

import numpy as np

REGION_NAME = "Ketterwold Upland"
DEFAULT_SEED = 20261201

# ---------------------------------------------------------------------------------------------
# Grids
# ---------------------------------------------------------------------------------------------
CRS_MAIN = "EPSG:32633"          # WGS 84 / UTM zone 33N
CELL_M = 30.0
N_COLS, N_ROWS = 600, 500
WEST, NORTH = 541_200.0, 5_262_000.0
EAST, SOUTH = WEST + N_COLS * CELL_M, NORTH - N_ROWS * CELL_M

TEMP_CELL_M = 250.0              # temperature grid: same CRS, coarser, shifted origin
TEMP_MARGIN_M = 1_000.0

CRS_PCO2 = "EPSG:4326"           # soil PCO2 grid: geographic, 0.001 degree
PCO2_CELL_DEG = 0.001
PCO2_MARGIN_DEG = 0.01

CRS_PARCELS = "EPSG:4326"

LITH_NODATA = 255
FLOAT_NODATA = -9999.0

BLOCK = 256
GPKG_DATE = "2026-01-01T00:00:00Z"

ROCK_ROWS = (
    # code, name, mineral, density_g_cm3, purity   (science notes section 7)
    (0, "insoluble", "insoluble", 2.65, 1.0),
    (1, "limestone", "calcite", 2.60, 0.95),
    (2, "dolostone", "dolomite", 2.85, 0.95),
    (3, "gypsum", "gypsum", 2.31, 0.95),
    (4, "chalk", "calcite", 1.90, 0.97),
)
LITH_CLASSES = "0=insoluble cover;1=limestone;2=dolostone;3=gypsum;4=chalk"
LITH_COLOURS = {
    0: (190, 170, 130, 255),
    1: (120, 170, 220, 255),
    2: (90, 110, 190, 255),
    3: (230, 120, 200, 255),
    4: (240, 240, 225, 255),
}

STREAM_NAMES = (
    "Ashgrell Beck", "Brimmerdale Water", "Colvenny Burn", "Dathrow Brook", "Eskerlyn Beck",
    "Fennimoor Water", "Gallowrick Burn", "Hesketting Brook", "Ivetmere Beck",
)
LAND_USES = ("rough grazing", "hay meadow", "woodland", "quarry lease", "common")


# ---------------------------------------------------------------------------------------------
# The analytic region
# ---------------------------------------------------------------------------------------------
class Region:
    """Analytic fields of the demo region; coordinates are EPSG:32633 metres."""

    def __init__(self, seed: int):
        rng = np.random.default_rng(seed)
        self.relief = _wave_set(rng, 48, 600.0, 6_000.0)      # terrain roughness
        self.wobble = _wave_set(rng, 16, 2_000.0, 9_000.0)    # fold axis irregularity
        self.edge = _wave_set(rng, 24, 300.0, 2_500.0)        # ragged unit boundaries
        self.soil = _wave_set(rng, 24, 400.0, 4_000.0)        # soil CO2 patchiness
        self.wet = _wave_set(rng, 12, 3_000.0, 12_000.0)      # runoff patchiness
        self.rng = rng

    # Local km coordinates, origin at the region's south-west corner.
    @staticmethod
    def _uv(x, y):
        return (np.asarray(x, float) - WEST) / 1000.0, (np.asarray(y, float) - SOUTH) / 1000.0

    @staticmethod
    def _trunk_axis_v(u):
        """Trunk valley axis (km north of the south edge) at ``u`` km east."""
        return 3.2 + 0.9 * np.sin(2 * np.pi * u / 9.0 + 0.7) + 0.04 * u

    def valley_distance_km(self, x, y):
        """Distance-like measure to the nearest valley axis, km (two valleys)."""
        u, v = self._uv(x, y)
        # trunk valley, roughly west-east across the south of the region
        d1 = np.abs(v - self._trunk_axis_v(u))
        # tributary from the north, ending where it meets the trunk valley
        axis = 11.0 + 1.1 * np.sin(2 * np.pi * v / 7.5 + 1.9) - 0.12 * (v - 3.2)
        below = np.clip(self._trunk_axis_v(axis) - v, 0.0, None)
        d2 = np.hypot(u - axis, below)
        return np.minimum(d1, d2)

    def elevation_m(self, x, y):
        u, v = self._uv(x, y)
        dome = 1_050.0 * np.exp(-(((u - 9.5) / 9.0) ** 2 + ((v - 9.0) / 7.5) ** 2))
        knoll = 260.0 * np.exp(-(((u - 3.6) / 1.3) ** 2 + ((v - 11.8) / 1.1) ** 2))
        dv = self.valley_distance_km(x, y)
        # valleys deepen down-stream (towards the south and east)
        depth = 300.0 + 18.0 * u - 12.0 * np.clip(v - 3.0, 0, None)
        valleys = depth * np.exp(-(dv / 0.9) ** 2)
        rough = 70.0 * _waves(self.relief, x, y)
        z = 580.0 + dome + knoll - valleys + rough
        return z

    def temperature_c(self, z):
        """Mean annual air temperature, C: 15.3 C at sea level, lapse 6.5 C/km."""
        return 15.3 - 0.0065 * z

    def runoff_mm_per_yr(self, x, y, z):
        u, _ = self._uv(x, y)
        s = np.clip((z - 200.0) / 1_500.0, 0.0, 1.0)
        windward = 1.0 + 0.08 * (9.0 - u) / 9.0
        q = (150.0 + 1_020.0 * s ** 1.15) * windward * (1.0 + 0.04 * _waves(self.wet, x, y))
        return np.clip(q, 150.0, 1_200.0)

    def aet_mm_per_yr(self, z):
        """Actual evapotranspiration, mm/yr: about 520 mm/yr on the lowest ground, falling
        0.12 mm/yr per m with the cooler, shorter growing season above (invented)."""
        return np.clip(520.0 - 0.12 * z, 300.0, 520.0)

    def soil_pco2_ppmv(self, x, y, z):
        s = np.clip((z - 200.0) / 1_500.0, 0.0, 1.0)
        # valley soils about 10^4.4 ppmv; bare high ground near 10^3.1 ppmv
        log_p = 4.40 - 1.25 * s ** 1.3 + 0.12 * _waves(self.soil, x, y)
        return np.clip(10.0 ** log_p, 1_000.0, 30_000.0)

    def lithology(self, x, y):
        u, v = self._uv(x, y)
        strike = math.radians(32.0)
        s = u * math.cos(strike) + v * math.sin(strike)        # along strike, km
        n = -u * math.sin(strike) + v * math.cos(strike)       # across strike, km
        h = n + 1.1 * np.sin(2 * np.pi * s / 6.5 + 0.4) + 0.45 * _waves(self.wobble, x, y)
        # a normal fault, downthrown to the east
        fault = (u - 0.35 * v) > 10.5
        h = h + np.where(fault, 1.6, 0.0)
        band = np.mod(h, 6.0)
        code = np.full(np.shape(u), 1, dtype=np.uint8)                 # limestone
        code[(band >= 2.4) & (band < 3.9)] = 2                        # dolostone
        code[(band >= 3.9) & (band < 4.25)] = 0                       # thin shale band
        code[(band >= 5.1) & (band < 5.6)] = 2                        # dolomitised bed
        ragged = 0.18 * _waves(self.edge, x, y)
        # gypsum lens, elongated along strike
        cs, cn = 9.5 * math.cos(strike) + 10.8 * math.sin(strike), -9.5 * math.sin(strike) + 10.8 * math.cos(strike)
        lens = ((s - cs) / 1.7) ** 2 + ((n - cn) / 0.55) ** 2
        code[lens + ragged < 1.0] = 3
        # chalk outlier capping the knoll
        knoll = ((u - 3.6) / 1.15) ** 2 + ((v - 11.8) / 0.95) ** 2
        code[knoll + ragged < 1.0] = 4
        # insoluble valley fill
        dv = self.valley_distance_km(x, y)
        code[dv + 0.25 * ragged < 0.22] = 0
        return code

    def soluble_fraction(self, x, y, code):
        """Soluble-rock area fraction: thinner cover away from the valleys."""
        dv = self.valley_distance_km(x, y)
        f = 1.0 - 0.45 * np.exp(-((dv - 0.22) / 0.5) ** 2) - 0.06 * (1 + _waves(self.edge, x, y))
        f = np.clip(f, 0.3, 1.0)
        return np.where(code == 0, 0.0, f)


def _wave_set(rng, count, shortest_m, longest_m):
    """Random plane waves: wavenumber vectors, phases and amplitudes (amplitude ~ wavelength)."""
    wavelength = np.exp(rng.uniform(np.log(shortest_m), np.log(longest_m), count))
    angle = rng.uniform(0.0, np.pi, count)
    k = 2 * np.pi / wavelength
    kx, ky = k * np.cos(angle), k * np.sin(angle)
    phase = rng.uniform(0.0, 2 * np.pi, count)
    amp = wavelength ** 2 / np.sum(wavelength ** 2)      # red spectrum: long waves dominate
    amp = amp / np.sqrt(0.5 * np.sum(amp ** 2))   # unit standard deviation
    return kx, ky, phase, amp


def _waves(waves, x, y):
    """Evaluate a wave set at points; about unit standard deviation, softly limited to +-2.5."""
    kx, ky, phase, amp = waves
    x = np.asarray(x, float) - WEST
    y = np.asarray(y, float) - SOUTH
    out = np.zeros(np.broadcast(x, y).shape)
    for i in range(len(kx)):
        out += amp[i] * np.sin(kx[i] * x + ky[i] * y + phase[i])
    return 2.5 * np.tanh(out / 2.5)


# ---------------------------------------------------------------------------------------------
# Writing
# ---------------------------------------------------------------------------------------------
def _creation_options(dtype):
    return dict(
        driver="GTiff", tiled=True, blockxsize=BLOCK, blockysize=BLOCK,
        compress="deflate", zlevel=9, predictor=2 if dtype == "uint8" else 3,
        interleave="band",
    )


def _write_raster(path, array, crs, transform, nodata, units, description, extra_tags=None,
                  colormap=None):
    import rasterio

    dtype = str(array.dtype)
    profile = dict(
        width=array.shape[1], height=array.shape[0], count=1, dtype=dtype, crs=crs,
        transform=transform, nodata=nodata, **_creation_options(dtype),
    )
    with rasterio.Env(GDAL_PAM_ENABLED="NO"):      # no .aux.xml side files
        with rasterio.open(path, "w", **profile) as dst:
            dst.write(array, 1)
            dst.update_tags(units=units, region=REGION_NAME,
                            source="invented for the denude demo; not measured",
                            **(extra_tags or {}))
            dst.update_tags(1, units=units)
            dst.set_band_description(1, description)
            dst.units = (units,)
            if colormap:
                dst.write_colormap(1, colormap)


def _centres(transform, width, height, sub=1):
    """Cell-centre (or sub-cell) coordinates; returns arrays shaped (sub*sub, height, width)."""
    offs = (np.arange(sub) + 0.5) / sub
    cols = np.arange(width)
    rows = np.arange(height)
    xs, ys = [], []
    for oy in offs:
        for ox in offs:
            c, r = np.meshgrid(cols + ox, rows + oy)
            x = transform.c + c * transform.a + r * transform.b
            y = transform.f + c * transform.d + r * transform.e
            xs.append(x)
            ys.append(y)
    return np.stack(xs), np.stack(ys)


def _quantize(a, step):
    return (np.round(a / step) * step).astype(np.float32)


def make_rasters(region: Region, out: Path) -> dict:
    from pyproj import Transformer
    from rasterio.transform import from_origin

    info = {}
    # --- main 30 m grid -----------------------------------------------------------------
    t_main = from_origin(WEST, NORTH, CELL_M, CELL_M)
    x, y = _centres(t_main, N_COLS, N_ROWS)
    x, y = x[0], y[0]
    z = region.elevation_m(x, y)
    code = region.lithology(x, y)

    # a ragged strip of nodata cells at the east edge (an unmapped sliver)
    rng = region.rng
    nodata_mask = np.zeros(code.shape, bool)
    for r in range(140, 200):
        k = int(rng.integers(1, 4))
        nodata_mask[r, N_COLS - k:] = True
    code[nodata_mask] = LITH_NODATA

    frac = region.soluble_fraction(x, y, code)
    frac = _quantize(frac, 0.001)
    frac[nodata_mask] = FLOAT_NODATA

    q = _quantize(region.runoff_mm_per_yr(x, y, z), 0.1)
    # a small tarn where no runoff is defined
    u, v = (x - WEST) / 1000.0, (y - SOUTH) / 1000.0
    tarn = ((u - 6.2) / 0.12) ** 2 + ((v - 7.4) / 0.08) ** 2 < 1.0
    q[tarn] = FLOAT_NODATA

    zq = _quantize(z, 0.1)
    # the water balance behind the runoff: precipitation = runoff + AET (so P - AET = runoff)
    aet = _quantize(region.aet_mm_per_yr(z), 0.1)
    precip = _quantize(q + aet, 0.1)
    aet[tarn] = FLOAT_NODATA
    precip[tarn] = FLOAT_NODATA

    _write_raster(out / "lithology.tif", code, CRS_MAIN, t_main, LITH_NODATA, "category",
                  "lithology code", {"classes": LITH_CLASSES}, colormap=LITH_COLOURS)
    _write_raster(out / "elevation_m.tif", zq, CRS_MAIN, t_main, FLOAT_NODATA, "m",
                  "elevation above sea level")
    _write_raster(out / "runoff_mm_per_yr.tif", q, CRS_MAIN, t_main, FLOAT_NODATA, "mm/yr",
                  "mean annual runoff")
    _write_raster(out / "precipitation_mm_per_yr.tif", precip, CRS_MAIN, t_main, FLOAT_NODATA, "mm/yr",
                  "mean annual precipitation (runoff + AET)")
    _write_raster(out / "aet_mm_per_yr.tif", aet, CRS_MAIN, t_main, FLOAT_NODATA, "mm/yr",
                  "mean annual actual evapotranspiration")
    _write_raster(out / "soluble_fraction.tif", frac, CRS_MAIN, t_main, FLOAT_NODATA, "1",
                  "soluble-rock area fraction of the cell")
    info["main"] = dict(code=code, tarn_cells=int(tarn.sum()), nodata_cells=int(nodata_mask.sum()),
                        z_range=(float(zq.min()), float(zq.max())))

    # --- temperature: 250 m, same CRS, origin snapped to 250 m ----------------------------
    tw = math.floor((WEST - TEMP_MARGIN_M) / TEMP_CELL_M) * TEMP_CELL_M
    tn = math.ceil((NORTH + TEMP_MARGIN_M) / TEMP_CELL_M) * TEMP_CELL_M
    te = math.ceil((EAST + TEMP_MARGIN_M) / TEMP_CELL_M) * TEMP_CELL_M
    ts = math.floor((SOUTH - TEMP_MARGIN_M) / TEMP_CELL_M) * TEMP_CELL_M
    tcols, trows = int(round((te - tw) / TEMP_CELL_M)), int(round((tn - ts) / TEMP_CELL_M))
    t_temp = from_origin(tw, tn, TEMP_CELL_M, TEMP_CELL_M)
    xs, ys = _centres(t_temp, tcols, trows, sub=5)
    temp = region.temperature_c(region.elevation_m(xs, ys)).mean(axis=0)
    temp = _quantize(np.clip(temp, 4.0, 14.0), 0.01)
    _write_raster(out / "temperature_c.tif", temp, CRS_MAIN, t_temp, FLOAT_NODATA, "degC",
                  "mean annual air temperature")
    info["temp"] = (tcols, trows, (tw, ts, te, tn))

    # --- soil PCO2: geographic 0.001 degree ------------------------------------------------
    to_geo = Transformer.from_crs(CRS_MAIN, CRS_PCO2, always_xy=True)
    to_utm = Transformer.from_crs(CRS_PCO2, CRS_MAIN, always_xy=True)
    lon0, lat0, lon1, lat1 = to_geo.transform_bounds(WEST, SOUTH, EAST, NORTH, densify_pts=50)
    k = 1.0 / PCO2_CELL_DEG
    pw = math.floor((lon0 - PCO2_MARGIN_DEG) * k) / k
    pe = math.ceil((lon1 + PCO2_MARGIN_DEG) * k) / k
    ps = math.floor((lat0 - PCO2_MARGIN_DEG) * k) / k
    pn = math.ceil((lat1 + PCO2_MARGIN_DEG) * k) / k
    pcols, prows = int(round((pe - pw) * k)), int(round((pn - ps) * k))
    t_pco2 = from_origin(pw, pn, PCO2_CELL_DEG, PCO2_CELL_DEG)
    lons, lats = _centres(t_pco2, pcols, prows, sub=3)
    ux, uy = to_utm.transform(lons, lats)
    ux, uy = np.asarray(ux), np.asarray(uy)
    pco2 = region.soil_pco2_ppmv(ux, uy, region.elevation_m(ux, uy))
    pco2 = 10.0 ** np.log10(pco2).mean(axis=0)          # geometric mean of the sub-cells
    pco2 = _quantize(np.clip(pco2, 1_000.0, 30_000.0), 1.0)
    _write_raster(out / "soil_pco2_ppmv.tif", pco2, CRS_PCO2, t_pco2, FLOAT_NODATA, "ppmv",
                  "soil-air CO2 volume mixing ratio")
    info["pco2"] = (pcols, prows, (pw, ps, pe, pn))
    return info


def make_rock_table(out: Path):
    with (out / "rocks.csv").open("w", newline="", encoding="utf-8") as handle:
        writer = csv.writer(handle, lineterminator="\n")
        writer.writerow(["code", "name", "mineral", "density_g_cm3", "purity"])
        for row in ROCK_ROWS:
            writer.writerow(row)


def _write_layer(gdf, path, layer, first):
    import pyogrio

    pyogrio.set_gdal_config_options({"OGR_CURRENT_DATE": GPKG_DATE})
    try:
        gdf.to_file(path, layer=layer, driver="GPKG", engine="pyogrio",
                    mode="w" if first else "a")
    finally:
        pyogrio.set_gdal_config_options({"OGR_CURRENT_DATE": None})


def make_vectors(region: Region, out: Path, code: np.ndarray):
    import geopandas as gpd
    import shapely
    from shapely.geometry import MultiPoint, Point, box
    from shapely.affinity import rotate, scale

    rng = region.rng
    crs = CRS_MAIN

    # --- watersheds: Voronoi cells of jittered seeds, clipped to an inset region outline --
    seeds = []
    for j, vy in enumerate((0.2, 0.5, 0.8)):
        for i, ux in enumerate((0.17, 0.5, 0.83)):
            sx = WEST + (ux + rng.uniform(-0.08, 0.08)) * (EAST - WEST)
            sy = SOUTH + (vy + rng.uniform(-0.08, 0.08)) * (NORTH - SOUTH)
            seeds.append(Point(sx, sy))
    outline = box(WEST + 450, SOUTH + 450, EAST - 450, NORTH - 450)
    cells = shapely.voronoi_polygons(MultiPoint(seeds), extend_to=box(WEST, SOUTH, EAST, NORTH),
                                     ordered=True)
    polys = [shapely.set_precision(c.intersection(outline), 0.01) for c in cells.geoms]
    ws = gpd.GeoDataFrame(
        {"watershed_id": [f"WS{i + 1:02d}" for i in range(len(polys))],
         "name": list(STREAM_NAMES[: len(polys)])},
        geometry=polys, crs=crs,
    )

    # --- nested sub-watersheds of the largest watershed, plus one in another ---------------
    big = int(np.argmax(ws.area.values))
    parent = ws.geometry.iloc[big]
    c = parent.representative_point()
    ell = scale(Point(c.x, c.y).buffer(1.0, quad_segs=32), 2600, 1500)
    ell = rotate(ell, 25, origin=c)
    upper = parent.intersection(ell)
    inner = upper.intersection(rotate(scale(Point(c.x, c.y).buffer(1.0, quad_segs=32), 1200, 700),
                                      25, origin=c))
    other_i = (big + 4) % len(ws)
    other = ws.geometry.iloc[other_i]
    oc = other.representative_point()
    head = other.intersection(Point(oc.x, oc.y).buffer(1400, quad_segs=32))
    pname = ws.name.iloc[big]
    oname = ws.name.iloc[other_i]
    sub = gpd.GeoDataFrame(
        {"watershed_id": [f"{ws.watershed_id.iloc[big]}a", f"{ws.watershed_id.iloc[big]}a1",
                          f"{ws.watershed_id.iloc[other_i]}a"],
         "name": [f"Upper {pname}", f"{pname} Head Sike", f"Upper {oname}"],
         "parent_id": [ws.watershed_id.iloc[big], f"{ws.watershed_id.iloc[big]}a",
                       ws.watershed_id.iloc[other_i]]},
        geometry=[shapely.set_precision(g, 0.01) for g in (upper, inner, head)], crs=crs,
    )
    path = out / "watersheds.gpkg"
    _write_layer(ws, path, "watersheds", True)
    _write_layer(sub, path, "subwatersheds", False)

    # --- planning units: parcels over the north-east quarter, stored in EPSG:4326 ----------
    parcels, ids, uses = [], [], []
    px0, py0 = WEST + 9_300.0, SOUTH + 7_600.0
    n = 0
    for r in range(6):
        x = px0
        y0 = py0 + r * 1_050.0
        for _ in range(8):
            w = float(rng.uniform(700.0, 1_200.0))
            if x + w > EAST - 300:
                break
            if rng.uniform() < 0.12:          # a gap: land outside the scheme
                x += w
                continue
            h = float(rng.uniform(850.0, 1_050.0))
            skew = float(rng.uniform(-60.0, 60.0))
            poly = shapely.Polygon([(x, y0), (x + w, y0 + skew * 0.3), (x + w + skew, y0 + h),
                                    (x + skew * 0.5, y0 + h)])
            poly = shapely.segmentize(poly, 100.0)
            n += 1
            parcels.append(poly)
            ids.append(f"PU{n:03d}")
            uses.append(LAND_USES[int(rng.integers(len(LAND_USES)))])
            x += w
    pu = gpd.GeoDataFrame({"unit_id": ids, "land_use": uses}, geometry=parcels, crs=crs)
    pu = pu.to_crs(CRS_PARCELS)
    pu["geometry"] = shapely.set_precision(pu.geometry.values, 1e-7)
    _write_layer(pu, out / "planning_units.gpkg", "planning_units", True)

    # --- sinkholes: cells drawn with weights by lithology ----------------------------------
    weight_by_code = np.zeros(256)
    weight_by_code[[0, 1, 2, 3, 4]] = [0.03, 1.0, 0.35, 8.0, 0.4]
    w = weight_by_code[code.ravel()]
    count = 150
    cells_idx = rng.choice(w.size, size=count, replace=False, p=w / w.sum())
    rows, cols = np.divmod(cells_idx, N_COLS)
    sx = WEST + (cols + rng.uniform(0.1, 0.9, count)) * CELL_M
    sy = NORTH - (rows + rng.uniform(0.1, 0.9, count)) * CELL_M
    depth = np.round(rng.lognormal(np.log(3.0), 0.6, count), 1)
    order = np.lexsort((sx, -sy))
    sk = gpd.GeoDataFrame(
        {"sinkhole_id": [f"SH{i + 1:03d}" for i in range(count)],
         "depth_m": depth[order],
         "lithology_code": code.ravel()[cells_idx][order].astype(np.int32)},
        geometry=gpd.points_from_xy(np.round(sx[order], 2), np.round(sy[order], 2)), crs=crs,
    )
    _write_layer(sk, out / "sinkholes.gpkg", "sinkholes", True)
    return dict(watersheds=len(ws), subwatersheds=len(sub), planning_units=len(pu),
                sinkholes=len(sk), sinkhole_codes=np.bincount(sk.lithology_code, minlength=5))


def make_readme(out: Path, info: dict, vec: dict):
    code = info["main"]["code"]
    counts = {c: int((code == c).sum()) for c in (0, 1, 2, 3, 4, LITH_NODATA)}
    total = code.size
    share = ", ".join(
        f"{name} {100.0 * counts[c] / total:.1f} %"
        for c, name in ((1, "limestone"), (2, "dolostone"), (3, "gypsum"), (4, "chalk"),
                        (0, "insoluble"))
    )
    zr = [round(v, -1) for v in info["main"]["z_range"]]
    tcols, trows, tb = info["temp"]
    pcols, prows, pb = info["pco2"]
    text = f"""# Demo data: the {REGION_NAME}

**All data in this folder are invented for the `denude` demo. Nothing here is measured, and the
{REGION_NAME} and every stream name are fictional.** The files are written by
`scripts/make_demo_region.py` (seeded, no network); re-run it to regenerate them byte for byte:

    python scripts/make_demo_region.py            # into demo_rasters/
    python scripts/make_demo_region.py /tmp/demo  # anywhere else

## The region

The {REGION_NAME} is a small karst upland, 18 km x 15 km, rising from about {zr[0]:,.0f} m in
its valleys to about {zr[1]:,.0f} m on its central dome. Folded and faulted bands of limestone and
dolostone strike west-south-west to east-north-east, with thin insoluble shale bands; a normal fault
downthrown to the east offsets the bands. A gypsum lens lies just north of the dome's crest, a chalk
outlier caps a knoll in the north-west, and insoluble valley fill covers the floors of the
trunk valley (across the south) and its tributary (from the north). A ragged strip of
{info["main"]["nodata_cells"]} unmapped cells at the east edge is nodata in the lithology.
A small tarn ({info["main"]["tarn_cells"]} cells) has no runoff value.

Lithology shares of the grid: {share}.

## Grids

| file | CRS | cell | size (cols x rows) | dtype | nodata | units | content |
|---|---|---|---|---|---|---|---|
| `lithology.tif` | EPSG:32633 | 30 m | {N_COLS} x {N_ROWS} | uint8 | 255 | category | rock code (see `rocks.csv`); colour table; tag `classes` |
| `elevation_m.tif` | EPSG:32633 | 30 m | {N_COLS} x {N_ROWS} | float32 | -9999 | m | elevation above sea level |
| `runoff_mm_per_yr.tif` | EPSG:32633 | 30 m | {N_COLS} x {N_ROWS} | float32 | -9999 | mm/yr | mean annual runoff, 150-1200, rising with elevation |
| `precipitation_mm_per_yr.tif`, `aet_mm_per_yr.tif` | EPSG:32633 | 30 m | {N_COLS} x {N_ROWS} | float32 | -9999 | mm/yr | the water balance behind the runoff: AET 300-520 falling with elevation, precipitation = runoff + AET (the demo's warming scenario scales precipitation) |
| `soluble_fraction.tif` | EPSG:32633 | 30 m | {N_COLS} x {N_ROWS} | float32 | -9999 | 1 | soluble-rock area fraction, 0 on insoluble cover, 0.3-1 elsewhere (lower near valleys, under thin cover) |
| `temperature_c.tif` | EPSG:32633 | 250 m | {tcols} x {trows} | float32 | -9999 | degC | mean annual air temperature, 4-14, 15.3 - 6.5 per km of elevation |
| `soil_pco2_ppmv.tif` | EPSG:4326 | 0.001 deg | {pcols} x {prows} | float32 | -9999 | ppmv | soil-air CO2, 1000-30000, lower on high bare ground |

The 30 m grid spans x {WEST:.0f}-{EAST:.0f} m, y {SOUTH:.0f}-{NORTH:.0f} m (EPSG:32633, WGS 84 /
UTM zone 33N). The temperature grid (x {tb[0]:.0f}-{tb[2]:.0f}, y {tb[1]:.0f}-{tb[3]:.0f}) and
the PCO2 grid (lon {pb[0]:.3f}-{pb[2]:.3f}, lat {pb[1]:.3f}-{pb[3]:.3f}) cover the region with a
margin, on a different origin, resolution (and, for PCO2, CRS), so a run has to warp them.
Coarse cells are means of sub-cell samples (geometric mean for PCO2). PCO2 is a volume mixing
ratio; convert to atm with the local air pressure from `elevation_m.tif`.

All rasters are tiled GeoTIFFs ({BLOCK} x {BLOCK} blocks, DEFLATE), with the nodata value set
and a `units` tag (dataset and band).

## Tables and vectors

- `rocks.csv`: `code,name,mineral,density_g_cm3,purity` for codes 0-4 (densities from the
  science notes section 7; purities typical values, common practice, no source).
- `watersheds.gpkg`, layer `watersheds` (EPSG:32633): {vec["watersheds"]} polygons, fields
  `watershed_id` (`WS01`...) and `name`; Voronoi cells of jittered seeds clipped to the
  region inset by 450 m, so they partition most, not all, of the region. Layer
  `subwatersheds`: {vec["subwatersheds"]} polygons (`watershed_id`, `name`, `parent_id`), each
  inside its parent, so zones overlap: `...a` lies inside watershed `WS..`, and `...a1` is
  nested inside `...a`.
- `planning_units.gpkg`, layer `planning_units` (EPSG:4326): {vec["planning_units"]}
  parcel-like quadrilaterals over the north-east of the region, fields `unit_id` (`PU001`...)
  and `land_use`.
- `sinkholes.gpkg`, layer `sinkholes` (EPSG:32633): {vec["sinkholes"]} points, fields
  `sinkhole_id` (`SH001`...), `depth_m` and `lithology_code`; drawn mostly on limestone and
  gypsum (weights by rock type), a few on other rocks.
"""
    (out / "README.md").write_text(text, encoding="utf-8")


def main(argv=None):
    parser = argparse.ArgumentParser(description=f"Generate the {REGION_NAME} demo data.")
    parser.add_argument("out_dir", nargs="?", type=Path,
                        default=Path(__file__).resolve().parent.parent / "demo_rasters",
                        help="output folder (default: demo_rasters/ of the repository)")
    parser.add_argument("--seed", type=int, default=DEFAULT_SEED, help="random seed")
    args = parser.parse_args(argv)
    out = args.out_dir
    out.mkdir(parents=True, exist_ok=True)
    for name in ("watersheds.gpkg", "planning_units.gpkg", "sinkholes.gpkg"):
        (out / name).unlink(missing_ok=True)       # layers are appended to fresh files
    region = Region(args.seed)
    info = make_rasters(region, out)
    make_rock_table(out)
    vec = make_vectors(region, out, info["main"]["code"])
    make_readme(out, info, vec)
    print(f"wrote the {REGION_NAME} demo data to {out}")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
