"""Speed of the path generators. Measures and prints; passes or fails nothing.

    python -m benchmarks.markets [--paths 100000] [--steps 30] [--repeats 3]

Figures, path-steps per second (paths x steps / wall time, best of --repeats) for
GBM, Heston (Andersen QE with martingale correction, the variance path kept as a
factor) and Merton jumps, daily steps:
- one process drawing all the paths;
- two worker processes each drawing half of them (the same paths: generators are
  seeded per block of paths, so any split gives identical paths), for 2 cores.
"""

from __future__ import annotations

import argparse
import time

from joblib import Parallel, delayed

from hedge_env.market import BLOCK_PATHS, GBMMarket, HestonMarket, MertonMarket

DT_YEARS = 1.0 / 365.0
MARKETS = {
    "gbm": GBMMarket(spot=100.0, drift=0.05, volatility=0.2),
    "heston": HestonMarket(spot=100.0, drift=0.05, initial_variance=0.04, mean_reversion=2.0,
                           long_run_variance=0.04, vol_of_vol=0.5, correlation=-0.7),
    "merton": MertonMarket(spot=100.0, drift=0.05, volatility=0.2, jump_intensity=3.0, jump_mean=-0.05,
                           jump_std=0.12),
}


def draw(market, n_paths: int, n_steps: int, start: int = 0) -> float:
    """Wall time of drawing paths ``start`` to ``start + n_paths``, seconds."""
    clock = time.perf_counter()
    market.generate(n_paths, n_steps, DT_YEARS, seed=1, start=start)
    return time.perf_counter() - clock


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    parser.add_argument("--paths", type=int, default=100_000)
    parser.add_argument("--steps", type=int, default=30)
    parser.add_argument("--repeats", type=int, default=3)
    args = parser.parse_args()
    n, steps = args.paths, args.steps
    # Halves on a block boundary, so each worker draws whole blocks only.
    half = ((n // 2 + BLOCK_PATHS - 1) // BLOCK_PATHS) * BLOCK_PATHS
    parts = [(0, half), (half, n - half)]
    print(f"{n:,} paths x {steps} daily steps; best of {args.repeats}")
    with Parallel(n_jobs=2) as workers:
        for name, market in MARKETS.items():
            one = min(draw(market, n, steps) for _ in range(args.repeats))
            two = min(
                max(workers(delayed(draw)(market, size, steps, start) for start, size in parts))
                for _ in range(args.repeats))
            print(f"{name:<7} 1 process: {n * steps / one / 1e6:6.1f} M path-steps/s   "
                  f"2 processes: {n * steps / two / 1e6:6.1f} M path-steps/s (slowest worker's time)")


if __name__ == "__main__":
    main()
