"""The step with model marks: the book marked at the simulated model's own price.

Outside fact (from memory; a martingale's increments are uncorrelated): on risk-neutral paths
(drift = rate - dividend yield, here all 0) and with no costs, the book marked at the model's price
is a martingale, and so is the gain of any hedge in the underlying; the step P&Ls of a hedged book
are then uncorrelated, so the per-step objective, which sums squared step P&Ls, sees the whole
variance of the P&L. Marked at one Black-Scholes volatility under Heston the marks are no martingale
and the step P&Ls are correlated (the issue this fixes measured about half the variance seen).
"""

from __future__ import annotations

import math
from dataclasses import replace

import numpy as np
import pytest

from hedge_env.book import Book, MarkParameters, OptionLeg
from hedge_env.frictions import Frictions
from hedge_env.market import HestonMarket, MertonMarket
from hedge_env.model_pricing import HestonPricer, MertonPricer
from hedge_env.problem import HedgingProblem, Schedule
from hedge_env.step import hedge_step, initial_state

PATHS, STEPS = 20_000, 20


def problem_for(mark_model) -> HedgingProblem:
    book = Book((OptionLeg("call", 100.0, STEPS, -10.0, 100.0),))
    return HedgingProblem(book, MarkParameters(volatility=0.2), Frictions(cost_rate=0.0), schedule=Schedule(STEPS, 1.0),
                          mark_model=mark_model)


def step_pnls(problem: HedgingProblem, paths) -> np.ndarray:
    """(paths, steps) step P&Ls of the hedge at the marks' own delta (the step's delta)."""
    state_paths = paths.factors.get(problem.mark_factor)
    state = initial_state(problem, paths.spot[:, 0], None if state_paths is None else state_paths[:, 0])
    out = np.empty((paths.n_paths, STEPS))
    for k in range(STEPS):
        outcome = hedge_step(problem, state, -state.delta, paths.spot[:, k + 1],
                             None if state_paths is None else state_paths[:, k + 1])
        out[:, k], state = outcome.pnl, outcome.state
    return out


def cross_term(pnl: np.ndarray) -> tuple[float, float]:
    """Mean over paths of (sum of step P&Ls)^2 - sum of squared step P&Ls (twice the summed
    covariances of different steps, when the means are 0), and its standard error."""
    per_path = pnl.sum(axis=1) ** 2 - (pnl**2).sum(axis=1)
    return float(per_path.mean()), float(per_path.std(ddof=1) / math.sqrt(per_path.size))


HESTON = HestonMarket(spot=100.0, drift=0.0, initial_variance=0.04, mean_reversion=2.0, long_run_variance=0.04,
                      vol_of_vol=0.8, correlation=-0.7)


def test_under_heston_model_marks_make_step_pnls_uncorrelated_black_scholes_marks_do_not():
    paths = HESTON.generate(PATHS, STEPS, 1 / 365, seed=3)
    pricer = HestonPricer(2.0, 0.04, 0.8, -0.7)
    model, model_se = cross_term(step_pnls(problem_for(pricer), paths))
    assert abs(model) <= 4 * model_se
    black, black_se = cross_term(step_pnls(problem_for(None), paths))
    assert abs(black) > 4 * black_se


def test_under_merton_model_marks_make_step_pnls_uncorrelated():
    market = MertonMarket(spot=100.0, drift=0.0, volatility=0.2, jump_intensity=3.0, jump_mean=-0.05, jump_std=0.1)
    paths = market.generate(PATHS, STEPS, 1 / 365, seed=4)
    model, model_se = cross_term(step_pnls(problem_for(MertonPricer(0.2, 3.0, -0.05, 0.1)), paths))
    assert abs(model) <= 4 * model_se


def test_model_marks_start_at_the_model_price_and_settle_at_the_payoff():
    pricer = HestonPricer(2.0, 0.04, 0.8, -0.7)
    problem = problem_for(pricer)
    paths = HESTON.generate(200, STEPS, 1 / 365, seed=5)
    state = initial_state(problem, paths.spot[:, 0], paths.factors["variance"][:, 0])
    price = pricer.value_delta_vega(100.0, 100.0, STEPS / 365, 0.04, True, exact=True)[0]
    # The table's mark: within 1e-6 of spot per share of the integral (docs/references.md).
    np.testing.assert_allclose(state.mark, -1000.0 * price, rtol=0, atol=1000.0 * 1e-6 * 100.0)
    premium = state.cash.copy()
    np.testing.assert_array_equal(premium, -state.mark)
    total = np.zeros(200)
    for k in range(STEPS):
        outcome = hedge_step(problem, state, np.zeros(200), paths.spot[:, k + 1], paths.factors["variance"][:, k + 1])
        total += outcome.pnl
        state = outcome.state
    # Unhedged to expiry: premium received less the payoff paid.
    payoff = 1000.0 * np.maximum(paths.spot[:, -1] - 100.0, 0.0)
    np.testing.assert_allclose(total, premium - payoff, rtol=0, atol=1e-6)


def test_heston_marks_need_the_variance():
    problem = problem_for(HestonPricer(2.0, 0.04, 0.8, -0.7))
    with pytest.raises(ValueError, match="variance per path"):
        initial_state(problem, np.array([100.0]), None)
    assert replace(problem, mark_model=None).mark_factor == "mark_volatility"
    assert problem.mark_factor == "variance"
