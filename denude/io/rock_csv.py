"""Read a user rock table from CSV: columns code,name,mineral,density_g_cm3,purity."""

from __future__ import annotations

import csv
from pathlib import Path

from denude.core.rocks import RockTable, table_from_mapping
from denude.errors import RockTableError

REQUIRED_COLUMNS = ("code", "name", "mineral", "density_g_cm3", "purity")


def read_rock_table(path) -> RockTable:
    """Read and validate a rock table CSV; errors name the file, the row and the fix."""
    path = Path(path)
    try:
        with path.open(newline="", encoding="utf-8-sig") as handle:
            reader = csv.DictReader(handle)
            header = [h.strip() for h in (reader.fieldnames or [])]
            missing = [c for c in REQUIRED_COLUMNS if c not in header]
            if missing:
                raise RockTableError(
                    f"{path}: missing column(s) {', '.join(missing)}; the header must be "
                    f"{','.join(REQUIRED_COLUMNS)}"
                )
            rows = []
            for row in reader:
                extra = row.pop(None, None)   # fields beyond the header (csv.DictReader's restkey)
                if extra and any(str(v).strip() for v in extra):
                    raise RockTableError(
                        f"{path}: row {reader.line_num} has more fields than the header "
                        f"({len(header) + len(extra)} > {len(header)}); remove the extra commas")
                rows.append({(k or "").strip(): (v or "").strip() for k, v in row.items()})
    except FileNotFoundError:
        raise RockTableError(f"{path}: rock table not found; give the path of a CSV file") from None
    except (UnicodeDecodeError, csv.Error) as exc:
        raise RockTableError(f"{path}: not a readable CSV file ({exc})") from None
    return table_from_mapping(rows, source=str(path))


def write_rock_table(table: RockTable, path) -> None:
    """Write the rock table as CSV (the same columns it is read with)."""
    with Path(path).open("w", newline="", encoding="utf-8") as handle:
        writer = csv.DictWriter(handle, fieldnames=REQUIRED_COLUMNS)
        writer.writeheader()
        for row in table.as_rows():
            writer.writerow(row)
