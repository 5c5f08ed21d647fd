"""The grid optimum under exponential utility (agents.grid_dp with utility="exponential").

References, named beside each check:
- Bellman's principle (identity): the certainty equivalent at the start is that of the policy it
  defines, so it must match the held-out certainty equivalent -1/gamma log mean exp(-gamma P&L)
  within Monte Carlo error (delta-method standard error from the same sample).
- Boyle and Emanuel (1980), from memory: the variance of the error of delta hedging at discrete
  times is proportional to the rehedging interval, so with no costs the certainty equivalent of a
  hedged sold option tends to 0 like dt: the indifference price tends to the Black-Scholes price
  (Hodges and Neuberger 1989).
"""

from __future__ import annotations

import math
from dataclasses import replace

import numpy as np
import pytest

from agents.grid_dp import GridDPAgent
from hedge_env.book import Book, OptionLeg
from hedge_env.env import default_problem
from hedge_env.frictions import Frictions
from hedge_env.objective import Objective
from hedge_env.problem import Schedule
from hedge_env.rollout import rollout_many


def _certainty_equivalent(pnl: np.ndarray, gamma: float) -> tuple[float, float]:
    """-1/gamma log mean exp(-gamma X) and its delta-method standard error."""
    e = np.exp(-gamma * pnl)
    return -math.log(e.mean()) / gamma, e.std(ddof=1) / math.sqrt(e.size) / e.mean() / gamma


def test_the_exponential_grid_start_value_is_its_own_held_out_certainty_equivalent_and_beats_mean_variance():
    problem, market = default_problem()
    problem = replace(problem, frictions=Frictions(cost_rate=0.005), objective=Objective(risk_aversion=1.0))
    exponential = GridDPAgent(problem, drift=market.drift, volatility=market.volatility, utility="exponential").fit()
    mean_variance = GridDPAgent(problem, drift=market.drift, volatility=market.volatility).fit()
    results = rollout_many(problem, {"exp": exponential, "mv": mean_variance}, market, 100_000, 99)
    held, error = _certainty_equivalent(results["exp"].pnl, 1.0)
    start = exponential.value(np.array([[1.0, problem.horizon_years, 0.0]]))[0]
    assert abs(start - held) <= 4 * error
    other, other_error = _certainty_equivalent(results["mv"].pnl, 1.0)
    assert held - other > 4 * (error + other_error)  # the optimum of this objective does better on it


def test_with_no_costs_the_certainty_equivalent_of_a_hedged_sold_call_shrinks_like_the_rehedging_interval():
    problem, _ = default_problem()
    values = []
    for steps, step_days in ((10, 1.0), (20, 0.5), (40, 0.25)):
        hedged = replace(problem, book=Book((OptionLeg("call", 100.0, 10, -1.0),)), frictions=Frictions(),
                         objective=Objective(risk_aversion=1.0), schedule=Schedule(steps, step_days))
        agent = GridDPAgent(hedged, drift=0.0, volatility=0.2, utility="exponential").fit()
        values.append(agent.value(np.array([[1.0, hedged.horizon_years, 0.0]]))[0])
    assert all(v < 0 for v in values)
    assert values[1] / values[0] == pytest.approx(0.5, abs=0.05)
    assert values[2] / values[1] == pytest.approx(0.5, abs=0.05)
    assert abs(values[2]) < 0.02 * 1.32  # against a Black-Scholes premium of about 1.32


def test_exponential_utility_needs_a_risk_aversion():
    problem, _ = default_problem()
    with pytest.raises(ValueError, match="exponential utility needs objective.risk_aversion > 0"):
        GridDPAgent(replace(problem, objective=Objective(0.0)), utility="exponential").fit()
