"""The benchmark table: speed, scaling, memory and sweep speed-up. Measures and prints; passes nothing.

    python -m benchmarks [--quick]        (also: rehedge bench [--quick])

Figures (reference case unless said: short one ATM 30-day call, GBM 20%, 30 daily rehedges, 10 bps):
- vectorized rollout path-steps per second, and its ratio to a per-path Python loop (benchmarks.rollout);
- HedgingEnv.step time;
- training time of each learned agent at 5k, 20k and 80k training paths (collection of the
  transitions, then the fit), and the fit time's scaling exponent in the path count (slope of
  log time on log paths; 1 is linear);
- the grid-DP solve time (151 x 201 grid);
- peak resident memory of a whole run at 1,000,000 training and held-out paths x 30 steps, in a
  fresh process (benchmarks.memory);
- an 8-cell sweep (configs/sweep-demo.toml) serially and on 2 worker processes.
Targets (printed beside the figures, never asserted): linear fit exponent <= 1.1; 2-worker sweep
<= 0.65 x the serial time; 1 M x 30 peak <= 1.5 GB. Timed work runs with one BLAS thread, as the
workers of a sweep do. --quick uses small sizes (a few minutes; the figures are then indicative only).
"""

from __future__ import annotations

import argparse
import os
import platform
import tempfile
import time
from pathlib import Path

import numpy as np
from threadpoolctl import threadpool_limits

from benchmarks import memory, rollout

ROOT = Path(__file__).resolve().parents[1]
SWEEP_CONFIG = ROOT / "configs" / "sweep-demo.toml"


def machine() -> str:
    model = platform.processor() or platform.machine()
    try:
        for line in Path("/proc/cpuinfo").read_text().splitlines():
            if line.startswith("model name"):
                model = line.split(":", 1)[1].strip()
                break
    except OSError:
        pass
    load = ", load average {:.1f}".format(os.getloadavg()[0]) if hasattr(os, "getloadavg") else ""
    return f"{os.cpu_count()} cores, {model}{load}; Python {platform.python_version()}, numpy {np.__version__}"


def training_times(sizes: list[int]) -> dict[str, list[tuple[int, float, float]]]:
    """Per learned agent: (paths, collect seconds, fit seconds) at each size."""
    from agents.dataset import Exploration, TransitionStore
    from agents.fitted_q import FittedQAgent
    from agents.linear import LinearBasisAgent
    from hedge_env.env import default_problem
    from hedge_env.market import PathSet
    from rehedge.training import collect_training_chunks

    problem, market = default_problem()
    out: dict[str, list[tuple[int, float, float]]] = {"linear": [], "fitted_q": []}
    for n in sizes:
        paths = PathSet(market, n, problem.schedule.steps, problem.dt_years, seed=5)
        with TransitionStore() as store:
            clock = time.perf_counter()
            for chunk in collect_training_chunks(problem, paths, Exploration(), 5, 16_384):
                store.add(chunk)
            collect_s = time.perf_counter() - clock
            for name, agent in (("linear", LinearBasisAgent(problem)), ("fitted_q", FittedQAgent(problem))):
                clock = time.perf_counter()
                agent.fit(store)
                out[name].append((n, collect_s, time.perf_counter() - clock))
    return out


def exponent(points: list[tuple[int, float, float]]) -> float:
    """Slope of log fit time on log path count."""
    n, _, seconds = zip(*points)
    return float(np.polyfit(np.log(n), np.log(seconds), 1)[0])


def grid_dp_seconds() -> float:
    from agents.grid_dp import GridDPAgent
    from hedge_env.env import default_problem

    problem, market = default_problem()
    return rollout.best_of(3, lambda: GridDPAgent(problem, drift=market.drift, volatility=market.volatility).fit())


def sweep_seconds(quick: bool) -> tuple[int, float, float]:
    """(cells, serial seconds, 2-worker seconds) of the sweep demo (smaller paths with --quick)."""
    from rehedge.sweep import run_sweep

    with tempfile.TemporaryDirectory(prefix="rehedge-bench-sweep-") as folder:
        config = Path(folder) / "sweep.toml"
        text = SWEEP_CONFIG.read_text()
        if quick:
            text = text.replace("train_paths = 4_000", "train_paths = 1_500").replace(
                "heldout_paths = 10_000", "heldout_paths = 3_000")
        config.write_text(text)
        clock = time.perf_counter()
        serial = run_sweep(config, sweep_dir=Path(folder) / "serial")
        serial_s = time.perf_counter() - clock
        clock = time.perf_counter()
        run_sweep(config, sweep_dir=Path(folder) / "two", workers=2)
        return len(serial.cells), serial_s, time.perf_counter() - clock


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    parser.add_argument("--quick", action="store_true", help="small sizes, a few minutes")
    parser.add_argument("--memory-paths", type=int, default=None,
                        help="paths of the memory run (default 1,000,000; 100,000 with --quick; 0 skips it)")
    args = parser.parse_args()
    quick = args.quick
    sizes = [1_000, 2_000, 4_000] if quick else [5_000, 20_000, 80_000]
    memory_paths = args.memory_paths if args.memory_paths is not None else 100_000 if quick else 1_000_000
    print(f"rehedge benchmarks{' (quick)' if quick else ''}: {machine()}", flush=True)

    rows: list[tuple[str, str, str, str]] = []
    with threadpool_limits(limits=1):
        speed = rollout.measure(20_000 if quick else 100_000, 500 if quick else 2_000, 3 if quick else 5)
        rows += [
            ("rollout, delta hedge", f"{speed['vector_rate'] / 1e6:.1f} M path-steps/s",
             f"{20_000 if quick else 100_000:,} paths x {speed['steps']}", ""),
            ("  ratio to a per-path Python loop", f"{speed['vector_rate'] / speed['loop_rate']:.0f}x", "", ""),
            ("HedgingEnv.step", f"{speed['env_step_s'] * 1e6:.1f} us", "one path, resets included", ""),
        ]
        times = training_times(sizes)
        for name, points in times.items():
            for n, collect_s, fit_s in points:
                rows.append((f"training {name}", f"{collect_s + fit_s:.1f} s",
                             f"{n:,} paths: collect {collect_s:.1f} s + fit {fit_s:.1f} s", ""))
            rows.append((f"  {name} fit time exponent", f"{exponent(points):.2f}",
                         f"{sizes[0]:,} to {sizes[-1]:,} paths", "<= 1.1" if name == "linear" else ""))
        rows.append(("grid-DP solve", f"{grid_dp_seconds():.2f} s", "151 spot x 201 holding points", ""))
    if memory_paths:
        figures = memory.measure(memory_paths, ["linear"])
        rows.append(("peak RSS of a whole run", f"{figures['peak_rss_mb']:.0f} MB",
                     f"{memory_paths:,} train + held-out paths x 30, linear agent, 2 baselines",
                     "<= 1536 MB" if memory_paths == 1_000_000 else ""))
    cells, serial_s, parallel_s = sweep_seconds(quick)
    rows.append(("sweep, 2 workers / serial", f"{parallel_s / serial_s:.2f}x",
                 f"{cells} cells: {parallel_s:.0f} s against {serial_s:.0f} s", "<= 0.65x"))

    widths = [max(len(row[i]) for row in rows) for i in range(4)]
    header = ("figure", "value", "size", "target")
    widths = [max(w, len(h)) for w, h in zip(widths, header)]
    for row in [header, tuple("-" * w for w in widths), *rows]:
        print("  ".join(cell.ljust(width) for cell, width in zip(row, widths)).rstrip())


if __name__ == "__main__":
    main()
