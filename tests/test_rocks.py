"""Rock table: built-in types, CSV reading and validation messages."""

import numpy as np
import pytest

from denude.core.rocks import RockTable
from denude.errors import RockTableError
from denude.io.rock_csv import read_rock_table, write_rock_table

HEADER = "code,name,mineral,density_g_cm3,purity\n"


def write(tmp_path, body, header=HEADER):
    path = tmp_path / "rocks.csv"
    path.write_text(header + body)
    return path


def test_builtin_types_and_published_density_ranges():
    table = RockTable.builtin()
    names = {r.name for r in table}
    assert {"limestone", "chalk", "marble", "dolostone", "gypsum", "insoluble"} <= names
    # science notes section 7: limestone 2.3-2.7, dolostone 2.8-2.9, chalk 1.5-2.3 (from
    # memory), gypsum 2.31-2.33, marble near calcite 2.71 (PHREEQC molar volume).
    bands = {"limestone": (2.3, 2.7), "dolostone": (2.8, 2.9), "chalk": (1.5, 2.3),
             "gypsum": (2.31, 2.33), "marble": (2.6, 2.71)}
    for name, (low, high) in bands.items():
        assert low <= table.by_name(name).density_g_cm3 <= high, name
    assert table.by_name("dolomite").name == "dolostone"  # alias


def test_anhydrite_rejected_with_reason():
    with pytest.raises(RockTableError, match="hydrates to gypsum"):
        RockTable.builtin().by_name("anhydrite")


def test_unknown_rock_suggests_nearest():
    with pytest.raises(RockTableError, match="did you mean 'limestone'"):
        RockTable.builtin().by_name("limestnoe")


def test_csv_round_trip(tmp_path):
    path = write(tmp_path, "10,reef limestone,calcite,2.55,0.9\n20,evaporite,gypsum,2.3,0.85\n")
    table = read_rock_table(path)
    assert table.codes == [10, 20]
    assert table.by_code(20).purity == 0.85
    out = tmp_path / "copy.csv"
    write_rock_table(table, out)
    assert read_rock_table(out).as_rows() == table.as_rows()


@pytest.mark.parametrize(
    "body, message",
    [
        ("1,a,calcite,2.6,0.9\n1,b,calcite,2.6,0.9\n", r"row 3: duplicate code 1 \(first on row 2\)"),
        ("1,a,halite,2.2,0.9\n", "row 2: halite is not modelled"),
        ("1,a,basalt,2.9,0.9\n", "row 2: unknown mineral 'basalt'"),
        ("1,a,calcite,2600,0.9\n", "row 2: density_g_cm3 2600.0 is outside 1.0-3.5"),
        ("1,a,calcite,2.6,95\n", r"row 2: purity 95.0 is outside \(0, 1\]"),
        ("1,a,calcite,2.6,0\n", r"row 2: purity 0.0 is outside \(0, 1\]"),
        ("x,a,calcite,2.6,0.9\n", "row 2: code 'x' is not an integer"),
        ("1,a,calcite,2.6,95%\n", "row 2: purity '95%' is a percentage; give a fraction"),
        ("1,a,calcite,dense,0.9\n", "row 2: density_g_cm3 'dense' and purity '0.9' must be numbers"),
        ("", "has no rows"),
    ],
)
def test_csv_validation_messages(tmp_path, body, message):
    path = write(tmp_path, body)
    with pytest.raises(RockTableError, match=message) as info:
        read_rock_table(path)
    text = str(info.value)
    assert str(path) in text or "rows" in text
    assert "\n" not in text


def test_csv_missing_column(tmp_path):
    path = write(tmp_path, "1,a,calcite,2.6\n", header="code,name,mineral,density_g_cm3\n")
    with pytest.raises(RockTableError, match="missing column\\(s\\) purity"):
        read_rock_table(path)


def test_missing_file(tmp_path):
    with pytest.raises(RockTableError, match="not found"):
        read_rock_table(tmp_path / "nope.csv")


def test_lookup_rows():
    look = RockTable.builtin().lookup()
    rows = look.row_index(np.array([[0, 5], [7, 3]]))
    assert rows.tolist() == [[0, 5], [-1, 3]]
    assert RockTable.builtin().missing_codes([0, 1, 7, 9, 9]) == [7, 9]


def test_rows_with_fields_beyond_the_header_are_one_line_errors(tmp_path):
    # found by the parser fuzzing: an empty extra field once raised AttributeError
    from denude.errors import RockTableError
    from denude.io.rock_csv import read_rock_table

    empty = tmp_path / "empty_extra.csv"
    empty.write_text("code,name,mineral,density_g_cm3,purity\n,,,,,\n")
    with pytest.raises(RockTableError, match="not an integer"):
        read_rock_table(empty)
    extra = tmp_path / "extra.csv"
    extra.write_text("code,name,mineral,density_g_cm3,purity\n1,lime,calcite,2.6,0.9,7\n")
    with pytest.raises(RockTableError, match=r"row 2 has more fields than the header \(6 > 5\)"):
        read_rock_table(extra)
