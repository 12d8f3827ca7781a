"""What each output layer says about itself: its sources, GDAL unit, category names and,
for the lithology, its smallest integer type and colours.

``output_spec`` of the raster job calls ``layer_extras`` once per layer; nothing here reads
more than the rock table and the colour table of the lithology input.
"""

from __future__ import annotations

from denude.core.cover import COVER_CLASS_NAMES
from denude.core.hazard import DEFAULT_COLOURS
from denude.io.styles import category_list, input_colour_table, lithology_colours, smallest_code_type
from denude.registry import INT32_NODATA, OUTPUT_LAYERS

WHITE = "White (1984) maximum denudation"
PLUMMER = "Plummer & Busenberg (1982) equilibrium constants"
SPECIATION = "PHREEQC phreeqc.dat ion-pair constants (speciated chemistry)"
BROOK = "Brook, Folkoff & Box (1983) soil CO2 from actual evapotranspiration"

#: Layers computed with the chemistry (the others are inputs carried onto the grid).
CHEMISTRY_LAYERS = ("denudation", "dissolved_load", "co2_drawdown", "hazard")


def layer_sources(layer: str, chemistry: str, pco2_from_aet: bool) -> str:
    """The ``sources`` tag of one layer: only the publications that layer used."""
    if layer == "lithology":
        return "the lithology input and the rock table of the run (rocks.csv)"
    if layer == "soluble_fraction":
        return "the soluble-area fraction input (1 where none was given) and the rock table (0 on insoluble rock)"
    if layer == "covered_karst":
        return ("the cover input (insoluble cover thickness, m, or a 0/1 mask), the soluble-area fraction and "
                "the rock table; a screening flag, not a site investigation")
    cited = [WHITE, PLUMMER]
    if chemistry == "speciated":
        cited.append(SPECIATION)
    if pco2_from_aet:
        cited.append(BROOK)
    return "; ".join(cited)


def layer_extras(layer: str, settings, rocks=None) -> dict:
    """Fields for the OutputSpec of ``layer`` beyond the registry: ``units``, ``sources``,
    ``categories``, and for the lithology ``dtype``, ``nodata``, ``source_nodata`` and
    ``colormap`` (the input's colour table where it has one)."""
    info = OUTPUT_LAYERS[layer]
    out = {
        "units": info.units,
        "sources": layer_sources(layer, settings.chemistry, settings.pco2 == "from-aet"),
    }
    if layer == "hazard":
        out["categories"] = tuple(settings.hazard_names)
    elif layer == "covered_karst":
        out["categories"] = COVER_CLASS_NAMES
    elif layer == "lithology" and rocks is not None:
        codes = [r.code for r in rocks]
        dtype, nodata = smallest_code_type(codes)
        out.update(dtype=dtype, nodata=float(nodata), source_nodata=float(INT32_NODATA),
                   categories=tuple(category_list({r.code: r.name for r in rocks})))
        if dtype in ("uint8", "uint16") and max(codes) < 256:
            source = input_colour_table(settings.lithology) if isinstance(settings.lithology, str) else None
            colours = lithology_colours(rocks, source)
            out["colormap"] = tuple(colours.get(k, (0, 0, 0, 0)) for k in range(max(codes) + 1))
    return out


def hazard_colours(n: int) -> tuple:
    """RGBA per hazard class (grey past the built-in ramp)."""
    return tuple(DEFAULT_COLOURS[i] if i < len(DEFAULT_COLOURS) else (128, 128, 128, 255) for i in range(n))


def write_map_styles(folder, settings, rocks, layers) -> list[str]:
    """SLD files for the rasters of a map folder (rate, hazard and lithology where written),
    plus the names of the category sidecars (``.aux.xml``) the writers left; returns the
    file names for the run record."""
    from pathlib import Path

    from denude.io.styles import aux_xml_path, write_raster_styles

    folder = Path(folder)
    colours = None
    if "lithology" in layers:
        source = input_colour_table(settings.lithology) if isinstance(settings.lithology, str) else None
        colours = lithology_colours(rocks, source)
    written = write_raster_styles(folder, settings.hazard_breaks_mm_per_kyr, settings.hazard_names, rocks,
                                  colours, layers=tuple(layers))
    for name in layers:
        aux = aux_xml_path(folder / OUTPUT_LAYERS[name].file)
        if aux.is_file():
            written.append(aux.name)
    return written
