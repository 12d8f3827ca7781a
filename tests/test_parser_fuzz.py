"""Parsers that never crash: any byte string given as a job file, a rock table or a zone /
point file gives a result or a DenudeError, never another exception (hypothesis)."""

from __future__ import annotations

import tempfile
from pathlib import Path

import pytest
from hypothesis import HealthCheck, given, settings, strategies as st

from denude.errors import DenudeError
from denude.io.jobfile import build_settings, load_toml, read_job_file
from denude.io.rock_csv import read_rock_table
from denude.io.vectors import read_points, read_polygons

FUZZ = settings(max_examples=60, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])

#: Texts near the real formats, so the fuzzing reaches past the first syntax check.
TOML_PIECES = st.sampled_from([
    "[inputs]\n", "[run]\n", "[grid]\n", "[hazard]\n", "[batch]\n", "lithology = \"l.tif\"\n", "runoff = 500\n",
    "runoff = -1\n", "pco2 = \"from-aet\"\n", "temperature = 1e400\n", "block_size = 0\n", "block_size = \"x\"\n",
    "resolution = [1, 2, 3]\n", "crs = 5\n", "breaks_mm_per_kyr = [5, 1]\n", "names = []\n", "out = \"\"\n",
    "workers = -3\n", "chemistry = \"whte\"\n", "layers = [1]\n", "bounds = \"a b c d\"\n", "[inputs.deep]\nx=1\n",
    "= broken\n", "\x00", "\ufeff", "inputs = 3\n", "[[inputs]]\n",
])
CSV_PIECES = st.sampled_from([
    "code,name,mineral,density_g_cm3,purity\n", "1,lime,calcite,2.6,0.95\n", "x,lime,calcite,2.6,1\n",
    "2,salt,halite,2.1,1\n", "3,gyp,gypsum,nan,1\n", "4,c,calcite,2.6,inf\n", "5,,,\n", "\"unclosed,\n",
    "1,dup,calcite,2.6,1\n", ",,,,,,,\n", "\x00\n", "\ufeff", "6,anhy,anhydrite,2.9,1\n", "7,d,dolomite,-1,2\n",
])


def _write(folder: Path, name: str, data: bytes) -> Path:
    path = folder / name
    path.write_bytes(data)
    return path


def _blob(pieces):
    return st.one_of(st.binary(max_size=400), st.lists(pieces, max_size=12).map(lambda p: "".join(p).encode("utf-8", "surrogatepass")))


@FUZZ
@given(data=_blob(TOML_PIECES))
def test_job_file_loader_never_crashes(data):
    with tempfile.TemporaryDirectory() as tmp:
        path = _write(Path(tmp), "job.toml", data)
        for call in (load_toml, read_job_file, lambda p: build_settings({}, job_file=p)):
            try:
                call(path)
            except DenudeError:
                pass


@FUZZ
@given(data=_blob(CSV_PIECES))
def test_rock_table_reader_never_crashes(data):
    with tempfile.TemporaryDirectory() as tmp:
        path = _write(Path(tmp), "rocks.csv", data)
        try:
            table = read_rock_table(path)
        except DenudeError:
            return
        assert table.lookup() is not None


GEOJSON_PIECES = st.sampled_from([
    '{"type": "FeatureCollection", "features": [', ']}', '{"type": "Feature", "properties": {"id": 1}, ',
    '"geometry": {"type": "Polygon", "coordinates": [[[0,0],[1,0],[1,1],[0,1],[0,0]]]}}',
    '"geometry": {"type": "Polygon", "coordinates": [[[0,0],[1,1],[1,0],[0,1],[0,0]]]}}',
    '"geometry": {"type": "Point", "coordinates": [0, 0]}}', '"geometry": null}', ',', '{', '}', '[', ']',
    '"crs": {"type": "name", "properties": {"name": "EPSG:32632"}}, ', '"geometry": {"type": "Polygon", "coordinates": []}}',
    '\x00', 'null', '1e999',
])


@pytest.mark.filterwarnings("ignore::denude.errors.GeometryRepairWarning")
@pytest.mark.parametrize("suffix", [".geojson", ".gpkg", ".shp"])
@FUZZ
@given(data=_blob(GEOJSON_PIECES))
def test_zone_and_point_readers_never_crash(suffix, data):
    with tempfile.TemporaryDirectory() as tmp:
        path = _write(Path(tmp), "zones" + suffix, data)
        for call in (lambda p: read_polygons(p, target_crs="EPSG:32632"), lambda p: read_points(p, target_crs="EPSG:32632")):
            try:
                call(path)
            except DenudeError:
                pass
