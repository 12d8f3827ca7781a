"""`denude site`: the maximum denudation rate at one site."""

from __future__ import annotations

import json
from enum import Enum
from pathlib import Path
from typing import Annotated, Optional

import typer
from rich.console import Console
from rich.table import Table

from denude.cli.common import CAUTION, handle_user_errors
from denude.core.constants import PCO2_MAX_ATM, TEMPERATURE_MAX_C, TEMPERATURE_MIN_C
from denude.core.rocks import RockTable
from denude.core.site import finite_or_none, site_rates
from denude.core.soil_co2 import air_pressure_atm, log10_atm_to_atm, pco2_from_aet_atm, ppmv_to_atm
from denude.errors import InputError


class Chemistry(str, Enum):
    white = "white"
    speciated = "speciated"


class Pco2Units(str, Enum):
    atm = "atm"
    ppmv = "ppmv"
    log10atm = "log10atm"


def parse_pco2_option(text: Optional[str], aet_mm_per_yr: Optional[float]) -> Optional[float]:
    """--pco2 as a number, or None for 'from-aet' (PCO2 then comes from --aet)."""
    if text is None:
        return None
    if text.strip().lower() == "from-aet":
        if aet_mm_per_yr is None:
            raise InputError("--pco2 from-aet needs --aet MM_PER_YR (actual evapotranspiration)")
        return None
    try:
        return float(text)
    except ValueError:
        raise InputError(f"--pco2 {text!r} is not a number; give e.g. 0.01 (atm) or 'from-aet'") from None


def resolve_pco2_atm(pco2, units, elevation_m, air_pressure, aet_mm_per_yr) -> tuple[float, str]:
    """PCO2 in atm from the site options, and a note on how it was obtained."""
    if pco2 is None:
        if aet_mm_per_yr is None:
            raise InputError("no soil CO2 given; pass --pco2 VALUE or --aet MM_PER_YR (Brook et al. 1983)")
        return float(pco2_from_aet_atm(aet_mm_per_yr)), "Brook et al. (1983) from AET"
    if units == Pco2Units.atm:
        value = pco2
    elif units == Pco2Units.log10atm:
        value = float(log10_atm_to_atm(pco2))
    else:
        if elevation_m is not None and air_pressure is not None:
            raise InputError("give either --elevation or --air-pressure for the ppmv conversion, not both")
        pressure = air_pressure if air_pressure is not None else (
            float(air_pressure_atm(elevation_m)) if elevation_m is not None else 1.0
        )
        value = float(ppmv_to_atm(pco2, pressure))
    if not (0.0 < value <= PCO2_MAX_ATM):
        hint = " (a value above 1 looks like ppmv: add --pco2-units ppmv)" if units == Pco2Units.atm and value > 1 else ""
        raise InputError(f"--pco2 {pco2} gives {value:g} atm, outside 0 < PCO2 <= 1 atm{hint}")
    return value, f"given in {units.value}"


def resolve_runoff_mm_per_yr(runoff, precipitation, aet_mm_per_yr) -> float:
    """Runoff in mm/yr from --runoff, or --precipitation minus --aet."""
    if runoff is not None:
        if precipitation is not None:
            raise InputError("give either --runoff or --precipitation (with --aet), not both")
        return runoff
    if precipitation is None or aet_mm_per_yr is None:
        raise InputError("no runoff given; pass --runoff MM_PER_YR or --precipitation and --aet (mm/yr)")
    return max(precipitation - aet_mm_per_yr, 0.0)


def resolve_rock(rock: str, rocks_csv: Optional[Path]):
    """A rock type by name or code, from the built-in table or the user's CSV."""
    if rocks_csv is not None:
        from denude.io.rock_csv import read_rock_table

        table = read_rock_table(rocks_csv)
    else:
        table = RockTable.builtin()
    if rock.strip().lstrip("-").isdigit():
        return table.by_code(int(rock))
    return table.by_name(rock)


def site(
    temperature: Annotated[float, typer.Option(help="Air or soil temperature [degrees C].")],
    runoff: Annotated[Optional[float], typer.Option(help="Runoff [mm/yr].")] = None,
    pco2: Annotated[Optional[str], typer.Option(help="Soil CO2 partial pressure (units: --pco2-units), or 'from-aet' (Brook et al. 1983, needs --aet).")] = None,
    rock: Annotated[str, typer.Option(help="Rock name (or code with --rocks).")] = "limestone",
    chemistry: Annotated[Chemistry, typer.Option(help="white: White (1984) closed form; speciated: full carbonate speciation.")] = Chemistry.white,
    pco2_units: Annotated[Pco2Units, typer.Option("--pco2-units", help="Units of --pco2.")] = Pco2Units.atm,
    elevation: Annotated[Optional[float], typer.Option(help="Elevation [m] for the ppmv to atm conversion.")] = None,
    air_pressure: Annotated[Optional[float], typer.Option(help="Air pressure [atm] for the ppmv conversion.")] = None,
    aet: Annotated[Optional[float], typer.Option(help="Actual evapotranspiration [mm/yr]: PCO2 by Brook et al. (1983) if --pco2 is absent; runoff = P - AET with --precipitation.")] = None,
    precipitation: Annotated[Optional[float], typer.Option(help="Precipitation [mm/yr] (with --aet, instead of --runoff).")] = None,
    soluble_fraction: Annotated[float, typer.Option(min=0.0, max=1.0, help="Share of the site's area that is soluble rock [0-1].")] = 1.0,
    rocks: Annotated[Optional[Path], typer.Option(help="Rock table CSV (code,name,mineral,density_g_cm3,purity).", exists=True, dir_okay=False)] = None,
    as_json: Annotated[bool, typer.Option("--json", help="Print one JSON object.")] = False,
):
    """Maximum chemical denudation rate at one site (screening estimate)."""
    if not (TEMPERATURE_MIN_C <= temperature <= TEMPERATURE_MAX_C):
        raise InputError(
            f"--temperature {temperature} degrees C is outside {TEMPERATURE_MIN_C:g}-{TEMPERATURE_MAX_C:g} "
            "degrees C, the validity of the constants"
        )
    rock_type = resolve_rock(rock, rocks)
    pco2 = parse_pco2_option(pco2, aet)
    pco2_atm, pco2_note = resolve_pco2_atm(pco2, pco2_units, elevation, air_pressure, aet)
    runoff_mm = resolve_runoff_mm_per_yr(runoff, precipitation, aet)
    result = site_rates(rock_type, temperature, pco2_atm, runoff_mm, chemistry.value, soluble_fraction)
    record = {k: (finite_or_none(v) if isinstance(v, float) else v) for k, v in result.as_dict().items()}
    record["pco2_source"] = pco2_note
    record["caution"] = CAUTION
    if as_json:
        typer.echo(json.dumps(record, indent=2))
        return
    table = Table(title=f"Maximum denudation at one site ({rock_type.name}, {chemistry.value} chemistry)")
    table.add_column("quantity")
    table.add_column("value", justify="right")
    table.add_column("unit")
    rows = [
        ("temperature", result.temperature_c, "degrees C"),
        ("soil PCO2", result.pco2_atm, f"atm ({pco2_note})"),
        ("runoff", result.runoff_mm_per_yr, "mm/yr"),
        ("rock density", result.density_g_cm3, "g/cm3"),
        ("purity (soluble mass fraction)", result.purity, "-"),
        ("dissolved load", result.dissolved_load_mmol_per_l, "mmol/L"),
        ("mineral flux", result.mineral_flux_t_per_km2_yr, "t km-2 yr-1"),
        ("denudation rate", result.denudation_mm_per_kyr, "mm/kyr"),
        ("CO2 drawdown", result.co2_drawdown_t_per_km2_yr, "t CO2 km-2 yr-1"),
    ]
    for name, value, unit in rows:
        table.add_row(name, f"{value:.4g}", unit)
    console = Console()
    console.print(table)
    if rock_type.mineral == "dolomite":
        console.print("Note: dolomite dissolves slowly; real waters are often undersaturated, so this bound is generous.")
    console.print(CAUTION)


def register(app: typer.Typer) -> None:
    app.command("site")(handle_user_errors(site))
