"""Units read from raster metadata, the out-of-range and below-freezing policies, and the
warning for PCO2 in ppmv converted at sea level."""

import json
import math
import warnings

import numpy as np
import pytest
import rasterio
from typer.testing import CliRunner

from denude.cli.main import app
from denude.core.dissolution import equilibrium_load_mol_per_l
from denude.core.units import convert, find_unit, normalise_unit, require_unit
from denude.errors import DenudeWarning, InputError
from denude.execution import run_map
from denude.io.jobfile import build_settings, read_job_file


def invoke(args):
    return CliRunner().invoke(app, [str(a) for a in args])


def settings_for(inputs, out, **extra):
    p = inputs["paths"]
    flags = dict(lithology=str(p["lithology"]), runoff=str(p["runoff"]), pco2=str(p["pco2"]),
                 temperature=str(p["temperature"]), out=str(out), block_size=16)
    flags.update({k: (str(v) if hasattr(v, "__fspath__") else v) for k, v in extra.items()})
    return build_settings(flags)


def declare(path, unit=None, tag=None):
    """Give band 1 of ``path`` a GDAL unit and/or a dataset ``units`` tag."""
    with rasterio.open(path, "r+") as ds:
        if unit is not None:
            ds.units = (unit,)
        if tag is not None:
            ds.update_tags(units=tag)
    return path


def read(out, name="denudation_mm_per_kyr.tif"):
    with rasterio.open(out / name) as ds:
        return ds.read(1)


def record(out):
    return json.loads((out / "run.json").read_text())


# ------------------------------------------------------------------ the table of conversions
@pytest.mark.parametrize("role, text, value, expected", [
    ("runoff", "mm/month", 10.0, 120.0),          # a monthly mean x 12 months (common practice, no source)
    ("runoff", "mm month-1", 10.0, 120.0),
    ("runoff", "mm/day", 2.0, 730.5),             # x 365.25 days: the Julian year (IAU definition)
    ("runoff", "m/yr", 0.5, 500.0),               # SI prefixes: 1 m = 1000 mm
    ("runoff", "cm/yr", 5.0, 50.0),
    ("precipitation", "mm a-1", 800.0, 800.0),
    ("aet", "kg m-2 yr-1", 300.0, 300.0),         # 1 kg of water per m2 is a 1 mm layer (density 1000 kg/m3)
    ("temperature", "K", 283.15, 10.0),           # SI: T [K] = t [degrees C] + 273.15
    ("temperature", "kelvin", 273.15, 0.0),
    ("temperature", "\u00b0C", 12.5, 12.5),
    ("temperature", "degF", 212.0, 100.0),        # Fahrenheit scale definition: 32 F = 0 C, 212 F = 100 C
    ("temperature", "degF", 32.0, 0.0),
    ("pco2", "\u00b5atm", 10000.0, 0.01),        # SI prefix micro = 1e-6
    ("pco2", "Pa", 1013.25, 0.01),                # 1 atm = 101 325 Pa (CGPM definition)
    ("pco2", "kPa", 101.325, 1.0),
    ("elevation", "ft", 1000.0, 304.8),           # international foot = 0.3048 m exactly (1959)
    ("soluble_fraction", "%", 40.0, 0.4),
])
def test_conversions_against_their_definitions(role, text, value, expected):
    unit = find_unit(role, text)
    assert unit is not None
    assert float(convert(value, unit)) == pytest.approx(expected, rel=1e-12, abs=1e-12)


def test_ppm_and_log10_keep_the_pco2_rules():
    # ppm converts to the ppmv path (the air-pressure rule), log10 atm to the power-of-ten path
    assert find_unit("pco2", "ppm").target == "ppmv" and find_unit("pco2", "ppmv").identity
    assert find_unit("pco2", "log10(atm)").target == "log10atm"
    assert normalise_unit("mm yr^-1") == "mm/yr" and normalise_unit("mm/year") == "mm/yr"


def test_unknown_and_contradicting_units_are_named():
    with pytest.raises(InputError, match="'furlongs/fortnight' is not a known unit of runoff"):
        require_unit("runoff", "furlongs/fortnight", "runoff raster r.tif")
    with pytest.raises(InputError, match="'mm/yr' is a unit of a water flux .*, not of temperature"):
        require_unit("temperature", "mm/yr", "temperature raster t.tif")


# ------------------------------------------------------------------ units from metadata
def test_mm_per_month_raster_gives_the_rates_of_the_converted_raster(map_inputs, make_raster, tmp_path):
    monthly = map_inputs["runoff"].copy()
    monthly[monthly != -9999.0] /= 12.0
    tagged = declare(make_raster("runoff_month.tif", monthly.astype(np.float32), nodata=-9999.0), unit="mm/month")
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        run_map(settings_for(map_inputs, tmp_path / "a", runoff=tagged))
    said = [str(w.message) for w in caught if isinstance(w.message, DenudeWarning)]
    assert any("declares unit 'mm/month'" in m and "x 12" in m and str(tagged) in m for m in said)
    run_map(settings_for(map_inputs, tmp_path / "b"))
    a, b = read(tmp_path / "a"), read(tmp_path / "b")
    assert np.array_equal(np.isnan(a), np.isnan(b))
    np.testing.assert_allclose(a[np.isfinite(a)], b[np.isfinite(b)], rtol=2e-7)   # float32 rounding of /12
    entry = record(tmp_path / "a")["inputs"]["runoff"]
    assert entry["unit"] == "mm/month" and entry["unit_source"] == "metadata"
    assert entry["converted_to"] == "mm/yr" and entry["conversion"] == "x 12"
    assert record(tmp_path / "b")["inputs"]["runoff"]["unit_source"] == "default"


def test_kelvin_tag_is_converted(map_inputs, make_raster, tmp_path):
    kelvin = declare(make_raster("t_k.tif", (map_inputs["temperature"] + 273.15).astype(np.float32)), tag="K")
    run_map(settings_for(map_inputs, tmp_path / "k", temperature=kelvin))
    run_map(settings_for(map_inputs, tmp_path / "c"))
    a, b = read(tmp_path / "k"), read(tmp_path / "c")
    ok = np.isfinite(b)
    np.testing.assert_allclose(a[ok], b[ok], rtol=1e-4)     # float32 storage of t + 273.15 (about 3e-5 K)


@pytest.mark.parametrize("unit, words", [
    ("furlongs/fortnight", "'furlongs/fortnight' is not a known unit of temperature"),
    ("mm/yr", "'mm/yr' is a unit of a water flux"),
])
def test_unknown_or_contradicting_metadata_unit_is_an_error(map_inputs, make_raster, tmp_path, unit, words):
    bad = declare(make_raster("t_bad.tif", map_inputs["temperature"]), unit=unit)
    p = map_inputs["paths"]
    for command in ("check", "map"):
        result = invoke([command, "--lithology", p["lithology"], "--runoff", p["runoff"], "--pco2", p["pco2"],
                         "--temperature", bad, "--out", tmp_path / command])
        assert result.exit_code == 1
        assert words in result.stderr and str(bad) in result.stderr
        assert not (tmp_path / command).exists()


def test_option_beats_metadata_with_a_warning(map_inputs, make_raster, tmp_path):
    # a runoff raster in mm/yr that wrongly declares mm/month: --runoff-units mm/yr wins
    wrong = declare(make_raster("runoff_wrong.tif", map_inputs["runoff"], nodata=-9999.0), unit="mm/month")
    with pytest.warns(DenudeWarning, match="declares unit 'mm/month' but runoff units mm/yr were given"):
        run_map(settings_for(map_inputs, tmp_path / "a", runoff=wrong, runoff_units="mm/yr"))
    run_map(settings_for(map_inputs, tmp_path / "b"))
    assert np.array_equal(read(tmp_path / "a"), read(tmp_path / "b"), equal_nan=True)
    assert record(tmp_path / "a")["inputs"]["runoff"]["unit_source"] == "option"
    # the same rule for --pco2-units: atm values that declare ppmv
    pco2 = declare(make_raster("pco2_wrong.tif", map_inputs["pco2"], nodata=np.nan), unit="ppmv")
    with pytest.warns(DenudeWarning, match="declares unit 'ppmv' but pco2 units atm were given"):
        run_map(settings_for(map_inputs, tmp_path / "c", pco2=pco2, pco2_units="atm"))
    assert np.array_equal(read(tmp_path / "c"), read(tmp_path / "b"), equal_nan=True)
    entry = record(tmp_path / "c")["inputs"]["pco2"]
    assert entry["unit"] == "atm" and entry["unit_source"] == "option" and entry["unit_declared"] == "ppmv"


def test_unit_keys_in_the_job_file(map_inputs, tmp_path):
    p = map_inputs["paths"]
    job = tmp_path / "job.toml"
    job.write_text(f'[inputs]\nlithology = "{p["lithology"]}"\nrunoff = 40\nrunoff_units = "mm month-1"\n'
                   f'pco2 = 0.01\ntemperature = 10\n[run]\nout_of_range = "nodata"\nbelow_freezing = "zero"\n')
    fields = read_job_file(job)
    assert fields["runoff_units"] == "mm/month" and fields["out_of_range"] == "nodata"
    assert fields["below_freezing"] == "zero"
    job.write_text(job.read_text().replace('"mm month-1"', '"inches"'))
    result = invoke(["check", "--job", job])
    assert result.exit_code == 1 and "[inputs] runoff_units: unit 'inches' is not a known unit of runoff" in result.stderr


# ------------------------------------------------------------------ out-of-range policy
def _bad_cells(map_inputs, make_raster):
    pco2 = map_inputs["pco2"].copy()
    pco2[10, 10:13] = -0.002                    # an interpolation undershoot
    temperature = map_inputs["temperature"].copy()
    temperature[20, 30] = np.inf
    return (make_raster("pco2_neg.tif", pco2, nodata=np.nan),
            make_raster("temp_inf.tif", temperature, nodata=np.nan))


def test_bad_cells_are_an_error_by_default(map_inputs, make_raster, tmp_path):
    pco2, temperature = _bad_cells(map_inputs, make_raster)
    with pytest.raises(InputError) as info:
        run_map(settings_for(map_inputs, tmp_path / "a", pco2=pco2))
    text = str(info.value)
    assert str(pco2) in text and "-0.002" in text and "must be positive" in text and "--out-of-range nodata" in text
    with pytest.raises(InputError) as info:
        run_map(settings_for(map_inputs, tmp_path / "b", temperature=temperature))
    text = str(info.value)
    assert str(temperature) in text and "inf is not a finite number" in text and "--out-of-range nodata" in text
    assert not (tmp_path / "a").exists() and not (tmp_path / "b").exists()


def test_out_of_range_nodata_is_counted_per_input(map_inputs, make_raster, tmp_path):
    pco2, temperature = _bad_cells(map_inputs, make_raster)
    codes = map_inputs["codes"]
    with pytest.warns(DenudeWarning, match=r"--out-of-range nodata\): pco2 3, temperature 1"):
        run_map(settings_for(map_inputs, tmp_path / "a", pco2=pco2, temperature=temperature, out_of_range="nodata"))
    counts = record(tmp_path / "a")["counts"]
    assert counts["set_to_nodata"] == {"pco2": 3, "temperature": 1}
    assert codes[10, 10:13].min() >= 0 and codes[20, 30] >= 0        # all four on valid lithology
    rate = read(tmp_path / "a")
    assert np.isnan(rate[10, 10:13]).all() and np.isnan(rate[20, 30])
    run_map(settings_for(map_inputs, tmp_path / "b"))
    good = read(tmp_path / "b")
    keep = np.ones(rate.shape, bool)
    keep[10, 10:13] = keep[20, 30] = False
    assert np.array_equal(rate[keep], good[keep], equal_nan=True)     # every other cell unchanged


def test_warm_cells_are_nodata_not_an_error(map_inputs, make_raster, tmp_path):
    # 75 degrees C is inside the constants' 0-90 range (it was refused above 60 before);
    # 95 degrees C is outside it: nodata, counted with the cells out of the constants' range
    temperature = map_inputs["temperature"].copy()
    temperature[30, :] = 75.0
    temperature[31, :] = 95.0
    path = make_raster("warm.tif", temperature, nodata=np.nan)
    with pytest.warns(DenudeWarning, match="outside the validity of the constants"):
        run_map(settings_for(map_inputs, tmp_path / "w", temperature=path))
    rate, codes = read(tmp_path / "w"), map_inputs["codes"]
    soluble = codes > 0
    assert np.isfinite(rate[30][soluble[30]]).all() and np.isnan(rate[31][soluble[31]]).all()
    assert record(tmp_path / "w")["counts"]["out_of_range"] >= int(soluble[31].sum())


def test_below_freezing_nodata_or_zero(map_inputs, make_raster, tmp_path):
    temperature = map_inputs["temperature"].copy()
    temperature[:3, :] = -4.0
    cold = make_raster("cold.tif", temperature, nodata=np.nan)
    zero = temperature.copy()
    zero[:3, :] = 0.0
    at_zero = make_raster("zero.tif", zero, nodata=np.nan)
    codes = map_inputs["codes"]
    soluble = codes[:3] > 0
    run_map(settings_for(map_inputs, tmp_path / "n", temperature=cold))
    assert np.isnan(read(tmp_path / "n")[:3][soluble]).all()                 # default: nodata
    with pytest.warns(DenudeWarning, match="below 0 degrees C and were taken as 0 degrees C"):
        run_map(settings_for(map_inputs, tmp_path / "z", temperature=cold, below_freezing="zero"))
    run_map(settings_for(map_inputs, tmp_path / "ref", temperature=at_zero))
    assert np.array_equal(read(tmp_path / "z"), read(tmp_path / "ref"), equal_nan=True)
    assert record(tmp_path / "z")["counts"]["below_freezing"] == int((codes[:3] >= 0).sum())
    assert record(tmp_path / "ref")["counts"]["below_freezing"] == 0


# ------------------------------------------------------------------ ppmv at sea level
def test_ppmv_without_elevation_warns_with_the_derived_size(map_inputs, tmp_path):
    p = map_inputs["paths"]
    result = invoke(["check", "--lithology", p["lithology"], "--runoff", p["runoff"], "--pco2", 5000,
                     "--pco2-units", "ppmv", "--temperature", p["temperature"], "--out", tmp_path / "o"])
    assert result.exit_code == 0, result.output
    line = next(l for l in result.stderr.splitlines() if "PCO2 in ppmv without" in l)
    # derived: at 1 atm PCO2 is exp(z / 8400 m) too high, the load goes with its cube root
    for z, shown in ((1500.0, "+6.1 % at 1,500 m"), (2000.0, "+8.3 % at 2,000 m")):
        assert shown in line
        expected = math.exp(z / 8400.0) ** (1.0 / 3.0) - 1.0
        assert f"+{100 * expected:.1f} %" in shown
        # the cube root holds for the real chemistry to within the activity correction (the
        # gammas rise as the load falls: measured here 6.6 % and 8.8 %, a tenth above the cube root)
        pressure = math.exp(-z / 8400.0)
        high = equilibrium_load_mol_per_l("calcite", 10.0, 5000e-6, "white")
        true = equilibrium_load_mol_per_l("calcite", 10.0, 5000e-6 * pressure, "white")
        assert float(high / true) - 1.0 == pytest.approx(expected, rel=0.1)
    with_elevation = invoke(["check", "--lithology", p["lithology"], "--runoff", p["runoff"], "--pco2", 5000,
                             "--pco2-units", "ppmv", "--elevation", 1500, "--temperature", p["temperature"],
                             "--out", tmp_path / "o"])
    assert with_elevation.exit_code == 0 and "PCO2 in ppmv without" not in with_elevation.stderr


def test_ppm_declared_in_metadata_takes_the_pressure_rule(map_inputs, make_raster, tmp_path):
    ppm = declare(make_raster("pco2_ppm.tif", (map_inputs["pco2"] * 1e6).astype(np.float32), nodata=np.nan),
                  tag="ppm")
    with pytest.warns(DenudeWarning, match="PCO2 in ppmv without"):
        run_map(settings_for(map_inputs, tmp_path / "a", pco2=ppm, air_pressure_atm=None))
    run_map(settings_for(map_inputs, tmp_path / "b"))
    a, b = read(tmp_path / "a"), read(tmp_path / "b")
    ok = np.isfinite(b)
    np.testing.assert_allclose(a[ok], b[ok], rtol=1e-5)      # float32 storage of x 1e6
    assert record(tmp_path / "a")["inputs"]["pco2"]["unit"] == "ppmv"


def test_one_temperature_range_in_readme_site_map_and_core():
    from pathlib import Path

    from denude.core.constants import TEMPERATURE_MAX_C, TEMPERATURE_MIN_C
    from denude.core.site import check_site_inputs
    from denude.execution.validation import PLAUSIBLE

    readme = (Path(__file__).resolve().parents[1] / "README.md").read_text()
    assert f"valid from {TEMPERATURE_MIN_C:g} to {TEMPERATURE_MAX_C:g} °C" in readme
    assert f"Cells above {TEMPERATURE_MAX_C:g} °C are nodata" in readme
    check_site_inputs(85.0, 0.01)                                   # inside: no error
    with pytest.raises(InputError, match="outside 0-90 degrees C"):
        check_site_inputs(95.0, 0.01)
    low, high, _ = PLAUSIBLE["temperature"]                         # the map refuses only wrong units
    assert low < TEMPERATURE_MIN_C and high > TEMPERATURE_MAX_C
