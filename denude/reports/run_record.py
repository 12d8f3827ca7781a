"""``run.json``: the provenance record of `denude map` and `denude batch`, in one schema.

Both commands write: ``tool``, ``version``, ``command``, ``caution``, ``upper_bound_note``,
``settings``, ``inputs`` (role -> path, size, SHA-256 for local files, CRS, grid, nodata,
resampling, unit; constants with their unit; the rock table and the job file), ``grid``,
``grid_source``, ``counts``, ``outputs`` and ``wall_time_s``; each command adds its own keys
(``blocks`` and ``layout`` of a map, ``tiles`` and ``engine`` of a batch).

Imports only the layers below the execution layer, so the runners can call it.
"""

from __future__ import annotations

import json
import math
import os
import threading

import denude
from denude.cautions import CAUTION, UPPER_BOUND_NOTE
from denude.io.mosaic import is_virtual_path
from denude.io.outdir import write_text_atomic
from denude.io.rasters import file_sha256
from denude.io.units import settings_unit
from denude.registry import INPUT_ROLES

RUN_RECORD = "run.json"


def _json_number(value):
    """A float for JSON: NaN and infinities become strings."""
    if value is None or (isinstance(value, float) and math.isfinite(value)):
        return value
    return str(value)


def hashed_paths(settings, report) -> list[str]:
    """Local files whose SHA-256 a record carries: raster inputs, rock table, job file
    (GDAL virtual paths, e.g. remote objects, get no checksum)."""
    paths = {item.info.path for item in report.inputs.values()
             if item.info is not None and not is_virtual_path(item.info.path)}
    paths |= {p for p in (settings.rocks, settings.job_file) if p}
    return sorted(paths)


class HashJob:
    """SHA-256 of files, computed on a background thread while the run goes on."""

    def __init__(self, paths):
        self.hashes: dict = {}
        self._thread = threading.Thread(target=self._run, args=(list(paths),), daemon=True)
        self._thread.start()

    def _run(self, paths) -> None:
        self.hashes.update({p: file_sha256(p) for p in paths})

    def result(self) -> dict:
        self._thread.join()
        return self.hashes


def _unit(settings, role: str) -> dict:
    """``unit`` (the unit the values were read in), ``unit_source`` (metadata, option or
    default) and, where they differ from it, the unit the run converted them to."""
    unit, source = settings_unit(settings, role)
    entry = {"unit": unit.name, "unit_source": source}
    declared = next((e[3] for e in settings.input_units if e[0] == role and len(e) > 3 and e[3]), None)
    if declared is not None:
        entry["unit_declared"] = declared
    if not unit.identity:
        entry["converted_to"] = unit.target
        entry["conversion"] = unit.describe()
    return entry


def input_records(settings, report, hashes: dict) -> dict:
    """The ``inputs`` entry: one record per input of a validated job (a ``JobReport``)."""
    records = {}
    for role, item in report.inputs.items():
        if item.constant is not None:
            # a number has no metadata: its unit is the run's unless an option named another
            unit = _unit(settings, role)
            if unit["unit_source"] == "default":
                unit.pop("unit_source")
            records[role] = {"constant": item.constant, **unit}
            continue
        info = item.info
        crs = info.grid.crs
        records[role] = {
            "path": info.path,
            "size_bytes": info.size_bytes,
            "sha256": hashes.get(info.path),
            "crs_wkt": info.crs_wkt,
            "epsg": crs.to_epsg(),
            "width": info.width,
            "height": info.height,
            "resolution": list(info.res),
            "nodata": _json_number(info.nodata),
            "resampling": "none (aligned)" if item.warp.offset is not None else item.warp.resampling,
        }
        if role != "lithology":
            records[role].update(_unit(settings, role))
        else:
            records[role]["unit"] = INPUT_ROLES[role].unit
    if settings.rocks:
        records["rocks"] = {"path": settings.rocks, "size_bytes": os.path.getsize(settings.rocks),
                            "sha256": hashes.get(settings.rocks)}
    else:
        records["rocks"] = {"builtin": True}
    if settings.job_file:
        records["job_file"] = {"path": settings.job_file, "size_bytes": os.path.getsize(settings.job_file),
                               "sha256": hashes.get(settings.job_file)}
    return records


def run_record(command: str, settings, report, hashes: dict, grid, grid_source: str, counts: dict,
               outputs: list, wall_time_s: float, **extra) -> dict:
    """The record of one run of ``command`` ('map' or 'batch'); ``extra`` keys follow the
    common ones, in the order given (``counts``, ``outputs`` and ``wall_time_s`` come last)."""
    record = {
        "tool": "denude",
        "version": denude.__version__,
        "command": command,
        "caution": CAUTION,
        "upper_bound_note": UPPER_BOUND_NOTE,
        "settings": settings.as_dict(),
        "inputs": input_records(settings, report, hashes),
        "grid": grid.as_dict(),
        "grid_source": grid_source,
    }
    record.update(extra)
    if counts:                       # the policy counts are always listed, zero or not
        counts = {**counts, "below_freezing": counts.get("below_freezing", 0),
                  "set_to_nodata": counts.get("set_to_nodata", {})}
    record.update({"counts": counts, "outputs": list(outputs), "wall_time_s": round(wall_time_s, 3)})
    return record


def write_run_record(path, record: dict) -> None:
    """Write ``record`` as JSON to ``path`` (staged and renamed into place)."""
    write_text_atomic(path, json.dumps(record, indent=2, allow_nan=False, default=str) + "\n")
