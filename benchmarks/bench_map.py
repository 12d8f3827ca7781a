"""Benchmark of `denude map` against the I/O floor, and its peak memory at two sizes.

    python benchmarks/bench_map.py                 # 8192 x 8192 timing, memory at 4096 and 16384
    python benchmarks/bench_map.py --size 2048 --mem-sizes 1024,2048   # quick run

Measured in one run, side by side, each in a fresh subprocess:
- floor: read the same inputs window by window (512 x 512) and write one float32 raster with
  the same writer and creation options (tiled, DEFLATE, PREDICTOR=3, overviews, COG layout
  where the job would use it), no computation;
- map, rate only (``--layers denudation``) and with all outputs, through the CLI;
- peak resident memory (ru_maxrss) of a full map run at two sizes.
Targets: rate only <= 1.3 x floor; memory of the larger <= 1.2 x the smaller, both < 1 GB.
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


def floor_run(paths: dict, out: Path) -> None:
    """Read every input window by window and write one float32 output, no computation."""
    import rasterio

    from denude.execution.blocks import block_windows
    from denude.execution.raster_job import output_spec
    from denude.io.grid import Grid
    from denude.io.jobfile import build_settings
    from denude.io.rasters import RasterWriter, choose_layout

    settings = build_settings({"lithology": str(paths["lithology"]), "runoff": str(paths["runoff"]),
                               "pco2": str(paths["pco2"]), "temperature": str(paths["temperature"]),
                               "out": str(out)})
    out.mkdir()
    with rasterio.Env(GDAL_CACHEMAX=settings.gdal_cache_mb * 2**20):
        sources = {role: rasterio.open(p) for role, p in paths.items()}
        grid = Grid.from_dataset(sources["lithology"])
        writer = RasterWriter(out / "denudation_mm_per_kyr.tif", grid, output_spec("denudation", settings),
                              BLOCK, "deflate", choose_layout("auto", grid))
        for window in block_windows(grid.height, grid.width, BLOCK):
            arrays = [ds.read(1, window=window) for ds in sources.values()]
            writer.write(arrays[1], window)
        writer.close()
        for ds in sources.values():
            ds.close()


def timed(cmd: list) -> tuple[float, int]:
    """Wall time (s) and peak RSS (bytes) of a subprocess running ``cmd`` via the memory shim."""
    start = time.perf_counter()
    proc = subprocess.run([sys.executable, str(HERE), "--internal", json.dumps(cmd)],
                          capture_output=True, text=True)
    wall = time.perf_counter() - start
    if proc.returncode != 0:
        sys.stderr.write(proc.stdout + proc.stderr)
        raise SystemExit(f"benchmark step failed: {cmd}")
    peak = int(proc.stdout.strip().splitlines()[-1])
    return wall, peak


def internal(cmd: list) -> None:
    """Run one step in this process and print its peak RSS in bytes (ru_maxrss is KiB on Linux)."""
    import resource

    if cmd[0] == "floor":
        floor_run({k: Path(v) for k, v in json.loads(cmd[1]).items()}, Path(cmd[2]))
    else:
        from denude.cli.main import app

        try:
            app(cmd, standalone_mode=False)
        except SystemExit as exc:  # pragma: no cover
            if exc.code:
                raise
    print(resource.getrusage(resource.RUSAGE_SELF).ru_maxrss * 1024)


def map_cmd(paths: dict, out: Path, workers: int, layers: str | None) -> list:
    cmd = ["map", "--lithology", str(paths["lithology"]), "--runoff", str(paths["runoff"]),
           "--pco2", str(paths["pco2"]), "--temperature", str(paths["temperature"]), "--out", str(out),
           "--workers", str(workers), "--quiet"]
    return cmd + (["--layers", layers] if layers else [])


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--size", type=int, default=8192, help="cells per side for the timing runs")
    parser.add_argument("--mem-sizes", default="4096,16384", help="two sizes for the memory runs ('' to skip)")
    parser.add_argument("--workers", type=int, default=2)
    parser.add_argument("--folder", default=None, help="working folder (default: a temporary one)")
    parser.add_argument("--keep", action="store_true", help="keep generated inputs")
    parser.add_argument("--internal", help=argparse.SUPPRESS)
    args = parser.parse_args()
    if args.internal:
        internal(json.loads(args.internal))
        return
    work = Path(args.folder or tempfile.mkdtemp(prefix="denude-bench-"))
    try:
        t0 = time.perf_counter()
        paths = make_inputs(work / f"in{args.size}", args.size)
        print(f"inputs {args.size} x {args.size}: generated in {time.perf_counter() - t0:.1f} s")
        results = {}
        for name, cmd in (
            ("floor", ["floor", json.dumps({k: str(v) for k, v in paths.items()}), str(work / "floor")]),
            ("map rate only", map_cmd(paths, work / "rate", args.workers, "denudation")),
            ("map all outputs", map_cmd(paths, work / "all", args.workers, None)),
        ):
            for folder in ("floor", "rate", "all"):
                shutil.rmtree(work / folder, ignore_errors=True)
            results[name] = timed(cmd)
            print(f"{name:>16}: {results[name][0]:7.1f} s, peak RSS {results[name][1] / 2**20:6.0f} MiB")
        floor = results["floor"][0]
        print(f"ratio rate only / floor: {results['map rate only'][0] / floor:.2f} (target <= 1.3)")
        print(f"ratio all outputs / floor: {results['map all outputs'][0] / floor:.2f}")
        sizes = [int(s) for s in args.mem_sizes.split(",") if s.strip()]
        peaks = []
        for size in sizes:
            p = make_inputs(work / f"in{size}", size)
            shutil.rmtree(work / "mem", ignore_errors=True)
            wall, peak = timed(map_cmd(p, work / "mem", args.workers, None))
            peaks.append(peak)
            print(f"memory {size:>6} x {size:<6}: peak RSS {peak / 2**20:6.0f} MiB (all outputs, {wall:.1f} s)")
        if len(peaks) == 2:
            print(f"ratio peak {sizes[1]} / {sizes[0]}: {peaks[1] / peaks[0]:.2f} (target <= 1.2; both < 1024 MiB)")
    finally:
        if not args.keep and args.folder is None:
            shutil.rmtree(work, ignore_errors=True)


if __name__ == "__main__":
    main()
