"""`denude report`: one self-contained HTML page a planner can read and hand on.

The page is rendered from the jinja2 template ``templates/report.html.j2``. Every image is
inline (base64 PNG) and the page makes no request to any network address, so it opens
offline; the same figures are written as PNG files into ``<stem>_figures/`` beside it.

Sections, in the order a planner reads: headline with the caution; maps; tables; how it was
made; and, when present, the sections of other outputs found in or beside the map folder
(``report_sections``: uncertainty bands, scenarios, calibration, the sinkhole record, covered
karst; an absent output adds nothing).

Numbers in the tables are the summary GeoPackage's own values: each numeric cell carries the
full value in ``data-value`` and shows it rounded to ``SIGNIFICANT`` digits.
"""

from __future__ import annotations

import base64
import datetime as _dt
import math
import shutil
import subprocess
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from denude import __version__
from denude.cautions import CAUTION, UPPER_BOUND_NOTE
from denude.errors import InputError, OutputError
from denude.reports import figures as F
from denude.reports.provenance import read_run_record
from denude.reports.report_tables import SIGNIFICANT, Cell, Table, fmt, num  # noqa: F401 (re-exported)

#: Rows shown in each ranked table.
TOP_ROWS = 15
#: Rasters up to this many cells are read whole for the per-rock statistics; larger ones
#: from a decimated sample (said so on the page).
FULL_READ_CELLS = 4_000_000

HAZARD_NOTE = ("Hazard classes are a convention of this tool for ranking ground, not a measure of collapse "
               "probability. Do not use them alone to permit or refuse building.")

CHROMIUM_NAMES = ("chromium", "chromium-browser", "google-chrome", "google-chrome-stable")


@dataclass
class ReportResult:
    html: Path
    figures_dir: Path
    figures: list
    pdf: Path | None
    pdf_note: str | None


def _region(run: dict) -> str:
    """The region's name: the ``region`` tag of the lithology input, else the map folder's name."""
    lithology = run.get("inputs", {}).get("lithology", {}).get("path")
    if lithology:
        try:
            import rasterio

            with rasterio.open(lithology) as ds:
                region = ds.tags().get("region")
            if region:
                return region
        except Exception:  # the input moved or is remote: fall back to the folder name
            pass
    return Path(run.get("settings", {}).get("out", "the mapped area")).name


def _hazard_scheme(mapdir: Path):
    import rasterio

    from denude.io.styles import map_class_scheme

    scheme = map_class_scheme(mapdir)
    breaks, names = scheme if scheme else ((), ())
    with rasterio.open(mapdir / "hazard_class.tif") as ds:
        try:
            table = ds.colormap(1)
        except ValueError:
            table = {}
    from denude.io.layer_meta import hazard_colours

    colours = [table.get(k, hazard_colours(k + 1)[k]) for k in range(len(names))]
    return list(breaks), list(names), colours


def _summary_layers(summary: Path | None, crs):
    """(zones, planning units, sinkholes) of a summary GeoPackage in ``crs`` (None where absent)."""
    if summary is None:
        return None, None, None
    import geopandas
    import pyogrio

    if not summary.is_file():
        raise InputError(f"{summary}: summary GeoPackage not found; give the file written by 'denude summarize'")
    layers = [name for name, _ in pyogrio.list_layers(summary)]
    out = []
    for wanted in ("zones", "planning_units", "sinkholes"):
        if wanted == "zones":
            name = next((n for n in layers if n not in ("planning_units", "sinkholes", "layer_styles")), None)
        else:
            name = wanted if wanted in layers else None
        frame = geopandas.read_file(summary, layer=name, engine="pyogrio") if name else None
        out.append(None if frame is None else frame.to_crs(crs))
    return tuple(out)


def user_columns(frame) -> list[str]:
    """The user's own attribute columns of a summary layer (between the id and ``area_km2``)."""
    columns = list(frame.columns)
    if "area_km2" not in columns:
        return []
    return [c for c in columns[1:columns.index("area_km2")] if c != frame.geometry.name]


def _text_columns(frame, most: int = 2) -> list[str]:
    """Up to ``most`` of the user's text attributes (a watershed's name, a unit's land use)."""
    from pandas.api.types import is_numeric_dtype

    return [c for c in user_columns(frame) if not is_numeric_dtype(frame[c])][:most]


def top_two_share(frame, names) -> np.ndarray:
    """Share (0-1) of each unit in the two highest hazard classes."""
    from denude.core.zonal import column_label

    total = np.zeros(len(frame))
    for name in names[-2:]:
        column = f"hazard_share_{column_label(name)}"
        if column in frame:
            total = total + frame[column].fillna(0.0).to_numpy(dtype=np.float64)
    return total


def zone_tables(zones, names) -> list[Table]:
    """Watersheds ranked by rock volume removed and by CO2 drawdown."""
    ident = zones.columns[0]
    extra = _text_columns(zones)
    tables = []
    for key, column, title, heading in (
        ("zones_by_volume", "rock_volume_m3_per_yr", "Watersheds ranked by rock volume removed", "rock volume [m3/yr]"),
        ("zones_by_co2", "co2_drawdown_t_per_yr", "Watersheds ranked by CO2 drawdown", "CO2 drawdown [t/yr]"),
    ):
        ranked = zones.sort_values(column, ascending=False, kind="stable").head(TOP_ROWS)
        header = [ident, *extra, "area [km2]", "mean rate [mm/kyr]", heading, "dominant class", "highest class"]
        rows = []
        for _, row in ranked.iterrows():
            rows.append([Cell(str(row[ident])), *[Cell(str(row[c])) for c in extra], num(row["area_km2"]),
                         num(row["denudation_mean_mm_per_kyr"]), num(row[column]),
                         Cell(str(row.get("hazard_dominant_name", "") or "-")),
                         Cell(str(row.get("hazard_highest_name", "") or "-"))])
        tables.append(Table(key, title, f"Column ranked: {column}. Rock volume: rate x area (1 mm/kyr over 1 km2 = 1 m3/yr).",
                            header, rows))
    return tables


def unit_table(units, names) -> Table:
    """Planning units ranked by their share of the two highest hazard classes."""
    ident = units.columns[0]
    extra = _text_columns(units)
    share = top_two_share(units, names)
    order = np.argsort(-share, kind="stable")[:TOP_ROWS]
    top = " + ".join(names[-2:])
    rows = []
    for i in order:
        row = units.iloc[i]
        rows.append([Cell(str(row[ident])), *[Cell(str(row[c])) for c in extra], num(row["area_km2"]),
                     num(share[i], percent=True), num(row["denudation_mean_mm_per_kyr"]),
                     Cell(str(row.get("hazard_dominant_name", "") or "-")),
                     Cell(str(row.get("hazard_highest_name", "") or "-"))])
    return Table("units_by_share", "Planning units ranked by share of the two highest classes",
                 f"Share of the unit's area in the classes {top} (sum of the hazard_share columns).",
                 [ident, *extra, "area [km2]", f"share {top}", "mean rate [mm/kyr]", "dominant class",
                  "highest class"], rows)


def rock_statistics(mapdir: Path, rocks) -> tuple[Table, dict, str]:
    """Per rock type: cells, share of the map, mean and percentiles of the rate [mm/kyr]
    (every cell counts equally); and the rates per rock for the histogram."""
    import rasterio
    from rasterio.enums import Resampling

    with rasterio.open(mapdir / "denudation_mm_per_kyr.tif") as rate_ds, \
            rasterio.open(mapdir / "lithology_code.tif") as lith_ds:
        cells = rate_ds.width * rate_ds.height
        if cells <= FULL_READ_CELLS:
            rate, lith, note = rate_ds.read(1), lith_ds.read(1), "every cell of the map"
        else:
            step = math.ceil(math.sqrt(cells / FULL_READ_CELLS))
            shape = (rate_ds.height // step, rate_ds.width // step)
            rate = rate_ds.read(1, out_shape=shape, resampling=Resampling.nearest)
            lith = lith_ds.read(1, out_shape=shape, resampling=Resampling.nearest)
            note = f"a regular sample of one cell in {step * step} (the map has {cells:,} cells)"
    valid = np.isfinite(rate)
    total = int(valid.sum())
    rows, by_rock = [], {}
    for rock in rocks:
        values = rate[valid & (lith == rock.code)].astype(np.float64)
        if values.size == 0:
            continue
        if rock.mineral != "insoluble":
            by_rock[rock.name] = values
        p10, p50, p90 = np.percentile(values, [10, 50, 90])
        rows.append([Cell(rock.name), Cell(rock.mineral), num(values.size, 6), num(values.size / max(total, 1), percent=True),
                     num(values.mean()), num(p10), num(p50), num(p90), num(values.max())])
    table = Table("rocks", "Rates per rock type", f"Statistics over {note}; each cell counts equally.",
                  ["rock", "mineral", "cells", "share of map", "mean [mm/kyr]", "p10 [mm/kyr]", "median [mm/kyr]",
                   "p90 [mm/kyr]", "max [mm/kyr]"], rows)
    return table, by_rock, note


def provenance(run: dict, mapdir: Path) -> dict:
    """How the map was made: inputs with checksums, grid, chemistry, rock table, settings."""
    import csv

    inputs = []
    for role, item in run.get("inputs", {}).items():
        if isinstance(item, dict):
            inputs.append({"role": role, "path": item.get("path", item.get("value", "")),
                           "value": item.get("value"), "sha256": item.get("sha256") or "-",
                           "unit": item.get("unit", ""), "resampling": item.get("resampling", "")})
    rocks = []
    if (mapdir / "rocks.csv").is_file():
        with open(mapdir / "rocks.csv", newline="", encoding="utf-8") as handle:
            rocks = list(csv.DictReader(handle))
    settings = {k: v for k, v in run.get("settings", {}).items() if v is not None}
    return {"inputs": inputs, "grid": run.get("grid", {}), "rocks": rocks, "settings": settings,
            "chemistry": settings.get("chemistry", ""), "version": run.get("version", ""),
            "counts": run.get("counts", {})}


def _figures_dir(out_html: Path) -> Path:
    return out_html.with_name(out_html.stem + "_figures")


def _check_map_folder(mapdir: Path, out_html: Path) -> None:
    if out_html.suffix.lower() not in (".html", ".htm"):
        raise InputError(f"{out_html}: the report is an HTML file; give a name ending in .html")
    for name in ("denudation_mm_per_kyr.tif", "hazard_class.tif", "lithology_code.tif", "rocks.csv"):
        if not (mapdir / name).is_file():
            raise InputError(f"{mapdir}: missing {name}; give the output folder of 'denude map' (with all layers)")


def summary_figures(zones, units, names, breaks, colours, extent, crs) -> tuple[list, list]:
    """(figures, tables) of the watersheds and planning units of a summary (none without one)."""
    from denude.io.styles import TOP_SHARE_BREAKS, TOP_SHARE_COLOURS, hex_colour

    figs, tables = [], []
    if zones is not None:
        figs.append(F.choropleth(zones, "denudation_mean_mm_per_kyr", "Watersheds: mean denudation rate",
                                 "mean rate, classes as on the hazard map", extent, crs, "zones_mean_rate",
                                 "Area-weighted mean maximum denudation rate of each watershed, in the hazard classes' colours.",
                                 breaks=breaks, colours=[hex_colour(c) for c in colours],
                                 labels=F.class_legend_labels(names, breaks)))
        figs.append(F.choropleth(zones, "rock_volume_m3_per_yr", "Watersheds: rock volume removed",
                                 "rock volume removed [m3/yr]", extent, crs, "zones_rock_volume",
                                 "Rock dissolved away per year in each watershed (rate x area).", cmap="viridis"))
        tables += zone_tables(zones, names)
    if units is not None:
        share = top_two_share(units, names)
        share_labels = F.class_legend_labels(["", "", "", "", ""], [100 * v for v in TOP_SHARE_BREAKS], "%")
        share_labels = [s.strip().strip("()") for s in share_labels]
        figs.append(F.choropleth(units.assign(top_two_share=share), "top_two_share",
                                 "Planning units: share of the two highest classes",
                                 "share of area in\n" + " + ".join(names[-2:]), extent, crs, "units_top_share",
                                 f"Share of each planning unit's area in the classes {' and '.join(names[-2:])}"
                                 + ("; watershed outlines in grey." if zones is not None else "."),
                                 breaks=TOP_SHARE_BREAKS, colours=list(TOP_SHARE_COLOURS), labels=share_labels,
                                 context=zones, zoom=True))
        tables.append(unit_table(units, names))
    return figs, tables


def _figure_dict(fig) -> dict:
    return {"name": fig.name, "title": fig.title, "caption": fig.caption, "width": fig.width, "height": fig.height,
            "data": base64.b64encode(fig.png).decode("ascii")}


def _write_figures(folder: Path, figs) -> None:
    try:
        folder.mkdir(parents=True, exist_ok=True)
        for fig in figs:
            (folder / f"{fig.name}.png").write_bytes(fig.png)
    except OSError as exc:
        raise OutputError(f"{folder}: cannot write the figures ({exc.strerror or exc}); choose a writable folder") from None


def build_report(mapdir, out_html, summary=None, title: str | None = None, pdf: bool = False) -> ReportResult:
    """Write the report of a map folder (and its summary GeoPackage) to ``out_html``, the
    figures as PNG files beside it, and with ``pdf`` a PDF of the page (headless Chromium)."""
    import jinja2
    import rasterio

    from denude.io.rock_csv import read_rock_table
    from denude.io.styles import hex_colour
    from denude.reports.report_sections import output_sections

    mapdir, out_html = Path(mapdir), Path(out_html)
    _check_map_folder(mapdir, out_html)
    run = read_run_record(mapdir)
    summary = Path(summary) if summary is not None else None
    breaks, names, colours = _hazard_scheme(mapdir)
    with rasterio.open(mapdir / "denudation_mm_per_kyr.tif") as ds:
        crs, b = ds.crs, ds.bounds
    zones, units, points = _summary_layers(summary, crs)

    figs = [F.rate_map(mapdir / "denudation_mm_per_kyr.tif"),
            F.hazard_map(mapdir / "hazard_class.tif", names, breaks, colours, points)]
    more_figs, tables = summary_figures(zones, units, names, breaks, colours, (b.left, b.right, b.bottom, b.top), crs)
    figs += more_figs
    rock_table, by_rock, _ = rock_statistics(mapdir, read_rock_table(mapdir / "rocks.csv"))
    tables.append(rock_table)
    histogram = F.rock_histogram(by_rock)
    sections = output_sections(mapdir, summary, zones)
    section_figs = [f for s in sections for f in s.figures]
    folder = _figures_dir(out_html)
    _write_figures(folder, [*figs, histogram, *section_figs])

    env = jinja2.Environment(loader=jinja2.PackageLoader("denude.reports", "templates"),
                             autoescape=jinja2.select_autoescape(["html", "j2"]))
    made = _dt.datetime.fromtimestamp((mapdir / "run.json").stat().st_mtime).date().isoformat()
    labels = F.class_legend_labels(names, breaks)
    page = env.get_template("report.html.j2").render(
        region=title or _region(run), date=_dt.date.today().isoformat(), map_date=made, caution=CAUTION,
        upper_bound_note=UPPER_BOUND_NOTE, hazard_note=HAZARD_NOTE, version=__version__,
        maps=[_figure_dict(f) for f in figs], histogram=_figure_dict(histogram),
        tables=tables, made=provenance(run, mapdir), summary=str(summary) if summary else None,
        classes=[{"label": l, "colour": hex_colour(c)} for l, c in zip(labels, colours)],
        sections=[{"section": s, "figures": [_figure_dict(f) for f in s.figures]} for s in sections],
        figures_dir=folder.name, highest_rule=_highest_rule(summary),
    )
    try:
        out_html.write_text(page, encoding="utf-8")
    except OSError as exc:
        raise OutputError(f"{out_html}: cannot write ({exc.strerror or exc}); choose a writable folder") from None
    pdf_path, note = print_pdf(out_html) if pdf else (None, None)
    names_written = [f.name for f in (*figs, histogram, *section_figs)]
    return ReportResult(out_html, folder, names_written, pdf_path, note)


def _highest_rule(summary: Path | None) -> str:
    import json

    share = 0.01
    if summary is not None:
        sidecar = summary.with_name(summary.stem + ".summary.json")
        try:
            share = float(json.loads(sidecar.read_text())["method"].get("highest_class_min_share", share))
        except (OSError, ValueError, KeyError, TypeError):
            pass
    return f"the highest class covering at least {100 * share:g} % of the area"


def find_chromium() -> str | None:
    """Path of a Chromium (or Chrome) executable on PATH, or None."""
    for name in CHROMIUM_NAMES:
        found = shutil.which(name)
        if found:
            return found
    return None


def chromium_flags() -> list[str]:
    """Flags for a headless Chromium that never reaches the network (and runs as root in CI)."""
    return ["--headless", "--no-sandbox", "--disable-gpu", "--disable-dev-shm-usage", "--no-first-run",
            "--disable-background-networking", "--disable-component-update", "--disable-sync",
            "--proxy-server=127.0.0.1:9", "--proxy-bypass-list=<-loopback>"]


def print_pdf(html: Path, timeout_s: float = 120.0) -> tuple[Path | None, str | None]:
    """A PDF of the page beside it via ``chromium --headless --print-to-pdf``; (None, reason)
    when no Chromium is installed or printing fails."""
    browser = find_chromium()
    if browser is None:
        return None, "no Chromium found on PATH: PDF not written (install the 'chromium' package, or print the HTML page)"
    target = html.with_suffix(".pdf")
    command = [browser, *chromium_flags(), "--no-pdf-header-footer", f"--print-to-pdf={target}",
               html.resolve().as_uri()]
    try:
        subprocess.run(command, check=True, capture_output=True, timeout=timeout_s)
    except (subprocess.CalledProcessError, subprocess.TimeoutExpired, OSError) as exc:
        return None, f"Chromium could not print the PDF ({type(exc).__name__}); the HTML page is written"
    if not target.is_file() or target.stat().st_size == 0:
        return None, "Chromium wrote no PDF; the HTML page is written"
    return target, None
