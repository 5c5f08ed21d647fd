"""Time of the held-out comparison. Measures and prints; passes nothing.

    python -m benchmarks.evaluate [--config configs/reference-gbm.toml] [--paths 100000]

Trains the config's first variant (not timed), then times evaluate_policies
of its six policies (delta, Whalley-Wilmott and fixed bands, linear and
fitted-Q agents, grid DP) on --paths held-out paths with the paired bootstrap
of every difference from delta, and the same with the opposite-book
evaluation that the quotes need.
"""

from __future__ import annotations

import argparse
import resource
import time

from rehedge.compare import evaluate_policies, evaluate_with_quotes
from rehedge.config import load_variants
from rehedge.training import train


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    parser.add_argument("--config", default="configs/reference-gbm.toml")
    parser.add_argument("--paths", type=int, default=100_000)
    args = parser.parse_args()
    config = load_variants(args.config)[0]
    training = train(config)
    policies = training.policies
    common = dict(kinds=training.kinds, reference="delta", bootstrap_samples=config.report.bootstrap_samples)

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


if __name__ == "__main__":
    main()
