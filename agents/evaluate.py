"""Score policies on the same held-out paths and tabulate the results."""

from __future__ import annotations

import json
from collections.abc import Callable
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pandas as pd

from hedge_env.market import MarketPaths, PathGenerator
from hedge_env.problem import HedgingProblem
from hedge_env.rollout import HedgeResult, rollout_many


def paired_bootstrap(differences: dict[str, np.ndarray], samples: int = 2000, seed: int = 0,
                     batches: int = 2000, level: float = 0.95) -> dict[str, dict[str, float]]:
    """Mean of each per-path difference and its percentile bootstrap interval.

    The resampling is over paths, in ``batches`` consecutive batches of paths
    (iid, like the paths themselves; with fewer paths than batches, one path
    a batch); the same resamples serve every policy, so the intervals are
    paired and reproducible from ``seed``.
    """
    n = len(next(iter(differences.values())))
    groups = min(n, batches)
    starts = (np.arange(groups) * n) // groups
    counts = np.diff(np.append(starts, n))
    draws = np.random.default_rng(seed).integers(0, groups, size=(samples, groups))
    resampled_counts = counts[draws].sum(axis=1)
    tail = (1.0 - level) / 2.0
    out = {}
    for name, diff in differences.items():
        sums = np.add.reduceat(diff, starts)
        means = sums[draws].sum(axis=1) / resampled_counts
        low, high = np.quantile(means, [tail, 1.0 - tail])
        out[name] = {"mean": float(diff.mean()), "ci_low": float(low), "ci_high": float(high)}
    return out


@dataclass
class Evaluation:
    """Held-out results of several policies on the same paths, ranked by objective."""

    results: dict[str, HedgeResult]
    kinds: dict[str, str]
    seed: int
    reference: str | None = None
    bootstrap_samples: int = 2000
    bootstrap_seed: int = 0

    @property
    def table(self) -> pd.DataFrame:
        rows = [result.summary() for result in self.results.values()]
        table = pd.DataFrame(rows)
        table.insert(0, "kind", [self.kinds.get(name, "") for name in table.index])
        if self.reference in self.results:
            base = self.results[self.reference].reward
            versus = paired_bootstrap({name: r.reward - base for name, r in self.results.items()},
                                      self.bootstrap_samples, self.bootstrap_seed)
            for key in ("mean", "ci_low", "ci_high"):
                table[f"vs_reference_{key}"] = [versus[name][key] for name in table.index]
        table.index.name = "policy"
        return table.sort_values("objective", ascending=False)

    def to_records(self) -> list[dict]:
        """One dict per policy, best first, with plain Python numbers (for JSON)."""
        records = []
        for name, row in self.table.iterrows():
            record = {"name": name}
            for key, value in row.items():
                value = value.item() if isinstance(value, np.generic) else value
                if key.startswith("vs_reference_"):
                    record.setdefault("vs_reference", {"policy": self.reference})[key[13:]] = value
                else:
                    record[key] = value
            records.append(record)
        return records


def evaluate_policies(
    problem: HedgingProblem,
    policies: dict[str, object],
    source: PathGenerator | MarketPaths,
    n_paths: int | None,
    seed: int,
    kinds: dict[str, str] | None = None,
    chunk_paths: int = 8192,
    progress: Callable[[int], None] | None = None,
    reference: str | None = "delta",
    bootstrap_samples: int = 2000,
) -> Evaluation:
    """Hedge the same ``n_paths`` held-out paths with every policy; differences are paired
    against ``reference`` (a policy name) path by path, with a bootstrap over paths seeded
    from the held-out seed."""
    results = rollout_many(problem, policies, source, n_paths, seed, chunk_paths, progress=progress)
    return Evaluation(results, kinds or {}, seed, reference, bootstrap_samples, bootstrap_seed=seed + 1)


def write_metrics(evaluation: Evaluation, folder: Path) -> None:
    """metrics.csv (one row per policy) and metrics.json (the same numbers) into ``folder``."""
    folder = Path(folder)
    evaluation.table.to_csv(folder / "metrics.csv")
    payload = {"heldout_seed": evaluation.seed, "reference_policy": evaluation.reference,
               "bootstrap_samples": evaluation.bootstrap_samples, "bootstrap_seed": evaluation.bootstrap_seed,
               "policies": evaluation.to_records()}
    (folder / "metrics.json").write_text(json.dumps(payload, indent=2) + "\n")
