"""TOML job files: keys, suggestions for typos, relative paths, flags over the file."""

import pickle

import pytest

from denude.errors import InputError, JobFileError
from denude.io.jobfile import PCO2_FROM_AET, build_settings, read_job_file

JOB = """
[inputs]
lithology = "data/lithology.tif"
runoff = "data/runoff.tif"
pco2 = 0.01
temperature = 9.5

[grid]
crs = "EPSG:32632"
resolution = 200
bounds = [400000, 5196000, 405600, 5200000]

[run]
out = "results"
chemistry = "speciated"
workers = 1
layers = ["denudation", "hazard"]

[hazard]
breaks_mm_per_kyr = [10, 40]
names = ["low", "medium", "high"]
"""


def write(tmp_path, text, name="job.toml"):
    path = tmp_path / "jobs" / name
    path.parent.mkdir(parents=True, exist_ok=True)
    path.write_text(text)
    return path


def test_job_file_values_and_relative_paths(tmp_path):
    job = write(tmp_path, JOB)
    s = build_settings(job_file=job)
    folder = job.parent.resolve()
    assert s.lithology == str(folder / "data" / "lithology.tif")
    assert s.runoff == str(folder / "data" / "runoff.tif")
    assert s.out == str(folder / "results")
    assert s.pco2 == 0.01 and s.temperature == 9.5
    assert s.grid_resolution == (200.0, 200.0) and s.grid_bounds == (400000.0, 5196000.0, 405600.0, 5200000.0)
    assert s.chemistry == "speciated" and s.workers == 1 and s.layers == ("denudation", "hazard")
    assert s.hazard_breaks_mm_per_kyr == (10.0, 40.0) and s.hazard_names == ("low", "medium", "high")
    assert pickle.loads(pickle.dumps(s)) == s and hash(s) == hash(pickle.loads(pickle.dumps(s)))


def test_flags_override_the_file(tmp_path, monkeypatch):
    job = write(tmp_path, JOB)
    monkeypatch.chdir(tmp_path)
    s = build_settings({"temperature": "12", "chemistry": "white", "runoff": "other.tif", "workers": 2}, job_file=job)
    assert s.temperature == 12.0 and s.chemistry == "white" and s.workers == 2
    assert s.runoff == str(tmp_path / "other.tif")      # flag paths resolve against the current folder
    assert s.pco2 == 0.01                                 # untouched keys keep the file's value


@pytest.mark.parametrize("text,words", [
    ('[inputs]\nlithology = "l.tif"\nrunof = 500\n', ["unknown key 'runof'", "did you mean 'runoff'"]),
    ('[inputs]\nlithology = "l.tif"\n[run]\nchemestry = "white"\n', ["'chemestry'", "did you mean 'chemistry'"]),
    ('[input]\nlithology = "l.tif"\n', ["'input'", "did you mean [inputs]"]),
    ('[grid]\ntemperature = 5\n', ["'temperature'", "belongs in [inputs]"]),
    ('lithology = "l.tif"\n', ["put it under [inputs]"]),
])
def test_unknown_keys_suggest_the_nearest(tmp_path, text, words):
    job = write(tmp_path, text)
    with pytest.raises(JobFileError) as info:
        read_job_file(job)
    message = str(info.value)
    assert "\n" not in message and str(job) in message
    for word in words:
        assert word in message


def test_bad_toml_and_bad_types(tmp_path):
    with pytest.raises(JobFileError, match="not valid TOML"):
        read_job_file(write(tmp_path, "[inputs\nlithology = 1"))
    with pytest.raises(JobFileError, match="wrong type"):
        read_job_file(write(tmp_path, '[run]\nworkers = "many"\n', "b.toml"))
    with pytest.raises(JobFileError, match="not found"):
        read_job_file(tmp_path / "missing.toml")


def test_settings_checks(tmp_path):
    base = {"lithology": "l.tif", "temperature": 10, "runoff": 500, "pco2": 0.01}
    with pytest.raises(InputError, match="no runoff"):
        build_settings({"lithology": "l.tif", "temperature": 10, "pco2": 0.01})
    with pytest.raises(InputError, match="no soil PCO2"):
        build_settings({"lithology": "l.tif", "temperature": 10, "runoff": 500})
    with pytest.raises(InputError, match="refused"):
        build_settings({**base, "lithology_resampling": "bilinear"})
    with pytest.raises(InputError, match="did you mean 'speciated'"):
        build_settings({**base, "chemistry": "speciatd"})
    with pytest.raises(InputError, match="add --grid-resolution"):
        build_settings({**base, "grid_crs": "EPSG:32632"})
    with pytest.raises(InputError, match="add --grid-crs and --grid-resolution"):
        build_settings({**base, "grid_bounds": [0, 0, 1000, 1000]})
    s = build_settings({**base, "grid_crs": "EPSG:3035", "grid_resolution": 250})   # bounds optional
    assert s.grid_bounds is None and s.grid_resolution == (250.0, 250.0)
    s = build_settings({"lithology": "l.tif", "temperature": 10, "precipitation": 900, "aet": 400})
    assert s.pco2 == PCO2_FROM_AET and s.precipitation == 900.0


def test_virtual_paths_are_kept_verbatim(tmp_path):
    job = write(tmp_path, '[inputs]\nlithology = "/vsizip//data/maps.zip/lith.tif"\n'
                          'runoff = "/vsicurl/https://tiles.example.invalid/runoff.tif"\n'
                          'pco2 = 0.01\ntemperature = 10\n')
    s = build_settings(job_file=job)
    assert s.lithology == "/vsizip//data/maps.zip/lith.tif"       # normalising would drop a '/'
    assert s.runoff == "/vsicurl/https://tiles.example.invalid/runoff.tif"
    s = build_settings({"lithology": "/vsis3/bucket/lith.tif", "temperature": 10, "runoff": 500, "pco2": 0.01})
    assert s.lithology == "/vsis3/bucket/lith.tif"
