"""The sinkhole record against the map: the ``sinkhole_evaluation`` entry of a summary sidecar.

Per hazard class: the sinkholes counted in it (points whose cell has that class), the class
area over the whole map [km2], the density per km2 with its exact 95 % Poisson (Garwood)
interval. The ROC AUC of the rate as a predictor of sinkhole cells (mapped cells holding at
least one point) against the other mapped cells (cells weighted equally, ties one half).
A ``SinkholeEvaluationWarning`` when density does not rise with class. Optionally, class
breaks set from the record (``denude.core.evaluation.breaks_from_record``), reported with
the densities they give and a job-file line to map with them; the map is not changed.

What it can show: whether mapped sinkholes fall where the rates are high. What it cannot: an
inventory is incomplete and biased towards roads, towns and easy ground, so densities are
lower bounds and the AUC measures agreement with where people looked as much as with where
the ground fails.
"""

from __future__ import annotations

import json
import warnings

import numpy as np

from denude.core.evaluation import AucCounter, breaks_from_record, class_densities, falling_steps
from denude.core.hazard import HAZARD_NODATA
from denude.errors import DenudeWarning

LIMITS = ("An inventory is incomplete and biased towards roads, towns and easy ground: densities are lower "
          "bounds, and the AUC measures agreement with where people looked as much as with where the ground fails. "
          "Cells are weighted equally in the AUC; densities use cell areas.")


class SinkholeEvaluationWarning(DenudeWarning):
    """The sinkhole record does not follow the hazard classes (density falls with class)."""


def _hazard_breaks(dataset):
    tags = {**dataset.tags(), **dataset.tags(1)}
    try:
        return [float(b) for b in json.loads(tags.get("class_breaks_mm_per_kyr", "null")) or []]
    except (ValueError, TypeError):
        return None


def evaluate_sinkholes(rate_dataset, hazard_dataset, areas_row_km2, point_rc, point_hazard, class_names,
                       record_breaks: bool = False, points_label: str = "sinkholes") -> dict:
    """The ``sinkhole_evaluation`` dict (module docstring). ``point_rc``: (rows, cols) of each point
    (-1 outside the map); ``point_hazard``: class of each point's cell (255 none); ``areas_row_km2``:
    the cell area of each row [km2]."""
    height, width = rate_dataset.height, rate_dataset.width
    n_classes = len(class_names)
    rows, cols = (np.asarray(v, dtype=np.int64) for v in point_rc)
    inside = rows >= 0
    flat = rows[inside] * width + cols[inside]
    cell_hits = np.unique(flat, return_counts=True)
    class_area, counter, full_rate = _scan_map(rate_dataset, hazard_dataset, areas_row_km2, cell_hits[0], n_classes,
                                               keep_full=record_breaks)

    hz = np.asarray(point_hazard, dtype=np.int64)
    counted = (hz >= 0) & (hz < n_classes) & (hz != HAZARD_NODATA)
    counts = np.bincount(hz[counted], minlength=n_classes)[:n_classes]
    rows_out = class_densities(counts, class_area)
    classes = [{"name": name, **row} for name, row in zip(class_names, rows_out)]
    densities = [c["density_per_km2"] for c in classes]
    falls = falling_steps(densities)
    result = {
        "auc": counter.auc,
        "auc_cells": {"sinkhole_cells": counter.n_pos, "other_mapped_cells": counter.n_neg},
        "points_counted": int(counted.sum()),
        "points_not_counted": int((~counted).sum()),
        "classes": classes,
        "class_breaks_mm_per_kyr": _hazard_breaks(hazard_dataset),
        "density_rises_with_class": not falls,
        "method": ("count: points whose cell has the class; density: count / class area over the map [km2]; "
                   "95 % interval: exact Poisson (Garwood) by bisection on the Poisson CDF, divided by the area; "
                   "AUC: rate of sinkhole cells (>= 1 point) vs all other mapped cells, ties one half"),
        "limits": LIMITS,
    }
    if falls:
        names = ", ".join(f"{class_names[k]} ({densities[k]:.3g}/km2) below {class_names[k - 1]}" for k in falls)
        warnings.warn(SinkholeEvaluationWarning(
            f"{points_label}: sinkhole density does not rise with hazard class: {names}; the classes may not "
            "rank the ground as the record does (see sinkhole_evaluation in the summary sidecar, or "
            "--breaks-from-record)"), stacklevel=2)
    if record_breaks:
        result["record_breaks"] = _record_breaks(full_rate, areas_row_km2, cell_hits, flat, height, width, n_classes)
    return result


def _scan_map(rate_dataset, hazard_dataset, areas_row_km2, hit_cells, n_classes: int, keep_full: bool):
    """Two passes over the map in row strips: the class areas [km2] over the map, and the AUC
    counter (rates of the cells in ``hit_cells``, flat indices of cells holding points, against
    every other mapped cell). (class areas, AucCounter, the whole rate raster flat or None)."""
    from rasterio.windows import Window

    height, width = rate_dataset.height, rate_dataset.width
    class_area = np.zeros(n_classes)
    strips = []
    step = max(1, (1 << 21) // max(width, 1))
    positives = []
    full_rate = np.empty(height * width, np.float32) if keep_full else None
    for r0 in range(0, height, step):
        r1 = min(height, r0 + step)
        window = Window(0, r0, width, r1 - r0)
        rate = rate_dataset.read(1, window=window).astype(np.float64).ravel()
        hz = hazard_dataset.read(1, window=window).ravel()
        area = np.repeat(np.asarray(areas_row_km2, dtype=np.float64)[r0:r1] if len(areas_row_km2) > 1 else
                         np.full(r1 - r0, float(areas_row_km2[0])), width)
        ok = hz < n_classes
        class_area += np.bincount(hz[ok].astype(np.int64), weights=area[ok], minlength=n_classes)[:n_classes]
        lo, hi = r0 * width, r1 * width
        sel = (hit_cells >= lo) & (hit_cells < hi)
        is_pos = np.zeros(rate.size, bool)
        is_pos[hit_cells[sel] - lo] = True
        positives.append(rate[is_pos])
        if keep_full:
            full_rate[lo:hi] = rate
        strips.append((r0, r1))

    counter = AucCounter(np.concatenate(positives) if positives else np.zeros(0))
    for r0, r1 in strips:
        window = Window(0, r0, width, r1 - r0)
        rate = full_rate[r0 * width:r1 * width].astype(np.float64) if keep_full else \
            rate_dataset.read(1, window=window).astype(np.float64).ravel()
        lo, hi = r0 * width, r1 * width
        sel = (hit_cells >= lo) & (hit_cells < hi)
        mask = np.ones(rate.size, bool)
        mask[hit_cells[sel] - lo] = False
        counter.add_negatives(rate[mask])
    return class_area, counter, full_rate


def _record_breaks(full_rate, areas_row_km2, cell_hits, flat, height: int, width: int, n_classes: int) -> dict:
    """The ``record_breaks`` entry: class breaks set from the sinkhole record, the densities
    they give and the job-file line to map with them (the map is unchanged)."""
    hits = np.zeros(height * width)
    hits[cell_hits[0]] = cell_hits[1]
    area_cells = np.repeat(np.asarray(areas_row_km2, dtype=np.float64) if len(areas_row_km2) > 1 else
                           np.full(height, float(areas_row_km2[0])), width)
    breaks, levels, dens = breaks_from_record(full_rate, area_cells, hits, n_classes)
    cls = np.searchsorted(np.asarray(breaks), full_rate, side="right")
    valid = np.isfinite(full_rate)
    area = np.bincount(cls[valid], weights=area_cells[valid], minlength=len(breaks) + 1)
    point_rate = full_rate[flat] if flat.size else np.zeros(0)
    pcls = np.searchsorted(np.asarray(breaks), point_rate[np.isfinite(point_rate)], side="right")
    pcount = np.bincount(pcls, minlength=len(breaks) + 1)
    rec_rows = class_densities(pcount, area)
    return {
        "rule": (f"start at {n_classes} equal-area quantiles of the rate over the mapped cells, then merge "
                 "neighbouring classes while a class has a lower sinkhole density than the one below "
                 "(pool-adjacent-violators)"),
        "breaks_mm_per_kyr": breaks,
        "quantile_levels": levels,
        "classes": [{"name": f"record class {k + 1}", **row} for k, row in enumerate(rec_rows)],
        "job_file": f"[hazard] breaks_mm_per_kyr = {json.dumps([round(b, 4) for b in breaks])}"
                    + ("" if len(breaks) == n_classes - 1 else
                       f"; names = {json.dumps([f'record class {k + 1}' for k in range(len(breaks) + 1)])}"),
        "note": "the map's own classes are unchanged; map again with these breaks to use them",
    }
