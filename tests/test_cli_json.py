"""--json on check, map, summarize and batch; option values named in errors; `denude init`;
old option spellings; units visible in --help."""

import json
import re
import shutil

import numpy as np
import pytest
import rasterio
from typer.testing import CliRunner

from denude.cautions import CAUTION
from denude.cli.main import app
from denude.io.jobfile import JOB_TABLE, build_settings

RECORD_KEYS = {"command", "ok", "outputs", "counts", "warnings", "caution"}


def invoke(args):
    return CliRunner().invoke(app, [str(a) for a in args])


def job_args(inputs, command, out):
    p = inputs["paths"]
    return [command, "--lithology", p["lithology"], "--runoff", p["runoff"], "--pco2", p["pco2"],
            "--temperature", p["temperature"], "--out", out, "--block-size", 16]


def parse(result):
    assert result.exit_code == 0, result.output
    record = json.loads(result.stdout)            # one object and nothing else on stdout
    assert RECORD_KEYS <= set(record) and record["caution"] == CAUTION
    return record


def test_check_json(map_inputs, tmp_path):
    record = parse(invoke(job_args(map_inputs, "check", tmp_path / "out") + ["--json"]))
    assert record["command"] == "check" and record["ok"] is True and record["outputs"] == []
    assert record["grid"]["width"] == 56 and record["grid"]["height"] == 40 and record["grid"]["epsg"] == 32632
    assert record["codes_found"] == [0, 1, 2, 3, 4, 5] and record["codes_missing"] == []
    assert set(record["inputs"]) >= {"lithology", "runoff", "pco2", "temperature"}
    assert record["inputs"]["runoff"]["aligned"] is True
    # the runoff field is 200 + 10 x + 3 y mm/yr with one nodata cell (tests/conftest.py)
    assert record["inputs"]["runoff"]["value_min"] == pytest.approx(200.0)
    assert record["inputs"]["runoff"]["value_max"] == pytest.approx(200 + 10 * 55 + 3 * 39)
    assert not (tmp_path / "out").exists()


def test_map_json_and_dry_run(map_inputs, tmp_path):
    dry = parse(invoke(job_args(map_inputs, "map", tmp_path / "out") + ["--dry-run", "--json"]))
    assert dry["command"] == "map" and dry["dry_run"] is True and not (tmp_path / "out").exists()
    record = parse(invoke(job_args(map_inputs, "map", tmp_path / "out") + ["--json", "--quiet"]))
    assert record["command"] == "map" and record["dry_run"] is False
    assert sorted(record["outputs"]) == sorted(str(tmp_path / "out" / name) for name in json.loads(
        (tmp_path / "out" / "run.json").read_text())["outputs"]) or all(
        (tmp_path / "out").joinpath(p).exists() for p in record["outputs"])
    assert str(tmp_path / "out" / "denudation_mm_per_kyr.tif") in record["outputs"]
    counts = record["counts"]
    assert counts["cells"] == 56 * 40
    assert counts["computed"] + counts["nodata"] + counts["unknown_code"] + counts["out_of_range"] == counts["cells"]
    with rasterio.open(tmp_path / "out" / "denudation_mm_per_kyr.tif") as ds:
        assert counts["computed"] == int(np.isfinite(ds.read(1)).sum())
    assert record["warnings"] == []


def test_map_json_carries_the_warnings(map_inputs, make_raster, tmp_path):
    half = make_raster("temp_half.tif", np.full((40, 28), 8.0, np.float32))
    args = job_args(map_inputs, "map", tmp_path / "out") + ["--json"]
    args[args.index("--temperature") + 1] = half
    result = invoke(args)
    record = parse(result)
    assert len(record["warnings"]) == 1 and "temp_half.tif covers 50.0 %" in record["warnings"][0]
    assert "denude: warning: " + record["warnings"][0] in result.stderr       # still on stderr too


def test_summarize_json(map_inputs, tmp_path):
    gpd = pytest.importorskip("geopandas")
    shapely = pytest.importorskip("shapely")
    assert invoke(job_args(map_inputs, "map", tmp_path / "out") + ["--quiet"]).exit_code == 0
    zones = tmp_path / "zones.gpkg"
    gpd.GeoDataFrame({"wid": ["a", "b"]}, geometry=[shapely.box(400500, 5196500, 403000, 5199500),
                                                    shapely.box(403000, 5196500, 405000, 5199500)],
                     crs="EPSG:32632").to_file(zones, layer="zones", engine="pyogrio")
    out = tmp_path / "summary.gpkg"
    record = parse(invoke(["summarize", tmp_path / "out", "--zones", zones, "--id-field", "wid", "--out", out, "--json"]))
    assert record["command"] == "summarize" and record["layers"] == {"zones": 2}
    assert str(out) in record["outputs"] and str(out.with_suffix(".csv")) in record["outputs"]
    assert all((tmp_path / p).exists() for p in record["outputs"])
    assert str(tmp_path / "summary.summary.json") in record["outputs"]


def test_batch_json(map_inputs, tmp_path):
    args = job_args(map_inputs, "batch", tmp_path / "b") + ["--tile-size", 32, "--workers", 0, "--json"]
    record = parse(invoke(args))
    assert record["command"] == "batch" and record["ok"] is True
    # 56 x 40 cells in 32-cell tiles: 2 x 2 tiles
    assert record["tiles"] == {"total": 4, "run": 4, "skipped": 0, "failed": {}, "redone_corrupt": []}
    assert str(tmp_path / "b" / "denudation_mm_per_kyr.vrt") in record["outputs"]
    again = parse(invoke(args))
    assert again["tiles"]["skipped"] == 4 and again["tiles"]["run"] == 0


@pytest.mark.parametrize("command", ["check", "map", "batch"])
def test_bad_option_value_names_the_option(map_inputs, tmp_path, command):
    args = job_args(map_inputs, command, tmp_path / "out") + ["--chemistry", "speciatd"]
    result = invoke(args)
    assert result.exit_code == 1
    line = result.stderr.strip()
    assert line == ("denude: error: --chemistry 'speciatd' is not known; did you mean 'speciated'? "
                    "use one of white, speciated")


def _unknown_code_messages(map_inputs, make_raster, tmp_path, commands):
    codes = make_raster("codes42.tif", np.full((40, 56), 42, np.int16))
    messages = {}
    for command in commands:
        args = job_args(map_inputs, command, tmp_path / command)
        args[args.index("--lithology") + 1] = codes
        result = invoke(args + (["--tile-size", 32, "--workers", 0] if command == "batch" else []))
        assert result.exit_code == 1, result.output
        messages[command] = result.stderr.strip()
    return messages


def test_same_bad_input_same_message_in_check_and_map(map_inputs, make_raster, tmp_path):
    messages = _unknown_code_messages(map_inputs, make_raster, tmp_path, ("check", "map"))
    assert messages["check"] == messages["map"] and "42" in messages["map"] and "not in the rock table" in messages["map"]
    assert not (tmp_path / "map").exists()


def test_same_bad_input_same_message_in_batch(map_inputs, make_raster, tmp_path):
    messages = _unknown_code_messages(map_inputs, make_raster, tmp_path, ("map", "batch"))
    assert messages["batch"] == messages["map"]


def test_job_file_value_is_blamed_on_the_job_file(map_inputs, tmp_path):
    p = map_inputs["paths"]
    job = tmp_path / "job.toml"
    job.write_text(f'[inputs]\nlithology = "{p["lithology"]}"\nrunoff = 500\npco2 = 0.01\ntemperature = 10\n'
                   '[run]\nchemistry = "speciatd"\n')
    result = invoke(["check", "--job", job])
    assert result.exit_code == 1
    assert f"job file {job}: [run] chemistry 'speciatd' is not known" in result.stderr
    result = invoke(["check", "--job", job, "--chemistry", "white"])       # the flag wins over the file
    assert result.exit_code == 1 and "[run] chemistry" in result.stderr    # but the file is still checked


def test_init_round_trip(map_inputs, tmp_path):
    folder = tmp_path / "start"
    result = invoke(["init", folder])
    assert result.exit_code == 0, result.output
    text = (folder / "job.toml").read_text()
    for section, keys in JOB_TABLE.items():
        assert f"[{section}]" in text
        for key in keys:
            assert f"\n{key} = " in text or f"\n# {key} = " in text, key
    settings = build_settings(job_file=folder / "job.toml")          # loads cleanly as written
    assert settings.rocks == str(folder / "rocks.csv") and settings.out == str(folder / "out")
    # every commented key, once uncommented, is still a valid key of its section
    # (the [scenario] and [uncertainty] tables are commented out whole: their headers too)
    uncommented = re.sub(r"^# ([a-z0-9_]+ = |\[[a-z0-9_.]+\]$)", r"\1", text, flags=re.M)
    from denude.io.jobfile import read_batch_options, read_job_file
    from denude.io.uncertainty_spec import check_rock_names, read_uncertainty
    from denude.core.rocks import RockTable
    from denude.core.uncertainty import UncertaintySpec

    (folder / "all.toml").write_text(uncommented)
    batch = read_batch_options(folder / "all.toml")
    assert batch["tile_size"] == 4096 and batch["units"] == str(folder / "parcels.gpkg")
    fields = read_job_file(folder / "all.toml")
    assert set(fields) >= {"grid_like", "hazard_names", "negative_runoff", "scenario"}
    assert fields["scenario"].changes() == {"temperature_delta_c": 2.0}
    spec = read_uncertainty(folder / "all.toml")
    assert (spec.runoff_sigma_ln, spec.pco2_sigma_log10, spec.temperature_sigma_c) == (0.2, 0.15, 1.0)
    assert spec.soil_co2_intercept_sigma_log10 == 0.1 and len(spec.saturation_ratio) == 3
    assert ("limestone", "purity", 0.85, 1.0) in spec.rocks
    check_rock_names(spec, RockTable.builtin(), folder / "all.toml")
    # as written, neither table is active
    assert read_job_file(folder / "job.toml").get("scenario") is None
    assert read_uncertainty(folder / "job.toml").as_dict() == UncertaintySpec().as_dict()
    # with rasters under the template's names the job checks cleanly through the CLI
    for role in ("lithology", "runoff"):
        shutil.copy(map_inputs["paths"][role], folder / f"{role}.tif")
    result = invoke(["check", "--job", folder / "job.toml"])
    assert result.exit_code == 0, result.output
    assert "rock table: " + str(folder / "rocks.csv") in result.stdout
    again = invoke(["init", folder])
    assert again.exit_code == 1 and "already exists" in again.stderr and "--overwrite" in again.stderr


def test_air_pressure_spelled_the_same_and_old_spelling_kept(map_inputs, tmp_path):
    for command in ("map", "check", "batch", "site"):
        help_text = invoke([command, "--help"]).stdout
        assert "--air-pressure " in help_text and "--air-pressure-atm" not in help_text
    args = job_args(map_inputs, "check", tmp_path / "o") + ["--pco2-units", "ppmv", "--json"]
    args[args.index("--pco2") + 1] = 4000
    new = invoke(args + ["--air-pressure", "0.9"])
    old = invoke(args + ["--air-pressure-atm=0.9"])
    assert json.loads(new.stdout)["settings"]["air_pressure_atm"] == 0.9
    assert json.loads(old.stdout)["settings"]["air_pressure_atm"] == 0.9


def test_units_visible_in_help():
    site_help = invoke(["site", "--help"]).stdout
    assert "[mm/yr]" in site_help and "[degrees C]" in site_help and "[atm]" in site_help
    map_help = invoke(["map", "--help"]).stdout
    assert "[mm/yr]" in map_help and "<white|speciated>" in map_help
    assert "Parallel workers (default: the cores available)" in " ".join(map_help.split())
