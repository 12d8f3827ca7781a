"""Rock types and the rock table: mineral, bulk density and soluble mass fraction (purity).

Pure data and validation; reading CSV files is in ``denude.io.rock_csv``.

Default densities are from the science notes section 7 (limestone 2.3-2.7, dolostone
2.8-2.9, chalk dry bulk 1.5-2.3 (from memory), gypsum 2.31-2.33, calcite 2.71). Default
purities are typical values for rock a survey would map under that name: common practice,
no source. Users with assay data should supply their own table.
"""

from __future__ import annotations

import difflib
from dataclasses import dataclass
from typing import Iterable, Mapping

import numpy as np

from denude.core.constants import MINERAL_INDEX, MINERALS
from denude.errors import RockTableError

DENSITY_MIN_G_CM3 = 1.0
DENSITY_MAX_G_CM3 = 3.5


@dataclass(frozen=True)
class RockType:
    """One mapped rock type. ``code`` is the lithology raster value."""

    code: int
    name: str
    mineral: str          # one of calcite, dolomite, gypsum, insoluble
    density_g_cm3: float  # bulk density of the rock
    purity: float         # soluble mass fraction, (0, 1]

    def __post_init__(self):
        problem = rock_problem(self.mineral, self.density_g_cm3, self.purity)
        if problem:
            raise RockTableError(f"rock type {self.name!r} (code {self.code}): {problem}")


def rock_problem(mineral: str, density_g_cm3: float, purity: float) -> str | None:
    """Return a one-line description of what is wrong with a rock row, or None."""
    if mineral not in MINERALS:
        return f"unknown mineral {mineral!r}; use one of {', '.join(MINERALS[1:] + MINERALS[:1])}"
    if not (DENSITY_MIN_G_CM3 <= density_g_cm3 <= DENSITY_MAX_G_CM3):
        return (
            f"density_g_cm3 {density_g_cm3} is outside {DENSITY_MIN_G_CM3}-{DENSITY_MAX_G_CM3}; "
            "give the bulk density in g/cm3 (e.g. 2.6 for limestone)"
        )
    if not (0.0 < purity <= 1.0):
        return f"purity {purity} is outside (0, 1]; give the soluble mass fraction (e.g. 0.95, not 95)"
    return None


#: Built-in rock types. Codes are those of the demo region's lithology map.
BUILTIN_ROCKS: tuple[RockType, ...] = (
    RockType(0, "insoluble", "insoluble", 2.65, 1.0),
    RockType(1, "limestone", "calcite", 2.60, 0.95),
    RockType(2, "dolostone", "dolomite", 2.85, 0.95),
    RockType(3, "gypsum", "gypsum", 2.31, 0.95),
    RockType(4, "chalk", "calcite", 1.90, 0.97),
    RockType(5, "marble", "calcite", 2.70, 0.98),
)

#: Names accepted in place of a built-in rock name.
ROCK_ALIASES = {"dolomite": "dolostone", "insoluble cover": "insoluble"}

#: Rock names deliberately not modelled, with the reason given to the user.
REJECTED_ROCKS = {
    "anhydrite": (
        "anhydrite is not modelled: within metres of the surface it hydrates to gypsum, so "
        "exposed anhydrite dissolves as gypsum; map it as gypsum (mineral gypsum) instead"
    ),
    "halite": (
        "halite is not modelled: an equilibrium load would give absurd rates; flag rock salt "
        "areas separately instead"
    ),
}


class RockTable:
    """Rock types keyed by lithology code, with array lookups for the kernel."""

    def __init__(self, rocks: Iterable[RockType], source: str = "built-in table"):
        self.source = source
        self._rocks: dict[int, RockType] = {}
        for rock in rocks:
            if rock.code in self._rocks:
                raise RockTableError(
                    f"{source}: duplicate code {rock.code} ({self._rocks[rock.code].name!r} and "
                    f"{rock.name!r}); give each rock type its own code"
                )
            self._rocks[rock.code] = rock

    @classmethod
    def builtin(cls) -> "RockTable":
        return cls(BUILTIN_ROCKS)

    def __iter__(self):
        return iter(sorted(self._rocks.values(), key=lambda r: r.code))

    def __len__(self):
        return len(self._rocks)

    def __contains__(self, code) -> bool:
        return int(code) in self._rocks

    @property
    def codes(self) -> list[int]:
        return sorted(self._rocks)

    def by_code(self, code: int) -> RockType:
        try:
            return self._rocks[int(code)]
        except KeyError:
            raise RockTableError(
                f"{self.source}: no rock type for lithology code {code}; add a row for it"
            ) from None

    def by_name(self, name: str) -> RockType:
        key = ROCK_ALIASES.get(name.strip().lower(), name.strip().lower())
        if key in REJECTED_ROCKS:
            raise RockTableError(REJECTED_ROCKS[key])
        for rock in self._rocks.values():
            if rock.name.lower() == key:
                return rock
        names = [r.name for r in self]
        close = difflib.get_close_matches(key, names, n=1)
        hint = f"did you mean {close[0]!r}? " if close else ""
        raise RockTableError(f"unknown rock {name!r}; {hint}choose one of {', '.join(names)}")

    def missing_codes(self, codes: Iterable[int]) -> list[int]:
        """Codes (e.g. found in a lithology raster) that the table does not cover."""
        return sorted({int(c) for c in codes} - set(self._rocks))

    def lookup(self) -> "RockLookup":
        """Dense arrays for the per-cell kernel."""
        return RockLookup.from_rocks(list(self))

    def as_rows(self) -> list[dict]:
        return [
            {"code": r.code, "name": r.name, "mineral": r.mineral,
             "density_g_cm3": r.density_g_cm3, "purity": r.purity}
            for r in self
        ]


@dataclass(frozen=True)
class RockLookup:
    """Rock properties as arrays, for code -> property lookups over whole blocks.

    ``codes`` is sorted; index i of the other arrays belongs to ``codes[i]``.
    """

    codes: np.ndarray            # int64, sorted
    mineral_index: np.ndarray    # int8, index into constants.MINERALS
    density_g_cm3: np.ndarray    # float64
    purity: np.ndarray           # float64

    @classmethod
    def from_rocks(cls, rocks: list[RockType]) -> "RockLookup":
        rocks = sorted(rocks, key=lambda r: r.code)
        return cls(
            codes=np.array([r.code for r in rocks], dtype=np.int64),
            mineral_index=np.array([MINERAL_INDEX[r.mineral] for r in rocks], dtype=np.int8),
            density_g_cm3=np.array([r.density_g_cm3 for r in rocks], dtype=np.float64),
            purity=np.array([r.purity for r in rocks], dtype=np.float64),
        )

    def row_index(self, lithology_codes: np.ndarray) -> np.ndarray:
        """Row of each cell's code in the table, or -1 where the code is not in the table."""
        codes = np.asarray(lithology_codes)
        idx = np.searchsorted(self.codes, codes)
        idx = np.clip(idx, 0, max(len(self.codes) - 1, 0))
        found = (self.codes[idx] == codes) if len(self.codes) else np.zeros(codes.shape, bool)
        return np.where(found, idx, -1)


def table_from_mapping(rows: Iterable[Mapping], source: str) -> RockTable:
    """Build a RockTable from dict rows, raising one-line errors naming the source and row."""
    rocks = []
    seen: dict[int, int] = {}
    for number, row in enumerate(rows, start=2):  # row 1 is the header line
        where = f"{source}, row {number}"
        try:
            code = int(str(row["code"]).strip())
        except (KeyError, ValueError):
            raise RockTableError(f"{where}: code {row.get('code')!r} is not an integer; give an integer lithology code") from None
        if code in seen:
            raise RockTableError(f"{where}: duplicate code {code} (first on row {seen[code]}); give each rock type its own code")
        seen[code] = number
        name = str(row.get("name", "")).strip() or f"code {code}"
        mineral = str(row.get("mineral", "")).strip().lower()
        for column in ("density_g_cm3", "purity"):
            text = str(row.get(column, "")).strip()
            if text.endswith("%"):
                raise RockTableError(
                    f"{where}: {column} {text!r} is a percentage; give a fraction (e.g. 0.95 for 95%)")
        try:
            density = float(row["density_g_cm3"])
            purity = float(row["purity"])
        except (KeyError, ValueError, TypeError):
            raise RockTableError(
                f"{where}: density_g_cm3 {row.get('density_g_cm3')!r} and purity {row.get('purity')!r} "
                "must be numbers (e.g. 2.6 and 0.95)") from None
        if mineral in REJECTED_ROCKS:
            raise RockTableError(f"{where}: {REJECTED_ROCKS[mineral]}")
        problem = rock_problem(mineral, density, purity)
        if problem:
            raise RockTableError(f"{where}: {problem}")
        rocks.append(RockType(code, name, mineral, density, purity))
    if not rocks:
        raise RockTableError(f"{source}: the rock table has no rows; add one row per lithology code")
    return RockTable(rocks, source=source)
