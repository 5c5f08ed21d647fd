"""The grid optimum under Heston (agents.grid_heston) against its own held-out objective and theory.

References, named beside each check:
- Bellman's principle (identity): V_0 at the start is the expected sum of rewards of the policy it
  defines, so it must match that policy's held-out objective within Monte Carlo error.
- From memory (the mean-variance one-step problem): with no trading costs and no drift the best
  hedge of each step minimises the variance of the step's hedged P&L, the minimum-variance delta
  (docs/references.md, "Minimum-variance hedges and the conditional move"), up to the step being a
  day rather than an instant.
Monte Carlo checks bound differences by standard errors of the same sample.
"""

from __future__ import annotations

import math
from functools import lru_cache

import numpy as np
import pytest

from agents.baselines import MinimumVarianceDelta
from agents.grid_heston import HestonGridDPAgent
from hedge_env.book import Book, MarkParameters, OptionLeg
from hedge_env.frictions import Frictions
from hedge_env.market import HestonMarket
from hedge_env.model_pricing import HestonPricer
from hedge_env.objective import Objective
from hedge_env.problem import HedgingProblem, Schedule
from hedge_env.rollout import rollout_many

KAPPA, THETA, XI, RHO = 2.0, 0.04, 0.5, -0.7
PATHS, SEED = 20_000, 11


def _market(drift: float) -> HestonMarket:
    return HestonMarket(spot=100.0, drift=drift, initial_variance=0.04, mean_reversion=KAPPA,
                        long_run_variance=THETA, vol_of_vol=XI, correlation=RHO, variance_observed=True)


@lru_cache(maxsize=None)
def _solved(cost: float, drift: float):
    """Short 10 ATM 10-day calls (1,000 shares), daily rehedges, kappa 0.002; a coarser grid than the
    default (61 x 21 x 101: its value at the start is within 0.3% of the default's here)."""
    problem = HedgingProblem(Book((OptionLeg("call", 100.0, 10, -10.0, 100.0),)), MarkParameters(volatility=0.2),
                             Frictions(cost_rate=cost), objective=Objective(0.002), schedule=Schedule(10, 1.0),
                             mark_model=HestonPricer(KAPPA, THETA, XI, RHO), mark_state_column=3)
    agent = HestonGridDPAgent(problem, _market(drift), spot_points=61, variance_points=21, holding_points=101).fit()
    results = rollout_many(problem, {"grid": agent, "mv": MinimumVarianceDelta(problem)}, _market(drift), PATHS,
                           SEED)
    return problem, agent, results["grid"].reward, results["mv"].reward


def _standard_error(x: np.ndarray) -> float:
    return float(x.std(ddof=1) / math.sqrt(x.size))


def test_the_heston_grid_value_at_the_start_is_its_own_held_out_objective_and_beats_the_minimum_variance_delta():
    problem, agent, grid, mv = _solved(0.002, 0.05)
    start = agent.value(np.array([[1.0, problem.horizon_years, 0.0, 0.04]]))[0]
    assert abs(start - grid.mean()) <= 4 * _standard_error(grid)
    d = grid - mv
    assert d.mean() - 1.96 * _standard_error(d) > 0  # under costs the optimum gains over the reference hedge


def test_with_no_costs_and_no_drift_the_heston_grid_hedges_at_the_minimum_variance_delta():
    problem, agent, grid, mv = _solved(0.0, 0.0)
    d = grid - mv
    assert abs(d.mean()) <= 4 * _standard_error(d)
    rng = np.random.default_rng(0)
    n = 500
    obs = np.column_stack([np.exp(rng.normal(0.0, 0.03, n)), np.full(n, problem.years_to_horizon(5)),
                           rng.uniform(-1.0, 0.0, n), rng.uniform(0.02, 0.08, n)])
    gap = (agent.act(obs) - MinimumVarianceDelta(problem).act(obs)) * problem.notional_shares
    spacing = agent.holdings_[1] - agent.holdings_[0]
    # On the holding grid, up to the day's difference from the instant's hedge.
    assert np.abs(gap).max() <= 1.5 * spacing and np.abs(gap).mean() <= 0.5 * spacing


def test_the_heston_grid_refuses_a_problem_without_the_variance():
    pricer = HestonPricer(KAPPA, THETA, XI, RHO)
    problem = HedgingProblem(Book((OptionLeg("call", 100.0, 10, -1.0),)), mark_model=pricer)
    with pytest.raises(ValueError, match="variance observed"):
        HestonGridDPAgent(problem).fit()


def test_under_exponential_utility_the_heston_grid_start_value_is_its_own_held_out_certainty_equivalent():
    # Bellman's principle under exponential utility: the certainty equivalent at the start is that of
    # the policy it defines, -1/gamma log mean exp(-gamma P&L) on held-out paths, within 4 delta-method
    # standard errors; and it gains over the minimum-variance delta on that certainty equivalent
    # (paired bootstrap 95% interval above 0).
    from dataclasses import replace

    from rehedge.compare import certainty_equivalent_bootstrap

    base, _, _, _ = _solved(0.002, 0.05)
    gamma = 0.002
    problem = replace(base, objective=Objective(gamma, kind="exponential"))
    agent = HestonGridDPAgent(problem, _market(0.05), spot_points=61, variance_points=21, holding_points=101).fit()
    results = rollout_many(problem, {"grid": agent, "mv": MinimumVarianceDelta(problem)}, _market(0.05), PATHS, SEED)
    start = agent.value(np.array([[1.0, problem.horizon_years, 0.0, 0.04]]))[0]
    weights = np.exp(-gamma * results["grid"].pnl)
    error = weights.std(ddof=1) / math.sqrt(weights.size) / weights.mean() / gamma
    assert abs(start - results["grid"].objective_value) <= 4 * error
    versus = certainty_equivalent_bootstrap({name: r.pnl for name, r in results.items()}, "mv", gamma, 1000, seed=3)
    assert versus["grid"]["ci_low"] > 0
