"""A catalogue of bad inputs and faults thrown at the real CLI (typer's CliRunner on the app).

Every case asserts: exit code 1 (2 for usage errors), exactly one line on stderr that starts
with ``denude: error:`` and names the file and the value, no traceback, nothing written under
the output name or beside it (no staging folders), and every file in the working folders
unchanged (SHA-256 of each file before and after).

Each case is a ``Case``: an id, a function that builds the arguments from the ``Env`` (which
writes the bad file it needs), the words the error line must hold, and the output name.
"""

from __future__ import annotations

import hashlib
import shutil
from dataclasses import dataclass
from pathlib import Path
from typing import Callable

import numpy as np
import pytest
import rasterio
from rasterio.transform import from_origin
from typer.testing import CliRunner

from denude.cli.main import app

CRS = "EPSG:32632"
ORIGIN = (400000.0, 5200000.0)
RES = 100.0
SHAPE = (32, 48)


def write_tif(path: Path, data, nodata=None, crs=CRS, origin=ORIGIN, res=RES, tiled=True, compress="deflate"):
    """A single-band GeoTIFF (16 x 16 blocks) on the catalogue's grid."""
    data = np.asarray(data)
    profile = dict(driver="GTiff", width=data.shape[1], height=data.shape[0], count=1, dtype=data.dtype,
                   transform=from_origin(origin[0], origin[1], res, res), nodata=nodata)
    if crs is not None:
        profile["crs"] = crs
    if tiled:
        profile.update(tiled=True, blockxsize=16, blockysize=16)
    if compress:
        profile["compress"] = compress
    with rasterio.open(path, "w", **profile) as ds:
        ds.write(data, 1)
    return path


def good_fields():
    """Lithology codes 0-5 and smooth runoff [mm/yr], PCO2 [atm], temperature [degrees C]."""
    rows, cols = SHAPE
    yy, xx = np.mgrid[0:rows, 0:cols]
    codes = ((xx // 8 + yy // 8) % 6).astype(np.int16)
    runoff = (300.0 + 5.0 * xx).astype(np.float32)
    pco2 = (10 ** (-2.5 + 0.01 * xx)).astype(np.float32)
    temperature = (4.0 + 0.2 * yy).astype(np.float32)
    return codes, runoff, pco2, temperature


def polygons_frame(n=2, crs=CRS, bowtie=False):
    import geopandas
    import shapely

    x0, y0 = ORIGIN
    geoms = [shapely.box(x0 + 200 + i * 2000, y0 - 3000, x0 + 2000 + i * 2000, y0 - 200) for i in range(n)]
    if bowtie:
        geoms[0] = shapely.Polygon([(x0 + 200, y0 - 3000), (x0 + 2000, y0 - 200), (x0 + 2000, y0 - 3000),
                                    (x0 + 200, y0 - 200)])
    return geopandas.GeoDataFrame({"basin": [f"b{i}" for i in range(n)]}, geometry=geoms, crs=crs)


class Env:
    """The working folder of one case: good inputs, a finished map folder, and bad-file makers."""

    def __init__(self, tmp: Path, map_dir: Path):
        self.tmp = tmp
        self.inputs = tmp / "in"
        self.inputs.mkdir()
        codes, runoff, pco2, temperature = good_fields()
        self.p = {
            "lithology": write_tif(self.inputs / "lithology.tif", codes, nodata=-1),
            "runoff": write_tif(self.inputs / "runoff.tif", runoff, nodata=-9999.0),
            "pco2": write_tif(self.inputs / "pco2.tif", pco2, nodata=np.nan),
            "temperature": write_tif(self.inputs / "temperature.tif", temperature, nodata=np.nan),
        }
        self.map_dir = tmp / "mapped"
        shutil.copytree(map_dir, self.map_dir)
        zones = self.inputs / "zones.gpkg"
        polygons_frame().to_file(zones, layer="basins", driver="GPKG")
        self.p["zones"] = zones
        self.out = tmp / "out"

    # ---- bad files
    def text(self, name, content="this is not what you think\n"):
        path = self.inputs / name
        path.write_text(content)
        return path

    def raw(self, name, content: bytes):
        path = self.inputs / name
        path.write_bytes(content)
        return path

    def raster(self, name, data, **kw):
        return write_tif(self.inputs / name, np.asarray(data), **kw)

    def full(self, name, value, dtype=np.float32, **kw):
        return self.raster(name, np.full(SHAPE, value, dtype), **kw)

    def truncated(self, name, source="runoff", keep=0.6):
        """A copy of a good GeoTIFF cut to ``keep`` of its bytes (header intact, tiles lost)."""
        data = Path(self.p[source]).read_bytes()
        return self.raw(name, data[: int(len(data) * keep)])

    def corrupt_tiles(self, name, source="runoff"):
        """A GeoTIFF whose header is intact but whose compressed tiles are garbage."""
        path = self.inputs / name
        shutil.copy(self.p[source], path)
        with rasterio.open(path) as ds:
            offsets = [int(ds.get_tag_item("BLOCK_OFFSET_%d_%d" % (j, i), "TIFF", bidx=1))
                       for i in range(-(-ds.height // 16)) for j in range(-(-ds.width // 16))]
        data = bytearray(path.read_bytes())
        for off in offsets:
            data[off:off + 12] = b"\xde\xad\xbe\xef" * 3
        path.write_bytes(bytes(data))
        return path

    def vector(self, name, frame, **kw):
        path = self.inputs / name
        frame.to_file(path, **kw)
        return path

    # ---- argument builders
    def map_args(self, command="map", out=None, extra=(), **roles):
        values = {**{k: self.p[k] for k in ("lithology", "runoff", "pco2", "temperature")}, **roles}
        args = [command]
        for role, value in values.items():
            if value is not None:
                args += [f"--{role.replace('_', '-')}", value]
        if command == "map" or command == "batch":
            args += ["--out", out or self.out]
        args += ["--block-size", 16, *extra]
        return args

    def batch_args(self, extra=(), **roles):
        return self.map_args("batch", extra=("--tile-size", 16, "--workers", 0, "--quiet", *extra), **roles)

    def summarize_args(self, map_dir=None, zones=None, out=None, extra=()):
        return ["summarize", map_dir or self.map_dir, "--zones", zones or self.p["zones"],
                "--out", out or self.tmp / "summary.gpkg", "--quiet", *extra]

    def job(self, name, text):
        return self.text(name, text)


@pytest.fixture(scope="session")
def finished_map(tmp_path_factory):
    """A `denude map` output folder of the catalogue's good inputs (read-only for the cases)."""
    base = tmp_path_factory.mktemp("catalogue-map")
    codes, runoff, pco2, temperature = good_fields()
    args = ["map", "--lithology", write_tif(base / "l.tif", codes, nodata=-1),
            "--runoff", write_tif(base / "r.tif", runoff), "--pco2", write_tif(base / "p.tif", pco2),
            "--temperature", write_tif(base / "t.tif", temperature), "--out", base / "mapped",
            "--block-size", 16, "--quiet"]
    result = CliRunner().invoke(app, [str(a) for a in args])
    assert result.exit_code == 0, result.output
    return base / "mapped"


@pytest.fixture
def env(tmp_path, finished_map):
    return Env(tmp_path, finished_map)


def snapshot(folder: Path) -> dict:
    """Relative path -> SHA-256 of every file under ``folder`` (folders as None)."""
    found = {}
    for path in sorted(folder.rglob("*")):
        rel = str(path.relative_to(folder))
        found[rel] = hashlib.sha256(path.read_bytes()).hexdigest() if path.is_file() else None
    return found


@dataclass(frozen=True)
class Case:
    id: str
    args: Callable[[Env], list]
    words: tuple                   # substrings of the one error line (file and value among them)
    out: str = "out"               # name under the case folder that must not appear
    code: int = 1
    xfail: str | None = None       # reason, only where the fix lies in files being restructured

    def param(self):
        marks = [pytest.mark.xfail(strict=True, reason=self.xfail)] if self.xfail else []
        return pytest.param(self, id=self.id, marks=marks)


_ROCKS_HEAD = "code,name,mineral,density_g_cm3,purity\n"
_ROCKS_OK = "0,cover,insoluble,2.6,1\n1,lime,calcite,2.6,0.95\n2,dolo,dolomite,2.85,0.95\n3,gyp,gypsum,2.3,0.95\n4,chalk,calcite,1.9,0.97\n5,marble,calcite,2.7,0.98\n"
_AUX_NODATA = ('<PAMDataset><PAMRasterBand band="1"><NoDataValue>{value}</NoDataValue></PAMRasterBand></PAMDataset>\n')


def _with_aux_nodata(e: Env, value):
    path = e.raster("runoff_u8.tif", np.full(SHAPE, 200, np.uint8))
    (e.inputs / "runoff_u8.tif.aux.xml").write_text(_AUX_NODATA.format(value=value))
    return path


MAP_CASES = [
    # ---- raster files that are not what they claim
    Case("map-runoff-missing", lambda e: e.map_args(runoff=e.inputs / "nothing.tif"), ("nothing.tif", "not found")),
    Case("map-runoff-text", lambda e: e.map_args(runoff=e.text("notes.tif")), ("notes.tif", "not a readable raster")),
    Case("map-runoff-empty-file", lambda e: e.map_args(runoff=e.raw("empty.tif", b"")), ("empty.tif", "not a readable raster")),
    Case("map-runoff-truncated", lambda e: e.map_args(runoff=e.truncated("cut.tif")), ("cut.tif", "runoff")),
    Case("map-runoff-corrupt-tiles", lambda e: e.map_args(runoff=e.corrupt_tiles("garbled.tif")), ("garbled.tif", "runoff")),
    Case("map-lithology-truncated", lambda e: e.map_args(lithology=e.truncated("cutlith.tif", "lithology")), ("cutlith.tif", "lithology")),
    Case("map-temperature-corrupt-tiles", lambda e: e.map_args(temperature=e.corrupt_tiles("tgarble.tif", "temperature")), ("tgarble.tif", "temperature")),
    Case("map-pco2-png-bytes", lambda e: e.map_args(pco2=e.raw("p.tif", b"\x89PNG\r\n\x1a\n" + b"\x00" * 40)), ("p.tif", "not a readable raster")),
    Case("map-lithology-text", lambda e: e.map_args(lithology=e.text("lith.tif")), ("lith.tif", "not a readable raster")),
    Case("map-lithology-missing", lambda e: e.map_args(lithology=e.inputs / "gone.tif"), ("gone.tif", "not found")),
    Case("map-runoff-no-crs", lambda e: e.map_args(runoff=e.full("nocrs.tif", 500, crs=None)), ("nocrs.tif", "no CRS")),
    Case("map-runoff-far-away", lambda e: e.map_args(runoff=e.full("far.tif", 500, origin=(100000.0, 1000000.0))), ("far.tif", "does not overlap")),
    Case("map-runoff-nodata-out-of-dtype", lambda e: e.map_args(runoff=_with_aux_nodata(e, -9999)), ("runoff_u8.tif", "-9999", "uint8")),
    Case("map-runoff-nodata-out-of-dtype-big", lambda e: e.map_args(runoff=_with_aux_nodata(e, 70000)), ("runoff_u8.tif", "70000", "uint8")),
    # ---- values that are wrong
    Case("map-runoff-negative", lambda e: e.map_args(runoff=e.full("neg.tif", -20)), ("neg.tif", "-20", "mm/yr")),
    Case("map-runoff-metres", lambda e: e.map_args(runoff=e.full("rm.tif", 0.5)), ("rm.tif", "0.5", "m/yr")),
    Case("map-runoff-huge", lambda e: e.map_args(runoff=e.full("rbig.tif", 90000)), ("rbig.tif", "90000")),
    Case("map-runoff-constant-huge", lambda e: e.map_args(runoff="50000"), ("50000", "mm/yr")),
    Case("map-runoff-all-nodata", lambda e: e.map_args(runoff=e.full("void.tif", -9999, nodata=-9999)), ("void.tif", "nodata")),
    Case("map-temperature-kelvin", lambda e: e.map_args(temperature=e.full("kelvin.tif", 283.0)), ("kelvin.tif", "283", "kelvin")),
    Case("map-temperature-nan", lambda e: e.map_args(temperature="nan"), ("temperature", "finite")),
    Case("map-temperature-inf-constant", lambda e: e.map_args(temperature="inf"), ("temperature", "inf")),
    Case("map-pco2-ppmv-without-units", lambda e: e.map_args(pco2="400"), ("400", "--pco2-units ppmv")),
    Case("map-pco2-negative-constant", lambda e: e.map_args(pco2="-0.01"), ("-0.01", "pco2")),
    Case("map-pco2-above-one-atm", lambda e: e.map_args(pco2=e.full("p2.tif", 2.5)), ("p2.tif", "2.5")),
    Case("map-soluble-fraction-above-one", lambda e: e.map_args(soluble_fraction=e.full("sf.tif", 3.0)), ("sf.tif", "3")),
    Case("map-lithology-unknown-code", lambda e: e.map_args(lithology=e.full("c42.tif", 42, np.int16)), ("c42.tif", "42", "not in the rock table")),
    Case("map-lithology-float-codes", lambda e: e.map_args(lithology=e.full("fc.tif", 2.4)), ("fc.tif", "non-integer code 2.4")),
    # ---- rock tables
    Case("map-rocks-missing", lambda e: e.map_args(extra=("--rocks", e.inputs / "rocks.csv")), ("rocks.csv", "not found")),
    Case("map-rocks-missing-column", lambda e: e.map_args(extra=("--rocks", e.text("r1.csv", "code,name\n1,lime\n"))), ("r1.csv", "mineral")),
    Case("map-rocks-bad-mineral", lambda e: e.map_args(extra=("--rocks", e.text("r2.csv", _ROCKS_HEAD + "1,salt,halite,2.1,1\n"))), ("r2.csv", "halite")),
    Case("map-rocks-negative-density", lambda e: e.map_args(extra=("--rocks", e.text("r3.csv", _ROCKS_HEAD + "1,lime,calcite,-2.6,1\n"))), ("r3.csv", "-2.6")),
    Case("map-rocks-purity-text", lambda e: e.map_args(extra=("--rocks", e.text("r4.csv", _ROCKS_HEAD + "1,lime,calcite,2.6,pure\n"))), ("r4.csv", "pure")),
    Case("map-rocks-duplicate-code", lambda e: e.map_args(extra=("--rocks", e.text("r5.csv", _ROCKS_HEAD + _ROCKS_OK + "1,again,calcite,2.6,1\n"))), ("r5.csv", "1")),
    Case("map-rocks-binary", lambda e: e.map_args(extra=("--rocks", e.raw("r6.csv", b"\xff\xfe\x00\x81garbage\x00"))), ("r6.csv",)),
    # ---- job files
    Case("map-job-missing", lambda e: e.map_args(extra=("--job", e.inputs / "job.toml")), ("job.toml", "not found")),
    Case("map-job-bad-toml", lambda e: e.map_args(extra=("--job", e.job("j1.toml", "[inputs\nrunoff = 5\n"))), ("j1.toml",)),
    Case("map-job-unknown-key", lambda e: e.map_args(extra=("--job", e.job("j2.toml", "[inputs]\ntemprature = 5\n"))), ("j2.toml", "temprature", "did you mean 'temperature'")),
    Case("map-job-binary", lambda e: e.map_args(extra=("--job", e.raw("j3.toml", b"\x00\xff\xfe\x80" * 8))), ("j3.toml",)),
    Case("map-job-wrong-type", lambda e: e.map_args(extra=("--job", e.job("j4.toml", "[run]\nblock_size = \"big\"\n"))), ("j4.toml", "big")),
    # ---- options
    Case("map-lithology-bilinear", lambda e: e.map_args(extra=("--lithology-resampling", "bilinear")), ("bilinear", "refused")),
    Case("map-chemistry-typo", lambda e: e.map_args(extra=("--chemistry", "whte")), ("whte", "did you mean 'white'")),
    Case("map-pco2-units-unknown", lambda e: e.map_args(extra=("--pco2-units", "furlongs")), ("furlongs",)),
    Case("map-negative-runoff-choice", lambda e: e.map_args(extra=("--negative-runoff", "maybe")), ("maybe",)),
    Case("map-layers-typo", lambda e: e.map_args(extra=("--layers", "denudation,hazzard")), ("hazzard",)),
    Case("map-grid-crs-garbage", lambda e: e.map_args(extra=("--grid-crs", "EPSG:999999", "--grid-resolution", "100")), ("EPSG:999999",)),
    Case("map-grid-bounds-alone", lambda e: e.map_args(extra=("--grid-bounds", "400000 5196800 404800 5200000")), ("--grid-crs and --grid-resolution",)),
    Case("map-resolution-typo", lambda e: e.map_args(extra=("--grid-crs", CRS, "--grid-resolution", "1", "--grid-bounds", "400000 5196800 404800 5200000")), ("resolution",)),
    Case("map-block-size-odd", lambda e: e.map_args(extra=("--block-size", "7")), ("7",)),
    # ---- the output
    Case("map-out-exists", lambda e: (e.out.mkdir(), (e.out / "keep.txt").write_text("x"), e.map_args())[-1], ("out", "already exists", "--overwrite")),
    Case("map-out-is-a-file", lambda e: e.map_args(out=e.text("outfile")), ("outfile",), out="in/outfile.never"),
    Case("map-out-parent-missing", lambda e: e.map_args(out=e.tmp / "no" / "such" / "out"), ("no",), out="no"),
    Case("map-input-inside-out", lambda e: e.map_args(out=e.inputs, extra=("--overwrite",)), ("inside (or equal to) the output folder",), out="in/never"),
    Case("check-runoff-truncated", lambda e: e.map_args("check", runoff=e.truncated("cut.tif")), ("cut.tif", "runoff")),
    Case("check-lithology-text", lambda e: e.map_args("check", lithology=e.text("lith.tif")), ("lith.tif", "not a readable raster")),
    Case("check-job-unknown-section", lambda e: e.map_args("check", extra=("--job", e.job("j.toml", "[inputz]\nrunoff = 5\n"))), ("j.toml", "inputz")),
    Case("check-nodata-out-of-dtype", lambda e: e.map_args("check", runoff=_with_aux_nodata(e, -9999)), ("runoff_u8.tif", "-9999", "uint8")),
]

SITE = ["site", "--temperature", "10", "--pco2", "0.01", "--rock", "limestone"]
SITE_CASES = [
    Case("site-negative-runoff", lambda e: SITE + ["--runoff", "-50"], ("-50", "runoff")),
    Case("site-pco2-not-a-number", lambda e: ["site", "--temperature", "10", "--pco2", "lots", "--runoff", "500"], ("lots",)),
    Case("site-pco2-above-one", lambda e: ["site", "--temperature", "10", "--pco2", "3", "--runoff", "500"], ("3", "atm")),
    Case("site-rock-unknown", lambda e: SITE + ["--runoff", "500", "--rock", "basalt"], ("basalt",)),
    Case("site-no-runoff", lambda e: SITE, ("runoff",)),
    Case("site-temperature-boiling", lambda e: ["site", "--temperature", "150", "--pco2", "0.01", "--runoff", "500"], ("150",)),
    Case("site-elevation-and-pressure", lambda e: ["site", "--temperature", "10", "--pco2", "4000", "--pco2-units", "ppmv", "--elevation", "500", "--air-pressure", "0.9", "--runoff", "500"], ("--elevation", "--air-pressure")),
    Case("site-rocks-bad-csv", lambda e: SITE + ["--runoff", "500", "--rocks", e.text("r.csv", "code,name\n")], ("r.csv", "mineral")),
    Case("site-runoff-nan", lambda e: SITE + ["--runoff", "nan"], ("runoff", "nan")),
]


def _points(e: Env):
    import geopandas
    import shapely

    x0, y0 = ORIGIN
    return geopandas.GeoDataFrame({"n": [1, 2]}, geometry=[shapely.Point(x0 + 500, y0 - 500), shapely.Point(x0 + 900, y0 - 900)], crs=CRS)


def _two_layers(e: Env):
    path = e.inputs / "two.gpkg"
    polygons_frame().to_file(path, layer="a", driver="GPKG")
    polygons_frame().to_file(path, layer="b", driver="GPKG")
    return path


def _no_crs_shapefile(e: Env):
    path = e.vector("nocrs.shp", polygons_frame())
    path.with_suffix(".prj").unlink()
    return path


def _broken_map(e: Env, name="denudation_mm_per_kyr.tif", keep=0.5):
    target = e.map_dir / name
    data = target.read_bytes()
    target.write_bytes(data[: int(len(data) * keep)])
    return e.map_dir


SUMMARIZE_CASES = [
    Case("summarize-zones-text", lambda e: e.summarize_args(zones=e.text("zones.geojson")), ("zones.geojson", "not a readable vector file"), out="summary.gpkg"),
    Case("summarize-zones-empty-file", lambda e: e.summarize_args(zones=e.raw("zones0.gpkg", b"")), ("zones0.gpkg",), out="summary.gpkg"),
    Case("summarize-zones-binary", lambda e: e.summarize_args(zones=e.raw("zb.gpkg", b"SQLite format 3\x00" + b"\x17" * 300)), ("zb.gpkg",), out="summary.gpkg"),
    Case("summarize-zones-csv-table", lambda e: e.summarize_args(zones=e.text("basins.csv", "basin,area\nb0,3\n")), ("basins.csv", "no geometry"), out="summary.gpkg"),
    Case("summarize-zones-folder", lambda e: e.summarize_args(zones=e.inputs), ("in", "is a directory"), out="summary.gpkg", code=2),
    Case("summarize-zones-empty-layer", lambda e: e.summarize_args(zones=e.vector("ez.gpkg", polygons_frame().iloc[:0], layer="z", driver="GPKG")), ("ez.gpkg", "empty"), out="summary.gpkg"),
    Case("summarize-zones-are-points", lambda e: e.summarize_args(zones=e.vector("pts.gpkg", _points(e), driver="GPKG")), ("pts.gpkg", "Point", "polygons"), out="summary.gpkg"),
    Case("summarize-zones-no-crs", lambda e: e.summarize_args(zones=_no_crs_shapefile(e)), ("nocrs.shp", "no CRS"), out="summary.gpkg"),
    Case("summarize-zones-two-layers", lambda e: e.summarize_args(zones=_two_layers(e)), ("two.gpkg", "2 layers"), out="summary.gpkg"),
    Case("summarize-zones-id-missing", lambda e: e.summarize_args(extra=("--id-field", "nope")), ("zones.gpkg", "nope"), out="summary.gpkg"),
    Case("summarize-zones-duplicate-ids", lambda e: e.summarize_args(zones=e.vector("dup.gpkg", polygons_frame().assign(basin="same"), driver="GPKG"), extra=("--id-field", "basin")), ("dup.gpkg", "same"), out="summary.gpkg"),
    Case("summarize-out-not-gpkg", lambda e: e.summarize_args(out=e.tmp / "summary.csv"), ("summary.csv", ".gpkg"), out="summary.csv"),
    Case("summarize-out-folder-missing", lambda e: e.summarize_args(out=e.tmp / "nowhere" / "s.gpkg"), ("nowhere",), out="nowhere"),
    Case("summarize-map-folder-missing", lambda e: e.summarize_args(map_dir=e.tmp / "nomap"), ("nomap", "does not exist"), out="summary.gpkg", code=2),
    Case("summarize-map-folder-empty", lambda e: (e.tmp.joinpath("emptymap").mkdir(), e.summarize_args(map_dir=e.tmp / "emptymap"))[-1], ("emptymap",), out="summary.gpkg"),
    Case("summarize-map-raster-truncated", lambda e: e.summarize_args(map_dir=_broken_map(e)), ("denudation_mm_per_kyr.tif", "cannot be read"), out="summary.gpkg"),
    Case("summarize-points-are-polygons", lambda e: e.summarize_args(extra=("--points", e.p["zones"])), ("zones.gpkg", "Polygon", "points"), out="summary.gpkg"),
    Case("summarize-points-text", lambda e: e.summarize_args(extra=("--points", e.text("holes.gpkg"))), ("holes.gpkg", "not a readable vector file"), out="summary.gpkg"),
    Case("summarize-units-empty-file", lambda e: e.summarize_args(extra=("--units", e.raw("parcels.gpkg", b""))), ("parcels.gpkg",), out="summary.gpkg"),
]

BATCH_CASES = [
    Case("batch-tile-size-odd", lambda e: e.batch_args(extra=("--tile-size", "20")), ("20", "16")),
    Case("batch-runoff-text", lambda e: e.batch_args(runoff=e.text("notes.tif")), ("notes.tif", "not a readable raster")),
    Case("batch-runoff-truncated", lambda e: e.batch_args(runoff=e.truncated("cut.tif")), ("cut.tif", "runoff")),
    Case("batch-zones-missing", lambda e: e.batch_args(extra=("--zones", e.inputs / "gone.gpkg")), ("gone.gpkg", "not found")),
    Case("batch-zones-text", lambda e: e.batch_args(extra=("--zones", e.text("z.gpkg"))), ("z.gpkg", "not a readable vector file")),
    Case("batch-retries-negative", lambda e: e.batch_args(extra=("--retries", "-3")), ("-3", "retries")),
    Case("batch-workers-huge", lambda e: e.batch_args(extra=("--workers", "5000")), ("5000", "workers")),
    Case("batch-scheduler-garbage", lambda e: e.batch_args(extra=("--scheduler", "not an address at all")), ("not an address at all", "scheduler")),
    Case("batch-scheduler-bad-port", lambda e: e.batch_args(extra=("--scheduler", "tcp://127.0.0.1:99999")), ("tcp://127.0.0.1:99999",)),
    Case("batch-scheduler-unknown-scheme", lambda e: e.batch_args(extra=("--scheduler", "gopher://127.0.0.1:8786")), ("gopher://127.0.0.1:8786",)),
    Case("batch-job-unknown-key", lambda e: ["batch", "--job", e.job("b.toml", "[batch]\ntile_sise = 16\n"), "--out", e.out], ("b.toml", "tile_sise")),
]

DEMO_CASES = [
    Case("demo-data-missing", lambda e: ["demo", e.out, "--data", e.tmp / "nodata"], ("nodata",)),
    Case("demo-out-exists", lambda e: (e.out.mkdir(), (e.out / "x").write_text("x"), ["demo", e.out, "--quiet"])[-1], ("out", "exists")),
    Case("demo-chemistry-typo", lambda e: ["demo", e.out, "--chemistry", "speciatd", "--quiet"], ("speciatd",)),
]

ALL_CASES = MAP_CASES + SITE_CASES + SUMMARIZE_CASES + BATCH_CASES + DEMO_CASES


def test_catalogue_is_large_and_ids_unique():
    ids = [c.id for c in ALL_CASES]
    assert len(ids) == len(set(ids))
    assert len(ids) >= 60


def _error_line(result) -> str:
    assert "Traceback" not in result.output and "Traceback" not in (result.stderr or "")
    lines = [line for line in result.stderr.splitlines() if line.strip()]
    errors = [line for line in lines if line.startswith(("denude: error:", "denude: usage error:"))]
    assert len(errors) == 1, result.stderr
    others = [line for line in lines if line not in errors and not line.startswith("denude: warning:")]
    assert others == [], result.stderr
    return errors[0]


@pytest.mark.parametrize("case", [c.param() for c in ALL_CASES])
def test_bad_input(env, case):
    args = [str(a) for a in case.args(env)]
    before = snapshot(env.tmp)
    result = CliRunner().invoke(app, args)
    assert result.exception is None or isinstance(result.exception, SystemExit), repr(result.exception)
    assert result.exit_code == case.code, (result.exit_code, result.output)
    line = _error_line(result)
    for word in case.words:
        assert word in line, (word, line)
    assert snapshot(env.tmp) == before       # nothing written, nothing touched, no staging left
    assert not (env.tmp / case.out).exists() or case.out in before


def test_self_intersecting_zone_is_repaired_with_one_warning(env):
    zones = env.vector("bowtie.gpkg", polygons_frame(bowtie=True), layer="basins", driver="GPKG")
    result = CliRunner().invoke(app, [str(a) for a in env.summarize_args(zones=zones, extra=("--id-field", "basin"))])
    assert result.exit_code == 0, result.output
    warnings = [line for line in result.stderr.splitlines() if line.startswith("denude: warning:")]
    assert len(warnings) == 1, result.stderr
    assert "bowtie.gpkg" in warnings[0] and "1 invalid zone polygon(s) repaired" in warnings[0]
    assert "basin 'b0'" in warnings[0] and "Self-intersection" in warnings[0]
    assert "repaired" not in result.stdout                 # said once: the warning, not a second stdout line
    assert (env.tmp / "summary.gpkg").exists()
