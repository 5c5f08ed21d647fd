"""Speed of the path generators. Measures and prints; passes or fails nothing.

    python -m benchmarks.markets [--paths 100000] [--steps 30] [--repeats 3]
    python -m benchmarks.markets --accuracy [--accuracy-paths 1000000]   # needs QuantLib

Figures, path-steps per second (paths x steps / wall time, best of --repeats) for
GBM, Heston (Andersen QE with martingale correction, the variance path kept as a
factor) and Merton jumps, daily steps:
- one process drawing all the paths;
- two worker processes each drawing half of them (the same paths: generators are
  seeded per block of paths, so any split gives identical paths), for 2 cores.

With --accuracy: Heston call prices over 60 daily steps, QE and full-truncation Euler
(written here, for comparison only) against QuantLib's AnalyticHestonEngine, error and
Monte Carlo standard error (control variate on S_T) at strikes 90, 100, 110: the
measurement behind the choice of QE in hedge_env.market.HestonMarket.
"""

from __future__ import annotations

import argparse
import math
import time

import numpy as np
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


ACCURACY_SETS = {
    "xi 0.5, rho -0.7": dict(initial_variance=0.04, mean_reversion=2.0, long_run_variance=0.04, vol_of_vol=0.5,
                             correlation=-0.7),
    "xi 1.0, rho -0.9": dict(initial_variance=0.09, mean_reversion=1.0, long_run_variance=0.06, vol_of_vol=1.0,
                             correlation=-0.9),
}
RATE, DIVIDEND, DAYS = 0.03, 0.01, 60


def full_truncation_euler(params: dict, n_paths: int, n_steps: int, seed: int) -> np.ndarray:
    """Terminal spots (from 100) of full-truncation Euler, risk-neutral, daily steps."""
    rng = np.random.default_rng(seed)
    kappa, theta, xi, rho = (params[k] for k in ("mean_reversion", "long_run_variance", "vol_of_vol", "correlation"))
    log_spot, variance = np.full(n_paths, math.log(100.0)), np.full(n_paths, params["initial_variance"])
    for _ in range(n_steps):
        z_spot = rng.standard_normal(n_paths)
        z_var = rho * z_spot + math.sqrt(1.0 - rho * rho) * rng.standard_normal(n_paths)
        positive = np.maximum(variance, 0.0)
        log_spot += (RATE - DIVIDEND - 0.5 * positive) * DT_YEARS + np.sqrt(positive * DT_YEARS) * z_spot
        variance += kappa * (theta - positive) * DT_YEARS + xi * np.sqrt(positive * DT_YEARS) * z_var
    return np.exp(log_spot)


def quantlib_call(params: dict, strike: float) -> float:
    import QuantLib as ql

    today = ql.Date(15, ql.January, 2026)
    ql.Settings.instance().evaluationDate = today
    counter = ql.Actual365Fixed()
    process = ql.HestonProcess(
        ql.YieldTermStructureHandle(ql.FlatForward(today, RATE, counter)),
        ql.YieldTermStructureHandle(ql.FlatForward(today, DIVIDEND, counter)),
        ql.QuoteHandle(ql.SimpleQuote(100.0)), params["initial_variance"], params["mean_reversion"],
        params["long_run_variance"], params["vol_of_vol"], params["correlation"])
    option = ql.VanillaOption(ql.PlainVanillaPayoff(ql.Option.Call, strike), ql.EuropeanExercise(today + DAYS))
    option.setPricingEngine(ql.AnalyticHestonEngine(ql.HestonModel(process)))
    return option.NPV()


def accuracy(n_paths: int) -> None:
    tau = DAYS * DT_YEARS
    forward = 100.0 * math.exp((RATE - DIVIDEND) * tau)
    print(f"Heston call error vs QuantLib AnalyticHestonEngine, {DAYS} daily steps, {n_paths:,} paths "
          "(error, standard error)")
    for label, params in ACCURACY_SETS.items():
        qe = HestonMarket(spot=100.0, drift=RATE - DIVIDEND, **params)
        schemes = {"QE": qe.generate(n_paths, DAYS, DT_YEARS, seed=5).spot[:, -1],
                   "Euler": full_truncation_euler(params, n_paths, DAYS, seed=5)}
        for scheme, terminal in schemes.items():
            cells = []
            for strike in (90.0, 100.0, 110.0):
                payoff = np.maximum(terminal - strike, 0.0) * math.exp(-RATE * tau)
                cov = np.cov(payoff, terminal)
                adjusted = payoff - cov[0, 1] / cov[1, 1] * (terminal - forward)
                error = adjusted.mean() - quantlib_call(params, strike)
                cells.append(f"K {strike:g}: {error:+.4f} ({adjusted.std() / math.sqrt(n_paths):.4f})")
            print(f"{label:<17} {scheme:<6} " + "  ".join(cells))


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    parser.add_argument("--paths", type=int, default=100_000)
    parser.add_argument("--steps", type=int, default=30)
    parser.add_argument("--repeats", type=int, default=3)
    parser.add_argument("--accuracy", action="store_true", help="QE and Euler Heston prices against QuantLib")
    parser.add_argument("--accuracy-paths", type=int, default=1_000_000)
    args = parser.parse_args()
    if args.accuracy:
        accuracy(args.accuracy_paths)
        return
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
