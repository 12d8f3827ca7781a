"""`denude batch` with planning units and sinkhole points, from flags and from [batch] keys."""

import json

import pandas
import pytest
from typer.testing import CliRunner

from denude.cli.main import app
from test_batch import CRS, TILE, region  # noqa: F401  (fixture)


def _vectors(tmp_path):
    gpd = pytest.importorskip("geopandas")
    shapely = pytest.importorskip("shapely")
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
    gpd.GeoDataFrame({"pid": [10, 11, 12, 13]},
                     geometry=[shapely.Point(401000, 5195000), shapely.Point(403000, 5197000),
                               shapely.Point(406000, 5198000), shapely.Point(406500, 5198500)],
                     crs=CRS).to_file(points, layer="sinks", engine="pyogrio")
    return zones, units, points


def _input_args(paths):
    return ["--lithology", paths["lithology"], "--runoff", paths["runoff"], "--pco2", paths["pco2"],
            "--temperature", paths["temperature"], "--block-size", "16", "--tile-size", str(TILE), "--workers", "0"]


def _check_outputs(out):
    units_csv = pandas.read_csv(out / "zones_summary_planning_units.csv")
    sinks_csv = pandas.read_csv(out / "zones_summary_sinkholes.csv")
    assert list(units_csv["uid"]) == [1, 2, 3]
    # analytic: the areas of the planning-unit boxes (1.9 x 2, 3 x 5 and 2 x 3 km), all inside the map
    assert list(units_csv["area_km2"]) == pytest.approx([3.8, 15.0, 6.0], rel=1e-9)
    assert list(sinks_csv["pid"]) == [10, 11, 12, 13]            # one row per sinkhole point
    assert sinks_csv["denudation_mm_per_kyr"].iloc[2] == 0.0 and sinks_csv["rock"].iloc[2] == "insoluble"
    meta = json.loads((out / "zones_summary.summary.json").read_text())
    assert meta["planning_units"]["count"] == 3 and meta["sinkholes"]["count"] == 4
    return units_csv, sinks_csv


def test_batch_flags_write_planning_unit_and_sinkhole_summaries(region, tmp_path):
    zones, units, points = _vectors(tmp_path)
    out = tmp_path / "flags"
    args = ["batch", *_input_args(region["paths"]), "--out", out, "--zones", zones, "--zones-id-field", "wid",
            "--units", units, "--units-layer", "units", "--units-id-field", "uid",
            "--points", points, "--points-layer", "sinks", "--quiet"]
    result = CliRunner().invoke(app, [str(a) for a in args])
    assert result.exit_code == 0, result.output
    by_flags = _check_outputs(out)

    # the same from the job file's [batch] keys (relative paths resolve against the job file)
    job = tmp_path / "job.toml"
    job.write_text('[batch]\nzones = "zones.gpkg"\nzones_id_field = "wid"\nunits = "units.gpkg"\n'
                   'units_layer = "units"\nunits_id_field = "uid"\npoints = "sinks.gpkg"\npoints_layer = "sinks"\n')
    out_job = tmp_path / "job"
    result = CliRunner().invoke(app, [str(a) for a in ["batch", "--job", job, *_input_args(region["paths"]),
                                                       "--out", out_job, "--quiet"]])
    assert result.exit_code == 0, result.output
    by_job = _check_outputs(out_job)
    for a, b in zip(by_flags, by_job):
        pandas.testing.assert_frame_equal(a, b)


def test_batch_help_names_the_zone_flags_as_summarize_does():
    runner = CliRunner()
    batch_help = " ".join(runner.invoke(app, ["batch", "--help"]).stdout.split())
    summarize_help = " ".join(runner.invoke(app, ["summarize", "--help"]).stdout.split())
    for text in ("--units", "--units-layer", "--units-id-field", "--points", "--points-layer",
                 "Planning-unit polygons (e.g. parcels): written as layer planning_units.",
                 "Sinkhole points: sampled and counted per zone (layer sinkholes)."):
        assert text in batch_help and text in summarize_help, text
