"""Table cells of the report: the shown text and the exact number behind it.

A numeric cell shows its value rounded to ``SIGNIFICANT`` digits and carries the full value,
which the page writes into ``data-value`` so a reader (or a test) can check it against the
source file.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np

#: Significant digits shown in the tables.
SIGNIFICANT = 3


@dataclass
class Cell:
    text: str
    value: float | None = None       # the exact number behind a numeric cell


@dataclass
class Table:
    key: str
    title: str
    note: str
    header: list
    rows: list = field(default_factory=list)


def fmt(value, digits: int = SIGNIFICANT) -> str:
    """A number rounded to ``digits`` significant digits, with thousands separators; '-' for none."""
    if value is None or (isinstance(value, float) and not math.isfinite(value)):
        return "-"
    if isinstance(value, (int, np.integer)) and not isinstance(value, bool):
        return f"{int(value):,}"          # counts stay whole numbers
    value = float(value)
    if value == 0:
        return "0"
    magnitude = math.floor(math.log10(abs(value)))
    decimals = max(0, digits - 1 - magnitude)
    rounded = round(value, decimals)
    return f"{rounded:,.{decimals}f}"


def num(value, digits: int = SIGNIFICANT, percent: bool = False) -> Cell:
    """A numeric table cell (``percent``: a 0-1 share shown in %)."""
    if value is None or not np.isfinite(value):
        return Cell("-", None)
    v = float(value)
    return Cell(f"{fmt(100 * v, digits)} %" if percent else fmt(v, digits), v)


def number(text) -> float | None:
    """A CSV field as a float (the exact value written), None when empty or not a number."""
    try:
        value = float(text)
    except (TypeError, ValueError):
        return None
    return value if math.isfinite(value) else None


def count(value) -> Cell:
    """A count cell: a whole number shown without decimals (the value as read kept in ``value``)."""
    if value is None or not np.isfinite(float(value)):
        return Cell("-", None)
    v = float(value)
    return Cell(f"{int(v):,}" if v == int(v) else fmt(v), v)
