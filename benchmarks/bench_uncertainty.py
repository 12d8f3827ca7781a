"""Benchmark of `denude uncertainty` (64 draws) against one deterministic rate-only `denude map`.

    python benchmarks/bench_uncertainty.py                 # 4096 x 4096 cells, 64 draws
    python benchmarks/bench_uncertainty.py --size 1024     # quick run
    python benchmarks/bench_uncertainty.py --tile-size 2048  # also the tiled mode (local processes)

Measured in one run, side by side, each in a fresh subprocess through the CLI, on the same
synthetic inputs (those of bench_map.py: tiled, DEFLATE, banded lithology, smooth fields with
1 % noise): ``denude map --layers denudation`` and ``denude uncertainty --draws 64`` with the
demo region's input errors (runoff, PCO2, temperature, dolomite saturation, limestone purity
and density; no cell-level noise). Target: uncertainty <= 6 x map. With ``--tile-size`` the
same draws also run as tiles on ``--workers`` local processes (``--tile-size``), reported as a
ratio to the whole-grid run (the cost of tiling: per-tile set-up and the merge of the six
GeoTIFFs). A script, not a test.
"""

from __future__ import annotations

import argparse
import shutil
import subprocess
import sys
import tempfile
import time
from pathlib import Path

HERE = Path(__file__).resolve()
sys.path.insert(0, str(HERE.parent))

from bench_map import make_inputs  # noqa: E402

ERRORS = """
[uncertainty]
runoff_sigma_ln = 0.2
pco2_sigma_log10 = 0.15
temperature_sigma_c = 1.0
[uncertainty.saturation_ratio]
dolomite = [0.3, 0.9]
[uncertainty.rocks.limestone]
purity = [0.85, 1.0]
density_g_cm3 = [2.5, 2.7]
"""


def timed(args: list) -> float:
    start = time.perf_counter()
    proc = subprocess.run([sys.executable, "-m", "denude.cli.main", *args], capture_output=True, text=True)
    if proc.returncode != 0:
        sys.stderr.write(proc.stdout + proc.stderr)
        raise SystemExit(f"benchmark step failed: {args}")
    return time.perf_counter() - start


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--size", type=int, default=4096)
    parser.add_argument("--draws", type=int, default=64)
    parser.add_argument("--workers", type=int, default=2)
    parser.add_argument("--tile-size", type=int, default=None)
    parser.add_argument("--folder", default=None)
    args = parser.parse_args()
    folder = Path(args.folder) if args.folder else Path(tempfile.mkdtemp(prefix="denude-bench-unc-"))
    try:
        paths = make_inputs(folder / "inputs", args.size)
        job = folder / "job.toml"
        job.write_text("[inputs]\n" + "".join(f'{role} = "{path}"\n' for role, path in paths.items())
                       + "pco2_units = \"atm\"\n[run]\nlayers = [\"denudation\"]\n" + ERRORS)
        for name in ("map", "unc"):
            shutil.rmtree(folder / name, ignore_errors=True)
        # warm-up: numba caches and the load table, so neither side pays a first compile
        timed(["uncertainty", "--job", str(job), "--draws", "2", "--out", str(folder / "warm"), "--quiet",
               "--overwrite"])
        t_map = timed(["map", "--job", str(job), "--out", str(folder / "map"), "--workers", str(args.workers),
                       "--quiet", "--overwrite"])
        t_unc = timed(["uncertainty", "--job", str(job), "--draws", str(args.draws), "--seed", "1",
                       "--out", str(folder / "unc"), "--workers", str(args.workers), "--quiet", "--overwrite"])
        t_tiled = None
        if args.tile_size:
            t_tiled = timed(["uncertainty", "--job", str(job), "--draws", str(args.draws), "--seed", "1",
                             "--out", str(folder / "tiled"), "--workers", str(args.workers), "--tile-size",
                             str(args.tile_size), "--quiet", "--overwrite"])
        print(f"{args.size} x {args.size} cells, {args.draws} draws, {args.workers} workers")
        print(f"map (rate only)      {t_map:8.2f} s")
        print(f"uncertainty          {t_unc:8.2f} s")
        print(f"ratio                {t_unc / t_map:8.2f} x (target <= 6)")
        if t_tiled is not None:
            print(f"tiled ({args.tile_size} cells)  {t_tiled:8.2f} s  ({t_tiled / t_unc:.2f} x the whole-grid run)")
    finally:
        if not args.folder:
            shutil.rmtree(folder, ignore_errors=True)


if __name__ == "__main__":
    main()
