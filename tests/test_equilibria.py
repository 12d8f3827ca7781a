"""Equilibrium constants, activity model and the published worked example."""

import numpy as np
import pytest

from denude.core import equilibria as eq
from denude.core.activity import debye_huckel_a, debye_huckel_b, gamma, water_density_kg_per_l
from denude.core.closed_form import calcite_load_mol_per_kg, log_k_star_calcite
from denude.core.dissolution import equilibrium_load_mol_per_l
from denude.core.rates import co2_drawdown_t_per_km2_yr, denudation_mm_per_kyr, mineral_flux_t_per_km2_yr


# Plummer & Busenberg (1982), GCA 46, 1011-1040, Table 2: log K at 25 degrees C.
@pytest.mark.parametrize(
    "func, expected",
    [
        (eq.log_k1, -6.352),
        (eq.log_k2, -10.329),
        (eq.log_k_calcite, -8.480),
        (eq.log_k_henry, -1.468),
    ],
)
def test_plummer_busenberg_25c(func, expected):
    assert func(25.0) == pytest.approx(expected, abs=6e-4)


def test_dolomite_and_gypsum_25c():
    # phreeqc.dat (Parkhurst & Appelo 2013): dolomite log K25 -17.09, gypsum -4.58.
    assert eq.log_k_dolomite(25.0) == pytest.approx(-17.09, abs=1e-9)
    assert eq.log_k_gypsum(25.0) == pytest.approx(-4.58, abs=2e-3)


def test_dolomite_vant_hoff_direction():
    # dH = -9.436 kcal/mol < 0 (phreeqc.dat): dolomite is less soluble when warmer.
    # van't Hoff slope d logK / d(1/T) = -dH / (R ln 10) = 2062 K (derived).
    t = np.array([5.0, 25.0])
    lk = eq.log_k_dolomite(t)
    slope = (lk[1] - lk[0]) / (1 / 298.15 - 1 / 278.15)
    assert slope == pytest.approx(9.436 / (1.98720425864083e-3 * np.log(10)), rel=1e-9)
    assert lk[0] > lk[1]


def test_water_ion_product_25c():
    # log Kw = -14.00 at 25 degrees C (CRC Handbook; from memory): phreeqc.dat fit within 0.01.
    assert eq.log_k_water(25.0) == pytest.approx(-14.0, abs=0.01)


def test_debye_huckel_parameters():
    # Truesdell & Jones (1974) / Garrels & Christ tables: A = 0.5085, B = 0.3281 at 25 C
    # (values from memory); the linear fits of the science notes agree within 0.3 %.
    assert debye_huckel_a(25.0) == pytest.approx(0.5085, rel=3e-3)
    assert debye_huckel_b(25.0) == pytest.approx(0.3281, rel=3e-3)


def test_dielectric_debye_huckel_parameters():
    from denude.core.activity import debye_huckel_a_dielectric, debye_huckel_b_dielectric, water_dielectric_constant

    # Handbook dielectric constant of water (CRC; from memory): 87.9 at 0 C, 78.4 at 25 C, 69.9 at 50 C
    assert water_dielectric_constant([0.0, 25.0, 50.0]) == pytest.approx([87.9, 78.4, 69.9], abs=0.2)
    # Textbook A and B at 25 C from the dielectric constant (from memory: A 0.509-0.512, B 0.328-0.329)
    assert 0.509 < debye_huckel_a_dielectric(25.0) < 0.512
    assert 0.328 < debye_huckel_b_dielectric(25.0) < 0.3295
    # the two sets agree within 0.5 % at 25 C and part above 30 C, where the linear fits stop
    assert debye_huckel_a_dielectric(25.0) == pytest.approx(debye_huckel_a(25.0), rel=5e-3)
    assert debye_huckel_a_dielectric(70.0) / debye_huckel_a(70.0) - 1 > 0.01


def test_water_density_handbook():
    # Handbook density of water (CRC; from memory): 0.99997 kg/L at 4 C, 0.99705 at 25 C.
    assert water_density_kg_per_l(4.0) == pytest.approx(0.99997, abs=2e-5)
    assert water_density_kg_per_l(25.0) == pytest.approx(0.99705, abs=2e-5)


def test_worked_example_science_notes():
    # Worked example, science notes section 1 (derived from White 1984 with the PB82
    # constants): t = 10 C, PCO2 = 0.01 atm, q = 500 mm/yr, rho = 2.70 g/cm3.
    assert log_k_star_calcite(10.0) == pytest.approx(-5.6553, abs=1e-4)
    m = calcite_load_mol_per_kg(10.0, 0.01)
    assert m * 1e3 == pytest.approx(2.0736, abs=1e-4)
    ionic = 3 * m
    assert ionic == pytest.approx(0.00622, abs=1e-5)
    assert gamma(2, 5.0, ionic, 10.0) == pytest.approx(0.7265, abs=1e-4)
    assert gamma(1, 5.4, ionic, 10.0) == pytest.approx(0.9239, abs=1e-4)
    # Treating mol/kg as mol/L, as the worked example does:
    assert denudation_mm_per_kyr(m, 500.0, 100.09, 2.70) == pytest.approx(38.4, abs=0.05)
    assert mineral_flux_t_per_km2_yr(m, 500.0, 100.09) == pytest.approx(103.8, abs=0.05)
    assert co2_drawdown_t_per_km2_yr(m, 500.0, 1.0) == pytest.approx(45.6, abs=0.05)
    # With the water-density conversion the package applies (Kell 1975), 0.03 % lower:
    per_l = equilibrium_load_mol_per_l("calcite", 10.0, 0.01)
    assert per_l / m == pytest.approx(0.99970, abs=2e-5)
    assert denudation_mm_per_kyr(per_l, 500.0, 100.09, 2.70) == pytest.approx(38.4, abs=0.05)


def test_retrograde_solubility_band():
    # Science notes section 5 (derived): at fixed PCO2, [Ca]eq falls about 35 % from 0 to 25 C.
    m0, m25 = calcite_load_mol_per_kg(np.array([0.0, 25.0]), 0.01)
    assert 1 - m25 / m0 == pytest.approx(0.35, abs=0.03)


def test_gypsum_solubility_band():
    # Science notes section 2: gypsum in pure water about 15 mmol/kg at 25 C and 13 at 0 C;
    # handbook about 2.0-2.1 g/L as CaSO4 at 20-25 C (from memory; CaSO4 = 136.14 g/mol).
    g = equilibrium_load_mol_per_l("gypsum", np.array([0.0, 25.0]), 0.01)
    assert g[0] * 1e3 == pytest.approx(13.0, abs=0.6)
    assert g[1] * 1e3 == pytest.approx(15.0, abs=0.6)
    assert 2.0 <= g[1] * 136.14 <= 2.1 + 0.05
