#!/usr/bin/env python
"""Invent water samples for the demo watersheds of the Ketterwold Upland (all values invented).

Usage::

    python scripts/make_demo_samples.py [DEMO_DIR]

The samples are built backwards from known saturation ratios, so that ``denude calibrate``
on the demo map (``denude demo``, chemistry "white") gives those ratios back:

1. map the demo job (``DEMO_DIR/job.toml``) into a temporary folder;
2. per watershed: the maximum rate over it, the rock density x purity per mineral and the
   dominant soluble rock, exactly as ``denude calibrate`` measures them;
3. pick the watershed's ratio (``RATIOS``); the target observed rate is ratio x maximum;
   the water carries calcite, dolomite and gypsum in proportion to the watershed's rock areas
   of each mineral (calcite: Ca; dolomite: Ca + Mg; gypsum: Ca + SO4), scaled to the
   concentration that gives the target at the watershed's mean runoff;
4. three samples per site at invented discharges whose discharge-weighted mean is that
   concentration (the runoff from their mean discharge is the watershed's mean runoff).

Writes ``DEMO_DIR/water_samples.csv`` and ``DEMO_DIR/water_samples_ratios.csv`` (the ratios the
samples were built from, for the tests). Two watersheds get no samples, to show the rule
that carries ratios to unsampled zones. Deterministic: no random numbers, fixed rounding.
"""

from __future__ import annotations

import argparse
import csv
import tempfile
from pathlib import Path

import numpy as np

#: Saturation ratio (observed / maximum) per watershed: invented, inside the band of science
#: notes section 9 (carbonate waters commonly 50-90 % of calcite saturation, dolomite far lower).
RATIOS = {"WS01": 0.72, "WS02": 0.64, "WS03": 0.81, "WS05": 0.58, "WS06": 0.69, "WS07": 0.76, "WS08": 0.67}
UNSAMPLED = ("WS04", "WS09")
#: Discharge of each of a site's three samples relative to the mean (invented seasons).
DISCHARGE_SHAPE = (0.5, 1.0, 1.5)
#: Concentration of each sample relative to the flux-weighted mean before the last is solved for.
CONCENTRATION_SHAPE = (1.25, 1.0)
PH = (7.45, 7.7, 7.95)
LAYER, ID_FIELD = "watersheds", "watershed_id"


def build(demo: Path):
    import rasterio
    from pyproj import CRS
    from rasterio.features import geometry_mask

    from denude.core.water_samples import (MOLAR_MASS_CA_G_PER_MOL, MOLAR_MASS_HCO3_G_PER_MOL,
                                           MOLAR_MASS_MG_G_PER_MOL, MOLAR_MASS_SO4_G_PER_MOL, SECONDS_PER_YEAR)
    from denude.core.constants import MINERALS, MOLAR_MASS_G_PER_MOL
    from denude.execution import run_map
    from denude.execution.calibration import _density_purity, _dominant_soluble_rock
    from denude.execution.summaries import zone_areas_km2, zone_partials
    from denude.io.grid import Grid
    from denude.io.jobfile import build_settings
    from denude.io.rock_csv import read_rock_table
    from denude.io.vectors import read_polygons

    with tempfile.TemporaryDirectory() as tmp:
        out = Path(tmp) / "map"
        run_map(build_settings({"out": str(out), "chemistry": "white"}, job_file=demo / "job.toml"))
        with rasterio.open(out / "denudation_mm_per_kyr.tif") as ds:
            grid = Grid.from_dataset(ds)
        zones = read_polygons(demo / "watersheds.gpkg", LAYER, ID_FIELD, CRS.from_wkt(grid.crs.to_wkt()))
        rocks = read_rock_table(out / "rocks.csv")
        lookup = rocks.lookup()
        names = [rocks.by_code(int(c)).name for c in lookup.codes]
        acc = zone_partials(out, zones.geometry)
        maximum = acc.finalize(rock_names=names)["denudation_mean_mm_per_kyr"]
        dominant = _dominant_soluble_rock(acc, lookup, names)
        dens = _density_purity(acc, lookup, len(zones))
        area_km2 = zone_areas_km2(zones.geometry, grid)
    with rasterio.open(demo / "runoff_mm_per_yr.tif") as ds:
        runoff = ds.read(1, masked=True).filled(np.nan).astype(np.float64)
        runoff[runoff < 0] = np.nan
        mean_runoff = []
        for g in zones.frame.to_crs(ds.crs).geometry:
            inside = ~geometry_mask([g], out_shape=runoff.shape, transform=ds.transform)
            mean_runoff.append(float(np.nanmean(runoff[inside])))

    samples, truth = [], []
    for z, zone_id in enumerate(zones.ids):
        zone_id = str(zone_id)
        if zone_id in UNSAMPLED:
            continue
        ratio = RATIOS[zone_id]
        q_mm = round(mean_runoff[z], 1)
        # mineral shares by rock area; D = sum M_m c_m q / (rho_m f_m) x 1e-3 (science notes section 9)
        share = {m: float(acc.rock_area_km2[z, lookup.mineral_index == MINERALS.index(m)].sum())
                 for m in ("calcite", "dolomite", "gypsum")}
        per_unit = sum(share[m] * MOLAR_MASS_G_PER_MOL[m] * q_mm * 1e-3 / dens[m][z] for m in share if share[m] > 0)
        scale = ratio * maximum[z] / per_unit
        load = {m: scale * share[m] for m in share}                   # mmol/L of each mineral
        c = load["calcite"] + load["dolomite"] + load["gypsum"]       # total Ca, mmol/L
        mean_q = q_mm * area_km2[z] * 1e6 / SECONDS_PER_YEAR          # L/s
        qs = [mean_q * s for s in DISCHARGE_SHAPE]
        cs = [c * s for s in CONCENTRATION_SHAPE]
        cs.append((c * sum(qs) - sum(ci * qi for ci, qi in zip(cs, qs))) / qs[-1])
        truth.append({ID_FIELD: zone_id, "dominant_soluble_rock": dominant[z], "saturation_ratio": ratio,
                      "maximum_denudation_mm_per_kyr": round(float(maximum[z]), 4)})
        temperature = round(11.0 - 0.4 * z, 1)
        for k, (qi, ci) in enumerate(zip(qs, cs)):
            ca = ci
            mg = ci * load["dolomite"] / c
            so4 = ci * load["gypsum"] / c
            alk_meq = 2.0 * (ca + mg - so4)
            samples.append({
                "site_id": f"{zone_id}-S1", "zone_id": zone_id, "sample_date": f"2025-{3 * k + 2:02d}-15",
                "temperature_c": temperature,
                "ca_mg_l": f"{ca * MOLAR_MASS_CA_G_PER_MOL:.6f}", "mg_mg_l": f"{mg * MOLAR_MASS_MG_G_PER_MOL:.6f}",
                "so4_mg_l": f"{so4 * MOLAR_MASS_SO4_G_PER_MOL:.6f}",
                "alkalinity_mg_l_hco3": f"{alk_meq * MOLAR_MASS_HCO3_G_PER_MOL:.4f}", "ph": PH[k],
                "discharge_l_s": f"{qi:.6f}",
            })
    with open(demo / "water_samples.csv", "w", newline="") as handle:
        writer = csv.DictWriter(handle, fieldnames=list(samples[0]))
        writer.writeheader()
        writer.writerows(samples)
    with open(demo / "water_samples_ratios.csv", "w", newline="") as handle:
        writer = csv.DictWriter(handle, fieldnames=list(truth[0]))
        writer.writeheader()
        writer.writerows(truth)
    readme = demo / "README.md"
    if readme.is_file():
        text = readme.read_text(encoding="utf-8")
        text = text.split(README_MARKER)[0].rstrip() + "\n\n" + README_SECTION.format(
            samples=len(samples), zones=len(truth), unsampled=", ".join(UNSAMPLED))
        readme.write_text(text, encoding="utf-8")
    return len(samples), len(truth)


README_MARKER = "## Water samples (invented)"
README_SECTION = README_MARKER + """

- `water_samples.csv`: {samples} invented samples (three per site, one site per watershed) of
  {zones} watersheds; {unsampled} have none. Columns as `denude calibrate` reads them
  (`site_id`, `zone_id`, `temperature_c`, `ca_mg_l`, `mg_mg_l`, `so4_mg_l`,
  `alkalinity_mg_l_hco3`, `ph`, `discharge_l_s`; `sample_date` is ignored). Written by
  `scripts/make_demo_samples.py` after `make_demo_region.py`, built backwards from known
  saturation ratios: calibrating the demo map (chemistry "white") gives them back.
- `water_samples_ratios.csv`: those ratios per watershed (observed / maximum), for the tests.
"""


def main(argv=None):
    parser = argparse.ArgumentParser(description="Invent water samples for the demo watersheds.")
    parser.add_argument("demo_dir", nargs="?", type=Path,
                        default=Path(__file__).resolve().parent.parent / "demo_rasters")
    args = parser.parse_args(argv)
    n, z = build(args.demo_dir)
    print(f"wrote {n} invented samples in {z} watersheds to {args.demo_dir / 'water_samples.csv'}")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
