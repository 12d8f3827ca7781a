"""`denude batch`: tiled output equals a whole-region run bit for bit, engines give identical
files, resume after a kill, corrupt and failing tiles, zone summaries merged across tiles."""

import json
import os
import shutil
import signal
import subprocess
import sys
import textwrap
from pathlib import Path

import numpy as np
import pytest
import rasterio
from rasterio.transform import from_origin
from typer.testing import CliRunner

from denude.cli.main import app
from denude.errors import DenudeWarning, InputError, OutputError
from denude.execution.batch import BatchError, TILES_DIR, ZoneSpec, run_batch
from denude.execution.raster_job import run_map
from denude.io.jobfile import LAYERS, build_settings
from denude.io.mosaic import write_mosaic_vrt

CRS = "EPSG:32632"
X0, Y0, RES = 400000.0, 5200000.0, 100.0     # m
ROWS, COLS = 64, 80                           # cells; tile size 32 -> 2 x 3 tiles, ragged last column
TILE = 32
VRTS = [Path(f).with_suffix(".vrt").name for f in LAYERS.values()]


def write_tif(path, data, col=0, row=0, nodata=None):
    path.parent.mkdir(parents=True, exist_ok=True)
    with rasterio.open(path, "w", driver="GTiff", width=data.shape[1], height=data.shape[0], count=1,
                       dtype=data.dtype, crs=CRS, nodata=nodata, tiled=data.shape[0] % 16 == 0 and data.shape[1] % 16 == 0,
                       transform=from_origin(X0 + col * RES, Y0 - row * RES, RES, RES)) as ds:
        ds.write(data, 1)
    return path


@pytest.fixture(scope="module")
def region(tmp_path_factory):
    """Synthetic 64 x 80 region: codes 0-5 with nodata, smooth runoff (mm/yr), PCO2 (atm) and
    temperature (degrees C); each input also cut into uneven tiles in its own folder."""
    root = tmp_path_factory.mktemp("region")
    rng = np.random.default_rng(11)
    yy, xx = np.mgrid[0:ROWS, 0:COLS]
    arrays = {
        "lithology": (rng.integers(0, 6, size=(ROWS, COLS)).astype(np.int16), -1),
        "runoff": ((150.0 + 9.0 * xx + 4.0 * yy).astype(np.float32), -9999.0),
        "pco2": ((10 ** (-2.6 + 0.01 * xx - 0.008 * yy)).astype(np.float32), None),
        "temperature": ((1.0 + 0.2 * yy + 0.1 * xx).astype(np.float32), None),
    }
    arrays["lithology"][0][0, :5] = -1
    arrays["runoff"][0][9, 33] = -9999.0
    paths, folders = {}, {}
    for role, (data, nodata) in arrays.items():
        paths[role] = write_tif(root / f"{role}.tif", data, nodata=nodata)
        for i, (r0, r1) in enumerate(((0, 21), (21, ROWS))):
            for j, (c0, c1) in enumerate(((0, 37), (37, COLS))):
                write_tif(root / f"{role}_tiles" / f"{role}_{i}{j}.tif", data[r0:r1, c0:c1], c0, r0, nodata)
        folders[role] = root / f"{role}_tiles"
    whole = root / "whole"
    run_map(settings_for(paths, whole))
    return {"root": root, "paths": paths, "folders": folders, "whole": whole}


@pytest.fixture(scope="module")
def cluster():
    distributed = pytest.importorskip("distributed")
    with distributed.LocalCluster(n_workers=2, threads_per_worker=1, processes=True, dashboard_address=None) as c:
        yield c


def settings_for(paths, out, **extra):
    flags = dict(lithology=str(paths["lithology"]), runoff=str(paths["runoff"]), pco2=str(paths["pco2"]),
                 temperature=str(paths["temperature"]), out=str(out), block_size=16)
    flags.update(extra)
    return build_settings(flags)


def read(path):
    with rasterio.open(path) as ds:
        return ds.read(1)


def tree_bytes(out):
    """{relative path: bytes} of every tile file and layer VRT (the outputs that must not vary)."""
    out = Path(out)
    files = sorted(p for p in (out / TILES_DIR).rglob("*") if p.is_file()) + [out / v for v in VRTS]
    return {str(p.relative_to(out)): p.read_bytes() for p in files}


def manifest(out):
    return json.loads((Path(out) / "manifest.json").read_text())


# -------------------------------------------------------------------------- equality
def test_tiled_equals_whole_region_bit_for_bit(region, tmp_path):
    out = tmp_path / "b"
    summary = run_batch(settings_for(region["paths"], out), TILE, workers=0)
    assert summary.ok and summary.tiles_total == 6 and summary.tiles_run == 6
    for name, file in LAYERS.items():
        whole = read(region["whole"] / file)
        tiled = read(out / Path(file).with_suffix(".vrt").name)
        assert tiled.dtype == whole.dtype and tiled.tobytes() == whole.tobytes(), name
    tile = read(out / TILES_DIR / "r000_c002" / LAYERS["denudation"])
    assert tile.shape == (32, 16)                                   # ragged last column
    assert tile.tobytes() == read(region["whole"] / LAYERS["denudation"])[:32, 64:].tobytes()
    assert summary.counts["cells"] == ROWS * COLS
    run = json.loads((out / "run.json").read_text())
    assert run["command"] == "batch" and run["tiles_done"] == 6 and run["tiles_failed"] == {}


def test_tile_mosaic_inputs_equal_single_rasters(region, tmp_path):
    folders = {k: str(v) for k, v in region["folders"].items()}
    folders["runoff"] = str(region["folders"]["runoff"] / "runoff_*.tif")          # a glob
    listing = tmp_path / "temperature.txt"
    listing.write_text("\n".join(str(p) for p in sorted(region["folders"]["temperature"].glob("*.tif"))))
    folders["temperature"] = str(listing)                                          # a file list
    out = tmp_path / "m"
    summary = run_batch(settings_for(folders, out), TILE, workers=0, merge=True)
    assert summary.ok
    assert sorted(p.name for p in (out / "inputs").iterdir()) == ["lithology.vrt", "pco2.vrt", "runoff.vrt", "temperature.vrt"]
    for file in LAYERS.values():
        assert read(out / file).tobytes() == read(region["whole"] / file).tobytes(), file   # merged COG


def test_one_worker_n_workers_and_cluster_give_identical_files(region, tmp_path, cluster):
    settings = settings_for(region["paths"], tmp_path / "x")
    outs = {}
    for name, kwargs in {"inline": dict(workers=0), "one": dict(workers=1), "two": dict(workers=2),
                         "cluster": dict(scheduler=cluster.scheduler_address)}.items():
        out = tmp_path / name
        summary = run_batch(settings.replace(out=str(out)), TILE, **kwargs)
        assert summary.ok and summary.tiles_run == 6, name
        outs[name] = tree_bytes(out)
    assert "Dask" in summary.engine
    reference = outs["inline"]
    assert len(reference) == 6 * 9 + 6     # 6 tiles x (6 layers, 2 category sidecars, done mark) + 6 top-level files
    for name, files in outs.items():
        assert files == reference, name


# ---------------------------------------------------------------------------- resume
KILLER = textwrap.dedent("""
    import os, signal, sys
    from denude.io.jobfile import build_settings
    from denude.execution import batch
    from denude.io import rasters

    settings = build_settings(dict(lithology=sys.argv[1], runoff=sys.argv[2], pco2=sys.argv[3],
                                   temperature=sys.argv[4], out=sys.argv[5], block_size=16))
    batch.MANIFEST_INTERVAL_S = 0.0          # record every finished tile
    calls = {"n": 0}
    original = rasters.RasterWriter.write

    def write(self, array, window):          # die in the middle of the fourth tile
        calls["n"] += 1
        if calls["n"] == (4 + 4 + 2) * 6 + 9:   # blocks of 16 x 16 cells in the first three tiles
            os.kill(os.getpid(), signal.SIGKILL)
        return original(self, array, window)

    rasters.RasterWriter.write = write
    batch.run_batch(settings, 32, workers=0)
""")


def test_sigkill_mid_batch_then_resume_is_identical(region, tmp_path):
    reference = tmp_path / "ref"
    run_batch(settings_for(region["paths"], reference), TILE, workers=0)
    out = tmp_path / "killed"
    p = region["paths"]
    proc = subprocess.run([sys.executable, "-c", KILLER, str(p["lithology"]), str(p["runoff"]), str(p["pco2"]),
                           str(p["temperature"]), str(out)], capture_output=True, timeout=120)
    assert proc.returncode == -signal.SIGKILL
    states = {k: v["state"] for k, v in manifest(out)["tiles"].items()}
    done = sorted(k for k, s in states.items() if s == "done")
    assert done == ["r000_c000", "r000_c001", "r000_c002"]
    assert list((out / TILES_DIR).glob(".r001_c000.partial-*"))          # half-written tile, hidden name
    assert not (out / TILES_DIR / "r001_c000").exists()
    summary = run_batch(settings_for(p, out), TILE, workers=0)
    assert summary.ok and summary.tiles_skipped == 3 and summary.tiles_run == 3
    assert not list((out / TILES_DIR).glob(".*"))
    assert tree_bytes(out) == tree_bytes(reference)
    again = run_batch(settings_for(p, out), TILE, workers=0)
    assert again.tiles_run == 0 and again.tiles_skipped == 6


def test_truncated_tile_is_detected_and_redone(region, tmp_path):
    out = tmp_path / "t"
    run_batch(settings_for(region["paths"], out), TILE, workers=0)
    before = tree_bytes(out)
    victim = out / TILES_DIR / "r001_c001" / LAYERS["dissolved_load"]
    victim.write_bytes(victim.read_bytes()[:500])
    notes = []
    summary = run_batch(settings_for(region["paths"], out), TILE, workers=0, log=notes.append)
    assert summary.redone_corrupt == ["r001_c001"] and summary.tiles_run == 1 and summary.tiles_skipped == 5
    assert any("r001_c001" in n for n in notes)
    assert tree_bytes(out) == before


def test_changed_input_redoes_only_the_tiles_it_touches(region, tmp_path):
    folder = tmp_path / "runoff_tiles"
    shutil.copytree(region["folders"]["runoff"], folder)
    paths = dict(region["paths"], runoff=str(folder))
    out = tmp_path / "c"
    run_batch(settings_for(paths, out), TILE, workers=0)
    # the top-left runoff tile covers rows 0-20 and columns 0-36: output tiles r000_c000, r000_c001
    target = folder / "runoff_00.tif"
    os.utime(target, ns=(target.stat().st_atime_ns, target.stat().st_mtime_ns + 10**9))
    summary = run_batch(settings_for(paths, out), TILE, workers=0)
    assert summary.tiles_run == 0 and summary.tiles_skipped == 6       # a new time alone: same content
    with rasterio.open(target, "r+") as ds:                              # new values, same size
        values = ds.read(1)
        ds.write(np.where(values == ds.nodata, values, values + 1.0), 1)
    summary = run_batch(settings_for(paths, out), TILE, workers=0)
    assert summary.tiles_run == 2 and summary.tiles_skipped == 4


def test_broken_input_tile_fails_alone_and_retry_failed_fixes_it(region, tmp_path):
    folder = tmp_path / "runoff_tiles"
    shutil.copytree(region["folders"]["runoff"], folder)
    vrt = write_mosaic_vrt(str(folder), "runoff", tmp_path / "runoff.vrt")     # a VRT of tiles
    good = (folder / "runoff_11.tif").read_bytes()
    (folder / "runoff_11.tif").write_bytes(b"garbage" * 300)                   # rows 21-63, columns 37-79
    paths = dict(region["paths"], runoff=vrt)
    out = tmp_path / "f"
    args = ["batch", "--lithology", str(paths["lithology"]), "--runoff", vrt, "--pco2", str(paths["pco2"]),
            "--temperature", str(paths["temperature"]), "--out", str(out), "--block-size", "16",
            "--tile-size", "32", "--workers", "1", "--retries", "1", "--quiet"]
    result = CliRunner().invoke(app, args)
    assert result.exit_code == 1
    lines = [line for line in result.stderr.splitlines() if line.strip()]
    assert len(lines) == 1 and lines[0].startswith("denude: error: 4 of 6 tiles failed")
    assert "runoff" in lines[0] and "Traceback" not in result.output
    tiles = manifest(out)["tiles"]
    failed = sorted(k for k, v in tiles.items() if v["state"] == "failed")
    assert failed == ["r000_c001", "r000_c002", "r001_c001", "r001_c002"]   # tiles over rows 21-63, columns 37-79
    assert all(tiles[k]["attempts"] == 2 and "runoff" in tiles[k]["error"] for k in failed)
    assert sum(v["state"] == "done" for v in tiles.values()) == 2
    (folder / "runoff_11.tif").write_bytes(good)
    summary = run_batch(settings_for(paths, out), TILE, workers=0, retry_failed=True)
    assert summary.ok and summary.tiles_run == 4
    for file in LAYERS.values():
        assert read(out / Path(file).with_suffix(".vrt").name).tobytes() == read(region["whole"] / file).tobytes()


def test_other_job_in_output_folder_is_refused(region, tmp_path):
    out = tmp_path / "o"
    run_batch(settings_for(region["paths"], out, layers="denudation"), TILE, workers=0)
    with pytest.raises(BatchError, match="different job.*--overwrite"):
        run_batch(settings_for(region["paths"], out), TILE, workers=0)
    with pytest.raises(BatchError, match="different job"):
        run_batch(settings_for(region["paths"], out, layers="denudation"), 48, workers=0)
    summary = run_batch(settings_for(region["paths"], out, overwrite=True), TILE, workers=0)
    assert summary.ok and summary.tiles_run == 6
    (tmp_path / "plain").mkdir()
    (tmp_path / "plain" / "notes.txt").write_text("mine")
    with pytest.raises(OutputError, match="not a denude batch"):
        run_batch(settings_for(region["paths"], tmp_path / "plain"), TILE, workers=0)



def test_input_inside_the_batch_output_folder_is_refused(region, tmp_path):
    out = tmp_path / "o"
    out.mkdir()
    runoff = out / "runoff.tif"
    shutil.copy(region["paths"]["runoff"], runoff)
    paths = {**region["paths"], "runoff": runoff}
    with pytest.raises(OutputError, match=r"runoff input .*runoff\.tif is inside \(or equal to\) the batch output folder"):
        run_batch(settings_for(paths, out), TILE, workers=0)
    assert sorted(p.name for p in out.iterdir()) == ["runoff.tif"]      # nothing written beside it


# ---------------------------------------------------------------------------- zones
def test_zone_summaries_over_tiles_equal_merged_raster(region, tmp_path):
    gpd = pytest.importorskip("geopandas")
    shapely = pytest.importorskip("shapely")
    from denude.execution.summaries import summarize_outputs

    # watersheds straddling tile edges (x = 403200 m, y = 5196800 m), one inside a tile
    zones = [
        shapely.Polygon([(400550, 5199400), (404750, 5198900), (405900, 5195100), (401000, 5194300)]),
        shapely.box(402500, 5196000, 407600, 5199950),
        shapely.box(400100, 5193800, 402900, 5196500),
    ]
    path = tmp_path / "zones.gpkg"
    gpd.GeoDataFrame({"wid": ["a", "b", "c"]}, geometry=zones, crs=CRS).to_file(path, layer="zones", engine="pyogrio")
    out = tmp_path / "z"
    summary = run_batch(settings_for(region["paths"], out), TILE, workers=0, zones=ZoneSpec(str(path), None, "wid"))
    assert "zones_summary.csv" in summary.outputs
    import pandas

    tiled = pandas.read_csv(out / "zones_summary.csv")
    summarize_outputs(region["whole"], path, id_field="wid", out_path=tmp_path / "whole.gpkg")
    whole = pandas.read_csv(tmp_path / "whole.csv")
    assert list(tiled["wid"]) == list(whole["wid"]) == ["a", "b", "c"]
    numeric = [c for c in tiled.columns if c in whole.columns and tiled[c].dtype.kind in "fi"]
    assert "denudation_mean_mm_per_kyr" in numeric and "area_km2" in numeric and "denudation_p50_mm_per_kyr" in numeric
    for column in numeric:
        np.testing.assert_allclose(tiled[column].to_numpy(float), whole[column].to_numpy(float), rtol=1e-9, atol=1e-9,
                                   err_msg=column)
    assert tiled["area_km2"].iloc[1] == pytest.approx(5.1 * 3.95)   # km2 of the box inside the grid



def test_zone_summary_geopackage_and_sidecar_match_the_csv(region, tmp_path):
    gpd = pytest.importorskip("geopandas")
    shapely = pytest.importorskip("shapely")
    import pandas

    from denude.cautions import CAUTION

    # zones in geographic coordinates while the rasters are in UTM: the GeoPackage keeps the file's CRS
    boxes = [shapely.box(400100, 5194000, 403900, 5199000), shapely.box(402500, 5196000, 409600, 5199950)]
    path = tmp_path / "sheds.gpkg"
    gpd.GeoDataFrame({"wid": ["north", "east"]}, geometry=boxes, crs=CRS).to_crs("EPSG:4326").to_file(
        path, layer="sheds", engine="pyogrio")
    original = gpd.read_file(path, layer="sheds")
    out = tmp_path / "zg"
    summary = run_batch(settings_for(region["paths"], out), TILE, workers=0, zones=ZoneSpec(str(path), None, "wid"))
    trio = ["zones_summary.csv", "zones_summary.gpkg", "zones_summary.summary.json"]
    assert all(name in summary.outputs for name in trio)
    run = json.loads((out / "run.json").read_text())
    assert all(name in run["outputs"] for name in trio)
    assert not [p.name for p in out.iterdir() if "partial" in p.name]

    table = pandas.read_csv(out / "zones_summary.csv")
    frame = gpd.read_file(out / "zones_summary.gpkg", layer="zones")
    assert len(frame) == len(table) == 2
    assert frame.crs.to_epsg() == 4326
    assert list(frame["wid"]) == list(table["wid"]) == ["north", "east"]
    assert [c for c in frame.columns if c != frame.geometry.name] == list(table.columns)
    for column in table.columns:
        if table[column].dtype.kind in "fi":
            np.testing.assert_allclose(frame[column].to_numpy(float), table[column].to_numpy(float), rtol=1e-12,
                                       err_msg=column)
        else:
            assert list(frame[column]) == list(table[column]), column
    assert table["area_km2"].iloc[0] == pytest.approx(3.8 * 5.0, rel=1e-6)      # box inside the grid, km2
    assert table["area_km2"].iloc[1] == pytest.approx(5.5 * 3.95, rel=1e-6)     # clipped at x = 408000 m
    for got, want in zip(frame.geometry, original.geometry):
        assert got.equals_exact(want, tolerance=1e-9)

    meta = json.loads((out / "zones_summary.summary.json").read_text())
    assert meta["caution"] == CAUTION and meta["tool"] == "denude batch"
    assert meta["method"]["cell_area"].startswith("planar")
    assert meta["method"]["weighting"].startswith("coverage fraction")
    assert meta["units"]["denudation_mean_mm_per_kyr"] == "mm/kyr"
    assert meta["zones"]["file"] == str(path.resolve()) and meta["zones"]["count"] == 2
    assert meta["zones"]["reprojected_from"] == "EPSG:4326"
    from denude.io.rasters import file_sha256

    assert meta["zones"]["sha256"] == file_sha256(path)
    assert meta["batch"]["manifest_sha256"] == file_sha256(out / "manifest.json")
    assert meta["batch"]["job_key"] == manifest(out)["job_key"] and meta["batch"]["tiles"] == 6


def test_zone_summary_write_failure_is_one_error_and_leaves_no_partial_files(region, tmp_path):
    gpd = pytest.importorskip("geopandas")
    shapely = pytest.importorskip("shapely")

    path = tmp_path / "zones.gpkg"
    gpd.GeoDataFrame({"wid": ["a"]}, geometry=[shapely.box(400100, 5194000, 402000, 5199000)], crs=CRS).to_file(
        path, layer="zones", engine="pyogrio")
    out = tmp_path / "zfail"
    run_batch(settings_for(region["paths"], out), TILE, workers=0)
    (out / "zones_summary.gpkg").mkdir()                 # a folder where the GeoPackage goes
    with pytest.raises(OutputError, match="zones_summary.gpkg: cannot be replaced") as info:
        run_batch(settings_for(region["paths"], out), TILE, workers=0, zones=ZoneSpec(str(path), None, "wid"))
    assert "\n" not in str(info.value)
    assert not (out / "zones_summary.csv").exists() and not (out / "zones_summary.summary.json").exists()
    assert not [p.name for p in out.iterdir() if "partial" in p.name]


# ------------------------------------------------------------------------------- CLI
def cli_args(paths, out, *extra):
    return ["batch", "--lithology", str(paths["lithology"]), "--runoff", str(paths["runoff"]),
            "--pco2", str(paths["pco2"]), "--temperature", str(paths["temperature"]), "--out", str(out),
            "--block-size", "16", "--tile-size", "32", *extra]


def test_cli_runs_resumes_and_dry_runs(region, tmp_path):
    out = tmp_path / "cli"
    runner = CliRunner()
    dry = runner.invoke(app, cli_args(region["paths"], out, "--dry-run"))
    assert dry.exit_code == 0 and "tiles: 6 (2 x 3)" in dry.output and not out.exists()
    first = runner.invoke(app, cli_args(region["paths"], out, "--workers", "0"))
    assert first.exit_code == 0, first.output
    assert "6 tiles, 6 computed, 0 already done, 0 failed (in this process (1 worker))" in first.output
    categories = ["hazard_class.vrt.aux.xml", "lithology_code.vrt.aux.xml"]    # GDAL category names of the mosaics
    assert sorted(p.name for p in out.iterdir()) == sorted(VRTS + categories + ["manifest.json", "rocks.csv", "run.json", "tiles"])
    again = runner.invoke(app, cli_args(region["paths"], out, "--workers", "0"))
    assert again.exit_code == 0 and "6 tiles, 0 computed, 6 already done" in again.output
    # the mosaics carry the band unit of the tiles' GeoTIFFs (as a desktop GIS shows it)
    for vrt in VRTS:
        with rasterio.open(out / vrt) as mosaic, rasterio.open(out / "tiles" / "r000_c000" / vrt.replace(".vrt", ".tif")) as tile:
            assert mosaic.units == tile.units and mosaic.units[0], vrt


def test_cli_warns_once_about_overlapping_input_tiles(region, tmp_path):
    folder = tmp_path / "runoff_tiles"
    shutil.copytree(region["folders"]["runoff"], folder)
    whole = read(region["paths"]["runoff"])
    write_tif(folder / "runoff_99.tif", whole[10:20, 30:40], 30, 10, -9999.0)   # over runoff_00 and runoff_01
    paths = dict(region["paths"], runoff=folder)
    result = CliRunner().invoke(app, cli_args(paths, tmp_path / "ov", "--dry-run"))
    assert result.exit_code == 0, result.output
    notes = [line for line in result.stderr.splitlines() if line.startswith("denude: warning:")]
    assert notes == [
        "denude: warning: runoff mosaic: 2 tile pair(s) overlap, first runoff_00.tif and runoff_99.tif by 7 x 10 "
        "cells (columns x rows); in an overlap the later file in name order (runoff_99.tif) wins where it holds "
        "data; give non-overlapping tiles or a VRT to choose otherwise"
    ]


@pytest.mark.parametrize("extra, code, words", [
    (["--tile-size", "40"], 1, "multiple of 16"),
    (["--retries", "-1"], 1, "retries -1"),
    (["--workers", "many"], 2, "usage error"),
    (["--tile-sizes", "32"], 2, "usage error"),
])
def test_cli_errors_are_one_line(region, tmp_path, extra, code, words):
    result = CliRunner().invoke(app, cli_args(region["paths"], tmp_path / "e", *extra))
    assert result.exit_code == code
    lines = [line for line in result.stderr.splitlines() if line.strip()]
    assert len(lines) == 1 and words in lines[0] and "Traceback" not in result.output


def test_job_file_batch_table(region, tmp_path):
    p = region["paths"]
    job = tmp_path / "job.toml"
    job.write_text(textwrap.dedent(f"""
        [inputs]
        lithology = "{p['lithology']}"
        runoff = "{p['runoff']}"
        pco2 = "{p['pco2']}"
        temperature = "{p['temperature']}"
        [run]
        out = "out"
        block_size = 16
        [batch]
        tile_size = 32
        workers = 0
        retries = 1
    """))
    result = CliRunner().invoke(app, ["batch", "--job", str(job), "--quiet"])
    assert result.exit_code == 0, result.output
    assert len(manifest(tmp_path / "out")["tiles"]) == 6
    run = json.loads((tmp_path / "out" / "run.json").read_text())
    assert run["settings"]["job_file"] == str(job) and run["tile_size"] == 32
    job.write_text(job.read_text().replace("retries", "retrys"))
    bad = CliRunner().invoke(app, ["batch", "--job", str(job)])
    assert bad.exit_code == 1 and "did you mean 'retries'" in bad.stderr


def test_bad_zone_field_fails_before_any_tile(region, tmp_path):
    gpd = pytest.importorskip("geopandas")
    shapely = pytest.importorskip("shapely")
    from denude.errors import ZoneError

    path = tmp_path / "zones.gpkg"
    gpd.GeoDataFrame({"wid": ["a"]}, geometry=[shapely.box(400100, 5194000, 402000, 5199000)], crs=CRS).to_file(
        path, layer="zones", engine="pyogrio")
    out = tmp_path / "zbad"
    with pytest.raises(ZoneError, match="no field 'basin'"):
        run_batch(settings_for(region["paths"], out), TILE, workers=0, zones=ZoneSpec(str(path), None, "basin"))
    assert not (out / TILES_DIR).exists() or not any((out / TILES_DIR).iterdir())


def test_negative_runoff_in_a_batch(region, tmp_path):
    """Negative runoff cells in two tiles: refused by default, taken as 0 and counted with zero."""
    with rasterio.open(region["paths"]["runoff"]) as ds:
        runoff = ds.read(1)
    runoff[30:34, 30:34] = -40.0                # 16 cells across tiles r000/r001 x c000/c001
    lith = read(region["paths"]["lithology"])
    assert (lith[30:34, 30:34] >= 0).all()
    path = write_tif(tmp_path / "runoff_neg.tif", runoff, nodata=-9999.0)
    paths = {**region["paths"], "runoff": path}
    with pytest.raises(InputError, match="--negative-runoff zero"):
        run_batch(settings_for(paths, tmp_path / "err"), TILE, workers=0)
    out = tmp_path / "zero"
    with pytest.warns(DenudeWarning, match="^16 map cells had negative runoff"):
        summary = run_batch(settings_for(paths, out, negative_runoff="zero"), TILE, workers=0)
    assert summary.ok and summary.counts["negative_runoff"] == 16
    rate = read(out / "denudation_mm_per_kyr.vrt")
    assert (rate[30:34, 30:34] == 0.0).all()
    assert json.loads((out / "run.json").read_text())["settings"]["negative_runoff"] == "zero"
