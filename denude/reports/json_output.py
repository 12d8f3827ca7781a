"""JSON-ready records of what a command did, for `--json` (one object on stdout).

Built from the public fields of the execution layer's results; every record carries
``command``, ``ok``, ``outputs`` (files written, empty for a check), ``counts`` and the caution.
The CLI adds ``warnings`` (the one-line notes also shown on stderr).
"""

from __future__ import annotations

import math
from pathlib import Path

from denude.cautions import CAUTION


def _number(value):
    """JSON has no NaN or infinity: such numbers become null."""
    if value is None:
        return None
    value = float(value)
    return value if math.isfinite(value) else None


def check_record(report, command: str = "check") -> dict:
    """What `denude check` (or `map --dry-run`) found: the target grid, each input, the codes."""
    s = report.settings
    inputs = {}
    for role, item in report.inputs.items():
        if item.constant is not None:
            inputs[role] = {"constant": _number(item.constant)}
            continue
        inputs[role] = {
            "path": item.info.path,
            "crs_wkt": item.info.crs_wkt,
            "width": item.info.width,
            "height": item.info.height,
            "dtype": item.info.dtype,
            "overlap_fraction": _number(item.overlap),
            "resampling": None if item.warp.offset is not None else item.warp.resampling,
            "aligned": item.warp.offset is not None,
            "value_min": _number(item.value_min),
            "value_max": _number(item.value_max),
        }
    rocks = report.rocks
    return {
        "command": command,
        "ok": True,
        "dry_run": True,
        "outputs": [],
        "grid": report.grid.as_dict(),
        "layout": report.layout,
        "chemistry": s.chemistry,
        "inputs": inputs,
        "rock_table": {"source": rocks.source, "codes": [int(c) for c in rocks.codes]},
        "counts": {"codes_found": len(report.codes_found), "codes_missing": len(report.codes_missing)},
        "codes_found": [int(c) for c in report.codes_found],
        "codes_missing": [int(c) for c in report.codes_missing],
        "notes": list(report.notes),
        "settings": s.as_dict(),
        "caution": CAUTION,
    }


def map_record(summary) -> dict:
    """What `denude map` wrote (a ``MapRunSummary``)."""
    out = Path(summary.out_dir)
    return {
        "command": "map",
        "ok": True,
        "dry_run": False,
        "out_dir": str(out),
        "outputs": [str(out / name) for name in summary.outputs],
        "grid": summary.grid.as_dict(),
        "layout": summary.layout,
        "blocks": summary.blocks,
        "counts": summary.counts.as_dict(),
        "wall_time_s": _number(summary.wall_time_s),
        "run_record": str(out / "run.json"),
        "caution": CAUTION,
    }


def batch_record(summary, dry_run: bool = False) -> dict:
    """What `denude batch` did (a ``BatchSummary``); ``ok`` is false when any tile failed."""
    out = Path(summary.out_dir)
    return {
        "command": "batch",
        "ok": bool(summary.ok),
        "dry_run": dry_run,
        "out_dir": str(out),
        "outputs": [] if dry_run else [str(out / name) for name in summary.outputs],
        "grid": summary.grid.as_dict(),
        "tile_size": summary.tile_size,
        "tiles": {"total": summary.tiles_total, "run": summary.tiles_run, "skipped": summary.tiles_skipped,
                  "failed": dict(summary.tiles_failed), "redone_corrupt": list(summary.redone_corrupt)},
        "engine": summary.engine,
        "dashboard_link": summary.dashboard_link,
        "counts": dict(summary.counts or {}),
        "wall_time_s": _number(summary.wall_time_s),
        "caution": CAUTION,
    }


def summarize_record(meta: dict, out_path) -> dict:
    """What `denude summarize` wrote, from the metadata it also stores in ``.summary.json``."""
    outputs = meta.get("outputs", {})
    out_path = Path(out_path)
    files = [str(out_path)] + [str(p) for p in outputs.get("csv", {}).values()]
    files.append(str(out_path.with_name(out_path.stem + ".summary.json")))
    return {
        "command": "summarize",
        "ok": True,
        "out": str(out_path),
        "outputs": files,
        "layers": dict(outputs.get("layers", {})),
        "counts": {"rows": dict(outputs.get("layers", {})),
                   "repaired_geometries": int(meta.get("zones", {}).get("repaired_geometries", 0)
                                              + meta.get("planning_units", {}).get("repaired_geometries", 0))},
        "cell_area_method": meta.get("method", {}).get("cell_area"),
        "map_folder": meta.get("map_folder"),
        "caution": CAUTION,
    }
