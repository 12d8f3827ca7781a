"""`denude calibrate`: measured water chemistry against the maximum-rate map, per zone.

For every zone (watershed) with samples:

1. Samples of one site are averaged discharge-weighted (concentrations weighted by the
   sample's discharge; runoff is the mean over the samples); the sites of one zone are pooled
   the same way (site weight: its mean discharge). A sample given only runoff gets the
   discharge runoff x zone area. Runoff from discharge: Q [L/s] x s/yr / zone area [m2] (L/m2 = mm).
2. The pooled Ca, Mg, SO4 are apportioned to gypsum, dolomite and calcite
   (``denude.core.water_samples``, the non-carbonate correction) and turned into the observed
   solute denudation rate with the zone's rock density x purity per mineral: the area-weighted
   mean over the zone's rocks of that mineral (rocks.csv of the map), else over all zones,
   else the mean of the table's rocks of that mineral.
3. Saturation indices of calcite, dolomite and gypsum per sample from the speciated solver
   (``denude.core.sample_speciation``); the zone's value is their discharge-weighted mean.
4. The maximum rate over the zone: the area-weighted mean of the map's rate (exactextract
   coverage fractions, the same sums as ``denude summarize``).
5. saturation_ratio = observed / maximum.

The expected-rate raster is maximum x the ratio of the zone holding the cell centre (the
smallest such zone where zones nest). A zone without samples gets the area-weighted mean
ratio of the sampled zones of the same dominant soluble rock (``unsampled="same-rock"``) or
nodata (``unsampled="nodata"``); ``ratio_rule`` says which rule each zone got.
"""

from __future__ import annotations

import json
import os
import shutil
from pathlib import Path

import numpy as np

from denude.cautions import CAUTION, UPPER_BOUND_NOTE
from denude.core.constants import MINERALS
from denude.core.sample_speciation import NO_PH_RULE, speciate_samples
from denude.core.water_samples import (
    APPORTIONING_RULE,
    MOLAR_MASS_CA_G_PER_MOL,
    MOLAR_MASS_MG_G_PER_MOL,
    MOLAR_MASS_SO4_G_PER_MOL,
    SECONDS_PER_YEAR,
    alkalinity_meq_per_l,
    apportion_minerals,
    flux_weighted_mean,
    mg_per_l_to_mmol_per_l,
    observed_denudation_mm_per_kyr,
)
from denude.errors import InputError, OutputError
from denude.registry import CHOICES

EXPECTED_TIF = "denudation_expected_mm_per_kyr.tif"
TABLE_GPKG = "calibration.gpkg"
TABLE_CSV = "calibration.csv"
SIDECAR = "calibration.summary.json"
ZONES_LAYER = "zones"
#: What a zone without samples gets (first = default), from the one registry.
UNSAMPLED_CHOICES = CHOICES["unsampled"]

#: ratio_rule values and their meaning (also written to the sidecar).
RATIO_RULES = {
    "sampled": "ratio from the zone's own samples (observed / maximum)",
    "same_rock": "no sample: area-weighted mean ratio of the sampled zones of the same dominant soluble rock",
    "nodata_option": "no sample: left nodata (unsampled = nodata)",
    "nodata_no_match": "no sample and no sampled zone of the same dominant soluble rock: nodata",
    "nodata_no_soluble_rock": "no soluble rock in the zone: no ratio (maximum is 0 or nodata)",
    "sampled_no_maximum": "sampled, but the map's maximum over the zone is 0 or nodata: no ratio",
}

CALIBRATION_CAUTIONS = (
    "Water samples are snapshots: a few samples rarely represent the mean annual flux; weight "
    "by discharge and prefer series over seasons.",
    "The observed rate counts all the sampled calcium, magnesium and sulfate as dissolved rock of "
    "the zone: rain, sea spray, fertiliser, pyrite oxidation or allogenic water from outside the "
    "zone bias it.",
    "Ratios carried to unsampled zones of the same rock are an assumption, not a measurement.",
)

COLUMN_UNITS = {
    "n_samples": "samples", "n_sites": "sites", "zone_area_km2": "km2", "runoff_mm_per_yr": "mm/yr",
    "discharge_l_s": "L/s", "ca_mg_l": "mg/L", "mg_mg_l": "mg/L", "so4_mg_l": "mg/L",
    "calcite_mmol_l": "mmol/L", "dolomite_mmol_l": "mmol/L", "gypsum_mmol_l": "mmol/L",
    "excess_mg_mmol_l": "mmol/L", "excess_so4_mmol_l": "mmol/L",
    "density_purity_calcite_g_cm3": "g/cm3", "density_purity_dolomite_g_cm3": "g/cm3",
    "density_purity_gypsum_g_cm3": "g/cm3",
    "observed_denudation_mm_per_kyr": "mm/kyr", "maximum_denudation_mm_per_kyr": "mm/kyr",
    "saturation_ratio": "1", "expected_denudation_mm_per_kyr": "mm/kyr",
    "si_calcite": "log10", "si_dolomite": "log10", "si_gypsum": "log10",
    "dominant_soluble_rock": "rock name", "ratio_rule": "rule (see ratio_rules)",
}


def _locate_samples(samples, zones):
    """Zone index of every sample row (by id, or by x/y in the zone file's CRS)."""
    if samples.zone_id is not None:
        index = {str(v): i for i, v in enumerate(zones.ids)}
        out = np.empty(len(samples), np.int64)
        for k, zone in enumerate(samples.zone_id):
            if zone not in index:
                near = ", ".join(list(index)[:5])
                raise InputError(f"{samples.path}: row {samples.rows[k]}: zone_id {zone!r} is not in {zones.path} "
                                 f"(field {zones.id_field!r}: {near}, ...); use the zone ids of the zone file")
            out[k] = index[zone]
        return out
    import shapely

    geoms = np.asarray(zones.frame.geometry.values, dtype=object)
    areas = shapely.area(geoms)
    tree = shapely.STRtree(geoms)
    pts = shapely.points(samples.x, samples.y)
    pidx, zidx = tree.query(pts, predicate="intersects")
    out = np.full(len(samples), -1, np.int64)
    best = np.full(len(samples), np.inf)
    for p, z in zip(pidx, zidx):            # the smallest zone holding the point (nested zones)
        if areas[z] < best[p]:
            best[p], out[p] = areas[z], z
    if np.any(out < 0):
        k = int(np.flatnonzero(out < 0)[0])
        raise InputError(f"{samples.path}: row {samples.rows[k]}: x,y ({samples.x[k]:g}, {samples.y[k]:g}) lies in no "
                         f"zone of {zones.path}; give x,y in the zone file's CRS ({zones.frame.crs.to_string()}) or a zone_id")
    return out


def _site_weights(samples, zone_of, zone_area_km2):
    """Discharge [L/s] and runoff [mm/yr] of every sample, each filled from the other."""
    area_m2 = zone_area_km2[zone_of] * 1e6
    q = samples.discharge_l_s.copy()
    runoff = samples.runoff_mm_per_yr.copy()
    with np.errstate(invalid="ignore", divide="ignore"):
        from_q = q * SECONDS_PER_YEAR / area_m2
        runoff = np.where(np.isnan(runoff), from_q, runoff)
        q = np.where(np.isnan(q), runoff * area_m2 / SECONDS_PER_YEAR, q)
    return q, runoff


def _pool(values, weights, groups, n_groups):
    """Weighted mean of ``values`` per group (NaN values skipped)."""
    out = np.full(n_groups, np.nan)
    for g in range(n_groups):
        sel = groups == g
        if sel.any():
            out[g] = flux_weighted_mean(values[sel], weights[sel])
    return out


def _density_purity(acc, lookup, n_zones):
    """Density x purity [g/cm3] per zone and soluble mineral (module docstring, step 2)."""
    dp = lookup.density_g_cm3 * lookup.purity
    out = {}
    for m_index, mineral in enumerate(MINERALS):
        if mineral == "insoluble":
            continue
        rows = lookup.mineral_index == m_index
        if not rows.any():
            out[mineral] = np.full(n_zones, np.nan)
            continue
        area = acc.rock_area_km2[:, rows]
        zone_area = area.sum(axis=1)
        with np.errstate(invalid="ignore", divide="ignore"):
            per_zone = (area * dp[rows]).sum(axis=1) / zone_area
        total = zone_area.sum()
        fallback = (area * dp[rows]).sum() / total if total > 0 else float(np.mean(dp[rows]))
        out[mineral] = np.where(zone_area > 0, per_zone, fallback)
    return out


def _dominant_soluble_rock(acc, lookup, rock_names):
    soluble = lookup.mineral_index != MINERALS.index("insoluble")
    area = np.where(soluble[None, :], acc.rock_area_km2, 0.0)
    best = np.argmax(area, axis=1)
    found = area.max(axis=1) > 0
    return np.array([rock_names[b] if f else "" for b, f in zip(best, found)], dtype=object)


def _ratios(observed, maximum, sampled, dominant, area, unsampled):
    """Ratio per zone and the rule it got (module docstring)."""
    n = len(observed)
    ratio = np.full(n, np.nan)
    rule = np.empty(n, dtype=object)
    with np.errstate(invalid="ignore", divide="ignore"):
        own = np.where(sampled & (maximum > 0), observed / maximum, np.nan)
    for z in range(n):
        if sampled[z]:
            if np.isfinite(own[z]):
                ratio[z], rule[z] = own[z], "sampled"
            else:
                rule[z] = "sampled_no_maximum"
        elif not dominant[z]:
            rule[z] = "nodata_no_soluble_rock"
        elif unsampled == "nodata":
            rule[z] = "nodata_option"
        else:
            peers = np.isfinite(own) & (dominant == dominant[z]) & (area > 0)
            if peers.any():
                ratio[z] = float(np.sum(own[peers] * area[peers]) / np.sum(area[peers]))
                rule[z] = "same_rock"
            else:
                rule[z] = "nodata_no_match"
    return ratio, rule


def _write_expected(rate_path, out_path, zone_geoms, zone_area, ratio, tags):
    """maximum x ratio of the zone holding each cell centre (smallest zone on top), strip by strip."""
    import rasterio
    from rasterio.features import rasterize
    from rasterio.windows import Window
    from rasterio.windows import transform as window_transform

    order = [int(z) for z in np.argsort(-np.asarray(zone_area), kind="stable")
             if zone_geoms[z] is not None and not zone_geoms[z].is_empty]
    with rasterio.open(rate_path) as src:
        profile = dict(driver="GTiff", width=src.width, height=src.height, count=1, dtype="float32",
                       crs=src.crs, transform=src.transform, nodata=float("nan"), tiled=True,
                       blockxsize=256, blockysize=256, compress="deflate", predictor=3, BIGTIFF="IF_SAFER")
        rows = 256
        lookup = np.append(np.asarray(ratio, dtype=np.float64), np.nan)   # index -1 -> NaN
        with rasterio.open(out_path, "w", **profile) as dst:
            for r0 in range(0, src.height, rows):
                h = min(rows, src.height - r0)
                window = Window(0, r0, src.width, h)
                rate = src.read(1, window=window).astype(np.float64)
                zone = rasterize(((zone_geoms[z], z) for z in order), out_shape=(h, src.width),
                                 transform=window_transform(window, src.transform), fill=-1, dtype="int32") \
                    if order else np.full((h, src.width), -1, np.int32)
                expected = rate * lookup[zone]
                dst.write(expected.astype(np.float32), 1, window=window)
            dst.update_tags(**tags)
            dst.set_band_description(1, "expected denudation rate (maximum x zone saturation ratio), mm/kyr")


def run_calibration(outdir, samples_path, zones_path, out, *, layer=None, id_field=None,
                    unsampled: str = "same-rock", overwrite: bool = False) -> dict:
    """Calibrate a `denude map` output folder against water samples per zone (module docstring).

    Writes ``out/calibration.gpkg`` (layer ``zones``), ``out/calibration.csv``,
    ``out/denudation_expected_mm_per_kyr.tif`` and ``out/calibration.summary.json``; returns
    the sidecar content."""
    import geopandas
    import rasterio
    from pyproj import CRS

    from denude.execution.summaries import zone_partials
    from denude.io.grid import Grid, zone_areas_km2
    from denude.io.map_folder import ROCKS_CSV
    from denude.io.rock_csv import read_rock_table
    from denude.io.samples import read_samples
    from denude.io.vectors import read_polygons

    outdir, out = Path(outdir), Path(out)
    rate_path, finals = _check_folders(outdir, out, unsampled, overwrite)
    samples = read_samples(samples_path)
    with rasterio.open(rate_path) as ds:
        grid = Grid.from_dataset(ds)
    zones = read_polygons(zones_path, layer, id_field, CRS.from_wkt(grid.crs.to_wkt()), what="zone")
    n = len(zones)
    zone_of = _locate_samples(samples, zones)
    zone_area = zone_areas_km2(zones.geometry, grid)

    rocks = read_rock_table(outdir / ROCKS_CSV)
    lookup = rocks.lookup()
    rock_names = [rocks.by_code(int(c)).name for c in lookup.codes]
    acc = zone_partials(outdir, zones.geometry)
    cols = acc.finalize(rock_names=rock_names)
    maximum = cols["denudation_mean_mm_per_kyr"]
    dominant = _dominant_soluble_rock(acc, lookup, rock_names)
    dens = _density_purity(acc, lookup, n)

    z = _pool_zones(samples, zone_of, zone_area, n)
    loads = apportion_minerals(mg_per_l_to_mmol_per_l(z["ions"]["ca_mg_l"], MOLAR_MASS_CA_G_PER_MOL),
                               mg_per_l_to_mmol_per_l(z["ions"]["mg_mg_l"], MOLAR_MASS_MG_G_PER_MOL),
                               mg_per_l_to_mmol_per_l(z["ions"]["so4_mg_l"], MOLAR_MASS_SO4_G_PER_MOL))
    observed = np.where(z["sampled"], observed_denudation_mm_per_kyr(loads, z["runoff"], dens), np.nan)
    si = _zone_saturation_indices(samples, z["q"], zone_of, n)
    ratio, rule = _ratios(observed, maximum, z["sampled"], dominant, cols["area_km2"], unsampled)
    table_cols = {
        zones.id_field: zones.ids,
        "n_samples": np.bincount(zone_of, minlength=n),
        "n_sites": np.bincount(z["site_zone"], minlength=n),
        "zone_area_km2": zone_area,
        "runoff_mm_per_yr": z["runoff"],
        "discharge_l_s": z["discharge"],
        "ca_mg_l": z["ions"]["ca_mg_l"], "mg_mg_l": z["ions"]["mg_mg_l"], "so4_mg_l": z["ions"]["so4_mg_l"],
        "calcite_mmol_l": loads.calcite_mmol_l, "dolomite_mmol_l": loads.dolomite_mmol_l,
        "gypsum_mmol_l": loads.gypsum_mmol_l, "excess_mg_mmol_l": loads.excess_mg_mmol_l,
        "excess_so4_mmol_l": loads.excess_so4_mmol_l,
        **{f"density_purity_{m}_g_cm3": dens[m] for m in ("calcite", "dolomite", "gypsum")},
        "dominant_soluble_rock": dominant,
        "observed_denudation_mm_per_kyr": observed,
        "maximum_denudation_mm_per_kyr": maximum,
        "saturation_ratio": ratio,
        "expected_denudation_mm_per_kyr": maximum * ratio,
        "si_calcite": si["si_calcite"], "si_dolomite": si["si_dolomite"], "si_gypsum": si["si_gypsum"],
        "ratio_rule": rule,
    }
    frame = geopandas.GeoDataFrame(table_cols, geometry=list(zones.frame.geometry.values), crs=zones.frame.crs)
    meta = _sidecar(outdir, out, samples, zones, zones_path, unsampled, z["n_sites"], int(z["sampled"].sum()))
    _write_outputs(out, finals, frame, meta, rate_path, zones.geometry, zone_area, ratio)
    meta["table"] = frame
    return meta


def _check_folders(outdir: Path, out: Path, unsampled: str, overwrite: bool):
    """The map's rate raster and the four output paths, after the one-line checks of the folders."""
    from denude.io.map_folder import RATE_TIF, ROCKS_CSV, output_file

    if unsampled not in UNSAMPLED_CHOICES:
        raise InputError(f"unsampled rule {unsampled!r} is unknown; choose one of {', '.join(UNSAMPLED_CHOICES)}")
    rate_path = output_file(outdir, RATE_TIF)
    if not rate_path.is_file() or not (outdir / ROCKS_CSV).is_file():
        raise InputError(f"{outdir}: no {RATE_TIF} or {ROCKS_CSV}; give the output folder of 'denude map'")
    finals = [out / TABLE_GPKG, out / TABLE_CSV, out / EXPECTED_TIF, out / SIDECAR]
    if out.exists() and not out.is_dir():
        raise OutputError(f"{out}: exists and is not a folder; choose an output folder")
    if out.resolve() == outdir.resolve():
        raise OutputError(f"{out}: is the map folder; choose another output folder")
    if not overwrite:
        for item in finals:
            if item.exists():
                raise OutputError(f"{item}: already exists; remove it, choose another --out or pass --overwrite")
    return rate_path, finals


def _pool_zones(samples, zone_of, zone_area, n: int) -> dict:
    """Samples -> sites -> zones, discharge-weighted: per-sample discharge ``q`` [L/s], the
    zone of each site, per-zone ion concentrations [mg/L] and temperature, runoff [mm/yr] and
    discharge [L/s], and which zones have samples."""
    q, runoff = _site_weights(samples, zone_of, zone_area)
    site_keys = sorted({(int(z), s) for z, s in zip(zone_of, samples.site_id)})
    site_index = {key: i for i, key in enumerate(site_keys)}
    site_of = np.array([site_index[(int(z), s)] for z, s in zip(zone_of, samples.site_id)], np.int64)
    n_sites = len(site_keys)
    site_zone = np.array([k[0] for k in site_keys], np.int64)
    site_q = np.array([np.nanmean(q[site_of == i]) for i in range(n_sites)])
    site_runoff = np.array([np.nanmean(runoff[site_of == i]) for i in range(n_sites)])
    ions = {name: getattr(samples, name) for name in ("ca_mg_l", "mg_mg_l", "so4_mg_l", "temperature_c")}
    site_ions = {name: _pool(v, q, site_of, n_sites) for name, v in ions.items()}
    zone_ions = {name: _pool(v, site_q, site_zone, n) for name, v in site_ions.items()}
    zone_runoff = np.array([np.mean(site_runoff[site_zone == z]) if np.any(site_zone == z) else np.nan for z in range(n)])
    zone_q = np.array([np.sum(site_q[site_zone == z]) if np.any(site_zone == z) else np.nan for z in range(n)])
    sampled = np.isin(np.arange(n), site_zone)
    return {"q": q, "site_zone": site_zone, "n_sites": n_sites, "ions": zone_ions, "runoff": zone_runoff,
            "discharge": zone_q, "sampled": sampled}


def _zone_saturation_indices(samples, q, zone_of, n: int) -> dict:
    """Saturation indices per sample (mol/kg taken as mol/L / 1 kg/L), then zone means by discharge."""
    spec = speciate_samples(samples.temperature_c,
                            mg_per_l_to_mmol_per_l(samples.ca_mg_l, MOLAR_MASS_CA_G_PER_MOL) * 1e-3,
                            mg_per_l_to_mmol_per_l(samples.mg_mg_l, MOLAR_MASS_MG_G_PER_MOL) * 1e-3,
                            mg_per_l_to_mmol_per_l(samples.so4_mg_l, MOLAR_MASS_SO4_G_PER_MOL) * 1e-3,
                            alkalinity_meq_per_l(samples.alkalinity_mg_l, samples.alkalinity_as) * 1e-3,
                            samples.ph)
    return {name: _pool(getattr(spec, name), q, zone_of, n) for name in ("si_calcite", "si_dolomite", "si_gypsum")}


def _sidecar(outdir: Path, out: Path, samples, zones, zones_path, unsampled: str, n_sites: int, zones_sampled: int) -> dict:
    """The calibration.summary.json content (inputs with SHA-256, method, units, outputs)."""
    from denude.io.rasters import file_sha256
    from denude.reports.summary_files import sidecar_head

    run_json = outdir / "run.json"
    chemistry = None
    if run_json.is_file():
        try:
            chemistry = json.loads(run_json.read_text()).get("settings", {}).get("chemistry")
        except (ValueError, OSError):
            chemistry = None
    return {
        **sidecar_head("denude calibrate"),
        "calibration_cautions": list(CALIBRATION_CAUTIONS),
        "map_folder": str(outdir.resolve()),
        "map_chemistry": chemistry,
        "samples": {"file": str(samples.path), "sha256": file_sha256(samples.path), "rows": len(samples),
                    "sites": n_sites, "zones_sampled": zones_sampled,
                    "alkalinity_as": samples.alkalinity_as.upper()},
        "zones": {"file": str(zones_path), "layer": zones.layer, "id_field": zones.id_field, "count": len(zones),
                  "sha256": file_sha256(zones_path)},
        "method": {
            "observed_rate": "D_obs = sum_m M_m c_m q / (rho_m purity_m) x 1e-3 mm/kyr (M g/mol, c mmol/L, q mm/yr, rho g/cm3)",
            "non_carbonate_correction": APPORTIONING_RULE,
            "density": "per mineral: area-weighted density x purity of the zone's rocks of that mineral (rocks.csv); "
                       "else over all zones; else the mean of the table's rocks of that mineral",
            "averaging": "samples of a site: concentrations and temperature discharge-weighted, runoff the mean; "
                         "sites of a zone: the same with the site's mean discharge; runoff from discharge = "
                         "Q x 31557600 s/yr / zone area; discharge from runoff = runoff x zone area",
            "saturation_indices": "per sample from the speciated solver (denude.core.sample_speciation); zone value = "
                                  "discharge-weighted mean of its samples. " + NO_PH_RULE,
            "maximum_rate": "area-weighted mean of the map's rate over the zone (exactextract coverage fractions)",
            "saturation_ratio": "observed / maximum",
            "expected_raster": "maximum x the ratio of the zone holding the cell centre (smallest zone where zones nest); "
                               "cells outside every zone or of a zone without a ratio are nodata",
            "unsampled": unsampled,
            "ratio_rules": RATIO_RULES,
        },
        "units": COLUMN_UNITS,
        "outputs": {"geopackage": str(out / TABLE_GPKG), "csv": str(out / TABLE_CSV),
                    "expected_raster": str(out / EXPECTED_TIF), "sidecar": str(out / SIDECAR)},
    }


def _write_outputs(out: Path, finals, frame, meta: dict, rate_path, zone_geoms, zone_area, ratio) -> None:
    """Write the table (GeoPackage, CSV), the expected-rate raster and the sidecar under
    staging names, then rename them into place (all removed again on any failure)."""
    from denude.io.outdir import remove_dead_staging, staging_path
    from denude.io.vectors import write_layers

    remove_dead_staging(out)          # staged files of killed runs (their owner process is gone)
    created = not out.exists()
    out.mkdir(parents=True, exist_ok=True)
    temps = {final: staging_path(final, keep_suffix=True) for final in finals}
    try:
        write_layers(temps[out / TABLE_GPKG], {ZONES_LAYER: frame})
        try:
            frame.drop(columns=frame.geometry.name).to_csv(temps[out / TABLE_CSV], index=False)
        except OSError as exc:
            raise OutputError(f"{out / TABLE_CSV}: cannot write ({exc.strerror or exc}); choose a writable folder") from None
        tags = {"units": "mm/kyr", "quantity": "expected chemical denudation rate (maximum x zone saturation ratio)",
                "caution": CAUTION, "upper_bound_note": UPPER_BOUND_NOTE,
                "samples_sha256": meta["samples"]["sha256"]}
        _write_expected(rate_path, temps[out / EXPECTED_TIF], zone_geoms, zone_area, ratio, tags)
        temps[out / SIDECAR].write_text(json.dumps(meta, indent=2, default=str) + "\n", encoding="utf-8")
        for final, tmp in temps.items():
            os.replace(tmp, final)
    except BaseException:
        for tmp in temps.values():
            if tmp.exists():
                tmp.unlink()
        if created:
            shutil.rmtree(out, ignore_errors=True)
        raise
