"""The per-zone columns of a finished ``ZonalAccumulator`` (``ZonalAccumulator.finalize``):
rate statistics [mm/kyr], areas [km2], fluxes [m3/yr, t/yr], hazard classes, dominant rock
and sinkhole columns, units in the names. numpy only, no I/O.
"""

from __future__ import annotations

import numpy as np

from denude.core.hazard import dominant_and_highest
from denude.core.rate_histogram import PERCENTILES


def column_label(name: str) -> str:
    """A class or rock name as a column suffix: lower case, runs of other characters -> '_'."""
    out = "".join(ch if ch.isalnum() else "_" for ch in str(name).strip().lower())
    while "__" in out:
        out = out.replace("__", "_")
    return out.strip("_") or "unnamed"


def _share(part, whole, some):
    """part / whole where ``some`` (whole > 0), else NaN."""
    return np.where(some, part / np.where(some, whole, 1), np.nan)


def zone_columns(acc, class_names, rock_names, with_points, highest_min_share) -> dict[str, np.ndarray]:
    """Columns per zone (name -> array) of accumulator ``acc``; see ``ZonalAccumulator.finalize``."""
    with np.errstate(invalid="ignore", divide="ignore"):
        cols, mean = _rate_columns(acc)
        some = acc.area_km2 > 0
        if acc.cover:
            soluble_known = acc.covered_soluble_area_km2 + acc.exposed_soluble_area_km2
            cols["covered_soluble_area_km2"] = acc.covered_soluble_area_km2
            cols["exposed_soluble_area_km2"] = acc.exposed_soluble_area_km2
            cols["covered_soluble_share"] = _share(acc.covered_soluble_area_km2, soluble_known, soluble_known > 0)
        cols["rock_volume_m3_per_yr"] = acc.sum_w_rate
        cols["rock_mass_t_per_yr"] = acc.sum_w_rate_density
        cols["co2_drawdown_t_per_yr"] = acc.sum_w_co2
        if acc.n_classes:
            cols.update(_hazard_columns(acc, class_names, some, highest_min_share))
        if acc.n_rocks:
            labels = list(rock_names or [str(k) for k in range(acc.n_rocks)])
            best = np.argmax(acc.rock_area_km2, axis=1)
            found = acc.rock_area_km2.max(axis=1) > 0
            cols["dominant_rock"] = np.array([labels[b] if f else "" for b, f in zip(best, found)], dtype=object)
            cols["dominant_rock_share"] = _share(acc.rock_area_km2.max(axis=1), acc.area_km2, found & some)
        if with_points or (with_points is None and acc.point_count.any()):
            pmean = np.where(acc.point_valid > 0, acc.point_sum_rate / np.maximum(acc.point_valid, 1), np.nan)
            cols["sinkhole_count"] = acc.point_count
            cols["sinkhole_density_per_km2"] = _share(acc.point_count, acc.area_km2, some)
            cols["sinkhole_mean_rate_mm_per_kyr"] = pmean
            cols["sinkhole_rate_ratio"] = _share(pmean, mean, mean > 0)
    return cols


def _rate_columns(acc) -> tuple[dict[str, np.ndarray], np.ndarray]:
    """Area and rate columns (the first columns of a summary), and the mean rate [mm/kyr]."""
    has = acc.valid_area_km2 > 0
    mean = np.where(has, acc.sum_w_rate / np.where(has, acc.valid_area_km2, 1), np.nan)
    var = np.where(has, acc.sum_w_rate2 / np.where(has, acc.valid_area_km2, 1) - mean**2, np.nan)
    std = np.sqrt(np.maximum(var, 0.0))
    area = acc.area_km2
    pct = acc.percentiles()
    cols: dict[str, np.ndarray] = {
        "area_km2": area,
        "valid_area_km2": acc.valid_area_km2,
        "soluble_area_km2": acc.soluble_area_km2,
        "soluble_area_fraction": _share(acc.soluble_area_km2, area, area > 0),
        "valid_cells": acc.valid_cells,
        "nodata_cells": acc.nodata_cells,
        "denudation_mean_mm_per_kyr": mean,
        "denudation_std_mm_per_kyr": np.where(has, std, np.nan),
        "denudation_min_mm_per_kyr": np.where(has, acc.min_rate, np.nan),
        "denudation_max_mm_per_kyr": np.where(has, acc.max_rate, np.nan),
    }
    for j, p in enumerate(PERCENTILES):
        cols[f"denudation_p{p}_mm_per_kyr"] = pct[:, j]
    return cols, mean


def _hazard_columns(acc, class_names, some, highest_min_share) -> dict[str, np.ndarray]:
    """Per-class areas [km2] and shares, and the max / dominant / highest class of each zone."""
    cols: dict[str, np.ndarray] = {}
    names = [column_label(c) for c in (class_names or [str(k) for k in range(acc.n_classes)])]
    for k, name in enumerate(names):
        cols[f"hazard_area_km2_{name}"] = acc.class_area_km2[:, k]
    for k, name in enumerate(names):
        cols[f"hazard_share_{name}"] = _share(acc.class_area_km2[:, k], acc.area_km2, some)
    present = acc.class_area_km2 > 0
    top = acc.n_classes - 1 - np.argmax(present[:, ::-1], axis=1)
    cols["hazard_max_class"] = np.where(present.any(axis=1), top, -1).astype(np.int64)
    labels = list(class_names or [str(k) for k in range(acc.n_classes)])
    cols["hazard_max_name"] = np.array([labels[k] if k >= 0 else "" for k in cols["hazard_max_class"]], dtype=object)
    dominant, highest = dominant_and_highest(acc.class_area_km2, acc.area_km2, highest_min_share)
    for key, value in (("dominant", dominant), ("highest", highest)):
        cols[f"hazard_{key}_class"] = value
        cols[f"hazard_{key}_name"] = np.array([labels[k] if k >= 0 else "" for k in value], dtype=object)
    return cols
