"""Score policies on the same held-out paths and tabulate the results."""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass

import numpy as np
import pandas as pd

from hedge_env.market import MarketPaths, PathGenerator
from hedge_env.problem import HedgingProblem
from hedge_env.rollout import HedgeResult, rollout_many


@dataclass
class Evaluation:
    """Held-out results of several policies on the same paths, ranked by objective."""

    results: dict[str, HedgeResult]
    kinds: dict[str, str]
    seed: int

    @property
    def table(self) -> pd.DataFrame:
        rows = [result.summary() for result in self.results.values()]
        table = pd.DataFrame(rows)
        table.insert(0, "kind", [self.kinds.get(name, "") for name in table.index])
        table.index.name = "policy"
        return table.sort_values("objective", ascending=False)

    def to_records(self) -> list[dict]:
        """One dict per policy, best first, with plain Python numbers (for JSON)."""
        records = []
        for name, row in self.table.iterrows():
            record = {"name": name}
            for key, value in row.items():
                record[key] = value.item() if isinstance(value, np.generic) else value
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
) -> Evaluation:
    """Hedge the same ``n_paths`` held-out paths with every policy."""
    results = rollout_many(problem, policies, source, n_paths, seed, chunk_paths, progress=progress)
    return Evaluation(results, kinds or {}, seed)
