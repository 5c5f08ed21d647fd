"""Agents that observe the variance: the gap risk they take as known grows with it.

Outside fact (from memory; the Heston model's variance process, Heston 1993): the expected
integrated variance over a step of length dt from v is theta dt + (v - theta)(1 - exp(-kappa dt)) /
kappa, so E[R^2 | v] of the step's return R rises with v at the slope (1 - exp(-kappa dt)) / kappa
(up to O(dt^2) terms from the drift, far below the standard errors here). See
docs/references.md, "Minimum-variance hedges and the conditional move".
"""

from __future__ import annotations

import math

import numpy as np

from agents.backward import return_moment_sums
from agents.dataset import Exploration, collect_chunks
from agents.features import state_features
from agents.linear import LinearBasisAgent
from hedge_env.book import Book, MarkParameters, OptionLeg
from hedge_env.frictions import Frictions
from hedge_env.market import HestonMarket
from hedge_env.model_pricing import HestonPricer
from hedge_env.objective import Objective
from hedge_env.problem import HedgingProblem, Schedule

KAPPA, THETA, XI, RHO = 2.0, 0.04, 0.5, -0.7
MARKET = HestonMarket(spot=100.0, drift=0.0, initial_variance=0.04, mean_reversion=KAPPA, long_run_variance=THETA,
                      vol_of_vol=XI, correlation=RHO, variance_observed=True)


def _problem(steps: int) -> HedgingProblem:
    book = Book((OptionLeg("call", 100.0, 30, -10.0, 100.0),))
    return HedgingProblem(book, MarkParameters(volatility=0.2), Frictions(cost_rate=0.0), objective=Objective(0.001),
                          schedule=Schedule(steps, 1.0), mark_model=HestonPricer(KAPPA, THETA, XI, RHO),
                          mark_state_column=3)


def test_the_second_moment_of_the_move_rises_with_the_observed_variance_at_the_heston_slope():
    # 20,000 paths x 30 daily steps. The slope's standard error is clustered by path (a path's
    # steps share its variance), from the same sample.
    problem = _problem(30)
    chunks = list(collect_chunks(problem, MARKET, 20_000, 5, Exploration(), chunk_paths=20_000))
    agent = LinearBasisAgent(problem, factor_names=("variance",)).fit(chunks[0])
    chunk = chunks[0]
    r = chunk.next_obs[..., 0] / chunk.obs[..., 0] - 1.0
    x = chunk.obs[..., 3]
    residual = r * r - (agent.mean_squared_return_ + agent.variance_slope_ * (x - agent.mean_variance_))
    centred = x - x.mean()
    per_path = (centred * residual).sum(axis=0)
    error = math.sqrt((per_path ** 2).sum()) / (centred ** 2).sum()
    theory = -math.expm1(-KAPPA * problem.dt_years) / KAPPA
    assert abs(agent.variance_slope_ - theory) <= 4 * error
    assert error < 0.05 * theory  # precise enough to tell the slope from none
    assert return_moment_sums(chunk, problem).xr2 == 0.0  # blind: no variance, no line


def test_an_agent_that_sees_the_variance_takes_more_gap_risk_as_known_where_it_is_higher():
    # The known part's curvature in the gap, -kappa (N S)^2 E[R^2 | v], at two variances; a blind
    # agent's does not move. (The control variate against the same conditional moment keeps the
    # fitted model from cancelling it: the defect this guards against.)
    problem = _problem(5)
    chunk = next(collect_chunks(problem, MARKET, 4_000, 2, Exploration()))
    seeing = LinearBasisAgent(problem, factor_names=("variance",)).fit(chunk)
    # A model that cannot follow the variance keeps the mean moment.
    narrow = LinearBasisAgent(problem, basis=("gap", "gap^2"), factor_names=("variance",)).fit(chunk)
    assert seeing.variance_slope_ > 0 and narrow.variance_slope_ == 0.0
    blind = LinearBasisAgent(problem).fit(chunk)
    curvature = {}
    for name, agent in (("seeing", seeing), ("blind", blind)):
        for v in (0.02, 0.08):
            obs = np.array([[1.0, problem.years_to_horizon(4), 0.0, v]])
            state = state_features(problem, obs, tuple(agent.factor_names))
            g = agent.move_
            q = agent._known(state, state.hedge[:, None] + np.array([[-g, 0.0, g]]))[0]
            curvature[name, v] = (q[0] + q[2] - 2 * q[1]) / g ** 2
    n_spot = problem.notional_shares * 100.0
    expected = -0.001 * n_spot ** 2 * seeing.variance_slope_ * (0.08 - 0.02)
    assert math.isclose(curvature["seeing", 0.08] - curvature["seeing", 0.02], expected, rel_tol=1e-9)
    assert math.isclose(curvature["blind", 0.08], curvature["blind", 0.02], rel_tol=1e-12)
