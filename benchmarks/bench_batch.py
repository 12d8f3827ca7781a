"""`denude batch` scaling: 2 local workers vs 1, and a Dask LocalCluster vs the local pool.

    python benchmarks/bench_batch.py [--tile 2048] [--rounds 1] [--workers 2]

Builds a synthetic region of 4 x 4 tiles of ``--tile`` cells per side (16 tiles; default
2048, i.e. 8192 x 8192 cells), then runs the same batch, each into a fresh folder:

* the local process pool with 1 worker and with ``--workers`` workers (pool start-up included);
* a ``distributed.LocalCluster`` with ``--workers`` single-threaded worker processes (cluster
  start-up excluded: started before timing, reused across rounds).

Rounds are interleaved (1 worker, N workers, cluster, ...) and the best time of each is kept.
Targets (project issue): speed-up of N=2 local workers over 1 >= 1.7x; cluster overhead over
the local pool <= 15 %. Also checks that every engine wrote byte-identical tiles.
"""

from __future__ import annotations

import argparse
import json
import os
import shutil
import tempfile
import time
from pathlib import Path

import numpy as np
import rasterio
from rasterio.transform import from_origin

from denude.execution.batch import run_batch
from denude.io.jobfile import build_settings

CRS = "EPSG:32632"
RES = 100.0   # m


def make_region(folder: Path, side: int, seed: int = 3) -> dict:
    """Lithology codes and smooth-plus-noise runoff (mm/yr), PCO2 (atm), temperature (degrees C)."""
    rng = np.random.default_rng(seed)
    paths = {}
    profile = dict(driver="GTiff", width=side, height=side, count=1, crs=CRS, tiled=True, blockxsize=512,
                   blockysize=512, compress="deflate", transform=from_origin(500000.0, 6000000.0, RES, RES))
    strip = 512
    makers = {
        "lithology": ("int16", -1, lambda y, x: rng.choice(np.array([0, 1, 2, 3, 4], np.int16), size=y.shape,
                                                           p=[0.3, 0.35, 0.2, 0.05, 0.1])),
        "runoff": ("float32", -9999.0, lambda y, x: 100.0 + 1400.0 * x / side + rng.uniform(0, 50, y.shape)),
        "pco2": ("float32", None, lambda y, x: 10.0 ** (-3.3 + 2.0 * y / side)),
        "temperature": ("float32", None, lambda y, x: 2.0 + 20.0 * (x + y) / (2 * side)),
    }
    for role, (dtype, nodata, fn) in makers.items():
        path = folder / f"{role}.tif"
        with rasterio.open(path, "w", dtype=dtype, nodata=nodata, **profile) as ds:
            for r0 in range(0, side, strip):
                y, x = np.mgrid[r0:r0 + strip, 0:side]
                ds.write(fn(y, x).astype(dtype), 1, window=((r0, r0 + strip), (0, side)))
        paths[role] = str(path)
    return paths


def tile_seconds(out: Path) -> float:
    """Sum of the per-tile compute times recorded in the manifest [s]."""
    tiles = json.loads((out / "manifest.json").read_text())["tiles"]
    return sum(v.get("wall_time_s", 0.0) for v in tiles.values())


def tile_hashes(out: Path) -> dict:
    tiles = json.loads((out / "manifest.json").read_text())["tiles"]
    return {k: {n: o["sha256"] for n, o in v["outputs"].items()} for k, v in tiles.items()}


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--tile", type=int, default=2048, help="tile side, cells (16 tiles per run)")
    parser.add_argument("--rounds", type=int, default=1)
    parser.add_argument("--workers", type=int, default=2)
    args = parser.parse_args()
    from distributed import LocalCluster

    side = 4 * args.tile
    root = Path(tempfile.mkdtemp(prefix="denude-bench-batch-"))
    try:
        load0 = os.getloadavg()
        t0 = time.perf_counter()
        paths = make_region(root, side)
        print(f"region {side} x {side} cells ({side * side / 1e6:.1f} Mcells), 16 tiles of {args.tile}^2; "
              f"inputs written in {time.perf_counter() - t0:.1f} s")
        settings = build_settings(dict(paths, out=str(root / "warm"), block_size=512))
        # warm-up on a small region: numba cache and GDAL, outside the timings
        (root / "small").mkdir()
        small = build_settings(dict(make_region(root / "small", 512), out=str(root / "warm"), block_size=512))
        run_batch(small, 256, workers=0)
        shutil.rmtree(root / "warm")

        start = time.perf_counter()
        cluster = LocalCluster(n_workers=args.workers, threads_per_worker=1, processes=True, dashboard_address=None)
        print(f"LocalCluster start-up (excluded): {time.perf_counter() - start:.1f} s")
        best = {"local-1": float("inf"), f"local-{args.workers}": float("inf"), f"cluster-{args.workers}": float("inf")}
        hashes = {}
        try:
            for r in range(args.rounds):
                for name in best:
                    out = root / f"{name}-{r}"
                    kwargs = ({"scheduler": cluster.scheduler_address} if name.startswith("cluster")
                              else {"workers": int(name.split("-")[1])})
                    start = time.perf_counter()
                    summary = run_batch(settings.replace(out=str(out)), args.tile, **kwargs)
                    elapsed = time.perf_counter() - start
                    assert summary.ok, summary.tiles_failed
                    best[name] = min(best[name], elapsed)
                    hashes[name] = tile_hashes(out)
                    print(f"  round {r + 1} {name:<10} {elapsed:7.2f} s  ({side * side / elapsed / 1e6:.1f} Mcells/s, "
                          f"sum of tile times {tile_seconds(out):.1f} s)")
                    shutil.rmtree(out)
        finally:
            cluster.close()
        one, many, clus = best["local-1"], best[f"local-{args.workers}"], best[f"cluster-{args.workers}"]
        print(f"load average before/after (other processes share the cores): {load0} / {os.getloadavg()}")
        print(f"best: 1 worker {one:.2f} s, {args.workers} workers {many:.2f} s, cluster {clus:.2f} s")
        print(f"speed-up {args.workers} local workers vs 1: {one / many:.2f}x (target >= 1.7x on 2 cores)")
        print(f"cluster overhead vs local pool ({args.workers} workers): {100 * (clus / many - 1):+.1f} % (target <= 15 %)")
        same = all(h == hashes["local-1"] for h in hashes.values())
        print(f"tiles byte-identical across engines: {same}")
    finally:
        shutil.rmtree(root, ignore_errors=True)


if __name__ == "__main__":
    main()
