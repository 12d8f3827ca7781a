"""Read a water-sample CSV (one row per sample) for `denude calibrate`.

Columns (header names, case-insensitive; others are ignored):

* ``site_id`` (required): the sampling site; several rows of one site are its repeat samples;
* ``zone_id``, or ``x`` and ``y`` in the zone file's CRS: the zone the site drains;
* ``temperature_c`` (degrees C, 0-90), ``ca_mg_l``, ``mg_mg_l``, ``so4_mg_l`` (mg/L, >= 0);
* alkalinity as ``alkalinity_mg_l_hco3`` or ``alkalinity_mg_l_caco3`` (mg/L; one of the two
  columns; a cell may be empty);
* ``ph`` (optional; empty cells allowed);
* ``runoff_mm_per_yr`` (mm/yr), or ``discharge_l_s`` (L/s) or ``discharge_m3_s`` (m3/s), at
  least one per row (runoff wins when both are given).

Every problem raises ``InputError`` with one line naming the file, the row (1 = header), the
column, the value and the fix.
"""

from __future__ import annotations

import csv
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from denude.errors import InputError

REQUIRED = ("site_id", "temperature_c", "ca_mg_l", "mg_mg_l", "so4_mg_l")
ALKALINITY_COLUMNS = {"alkalinity_mg_l_hco3": "hco3", "alkalinity_mg_l_caco3": "caco3"}
FLOW_COLUMNS = ("runoff_mm_per_yr", "discharge_l_s", "discharge_m3_s")
#: Plausible ranges: (low, high, unit) of each numeric column.
RANGES = {
    "temperature_c": (0.0, 90.0, "degrees C"),
    "ca_mg_l": (0.0, 1000.0, "mg/L"),
    "mg_mg_l": (0.0, 1000.0, "mg/L"),
    "so4_mg_l": (0.0, 5000.0, "mg/L"),
    "alkalinity_mg_l_hco3": (0.0, 5000.0, "mg/L as HCO3"),
    "alkalinity_mg_l_caco3": (0.0, 5000.0, "mg/L as CaCO3"),
    "ph": (0.0, 14.0, "pH units"),
    "runoff_mm_per_yr": (0.0, 20000.0, "mm/yr"),
    "discharge_l_s": (0.0, 1e9, "L/s"),
    "discharge_m3_s": (0.0, 1e6, "m3/s"),
    "x": (-np.inf, np.inf, "zone CRS units"),
    "y": (-np.inf, np.inf, "zone CRS units"),
}


@dataclass
class SampleTable:
    """Samples as arrays (one entry per row); NaN where a cell was empty."""

    path: Path
    site_id: np.ndarray          # str objects
    zone_id: np.ndarray | None   # str objects, or None when located by x/y
    x: np.ndarray | None
    y: np.ndarray | None
    temperature_c: np.ndarray
    ca_mg_l: np.ndarray
    mg_mg_l: np.ndarray
    so4_mg_l: np.ndarray
    alkalinity_mg_l: np.ndarray
    alkalinity_as: str           # "hco3" or "caco3"
    ph: np.ndarray
    runoff_mm_per_yr: np.ndarray
    discharge_l_s: np.ndarray
    rows: np.ndarray             # CSV row number of each sample (header = 1)

    def __len__(self) -> int:
        return len(self.site_id)


def _number(path, row, column, text, required):
    text = (text or "").strip()
    if not text:
        if required:
            raise InputError(f"{path}: row {row}: column {column!r} is empty; give a number in {RANGES[column][2]}")
        return float("nan")
    try:
        value = float(text)
    except ValueError:
        raise InputError(f"{path}: row {row}: column {column!r} value {text!r} is not a number; give a number in {RANGES[column][2]}") from None
    low, high, unit = RANGES[column]
    if not np.isfinite(value) or not (low <= value <= high):
        raise InputError(f"{path}: row {row}: column {column!r} value {text!r} is outside {low:g}-{high:g} {unit}; check the units")
    return value


def read_samples(path) -> SampleTable:
    """Read and check a sample CSV (module docstring)."""
    path = Path(path)
    try:
        handle = open(path, newline="", encoding="utf-8-sig")
    except OSError as exc:
        raise InputError(f"{path}: cannot read the sample file ({exc.strerror or exc}); give the path of a CSV file") from None
    with handle:
        reader = csv.reader(handle)
        try:
            header = next(reader)
        except StopIteration:
            raise InputError(f"{path}: the sample file is empty; give a CSV with a header row (site_id, zone_id, ...)") from None
        except csv.Error as exc:
            raise InputError(f"{path}: row 1: not a readable CSV ({exc})") from None
        names, col, alk, flows = _check_header(path, header)
        by_xy = "zone_id" not in col
        values = {k: [] for k in ("site_id", "zone_id", "x", "y", "temperature_c", "ca_mg_l", "mg_mg_l", "so4_mg_l",
                                  "alk", "ph", "runoff_mm_per_yr", "discharge_l_s", "row")}
        row = 1
        try:
            for cells in reader:
                row += 1
                if not any(c.strip() for c in cells):
                    continue
                if len(cells) > len(names):
                    raise InputError(f"{path}: row {row}: {len(cells)} values but {len(names)} columns; check the separators")
                cells = cells + [""] * (len(names) - len(cells))
                _read_row(path, row, {name: cells[i] for name, i in col.items()}, by_xy, alk, flows, values)
        except csv.Error as exc:
            raise InputError(f"{path}: row {row}: not a readable CSV ({exc})") from None
    if not values["site_id"]:
        raise InputError(f"{path}: no sample rows; give at least one sample under the header")
    f = lambda k: np.asarray(values[k], dtype=np.float64)  # noqa: E731
    return SampleTable(
        path=path, site_id=np.asarray(values["site_id"], dtype=object),
        zone_id=None if by_xy else np.asarray(values["zone_id"], dtype=object),
        x=f("x") if by_xy else None, y=f("y") if by_xy else None,
        temperature_c=f("temperature_c"), ca_mg_l=f("ca_mg_l"), mg_mg_l=f("mg_mg_l"), so4_mg_l=f("so4_mg_l"),
        alkalinity_mg_l=f("alk"), alkalinity_as=ALKALINITY_COLUMNS[alk[0]], ph=f("ph"),
        runoff_mm_per_yr=f("runoff_mm_per_yr"), discharge_l_s=f("discharge_l_s"),
        rows=np.asarray(values["row"], dtype=np.int64),
    )


def _check_header(path, header):
    """(column names, {name: index}, [the alkalinity column], flow columns present) of a checked
    header row: no duplicates, the required columns, zone_id or x,y, one alkalinity column and
    a runoff or discharge column."""
    names = [h.strip().lower() for h in header]
    dup = sorted({n for n in names if n and names.count(n) > 1})
    if dup:
        raise InputError(f"{path}: row 1: column {dup[0]!r} appears twice; keep one")
    col = {n: i for i, n in enumerate(names)}
    missing = [c for c in REQUIRED if c not in col]
    if missing:
        raise InputError(f"{path}: row 1: missing column(s) {', '.join(missing)}; the header needs "
                         f"{', '.join(REQUIRED)}, zone_id or x,y, an alkalinity column and runoff or discharge")
    if "zone_id" not in col and not ("x" in col and "y" in col):
        raise InputError(f"{path}: row 1: no zone_id column and no x,y columns; give the zone each site drains")
    alk = [c for c in ALKALINITY_COLUMNS if c in col]
    if len(alk) != 1:
        raise InputError(f"{path}: row 1: give exactly one of the columns alkalinity_mg_l_hco3, alkalinity_mg_l_caco3 "
                         f"(found {', '.join(alk) or 'none'})")
    flows = [c for c in FLOW_COLUMNS if c in col]
    if not flows:
        raise InputError(f"{path}: row 1: no runoff_mm_per_yr, discharge_l_s or discharge_m3_s column; give one")
    return names, col, alk, flows


def _read_row(path, row: int, cells: dict, by_xy: bool, alk, flows, values: dict) -> None:
    """Check one sample row ({column: text}) and append its values to the lists in ``values``."""

    def get(name):
        return cells.get(name, "")

    site = get("site_id").strip()
    if not site:
        raise InputError(f"{path}: row {row}: column 'site_id' is empty; give every sample its site")
    values["site_id"].append(site)
    if by_xy:
        values["x"].append(_number(path, row, "x", get("x"), True))
        values["y"].append(_number(path, row, "y", get("y"), True))
    else:
        zone = get("zone_id").strip()
        if not zone:
            raise InputError(f"{path}: row {row}: column 'zone_id' is empty; give the zone the site drains")
        values["zone_id"].append(zone)
    for name in ("temperature_c", "ca_mg_l", "mg_mg_l", "so4_mg_l"):
        values[name].append(_number(path, row, name, get(name), True))
    values["alk"].append(_number(path, row, alk[0], get(alk[0]), False))
    values["ph"].append(_number(path, row, "ph", get("ph"), False))
    runoff = _number(path, row, "runoff_mm_per_yr", get("runoff_mm_per_yr"), False)
    q_l_s = _number(path, row, "discharge_l_s", get("discharge_l_s"), False)
    q_m3_s = _number(path, row, "discharge_m3_s", get("discharge_m3_s"), False)
    if np.isnan(q_l_s) and not np.isnan(q_m3_s):
        q_l_s = q_m3_s * 1000.0
    if np.isnan(runoff) and np.isnan(q_l_s):
        raise InputError(f"{path}: row {row}: no runoff or discharge value; fill {' or '.join(flows)}")
    values["runoff_mm_per_yr"].append(runoff)
    values["discharge_l_s"].append(q_l_s)
    values["row"].append(row)
