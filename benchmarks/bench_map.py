"""Benchmark of `denude map` (all six layers) against a tight I/O floor, and its peak memory.

    python benchmarks/bench_map.py                         # 4096 and 8192, best of 3; memory at 4096 and 16384
    python benchmarks/bench_map.py --sizes 1024 --repeat 1 --mem-sizes ''   # quick run

Measured in one run, side by side, each step in a fresh subprocess, floor and map alternating:
- floor: read the same inputs window by window (the same 512 x 512 windows, through the same
  warping when an input's grid differs from the target grid) and write the same six layers
  with the same creation options and overviews (COG up to 8192 x 8192 cells: an uncompressed
  tiled intermediate with its overviews, then GDAL's COG copy taking them; larger: tiled GTiff
  plus internal overviews), the way the map's writer does it, GDAL
  compressing on all cores (NUM_THREADS=ALL_CPUS), one layer after another, from the main
  thread, no computation and no numba. The bytes written are the map's own: an untimed map run
  before the timings writes the six layers, kept as .npy files and read back window by window
  (memory-mapped, from the page cache) by the floor, so GDAL compresses the same values (an
  earlier floor wrote the input windows instead; compression time depends on the values). The
  reference run also fills numba's
  cache, so no timed run compiles;
- map: `denude map` with all outputs, through the CLI (`--workers 2`);
- peak resident memory (ru_maxrss) of a full map run at two sizes.
Targets: map <= 1.15 x floor; memory of the larger <= 1.2 x the smaller, both < 1 GB.
A script, not a test: it never runs in CI and prints figures rather than asserting on them.
"""

from __future__ import annotations

import argparse
import json
import shutil
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

HERE = Path(__file__).resolve()
BLOCK = 512


def make_inputs(folder: Path, size: int) -> dict:
    """Synthetic inputs (tiled 512, DEFLATE), written block by block: smooth fields, banded codes."""
    import rasterio
    from rasterio.transform import from_origin
    from rasterio.windows import Window

    folder.mkdir(parents=True, exist_ok=True)
    transform = from_origin(400000.0, 5200000.0 + size * 100.0, 100.0, 100.0)
    specs = {
        "lithology": ("int16", -1),
        "runoff": ("float32", -9999.0),
        "pco2": ("float32", -9999.0),
        "temperature": ("float32", -9999.0),
    }
    paths = {}
    for role, (dtype, nodata) in specs.items():
        path = folder / f"{role}.tif"
        paths[role] = path
        if path.exists():
            continue
        profile = dict(driver="GTiff", width=size, height=size, count=1, dtype=dtype, crs="EPSG:32632",
                       transform=transform, nodata=nodata, tiled=True, blockxsize=BLOCK, blockysize=BLOCK,
                       compress="deflate", predictor=3 if dtype == "float32" else 2, bigtiff="IF_SAFER")
        with rasterio.open(path, "w", **profile) as ds:
            for row in range(0, size, BLOCK):
                for col in range(0, size, BLOCK):
                    h, w = min(BLOCK, size - row), min(BLOCK, size - col)
                    yy, xx = np.mgrid[row:row + h, col:col + w].astype(np.float64) / size
                    if role == "lithology":
                        data = ((np.floor(12 * xx + 5 * np.sin(7 * yy)) % 6)).astype(np.int16)
                    elif role == "runoff":
                        data = (100 + 1400 * xx * (1 + 0.2 * np.sin(20 * yy))).astype(np.float32)
                    elif role == "pco2":
                        data = (10 ** (-3.0 + 1.5 * yy + 0.2 * np.sin(15 * xx))).astype(np.float32)
                    else:
                        data = (3 + 20 * yy + 2 * np.cos(9 * xx)).astype(np.float32)
                    if role != "lithology":  # measurement noise (1 %): real rasters are not smooth to the last bit
                        rng = np.random.default_rng(row * size + col)
                        data = (data * (1 + 0.01 * rng.standard_normal(data.shape))).astype(np.float32)
                    ds.write(data, 1, window=Window(col, row, w, h))
    return paths


def reference_layers(paths: dict, work: Path, size: int, workers: int) -> Path:
    """Run the map once (untimed) and keep its six layers as .npy files for the floor."""
    import rasterio

    from denude.registry import LAYERS, OUTPUT_LAYERS

    folder = work / f"ref{size}"
    if folder.exists():
        return folder
    out = work / "out"
    shutil.rmtree(out, ignore_errors=True)
    wall, _, _ = timed(map_cmd(paths, out, workers))
    print(f"reference map {size} x {size} (untimed; fills numba's cache): {wall:.1f} s")
    folder.mkdir()
    for name in LAYERS:
        with rasterio.open(out / OUTPUT_LAYERS[name].file) as ds:
            np.save(folder / f"{name}.npy", ds.read(1))
    shutil.rmtree(out, ignore_errors=True)
    return folder


def floor_run(paths: dict, out: Path, reference: Path) -> None:
    """Read every input window by window and write the six layers (the values of ``reference``,
    see ``reference_layers``), no computation."""
    import rasterio
    import rasterio.shutil

    from rasterio.windows import Window

    from denude.io.grid import Grid
    from denude.io.rasters import (RESAMPLING, GridReader, OutputSpec, choose_layout, cog_options,
                                   creation_options, inspect_raster, overview_factors, plan_warp)
    from denude.registry import INPUT_ROLES, LAYERS, OUTPUT_LAYERS

    out.mkdir()
    with rasterio.Env(GDAL_CACHEMAX=128 * 2**20):    # the job's default block cache
        with rasterio.open(paths["lithology"]) as ds:
            grid = Grid.from_dataset(ds)
        layout = choose_layout("auto", grid)
        readers = {role: GridReader(plan_warp(inspect_raster(p, role), grid, INPUT_ROLES[role].categorical), grid)
                   for role, p in paths.items()}
        files = {}
        for name in LAYERS:        # the six default layers (no optional input given)
            info = OUTPUT_LAYERS[name]
            spec = OutputSpec(info.file, info.dtype, info.nodata, info.overview_resampling)
            options = creation_options(spec, "deflate", BLOCK)
            path = out / info.file
            if layout == "cog":   # the COG driver only copies: an uncompressed intermediate first
                path = out / (info.file + ".partial.tif")
                options = {k: v for k, v in options.items() if k not in ("compress", "predictor", "num_threads")}
            ds = rasterio.open(path, "w", driver="GTiff", width=grid.width, height=grid.height, count=1,
                               dtype=info.dtype, crs=grid.crs, transform=grid.affine, nodata=info.nodata, **options)
            files[name] = (spec, path, ds, np.load(reference / f"{name}.npy", mmap_mode="r"))
        windows = [Window(col, row, min(BLOCK, grid.width - col), min(BLOCK, grid.height - row))
                   for row in range(0, grid.height, BLOCK) for col in range(0, grid.width, BLOCK)]
        for window in windows:   # the job's windows (denude.execution.blocks), without importing numba
            for reader in readers.values():
                reader.read(window)
            rows, cols = window.toslices()
            for spec, _, ds, values in files.values():
                ds.write(np.asarray(values[rows, cols]), 1, window=window)
        for reader in readers.values():
            reader.close()
        factors = overview_factors(grid.height, grid.width, BLOCK)
        for spec, path, ds, _ in files.values():
            # overviews on the intermediate (COG: uncompressed), as the map's writer does
            if factors:
                ds.build_overviews(factors, RESAMPLING[spec.overview_resampling])
            ds.close()
            if layout == "cog":
                options = cog_options(spec, "deflate", BLOCK, overviews="FORCE_USE_EXISTING" if factors else "NONE")
                rasterio.shutil.copy(path, out / spec.name, driver="COG", **options)
                path.unlink()


def timed(cmd: list) -> tuple[float, int, float]:
    """Wall time (s), peak RSS (bytes) and CPU time (user + system, s) of a subprocess running
    ``cmd`` via the memory shim. CPU time is the steadier figure on a shared machine."""
    import resource

    before = resource.getrusage(resource.RUSAGE_CHILDREN)
    start = time.perf_counter()
    proc = subprocess.run([sys.executable, str(HERE), "--internal", json.dumps(cmd)],
                          capture_output=True, text=True)
    wall = time.perf_counter() - start
    after = resource.getrusage(resource.RUSAGE_CHILDREN)
    if proc.returncode != 0:
        sys.stderr.write(proc.stdout + proc.stderr)
        raise SystemExit(f"benchmark step failed: {cmd}")
    peak = int(proc.stdout.strip().splitlines()[-1])
    cpu = (after.ru_utime - before.ru_utime) + (after.ru_stime - before.ru_stime)
    return wall, peak, cpu


def internal(cmd: list) -> None:
    """Run one step in this process and print its peak RSS in bytes (ru_maxrss is KiB on Linux)."""
    import resource

    if cmd[0] == "floor":
        floor_run({k: Path(v) for k, v in json.loads(cmd[1]).items()}, Path(cmd[2]), Path(cmd[3]))
    else:
        from denude.cli.main import app

        try:
            app(cmd, standalone_mode=False)
        except SystemExit as exc:  # pragma: no cover
            if exc.code:
                raise
    print(resource.getrusage(resource.RUSAGE_SELF).ru_maxrss * 1024)


def precompile() -> None:
    """Write the bytecode of the package first, as an install does: with
    PYTHONDONTWRITEBYTECODE set (as on some machines here) every run would compile the ~60
    modules the CLI imports again (0.1-0.2 s), a cost the floor, importing a few, hardly pays."""
    import compileall

    import denude

    compileall.compile_dir(str(Path(denude.__file__).parent), quiet=1)


def map_cmd(paths: dict, out: Path, workers: int) -> list:
    return ["map", "--lithology", str(paths["lithology"]), "--runoff", str(paths["runoff"]),
            "--pco2", str(paths["pco2"]), "--temperature", str(paths["temperature"]), "--out", str(out),
            "--workers", str(workers), "--quiet"]


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--sizes", default="4096,8192", help="cells per side for the timing runs")
    parser.add_argument("--repeat", type=int, default=3, help="runs of each contender per size (best kept)")
    parser.add_argument("--mem-sizes", default="4096,16384", help="two sizes for the memory runs ('' to skip)")
    parser.add_argument("--workers", type=int, default=2)
    parser.add_argument("--folder", default=None, help="working folder (default: a temporary one)")
    parser.add_argument("--keep", action="store_true", help="keep generated inputs")
    parser.add_argument("--internal", help=argparse.SUPPRESS)
    args = parser.parse_args()
    if args.internal:
        internal(json.loads(args.internal))
        return
    precompile()
    work = Path(args.folder or tempfile.mkdtemp(prefix="denude-bench-"))
    try:
        rows = []
        for size in [int(s) for s in args.sizes.split(",") if s.strip()]:
            t0 = time.perf_counter()
            paths = make_inputs(work / f"in{size}", size)
            print(f"inputs {size} x {size}: ready in {time.perf_counter() - t0:.1f} s")
            reference = reference_layers(paths, work, size, args.workers)
            steps = {
                "floor": ["floor", json.dumps({k: str(v) for k, v in paths.items()}), str(work / "out"), str(reference)],
                "map": map_cmd(paths, work / "out", args.workers),
            }
            runs: dict = {name: [] for name in steps}
            for i in range(args.repeat):      # alternate, so both meet the same load
                for name, cmd in steps.items():
                    shutil.rmtree(work / "out", ignore_errors=True)
                    runs[name].append(timed(cmd))
                    wall, peak, cpu = runs[name][-1]
                    print(f"  {size:>5}^2 run {i + 1} {name:>5}: {wall:6.1f} s wall, {cpu:6.1f} s CPU, "
                          f"peak RSS {peak / 2**20:5.0f} MiB", flush=True)
            best = {name: min(w for w, _, _ in r) for name, r in runs.items()}
            cpu = {name: min(c for _, _, c in r) for name, r in runs.items()}
            spread = {name: max(w for w, _, _ in r) / min(w for w, _, _ in r) for name, r in runs.items()}
            pairs = [m[0] / f[0] for f, m in zip(runs["floor"], runs["map"])]
            rows.append((size, best, cpu, min(pairs), max(pairs), spread, max(p for _, p, _ in runs["map"])))
        print()
        print("  size   floor    map  map/floor  (per-pair range; spread of runs)      CPU floor   map  ratio   map RSS")
        for size, best, cpu, lo, hi, spread, peak in rows:
            print(f"{size:>6}^2 {best['floor']:6.1f} {best['map']:6.1f}   {best['map'] / best['floor']:5.2f}     "
                  f"({lo:.2f}-{hi:.2f}; floor {100 * (spread['floor'] - 1):3.0f} %, map {100 * (spread['map'] - 1):3.0f} %)"
                  f"   {cpu['floor']:6.1f} {cpu['map']:6.1f}  {cpu['map'] / cpu['floor']:5.2f}   {peak / 2**20:5.0f} MiB")
        print("wall times in s, best of each; target: map / floor <= 1.15 (wall)")
        sizes = [int(s) for s in args.mem_sizes.split(",") if s.strip()]
        peaks = []
        for size in sizes:
            p = make_inputs(work / f"in{size}", size)
            shutil.rmtree(work / "out", ignore_errors=True)
            wall, peak, _ = timed(map_cmd(p, work / "out", args.workers))
            peaks.append(peak)
            print(f"memory {size:>6} x {size:<6}: peak RSS {peak / 2**20:6.0f} MiB (all outputs, {wall:.1f} s)")
        if len(peaks) == 2:
            print(f"ratio peak {sizes[1]} / {sizes[0]}: {peaks[1] / peaks[0]:.2f} (target <= 1.2; both < 1024 MiB)")
    finally:
        shutil.rmtree(work / "out", ignore_errors=True)
        if not args.keep and args.folder is None:
            shutil.rmtree(work, ignore_errors=True)


if __name__ == "__main__":
    main()
