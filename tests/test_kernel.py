"""The per-cell kernel: table path vs direct solver, cell rules, counts, properties."""

import json
import threading
import warnings

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from denude.core.dissolution import equilibrium_load_mol_per_l
from denude.core.kernel import compute_block
from denude.core.lookup import load_table
from denude.core.rocks import RockTable
from denude.errors import OutOfRangeWarning

ROCKS = RockTable.builtin().lookup()


def random_block(seed=0, side=60):
    rng = np.random.default_rng(seed)
    shape = (side, side)
    codes = rng.integers(0, 7, shape).astype(np.int16)  # 6 is not in the table
    q = rng.uniform(-100, 1500, shape).astype(np.float32)
    p = (10 ** rng.uniform(-4, -0.5, shape)).astype(np.float32)
    t = rng.uniform(-3, 40, shape).astype(np.float32)
    f = rng.uniform(0, 1, shape).astype(np.float32)
    q[0, :7] = np.nan
    t[1, :3] = 95.0
    p[2, :4] = 1e-10  # below the lookup table: solved directly
    return codes, q, p, t, f


@pytest.mark.parametrize("chemistry", ["white", "speciated"])
def test_table_path_matches_direct_solver(chemistry):
    codes, q, p, t, f = random_block()
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", OutOfRangeWarning)
        fast = compute_block(codes, q, p, t, ROCKS, chemistry, soluble_fraction=f)
        exact = compute_block(codes, q, p, t, ROCKS, chemistry, soluble_fraction=f, method="direct")
    assert fast.counts == exact.counts
    for name, a in fast.layers().items():
        b = getattr(exact, name)
        assert a.dtype == np.float32
        assert np.array_equal(np.isnan(a), np.isnan(b)), name
        ok = np.isfinite(b) & (b != 0)
        # lookup table: relative error below 1e-4 (module docstring of denude.core.lookup)
        assert np.max(np.abs(a[ok].astype(float) / b[ok] - 1)) < 1e-4, name
        assert np.array_equal(a[b == 0], b[b == 0])


def test_lookup_table_nodes_are_exact():
    tab = load_table("calcite", "white")
    value = tab.interpolate_mol_per_l(10.0, 1e-2)
    assert value == pytest.approx(equilibrium_load_mol_per_l("calcite", 10.0, 1e-2), rel=1e-12)


def test_cell_rules_and_counts():
    codes = np.array([1, 0, 9, 1, 1, 1, 1, 1])
    q = np.array([500, 500, 500, np.nan, -20, 500, 500, 500.0])
    t = np.array([10, 10, 10, 10, 10, -1, 10, 10.0])
    p = np.array([0.01, 0.01, 0.01, 0.01, 0.01, 0.01, 0.0, 0.01])
    valid = np.array([1, 1, 1, 1, 1, 1, 1, 0], bool)
    with pytest.warns(OutOfRangeWarning, match="2 cell"):
        r = compute_block(codes, q, p, t, ROCKS, lithology_valid=valid)
    rate = r.denudation_mm_per_kyr
    # limestone (built-in: 2.60 g/cm3, purity 0.95): worked example 38.4 mm/kyr at
    # 2.70 g/cm3 and purity 1 (science notes section 1), rescaled by 2.70 / (2.60 * 0.95)
    assert rate[0] == pytest.approx(38.43 * 2.70 / (2.60 * 0.95), rel=2e-3)
    assert rate[1] == 0.0                      # insoluble
    assert np.isnan(rate[2])                   # unknown code
    assert np.isnan(rate[3])                   # nodata runoff
    assert rate[4] == 0.0                      # runoff <= 0 gives 0
    assert r.dissolved_load_mmol_per_l[4] > 0  # ... but the load is still reported
    assert np.isnan(rate[5]) and np.isnan(rate[6])  # out of range (temperature, PCO2)
    assert np.isnan(rate[7])                   # lithology nodata
    assert r.counts.as_dict() == {
        "cells": 8, "computed": 3, "nodata": 2, "unknown_code": 1, "out_of_range": 2, "zero_runoff": 1,
        "negative_runoff": 0,
    }


def test_soluble_fraction_scales_rate_not_load():
    full = compute_block(np.array([1]), 500.0, 0.01, 10.0, ROCKS)
    half = compute_block(np.array([1]), 500.0, 0.01, 10.0, ROCKS, soluble_fraction=0.5)
    assert half.denudation_mm_per_kyr[0] == pytest.approx(full.denudation_mm_per_kyr[0] / 2, rel=1e-6)
    assert half.co2_drawdown_t_per_km2_yr[0] == pytest.approx(full.co2_drawdown_t_per_km2_yr[0] / 2, rel=1e-6)
    assert half.dissolved_load_mmol_per_l[0] == full.dissolved_load_mmol_per_l[0]


def test_co2_drawdown_per_mineral():
    # science notes section 6: 1 mol CO2 per mol calcite, 2 per mol dolomite, 0 for gypsum.
    r = compute_block(np.array([1, 2, 3]), 500.0, 0.01, 10.0, ROCKS)
    load = r.dissolved_load_mmol_per_l.astype(float) * 1e-3
    expected = np.array([1, 2, 0]) * load * 500.0 * 44.01
    np.testing.assert_allclose(r.co2_drawdown_t_per_km2_yr, expected, rtol=1e-6)


def test_worker_thread_uses_serial_loop_with_same_result():
    codes, q, p, t, f = random_block(seed=3)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", OutOfRangeWarning)
        main = compute_block(codes, q, p, t, ROCKS, soluble_fraction=f, warn=False)
        box = {}
        worker = threading.Thread(target=lambda: box.update(r=compute_block(codes, q, p, t, ROCKS, soluble_fraction=f, warn=False)))
        worker.start()
        worker.join()
    for name, a in main.layers().items():
        assert np.array_equal(a, getattr(box["r"], name), equal_nan=True)


def test_tiles_equal_whole_block_bit_for_bit():
    codes, q, p, t, f = random_block(seed=5, side=64)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", OutOfRangeWarning)
        whole = compute_block(codes, q, p, t, ROCKS, soluble_fraction=f)
        for rows in (slice(0, 23), slice(23, 64)):
            for cols in (slice(0, 40), slice(40, 64)):
                part = compute_block(codes[rows, cols], q[rows, cols], p[rows, cols], t[rows, cols], ROCKS,
                                     soluble_fraction=f[rows, cols])
                assert np.array_equal(part.denudation_mm_per_kyr, whole.denudation_mm_per_kyr[rows, cols], equal_nan=True)


# --- properties (hypothesis) -------------------------------------------------------------

temperatures = st.floats(0.0, 40.0)
log_pco2 = st.floats(-3.5, -1.0)
runoffs = st.floats(0.0, 3000.0)
codes_st = st.sampled_from([0, 1, 2, 3, 4, 5])


@settings(max_examples=60, deadline=None)
@given(codes_st, temperatures, log_pco2, runoffs, st.sampled_from(["white", "speciated"]))
def test_rate_non_negative_and_linear_in_runoff(code, t, lp, q, chemistry):
    r1 = compute_block(np.array([code]), q, 10**lp, t, ROCKS, chemistry)
    r2 = compute_block(np.array([code]), 2 * q, 10**lp, t, ROCKS, chemistry)
    assert r1.denudation_mm_per_kyr[0] >= 0
    assert r2.denudation_mm_per_kyr[0] == pytest.approx(2 * r1.denudation_mm_per_kyr[0], rel=1e-6, abs=1e-30)


@settings(max_examples=60, deadline=None)
@given(temperatures, log_pco2, st.sampled_from(["white", "speciated"]))
def test_calcite_cube_root_in_pco2(t, lp, chemistry):
    # science notes section 5 (derived): ten times the CO2 gives 2.15 times the calcium;
    # the activity correction raises the ratio a little (more ions, smaller gammas, so
    # more calcium for the same activity product; ion pairs add to it in the speciated
    # mode): at most 15 % up to PCO2 = 1 atm.
    low = equilibrium_load_mol_per_l("calcite", t, 10**lp, chemistry)
    high = equilibrium_load_mol_per_l("calcite", t, 10 ** (lp + 1), chemistry)
    assert 10 ** (1 / 3) * 0.995 <= high / low <= 10 ** (1 / 3) * 1.15


@settings(max_examples=60, deadline=None)
@given(st.floats(0.0, 89.0), log_pco2, st.sampled_from(["calcite", "dolomite"]), st.sampled_from(["white", "speciated"]))
def test_carbonate_load_falls_with_temperature(t, lp, mineral, chemistry):
    # science notes section 5: retrograde solubility of carbonates at fixed PCO2.
    a = equilibrium_load_mol_per_l(mineral, np.array([t, t + 1.0]), 10**lp, chemistry)
    assert a[1] < a[0]


@settings(max_examples=40, deadline=None)
@given(codes_st, temperatures, log_pco2, runoffs)
def test_scalar_and_array_results_identical(code, t, lp, q):
    single = compute_block(np.array(code), q, 10**lp, t, ROCKS)
    many = compute_block(np.full((3, 2), code), np.full((3, 2), q), 10**lp, t, ROCKS)
    assert single.denudation_mm_per_kyr.shape == ()
    assert np.all(many.denudation_mm_per_kyr == single.denudation_mm_per_kyr)
    direct = equilibrium_load_mol_per_l("calcite", t, 10**lp)
    direct_arr = equilibrium_load_mol_per_l("calcite", np.array([t, t]), np.array([10**lp, 10**lp]))
    assert np.all(direct_arr == direct)


@pytest.mark.parametrize("chemistry", ["white", "speciated"])
def test_nan_in_nan_out(chemistry):
    for mineral in ("calcite", "dolomite", "gypsum"):
        values = equilibrium_load_mol_per_l(mineral, np.array([np.nan, 10.0]), np.array([0.01, np.nan]), chemistry)
        assert np.isnan(values[0]) and (np.isnan(values[1]) or mineral == "gypsum")
    r = compute_block(np.array([1, 1]), np.array([np.nan, 500]), 0.01, np.array([10, np.nan]), ROCKS, chemistry)
    assert np.all(np.isnan(r.denudation_mm_per_kyr))


def test_insoluble_rock_is_zero_whatever_the_climate():
    # Insoluble rock needs no chemistry: out-of-range temperature or PCO2 must not punch holes.
    codes = np.array([0, 0, 1])
    t = np.array([-3.0, 10.0, -3.0])
    p = np.array([0.01, 0.0, 0.01])
    for method in ("table", "direct"):
        with pytest.warns(OutOfRangeWarning, match="1 cell"):
            r = compute_block(codes, 500.0, p, t, ROCKS, method=method)
        assert r.denudation_mm_per_kyr[0] == 0 and r.denudation_mm_per_kyr[1] == 0
        assert np.isnan(r.denudation_mm_per_kyr[2])
        assert r.counts.out_of_range == 1 and r.counts.computed == 2


def test_load_tables_built_once_when_threads_ask_together(monkeypatch):
    """Worker threads asking for the tables at the same moment share one build."""
    import threading

    from denude.core import lookup
    from denude.core.constants import MINERALS

    monkeypatch.setattr(lookup, "_STACKED", {})          # none built yet in this process
    built = []
    original = lookup.load_table

    def counting(mineral, chemistry):
        built.append(mineral)
        return original(mineral, chemistry)

    monkeypatch.setattr(lookup, "load_table", counting)
    start = threading.Barrier(4)
    results = []

    def ask():
        start.wait()
        results.append(lookup.stacked_tables("white"))

    threads = [threading.Thread(target=ask) for _ in range(4)]
    for th in threads:
        th.start()
    for th in threads:
        th.join()
    assert len(built) == len(MINERALS) - 1          # one table per soluble mineral, once
    assert all(r[0] is results[0][0] for r in results)


def test_warm_up_on_a_thread_loads_the_serial_build():
    """warm_up() from a worker thread leaves the serial loop compiled for a map window's
    dtypes (int32 codes, float64 inputs), so the first window of a run finds it ready."""
    import threading

    from denude.core import fast_kernel
    from denude.core.kernel import warm_up

    th = threading.Thread(target=warm_up, args=("white",))
    th.start()
    th.join()
    kinds = {(str(sig[0].dtype), str(sig[2].dtype)) for sig in fast_kernel.cell_loop_serial.signatures}
    assert ("int32", "float64") in kinds


def test_command_line_skips_numba_blas_probe_and_keeps_the_numbers():
    # the `denude` command asks numba not to import scipy.linalg for its BLAS probe (the
    # compiled loops use no BLAS); the numbers must not change, and a library import of
    # denude must leave numba's BLAS alone
    import subprocess
    import sys

    script = (
        "import sys, json, numpy as np\n"
        "from denude.core.kernel import compute_block\n"
        "from denude.core.rocks import RockTable\n"
        "r = RockTable.builtin().lookup()\n"
        "c = np.asarray(r.codes, np.int32)\n"
        "one = np.ones(c.size)\n"
        "out = compute_block(c, 480.0 * one, 0.012 * one, 11.0 * one, r, 'white', warn=False)\n"
        "import numba.np.arraymath as a\n"
        "print(json.dumps([a._HAVE_BLAS, 'scipy.linalg' in sys.modules,"
        " out.denudation_mm_per_kyr.astype(float).tolist()]))\n"
    )

    def run(env_value):
        import os

        env = {k: v for k, v in os.environ.items() if k != "DENUDE_NUMBA_BLAS_PROBE"}
        if env_value is not None:
            env["DENUDE_NUMBA_BLAS_PROBE"] = env_value
        proc = subprocess.run([sys.executable, "-c", script], capture_output=True, text=True, env=env, check=True)
        return json.loads(proc.stdout.strip().splitlines()[-1])

    skipped, library = run("skip"), run(None)
    assert skipped[:2] == [False, False]
    assert library[0] is True
    assert skipped[2] == library[2] and any(v > 0 for v in library[2] if v == v)
    # the command line sets it for its own process
    from denude.cli import main  # noqa: F401
    import os

    assert os.environ.get("DENUDE_NUMBA_BLAS_PROBE") == "skip"
