"""The one table of job-file sections and keys (``JOB_TABLE``) and the starter files of
`denude init` generated from it (``job_template``, ``write_starter_files``).

Each key carries the settings field it fills, an example value, a one-line help and whether
the template leaves it active. ``io/jobfile.py`` loads job files against this table; the
``[uncertainty]`` and ``[scenario]`` sections come from ``io/uncertainty_spec.py``'s own key
lists, so neither the loader nor the template can drift from what is read.
"""

from __future__ import annotations

import json
from dataclasses import dataclass
from pathlib import Path

from denude.cautions import CAUTION
from denude.core.hazard import DEFAULT_BREAKS_MM_PER_KYR, DEFAULT_CLASS_NAMES
from denude.errors import OutputError
from denude.registry import CHOICES, INPUT_ROLES, LAYERS, PCO2_FROM_AET, UNIT_FIELDS

@dataclass(frozen=True)
class JobKey:
    """One key of a job-file section: the settings field it fills, an example value for the
    template `denude init` writes, a one-line help, and whether the template leaves it active."""

    field: str
    example: object
    help: str
    active: bool = False


def _role_help(name: str) -> str:
    return INPUT_ROLES[name].help


def _choices(name: str) -> str:
    return " | ".join(CHOICES[name])


#: The one table of job-file sections: section -> {key: JobKey}. The loader, the [batch]
#: reader and the `denude init` template all read it.
JOB_TABLE: dict[str, dict[str, JobKey]] = {
    "inputs": {
        "lithology": JobKey("lithology", "lithology.tif", _role_help("lithology"), True),
        "rocks": JobKey("rocks", "rocks.csv", "Rock table CSV (code,name,mineral,density_g_cm3,purity); "
                        "built-in table when omitted.", True),
        "runoff": JobKey("runoff", "runoff.tif", "Runoff, mm/yr: a raster path or a number.", True),
        "precipitation": JobKey("precipitation", "precipitation.tif",
                                "Precipitation, mm/yr, with aet instead of runoff (runoff = P - AET, >= 0)."),
        "aet": JobKey("aet", "aet.tif", "Actual evapotranspiration, mm/yr: a raster path or a number."),
        "pco2": JobKey("pco2", 0.01, f"Soil PCO2 in pco2_units (raster or number), or \"{PCO2_FROM_AET}\" "
                       "for Brook et al. (1983) from aet.", True),
        "pco2_units": JobKey("pco2_units", CHOICES["pco2_units"][0], f"Units of pco2: {_choices('pco2_units')} "
                             "(default: the raster's declared unit, else atm).", True),
        "elevation": JobKey("elevation", "dem.tif", "Elevation, m above sea level (raster or number); "
                            "converts ppmv PCO2 to atm."),
        "air_pressure_atm": JobKey("air_pressure_atm", 1.0, "Air pressure, atm, for ppmv PCO2, instead of "
                                   "elevation (default 1 atm)."),
        "temperature": JobKey("temperature", 10.0, "Temperature, degrees C: a raster path or a number.", True),
        "soluble_fraction": JobKey("soluble_fraction", 1.0, _role_help("soluble_fraction")),
        "cover": JobKey("cover", "cover_thickness.tif",
                        "Insoluble cover over the bedrock: thickness, m, or a 0/1 mask (raster or number); adds the "
                        "covered_karst layer (the rate is unchanged)."),
        "cover_min_thickness_m": JobKey("cover_min_thickness_m", 0.0,
                                        "Least cover thickness, m, that counts as cover (default 0: any thickness > 0, "
                                        "a mask value of 1)."),
        **{field: JobKey(field, CHOICES[field][1], f"Units of {role}: {_choices(field)} (default: the raster's "
                         f"declared unit, else {CHOICES[field][0]}); wins over the raster's metadata.")
           for field, role in UNIT_FIELDS.items() if field != "pco2_units"},
    },
    "grid": {
        "like": JobKey("grid_like", "other.tif", "Use this raster's grid (default: the lithology raster's grid)."),
        "crs": JobKey("grid_crs", "EPSG:3035", "Or a target CRS, with resolution."),
        "resolution": JobKey("grid_resolution", 1000.0, "Cell size in CRS units: one number or [x, y]."),
        "bounds": JobKey("grid_bounds", [4000000.0, 2600000.0, 4100000.0, 2700000.0],
                         "[left, bottom, right, top] in CRS units; default: the lithology extent in crs, "
                         "snapped outward to whole cells."),
    },
    "run": {
        "out": JobKey("out", "out", "Output folder (refused if it exists, unless overwrite).", True),
        "chemistry": JobKey("chemistry", CHOICES["chemistry"][0],
                            f"{_choices('chemistry')}: White (1984) closed form or full carbonate speciation.", True),
        "overwrite": JobKey("overwrite", False, "Replace an existing output folder."),
        "workers": JobKey("workers", 2, "Parallel workers (default: the cores available)."),
        "block_size": JobKey("block_size", 512, "Block and output tile size, cells (a multiple of 16)."),
        "gdal_cache_mb": JobKey("gdal_cache_mb", 128, "GDAL block cache, MB."),
        "layers": JobKey("layers", list(LAYERS), "Output layers (default all; covered_karst when a cover is given)."),
        "layout": JobKey("layout", CHOICES["layout"][0], f"{_choices('layout')}: COG up to 8192 x 8192 cells, "
                         "else tiled BigTIFF."),
        "compress": JobKey("compress", CHOICES["compress"][0], f"{_choices('compress')}."),
        "lithology_resampling": JobKey("lithology_resampling", CHOICES["lithology_resampling"][0],
                                       f"{_choices('lithology_resampling')} (interpolating methods are refused)."),
        "continuous_resampling": JobKey("continuous_resampling", CHOICES["continuous_resampling"][0],
                                        f"{_choices('continuous_resampling')}."),
        "negative_runoff": JobKey("negative_runoff", CHOICES["negative_runoff"][0],
                                  f"{_choices('negative_runoff')}: refuse negative runoff cells, or take them "
                                  "as 0 mm/yr (counted in a warning)."),
        "out_of_range": JobKey("out_of_range", CHOICES["out_of_range"][0],
                               f"{_choices('out_of_range')}: refuse continuous input cells outside their plausible "
                               "range (or not finite), or take them as nodata (counted per input)."),
        "below_freezing": JobKey("below_freezing", CHOICES["below_freezing"][0],
                                 f"{_choices('below_freezing')}: temperature cells below 0 degrees C become nodata, "
                                 "or are taken as 0 degrees C water (counted)."),
    },
    "hazard": {
        "breaks_mm_per_kyr": JobKey("hazard_breaks_mm_per_kyr", list(DEFAULT_BREAKS_MM_PER_KYR),
                                    "Class breaks, mm/kyr, increasing."),
        "names": JobKey("hazard_names", list(DEFAULT_CLASS_NAMES), "Class names, one more than the breaks."),
    },
    "batch": {
        "tile_size": JobKey("tile_size", 4096, "Tile side, cells, a multiple of 16 (`denude batch` only)."),
        "workers": JobKey("workers", 2, "Local worker processes (default: the cores available; 0 = in this "
                          "process)."),
        "scheduler": JobKey("scheduler", "tcp://SCHEDULER:8786", "Run on an existing Dask cluster."),
        "retries": JobKey("retries", 0, "Extra attempts for a failing tile."),
        "merge": JobKey("merge", False, "Also write one merged cloud-optimised GeoTIFF per layer."),
        "zones": JobKey("zones", "watersheds.gpkg", "Zone polygons: per-zone summaries merged from the tiles."),
        "zones_layer": JobKey("zones_layer", "watersheds", "Layer of the zone file."),
        "zones_id_field": JobKey("zones_id_field", "watershed_id", "Zone id field (default: feature ids)."),
        "units": JobKey("units", "parcels.gpkg", "Planning-unit polygons (e.g. parcels): written as layer "
                        "planning_units (with zones)."),
        "units_layer": JobKey("units_layer", "parcels", "Layer of the planning-unit file."),
        "units_id_field": JobKey("units_id_field", "parcel_id", "Planning-unit id field."),
        "points": JobKey("points", "sinkholes.gpkg", "Sinkhole points: sampled and counted per zone (layer "
                         "sinkholes, with zones)."),
        "points_layer": JobKey("points_layer", "sinkholes", "Layer of the sinkhole file."),
    },
}

#: Sections that fill MapSettings; [batch] holds the options of `denude batch` only.
BATCH_SECTION = "batch"

#: Job-file sections -> {key: MapSettings field} (the map sections of ``JOB_TABLE``).
SECTIONS = {section: {key: spec.field for key, spec in keys.items()}
            for section, keys in JOB_TABLE.items() if section != BATCH_SECTION}

#: [batch] keys (options of `run_batch`, not MapSettings fields).
BATCH_KEYS = tuple(JOB_TABLE[BATCH_SECTION])

#: [batch] keys that name a vector file (resolved against the job file's folder).
BATCH_PATH_KEYS = ("zones", "units", "points")

#: Sections parsed and checked in ``io/uncertainty_spec.py``: [uncertainty] is read by the
#: uncertainty run; [scenario] becomes ``MapSettings.scenario``.
OTHER_SECTIONS = ("uncertainty", "scenario")


# ----------------------------------------------------------------------------- starter files
JOB_TEMPLATE_NAME = "job.toml"
ROCKS_TEMPLATE_NAME = "rocks.csv"


def _toml_value(value) -> str:
    if isinstance(value, bool):
        return "true" if value else "false"
    if isinstance(value, (int, float)):
        return repr(value)
    if isinstance(value, (list, tuple)):
        return "[" + ", ".join(_toml_value(v) for v in value) + "]"
    return json.dumps(str(value))        # a TOML basic string: JSON escapes are valid TOML escapes


def job_template() -> str:
    """A commented job file with every key the loader knows, generated from ``JOB_TABLE`` and,
    for ``[scenario]`` and ``[uncertainty]``, from ``uncertainty_spec.template_sections``.
    The keys a first run needs are active (edit their values); the others, and those two
    sections, are commented out, showing an example value."""
    lines = [
        "# denude job file. Check it with `denude check --job job.toml`, run it with",
        "# `denude map --job job.toml` (or `denude batch --job job.toml`). Flags override the file;",
        "# relative paths resolve against this file's folder. Remove the leading '# ' to use a key.",
        f"# {CAUTION}",
    ]
    for section, keys in JOB_TABLE.items():
        lines += ["", f"[{section}]"]
        for key, spec in keys.items():
            lines.append(f"# {spec.help}")
            lines.append(("" if spec.active else "# ") + f"{key} = {_toml_value(spec.example)}")
    from denude.io.uncertainty_spec import template_sections  # lazily: it pulls the numba kernels in

    for header, comment, keys in template_sections():
        lines += ["", f"# {comment}", f"# [{header}]"]
        for key, example, help_text in keys:
            lines += [f"# {help_text}", f"# {key} = {_toml_value(example)}"]
    return "\n".join(lines) + "\n"


def write_starter_files(folder, overwrite: bool = False) -> list[Path]:
    """Write ``job.toml`` (the commented template) and ``rocks.csv`` (an editable copy of the
    built-in rock table) into ``folder`` (created if needed); return the paths written. Existing
    files are refused unless ``overwrite``."""
    from denude.core.rocks import RockTable
    from denude.io.rock_csv import write_rock_table

    folder = Path(folder)
    if folder.exists() and not folder.is_dir():
        raise OutputError(f"{folder} is a file; give a folder for the starter files")
    targets = [folder / JOB_TEMPLATE_NAME, folder / ROCKS_TEMPLATE_NAME]
    existing = [str(p) for p in targets if p.exists()]
    if existing and not overwrite:
        raise OutputError(f"{', '.join(existing)} already exists; choose another folder or pass --overwrite")
    try:
        folder.mkdir(parents=True, exist_ok=True)
        targets[0].write_text(job_template(), encoding="utf-8")
        write_rock_table(RockTable.builtin(), targets[1])
    except OSError as exc:
        raise OutputError(f"cannot write the starter files into {folder} ({exc.strerror}); choose a writable folder") from None
    return targets
