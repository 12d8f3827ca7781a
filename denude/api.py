"""The library face of denude: rates at a site and on arrays, for notebooks and scripts.

``site`` is what `denude site` computes; ``rates`` runs the per-cell kernel
(``denude.core.kernel.compute_block``) on numpy arrays or on xarray DataArrays on one grid
(Dask-backed ones stay lazy: the same kernel runs chunk by chunk through
``xarray.apply_ufunc(..., dask="parallelized")``). xarray is imported only when a DataArray
comes in.
"""

from __future__ import annotations

from typing import Mapping, Union

import numpy as np

from denude.cautions import CAUTION
from denude.core.kernel import compute_block
from denude.core.rocks import RockTable, RockType
from denude.core.site import check_site_inputs, finite_or_none, site_rates
from denude.errors import InputError
from denude.registry import CHOICES, OUTPUT_LAYERS

#: The variables ``rates`` returns, with their units (the map's float layers).
RATE_VARIABLES = {
    "denudation_mm_per_kyr": OUTPUT_LAYERS["denudation"],
    "dissolved_load_mmol_per_l": OUTPUT_LAYERS["dissolved_load"],
    "co2_drawdown_t_per_km2_yr": OUTPUT_LAYERS["co2_drawdown"],
}

RocksLike = Union[RockTable, str, None]


def rock_table(rocks: RocksLike = None) -> RockTable:
    """A rock table: the built-in one (None), a ``RockTable``, or the path of a rock CSV."""
    if rocks is None:
        return RockTable.builtin()
    if isinstance(rocks, RockTable):
        return rocks
    from denude.io.rock_csv import read_rock_table

    return read_rock_table(rocks)


def _rock(rock: Union[str, int, RockType], rocks: RocksLike) -> RockType:
    if isinstance(rock, RockType):
        return rock
    table = rock_table(rocks)
    if isinstance(rock, int) or str(rock).strip().lstrip("-").isdigit():
        return table.by_code(int(rock))
    return table.by_name(str(rock))


def _check_chemistry(chemistry: str) -> str:
    if chemistry not in CHOICES["chemistry"]:
        raise InputError(f"chemistry {chemistry!r} is not known; use one of {', '.join(CHOICES['chemistry'])}")
    return chemistry


def site(temperature_c: float, pco2_atm: float, runoff_mm_per_yr: float, rock: Union[str, int, RockType] = "limestone",
         chemistry: str = "white", soluble_fraction: float = 1.0, rocks: RocksLike = None) -> dict:
    """Maximum chemical denudation at one site (a screening estimate), as a dict.

    temperature_c [degrees C, 0-90], pco2_atm [atm, 0-1], runoff_mm_per_yr [mm/yr],
    rock: a name or code of ``rocks`` (built-in table by default) or a ``RockType``;
    soluble_fraction [0-1]: share of the site's area that is soluble rock. The keys are those
    of `denude site --json` (units in the names; NaN as None), with ``caution``.
    """
    check_site_inputs(float(temperature_c), float(pco2_atm))
    if not (0.0 <= soluble_fraction <= 1.0):
        raise InputError(f"soluble_fraction {soluble_fraction} is outside 0-1")
    rock_type = _rock(rock, rocks)
    result = site_rates(rock_type, float(temperature_c), float(pco2_atm), float(runoff_mm_per_yr),
                        _check_chemistry(chemistry), float(soluble_fraction))
    record = {k: (finite_or_none(v) if isinstance(v, float) else v) for k, v in result.as_dict().items()}
    record["pco2_source"] = "given in atm"
    record["caution"] = CAUTION
    return record


def _kernel(rocks_lookup, chemistry: str, with_fraction: bool):
    """The numpy function ``rates`` maps over arrays or chunks: compute_block, three outputs."""

    def run(codes, runoff, pco2, temperature, *fraction):
        codes = np.asarray(codes)
        if codes.dtype.kind == "f":
            finite = np.isfinite(codes)
            if (codes[finite] != np.round(codes[finite])).any():
                raise InputError("lithology holds non-integer codes; give integer lithology codes")
            valid = finite
            codes = np.where(finite, codes, -1).astype(np.int64)
        else:
            valid = None
        result = compute_block(codes, runoff, pco2, temperature, rocks_lookup, chemistry,
                               soluble_fraction=fraction[0] if with_fraction else None, lithology_valid=valid)
        return tuple(getattr(result, name) for name in RATE_VARIABLES)

    return run


def rates(lithology, runoff_mm_per_yr, pco2_atm, temperature_c, rocks: RocksLike = None, chemistry: str = "white",
          soluble_fraction=None) -> Mapping:
    """Maximum denudation rate, dissolved load and CO2 drawdown per cell.

    lithology : integer codes of ``rocks`` (built-in table by default; a RockTable or CSV path)
    runoff_mm_per_yr [mm/yr], pco2_atm [atm], temperature_c [degrees C], soluble_fraction [0-1,
    default 1]: arrays on the lithology's grid or numbers; NaN = nodata.

    numpy in -> a dict of float32 numpy arrays named as ``RATE_VARIABLES``. If any input is an
    ``xarray.DataArray`` -> an ``xarray.Dataset`` of those variables on its coordinates, with the
    lithology's attributes (plus ``caution``) and ``attrs["units"]`` on each variable;
    Dask-backed inputs give a lazy Dataset (computed chunk by chunk with the same kernel).
    """
    _check_chemistry(chemistry)
    lookup = rock_table(rocks).lookup()
    args = [lithology, runoff_mm_per_yr, pco2_atm, temperature_c]
    with_fraction = soluble_fraction is not None
    if with_fraction:
        args.append(soluble_fraction)
    kernel = _kernel(lookup, chemistry, with_fraction)
    if not any(type(a).__name__ == "DataArray" for a in args):
        return dict(zip(RATE_VARIABLES, kernel(*args)))
    return _rates_xarray(kernel, args)


def _rates_xarray(kernel, args):
    import xarray as xr

    template = next(a for a in args if isinstance(a, xr.DataArray))
    outputs = xr.apply_ufunc(
        kernel, *args,
        dask="parallelized",
        output_core_dims=[[] for _ in RATE_VARIABLES],       # three elementwise outputs
        output_dtypes=[np.float32] * len(RATE_VARIABLES),
        keep_attrs=False,
    )
    variables = {}
    for (name, layer), data in zip(RATE_VARIABLES.items(), outputs):
        data.attrs = {"units": layer.units, "long_name": layer.quantity}
        variables[name] = data
    lithology = args[0] if isinstance(args[0], xr.DataArray) else template
    dataset = xr.Dataset(variables, attrs={**lithology.attrs, "caution": CAUTION})
    return dataset
