"""Sections of the report for the outputs around a map: uncertainty bands, a scenario, the
calibration against water samples, the sinkhole record and covered karst.

Each ``*_section`` function returns a ``Section`` (plain-language text, a caution, figures and
tables) or None when its output is absent, so an absent output adds nothing to the page. Outputs
are looked for in the map folder and beside it (``FOLDERS``). Table numbers are the source
files' own values: a CSV field is parsed with ``float`` (the exact value written) and a JSON
number is used as read.
"""

from __future__ import annotations

import csv
import json
from dataclasses import dataclass, field
from pathlib import Path

from denude.reports import figures as F
from denude.reports.report_tables import Cell, Table, count, num, number

#: Rows of a section's table shown on the page.
SECTION_ROWS = 40
#: Columns of a zone CSV that are text but not a zone's label.
NOT_LABELS = ("cell_area_method", "ratio_rule", "dominant_soluble_rock")
#: Scenario settings in words: (run.json key, text with the value, the value that means no change).
SCENARIO_WORDS = (
    ("temperature_delta_c", "temperature {:+g} \u00b0C", 0.0),
    ("precipitation_factor", "precipitation x {:g}", 1.0),
    ("aet_factor", "actual evapotranspiration x {:g}", 1.0),
    ("runoff_factor", "runoff x {:g}", 1.0),
    ("pco2_factor", "soil PCO2 x {:g}", 1.0),
)


@dataclass
class Section:
    key: str
    title: str
    intro: list                      # plain-language paragraphs
    caution: str = ""
    figures: list = field(default_factory=list)
    tables: list = field(default_factory=list)
    sources: list = field(default_factory=list)   # files the section was read from
    warning: str = ""                # shown in a red frame above the section's figures


# ------------------------------------------------------------------------------ finding files
def _subfolders(base: Path) -> list[Path]:
    try:
        return sorted(p for p in base.iterdir() if p.is_dir())
    except OSError:
        return []


def _grid_key(record: dict):
    grid = record.get("grid") or {}
    return (grid.get("epsg"), tuple(grid.get("transform") or ()), grid.get("width"), grid.get("height"))


def belongs(folder: Path, mapdir: Path) -> bool:
    """Whether an output folder beside the map folder was made from (or on the grid of) this map:
    its run.json names the map as the baseline, its calibration sidecar names the map, or its
    run.json has the map's grid."""
    target = mapdir.resolve()
    record = read_json(folder / "run.json")
    named = [record.get("base_folder"), read_json(folder / "calibration.summary.json").get("map_folder")]
    if any(n and Path(n).resolve() == target for n in named):
        return True
    mine = _grid_key(read_json(mapdir / "run.json"))
    return bool(record) and mine[3] is not None and _grid_key(record) == mine


def folders(mapdir: Path) -> list[Path]:
    """Where other outputs are looked for: the map folder and its sub-folders; then folders beside
    it (the parent and its sub-folders) that belong to this map (``belongs``)."""
    out = [mapdir, *_subfolders(mapdir)]
    seen = {f.resolve() for f in out}
    for folder in [mapdir.parent, *_subfolders(mapdir.parent)]:
        if folder.resolve() not in seen and belongs(folder, mapdir):
            out.append(folder)
            seen.add(folder.resolve())
    return out


def find_folder(mapdir: Path, *names: str) -> Path | None:
    """The first folder in or beside the map folder that holds every file of ``names``."""
    for folder in folders(mapdir):
        if all((folder / n).is_file() for n in names):
            return folder
    return None


def read_csv(path: Path) -> tuple[list[str], list[dict]]:
    with open(path, newline="", encoding="utf-8") as handle:
        reader = csv.DictReader(handle)
        return list(reader.fieldnames or []), list(reader)


def read_json(path: Path) -> dict:
    try:
        return json.loads(path.read_text(encoding="utf-8"))
    except (OSError, ValueError):
        return {}


def zone_label_columns(header: list[str], rows: list[dict], most: int = 1) -> list[str]:
    """The zone id (first column) and up to ``most`` text columns naming the zone."""
    labels = [c for c in header[1:] if c not in NOT_LABELS and rows
              and all(number(r.get(c)) is None for r in rows) and any(r.get(c) for r in rows)]
    return header[:1] + labels[:most]


def csv_table(key: str, title: str, note: str, header: list[str], rows: list[dict], columns) -> Table:
    """A table of a zone CSV: the id and label columns as text, then ``columns`` as
    (CSV column, heading, percent) numbers or a callable row -> Cell with its heading."""
    labels = zone_label_columns(header, rows)
    heads, body = list(labels), []
    for column in columns:
        heads.append(column[1])
    for row in rows[:SECTION_ROWS]:
        cells = [Cell(str(row.get(c, ""))) for c in labels]
        for column in columns:
            source, _, percent = column
            if callable(source):
                cells.append(source(row))
            elif percent == "count":
                cells.append(count(number(row.get(source))))
            else:
                cells.append(num(number(row.get(source)), percent=bool(percent)))
        body.append(cells)
    more = len(rows) - SECTION_ROWS
    return Table(key, title, note + (f" {more} more rows in the file." if more > 0 else ""), heads, body)


# ------------------------------------------------------------------------------ uncertainty
def uncertainty_driver(row: dict) -> Cell:
    """The input with the largest ``variance_share_*`` of the zone, with its share."""
    shares = {k[len("variance_share_"):]: number(v) for k, v in row.items()
              if k.startswith("variance_share_") and k != "variance_share_sum" and number(v) is not None}
    if not shares:
        return Cell("-")
    name = max(shares, key=shares.get)
    return Cell(f"{name.replace('_', ' ')} ({100 * shares[name]:.0f} %)")


def perturbed_inputs(record: dict) -> str:
    """The input errors a band run drew, in words (from its run.json ``uncertainty``)."""
    spec = record.get("uncertainty") or {}
    words = []
    for key, text in (("runoff_sigma_ln", "runoff (sigma {:g} in ln)"), ("pco2_sigma_log10", "soil PCO2 (sigma {:g} in log10)"),
                      ("temperature_sigma_c", "temperature (sigma {:g} \u00b0C)"),
                      ("soil_co2_intercept_sigma_log10", "soil-CO2 intercept (sigma {:g} in log10)"),
                      ("soil_co2_amplitude_sigma_log10", "soil-CO2 amplitude (sigma {:g} in log10)"),
                      ("soil_co2_rate_sigma_ln", "soil-CO2 rate with AET (sigma {:g} in ln)")):
        if spec.get(key):
            words.append(text.format(spec[key]))
    for rock, ranges in (spec.get("saturation_ratio") or {}).items():
        words.append(f"saturation ratio of {rock} ({ranges[0]:g}-{ranges[1]:g})")
    for rock, items in (spec.get("rocks") or {}).items():
        for key, ranges in items.items():
            words.append(f"{key.replace('_g_cm3', '').replace('_', ' ')} of {rock} ({ranges[0]:g}-{ranges[1]:g})")
    return "; ".join(words) or "none recorded"


def uncertainty_section(mapdir: Path) -> Section | None:
    suffix, folder = ".tif", find_folder(mapdir, "denudation_p05_mm_per_kyr.tif", "denudation_p95_mm_per_kyr.tif")
    if folder is None:      # a tiled run kept as VRTs over its tiles (--no-merge)
        suffix, folder = ".vrt", find_folder(mapdir, "denudation_p05_mm_per_kyr.vrt", "denudation_p95_mm_per_kyr.vrt")
    if folder is None:
        return None
    record = read_json(folder / "run.json")
    draws = record.get("draws")
    p05, p95 = folder / f"denudation_p05_mm_per_kyr{suffix}", folder / f"denudation_p95_mm_per_kyr{suffix}"
    figures = [F.band_map(p05, p95,
                          "Uncertainty: width of the rate band", "p95 - p05 of the maximum rate [mm/kyr]",
                          "uncertainty_band", "Width of the 90 % band of each cell's maximum rate (p95 minus p05 "
                          "over the draws): dark where the inputs' errors move the rate most; the colour scale stops at the 98th percentile.")]
    tables, sources = [], [p05]
    if (folder / "zones_uncertainty.csv").is_file():
        header, rows = read_csv(folder / "zones_uncertainty.csv")
        sources.append(folder / "zones_uncertainty.csv")
        tables.append(csv_table("uncertainty_zones", "Watersheds: band of the mean rate and of rock volume",
                                "p05/p50/p95: 5th, 50th and 95th percentile over the draws. Largest source: the input "
                                "with the largest variance share of the zone's mean rate.", header, rows, [
            ("denudation_mean_mm_per_kyr_p05", "mean rate p05 [mm/kyr]", False),
            ("denudation_mean_mm_per_kyr_p50", "mean rate p50 [mm/kyr]", False),
            ("denudation_mean_mm_per_kyr_p95", "mean rate p95 [mm/kyr]", False),
            ("rock_volume_m3_per_yr_p05", "rock volume p05 [m3/yr]", False),
            ("rock_volume_m3_per_yr_p50", "rock volume p50 [m3/yr]", False),
            ("rock_volume_m3_per_yr_p95", "rock volume p95 [m3/yr]", False),
            (uncertainty_driver, "largest source of spread", False)]))
    intro = [f"The inputs are themselves uncertain. The map was recomputed {draws or 'many'} times with the inputs "
             "varied within their stated errors; the band from p05 to p95 holds 90 % of those results. A wide band "
             "means the rate there depends strongly on inputs that are not well known.",
             f"Input errors drawn: {perturbed_inputs(record)}."]
    caution = ("The bands cover only the input errors listed above. They do not cover the model itself (water "
               "saturated at the soil PCO2), the speed of dissolution, errors in the rock map or the choice of "
               "distributions; p95 is not a worst case. Every draw is still a maximum rate unless a saturation "
               "ratio is drawn.")
    return Section("uncertainty", "How sure: uncertainty bands", intro, caution, figures, tables, sources)


# ------------------------------------------------------------------------------ scenario
def scenario_words(scenario: dict | None) -> str:
    """'temperature +2 °C, runoff x 0.9' (or 'no change' when every setting is neutral)."""
    words = [text.format(float(scenario[key])) for key, text, neutral in SCENARIO_WORDS
             if scenario and scenario.get(key) is not None and float(scenario[key]) != neutral]
    return ", ".join(words) or "no change"


def _scenario_settings(folder: Path, record: dict) -> tuple[dict | None, dict | None]:
    """(base, scenario) settings of a comparison: its run.json, else the compared folders' run.json."""
    base, scenario = record.get("base_scenario"), record.get("scenario_scenario")
    if scenario is None and record.get("scenario_folder"):
        scenario = read_json(Path(record["scenario_folder"]) / "run.json").get("settings", {}).get("scenario")
    return base, scenario


def scenario_sections(mapdir: Path) -> list[Section]:
    out = []
    for folder in folders(mapdir):
        if not ((folder / "denudation_difference_mm_per_kyr.tif").is_file() and (folder / "zones_change.csv").is_file()):
            continue
        record = read_json(folder / "run.json")
        base, scenario = _scenario_settings(folder, record)
        words = scenario_words(scenario)
        key = "scenario" + (f"_{len(out) + 1}" if out else "")
        figures = [F.difference_map(folder / "denudation_difference_mm_per_kyr.tif", f"What if: {words}",
                                    "scenario - baseline [mm/kyr]", f"{key}_difference",
                                    "Change of the maximum rate, scenario minus baseline: blue where it falls, red "
                                    "where it rises, white where it stays the same.")]
        header, rows = read_csv(folder / "zones_change.csv")
        table = csv_table(f"{key}_zones", "Watersheds: change of the mean rate and of rock volume",
                          "Change: scenario minus baseline; ratio: scenario / baseline.", header, rows, [
            ("base_denudation_mean_mm_per_kyr", "baseline mean rate [mm/kyr]", False),
            ("scenario_denudation_mean_mm_per_kyr", "scenario mean rate [mm/kyr]", False),
            ("change_denudation_mean_mm_per_kyr", "change [mm/kyr]", False),
            ("ratio_denudation_mean_mm_per_kyr", "ratio", False),
            ("change_rock_volume_m3_per_yr", "change of rock volume [m3/yr]", False),
            ("change_co2_drawdown_t_per_yr", "change of CO2 drawdown [t/yr]", False)])
        intro = [f"The scenario changes the inputs before any rate is computed: {words}"
                 + (f" (the baseline itself: {scenario_words(base)})" if base else "") + ".",
                 "Warming works both ways: warmer water holds less dissolved limestone and dolomite at the same soil "
                 "CO2, while less runoff carries less away; the map shows the net effect of the changes stated."]
        caution = ("A scenario is a what-if of the stated input changes only, not a forecast: soils, vegetation and "
                   "soil CO2 that respond to a changed climate are not modelled unless the scenario says so.")
        out.append(Section(key, f"What if: {words}", intro, caution, figures, [table],
                           [folder / "zones_change.csv", folder / "run.json"]))
    return out


# ------------------------------------------------------------------------------ calibration
def _or_nan(text) -> float:
    value = number(text)
    return float("nan") if value is None else value


def calibration_section(mapdir: Path) -> Section | None:
    folder = find_folder(mapdir, "calibration.csv")
    if folder is None:
        return None
    header, rows = read_csv(folder / "calibration.csv")
    if not header:
        return None
    ident = header[0]
    table = csv_table("calibration_zones", "Watersheds: observed against maximum rate",
                      "Observed: from the ions of the water samples; maximum: area-weighted mean of the map; "
                      "saturation ratio: observed / maximum; expected: maximum x the ratio the zone got by its rule.",
                      header, rows, [
        ("n_samples", "samples", "count"),
        ("observed_denudation_mm_per_kyr", "observed [mm/kyr]", False),
        ("maximum_denudation_mm_per_kyr", "maximum [mm/kyr]", False),
        ("saturation_ratio", "saturation ratio", False),
        ("expected_denudation_mm_per_kyr", "expected [mm/kyr]", False),
        (lambda row: Cell(str(row.get("ratio_rule") or "-")), "rule", False)])
    figures = []
    if "observed_denudation_mm_per_kyr" in header and "maximum_denudation_mm_per_kyr" in header:
        labels = [str(r.get(ident, "")) for r in rows]
        figures.append(F.paired_bars(
            labels, [_or_nan(r.get("observed_denudation_mm_per_kyr")) for r in rows],
            [_or_nan(r.get("maximum_denudation_mm_per_kyr")) for r in rows], ("observed", "maximum (map)"),
            "denudation rate [mm/kyr]", "Observed against maximum rate", "calibration_bars",
            "Observed rate from the water samples against the map's maximum rate, per watershed; no blue bar: no "
            "samples."))
    if (folder / "denudation_expected_mm_per_kyr.tif").is_file():
        figures.append(F.value_map(folder / "denudation_expected_mm_per_kyr.tif", "Expected denudation rate",
                                   "expected denudation rate [mm/kyr]", "calibration_expected",
                                   "The maximum rate scaled by each watershed's observed / maximum ratio; white: "
                                   "outside the watersheds, a zone without a ratio, or insoluble rock (0 mm/kyr)."))
    sidecar = read_json(folder / "calibration.summary.json")
    intro = ["The map gives the most rock the water could dissolve. Water sampled from springs and rivers shows how "
             "much it actually carries. Their ratio tells how far below the maximum the real rate is in each "
             "watershed; watersheds without samples take the ratio of sampled ones on the same rock where the rule "
             "says so (column 'rule': 'sampled' = measured there)."]
    caution = " ".join(sidecar.get("calibration_cautions") or [
        "Water samples are snapshots and other sources of the ions bias the observed rate; ratios carried to "
        "unsampled zones are an assumption, not a measurement."])
    return Section("calibration", "Observed against maximum rates", intro, caution, figures, [table],
                   [folder / "calibration.csv"])


# ------------------------------------------------------------------------------ sinkhole record
def sinkhole_section(summary: Path | None) -> Section | None:
    if summary is None:
        return None
    sidecar = summary.with_name(summary.stem + ".summary.json")
    record = read_json(sidecar).get("sinkhole_evaluation")
    if not record or not record.get("classes"):
        return None
    classes = record["classes"]
    rows = [[Cell(str(c["name"])), count(c.get("count")), num(c.get("area_km2")), num(c.get("density_per_km2")),
             num(c.get("density_ci95_low")), num(c.get("density_ci95_high"))] for c in classes]
    table = Table("sinkhole_classes", "Known sinkholes per hazard class",
                  "Density: count / class area; 95 % interval: exact Poisson (Garwood).",
                  ["hazard class", "sinkholes", "class area [km2]", "density [per km2]", "95 % low [per km2]",
                   "95 % high [per km2]"], rows)
    figure = F.density_bars([c["name"] for c in classes], [c["density_per_km2"] for c in classes],
                            [c["density_ci95_low"] for c in classes], [c["density_ci95_high"] for c in classes],
                            "known sinkholes per km2", "Sinkhole density per hazard class", "sinkhole_density",
                            "Known sinkholes per km2 of each class with its 95 % interval (bars); a class with few "
                            "sinkholes or little area has a wide interval.")
    cells = record.get("auc_cells") or {}
    auc_table = Table("sinkhole_auc", "How well the rate ranks the sinkhole cells",
                      "ROC AUC: 0.5 = no better than chance, 1 = every cell holding a sinkhole has a higher rate "
                      "than every other mapped cell.",
                      ["ROC AUC", "cells with a sinkhole", "other mapped cells", "sinkholes counted",
                       "sinkholes off the map"],
                      [[num(record.get("auc")), count(cells.get("sinkhole_cells")), count(cells.get("other_mapped_cells")),
                        count(record.get("points_counted")), count(record.get("points_not_counted"))]])
    intro = [f"The record of {record.get('points_counted', '?')} known sinkholes is compared with the map: if the "
             "classes rank the ground well, the density of sinkholes rises from class to class, and the cells "
             "holding a sinkhole have higher rates than the others (the ROC AUC)."]
    warning = "" if record.get("density_rises_with_class", True) else (
        "Warning: the density of known sinkholes does not rise with the hazard class here; the classes may not "
        "rank the ground as the record does. Look at the table before relying on the classes.")
    caution = record.get("limits") or ("An inventory is incomplete and biased towards where people looked: it can "
                                       "show where sinkholes are, not where they are absent.")
    return Section("sinkholes", "The sinkhole record", intro, caution, [figure], [auc_table, table], [sidecar],
                   warning)


# ------------------------------------------------------------------------------ covered karst
def covered_section(mapdir: Path, zones) -> Section | None:
    path = mapdir / "covered_karst.tif"
    if not path.is_file():
        return None
    import rasterio

    from denude.core.cover import COVER_CLASS_NAMES, COVER_COLOURS, SOLUBLE_COVERED, SOLUBLE_EXPOSED

    with rasterio.open(path) as ds:
        codes = ds.read(1)
    covered, exposed = int((codes == SOLUBLE_COVERED).sum()), int((codes == SOLUBLE_EXPOSED).sum())
    share = covered / (covered + exposed) if covered + exposed else float("nan")
    figure = F.class_map(path, COVER_CLASS_NAMES, COVER_COLOURS, "Covered karst", "bedrock and cover",
                         "covered_karst", "Where soluble bedrock lies under insoluble cover (orange) or at the "
                         "surface (blue); blank: unknown.")
    tables = [Table("covered_cells", "Soluble bedrock under cover over the whole map",
                    "Counted in cells; the watershed table weights by area and soluble fraction.",
                    ["cells under cover", "cells exposed", "share under cover"],
                    [[count(covered), count(exposed), num(share, percent=True)]])]
    if zones is not None and "covered_soluble_share" in zones:
        ident = zones.columns[0]
        rows = [[Cell(str(r[ident])), num(r.get("covered_soluble_area_km2")), num(r.get("exposed_soluble_area_km2")),
                 num(r["covered_soluble_share"], percent=True)] for _, r in zones.iterrows()]
        tables.append(Table("covered_zones", "Watersheds: soluble bedrock under cover",
                            "Share: covered / (covered + exposed) soluble area of the watershed.",
                            [ident, "covered soluble area [km2]", "exposed soluble area [km2]", "share under cover"],
                            rows))
    intro = ["Soluble rock buried under clay, sand or other insoluble cover is hidden at the surface. It is where "
             "cover-collapse sinkholes form: the cover washes down into openings in the rock below, often without "
             "warning. The rates do not change with cover; this map flags the setting."]
    caution = ("Under cover flags a setting, not a sinkhole, a void or a probability of collapse: a reason to look "
               "more closely, not a site investigation; defer to local codes and licensed geotechnical and "
               "geological practice.")
    return Section("covered", "Covered karst", intro, caution, [figure], tables, [path])


def output_sections(mapdir: Path, summary: Path | None, zones) -> list[Section]:
    """Every section whose output exists, in reading order: how sure, what if, observed, the
    record, covered karst."""
    found = [uncertainty_section(mapdir), *scenario_sections(mapdir), calibration_section(mapdir),
             sinkhole_section(summary), covered_section(mapdir, zones)]
    return [s for s in found if s is not None]
