"""Tune a baseline's one parameter on training paths, never on held-out ones.

A band's risk aversion is not the reward's kappa: left at kappa, the
Whalley-Wilmott band can be worse than plain delta. So a parameter set to
"tune" is chosen to maximise the objective (mean summed reward, or the
certainty equivalent under exponential utility) on the training paths: a
coarse grid first, then a bounded scalar search between the best grid
point's neighbours. The same paths serve every trial (common
random numbers), so the search compares like with like.
"""

from __future__ import annotations

from dataclasses import dataclass, replace

import numpy as np
from scipy.optimize import minimize_scalar

from hedge_env.market import MarketPaths, PathSet
from hedge_env.problem import HedgingProblem
from hedge_env.rollout import rollout


@dataclass(frozen=True)
class TuningResult:
    """Chosen value, its training objective, and every trial (value, objective)."""

    parameter: str
    value: float
    objective: float
    trials: tuple[tuple[float, float], ...]


def search_space(problem: HedgingProblem, policy, parameter: str) -> tuple[np.ndarray, bool]:
    """Coarse grid of a policy's tunable parameter and whether the search runs in log space: the
    policy's class declares it (``search_spaces``, parameter -> function of the problem)."""
    spaces = getattr(type(policy), "search_spaces", {})
    if parameter not in spaces:
        raise ValueError(f"{type(policy).__name__} has no search space for parameter {parameter!r}")
    return spaces[parameter](problem)


# Evaluations of the bounded search after the grid, at most.
REFINE_TRIALS = 12


def trial_count(problem: HedgingProblem, policy, parameter: str) -> int:
    """The most trials :func:`tune_parameter` makes for ``parameter``: its grid, then the refinement."""
    return len(search_space(problem, policy, parameter)[0]) + REFINE_TRIALS


def tune_parameter(problem: HedgingProblem, policy, parameter: str, paths: MarketPaths | PathSet,
                   chunk_paths: int = 8192, progress=None) -> TuningResult:
    """The value of ``policy.parameter`` that maximises the objective on ``paths``; ``progress(1)`` is
    called after each trial (at most :func:`trial_count` of them)."""
    grid, log_space = search_space(problem, policy, parameter)
    trials: dict[float, float] = {}

    def objective(value: float) -> float:
        value = float(value)
        if value not in trials:
            trial = replace(policy, **{parameter: value})
            trials[value] = rollout(problem, trial, paths, paths.n_paths, chunk_paths=chunk_paths).objective_value
            if progress is not None:
                progress(1)
        return trials[value]

    scores = [objective(v) for v in grid]
    best = int(np.argmax(scores))
    low, high = grid[max(best - 1, 0)], grid[min(best + 1, len(grid) - 1)]
    to_x = np.log if log_space else (lambda v: v)
    from_x = np.exp if log_space else (lambda x: x)
    if high > low:
        found = minimize_scalar(
            lambda x: -objective(from_x(x)), bounds=(to_x(low), to_x(high)), method="bounded",
            options={"xatol": 0.02 * (to_x(high) - to_x(low)), "maxiter": REFINE_TRIALS},
        )
        objective(from_x(found.x))
    value, score = max(trials.items(), key=lambda item: item[1])
    return TuningResult(parameter, value, score, tuple(sorted(trials.items())))
