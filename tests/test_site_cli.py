"""`denude site`: output for a known case, units handling, and one-line errors."""

import json
import math

import pytest
from typer.testing import CliRunner

from denude.cli.main import app

runner = CliRunner()


def run(*args):
    return runner.invoke(app, ["site", *args])


def test_known_case_json():
    result = run("--temperature", "10", "--pco2", "0.01", "--runoff", "500", "--rock", "limestone", "--json")
    assert result.exit_code == 0, result.output
    data = json.loads(result.stdout)
    for key in ("dissolved_load_mmol_per_l", "denudation_mm_per_kyr", "co2_drawdown_t_per_km2_yr",
                "density_g_cm3", "purity", "chemistry"):
        assert key in data
    # worked example, science notes section 1: 2.0736 mmol/kg, 38.4 mm/kyr at 2.70 g/cm3,
    # purity 1; the built-in limestone is 2.60 g/cm3 with purity 0.95; mol/L uses the
    # density of water at 10 C (0.9997 kg/L, Kell 1975).
    assert data["dissolved_load_mmol_per_l"] == pytest.approx(2.0736 * 0.9997, rel=2e-4)
    assert data["denudation_mm_per_kyr"] == pytest.approx(38.43 * 2.70 / (2.60 * 0.95), rel=2e-3)
    assert data["co2_drawdown_t_per_km2_yr"] == pytest.approx(45.6, abs=0.1)
    assert data["density_g_cm3"] == 2.60 and data["purity"] == 0.95
    assert data["chemistry"] == "white"


def test_speciated_is_higher_by_ion_pairs():
    white = json.loads(run("--temperature", "10", "--pco2", "0.01", "--runoff", "500", "--json").stdout)
    spec = json.loads(run("--temperature", "10", "--pco2", "0.01", "--runoff", "500", "--json",
                          "--chemistry", "speciated").stdout)
    # PHREEQC (phreeqc.dat) gives 2.119 mmol/kgw at 10 C, PCO2 0.01 atm (tests/test_phreeqc_reference.py)
    assert spec["dissolved_load_mmol_per_l"] == pytest.approx(2.119 * 0.9997, rel=5e-3)
    assert spec["chemistry"] == "speciated"
    assert 1.015 < spec["denudation_mm_per_kyr"] / white["denudation_mm_per_kyr"] < 1.035


def test_ppmv_with_elevation_and_water_balance():
    # 10000 ppmv at 840 m: p = exp(-0.1) atm, PCO2 = 0.01 * 0.9048 atm (science notes section 4)
    data = json.loads(run("--temperature", "10", "--pco2", "10000", "--pco2-units", "ppmv", "--elevation", "840",
                          "--precipitation", "900", "--aet", "400", "--json").stdout)
    assert data["pco2_atm"] == pytest.approx(0.01 * 0.904837, rel=1e-5)
    assert data["runoff_mm_per_yr"] == 500.0


def test_pco2_from_aet_brook():
    # Brook et al. (1983): log PCO2 = -3.47 + 2.09 (1 - exp(-0.00172 AET)); AET 0 gives
    # about 340 ppmv (coefficients from memory, science notes section 4).
    data = json.loads(run("--temperature", "10", "--aet", "0", "--runoff", "500", "--json").stdout)
    assert data["pco2_atm"] == pytest.approx(10**-3.47, rel=1e-9)
    assert data["pco2_atm"] * 1e6 == pytest.approx(340, abs=2)


def test_pco2_from_aet_keyword_matches_omitted_pco2():
    explicit = json.loads(run("--temperature", "10", "--pco2", "from-aet", "--aet", "450", "--runoff", "500", "--json").stdout)
    implicit = json.loads(run("--temperature", "10", "--aet", "450", "--runoff", "500", "--json").stdout)
    assert explicit["pco2_atm"] == implicit["pco2_atm"]
    # Brook et al. (1983), coefficients from memory: log PCO2 = -3.47 + 2.09 (1 - exp(-0.00172 * 450))
    assert explicit["pco2_atm"] == pytest.approx(10 ** (-3.47 + 2.09 * (1 - math.exp(-0.00172 * 450))), rel=1e-12)


def test_gypsum_table_output():
    result = run("--temperature", "25", "--pco2", "0.01", "--runoff", "300", "--rock", "gypsum")
    assert result.exit_code == 0
    assert "mm/kyr" in result.stdout and "not a site" in result.stdout


@pytest.mark.parametrize(
    "args, message, code",
    [
        (["--temperature", "10", "--pco2", "400", "--runoff", "500"], "add --pco2-units ppmv", 1),
        (["--temperature", "120", "--pco2", "0.01", "--runoff", "500"], "outside 0-90", 1),
        (["--temperature", "10", "--pco2", "0.01", "--runoff", "500", "--rock", "anhydrite"], "hydrates to gypsum", 1),
        (["--temperature", "10", "--pco2", "0.01", "--runoff", "500", "--rock", "granit"], "unknown rock", 1),
        (["--temperature", "10", "--runoff", "500"], "no soil CO2 given", 1),
        (["--temperature", "10", "--pco2", "0.01"], "no runoff given", 1),
        (["--temperature", "ten"], "Invalid value for '--temperature'", 2),
        (["--temperature", "10", "--chemistry", "fast"], "Invalid value for '--chemistry'", 2),
        (["--temperature", "10", "--pco2", "lots", "--runoff", "500"], "is not a number", 1),
        (["--temperature", "10", "--pco2", "from-aet", "--runoff", "500"], "needs --aet", 1),
    ],
)
def test_bad_arguments_one_line(args, message, code):
    result = run(*args)
    assert result.exit_code == code
    assert message in result.stderr
    assert len(result.stderr.strip().splitlines()) == 1
    assert "Traceback" not in result.output
