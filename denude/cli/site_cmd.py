"""`denude site`: the maximum denudation rate at one site."""

# annotations stay objects (no `from __future__ import annotations`): typer reads the aliases

import json
from pathlib import Path
from typing import Annotated, Optional

import typer

from denude.api import rock_table, site as site_record
from denude.cli.common import CAUTION, handle_user_errors
from denude.cli.options import AirPressure, Chemistry, Pco2Units
from denude.core.site import check_site_inputs
from denude.core.soil_co2 import pco2_atm_from_units, pco2_from_aet_atm
from denude.errors import InputError
from denude.registry import PCO2_FROM_AET


def parse_pco2_option(text: Optional[str], aet_mm_per_yr: Optional[float]) -> Optional[float]:
    """--pco2 as a number, or None for 'from-aet' (PCO2 then comes from --aet)."""
    if text is None:
        return None
    if text.strip().lower() == PCO2_FROM_AET:
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
    units = Pco2Units(units).value
    if units == "ppmv" and elevation_m is not None and air_pressure is not None:
        raise InputError("give either --elevation or --air-pressure for the ppmv conversion, not both")
    value = float(pco2_atm_from_units(pco2, units, elevation_m, air_pressure))
    return value, f"given in {units}"


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
    table = rock_table(None if rocks_csv is None else str(rocks_csv))
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
    air_pressure: AirPressure = None,
    aet: Annotated[Optional[float], typer.Option(help="Actual evapotranspiration [mm/yr]: PCO2 by Brook et al. (1983) if --pco2 is absent; runoff = P - AET with --precipitation.")] = None,
    precipitation: Annotated[Optional[float], typer.Option(help="Precipitation [mm/yr] (with --aet, instead of --runoff).")] = None,
    soluble_fraction: Annotated[float, typer.Option(min=0.0, max=1.0, help="Share of the site's area that is soluble rock [0-1].")] = 1.0,
    rocks: Annotated[Optional[Path], typer.Option(help="Rock table CSV (code,name,mineral,density_g_cm3,purity).", exists=True, dir_okay=False)] = None,
    as_json: Annotated[bool, typer.Option("--json", help="Print one JSON object.")] = False,
):
    """Maximum chemical denudation rate at one site (screening estimate)."""
    rock_type = resolve_rock(rock, rocks)
    pco2 = parse_pco2_option(pco2, aet)
    pco2_atm, pco2_note = resolve_pco2_atm(pco2, pco2_units, elevation, air_pressure, aet)
    hint = " (a value above 1 looks like ppmv: add --pco2-units ppmv)" if pco2_units == Pco2Units.atm and pco2_atm > 1 else ""
    check_site_inputs(temperature, pco2_atm, temperature_name="--temperature", pco2_name=f"--pco2 {pco2}", pco2_hint=hint)
    runoff_mm = resolve_runoff_mm_per_yr(runoff, precipitation, aet)
    record = site_record(temperature, pco2_atm, runoff_mm, rock=rock_type, chemistry=chemistry.value,
                         soluble_fraction=soluble_fraction)
    record["pco2_source"] = pco2_note
    if as_json:
        typer.echo(json.dumps(record, indent=2))
        return
    # rich only here: every other command imports this module to register it, and pays nothing
    from rich.console import Console
    from rich.markup import escape
    from rich.table import Table

    table = Table(title=f"Maximum denudation at one site ({rock_type.name}, {chemistry.value} chemistry)")
    table.add_column("quantity")
    table.add_column("value", justify="right")
    table.add_column("unit")
    rows = [
        ("temperature", "temperature_c", "degrees C"),
        ("soil PCO2", "pco2_atm", f"atm ({pco2_note})"),
        ("runoff", "runoff_mm_per_yr", "mm/yr"),
        ("rock density", "density_g_cm3", "g/cm3"),
        ("purity (soluble mass fraction)", "purity", "-"),
        ("dissolved load", "dissolved_load_mmol_per_l", "mmol/L"),
        ("mineral flux", "mineral_flux_t_per_km2_yr", "t km-2 yr-1"),
        ("denudation rate", "denudation_mm_per_kyr", "mm/kyr"),
        ("CO2 drawdown", "co2_drawdown_t_per_km2_yr", "t CO2 km-2 yr-1"),
    ]
    for name, key, unit in rows:
        value = record[key]
        table.add_row(name, "n/a" if value is None else f"{value:.4g}", escape(unit))
    console = Console()
    console.print(table)
    if rock_type.mineral == "dolomite":
        console.print("Note: dolomite dissolves slowly; real waters are often undersaturated, so this bound is generous.")
    console.print(CAUTION)


def register(app: typer.Typer) -> None:
    app.command("site")(handle_user_errors(site))
