"""The shared house: one rule book for check, map and batch; staging folders; batch products."""

import json
import os
import subprocess
import sys

import numpy as np
import pytest
import rasterio

from denude.errors import InputError
from denude.execution import ZoneSpec, inspect_job, run_batch, run_map
from denude.io.outdir import parse_staging_name, remove_dead_staging, staging_path
from denude.io.rasters import file_sha256
from test_batch import CRS, TILE, region, settings_for, write_tif  # noqa: F401  (fixture)


def test_same_bad_input_same_message_from_check_map_and_batch(region, tmp_path):
    """Temperature in kelvin: the one rule book gives one message on every path."""
    with rasterio.open(region["paths"]["temperature"]) as ds:
        kelvin = ds.read(1) + 273.15
    path = write_tif(tmp_path / "temp_k.tif", kelvin, nodata=-9999.0)
    paths = {**region["paths"], "temperature": path}
    messages = []
    for name, call in (
        ("check", lambda s: inspect_job(s)),
        ("map", lambda s: run_map(s)),
        ("batch", lambda s: run_batch(s, TILE, workers=0)),
    ):
        with pytest.raises(InputError) as info:
            call(settings_for(paths, tmp_path / name))
        messages.append(str(info.value).replace(str(tmp_path / name), "OUT"))
        assert not (tmp_path / name).exists() or name == "batch"
    assert messages[0] == messages[1] == messages[2]
    assert "kelvin" in messages[0] and str(path) in messages[0]


def test_staging_names_record_owner_and_only_dead_ones_are_removed(tmp_path):
    mine = staging_path(tmp_path / "out")
    mine.mkdir()
    owner = parse_staging_name(mine.name)
    assert owner["pid"] == os.getpid() and owner["name"] == "out" and owner["kind"] == "partial"
    # a process that has exited: its staging folder is dead
    child = subprocess.run([sys.executable, "-c", "import os; print(os.getpid())"], capture_output=True, text=True)
    dead_pid = int(child.stdout)
    dead = tmp_path / mine.name.replace(f".pid{os.getpid()}.", f".pid{dead_pid}.")
    dead.mkdir()
    (dead / "half.tif").write_bytes(b"x")
    other = tmp_path / ".notes.partial-keep"
    other.write_text("not a staging name")
    removed = remove_dead_staging(tmp_path)
    assert removed == [dead]
    assert mine.is_dir() and other.is_file() and not dead.exists()


def test_batch_zone_summary_matches_summarize_with_units_and_points(region, tmp_path):
    gpd = pytest.importorskip("geopandas")
    shapely = pytest.importorskip("shapely")
    import pandas

    from denude.execution import summarize_outputs

    zones = tmp_path / "zones.gpkg"
    gpd.GeoDataFrame({"wid": ["a", "b"]}, geometry=[shapely.box(400100, 5194000, 403900, 5199000),
                                                    shapely.box(402500, 5196000, 407600, 5199950)],
                     crs=CRS).to_file(zones, layer="zones", engine="pyogrio")
    units = tmp_path / "units.gpkg"
    gpd.GeoDataFrame({"uid": [1, 2, 3]}, geometry=[shapely.box(400100, 5194000, 402000, 5196000),
                                                   shapely.box(402000, 5194000, 405000, 5199000),
                                                   shapely.box(405000, 5196000, 407000, 5199000)],
                     crs=CRS).to_file(units, layer="units", engine="pyogrio")
    points = tmp_path / "sinks.gpkg"
    gpd.GeoDataFrame({"pid": [10, 11, 12]}, geometry=[shapely.Point(401000, 5195000), shapely.Point(403000, 5197000),
                                                      shapely.Point(406000, 5198000)],
                     crs=CRS).to_file(points, layer="sinks", engine="pyogrio")
    out = tmp_path / "b"
    summary = run_batch(settings_for(region["paths"], out), TILE, workers=0,
                        zones=ZoneSpec(str(zones), None, "wid", str(units), None, "uid", str(points)))
    assert summary.ok and not (out / ".batch.lock").exists()
    names = ["zones_summary.csv", "zones_summary_planning_units.csv", "zones_summary_sinkholes.csv",
             "zones_summary.gpkg", "zones_summary.summary.json"]
    assert all((out / n).is_file() for n in names) and all(n in summary.outputs for n in names)
    summarize_outputs(region["whole"], zones, id_field="wid", units_path=units, units_id_field="uid",
                      points_path=points, out_path=tmp_path / "whole.gpkg")
    for batch_csv, whole_csv in (("zones_summary.csv", "whole.csv"),
                                 ("zones_summary_planning_units.csv", "whole_planning_units.csv"),
                                 ("zones_summary_sinkholes.csv", "whole_sinkholes.csv")):
        tiled, whole = pandas.read_csv(out / batch_csv), pandas.read_csv(tmp_path / whole_csv)
        assert list(tiled.columns) == list(whole.columns), batch_csv
        for column in tiled.columns:
            if tiled[column].dtype.kind in "fi":
                # analytic: partial sums over tiles add up to the whole; only float rounding differs
                np.testing.assert_allclose(tiled[column].to_numpy(float), whole[column].to_numpy(float),
                                           rtol=1e-9, atol=1e-9, err_msg=f"{batch_csv}:{column}")
            else:
                assert list(tiled[column].fillna("")) == list(whole[column].fillna("")), column
    meta = json.loads((out / "zones_summary.summary.json").read_text())
    assert meta["planning_units"]["count"] == 3 and meta["sinkholes"]["count"] == 3


def test_batch_run_record_carries_input_checksums_and_caution(region, tmp_path):
    from denude.cautions import CAUTION

    out = tmp_path / "rec"
    run_batch(settings_for(region["paths"], out), TILE, workers=0)
    record = json.loads((out / "run.json").read_text())
    assert record["caution"] == CAUTION and record["command"] == "batch"
    for role in ("lithology", "runoff", "pco2", "temperature"):
        assert record["inputs"][role]["sha256"] == file_sha256(region["paths"][role])
    with rasterio.open(out / "hazard_class.vrt") as vrt, rasterio.open(out / "tiles" / "r000_c000" / "hazard_class.tif") as tif:
        assert vrt.tags()["class_names"] == tif.tags()["class_names"]      # same (dataset) level
