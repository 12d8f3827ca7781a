"""Provenance of raster jobs: reading run.json back, and terminal text for `check` and `map`.

The record itself is written by ``denude.execution.map_run.run_map`` (inside the staging
folder, so it is renamed into place with the rasters); this module only reads and renders.
"""

from __future__ import annotations

import json
from pathlib import Path

from denude.errors import InputError

RUN_RECORD = "run.json"


def read_run_record(out_dir) -> dict:
    """The run.json of a `denude map` output folder."""
    path = Path(out_dir) / RUN_RECORD
    try:
        return json.loads(path.read_text(encoding="utf-8"))
    except FileNotFoundError:
        raise InputError(f"{path} not found; give a folder written by `denude map`") from None
    except json.JSONDecodeError as exc:
        raise InputError(f"{path} is not valid JSON ({exc.msg}); re-run `denude map`") from None


def _fmt(value) -> str:
    return "n/a" if value is None else f"{value:.4g}"


def check_lines(report) -> list[str]:
    """Lines describing a validated job (a ``JobReport``)."""
    s = report.settings
    lines = [f"target grid: {report.grid.describe()}", f"output layout: {report.layout}",
             f"chemistry: {s.chemistry}"]
    for role, item in report.inputs.items():
        choice = report.units.get(role)
        if item.constant is not None:
            unit = choice.unit.name if choice is not None and (role == "pco2" or choice.source == "option") else ""
            lines.append(f"{role}: constant {item.constant:g} {unit}".rstrip())
            continue
        lines.append(item.info.describe())
        if choice is not None:
            lines.append(f"  unit {choice.unit.name} ({choice.source})")
        lines.append(
            f"  overlap {100 * item.overlap:.1f}% of the target grid; {item.warp.describe()}"
            + ("" if item.value_min is None else f"; values {_fmt(item.value_min)} to {_fmt(item.value_max)}")
        )
    rocks = report.rocks
    lines.append(f"rock table: {rocks.source} ({len(rocks)} rock types, codes {', '.join(map(str, rocks.codes))})")
    lines.append(
        f"lithology codes found: {', '.join(map(str, report.codes_found)) or 'none'}; "
        f"not in the table: {', '.join(map(str, report.codes_missing)) or 'none'}"
    )
    lines.extend(f"note: {note}" for note in report.notes)
    return lines


def summary_lines(summary) -> list[str]:
    """Lines summarising a finished run (a ``MapRunSummary``)."""
    c = summary.counts
    return [
        f"wrote {summary.out_dir} ({', '.join(summary.outputs)})",
        f"grid: {summary.grid.describe()}; {summary.blocks} blocks, layout {summary.layout}",
        f"cells: {c.cells} total, {c.computed} computed, {c.nodata} nodata, {c.unknown_code} unknown code, "
        f"{c.out_of_range} out of range, {c.zero_runoff} zero runoff"
        + (f" ({c.negative_runoff} negative, taken as 0)" if c.negative_runoff else ""),
        f"wall time: {summary.wall_time_s:.1f} s",
    ]
