"""Speed of the hedging step in its three uses. Measures and prints; passes or fails nothing.

    python -m benchmarks.rollout [--paths 100000] [--memory-paths 1000000]

Case: short one at-the-money 30-day call, GBM at 20%, 30 daily rehedges,
10 bps proportional cost, Black-Scholes delta hedge (hedge_env.env.default_problem).
Figures:
- vectorized delta rollout, path-steps per second (paths drawn beforehand; and with drawing);
- the same hedge as a per-path pure-Python loop over the scalar step (math-module pricing),
  doing the rollout's work: one book valuation per step and the same per-path totals;
- single HedgingEnv.step calls per second (full accounting, no wrappers);
- peak resident memory of a process evaluating --memory-paths paths with every baseline.
"""

from __future__ import annotations

import argparse
import resource
import subprocess
import sys
import time

import numpy as np

from agents.baselines import DeltaHedge
from hedge_env.env import HedgingEnv, default_problem
from hedge_env.rollout import rollout

# The per-path totals a rollout keeps (HedgeResult's arrays).
TOTALS = ("pnl", "reward", "hedge_gain", "book_change", "financing", "trading_cost", "impact_cost",
          "traded_shares", "trades")
from hedge_env.step import hedge_step, initial_state


def best_of(repeats: int, run) -> float:
    """Shortest wall time of ``repeats`` runs: the least disturbed by other work on the machine."""
    times = []
    for _ in range(repeats):
        start = time.perf_counter()
        run()
        times.append(time.perf_counter() - start)
    return min(times)


def per_path_loop(problem, spot_paths: np.ndarray) -> dict[str, np.ndarray]:
    """The delta hedge path by path, step by step, on floats: what the vectorized rollout replaces.

    The same work as the rollout's: one book valuation per step (the step's own, whose delta
    the next target is, as DeltaHedge.act_with_delta does) and the same per-path totals.
    """
    steps = problem.schedule.steps
    totals = {key: np.empty(len(spot_paths)) for key in TOTALS}
    for i, path in enumerate(spot_paths.tolist()):
        state = initial_state(problem, path[0], scalar=True)
        sums = dict.fromkeys(TOTALS, 0.0)
        for k in range(steps):
            outcome = hedge_step(problem, state, -state.delta, path[k + 1], scalar=True)
            for key in TOTALS:
                sums[key] += getattr(outcome, key)
            state = outcome.state
        for key in TOTALS:
            totals[key][i] = sums[key]
    return totals


def memory_child(n_paths: int) -> None:
    """Run in a fresh process: evaluate every baseline on n_paths and print peak RSS in MB."""
    from agents.baselines import FixedBand, LelandDelta, NoHedge, WhalleyWilmottBand
    from rehedge.compare import evaluate_policies

    problem, market = default_problem()
    policies = {p.name: p for p in (NoHedge(problem), DeltaHedge(problem), LelandDelta(problem),
                                     WhalleyWilmottBand(problem, 10.0), FixedBand(problem, 0.05))}
    start = time.perf_counter()
    evaluation = evaluate_policies(problem, policies, market, n_paths, seed=3)
    evaluation.table  # noqa: B018 - the summary statistics are part of the job
    elapsed = time.perf_counter() - start
    peak_mb = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024
    print(f"{peak_mb:.0f} {elapsed:.2f}")


def measure(n_paths: int = 100_000, loop_paths: int = 2_000, repeats: int = 5) -> dict:
    """Rollout speed (paths drawn beforehand and with drawing), the per-path loop's, and the env step time."""
    problem, market = default_problem()
    steps = problem.schedule.steps
    policy = DeltaHedge(problem)
    paths = market.generate(n_paths, steps, problem.dt_years, seed=11)
    path_steps = n_paths * steps

    # Best of 5: the machine may be shared, and the shortest run is the least disturbed one.
    vector_s = best_of(repeats, lambda: rollout(problem, policy, paths))
    with_draw_s = best_of(repeats, lambda: rollout(problem, policy, market, n_paths, seed=11))
    loop_set = paths.rows(0, loop_paths)
    loop_s = best_of(2, lambda: per_path_loop(problem, loop_set.spot))
    # Same numbers, so the same work: every total of the first 50 paths agrees.
    vector_check = rollout(problem, policy, loop_set.rows(0, 50))
    loop_check = per_path_loop(problem, loop_set.spot[:50])
    for key in TOTALS:
        assert np.allclose(loop_check[key], getattr(vector_check, key), rtol=1e-9, atol=1e-9), key

    env = HedgingEnv()
    env.reset(seed=1)
    action = np.array([0.5], dtype=np.float32)
    env_steps = 30_000

    def drive_env():
        for _ in range(env_steps // steps):
            env.reset()
            for _ in range(steps):
                env.step(action)

    env_s = best_of(repeats, drive_env)
    return {"steps": steps, "vector_s": vector_s, "vector_rate": path_steps / vector_s,
            "with_draw_rate": path_steps / with_draw_s, "loop_rate": loop_paths * steps / loop_s,
            "env_step_s": env_s / env_steps}


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    parser.add_argument("--paths", type=int, default=100_000)
    parser.add_argument("--loop-paths", type=int, default=2_000, help="paths for the per-path Python loop")
    parser.add_argument("--memory-paths", type=int, default=1_000_000)
    parser.add_argument("--memory-child", type=int, default=None, help=argparse.SUPPRESS)
    args = parser.parse_args()
    if args.memory_child:
        memory_child(args.memory_child)
        return

    figures = measure(args.paths, args.loop_paths)
    steps, vector_rate, loop_rate = figures["steps"], figures["vector_rate"], figures["loop_rate"]
    print(f"case: short 1 ATM 30-day call, GBM 20%, {steps} daily rehedges, 10 bps, delta hedge")
    print(f"vectorized rollout    {args.paths:>9,} paths x {steps}: {vector_rate / 1e6:6.1f} M path-steps/s "
          f"({figures['vector_s'] * 1e3:.0f} ms; {figures['with_draw_rate'] / 1e6:.1f} M/s with path drawing)")
    print(f"per-path Python loop  {args.loop_paths:>9,} paths x {steps}: {loop_rate / 1e6:6.2f} M path-steps/s")
    print(f"ratio vectorized / loop: {vector_rate / loop_rate:.1f}x")
    print(f"HedgingEnv.step: {1e-3 / figures['env_step_s']:.0f} k steps/s, {figures['env_step_s'] * 1e6:.1f} us per step "
          "(resets included)")

    child = subprocess.run(
        [sys.executable, "-m", "benchmarks.rollout", "--memory-child", str(args.memory_paths)],
        capture_output=True, text=True, check=True,
    )
    peak_mb, seconds = child.stdout.split()
    print(f"evaluate 5 baselines on {args.memory_paths:,} paths x {steps}: peak RSS {peak_mb} MB, {seconds} s")


if __name__ == "__main__":
    main()
