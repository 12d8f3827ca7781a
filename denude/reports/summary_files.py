"""The summary files of `denude summarize` and of `denude batch --zones`: a GeoPackage (one layer
per table), CSV twins of its tables and a ``.summary.json`` sidecar (provenance, method, units,
caution), written under staging names and renamed into place together.
"""

from __future__ import annotations

import datetime as _dt
import json

import geopandas
import numpy as np

from denude import __version__
from denude.cautions import CAUTION, UPPER_BOUND_NOTE
from denude.core.zonal import PERCENTILE_RELATIVE_RESOLUTION
from denude.errors import OutputError
from denude.io.outdir import staged_files
from denude.io.styles import map_class_scheme, style_summary
from denude.io.vectors import user_attributes, write_layers

ZONES_LAYER = "zones"
UNITS_LAYER = "planning_units"
POINTS_LAYER = "sinkholes"

#: Units of the output columns (also written to the summary sidecar).
COLUMN_UNITS = {
    "area_km2": "km2", "zone_area_km2": "km2", "map_coverage_fraction": "1", "valid_area_km2": "km2", "soluble_area_km2": "km2",
    "soluble_area_fraction": "1", "valid_cells": "cells", "nodata_cells": "cells",
    "denudation_mean_mm_per_kyr": "mm/kyr", "denudation_std_mm_per_kyr": "mm/kyr",
    "denudation_min_mm_per_kyr": "mm/kyr", "denudation_max_mm_per_kyr": "mm/kyr",
    "denudation_p10_mm_per_kyr": "mm/kyr", "denudation_p50_mm_per_kyr": "mm/kyr",
    "denudation_p90_mm_per_kyr": "mm/kyr", "rock_volume_m3_per_yr": "m3/yr",
    "rock_mass_t_per_yr": "t/yr", "co2_drawdown_t_per_yr": "t/yr",
    "hazard_area_km2_*": "km2", "hazard_share_*": "1", "hazard_max_class": "class index (-1 none)",
    "hazard_max_name": "class name (deprecated: any single cell; use hazard_highest_name)",
    "hazard_dominant_class": "class index (-1 none)", "hazard_dominant_name": "class name (largest area)",
    "hazard_highest_class": "class index (-1 none)",
    "hazard_highest_name": "class name (highest class covering at least the minimum share of area_km2)",
    "dominant_rock": "rock name", "dominant_rock_share": "1", "sinkhole_count": "points",
    "sinkhole_density_per_km2": "1/km2", "sinkhole_mean_rate_mm_per_kyr": "mm/kyr",
    "sinkhole_rate_ratio": "1", "denudation_mm_per_kyr": "mm/kyr",
    "hazard_class": "class index (255 nodata)",
    "covered_soluble_area_km2": "km2", "exposed_soluble_area_km2": "km2", "covered_soluble_share": "1",
}


def sidecar_head(tool: str) -> dict:
    """First entries of a ``.summary.json`` sidecar: tool, version, cautions, creation time."""
    return {
        "tool": tool,
        "denude_version": __version__,
        "caution": CAUTION,
        "upper_bound_note": UPPER_BOUND_NOTE,
        "created_utc": _dt.datetime.now(_dt.timezone.utc).isoformat(timespec="seconds"),
    }


def sidecar_outputs(out_path, tables, layer_names, csv_paths) -> dict:
    """The ``outputs`` entry of a sidecar: GeoPackage, its layers with row counts, CSV twins."""
    return {
        "geopackage": str(out_path),
        "layers": {layer_names.get(k, k): len(v) for k, v in tables.items()},
        "csv": {layer_names.get(k, k): str(p) for k, p in csv_paths.items()},
    }


def summary_method(area_method: str, class_names) -> dict:
    """The ``method`` entry of a sidecar: how cells are weighted, measured and summed."""
    return {
        "weighting": "coverage fraction of each cell inside the zone (exactextract) x cell area",
        "cell_area": area_method,
        "cell_counts": "whole cells with coverage > 0 (valid_cells: rate present; nodata_cells: rate NaN)",
        "area_km2": "area of the zone on the raster grid (parts outside the grid not counted)",
        "zone_area_km2": "whole area of the zone polygon, measured like the cells",
        "map_coverage_fraction": "area_km2 / zone_area_km2: below 1 where the zone runs off the map",
        "percentiles": (
            "area-weighted, from a histogram with a zero bin, a (0, 0.01) mm/kyr bin, 4000 "
            "log-spaced bins 0.01-10000 mm/kyr and an overflow bin, interpolated within the "
            f"bin clipped to the exact min/max; resolution {PERCENTILE_RELATIVE_RESOLUTION:.4%} of the value"
        ),
        "rock_volume": "sum of rate [mm/kyr] x covered area [km2]; 1 mm/kyr over 1 km2 = 1 m3/yr",
        "rock_mass": "rock volume x bulk density of the cell's rock type (rocks.csv, g/cm3 = t/m3)",
        "sinkholes": "rate, hazard class and rock of the cell holding each point; a point counts in every zone it intersects",
        "covered_karst": (
            "only when the map folder has covered_karst.tif: covered_soluble_area_km2 and exposed_soluble_area_km2 "
            "sum coverage x cell area x soluble-area fraction over cells of class 2 (soluble bedrock under "
            "insoluble cover) and class 1 (exposed); covered_soluble_share = covered / (covered + exposed), "
            "soluble cells of unknown cover in neither; a screening flag of the setting of cover-collapse "
            "sinkholes, not a site investigation; the rates do not depend on cover"),
        "hazard_classes": class_names,
        "hazard_labels": ("hazard_dominant_name: the class of largest area; hazard_highest_name: the highest "
                          "class covering at least highest_class_min_share of area_km2; hazard_max_name "
                          "(any single cell) is deprecated and will be removed in the next release"),
    }


def layer_provenance(file, layer) -> dict:
    """Sidecar entry of a polygon layer (``PolygonLayer``) read from ``file``."""
    return {
        "file": str(file), "layer": layer.layer, "id_field": layer.id_field, "count": len(layer),
        "repaired_geometries": layer.repaired, "reprojected_from": layer.reprojected_from,
    }


def zone_table(layer, cols, class_names, area_method, method_column: bool = True):
    """GeoDataFrame of the zone layer: id, summary columns, method (unless ``method_column``
    is False), geometry (file's CRS)."""
    data = {layer.id_field: layer.frame[layer.id_field].to_numpy()}
    data.update(user_attributes(layer.frame, skip=(layer.id_field,), taken=list(cols) + ["cell_area_method"]))
    data.update(cols)
    if method_column:
        data["cell_area_method"] = np.full(len(layer), "geodesic" if area_method.startswith("geodesic") else "planar", dtype=object)
    return geopandas.GeoDataFrame(data, geometry=list(layer.frame.geometry.values), crs=layer.frame.crs)


def point_table(points, values, class_names, rock_names):
    frame = points.frame
    data = user_attributes(frame, taken=("denudation_mm_per_kyr", "hazard_class", "hazard_name", "rock"))
    hz = values["hazard"]
    data["denudation_mm_per_kyr"] = values["rate"]
    data["hazard_class"] = hz.astype(np.int64)
    data["hazard_name"] = np.array([class_names[h] if 0 <= h < len(class_names) else "" for h in hz], dtype=object)
    data["rock"] = np.array([rock_names[r] if r >= 0 else "" for r in values["rock"]], dtype=object)
    return geopandas.GeoDataFrame(data, geometry=list(frame.geometry.values), crs=frame.crs)


def write_summary_files(out_path, tables, layer_names, csv_paths, sidecar, meta):
    """Write the GeoPackage ``out_path`` (one layer per table, named by ``layer_names``), the
    CSV twins ``csv_paths`` (the tables without geometry) and the JSON ``sidecar`` under
    staging names, then rename them all; on failure remove them."""
    finals = [out_path, *csv_paths.values(), sidecar]
    with staged_files(finals) as temps:
        write_layers(temps[0], {layer_names.get(k, k): v for k, v in tables.items()})
        _style_summary(temps[0], tables, layer_names, meta)
        for (key, path), tmp in zip(csv_paths.items(), temps[1:-1]):
            try:
                tables[key].drop(columns=tables[key].geometry.name).to_csv(tmp, index=False)
            except OSError as exc:
                raise OutputError(f"{path}: cannot write ({exc.strerror or exc}); choose a writable folder") from None
        try:
            temps[-1].write_text(json.dumps(meta, indent=2, default=str) + "\n", encoding="utf-8")
        except OSError as exc:
            raise OutputError(f"{sidecar}: cannot write ({exc.strerror or exc}); choose a writable folder") from None


def _style_summary(gpkg, tables, layer_names, meta) -> None:
    """Layer descriptions and default styles (``layer_styles``) of a summary GeoPackage."""
    kinds = {ZONES_LAYER: "zones", UNITS_LAYER: "planning_units", POINTS_LAYER: "sinkholes"}
    folder = meta.get("map_folder") or meta.get("batch_folder")
    scheme = map_class_scheme(folder) if folder else None
    breaks, names = scheme if scheme else (None, meta.get("method", {}).get("hazard_classes"))
    style_summary(gpkg, {layer_names.get(k, k): kinds.get(k, "zones") for k in tables},
                  {layer_names.get(k, k): v for k, v in tables.items()}, breaks, names)
