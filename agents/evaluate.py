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


def paired_difference(result: HedgeResult, reference: HedgeResult, z: float = 1.959964) -> dict[str, float]:
    """Mean of the per-path objective difference (summed reward) and its normal 95% interval."""
    diff = result.reward - reference.reward
    half = z * diff.std(ddof=1) / np.sqrt(diff.size) if diff.size > 1 else 0.0
    mean = float(diff.mean())
    return {"mean": mean, "ci_low": mean - half, "ci_high": mean + half}


@dataclass
class Evaluation:
    """Held-out results of several policies on the same paths, ranked by objective."""

    results: dict[str, HedgeResult]
    kinds: dict[str, str]
    seed: int
    reference: str | None = None

    @property
    def table(self) -> pd.DataFrame:
        rows = [result.summary() for result in self.results.values()]
        table = pd.DataFrame(rows)
        table.insert(0, "kind", [self.kinds.get(name, "") for name in table.index])
        if self.reference in self.results:
            base = self.results[self.reference]
            versus = [paired_difference(self.results[name], base) for name in table.index]
            for key in ("mean", "ci_low", "ci_high"):
                table[f"vs_reference_{key}"] = [v[key] for v in versus]
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
) -> Evaluation:
    """Hedge the same ``n_paths`` held-out paths with every policy; differences are paired
    against ``reference`` (a policy name) path by path."""
    results = rollout_many(problem, policies, source, n_paths, seed, chunk_paths, progress=progress)
    return Evaluation(results, kinds or {}, seed, reference)


def write_metrics(evaluation: Evaluation, folder: Path) -> None:
    """metrics.csv (one row per policy) and metrics.json (the same numbers) into ``folder``."""
    folder = Path(folder)
    evaluation.table.to_csv(folder / "metrics.csv")
    payload = {"heldout_seed": evaluation.seed, "reference_policy": evaluation.reference,
               "policies": evaluation.to_records()}
    (folder / "metrics.json").write_text(json.dumps(payload, indent=2) + "\n")
