"""Time of the held-out comparison. Measures and prints; passes nothing.

    python -m benchmarks.evaluate [--config configs/reference-gbm.toml] [--paths 100000]
    python -m benchmarks.evaluate --config configs/heston.toml --marks


Trains the config's first variant (not timed), then times evaluate_policies
of its six policies (delta, Whalley-Wilmott and fixed bands, linear and
fitted-Q agents, grid DP) on --paths held-out paths with the paired bootstrap
of every difference from delta, and the same with the opposite-book
evaluation that the quotes need.

--marks (a config with pricing.marks = "model"): times the comparison of six of its policies with
the model's marks (the per-expiry Heston tables built inside the timed work) and with Black-Scholes
marks at pricing.volatility, and prints the ratio (target: model marks at most 2x).
"""

from __future__ import annotations

import argparse
import resource
import time
from dataclasses import replace

from hedge_env import model_pricing
from rehedge.compare import evaluate_policies, evaluate_with_quotes
from rehedge.config import load_variants
from rehedge.training import train


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    parser.add_argument("--config", default="configs/reference-gbm.toml")
    parser.add_argument("--paths", type=int, default=100_000)
    parser.add_argument("--marks", action="store_true", help="model marks against Black-Scholes marks")
    args = parser.parse_args()
    config = load_variants(args.config)[0]
    training = train(config)
    policies = training.policies
    common = dict(kinds=training.kinds, reference="delta", bootstrap_samples=config.report.bootstrap_samples)
    if args.marks:
        compare_marks(training, policies, args.paths, common)
        return

    start = time.perf_counter()
    evaluation = evaluate_policies(training.problem, policies, training.heldout_market, args.paths, 99, **common)
    evaluation.table  # noqa: B018 - the summary and the bootstrap are part of the timed work
    plain_s = time.perf_counter() - start

    start = time.perf_counter()
    evaluation = evaluate_with_quotes(training.problem, policies, training.heldout_market, args.paths, 99, **common)
    evaluation.table  # noqa: B018
    quotes_s = time.perf_counter() - start
    peak_mb = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024
    print(f"{len(policies)} policies ({', '.join(policies)}) on {args.paths:,} held-out paths x "
          f"{training.problem.schedule.steps} steps")
    print(f"with paired bootstrap CIs ({config.report.bootstrap_samples} resamples): {plain_s:.1f} s")
    print(f"with CIs and quotes (opposite book too):  {quotes_s:.1f} s; peak RSS {peak_mb:.0f} MB")


MARK_POLICIES = ("delta", "minimum_variance_delta", "whalley_wilmott", "fixed_band", "linear", "fitted_q")


def compare_marks(training, policies: dict, paths: int, common: dict) -> None:
    problem = training.problem
    if problem.mark_model is None:
        raise SystemExit("--marks needs a config with pricing.marks = 'model'")
    chosen = {name: policies[name] for name in MARK_POLICIES if name in policies}
    for name in policies:  # six policies, the named ones first
        if len(chosen) < 6:
            chosen.setdefault(name, policies[name])
    seconds = {}
    for label, marked in (("model", problem), ("black_scholes", replace(problem, mark_model=None))):
        model_pricing.heston_table.cache_clear()  # the tables' building is part of the model marks' time
        start = time.perf_counter()
        evaluate_policies(marked, chosen, training.heldout_market, paths, 99, **common).table  # noqa: B018
        seconds[label] = time.perf_counter() - start
    print(f"{len(chosen)} policies ({', '.join(chosen)}) on {paths:,} held-out paths x {problem.schedule.steps} steps")
    print(f"model marks: {seconds['model']:.1f} s; Black-Scholes marks: {seconds['black_scholes']:.1f} s; "
          f"ratio {seconds['model'] / seconds['black_scholes']:.2f}x (target <= 2x)")


if __name__ == "__main__":
    main()
