"""`denude compare BASE SCENARIO`: the change between two map output folders on one grid.

Writes, window by window, ``denudation_difference_mm_per_kyr.tif`` (scenario - base),
``denudation_ratio.tif`` (scenario / base, NaN where the base rate is 0 or either is nodata),
``co2_drawdown_difference_t_per_km2_yr.tif`` and ``run.json``; with zones, ``zones_change.gpkg``
and ``.csv`` with per zone the base and scenario mean rate, rock volume and CO2 drawdown per
year, their differences and ratios (each folder summarised with the coverage-fraction machinery
of ``denude summarize``). Folders on different grids are an error that names the difference.
"""

from __future__ import annotations

import json
import time
from dataclasses import dataclass
from pathlib import Path

import numpy as np
from rasterio.windows import Window

import denude
from denude.cautions import CAUTION, UPPER_BOUND_NOTE
from denude.errors import GridError, InputError
from denude.execution.blocks import block_windows
from denude.execution.validation import refuse_inputs_inside
from denude.io.grid import Grid, cell_area_method
from denude.io.map_folder import output_file, read_layer
from denude.io.outdir import check_new_folder, commit_dir, make_staging_dir, raise_discarded, remove_dead_staging
from denude.io.rasters import OutputSpec, RasterWriter, choose_layout
from denude.reports.run_record import RUN_RECORD, write_run_record
from denude.execution.summaries import zone_partials
from denude.reports.summary_files import layer_provenance, sidecar_head, write_summary_files, zone_table

RATE = "denudation_mm_per_kyr.tif"
CO2 = "co2_drawdown_t_per_km2_yr.tif"
BLOCK = 512

#: Output rasters: file -> (units, quantity, formula).
COMPARE_LAYERS = {
    "denudation_difference_mm_per_kyr.tif": ("mm/kyr", "change of the maximum denudation rate", "D_scenario - D_base"),
    "denudation_ratio.tif": ("1", "ratio of the maximum denudation rates", "D_scenario / D_base (NaN where D_base = 0)"),
    "co2_drawdown_difference_t_per_km2_yr.tif": ("t CO2 km-2 yr-1", "change of the CO2 drawdown",
                                                 "CO2_scenario - CO2_base"),
}

#: Zone quantities compared.
ZONE_COLUMNS = ("denudation_mean_mm_per_kyr", "rock_volume_m3_per_yr", "co2_drawdown_t_per_yr")


@dataclass
class CompareSummary:
    out_dir: str
    outputs: list
    record: dict


def _open_pair(base: Path, scenario: Path, name: str):
    import rasterio


    datasets = []
    for folder in (base, scenario):
        path = output_file(folder, name)
        if not folder.is_dir():
            raise InputError(f"{folder}: not a folder; give the output folder of 'denude map'")
        if not path.is_file():
            raise InputError(f"{folder}: has no {name}; give the output folder of 'denude map' or 'denude batch'")
        datasets.append(rasterio.open(path))
    return datasets


def check_same_grid(a, b, a_name: str, b_name: str) -> None:
    """GridError naming the first difference (size, CRS, transform) of two open rasters."""
    if (a.width, a.height) != (b.width, b.height):
        raise GridError(f"{b_name} is {b.width} x {b.height} cells but {a_name} is {a.width} x {a.height}; "
                        "run both maps on one target grid (--grid-like)")
    if a.crs != b.crs:
        raise GridError(f"{b_name} has CRS {b.crs} but {a_name} has CRS {a.crs}; run both maps on one target grid")
    if not a.transform.almost_equals(b.transform):
        raise GridError(f"{b_name} has transform {tuple(b.transform)[:6]} but {a_name} has {tuple(a.transform)[:6]} "
                        "(origin or cell size differ); run both maps on one target grid (--grid-like)")


def _spec(name: str, base: Path, scenario: Path) -> OutputSpec:
    units, quantity, formula = COMPARE_LAYERS[name]
    tags = {"units": units, "quantity": quantity, "formula": formula, "base_folder": str(base),
            "scenario_folder": str(scenario), "caution": CAUTION, "upper_bound_note": UPPER_BOUND_NOTE,
            "denude_version": denude.__version__}
    return OutputSpec(name=name, dtype="float32", nodata=float("nan"), overview_resampling="average",
                      tags=tuple(tags.items()), description=f"{quantity} [{units}]")


def difference_and_ratio(base, scenario, dtype=np.float32):
    """(scenario - base, scenario / base) in ``dtype`` (computed in float64); the ratio is NaN
    where base is 0 or either is NaN."""
    a = np.asarray(base, np.float64)
    b = np.asarray(scenario, np.float64)
    with np.errstate(invalid="ignore", divide="ignore"):
        ratio = np.where(a != 0, b / np.where(a != 0, a, 1.0), np.nan)
    ratio = np.where(np.isnan(a) | np.isnan(b), np.nan, ratio)
    return (b - a).astype(dtype), ratio.astype(dtype)


def _run_json(folder: Path):
    path = folder / "run.json"
    try:
        return json.loads(path.read_text(encoding="utf-8"))
    except (OSError, ValueError):
        return None


def run_compare(base_dir, scenario_dir, out, zones=None, overwrite: bool = False) -> CompareSummary:
    """Write the comparison of two map output folders into ``out`` (see the module doc);
    ``zones``: a ``ZoneSpec`` for the per-zone table."""
    started = time.perf_counter()
    base, scenario, out = Path(base_dir).resolve(), Path(scenario_dir).resolve(), Path(out).resolve()
    check_new_folder(out, overwrite)
    paths = {"base folder": str(base), "scenario folder": str(scenario)}
    if zones is not None:
        paths["zones"] = zones.path
    refuse_inputs_inside(paths, out, "output folder")
    a_rate, b_rate = _open_pair(base, scenario, RATE)
    a_co2, b_co2 = _open_pair(base, scenario, CO2)
    datasets = (a_rate, b_rate, a_co2, b_co2)
    try:
        check_same_grid(a_rate, b_rate, f"{base / RATE}", f"{scenario / RATE}")
        check_same_grid(a_rate, a_co2, f"{base / RATE}", f"{base / CO2}")
        check_same_grid(a_rate, b_co2, f"{base / RATE}", f"{scenario / CO2}")
        grid = Grid.from_dataset(a_rate)
        remove_dead_staging(out.parent)
        staging = make_staging_dir(out)
        writers = {}
        try:
            layout = choose_layout("auto", grid)
            for name in COMPARE_LAYERS:
                writers[name] = RasterWriter(staging / name, grid, _spec(name, base, scenario), BLOCK, "deflate", layout)
            names = list(COMPARE_LAYERS)
            for window in block_windows(grid.height, grid.width, BLOCK):
                w = Window(window.col_off, window.row_off, window.width, window.height)
                diff, ratio = difference_and_ratio(read_layer(a_rate, w), read_layer(b_rate, w))
                co2_diff, _ = difference_and_ratio(read_layer(a_co2, w), read_layer(b_co2, w))
                writers[names[0]].write(diff, w)
                writers[names[1]].write(ratio, w)
                writers[names[2]].write(co2_diff, w)
            for writer in writers.values():
                writer.finish()
            outputs = [writer.close().name for writer in writers.values()]
            if zones is not None:
                outputs += _zone_change(staging, base, scenario, zones, grid)
            record = {
                "tool": "denude", "version": denude.__version__, "command": "compare",
                "caution": CAUTION, "upper_bound_note": UPPER_BOUND_NOTE,
                "base_folder": str(base), "scenario_folder": str(scenario),
                "base_scenario": (_run_json(base) or {}).get("settings", {}).get("scenario"),
                "scenario_scenario": (_run_json(scenario) or {}).get("settings", {}).get("scenario"),
                "grid": grid.as_dict(),
                "outputs": outputs + [RUN_RECORD],
                "wall_time_s": round(time.perf_counter() - started, 3),
            }
            if zones is not None:
                record["zones"] = {"path": zones.path, "layer": zones.layer, "id_field": zones.id_field}
            write_run_record(staging / RUN_RECORD, record)
            commit_dir(staging, out, overwrite)
        except BaseException as exc:
            for writer in writers.values():
                writer.abort()
            raise_discarded([(staging, out)], exc)
    finally:
        for ds in datasets:
            ds.close()
    return CompareSummary(str(out), outputs + [RUN_RECORD], record)


def _zone_change(staging: Path, base: Path, scenario: Path, zones, grid) -> list[str]:
    from pyproj import CRS

    from denude.io.vectors import read_polygons

    layer = read_polygons(zones.path, zones.layer, zones.id_field, CRS.from_wkt(grid.crs.to_wkt()), what="zone")
    a = zone_partials(base, layer.geometry).finalize()
    b = zone_partials(scenario, layer.geometry).finalize()
    cols = {}
    for name in ZONE_COLUMNS:
        cols[f"base_{name}"] = a[name]
        cols[f"scenario_{name}"] = b[name]
        cols[f"change_{name}"], cols[f"ratio_{name}"] = difference_and_ratio(a[name], b[name], np.float64)
    area_method = cell_area_method(grid)
    frame = zone_table(layer, cols, [], area_method)
    out_path, csv_path = staging / "zones_change.gpkg", staging / "zones_change.csv"
    sidecar = staging / "zones_change.summary.json"
    meta = {
        **sidecar_head("denude compare"),
        "base_folder": str(base), "scenario_folder": str(scenario),
        "method": {"weighting": "coverage fraction of each cell inside the zone (exactextract) x cell area",
                   "cell_area": area_method, "change": "scenario - base", "ratio": "scenario / base (NaN where base is 0)"},
        "zones": layer_provenance(zones.path, layer),
        "units": {"*denudation_mean_mm_per_kyr": "mm/kyr", "*rock_volume_m3_per_yr": "m3/yr",
                  "*co2_drawdown_t_per_yr": "t/yr", "ratio_*": "1"},
    }
    write_summary_files(out_path, {"zones": frame}, {"zones": "zones"}, {"zones": csv_path}, sidecar, meta)
    return [out_path.name, csv_path.name, sidecar.name]
