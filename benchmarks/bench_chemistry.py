"""Chemistry kernel throughput vs a plain numpy floor, measured side by side in one run.

    python benchmarks/bench_chemistry.py [--side 4096] [--repeat 3]

Reports cells/second of ``compute_block`` for both chemistry modes on realistic random
inputs, the ratio to a numpy pass that reads four input arrays and writes one output
(``out = a*b + c*d``), and the error of the lookup table against the direct solver.
Targets (project issue): white within 10x of the floor, speciated within 20x.
"""

from __future__ import annotations

import argparse
import time

import numpy as np

from denude.core.kernel import compute_block
from denude.core.rocks import RockTable


def realistic_inputs(side: int, seed: int = 0):
    rng = np.random.default_rng(seed)
    shape = (side, side)
    codes = rng.choice(np.array([0, 1, 2, 3, 4], np.uint8), size=shape, p=[0.3, 0.35, 0.2, 0.05, 0.1])
    runoff = rng.uniform(100.0, 1500.0, shape).astype(np.float32)
    pco2 = (10.0 ** rng.uniform(-3.3, -1.3, shape)).astype(np.float32)
    temperature = rng.uniform(0.0, 25.0, shape).astype(np.float32)
    return codes, runoff, pco2, temperature


def best_of(repeat, func):
    times = []
    for _ in range(repeat):
        start = time.perf_counter()
        func()
        times.append(time.perf_counter() - start)
    return min(times)


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--side", type=int, default=4096)
    parser.add_argument("--repeat", type=int, default=5)
    args = parser.parse_args()
    codes, runoff, pco2, temperature = realistic_inputs(args.side)
    rocks = RockTable.builtin().lookup()
    n = codes.size
    a, b, c, d = runoff, pco2, temperature, runoff[::-1].copy()
    out = np.empty_like(a)

    def floor():
        np.multiply(a, b, out=out)
        out[...] += c * d

    for chemistry in ("white", "speciated"):
        compute_block(codes[:64], runoff[:64], pco2[:64], temperature[:64], rocks, chemistry)  # compile, tables
    # Interleave the measurements round by round so that machine noise hits all alike.
    timings = {"floor": [], "white": [], "speciated": []}
    for _ in range(args.repeat):
        timings["floor"].append(best_of(1, floor))
        for chemistry in ("white", "speciated"):
            timings[chemistry].append(
                best_of(1, lambda: compute_block(codes, runoff, pco2, temperature, rocks, chemistry))
            )
    floor_s = min(timings["floor"])
    results = {chemistry: min(timings[chemistry]) for chemistry in ("white", "speciated")}

    print(f"cells: {n:,} ({args.side} x {args.side}), best of {args.repeat}")
    print(f"numpy floor (out = a*b + c*d): {floor_s:.3f} s  {n / floor_s / 1e6:8.1f} Mcells/s")
    targets = {"white": 10.0, "speciated": 20.0}
    for chemistry, seconds in results.items():
        ratio = seconds / floor_s
        verdict = "meets" if ratio <= targets[chemistry] else "misses"
        print(f"{chemistry:9s} table kernel: {seconds:.3f} s  {n / seconds / 1e6:8.1f} Mcells/s  "
              f"ratio to floor {ratio:5.1f}x ({verdict} target {targets[chemistry]:.0f}x)")

    # Error of the lookup table against the direct solver on a random subset.
    sub = slice(0, max(1, 200_000 // args.side))
    for chemistry in ("white", "speciated"):
        fast = compute_block(codes[sub], runoff[sub], pco2[sub], temperature[sub], rocks, chemistry)
        exact = compute_block(codes[sub], runoff[sub], pco2[sub], temperature[sub], rocks, chemistry, method="direct")
        x, y = fast.dissolved_load_mmol_per_l, exact.dissolved_load_mmol_per_l
        mask = np.isfinite(y) & (y > 0)
        err = np.abs(x[mask].astype(np.float64) / y[mask] - 1.0)
        print(f"{chemistry:9s} table vs direct solver on {mask.sum():,} cells: "
              f"max relative error {err.max():.2e}, median {np.median(err):.2e}")


if __name__ == "__main__":
    main()
