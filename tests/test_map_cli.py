"""`denude map` and `denude check` through the real app: exit codes, one-line errors, no leftovers."""

import json

import numpy as np
import pytest
import rasterio
from typer.testing import CliRunner

from denude.cli.common import CAUTION
from denude.cli.main import app


def invoke(args):
    return CliRunner().invoke(app, [str(a) for a in args])


def base_args(inputs, out):
    p = inputs["paths"]
    return ["map", "--lithology", p["lithology"], "--runoff", p["runoff"], "--pco2", p["pco2"],
            "--temperature", p["temperature"], "--out", out, "--block-size", 16]


def leftovers(folder):
    return sorted(p.name for p in folder.iterdir() if p.name.startswith(".") or p.name == "out")


def assert_one_line_error(result, *words):
    assert result.exit_code == 1, result.output
    lines = result.stderr.strip().splitlines()
    assert len(lines) == 1 and lines[0].startswith("denude: error:"), result.stderr
    assert "Traceback" not in result.output and "Traceback" not in result.stderr
    for word in words:
        assert word in lines[0]
    return lines[0]


def test_map_success_prints_summary_and_caution(map_inputs, tmp_path):
    out = tmp_path / "out"
    result = invoke(base_args(map_inputs, out) + ["--workers", 2])
    assert result.exit_code == 0, result.output
    assert CAUTION in result.stdout
    assert "computed" in result.stdout
    assert (out / "denudation_mm_per_kyr.tif").exists() and (out / "run.json").exists()
    assert leftovers(tmp_path) == ["out"]


def test_constants_and_contract_flags(map_inputs, tmp_path):
    out = tmp_path / "out"
    rocks = tmp_path / "rocks.csv"
    rocks.write_text("code,name,mineral,density_g_cm3,purity\n-5,unused,insoluble,2.6,1\n0,cover,insoluble,2.6,1\n"
                     "1,lime,calcite,2.6,1\n2,dolo,dolomite,2.85,1\n3,gyp,gypsum,2.3,1\n4,chalk,calcite,1.9,1\n5,marble,calcite,2.7,1\n")
    p = map_inputs["paths"]
    result = invoke(["map", "--lithology", p["lithology"], "--rocks", rocks, "--runoff", 500, "--pco2", 4000,
                     "--pco2-units", "ppmv", "--temperature", 10, "--out", out, "--chemistry", "speciated",
                     "--quiet"])
    assert result.exit_code == 0, result.output
    assert result.stdout == ""
    record = json.loads((out / "run.json").read_text())
    assert record["inputs"]["runoff"] == {"constant": 500.0, "unit": "mm/yr"}
    assert record["settings"]["chemistry"] == "speciated"
    with rasterio.open(out / "denudation_mm_per_kyr.tif") as ds:
        assert ds.tags()["chemistry"] == "speciated"
        rate = ds.read(1)
    assert np.isfinite(rate[map_inputs["codes"] == 1]).all()


@pytest.fixture
def bad_inputs(make_raster, tmp_path):
    text = tmp_path / "notes.tif"
    text.write_text("not a raster")
    shape = (40, 56)
    return {
        "missing": tmp_path / "missing.tif",
        "text": text,
        "nocrs": make_raster("nocrs.tif", np.full(shape, 500, np.float32), crs=None),
        "far": make_raster("far.tif", np.full(shape, 500, np.float32), origin=(100000.0, 1000000.0)),
        "negative": make_raster("neg.tif", np.full(shape, -20, np.float32)),
        "kelvin": make_raster("kelvin.tif", np.full(shape, 283.0, np.float32)),
        "unknown_codes": make_raster("codes42.tif", np.full(shape, 42, np.int16)),
        "float_codes": make_raster("fcodes.tif", np.where(np.arange(56) < 30, 1.0, 2.4)[None, :].repeat(40, 0).astype(np.float32)),
        "metres": make_raster("runoff_m.tif", np.full(shape, 0.5, np.float32)),
    }


@pytest.mark.parametrize("option,key,words", [
    ("--runoff", "missing", ["missing.tif", "not found"]),
    ("--runoff", "text", ["notes.tif", "not a readable raster"]),
    ("--runoff", "nocrs", ["nocrs.tif", "no CRS"]),
    ("--runoff", "far", ["far.tif", "does not overlap"]),
    ("--runoff", "negative", ["neg.tif", "-20", "mm/yr"]),
    ("--temperature", "kelvin", ["kelvin.tif", "283", "kelvin"]),
    ("--lithology", "unknown_codes", ["codes42.tif", "42", "not in the rock table"]),
    ("--lithology", "missing", ["missing.tif", "not found"]),
    ("--lithology", "float_codes", ["fcodes.tif", "non-integer code 2.4"]),
    ("--runoff", "metres", ["runoff_m.tif", "0.5", "m/yr"]),
])
def test_bad_raster_inputs(map_inputs, bad_inputs, tmp_path, option, key, words):
    args = base_args(map_inputs, tmp_path / "out")
    args[args.index(option) + 1] = bad_inputs[key]
    assert_one_line_error(invoke(args), *words)
    assert leftovers(tmp_path) == []


@pytest.mark.parametrize("option,value,words", [
    ("--pco2", "400", ["400", "--pco2-units ppmv"]),
    ("--runoff", "50000", ["50000", "mm/yr"]),
    ("--runoff", "0.5", ["0.5", "m/yr"]),
    ("--temperature", "nan", ["temperature", "finite"]),
    ("--lithology-resampling", "bilinear", ["bilinear", "refused"]),
    ("--chemistry", "whte", ["did you mean 'white'"]),
])
def test_bad_values(map_inputs, tmp_path, option, value, words):
    args = base_args(map_inputs, tmp_path / "out")
    if option in args:
        args[args.index(option) + 1] = value
    else:
        args += [option, value]
    assert_one_line_error(invoke(args), *words)
    assert leftovers(tmp_path) == []


def test_existing_output_and_input_inside_output(map_inputs, tmp_path):
    out = tmp_path / "out"
    out.mkdir()
    (out / "keep.txt").write_text("x")
    assert_one_line_error(invoke(base_args(map_inputs, out)), "already exists", "--overwrite")
    assert sorted(p.name for p in out.iterdir()) == ["keep.txt"]
    # an input inside the output folder would be destroyed by --overwrite: refused
    args = base_args(map_inputs, map_inputs["paths"]["runoff"].parent)
    assert_one_line_error(invoke(args + ["--overwrite"]), "inside (or equal to) the output folder")
    assert map_inputs["paths"]["runoff"].exists()


def test_usage_errors_exit_2(map_inputs, tmp_path):
    result = invoke(base_args(map_inputs, tmp_path / "out") + ["--no-such-option"])
    assert result.exit_code == 2
    result = invoke(base_args(map_inputs, tmp_path / "out") + ["--workers", "many"])
    assert result.exit_code == 2
    assert leftovers(tmp_path) == []


def test_dry_run_writes_nothing(map_inputs, tmp_path):
    result = invoke(base_args(map_inputs, tmp_path / "out") + ["--dry-run"])
    assert result.exit_code == 0, result.output
    assert "nothing written" in result.stdout and "lithology codes found: 0, 1, 2, 3, 4, 5" in result.stdout
    assert leftovers(tmp_path) == []


def test_check_describes_the_job(map_inputs, make_raster, tmp_path):
    temp = make_raster("tgeo.tif", np.full((30, 40), 8.0, np.float32), crs="EPSG:4326",
                       transform=rasterio.transform.from_origin(7.685, 46.945, 0.001, 0.001))
    args = base_args(map_inputs, tmp_path / "out")
    args[0] = "check"
    args[args.index("--temperature") + 1] = temp
    result = invoke(args)
    assert result.exit_code == 0, result.output
    text = result.stdout
    assert "target grid: 56 x 40 cells, EPSG:32632, resolution 100 x 100" in text
    assert "temperature (continuous): warped with bilinear" in text
    assert "lithology (categorical): read directly" in text
    assert "EPSG:4326" in text and "overlap" in text and "values 8 to 8" in text
    assert "not in the table: none" in text
    assert leftovers(tmp_path) == []


def test_job_file_through_cli_with_override(map_inputs, tmp_path):
    p = map_inputs["paths"]
    job = tmp_path / "job.toml"
    job.write_text(
        f'[inputs]\nlithology = "{p["lithology"].name}"\nrunoff = "{p["runoff"].name}"\n'
        f'pco2 = "{p["pco2"].name}"\ntemperature = 30.0\n[run]\nout = "out"\nblock_size = 16\n'
        '[hazard]\nbreaks_mm_per_kyr = [1, 2]\nnames = ["a", "b", "c"]\n')
    result = invoke(["map", "--job", job, "--temperature", p["temperature"], "--quiet"])
    assert result.exit_code == 0, result.output
    record = json.loads((tmp_path / "out" / "run.json").read_text())
    assert record["settings"]["temperature"] == str(p["temperature"])   # flag won over the file
    assert record["inputs"]["job_file"]["sha256"]
    with rasterio.open(tmp_path / "out" / "hazard_class.tif") as ds:
        assert json.loads(ds.tags()["class_names"]) == ["a", "b", "c"]
        assert set(np.unique(ds.read(1)).tolist()) <= {0, 1, 2, 255}
    job.write_text('[inputs]\nlithology = "x.tif"\ntemprature = 5\n')
    assert_one_line_error(invoke(["map", "--job", job]), "did you mean 'temperature'")


def test_resolution_typo_is_refused(map_inputs, tmp_path):
    # 100 m lithology (40 x 56 cells) mapped at 1 m: 10,000x the cells, a unit or digit typo
    args = base_args(map_inputs, tmp_path / "out") + [
        "--grid-crs", "EPSG:32632", "--grid-resolution", "1",
        "--grid-bounds", "400000 5196000 405600 5200000", "--dry-run"]
    assert_one_line_error(invoke(args), "64x the cells", "resolution")
    assert leftovers(tmp_path) == []


def test_partial_coverage_is_a_one_line_warning(map_inputs, make_raster, tmp_path):
    # temperature over the western half only: the eastern cells become nodata, and the run says so
    half = np.full((40, 28), 8.0, np.float32)
    temperature = make_raster("temp_half.tif", half)
    args = base_args(map_inputs, tmp_path / "out")
    args[args.index("--temperature") + 1] = temperature
    result = invoke(args + ["--quiet"])
    assert result.exit_code == 0, result.output
    warnings = [line for line in result.stderr.splitlines() if line.startswith("denude: warning:")]
    assert len(warnings) == 1 and "temp_half.tif covers 50.0 %" in warnings[0]
    with rasterio.open(tmp_path / "out" / "denudation_mm_per_kyr.tif") as ds:
        rate = ds.read(1)
    assert np.isnan(rate[:, 28:]).all() and np.isfinite(rate[1:, :28][map_inputs["codes"][1:, :28] >= 0]).any()


def test_mostly_zero_runoff_and_ignored_elevation_are_warned(map_inputs, tmp_path):
    # P < AET everywhere: a valid but all-zero map deserves a warning, not silence; an
    # elevation given with PCO2 in atm is unused and the user is told so.
    args = base_args(map_inputs, tmp_path / "out")
    i = args.index("--runoff")
    del args[i:i + 2]
    args += ["--precipitation", "300", "--aet", "400", "--elevation", "900", "--quiet"]
    result = invoke(args)
    assert result.exit_code == 0, result.output
    lines = [line for line in result.stderr.splitlines() if line.startswith("denude: warning:")]
    assert any("runoff <= 0 and a rate of 0" in line and "(100 %)" in line for line in lines)
    assert any("ignored with --pco2-units atm" in line for line in lines)
    with rasterio.open(tmp_path / "out" / "denudation_mm_per_kyr.tif") as ds:
        rate = ds.read(1)
    assert np.nanmax(rate) == 0.0


def test_grid_bounds_default_shown_by_check_and_job_file(map_inputs, tmp_path):
    # lithology 100 m cells in EPSG:32632; on a 250 m EPSG:3035 grid its extent snaps outward to
    # (4144500, 2646500, 4150500, 2651000), derived with pyproj in test_map.py
    args = base_args(map_inputs, tmp_path / "out") + ["--grid-crs", "EPSG:3035", "--grid-resolution", "250"]
    args[0] = "check"
    result = invoke(args)
    assert result.exit_code == 0, result.output
    assert "target grid: 24 x 18 cells, EPSG:3035, resolution 250 x 250, bounds (4144500, 2646500, 4150500, 2651000)" in result.stdout
    assert ("note: target grid bounds (4144500, 2646500, 4150500, 2651000): the lithology raster's extent in "
            "EPSG:3035, snapped outward to whole 250 x 250 cells") in result.stdout
    p = map_inputs["paths"]
    job = tmp_path / "job.toml"
    job.write_text(f'[inputs]\nlithology = "{p["lithology"].name}"\nrunoff = 500\npco2 = 0.01\ntemperature = 10\n'
                   '[grid]\ncrs = "EPSG:3035"\nresolution = 250\n[run]\nout = "out"\n')
    result = invoke(["map", "--job", job, "--dry-run"])
    assert result.exit_code == 0, result.output
    assert "bounds (4144500, 2646500, 4150500, 2651000)" in result.stdout
    assert leftovers(tmp_path) == []


def test_grid_bounds_alone_is_an_error(map_inputs, tmp_path):
    args = base_args(map_inputs, tmp_path / "out") + ["--grid-bounds", "400000 5196000 405600 5200000"]
    assert_one_line_error(invoke(args), "--grid-crs and --grid-resolution", "add")
    args = base_args(map_inputs, tmp_path / "out") + ["--grid-crs", "EPSG:3035"]
    assert_one_line_error(invoke(args), "add --grid-resolution")
    assert leftovers(tmp_path) == []


def test_negative_runoff_option_and_job_key(map_inputs, make_raster, tmp_path):
    runoff = map_inputs["runoff"].copy()
    runoff[20:22, 30:33] = -5.0                                   # 6 cells on valid lithology
    path = make_raster("runoff_neg.tif", runoff, nodata=-9999.0)
    args = base_args(map_inputs, tmp_path / "out")
    args[args.index("--runoff") + 1] = path
    line = assert_one_line_error(invoke(args), "runoff_neg.tif", "-5", "--negative-runoff zero")
    assert "negative_runoff" in line                              # and the job-file key
    assert leftovers(tmp_path) == []
    result = invoke(args + ["--negative-runoff", "zero", "--quiet"])
    assert result.exit_code == 0, result.output
    warnings = [w for w in result.stderr.splitlines() if w.startswith("denude: warning:")]
    assert warnings == ["denude: warning: 6 map cells had negative runoff and were taken as 0 mm/yr (no dissolution; "
                        "--negative-runoff zero); check the runoff input if that many is unexpected"]
    with rasterio.open(tmp_path / "out" / "denudation_mm_per_kyr.tif") as ds:
        assert (ds.read(1)[20:22, 30:33] == 0.0).all()
    p = map_inputs["paths"]
    job = tmp_path / "job.toml"
    job.write_text(f'[inputs]\nlithology = "{p["lithology"].name}"\nrunoff = "{path.name}"\npco2 = "{p["pco2"].name}"\n'
                   f'temperature = "{p["temperature"].name}"\n[run]\nout = "out2"\nnegative_runoff = "zero"\n')
    result = invoke(["check", "--job", job])
    assert result.exit_code == 0, result.output
    assert "note: runoff raster" in result.stdout and "down to -5 mm/yr" in result.stdout
    result = invoke(["map", "--job", job, "--quiet"])
    assert result.exit_code == 0, result.output
    assert json.loads((tmp_path / "out2" / "run.json").read_text())["counts"]["negative_runoff"] == 6


@pytest.fixture
def zipped_inputs(map_inputs, tmp_path):
    """The job's runoff and temperature GeoTIFFs stored in a zip archive built here (offline)."""
    import zipfile

    archive = tmp_path / "inputs.zip"
    with zipfile.ZipFile(archive, "w") as zf:
        for role in ("runoff", "temperature"):
            zf.write(map_inputs["paths"][role], f"fields/{role}.tif")
    return archive


def test_virtual_paths_are_read_through_gdal(map_inputs, zipped_inputs, tmp_path):
    local = tmp_path / "local"
    assert invoke(base_args(map_inputs, local) + ["--quiet"]).exit_code == 0
    args = base_args(map_inputs, tmp_path / "out") + ["--quiet"]
    runoff = f"/vsizip/{zipped_inputs}/fields/runoff.tif"       # '/vsizip//abs/inputs.zip/...'
    args[args.index("--runoff") + 1] = runoff
    args[args.index("--temperature") + 1] = f"/vsizip/{{{zipped_inputs}}}/fields/temperature.tif"
    result = invoke(args)
    assert result.exit_code == 0, result.output
    for name in ("denudation_mm_per_kyr.tif", "hazard_class.tif"):
        with rasterio.open(local / name) as a, rasterio.open(tmp_path / "out" / name) as b:
            assert a.read(1).tobytes() == b.read(1).tobytes()
    record = json.loads((tmp_path / "out" / "run.json").read_text())
    assert record["settings"]["runoff"] == runoff                   # kept verbatim, '//' and all
    assert record["inputs"]["runoff"]["path"] == runoff
    assert record["inputs"]["runoff"]["sha256"] is None and record["inputs"]["runoff"]["size_bytes"] is None
    assert record["inputs"]["runoff"]["width"] == 56


@pytest.mark.parametrize("member", ["zip-missing-member", "vsimem"])
def test_unopenable_virtual_path_is_one_line(map_inputs, zipped_inputs, tmp_path, member):
    path = f"/vsizip/{zipped_inputs}/fields/nothing.tif" if member != "vsimem" else "/vsimem/denude-test/none.tif"
    args = base_args(map_inputs, tmp_path / "out")
    args[args.index("--runoff") + 1] = path
    assert_one_line_error(invoke(args), path, "cannot be opened by GDAL", "check the address", "credentials")
    args[0] = "check"
    assert_one_line_error(invoke(args), path, "cannot be opened by GDAL")
    assert leftovers(tmp_path) == []
