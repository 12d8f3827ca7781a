"""Covered karst: soluble bedrock under insoluble cover, as class codes per cell. Pure numpy.

Soluble bedrock that lies under insoluble cover (till, loess, alluvium, clay-rich residuum,
insoluble strata) is hidden from a surface rate map, and it is the classic setting of
cover-collapse sinkholes: the cover ravels down into voids of the rock beneath. The class
flags that setting for screening; it does not change the rate and is not a site
investigation.

Classes (uint8):

* 0 = no soluble bedrock (soluble-area fraction 0: insoluble rock in the rock table);
* 1 = soluble bedrock exposed (soluble fraction > 0, cover below the threshold);
* 2 = soluble bedrock under cover (soluble fraction > 0, cover at or above the threshold);
* 255 = nodata: lithology nodata or a code not in the rock table (soluble fraction NaN), or
  soluble rock where the cover is nodata (NaN).

Cover is a thickness [m] (a 0/1 mask reads as 0 m or 1 m). A cell counts as covered when its
thickness is > 0 and >= ``min_thickness_m`` (default 0: any positive thickness, i.e. a mask
value of 1, counts).
"""

from __future__ import annotations

import numpy as np

from denude.errors import InputError

COVER_NODATA = 255
NO_SOLUBLE = 0
SOLUBLE_EXPOSED = 1
SOLUBLE_COVERED = 2

#: Class names, class 0 first (GDAL category names and the layer's tags).
COVER_CLASS_NAMES = ("no soluble bedrock", "soluble bedrock exposed", "soluble bedrock under cover")
#: RGBA colours per class: pale grey, blue, orange-red (colour-blind safe contrast of 1 and 2).
COVER_COLOURS = (
    (230, 230, 230, 255),
    (69, 117, 180, 255),
    (244, 109, 67, 255),
)


def check_min_thickness(min_thickness_m) -> float:
    """The cover threshold [m] as a float: finite and >= 0, else a one-line InputError."""
    try:
        value = float(min_thickness_m)
    except (TypeError, ValueError):
        value = float("nan")
    if not np.isfinite(value) or value < 0:
        raise InputError(
            f"cover minimum thickness {min_thickness_m!r} must be a number >= 0 (m); e.g. 0 (any cover counts)"
        )
    return value


def classify_cover(soluble_fraction, cover_thickness_m, min_thickness_m: float = 0.0) -> np.ndarray:
    """Covered-karst class (uint8, see the module docstring) per cell.

    soluble_fraction : array [0-1], NaN = unknown (lithology nodata or unknown code)
    cover_thickness_m : array or number [m] (a 0/1 mask: 1 = covered), NaN = nodata
    min_thickness_m : the least thickness [m] that counts as cover (0: any thickness > 0)

    Arrays broadcast against each other; the result has their broadcast shape.
    """
    threshold = check_min_thickness(min_thickness_m)
    f = np.asarray(soluble_fraction, dtype=np.float64)
    t = np.asarray(cover_thickness_m, dtype=np.float64)
    f, t = np.broadcast_arrays(f, t)
    soluble = f > 0
    covered = (t > 0) & (t >= threshold)
    out = np.full(f.shape, COVER_NODATA, np.uint8)
    out[f == 0] = NO_SOLUBLE
    out[soluble & ~np.isnan(t)] = SOLUBLE_EXPOSED
    out[soluble & covered] = SOLUBLE_COVERED
    return out
