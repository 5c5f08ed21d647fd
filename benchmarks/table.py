"""Hedge tables: size, export time, round trip to the source objective, decide() and advise speed.
Measures and prints; passes nothing.

    python -m benchmarks.table [--config configs/reference-gbm.toml] [--paths 50000] [--skip-fitted-q]

Per cost level (the config's sweep): trains the config (baselines tuned,
agents fitted), exports every policy on the grid of the config's ``[export]``
section, reloads each table and scores source and table on the same held-out
paths: the table's objective gap from its source in percent, with the paired
standard error. Then, on one table: load time, decide() on 1,000,000 random
states (in and around the domain), and `rehedge advise` from process start to
answer (median of 5 runs of a fresh interpreter).
"""

from __future__ import annotations

import argparse
import statistics
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

from hedge_env.rollout import rollout_many
from rehedge.config import load_variants
from rehedge.tables.export import export_policy
from rehedge.tables.reader import HedgeTable
from rehedge.training import train


def folder_size(folder: Path) -> int:
    return sum(f.stat().st_size for f in folder.iterdir())


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    parser.add_argument("--config", default="configs/reference-gbm.toml")
    parser.add_argument("--paths", type=int, default=50_000)
    parser.add_argument("--skip-fitted-q", action="store_true", help="Leave fitted-Q agents out (slow to train).")
    args = parser.parse_args()
    out = Path(tempfile.mkdtemp(prefix="rehedge-tables-"))
    last = None
    for config in load_variants(args.config):
        if args.skip_fitted_q:
            config = config.model_copy(update={"agents": [a for a in config.agents if a.kind != "fitted_q"]})
        training = train(config)
        problem, market, policies = training.problem, training.market, training.policies
        export = config.export
        print(f"{config.name}: grid every rehedge ({problem.schedule.steps}) x {export.moneyness_points} moneyness "
              f"(+-{export.moneyness_width:g} sd) x {export.holding_points} holding nodes; "
              f"{args.paths:,} held-out paths, seed {config.data.heldout_seed}")
        tables = {}
        for name in policies:
            started = time.perf_counter()
            folder = export_policy(config, problem, policies, name, out / config.name / name)
            seconds = time.perf_counter() - started
            tables[f"{name}.table"] = HedgeTable.load(folder)
            print(f"  export {name:<16} {seconds:6.2f} s  {folder_size(folder) / 1e6:5.2f} MB")
            last = folder
        results = rollout_many(problem, {**policies, **tables}, market, args.paths, config.data.heldout_seed,
                               config.data.chunk_paths)
        for name in policies:
            source, table = results[name].reward, results[f"{name}.table"].reward
            gap = table - source
            scale = abs(source.mean())
            print(f"  {name:<16} objective {source.mean():+.5f}  table {table.mean():+.5f}  "
                  f"gap {100 * gap.mean() / scale:+.3f}% (paired se {100 * gap.std() / np.sqrt(gap.size) / scale:.3f}%)")

    started = time.perf_counter()
    table = HedgeTable.load(last)
    load_s = time.perf_counter() - started
    rng = np.random.default_rng(0)
    n = 1_000_000
    (s_low, s_high), (d_low, d_high), (h_low, h_high) = (table.domain[k] for k in ("spot", "days_left", "holding_shares"))
    spot = rng.uniform(0.95 * s_low, 1.05 * s_high, n)
    days = rng.uniform(0.0, d_high, n)
    held = rng.uniform(h_low - 0.05 * (h_high - h_low), h_high + 0.05 * (h_high - h_low), n)
    times = []
    for _ in range(5):
        started = time.perf_counter()
        decision = table.decide(spot, days, held)
        times.append(time.perf_counter() - started)
    print(f"table {last}: load {load_s * 1e3:.0f} ms; decide() on {n:,} states: median {statistics.median(times):.3f} s, "
          f"best {min(times):.3f} s ({decision.clamped.mean():.0%} of them clamped)")
    command = [sys.executable, "-c", "from rehedge.cli import main; main()", "advise", str(last),
               "--spot", f"{table.reference_spot * 1.015:g}", "--days-left", f"{d_high / 2:g}",
               "--holding", f"{(h_low + h_high) / 2:g}", "--json"]
    walls = []
    for _ in range(5):
        started = time.perf_counter()
        subprocess.run(command, check=True, capture_output=True)
        walls.append(time.perf_counter() - started)
    print(f"rehedge advise, process start to answer: median {statistics.median(walls):.2f} s, best {min(walls):.2f} s")
    print(f"tables written under {out}")


if __name__ == "__main__":
    main()
