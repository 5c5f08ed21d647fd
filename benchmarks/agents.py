"""Learned agents and tuned bands against the grid optimum. Measures and prints; passes nothing.

    python -m benchmarks.agents [--config FILE ...] [--costs 0.001,0.005] [--smoothing 0,0.3,1,3,10,100]

Per config (default: the GBM reference case, whose sweep gives 10 and 50 bps, the
same under exponential utility, and configs/heston.toml at ``--costs``): every
policy's held-out objective (the certainty equivalent under exponential utility),
the share of the optimum's gain over the reference hedge it captures ((policy -
reference) / (optimum - reference), paired on the same paths, 95% bootstrap CI
over batches of paths),
its paired difference from the tuned Whalley-Wilmott band, and fit times. The
optimum is the config's ``grid_dp`` (GBM) or ``heston_grid_dp`` agent (added
when the config has none); the reference is the config's
``report.reference_policy`` (delta under GBM, the minimum-variance delta under
Heston).

``--smoothing`` (GBM only) adds a figure comparing one regression per decision
time with pooling across times: the linear agent refitted with growing
shrinkage of each time's coefficients toward the next one's, held-out share of
the optimum's gain against smoothing.
"""

from __future__ import annotations

import argparse
import json
import time
from pathlib import Path

import numpy as np

from agents.dataset import Exploration, collect
from agents.linear import LinearBasisAgent
from hedge_env.rollout import rollout_many
from rehedge.build import training_path_set
from rehedge.compare import objective_versus, resample_batches, resampled_objective
from rehedge.config import load_variants, parse_config
from rehedge.training import train

BOOTSTRAP = 1000


def share_with_ci(results, name: str, reference: str, optimum: str, seed: int) -> tuple[float, float, float]:
    """Share of the optimum's gain over the reference in the objective (mean summed reward, or the
    certainty equivalent under exponential utility), with a paired bootstrap 95% interval over paths."""
    resamples = resample_batches(results[reference].n_paths, BOOTSTRAP, seed)
    (value, values), (base, bases), (best, bests) = (resampled_objective(results[key], resamples)
                                                     for key in (name, reference, optimum))
    low, high = np.quantile((values - bases) / (bests - bases), [0.025, 0.975])
    return float((value - base) / (best - base)), float(low), float(high)


OPTIMA = ("grid_dp", "heston_grid_dp")
DEFAULT_CONFIGS = ("configs/reference-gbm.toml", "configs/reference-exponential.toml", "configs/heston.toml")


def variants(path: str, costs: list[float]):
    """The config's variants: its sweep, or one per cost rate of ``costs`` (with the optimum added
    when the config has none)."""
    configs = load_variants(path)
    if len(configs) > 1:
        return configs
    base = configs[0]
    data = base.model_dump(mode="python")
    if not any(agent["kind"] in OPTIMA for agent in data["agents"]):
        kind = "heston_grid_dp" if data["market"]["model"] == "heston" else "grid_dp"
        data["agents"].append({"kind": kind})
    out = []
    for cost in costs:
        data["frictions"]["cost_rate"] = cost
        data["name"] = f"{base.name}-{cost * 1e4:g}bps"
        out.append(parse_config(json.loads(json.dumps(data, default=str))))
    return out


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    parser.add_argument("--config", action="append", help="config file (repeatable); default: "
                        + ", ".join(DEFAULT_CONFIGS))
    parser.add_argument("--costs", default="0.001,0.005", help="cost rates for a config without a sweep")
    parser.add_argument("--figure", default="runs/agents-per-step-vs-pooled.png")
    parser.add_argument("--smoothing", default="", help="e.g. 0,0.3,1,3,10,100: the GBM smoothing figure")
    args = parser.parse_args()
    figure_rows = []
    costs = [float(x) for x in args.costs.split(",")]
    for path in args.config or DEFAULT_CONFIGS:
        for config in variants(path, costs):
            figure_rows += _compare(config, args.smoothing)
    if figure_rows:
        _figure(figure_rows, Path(args.figure))


def _compare(config, smoothing: str) -> list:
    started = time.perf_counter()
    training = train(config)
    train_s = time.perf_counter() - started
    problem, market = training.problem, training.market
    policies = training.policies
    heldout = training.heldout_market or market
    results = rollout_many(problem, policies, heldout, config.data.heldout_paths, config.data.heldout_seed)
    optimum = next(spec.name for spec in config.agents if spec.kind in OPTIMA)
    reference = config.report.reference_policy
    seed = config.data.heldout_seed + 1
    versus_band = objective_versus(results, "whalley_wilmott", BOOTSTRAP, seed)
    objective = problem.objective.form.score_name
    print(f"\n{config.name}: cost {config.frictions.cost_rate * 1e4:g} bps, "
          f"{config.data.train_paths:,} training / {config.data.heldout_paths:,} held-out paths "
          f"(training {train_s:.1f} s); shares of the gain of {optimum} over {reference} in the {objective}")
    print(f"{'policy':<24}{'objective':>11}{'share of gain [95% CI]':>30}{'minus WW band [95% CI]':>30}{'fit s':>8}")
    for name, result in sorted(results.items(), key=lambda item: -item[1].objective_value):
        share, low, high = share_with_ci(results, name, reference, optimum, seed)
        band = versus_band[name]
        fit = training.timings.get(f"fit_{name}_s", training.timings.get("tune_s") if name in training.tuning else 0.0)
        print(f"{name:<24}{result.objective_value:>11.5f}{share:>12.3f} [{low:.3f}, {high:.3f}]"
              f"{band['mean']:>14.5f} [{band['ci_low']:+.5f}, {band['ci_high']:+.5f}]{fit:>8.1f}")
    if not smoothing or config.market.model != "gbm":
        return []
    # One regression per decision time against pooling: the same transitions, growing smoothing.
    rows = []
    spec = next(s for s in config.agents if s.kind == "linear")
    e = spec.exploration
    exploration = Exploration(e.no_trade, e.delta, e.spread, e.actions_per_state)
    paths = training_path_set(config, market, problem)
    paths = paths.rows(0, paths.n_paths)
    transitions = collect(problem, paths, exploration, np.random.SeedSequence(config.data.train_seed, spawn_key=(1, 0)))
    base = training.agents[spec.name]
    for value in [float(x) for x in smoothing.split(",")]:
        agent = LinearBasisAgent(**{**base.get_params(), "smoothing": value}).fit(transitions)
        smoothed = rollout_many(problem, {"a": agent}, heldout, config.data.heldout_paths, config.data.heldout_seed)
        share, low, high = share_with_ci({**results, **smoothed}, "a", reference, optimum, seed)
        rows.append((config.frictions.cost_rate, value, share, low, high))
        print(f"  linear, smoothing {value:>6g}: share of the optimum's gain {share:.3f} [{low:.3f}, {high:.3f}]")
    return rows


def _figure(rows, path: Path) -> None:
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    fig, ax = plt.subplots(figsize=(6.4, 3.8))
    colours = ["#1b6f8a", "#c8553d", "#5b8c5a"]
    for colour, cost in zip(colours, sorted({r[0] for r in rows})):
        mine = [r for r in rows if r[0] == cost]
        x = [max(r[1], 0.03) for r in mine]  # smoothing 0 drawn at the left edge of the log axis
        share = [r[2] for r in mine]
        err = [[r[2] - r[3] for r in mine], [r[4] - r[2] for r in mine]]
        ax.errorbar(x, share, yerr=err, marker="o", color=colour, capsize=3, label=f"{cost * 1e4:g} bps")
    ax.set_xscale("log")
    ax.set_xlabel("smoothing toward the next time's coefficients (left: one regression per time; right: pooled)")
    ax.set_ylabel("share of the grid optimum's gain over delta")
    ax.set_title("Linear agent: per-time regressions against pooling across times", fontsize=10)
    ax.grid(alpha=0.3)
    ax.legend(title="cost")
    path.parent.mkdir(parents=True, exist_ok=True)
    fig.tight_layout()
    fig.savefig(path, dpi=120)
    print(f"figure: {path}")


if __name__ == "__main__":
    main()
