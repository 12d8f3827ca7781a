"""The unit a raster declares (GDAL band unit, or a ``units``/``unit`` tag of the band or the
dataset) and the one rule choosing the unit of an input: an explicit option beats the
metadata (with a warning when they differ), the metadata beats the run's default unit.
"""

from __future__ import annotations

from dataclasses import dataclass

from denude.core.units import Unit, default_unit, require_unit
from denude.errors import InputError

#: Tag names read for a declared unit, band first, then dataset.
UNIT_TAGS = ("units", "unit")


def declared_units(ds) -> list[tuple[str, str]]:
    """Non-empty unit declarations of band 1 of an open dataset, as (text, where) pairs:
    the GDAL band unit, then ``units``/``unit`` tags of the band, then of the dataset."""
    found = []
    try:
        band_unit = (ds.units or ("",))[0]
    except Exception:          # pragma: no cover - drivers without unit support
        band_unit = ""
    if band_unit and band_unit.strip():
        found.append((band_unit.strip(), "band unit"))
    for scope, tags in (("band tag", ds.tags(1)), ("dataset tag", ds.tags())):
        for name in UNIT_TAGS:
            value = tags.get(name)
            if value and value.strip():
                found.append((value.strip(), f"{scope} {name!r}"))
    return found


@dataclass(frozen=True)
class UnitChoice:
    """The unit an input is read in, and where that came from."""

    role: str
    unit: Unit
    source: str                   # "option", "metadata" or "default"
    declared: str | None = None   # the metadata's text, when there was one


def metadata_unit(role: str, ds, path) -> tuple[Unit, str] | None:
    """(unit, declared text) the raster ``ds`` declares for ``role``, or None. An unknown unit,
    a unit of another quantity, or two declarations that disagree are one-line errors."""
    declarations = declared_units(ds)
    if not declarations:
        return None
    units = [(require_unit(role, text, f"{role} raster {path} ({where})"), text) for text, where in declarations]
    first, text = units[0]
    for other, other_text in units[1:]:
        if other.name != first.name:
            raise InputError(
                f"{role} raster {path} declares two units, {text!r} and {other_text!r}; "
                "set one unit in its metadata (or give the unit option)")
    return first, text


def choose_unit(role: str, option: str | None, ds=None, path=None) -> tuple[UnitChoice, str | None]:
    """The unit of one input and a warning text (or None). ``option``: the unit given on the
    command line or in the job file (None = not given); ``ds``: the open raster (None for a
    constant). The option wins over the metadata; a disagreement is warned about."""
    declared = metadata_unit(role, ds, path) if ds is not None else None
    if option is not None:
        unit = require_unit(role, option, f"--{role.replace('_', '-')}-units")
        warning = None
        if declared is not None and declared[0].name != unit.name:
            warning = (f"{role} raster {path} declares unit {declared[1]!r} but {role} units {unit.name} were "
                       f"given: the option wins, the values are read as {unit.name}")
        return UnitChoice(role, unit, "option", declared[1] if declared else None), warning
    if declared is not None:
        return UnitChoice(role, declared[0], "metadata", declared[1]), None
    return UnitChoice(role, default_unit(role), "default"), None

def settings_unit(settings, role: str) -> tuple[Unit, str]:
    """(unit, source) an input of a job is read in: as resolved by validation
    (``settings.input_units``), else the unit option, else the run's default unit."""
    for entry in settings.input_units:
        if entry[0] == role:
            return require_unit(role, entry[1], "resolved unit"), entry[2]
    option = getattr(settings, f"{role}_units", None)
    if option is not None:
        return require_unit(role, option, f"--{role.replace('_', '-')}-units"), "option"
    return default_unit(role), "default"
