"""Reading a `denude map` output folder back (or a `denude batch` folder: VRTs under the same
stems): the layers a zone summary needs, checked to share one north-up grid with a CRS.
"""

from __future__ import annotations

import json
from pathlib import Path

import rasterio

from denude.core.hazard import DEFAULT_CLASS_NAMES
from denude.errors import GridError, InputError
from denude.io.grid import Grid
from denude.io.rasters import check_georeferenced, read_band
from denude.registry import OPTIONAL_ZONE_LAYERS, OUTPUT_LAYERS, ZONE_LAYERS

#: Raster files of the output folder read by a zone summary (DEVELOPERS.md contract).
RATE_TIF = OUTPUT_LAYERS["denudation"].file
CO2_TIF = OUTPUT_LAYERS["co2_drawdown"].file
HAZARD_TIF = OUTPUT_LAYERS["hazard"].file
LITHOLOGY_TIF = OUTPUT_LAYERS["lithology"].file
SOLUBLE_TIF = OUTPUT_LAYERS["soluble_fraction"].file
COVER_TIF = OUTPUT_LAYERS["covered_karst"].file
ROCKS_CSV = "rocks.csv"
REQUIRED_FILES = tuple(OUTPUT_LAYERS[name].file for name in ZONE_LAYERS) + (ROCKS_CSV,)
#: Rasters a zone summary reads when the folder has them (written only with their input).
OPTIONAL_FILES = tuple(OUTPUT_LAYERS[name].file for name in OPTIONAL_ZONE_LAYERS)


def output_file(outdir: Path, name: str) -> Path:
    """A map layer in ``outdir``: the GeoTIFF of `denude map`, else the VRT mosaic that
    `denude batch` writes under the same stem."""
    path = outdir / name
    if not path.is_file() and path.suffix == ".tif" and path.with_suffix(".vrt").is_file():
        return path.with_suffix(".vrt")
    return path


def open_map_folder(outdir: Path):
    """Open the rasters of an output folder: (name -> dataset, their common Grid). The
    optional layers (``OPTIONAL_FILES``, e.g. ``covered_karst.tif``) are opened when present."""
    missing = [name for name in REQUIRED_FILES if not output_file(outdir, name).is_file()]
    if not outdir.is_dir():
        raise InputError(f"{outdir}: not a folder; give the output folder of 'denude map'")
    if missing:
        raise InputError(f"{outdir}: missing {', '.join(missing)}; give the complete output folder of 'denude map' or 'denude batch'")
    datasets = {}
    try:
        present = tuple(name for name in OPTIONAL_FILES if output_file(outdir, name).is_file())
        for name in REQUIRED_FILES[:-1] + present:
            try:
                datasets[name] = rasterio.open(output_file(outdir, name))
            except rasterio.errors.RasterioIOError as exc:
                raise InputError(f"{outdir / name}: not a readable raster ({' '.join(str(exc).split())}); rerun 'denude map'") from None
        ref = datasets[RATE_TIF]
        check_georeferenced(ref, f"{outdir / RATE_TIF}:", "rerun 'denude map' with a target CRS",
                            "warp it to a north-up grid")
        t = ref.transform
        for name, ds in datasets.items():
            if (ds.width, ds.height) != (ref.width, ref.height) or not ds.transform.almost_equals(t) or ds.crs != ref.crs:
                raise GridError(f"{outdir / name}: grid differs from {RATE_TIF}; rerun 'denude map' so all maps share one grid")
    except Exception:
        for ds in datasets.values():
            ds.close()
        raise
    return datasets, Grid.from_dataset(ref)


def read_layer(dataset, window=None):
    """Band 1 of an open map-folder layer (all of it, or ``window``). A read failure (a truncated
    or damaged file) is the one-line error of ``io/rasters.read_band`` naming the file."""
    return read_band(dataset, dataset.name, "map output", window=window)


def hazard_class_names(dataset) -> list[str]:
    """Class names of ``hazard_class.tif``, from its tags (a JSON list or a comma-separated
    value under a key such as ``class_names``), else the built-in names."""
    tags = {**dataset.tags(), **dataset.tags(1)}
    lowered = {k.lower(): v for k, v in tags.items()}
    for key in ("class_names", "hazard_class_names", "hazard_classes", "names", "classes"):
        value = lowered.get(key)
        if not value:
            continue
        try:
            names = json.loads(value)
            if isinstance(names, dict):
                names = [names[k] for k in sorted(names, key=lambda s: int(s))]
        except (ValueError, TypeError):
            sep = "|" if "|" in value else (";" if ";" in value else ",")
            names = [v.strip() for v in value.split(sep)]
        names = [str(n) for n in names if str(n).strip()]
        if names:
            return names
    return list(DEFAULT_CLASS_NAMES)


