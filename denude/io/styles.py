"""Styles a desktop GIS reads without help: raster category names, OGC SLD files for the
rasters, and default styles (QML and SLD) with layer descriptions in a GeoPackage.

Conventions used (open standards and GDAL's documented formats):

* Category names of a class raster go into GDAL's PAM sidecar ``<file>.aux.xml``
  (``<CategoryNames>``), which is where GDAL itself keeps them for GeoTIFFs; GDAL, and so
  every GDAL-based GIS, reads them on open.
* Raster styles are OGC SLD 1.0.0 documents (``RasterSymbolizer`` with a ``ColorMap``).
* A GeoPackage's default styles live in the ``layer_styles`` table (columns
  ``f_table_name``, ``f_geometry_column``, ``styleName``, ``styleQML``, ``styleSLD``,
  ``useAsDefault``, ``description``), registered in ``gpkg_contents`` as an attribute
  table; layer descriptions in ``gpkg_contents.description``.

No numbers are computed here: class breaks, names and colours come from the caller.
"""

from __future__ import annotations

import json
import sqlite3
from pathlib import Path
from xml.sax.saxutils import escape, quoteattr

import numpy as np

from denude.core.cover import COVER_CLASS_NAMES, COVER_COLOURS
from denude.core.hazard import DEFAULT_BREAKS_MM_PER_KYR, DEFAULT_CLASS_NAMES, DEFAULT_COLOURS

#: Smallest integer types for lithology codes, with the nodata value each keeps free.
CODE_TYPES = (
    ("uint8", 0, 254, 255),
    ("uint16", 0, 65534, 65535),
    ("int16", -32767, 32767, -32768),
    ("int32", -2147483647, 2147483647, -2147483648),
)

#: Colours (RGBA) for rock types without a colour table in the input, by mineral
#: (a cartographic choice of this tool: common practice, no source).
MINERAL_COLOURS = {
    "insoluble": (200, 200, 190, 255),
    "calcite": (120, 170, 220, 255),
    "dolomite": (90, 110, 190, 255),
    "gypsum": (230, 120, 200, 255),
}

#: Graduated breaks of the share of the two highest hazard classes in a planning unit
#: (fractions 0-1; a screening convention of this tool, common practice, no source).
TOP_SHARE_BREAKS = (0.01, 0.10, 0.25, 0.50)
TOP_SHARE_COLOURS = ("#f7f7f7", "#fdd49e", "#fc8d59", "#d7301f", "#7f0000")

SLD_HEAD = (
    '<?xml version="1.0" encoding="UTF-8"?>\n'
    '<StyledLayerDescriptor version="1.0.0" xmlns="http://www.opengis.net/sld" '
    'xmlns:ogc="http://www.opengis.net/ogc" xmlns:xlink="http://www.w3.org/1999/xlink" '
    'xmlns:xsi="http://www.w3.org/2001/XMLSchema-instance">\n'
)


def hex_colour(rgba) -> str:
    """'#rrggbb' of an (r, g, b[, a]) tuple of 0-255 integers."""
    return "#{:02x}{:02x}{:02x}".format(*[int(v) for v in rgba[:3]])


# ------------------------------------------------------------------------ class rasters
def smallest_code_type(codes) -> tuple[str, int]:
    """(dtype, nodata) of the smallest integer type holding every code in ``codes`` with a
    nodata value that is not a code: uint8/255, uint16/65535, int16/-32768, else int32."""
    codes = [int(c) for c in codes]
    lo, hi = (min(codes), max(codes)) if codes else (0, 0)
    for dtype, low, high, nodata in CODE_TYPES:
        if low <= lo and hi <= high:
            return dtype, nodata
    return CODE_TYPES[-1][0], CODE_TYPES[-1][3]


def category_list(names_by_value: dict, max_entries: int = 65536) -> list[str]:
    """GDAL category names: entry k names pixel value k ('' for values without a name).
    Negative values or values of ``max_entries`` or more cannot be named: returns []."""
    if not names_by_value or min(names_by_value) < 0 or max(names_by_value) >= max_entries:
        return []
    out = [""] * (max(names_by_value) + 1)
    for value, name in names_by_value.items():
        out[int(value)] = str(name)
    return out


def aux_xml_path(path) -> Path:
    """GDAL's PAM sidecar of a raster: ``<file>.aux.xml``."""
    path = Path(path)
    return path.with_name(path.name + ".aux.xml")


def write_category_names(path, categories: list[str]) -> Path | None:
    """Write ``categories`` (entry k names value k) into the PAM sidecar of band 1 of
    ``path``; returns the sidecar's path (None when there is nothing to write)."""
    if not categories:
        return None
    items = "\n".join(f"      <Category>{escape(name)}</Category>" for name in categories)
    text = (
        "<PAMDataset>\n  <PAMRasterBand band=\"1\">\n    <CategoryNames>\n"
        f"{items}\n    </CategoryNames>\n  </PAMRasterBand>\n</PAMDataset>\n"
    )
    target = aux_xml_path(path)
    target.write_text(text, encoding="utf-8")
    return target


def read_category_names(path) -> list[str]:
    """Category names of band 1 from the PAM sidecar of ``path`` ([] when there is none)."""
    import xml.etree.ElementTree as ET

    aux = aux_xml_path(path)
    if not aux.is_file():
        return []
    root = ET.parse(aux).getroot()
    for band in root.iter("PAMRasterBand"):
        if band.get("band", "1") == "1":
            names = band.find("CategoryNames")
            if names is not None:
                return [c.text or "" for c in names.findall("Category")]
    return []


def input_colour_table(path) -> dict | None:
    """The colour table of band 1 of a raster (value -> RGBA), or None when it has none or
    cannot be read (colour tables are optional: never an error)."""
    try:
        import rasterio

        with rasterio.open(path) as ds:
            return {int(k): tuple(int(c) for c in v) for k, v in ds.colormap(1).items()}
    except Exception:  # no colour table, a constant, a list of tiles: no colours carried
        return None


def lithology_colours(rocks, source_table: dict | None) -> dict:
    """Value -> RGBA for every rock code: the input's colour where it has one, else by mineral."""
    out = {}
    for rock in rocks:
        if source_table and rock.code in source_table:
            out[rock.code] = source_table[rock.code]
        else:
            out[rock.code] = MINERAL_COLOURS.get(rock.mineral, (128, 128, 128, 255))
    return out


# ----------------------------------------------------------------------------- SLD text
def _colour_map_sld(name: str, title: str, entries, kind: str) -> str:
    """An SLD document styling one raster band; ``entries`` are (quantity, colour, label, opacity)."""
    rows = "\n".join(
        f'          <ColorMapEntry color="{colour}" quantity="{quantity!r}" label={quoteattr(label)} opacity="{opacity}"/>'
        for quantity, colour, label, opacity in entries
    )
    return (
        SLD_HEAD
        + f"  <NamedLayer>\n    <Name>{escape(name)}</Name>\n    <UserStyle>\n"
        f"      <Title>{escape(title)}</Title>\n      <IsDefault>1</IsDefault>\n"
        "      <FeatureTypeStyle>\n        <Rule>\n          <RasterSymbolizer>\n"
        f"            <Opacity>1.0</Opacity>\n        <ColorMap type=\"{kind}\">\n{rows}\n"
        "        </ColorMap>\n          </RasterSymbolizer>\n        </Rule>\n"
        "      </FeatureTypeStyle>\n    </UserStyle>\n  </NamedLayer>\n</StyledLayerDescriptor>\n"
    )


def class_raster_sld(name: str, title: str, names: list[str], colours) -> str:
    """SLD of a class raster: one exact value per class (``type="values"``)."""
    entries = [(float(k), hex_colour(colours[k]), names[k], 1) for k in range(len(names)) if names[k]]
    return _colour_map_sld(name, title, entries, "values")


def rate_raster_sld(name: str, title: str, breaks, names=None, colours=DEFAULT_COLOURS, unit: str = "mm/kyr") -> str:
    """SLD of a rate raster in classes (``type="intervals"``): each entry colours the values
    below its quantity, so the entries' quantities are the class breaks and a last open class."""
    names = list(names or DEFAULT_CLASS_NAMES)
    breaks = [float(b) for b in breaks]
    entries = []
    for k, upper in enumerate(breaks + [1e12]):
        lower = 0.0 if k == 0 else breaks[k - 1]
        span = f"< {upper:g} {unit}" if k == 0 else (f">= {lower:g} {unit}" if k == len(breaks) else f"{lower:g}-{upper:g} {unit}")
        colour = colours[k] if k < len(colours) else (128, 128, 128, 255)
        entries.append((upper, hex_colour(colour), f"{names[k] if k < len(names) else k} ({span})", 1))
    return _colour_map_sld(name, title, entries, "intervals")


def _fill_rule(title: str, colour: str, condition: str, stroke: str = "#555555") -> str:
    return (
        f"        <Rule>\n          <Title>{escape(title)}</Title>\n{condition}"
        "          <PolygonSymbolizer>\n"
        f"            <Fill><CssParameter name=\"fill\">{colour}</CssParameter></Fill>\n"
        f"            <Stroke><CssParameter name=\"stroke\">{stroke}</CssParameter>"
        "<CssParameter name=\"stroke-width\">0.5</CssParameter></Stroke>\n"
        "          </PolygonSymbolizer>\n        </Rule>\n"
    )


def _between(expression: str, low: float | None, high: float | None) -> str:
    parts = []
    if low is not None:
        parts.append(f"<ogc:PropertyIsGreaterThanOrEqualTo>{expression}<ogc:Literal>{low!r}</ogc:Literal></ogc:PropertyIsGreaterThanOrEqualTo>")
    if high is not None:
        parts.append(f"<ogc:PropertyIsLessThan>{expression}<ogc:Literal>{high!r}</ogc:Literal></ogc:PropertyIsLessThan>")
    body = parts[0] if len(parts) == 1 else f"<ogc:And>{''.join(parts)}</ogc:And>"
    return f"          <ogc:Filter>{body}</ogc:Filter>\n"


def _vector_sld(layer: str, title: str, rules: str) -> str:
    return (
        SLD_HEAD
        + f"  <NamedLayer>\n    <Name>{escape(layer)}</Name>\n    <UserStyle>\n"
        f"      <Title>{escape(title)}</Title>\n      <FeatureTypeStyle>\n{rules}"
        "      </FeatureTypeStyle>\n    </UserStyle>\n  </NamedLayer>\n</StyledLayerDescriptor>\n"
    )


def graduated_intervals(breaks) -> list[tuple[float | None, float | None]]:
    """(low, high) of each class given its breaks: (None, b0), (b0, b1), ..., (bn, None)."""
    edges = [None] + [float(b) for b in breaks] + [None]
    return list(zip(edges[:-1], edges[1:]))


def zones_sld(layer: str, breaks, names, colours=DEFAULT_COLOURS) -> str:
    """Graduated SLD of zones by ``denudation_mean_mm_per_kyr`` on the hazard breaks."""
    prop = "<ogc:PropertyName>denudation_mean_mm_per_kyr</ogc:PropertyName>"
    rules = "".join(
        _fill_rule(f"{names[k]}: mean rate {_span(lo, hi, 'mm/kyr')}", hex_colour(colours[min(k, len(colours) - 1)]), _between(prop, lo, hi))
        for k, (lo, hi) in enumerate(graduated_intervals(breaks))
    )
    return _vector_sld(layer, "Mean denudation rate (mm/kyr)", rules)


def units_sld(layer: str, top_columns: list[str]) -> str:
    """Graduated SLD of planning units by the summed share (0-1) of ``top_columns``."""
    if len(top_columns) == 1:
        expr = f"<ogc:PropertyName>{top_columns[0]}</ogc:PropertyName>"
    else:
        expr = "<ogc:Add>" + "".join(f"<ogc:PropertyName>{c}</ogc:PropertyName>" for c in top_columns) + "</ogc:Add>"
    rules = "".join(
        _fill_rule(f"share of the two highest classes {_span(lo, hi, '', percent=True)}", TOP_SHARE_COLOURS[k], _between(expr, lo, hi))
        for k, (lo, hi) in enumerate(graduated_intervals(TOP_SHARE_BREAKS))
    )
    return _vector_sld(layer, "Share of the two highest hazard classes", rules)


def points_sld(layer: str, names, colours=DEFAULT_COLOURS) -> str:
    """SLD of sinkhole points coloured by ``hazard_class`` (class index)."""
    rules = ""
    for k, name in enumerate(names):
        colour = hex_colour(colours[min(k, len(colours) - 1)])
        rules += (
            f"        <Rule>\n          <Title>{escape(name)}</Title>\n"
            "          <ogc:Filter><ogc:PropertyIsEqualTo><ogc:PropertyName>hazard_class</ogc:PropertyName>"
            f"<ogc:Literal>{k}</ogc:Literal></ogc:PropertyIsEqualTo></ogc:Filter>\n"
            "          <PointSymbolizer><Graphic><Mark><WellKnownName>circle</WellKnownName>"
            f"<Fill><CssParameter name=\"fill\">{colour}</CssParameter></Fill>"
            "<Stroke><CssParameter name=\"stroke\">#000000</CssParameter></Stroke></Mark>"
            "<Size>7</Size></Graphic></PointSymbolizer>\n        </Rule>\n"
        )
    return _vector_sld(layer, "Sinkholes by hazard class", rules)


def _span(lo, hi, unit: str, percent: bool = False) -> str:
    fmt = (lambda v: f"{100 * v:g} %") if percent else (lambda v: f"{v:g} {unit}".strip())
    if lo is None:
        return f"< {fmt(hi)}"
    if hi is None:
        return f">= {fmt(lo)}"
    return f"{fmt(lo)} - {fmt(hi)}"


# ----------------------------------------------------------------------------- QML text
def _qml_fill(index: int, colour: str, geometry: str) -> str:
    rgb = ",".join(str(int(colour[i:i + 2], 16)) for i in (1, 3, 5))
    if geometry == "point":
        return (
            f'<symbol type="marker" name="{index}" alpha="1"><layer class="SimpleMarker">'
            f'<prop k="color" v="{rgb},255"/><prop k="name" v="circle"/><prop k="size" v="2.4"/>'
            '<prop k="outline_color" v="0,0,0,255"/></layer></symbol>'
        )
    return (
        f'<symbol type="fill" name="{index}" alpha="1"><layer class="SimpleFill">'
        f'<prop k="color" v="{rgb},255"/><prop k="outline_color" v="85,85,85,255"/>'
        '<prop k="outline_width" v="0.2"/></layer></symbol>'
    )


def graduated_qml(expression: str, intervals, labels, colours, geometry: str = "polygon") -> str:
    """A QGIS QML graduated renderer over ``expression`` with ``intervals`` (low, high)."""
    lows = [lo if lo is not None else -1e12 for lo, _ in intervals]
    highs = [hi if hi is not None else 1e12 for _, hi in intervals]
    ranges = "".join(
        f'<range lower="{lo!r}" upper="{hi!r}" symbol="{k}" label={quoteattr(label)} render="true"/>'
        for k, (lo, hi, label) in enumerate(zip(lows, highs, labels))
    )
    symbols = "".join(_qml_fill(k, colours[k], geometry) for k in range(len(labels)))
    return (
        '<!DOCTYPE qgis PUBLIC \'http://mrcc.com/qgis.dtd\' \'SYSTEM\'>\n<qgis version="3.28" styleCategories="Symbology">'
        f'<renderer-v2 type="graduatedSymbol" attr={quoteattr(expression)} graduatedMethod="GraduatedColor">'
        f"<ranges>{ranges}</ranges><symbols>{symbols}</symbols></renderer-v2></qgis>\n"
    )


def categorized_qml(attribute: str, values, labels, colours, geometry: str = "point") -> str:
    """A QGIS QML categorised renderer on ``attribute``."""
    cats = "".join(
        f'<category value="{v}" symbol="{k}" label={quoteattr(label)} render="true"/>'
        for k, (v, label) in enumerate(zip(values, labels))
    )
    symbols = "".join(_qml_fill(k, colours[k], geometry) for k in range(len(labels)))
    return (
        '<!DOCTYPE qgis PUBLIC \'http://mrcc.com/qgis.dtd\' \'SYSTEM\'>\n<qgis version="3.28" styleCategories="Symbology">'
        f'<renderer-v2 type="categorizedSymbol" attr={quoteattr(attribute)}>'
        f"<categories>{cats}</categories><symbols>{symbols}</symbols></renderer-v2></qgis>\n"
    )


# ------------------------------------------------------------------- summary GeoPackage
def summary_layer_styles(kind: str, layer: str, columns, breaks=DEFAULT_BREAKS_MM_PER_KYR,
                         names=DEFAULT_CLASS_NAMES) -> tuple[str, str, str] | None:
    """(description, QML, SLD) of one summary layer: ``kind`` is 'zones', 'planning_units'
    or 'sinkholes'; ``columns`` the layer's columns. None when the layer lacks the column
    the style needs."""
    names = list(names)
    colours = [hex_colour(DEFAULT_COLOURS[min(k, len(DEFAULT_COLOURS) - 1)]) for k in range(len(names))]
    if kind == "planning_units":
        from denude.core.zonal import column_label

        top = [f"hazard_share_{column_label(n)}" for n in names[-2:]]
        if not all(c in columns for c in top):
            return None
        expression = " + ".join(f'"{c}"' for c in top)
        intervals = graduated_intervals(TOP_SHARE_BREAKS)
        labels = [_span(lo, hi, "", percent=True) for lo, hi in intervals]
        return (
            "Planning units: area per hazard class and each class's share of the unit; styled by the "
            f"share of the two highest classes ({' and '.join(names[-2:])}). Screening estimate of "
            "potential maximum dissolution, not a site investigation.",
            graduated_qml(expression, intervals, labels, list(TOP_SHARE_COLOURS)),
            units_sld(layer, top),
        )
    if kind == "sinkholes":
        if "hazard_class" not in columns:
            return None
        return (
            "Sinkhole points with the denudation rate (mm/kyr), hazard class and rock of the cell "
            "holding each point.",
            categorized_qml("hazard_class", range(len(names)), names, colours, "point"),
            points_sld(layer, names),
        )
    if "denudation_mean_mm_per_kyr" not in columns:
        return None
    intervals = graduated_intervals(breaks)
    labels = [f"{names[k]} ({_span(lo, hi, 'mm/kyr')})" for k, (lo, hi) in enumerate(intervals)]
    return (
        "Zones: area-weighted denudation rate statistics (mm/kyr), rock volume and mass removed, "
        "CO2 drawn down and area per hazard class; styled by the mean rate on the hazard class breaks. "
        "Screening estimate of potential maximum dissolution, not a site investigation.",
        graduated_qml("denudation_mean_mm_per_kyr", intervals, labels, colours),
        zones_sld(layer, breaks, names),
    )


LAYER_STYLES_DDL = (
    "CREATE TABLE IF NOT EXISTS layer_styles (id INTEGER PRIMARY KEY AUTOINCREMENT, "
    "f_table_catalog TEXT(256), f_table_schema TEXT(256), f_table_name TEXT(256), "
    "f_geometry_column TEXT(256), styleName TEXT(30), styleQML TEXT, styleSLD TEXT, "
    "useAsDefault BOOLEAN, description TEXT, owner TEXT(30), ui TEXT(30), "
    "update_time DATETIME DEFAULT CURRENT_TIMESTAMP)"
)


def write_geopackage_styles(gpkg, styles: dict) -> None:
    """Write layer descriptions and default styles into a GeoPackage.

    ``styles``: layer name -> (description, QML, SLD). Each layer's description goes into
    ``gpkg_contents.description``; one default row per layer into ``layer_styles`` (created
    and registered as an attribute table when missing)."""
    con = sqlite3.connect(str(gpkg))
    try:
        with con:
            con.execute(LAYER_STYLES_DDL)
            con.execute(
                "INSERT OR IGNORE INTO gpkg_contents (table_name, data_type, identifier, description, last_change) "
                "VALUES ('layer_styles', 'attributes', 'layer_styles', 'default styles of the layers', "
                "strftime('%Y-%m-%dT%H:%M:%fZ','now'))"
            )
            geometry_columns = dict(con.execute("SELECT table_name, column_name FROM gpkg_geometry_columns"))
            for layer, (description, qml, sld) in styles.items():
                con.execute("UPDATE gpkg_contents SET description = ? WHERE table_name = ?", (description, layer))
                con.execute("DELETE FROM layer_styles WHERE f_table_name = ?", (layer,))
                con.execute(
                    "INSERT INTO layer_styles (f_table_catalog, f_table_schema, f_table_name, f_geometry_column, "
                    "styleName, styleQML, styleSLD, useAsDefault, description, owner, ui) "
                    "VALUES ('', '', ?, ?, ?, ?, ?, 1, ?, 'denude', NULL)",
                    (layer, geometry_columns.get(layer, "geom"), f"{layer} (denude)", qml, sld, description),
                )
    finally:
        con.close()


def style_summary(gpkg, kinds: dict, tables: dict, breaks=None, names=None) -> None:
    """Style the layers of a summary GeoPackage: ``kinds`` maps layer name -> 'zones',
    'planning_units' or 'sinkholes'; ``tables`` layer name -> its (Geo)DataFrame."""
    breaks = tuple(breaks) if breaks else DEFAULT_BREAKS_MM_PER_KYR
    names = tuple(names) if names else DEFAULT_CLASS_NAMES
    if len(names) != len(breaks) + 1:
        breaks, names = DEFAULT_BREAKS_MM_PER_KYR, DEFAULT_CLASS_NAMES
    styles = {}
    for layer, kind in kinds.items():
        style = summary_layer_styles(kind, layer, list(tables[layer].columns), breaks, names)
        if style is not None:
            styles[layer] = style
    if styles:
        write_geopackage_styles(gpkg, styles)


def map_class_scheme(outdir) -> tuple[tuple, tuple] | None:
    """(breaks mm/kyr, class names) from the tags of ``hazard_class.tif`` in a map folder."""
    try:
        import rasterio

        path = Path(outdir) / "hazard_class.tif"
        if not path.is_file():
            path = path.with_suffix(".vrt")
        with rasterio.open(path) as ds:
            tags = ds.tags()
        return tuple(json.loads(tags["class_breaks_mm_per_kyr"])), tuple(json.loads(tags["class_names"]))
    except Exception:  # an older folder without the tags: the defaults apply
        return None


# ------------------------------------------------------------------------ map folder
def write_raster_styles(folder, hazard_breaks, hazard_names, rocks=None, lithology_colours_by_code=None,
                        layers=("denudation", "hazard", "lithology")) -> list[str]:
    """SLD files beside the rasters of a map folder; returns the file names written."""
    folder = Path(folder)
    names = list(hazard_names)
    colours = [DEFAULT_COLOURS[k] if k < len(DEFAULT_COLOURS) else (128, 128, 128, 255) for k in range(len(names))]
    written = []
    if "denudation" in layers:
        (folder / "denudation_mm_per_kyr.sld").write_text(
            rate_raster_sld("denudation_mm_per_kyr", "Maximum denudation rate (mm/kyr)", hazard_breaks, names, colours),
            encoding="utf-8")
        written.append("denudation_mm_per_kyr.sld")
    if "hazard" in layers:
        (folder / "hazard_class.sld").write_text(
            class_raster_sld("hazard_class", "Dissolution hazard class", names, colours), encoding="utf-8")
        written.append("hazard_class.sld")
    if "covered_karst" in layers:
        (folder / "covered_karst.sld").write_text(
            class_raster_sld("covered_karst", "Soluble bedrock exposed or under cover", list(COVER_CLASS_NAMES),
                             COVER_COLOURS), encoding="utf-8")
        written.append("covered_karst.sld")
    if "lithology" in layers and rocks is not None:
        by_code = {r.code: r.name for r in rocks}
        colour_of = lithology_colours_by_code or lithology_colours(rocks, None)
        entries = [(float(c), hex_colour(colour_of[c]), by_code[c], 1) for c in sorted(by_code)]
        (folder / "lithology_code.sld").write_text(
            _colour_map_sld("lithology_code", "Lithology (rock type)", entries, "values"), encoding="utf-8")
        written.append("lithology_code.sld")
    return written


def colour_array(colours: dict, size: int) -> np.ndarray:
    """(size, 4) uint8 RGBA array from value -> RGBA (missing values transparent)."""
    out = np.zeros((size, 4), np.uint8)
    for k, rgba in colours.items():
        if 0 <= k < size:
            out[k] = rgba
    return out
