"""`denude report` and the GIS-ready styling of the outputs, on the demo region.

The browser test drives Debian's ``chromium`` through its DevTools protocol on 127.0.0.1
(websocket-client), with a recording proxy on 127.0.0.1 so any request that tried to leave the
machine is seen. CI installs chromium (.ci/run), so the test never skips there.
"""

import base64
import ctypes
import glob
import io
import json
import os
import re
import shutil
import socket
import sqlite3
import subprocess
import threading
import time
import xml.etree.ElementTree as ET
from html.parser import HTMLParser
from pathlib import Path

import numpy as np
import pytest
import rasterio
from PIL import Image
from typer.testing import CliRunner

from denude.cautions import CAUTION
from denude.cli.main import app
from denude.core.hazard import dominant_and_highest
from denude.io.styles import read_category_names, smallest_code_type

runner = CliRunner()
#: Figures of the sections the demo's other outputs add (uncertainty, scenario, calibration, sinkholes).
SECTION_FIGURES = ("uncertainty_band", "scenario_difference", "calibration_bars", "calibration_expected",
                   "sinkhole_density")
SLD = "{http://www.opengis.net/sld}"


@pytest.fixture(scope="module")
def demo(tmp_path_factory):
    out = tmp_path_factory.mktemp("report") / "demo"
    result = runner.invoke(app, ["demo", str(out), "--quiet"])
    assert result.exit_code == 0, result.output
    return out


class PageParser(HTMLParser):
    """Collects <img> attributes, and the cells of every table marked data-table."""

    def __init__(self):
        super().__init__()
        self.images, self.tables = [], {}
        self._table = None
        self._row = None
        self._cell = None

    def handle_starttag(self, tag, attrs):
        attrs = dict(attrs)
        if tag == "img":
            self.images.append(attrs)
        elif tag == "table" and "data-table" in attrs:
            self._table = self.tables.setdefault(attrs["data-table"], [])
        elif tag == "tr" and self._table is not None:
            self._row = []
        elif tag in ("td", "th") and self._row is not None:
            self._cell = [attrs.get("data-value"), ""]

    def handle_data(self, data):
        if self._cell is not None:
            self._cell[1] += data

    def handle_endtag(self, tag):
        if tag in ("td", "th") and self._cell is not None:
            self._row.append(tuple(self._cell))
            self._cell = None
        elif tag == "tr" and self._row is not None:
            self._table.append(self._row)
            self._row = None
        elif tag == "table":
            self._table = None


def parse(html):
    parser = PageParser()
    parser.feed(html)
    return parser


# ------------------------------------------------------------------------------ the page
def test_demo_report_is_self_contained(demo):
    html = (demo / "report.html").read_text(encoding="utf-8")
    assert "http://" not in html and "https://" not in html
    assert CAUTION in html and "not a site investigation" in html
    page = parse(html)
    names = {img["data-figure"] for img in page.images}
    assert names == {"rate_map", "hazard_map", "zones_mean_rate", "zones_rock_volume", "units_top_share", "rock_histogram",
                     *SECTION_FIGURES}
    for img in page.images:
        assert img["src"].startswith("data:image/png;base64,")
        picture = Image.open(io.BytesIO(base64.b64decode(img["src"].split(",", 1)[1])))
        picture.load()
        assert picture.size == (int(img["width"]), int(img["height"]))
        # the same figure is written as a PNG beside the page
        twin = Image.open(demo / "report_figures" / f"{img['data-figure']}.png")
        assert twin.size == picture.size
        assert np.asarray(picture.convert("L")).std() > 5      # not a blank picture


def test_report_tables_equal_the_summary(demo):
    import geopandas

    page = parse((demo / "report.html").read_text(encoding="utf-8"))
    zones = geopandas.read_file(demo / "watershed_summary.gpkg", layer="watersheds").set_index("watershed_id")
    units = geopandas.read_file(demo / "watershed_summary.gpkg", layer="planning_units").set_index("unit_id")
    volume = page.tables["zones_by_volume"]
    header = [text for _, text in volume[0]]
    assert header[:2] == ["watershed_id", "name"]           # the user's own attribute is shown
    rows = volume[1:]
    assert len(rows) == len(zones) == 9
    shown = [row[0][1] for row in rows]
    assert shown == list(zones["rock_volume_m3_per_yr"].sort_values(ascending=False).index)
    for row in rows:
        zone = zones.loc[row[0][1]]
        assert row[1][1] == zone["name"]
        assert float(row[2][0]) == zone["area_km2"]
        assert float(row[3][0]) == zone["denudation_mean_mm_per_kyr"]
        assert float(row[4][0]) == zone["rock_volume_m3_per_yr"]
        assert row[5][1] == zone["hazard_dominant_name"] and row[6][1] == zone["hazard_highest_name"]
    for row in page.tables["zones_by_co2"][1:]:
        assert float(row[4][0]) == zones.loc[row[0][1], "co2_drawdown_t_per_yr"]
    for row in page.tables["units_by_share"][1:]:
        unit = units.loc[row[0][1]]
        assert row[1][1] == unit["land_use"]
        assert float(row[3][0]) == pytest.approx(unit["hazard_share_high"] + unit["hazard_share_very_high"], rel=1e-12)
    # rock statistics against a direct numpy read of the rasters
    with rasterio.open(demo / "denudation_mm_per_kyr.tif") as r, rasterio.open(demo / "lithology_code.tif") as l:
        rate, lith = r.read(1), l.read(1)
    limestone = next(row for row in page.tables["rocks"][1:] if row[0][1] == "limestone")
    values = rate[(lith == 1) & np.isfinite(rate)].astype(np.float64)
    assert float(limestone[2][0]) == values.size
    assert float(limestone[4][0]) == pytest.approx(values.mean(), rel=1e-12)
    assert float(limestone[6][0]) == pytest.approx(np.median(values), rel=1e-12)


def test_report_cli_without_summary_and_other_outputs(demo, tmp_path):
    # a calibration table beside the map that no sidecar ties to it is not this map's: left out
    (tmp_path / "calibration.csv").write_text("site,observed_mm_per_kyr,mapped_mm_per_kyr\nKetterwold-spring-9,31.5,40.2\n")
    mapdir = tmp_path / "map"
    shutil.copytree(demo, mapdir, ignore=shutil.ignore_patterns("*summary*", "report*", "uncertainty", "calibration",
                                                                "comparison_*", "scenario_*"))
    result = runner.invoke(app, ["report", str(mapdir), "--out", str(tmp_path / "r.html"), "--title", "Ketterwold test"])
    assert result.exit_code == 0, result.output
    html = (tmp_path / "r.html").read_text(encoding="utf-8")
    assert "Ketterwold test" in html and "Ketterwold-spring-9" not in html and "data-section" not in html
    assert "zones_by_volume" not in html and "rocks" in parse(html).tables
    assert {img["data-figure"] for img in parse(html).images} == {"rate_map", "hazard_map", "rock_histogram"}
    # a calibration folder beside the map whose sidecar names the map is found
    shutil.copytree(demo / "calibration", tmp_path / "calibration")
    sidecar = tmp_path / "calibration" / "calibration.summary.json"
    record = json.loads(sidecar.read_text())
    sidecar.write_text(json.dumps({**record, "map_folder": str(mapdir)}))
    result = runner.invoke(app, ["report", str(mapdir), "--out", str(tmp_path / "r2.html")])
    assert result.exit_code == 0, result.output
    page = parse((tmp_path / "r2.html").read_text(encoding="utf-8"))
    assert "calibration_zones" in page.tables and "uncertainty_zones" not in page.tables
    bad = runner.invoke(app, ["report", str(mapdir), "--out", str(tmp_path / "r.txt")])
    assert bad.exit_code == 1 and "ending in .html" in bad.stderr


def _csv_rows(path):
    import csv

    with open(path, newline="", encoding="utf-8") as handle:
        return {row[next(iter(row))]: row for row in csv.DictReader(handle)}


def _check_columns(table, rows, columns):
    """Every numeric cell of ``table`` equals its CSV field; ``columns``: (cell index, CSV column)."""
    assert len(table) - 1 == len(rows)
    for line in table[1:]:
        source = rows[line[0][1]]
        for index, column in columns:
            if source[column] == "":
                assert line[index] == (None, "-")
            else:
                assert float(line[index][0]) == float(source[column]), (column, line[0][1])


def test_sections_equal_their_source_files(demo):
    html = (demo / "report.html").read_text(encoding="utf-8")
    page = parse(html)
    # uncertainty: p05/p50/p95 of mean rate and rock volume, and the largest variance share
    bands = _csv_rows(demo / "uncertainty" / "zones_uncertainty.csv")
    table = page.tables["uncertainty_zones"]
    assert [t for _, t in table[0][:2]] == ["watershed_id", "name"]
    _check_columns(table, bands, [(2 + i, f"{q}_{p}") for i, (q, p) in enumerate(
        (q, p) for q in ("denudation_mean_mm_per_kyr", "rock_volume_m3_per_yr") for p in ("p05", "p50", "p95"))])
    for line in table[1:]:
        shares = {k: float(v) for k, v in bands[line[0][1]].items()
                  if k.startswith("variance_share_") and k != "variance_share_sum"}
        top = max(shares, key=shares.get)
        assert line[8][1] == f"{top[len('variance_share_'):].replace('_', ' ')} ({100 * shares[top]:.0f} %)"
    assert "runoff (sigma 0.2 in ln)" in html and "do not cover the model itself" in html
    # scenario: the change per watershed and the scenario in words (+2 C, precipitation x 0.9)
    change = _csv_rows(demo / "comparison_warming" / "zones_change.csv")
    _check_columns(page.tables["scenario_zones"], change, [
        (2, "base_denudation_mean_mm_per_kyr"), (3, "scenario_denudation_mean_mm_per_kyr"),
        (4, "change_denudation_mean_mm_per_kyr"), (5, "ratio_denudation_mean_mm_per_kyr"),
        (6, "change_rock_volume_m3_per_yr"), (7, "change_co2_drawdown_t_per_yr")])
    assert "What if: temperature +2 \u00b0C, precipitation x 0.9" in html
    # calibration: observed, maximum, ratio, expected and the rule of each zone
    calibration = _csv_rows(demo / "calibration" / "calibration.csv")
    table = page.tables["calibration_zones"]
    _check_columns(table, calibration, [(1, "n_samples"), (2, "observed_denudation_mm_per_kyr"),
                                        (3, "maximum_denudation_mm_per_kyr"), (4, "saturation_ratio"),
                                        (5, "expected_denudation_mm_per_kyr")])
    assert {line[0][1]: line[6][1] for line in table[1:]} == {k: r["ratio_rule"] for k, r in calibration.items()}
    # sinkhole record: densities with 95 % intervals, AUC, the warning of the demo's falling density
    record = json.loads((demo / "watershed_summary.summary.json").read_text())["sinkhole_evaluation"]
    rows = page.tables["sinkhole_classes"][1:]
    assert [line[0][1] for line in rows] == [c["name"] for c in record["classes"]]
    for line, c in zip(rows, record["classes"]):
        assert [float(v) for v, _ in line[1:]] == [c["count"], c["area_km2"], c["density_per_km2"],
                                                   c["density_ci95_low"], c["density_ci95_high"]]
    assert float(page.tables["sinkhole_auc"][1][0][0]) == record["auc"]
    assert record["density_rises_with_class"] is False and 'data-warning="sinkholes"' in html
    assert "covered_zones" not in page.tables and 'data-section="covered"' not in html    # no cover in the demo


def test_covered_karst_section(demo, tmp_path):
    import pandas

    from denude.core.cover import classify_cover
    from denude.reports.report_sections import covered_section

    mapdir = tmp_path / "map"
    shutil.copytree(demo, mapdir, ignore=shutil.ignore_patterns("report*", "uncertainty", "calibration",
                                                                "comparison_*", "scenario_*"))
    with rasterio.open(mapdir / "soluble_area_fraction.tif") as ds:
        fraction, profile = ds.read(1), ds.profile
    cover = np.zeros(fraction.shape)
    cover[:, : fraction.shape[1] // 3] = 4.0               # 4 m of cover over the western third
    codes = classify_cover(fraction, cover, 0.0)
    profile.update(dtype="uint8", nodata=255)
    with rasterio.open(mapdir / "covered_karst.tif", "w", **profile) as out:
        out.write(codes.astype(np.uint8), 1)
    zones = pandas.DataFrame({"watershed_id": ["WS01", "WS02"], "covered_soluble_area_km2": [1.25, 0.0],
                              "exposed_soluble_area_km2": [3.75, 2.0], "covered_soluble_share": [0.2, 0.0]})
    section = covered_section(mapdir, zones)
    cells = section.tables[0].rows[0]
    assert (cells[0].value, cells[1].value) == ((codes == 2).sum(), (codes == 1).sum())
    assert cells[2].value == pytest.approx((codes == 2).sum() / ((codes == 2) | (codes == 1)).sum(), rel=1e-12)
    assert [row[3].value for row in section.tables[1].rows] == [0.2, 0.0]
    assert "not a site investigation" in section.caution and section.figures[0].name == "covered_karst"
    assert covered_section(demo, zones) is None              # no covered_karst.tif: no section
    result = runner.invoke(app, ["report", str(mapdir), "--out", str(tmp_path / "r.html")])
    assert result.exit_code == 0, result.output
    assert 'data-section="covered"' in (tmp_path / "r.html").read_text(encoding="utf-8")


def test_pdf_says_clearly_without_chromium(demo, tmp_path, monkeypatch):
    monkeypatch.setenv("PATH", str(tmp_path))          # no browser on PATH
    result = runner.invoke(app, ["report", str(demo), "--out", str(tmp_path / "r.html"), "--pdf"])
    assert result.exit_code == 0, result.output
    assert "no Chromium found" in result.stderr and len(result.stderr.strip().splitlines()) == 1
    assert not (tmp_path / "r.pdf").exists() and (tmp_path / "r.html").is_file()


# ------------------------------------------------------------------------- styled outputs
def gdal_category_names(path):
    """Category names through GDAL itself (the library rasterio is built on), via ctypes."""
    libs = glob.glob(os.path.join(os.path.dirname(rasterio.__file__) + ".libs", "libgdal*.so*"))
    if not libs:
        pytest.skip("rasterio's GDAL library is not a separate file here")
    gdal = ctypes.CDLL(libs[0])
    gdal.GDALAllRegister()
    gdal.GDALOpen.restype, gdal.GDALOpen.argtypes = ctypes.c_void_p, [ctypes.c_char_p, ctypes.c_int]
    gdal.GDALGetRasterBand.restype, gdal.GDALGetRasterBand.argtypes = ctypes.c_void_p, [ctypes.c_void_p, ctypes.c_int]
    gdal.GDALGetRasterCategoryNames.restype = ctypes.POINTER(ctypes.c_char_p)
    gdal.GDALGetRasterCategoryNames.argtypes = [ctypes.c_void_p]
    gdal.GDALClose.argtypes = [ctypes.c_void_p]
    gdal.GDALGetRasterUnitType.restype, gdal.GDALGetRasterUnitType.argtypes = ctypes.c_char_p, [ctypes.c_void_p]
    handle = gdal.GDALOpen(str(path).encode(), 0)
    band = gdal.GDALGetRasterBand(handle, 1)
    # GDAL 3.10's GeoTIFF band loads its .aux.xml lazily, on the first metadata call (here the
    # unit, as a GIS asks on open); the category names alone do not trigger it
    assert gdal.GDALGetRasterUnitType(band)
    names = gdal.GDALGetRasterCategoryNames(band)
    out = []
    while names and names[len(out)] is not None:
        out.append(names[len(out)].decode())
    gdal.GDALClose(handle)
    return out


def test_rasters_carry_units_categories_and_colours(demo):
    with rasterio.open(demo / "denudation_mm_per_kyr.tif") as ds:
        assert ds.units == ("mm/kyr",) and "mm/kyr" in ds.descriptions[0]
        assert "White (1984)" in ds.tags()["sources"] and "Brook" not in ds.tags()["sources"]
    with rasterio.open(demo / "co2_drawdown_t_per_km2_yr.tif") as ds:
        assert ds.units == ("t CO2 km-2 yr-1",)
    names = ["negligible", "low", "moderate", "high", "very high"]
    with rasterio.open(demo / "hazard_class.tif") as ds:
        assert ds.colormap(1)[3][:3] == (227, 26, 28)
    assert read_category_names(demo / "hazard_class.tif") == names
    with rasterio.open(demo / "lithology_code.tif") as ds:
        assert ds.dtypes[0] == "uint8" and ds.nodata == 255
        assert "White" not in ds.tags()["sources"]
        # the colour table of the demo's lithology input is carried over
        with rasterio.open(Path(__file__).resolve().parents[1] / "demo_rasters" / "lithology.tif") as src:
            assert ds.colormap(1)[1] == src.colormap(1)[1] == (120, 170, 220, 255)
    assert read_category_names(demo / "lithology_code.tif") == ["insoluble", "limestone", "dolostone", "gypsum", "chalk"]
    # GDAL itself reads the names (what a desktop GIS shows in its legend)
    assert gdal_category_names(demo / "hazard_class.tif") == names
    assert gdal_category_names(demo / "lithology_code.tif")[:2] == ["insoluble", "limestone"]


def test_smallest_code_type():
    assert smallest_code_type([0, 5, 254]) == ("uint8", 255)
    assert smallest_code_type([0, 255]) == ("uint16", 65535)
    assert smallest_code_type([-3, 12]) == ("int16", -32768)
    assert smallest_code_type([0, 70000]) == ("int32", -2147483648)


def test_sld_files_have_the_class_breaks(demo):
    rate = ET.parse(demo / "denudation_mm_per_kyr.sld").getroot()
    quantities = [float(e.get("quantity")) for e in rate.iter(f"{SLD}ColorMapEntry")]
    assert quantities[:4] == [5.0, 20.0, 50.0, 150.0]          # the job's [hazard] breaks
    hazard = ET.parse(demo / "hazard_class.sld").getroot()
    labels = [e.get("label") for e in hazard.iter(f"{SLD}ColorMapEntry")]
    assert labels == ["negligible", "low", "moderate", "high", "very high"]
    lith = ET.parse(demo / "lithology_code.sld").getroot()
    assert [e.get("label") for e in lith.iter(f"{SLD}ColorMapEntry")][1] == "limestone"


def test_geopackage_styles_and_descriptions(demo):
    con = sqlite3.connect(demo / "watershed_summary.gpkg")
    try:
        rows = con.execute("SELECT f_table_name, styleQML, styleSLD, useAsDefault FROM layer_styles").fetchall()
        described = dict(con.execute("SELECT table_name, description FROM gpkg_contents"))
    finally:
        con.close()
    assert {r[0] for r in rows} == {"watersheds", "planning_units", "sinkholes"}
    for layer, qml, sld, default in rows:
        assert default == 1
        ET.fromstring(qml.split("\n", 1)[1])      # after the DOCTYPE line
        root = ET.fromstring(sld)
        assert root.tag == f"{SLD}StyledLayerDescriptor"
        assert described[layer]
    zones_sld = dict((r[0], r[2]) for r in rows)["watersheds"]
    literals = re.findall(r"<ogc:Literal>([^<]+)</ogc:Literal>", zones_sld)
    assert sorted({float(v) for v in literals}) == [5.0, 20.0, 50.0, 150.0]
    assert "hazard_share_very_high" in dict((r[0], r[2]) for r in rows)["planning_units"]


def test_summary_keeps_user_attributes_and_honest_labels(demo):
    import geopandas

    zones = geopandas.read_file(demo / "watershed_summary.gpkg", layer="watersheds")
    units = geopandas.read_file(demo / "watershed_summary.gpkg", layer="planning_units")
    points = geopandas.read_file(demo / "watershed_summary.gpkg", layer="sinkholes")
    assert "name" in zones and "land_use" in units and {"depth_m", "lithology_code"} <= set(points.columns)
    for frame in (zones, units):
        shares = frame[[c for c in frame.columns if c.startswith("hazard_area_km2_")]].to_numpy()
        names = [c.removeprefix("hazard_area_km2_").replace("_", " ") for c in frame.columns if c.startswith("hazard_area_km2_")]
        for i, row in frame.iterrows():
            assert row["hazard_dominant_name"] == names[int(np.argmax(shares[i]))]
            big = [k for k in range(len(names)) if shares[i, k] >= 0.01 * row["area_km2"]]
            assert row["hazard_highest_name"] == names[max(big)]
    # the single-cell label reads high or above for most zones; the honest ones do not agree
    assert (zones["hazard_max_name"] != zones["hazard_dominant_name"]).sum() >= 5


def test_dominant_and_highest_rule():
    area = np.array([[10.0, 5.0, 0.05, 0.0], [0.0, 0.0, 0.0, 0.0], [1.0, 1.0, 3.0, 0.5]])
    zone = area.sum(axis=1)
    dominant, highest = dominant_and_highest(area, zone, 0.01)
    # zone 0: 0.05 / 15.05 = 0.33 % < 1 %, so class 2 is not its highest class
    assert dominant.tolist() == [0, -1, 2] and highest.tolist() == [1, -1, 3]
    _, highest_any = dominant_and_highest(area, zone, 0.0)
    assert highest_any.tolist() == [2, -1, 3]


def test_summarize_option_sets_the_share(demo, tmp_path):
    data = Path(__file__).resolve().parents[1] / "demo_rasters"
    out = tmp_path / "s.gpkg"
    result = runner.invoke(app, ["summarize", str(demo), "--zones", str(data / "watersheds.gpkg"), "--layer", "watersheds",
                                 "--id-field", "watershed_id", "--out", str(out), "--highest-class-min-share", "0.5", "-q"])
    assert result.exit_code == 0, result.output
    import geopandas

    zones = geopandas.read_file(out, layer="watersheds")
    # with a 50 % share rule the highest class is at most the dominant one
    assert (zones["hazard_highest_class"] <= zones["hazard_dominant_class"]).all()
    assert json.loads(out.with_name("s.summary.json").read_text())["method"]["highest_class_min_share"] == 0.5


# ------------------------------------------------------------------------------- browser
class RecordingProxy:
    """A proxy on 127.0.0.1 that records every connection and answers nothing useful."""

    def __init__(self):
        self.server = socket.socket()
        self.server.bind(("127.0.0.1", 0))
        self.server.listen(16)
        self.port = self.server.getsockname()[1]
        self.requests = []
        self.thread = threading.Thread(target=self._run, daemon=True)
        self.thread.start()

    def _run(self):
        while True:
            try:
                conn, _ = self.server.accept()
            except OSError:
                return
            with conn:
                conn.settimeout(2)
                try:
                    self.requests.append(conn.recv(4096).split(b"\r\n", 1)[0].decode(errors="replace"))
                    conn.sendall(b"HTTP/1.1 403 Forbidden\r\nContent-Length: 0\r\n\r\n")
                except OSError:
                    pass

    def close(self):
        self.server.close()


class DevTools:
    """A minimal DevTools protocol client over one page's websocket."""

    def __init__(self, url):
        import websocket

        self.ws = websocket.create_connection(url, timeout=60, suppress_origin=True)
        self.next_id = 0
        self.events = []

    def call(self, method, **params):
        self.next_id += 1
        self.ws.send(json.dumps({"id": self.next_id, "method": method, "params": params}))
        while True:
            message = json.loads(self.ws.recv())
            if message.get("id") == self.next_id:
                assert "error" not in message, message
                return message.get("result", {})
            self.events.append(message)

    def wait_for(self, method, timeout=60):
        end = time.monotonic() + timeout
        while time.monotonic() < end:
            if any(e.get("method") == method for e in self.events):
                return
            self.events.append(json.loads(self.ws.recv()))
        raise AssertionError(f"no {method} within {timeout} s")


def test_report_renders_in_headless_chromium(demo, tmp_path):
    browser = shutil.which("chromium")
    assert browser, "Debian's chromium is needed (CI installs it in .ci/run; locally: apt-get install chromium)"
    proxy = RecordingProxy()
    process = subprocess.Popen(
        [browser, "--headless", "--no-sandbox", "--disable-gpu", "--disable-dev-shm-usage", "--no-first-run",
         "--remote-debugging-address=127.0.0.1", "--remote-debugging-port=0", f"--user-data-dir={tmp_path / 'profile'}",
         "--disable-background-networking", "--disable-component-update", "--disable-sync", "--hide-scrollbars",
         "--no-pings", "--disable-domain-reliability", "--disable-breakpad", "--metrics-recording-only",
         "--disable-features=NetworkTimeServiceQuerying,OptimizationHints,MediaRouter,Translate,AutofillServerCommunication",
         f"--proxy-server=127.0.0.1:{proxy.port}", "--proxy-bypass-list=<-loopback>", "--window-size=1100,1400",
         "about:blank"],
        stdout=subprocess.DEVNULL, stderr=subprocess.PIPE, text=True)
    try:
        endpoint = None
        for line in process.stderr:
            found = re.search(r"DevTools listening on ws://127\.0\.0\.1:(\d+)/", line)
            if found:
                endpoint = int(found.group(1))
                break
        assert endpoint, "chromium did not start its DevTools endpoint"
        from urllib.request import urlopen

        pages = json.loads(urlopen(f"http://127.0.0.1:{endpoint}/json/list", timeout=30).read())
        tools = DevTools(next(p for p in pages if p["type"] == "page")["webSocketDebuggerUrl"])
        for domain in ("Page", "Runtime", "Log", "Network"):
            tools.call(f"{domain}.enable")
        tools.call("Page.navigate", url=(demo / "report.html").resolve().as_uri())
        tools.wait_for("Page.loadEventFired")
        images = tools.call("Runtime.evaluate", returnByValue=True, expression=(
            "Array.from(document.images).map(i => [i.dataset.figure, i.complete, i.naturalWidth, i.naturalHeight,"
            " +i.getAttribute('width'), +i.getAttribute('height')])"))["result"]["value"]
        shot = base64.b64decode(tools.call("Page.captureScreenshot", format="png")["data"])
        (tmp_path / "report.png").write_bytes(shot)
        if os.environ.get("DENUDE_SCREENSHOT"):       # keep the screenshot to look at
            Path(os.environ["DENUDE_SCREENSHOT"]).write_bytes(shot)
        events = tools.events
    finally:
        process.terminate()
        process.wait(timeout=30)
        proxy.close()
    assert len(images) == 6 + len(SECTION_FIGURES)
    for name, complete, nat_w, nat_h, width, height in images:
        assert complete and (nat_w, nat_h) == (width, height), name
    errors = [e for e in events if e.get("method") == "Runtime.exceptionThrown"
              or (e.get("method") == "Runtime.consoleAPICalled" and e["params"]["type"] == "error")
              or (e.get("method") == "Log.entryAdded" and e["params"]["entry"]["level"] == "error")]
    assert errors == []
    urls = [e["params"]["request"]["url"] for e in events if e.get("method") == "Network.requestWillBeSent"]
    assert urls and all(u.startswith(("file:", "data:")) for u in urls), urls
    # Nothing left the machine: every connection went to the recording proxy, which refused it.
    # Chromium itself asks its own update and account services (not the page's doing);
    # anything else would be the page's.
    own = ("googleapis.com", "google.com", "gstatic.com", "gvt1.com")
    hosts = [re.sub(r"^\w+ (?:https?://)?([^/:]+).*$", r"\1", r) for r in proxy.requests]
    assert [h for h in hosts if not h.endswith(own)] == [], proxy.requests
    picture = np.asarray(Image.open(io.BytesIO(shot)).convert("RGB"), dtype=np.int16)
    assert picture.shape[1] == 1100 and picture.shape[0] > 800      # the viewport (window less its frame)
    not_white = (np.abs(picture - 255).sum(axis=2) > 30).mean()
    assert 0.05 < not_white < 0.95                        # text, the caution box and a map, not a blank page
    red = (picture[..., 0] > 150) & (picture[..., 1] < 40) & (picture[..., 2] < 40)
    assert red.sum() > 500                                # the caution's red frame is on the first screen


def test_report_reads_bands_kept_as_vrts_over_tiles(demo, tmp_path):
    # `denude uncertainty --tile-size --no-merge` keeps only VRTs over tiles/: the report's
    # uncertainty section draws from them (GDAL reads a VRT like a GeoTIFF)
    from pathlib import Path

    mapdir = tmp_path / "map"
    shutil.copytree(demo, mapdir, ignore=shutil.ignore_patterns("report*", "uncertainty"))
    job = Path(__file__).resolve().parents[1] / "demo_rasters" / "job.toml"
    result = runner.invoke(app, ["uncertainty", "--job", str(job), "--draws", "4", "--seed", "2", "--out",
                                 str(mapdir / "bands"), "--tile-size", "256", "--workers", "0", "--no-merge", "-q"])
    assert result.exit_code == 0, result.output
    assert not list((mapdir / "bands").glob("*.tif")) and (mapdir / "bands" / "denudation_p95_mm_per_kyr.vrt").is_file()
    result = runner.invoke(app, ["report", str(mapdir), "--out", str(tmp_path / "r.html")])
    assert result.exit_code == 0, result.output
    page = parse((tmp_path / "r.html").read_text(encoding="utf-8"))
    assert "uncertainty_band" in {img["data-figure"] for img in page.images}
    band_png = [p for p in tmp_path.rglob("uncertainty_band.png") if "map" not in p.parts]
    assert len(band_png) == 1 and band_png[0].stat().st_size > 10_000     # a drawn map, not an empty frame
