"""Hazard classes from the denudation rate (mm/kyr). Pure numpy.

Default breaks (mm/kyr), reasoning: most solute-based carbonate denudation rates fall
between about 10 and 100 mm/kyr (Ford & Williams 2007, from memory), cosmogenic bedrock
lowering on Mediterranean limestone is 20-40 mm/kyr (Ott, Gallen & Helman 2023), and
gypsum dissolves an order of magnitude faster than limestone. So: < 5 negligible
(insoluble or nearly so), 5-20 low (cold/dry carbonate), 20-50 moderate (typical
temperate limestone), 50-150 high (wet carbonate), >= 150 very high (evaporites, very
wet karst). The breaks are a screening convention of this tool, configurable per job.
"""

from __future__ import annotations

import numpy as np

from denude.errors import InputError

HAZARD_NODATA = 255
DEFAULT_BREAKS_MM_PER_KYR = (5.0, 20.0, 50.0, 150.0)
DEFAULT_CLASS_NAMES = ("negligible", "low", "moderate", "high", "very high")
#: RGBA colours for classes 0..4 (light to dark, colour-blind safe yellow-to-red ramp).
DEFAULT_COLOURS = (
    (255, 255, 204, 255),
    (254, 217, 118, 255),
    (253, 141, 60, 255),
    (227, 26, 28, 255),
    (128, 0, 38, 255),
)


def check_breaks(breaks_mm_per_kyr, names=None):
    """Validate class breaks: finite, strictly increasing, >= 0; names one more than breaks."""
    breaks = tuple(float(b) for b in breaks_mm_per_kyr)
    if not breaks or any(not np.isfinite(b) or b < 0 for b in breaks) or any(
        b2 <= b1 for b1, b2 in zip(breaks, breaks[1:])
    ):
        raise InputError(
            f"hazard class breaks {list(breaks)} must be non-negative and strictly increasing (mm/kyr)"
        )
    if len(breaks) > 254:
        raise InputError("at most 254 hazard class breaks")
    if names is not None and len(names) != len(breaks) + 1:
        raise InputError(f"{len(breaks)} hazard breaks need {len(breaks) + 1} class names, got {len(names)}")
    return breaks


def classify(rate_mm_per_kyr, breaks_mm_per_kyr=DEFAULT_BREAKS_MM_PER_KYR):
    """Class index (uint8) per cell: 0 below the first break, k for breaks[k-1] <= D < breaks[k];
    NaN -> 255 (nodata)."""
    breaks = np.asarray(check_breaks(breaks_mm_per_kyr), dtype=np.float64)
    rate = np.asarray(rate_mm_per_kyr, dtype=np.float64)
    classes = np.searchsorted(breaks, rate, side="right").astype(np.uint8)
    return np.where(np.isnan(rate), np.uint8(HAZARD_NODATA), classes).astype(np.uint8)


#: Default share of a zone [0-1] a class must cover to be its ``highest`` class.
HIGHEST_CLASS_MIN_SHARE = 0.01


def dominant_and_highest(class_area_km2, zone_area_km2, min_share=HIGHEST_CLASS_MIN_SHARE):
    """Per zone, the class covering the largest area and the highest class covering at
    least ``min_share`` (0-1) of the zone's area; -1 where no class qualifies.

    class_area_km2 : (zones, classes) array [km2]; zone_area_km2 : (zones,) array [km2].
    Ties in area go to the higher class (the cautious reading). Returns two int64 arrays."""
    if not 0.0 <= float(min_share) <= 1.0:
        raise InputError(f"highest-class minimum share {min_share} is outside 0-1; give a fraction such as 0.01")
    area = np.asarray(class_area_km2, dtype=np.float64)
    zone = np.asarray(zone_area_km2, dtype=np.float64)
    n = area.shape[1]
    present = area > 0
    top_area = n - 1 - np.argmax(area[:, ::-1], axis=1)
    dominant = np.where(present.any(axis=1), top_area, -1)
    with np.errstate(invalid="ignore", divide="ignore"):
        share = np.where(zone[:, None] > 0, area / np.where(zone[:, None] > 0, zone[:, None], 1.0), 0.0)
    enough = present & (share >= float(min_share))
    highest = np.where(enough.any(axis=1), n - 1 - np.argmax(enough[:, ::-1], axis=1), -1)
    return dominant.astype(np.int64), highest.astype(np.int64)
