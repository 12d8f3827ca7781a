"""The compiled passes of the per-window step against the numpy expressions they replace
(denude.core.hazard.classify, and the soluble-fraction / codes-present expression the window
step used before): equal cell for cell, including NaN, infinities, unknown codes and
insoluble rock."""

import numpy as np
import pytest

from denude.core.constants import MINERAL_INDEX
from denude.core.hazard import DEFAULT_BREAKS_MM_PER_KYR, HAZARD_NODATA, classify
from denude.core.kernel import classify_rates, codes_and_soluble_fraction
from denude.core.rocks import RockTable
from denude.registry import INT32_NODATA


def numpy_reference(codes, valid, lookup, fraction):
    """The numpy expression of the window step before the compiled pass."""
    row = lookup.row_index(codes)
    known = valid & (row >= 0)
    present = np.bincount(row[known], minlength=len(lookup.codes)) > 0
    mineral = np.where(known, lookup.mineral_index[np.maximum(row, 0)], 0)
    f = np.broadcast_to(np.asarray(1.0 if fraction is None else fraction, dtype=np.float64), codes.shape)
    out = np.where(known, f, np.nan)
    out = np.where(known & (mineral == MINERAL_INDEX["insoluble"]) & np.isfinite(f), 0.0, out)
    unknown = int(np.count_nonzero(valid & (row < 0)))
    return tuple(int(c) for c in lookup.codes[present]), unknown, out.astype(np.float32)


@pytest.mark.parametrize("fraction_kind", ["none", "constant", "array"])
def test_code_pass_equals_the_numpy_expression(fraction_kind):
    lookup = RockTable.builtin().lookup()
    rng = np.random.default_rng(11)
    known_codes = lookup.codes.astype(np.int32)
    pool = np.concatenate([known_codes[:-1], [999, -5, INT32_NODATA]]).astype(np.int32)   # last code absent
    codes = rng.choice(pool, size=(37, 53))
    valid = codes != INT32_NODATA
    fraction = {"none": None, "constant": 0.4,
                "array": rng.uniform(-0.1, 1.1, codes.shape)}[fraction_kind]
    if fraction_kind == "array":
        fraction[rng.random(codes.shape) < 0.1] = np.nan
        fraction[0, :3] = [np.inf, -np.inf, 0.123456789012345]
    present, unknown, soluble = codes_and_soluble_fraction(codes, valid, lookup, fraction)
    ref_present, ref_unknown, ref_soluble = numpy_reference(codes, valid, lookup, fraction)
    assert present == ref_present and int(lookup.codes[-1]) not in present
    assert unknown == ref_unknown > 0
    assert soluble.dtype == np.float32 and soluble.shape == codes.shape
    np.testing.assert_array_equal(soluble, ref_soluble)     # NaN in the same cells, values bit for bit
    assert np.isnan(soluble[~valid]).all()
    assert (soluble == 0).any()                              # insoluble rock in the table
    _, _, skipped = codes_and_soluble_fraction(codes, valid, lookup, fraction, with_fraction=False)
    assert skipped is None


def test_compiled_classes_equal_hazard_classify():
    rng = np.random.default_rng(5)
    rate = (10 ** rng.uniform(-2, 3, (41, 29))).astype(np.float32)
    rate[0, :5] = [np.nan, np.inf, -np.inf, 0.0, -1.0]
    breaks = np.asarray(DEFAULT_BREAKS_MM_PER_KYR, dtype=np.float64)
    rate[1, :len(breaks)] = breaks.astype(np.float32)          # exactly on a break: the upper class
    for given in (DEFAULT_BREAKS_MM_PER_KYR, (1.0, 5.0, 25.0)):
        got = classify_rates(rate, given)
        assert got.dtype == np.uint8
        np.testing.assert_array_equal(got, classify(rate, given))
    assert classify_rates(rate, DEFAULT_BREAKS_MM_PER_KYR)[0, 0] == HAZARD_NODATA
    assert classify_rates(rate, (1.0, 5.0, 25.0))[0, 1] == 3 and classify_rates(rate, (1.0, 5.0, 25.0))[0, 2] == 0
