"""The hedges at the mark model's Greeks: model_delta and Heston's minimum_variance_delta.

Outside facts (from memory): under Heston the variance-minimising hedge over an instant is
dV/dS + rho xi / S dV/dv (the regression of dV on dS, the variance moving with the spot through
rho); it hedges better than the model delta dV/dS when spot and variance move together. Under
Merton's jump diffusion it is (sigma^2 dV/dS + lambda/S E[(e^z - 1)(V(S e^z) - V(S))]) /
(sigma^2 + lambda E[(e^z - 1)^2]) (Cont and Tankov 2004, quadratic hedging in jump models;
docs/references.md, "Minimum-variance hedges and the conditional move").
"""

from __future__ import annotations

import math

import numpy as np
import pytest

from agents.baselines import MinimumVarianceDelta, ModelDelta
from hedge_env.book import Book, MarkParameters, OptionLeg
from hedge_env.frictions import Frictions
from hedge_env.market import GivenPaths, HestonMarket, MertonMarket
from hedge_env.model_pricing import HestonPricer, MertonPricer
from hedge_env.problem import HedgingProblem, Schedule
from hedge_env.rollout import rollout

KAPPA, THETA, XI, RHO = 2.0, 0.04, 0.5, -0.7
PRICER = HestonPricer(KAPPA, THETA, XI, RHO)
MARKET = HestonMarket(spot=100.0, drift=0.0, initial_variance=0.04, mean_reversion=KAPPA, long_run_variance=THETA,
                      vol_of_vol=XI, correlation=RHO, variance_observed=True)


def problem(steps: int = 30) -> HedgingProblem:
    book = Book((OptionLeg("call", 100.0, steps, -10.0, 100.0),))
    return HedgingProblem(book, MarkParameters(volatility=0.2), Frictions(cost_rate=0.0), schedule=Schedule(steps, 1.0),
                          mark_model=PRICER, mark_state_column=3)


def test_minimum_variance_delta_is_the_regression_slope_of_the_option_on_the_spot_over_an_instant():
    # From one state, one-hour QE moves (400,000 paths): the least-squares slope of dV on dS, with
    # its standard error from the same sample. (At a whole day the O(dt) drift of the slope from the
    # instantaneous hedge is already several standard errors: the formula is the instant's.)
    dt, tau = 1 / (365 * 24), 30 / 365
    paths = HestonMarket(spot=100.0, drift=0.0, initial_variance=0.04, mean_reversion=KAPPA, long_run_variance=THETA,
                         vol_of_vol=XI, correlation=RHO).generate(400_000, 1, dt, seed=1)
    spot, variance = paths.spot[:, 1], paths.factors["variance"][:, 1]
    value, delta, vega = PRICER.value_delta_vega(100.0, 100.0, tau, 0.04, True, exact=True)
    moved = PRICER.value_delta_vega(spot, 100.0, tau - dt, variance, True)[0]
    d_spot, d_value = spot - 100.0, moved - value
    slope = np.cov(d_value, d_spot)[0, 1] / np.var(d_spot, ddof=1)
    error = math.sqrt(np.var(d_value - slope * d_spot) / (d_spot.size * np.var(d_spot)))
    formula = float(delta + RHO * XI / 100.0 * vega)
    assert abs(slope - formula) <= 4 * error
    assert abs(slope - float(delta)) > 100 * error  # the model delta is not the variance-minimising hedge


def test_merton_minimum_variance_delta_is_the_regression_slope_of_the_option_on_the_spot_jumps_included():
    # From one state, 2,000,000 one-hour Merton moves with frequent large jumps (5 a year, log size
    # N(-0.1, 0.1^2)): about 1,100 jumps. The slope's standard error is heteroskedasticity-robust
    # (White's): the jumps make the residuals heavy-tailed, and the textbook formula would be 40
    # times too small.
    lam, mean, std, sigma, dt, tau = 5.0, -0.1, 0.1, 0.2, 1 / (365 * 24), 30 / 365
    pricer = MertonPricer(sigma, lam, mean, std)
    paths = MertonMarket(spot=100.0, drift=0.0, volatility=sigma, jump_intensity=lam, jump_mean=mean,
                         jump_std=std).generate(2_000_000, 1, dt, seed=1)
    d_spot = paths.spot[:, 1] - 100.0
    d_value = (pricer.value_delta_vega(paths.spot[:, 1], 100.0, tau - dt, None, True)[0]
               - pricer.value_delta_vega(100.0, 100.0, tau, None, True, exact=True)[0])
    slope = np.cov(d_value, d_spot)[0, 1] / np.var(d_spot, ddof=1)
    x = d_spot - d_spot.mean()
    residual = d_value - d_value.mean() - slope * x
    error = math.sqrt(((x * residual) ** 2).sum()) / (x * x).sum()
    book = Book((OptionLeg("call", 100.0, 30, 1.0),))
    hedging = HedgingProblem(book, MarkParameters(volatility=0.25), Frictions(cost_rate=0.0),
                             schedule=Schedule(30, 1.0), mark_model=pricer)
    obs = np.array([[1.0, tau, 0.0]])
    formula = -float(MinimumVarianceDelta(hedging).act(obs)[0])  # the hedge of a long call: minus its ratio
    model_delta = -float(ModelDelta(hedging).act(obs)[0])
    assert abs(slope - formula) <= 4 * error
    assert abs(slope - model_delta) > 20 * error  # jumps pull the variance-minimising hedge far from dV/dS


def test_minimum_variance_delta_hedges_with_lower_pnl_variance_than_the_model_delta():
    # Zero costs, 20,000 Heston paths: per path d_i = (A_i - mean A)^2 - (B_i - mean B)^2 estimates
    # Var A - Var B; its 95% interval (mean +- 1.96 standard errors) must lie below zero.
    hedging = problem()
    pnl = {}
    for policy in (MinimumVarianceDelta(hedging), ModelDelta(hedging)):
        pnl[policy.name] = rollout(hedging, policy, MARKET, 20_000, seed=7).pnl
    a, b = pnl["minimum_variance_delta"], pnl["model_delta"]
    d = (a - a.mean()) ** 2 - (b - b.mean()) ** 2
    assert d.mean() + 1.96 * d.std(ddof=1) / math.sqrt(d.size) < 0


def test_model_delta_from_the_observation_is_the_steps_delta():
    hedging = problem()
    paths = GivenPaths(MARKET.generate(500, 30, hedging.dt_years, seed=3), ("variance",))
    held = rollout(hedging, ModelDelta(hedging), paths, 500, keep_holdings=True).holdings
    # act (from the observed variance) and act_with_delta (the step's delta) name the same targets.
    again = rollout(hedging, _Plain(ModelDelta(hedging)), paths, 500, keep_holdings=True).holdings
    np.testing.assert_allclose(held, again, rtol=0, atol=1e-9)


class _Plain:
    """A policy with only ``act``: the rollout cannot hand it the step's delta."""

    def __init__(self, policy):
        self.policy, self.name = policy, policy.name

    def act(self, obs):
        return self.policy.act(obs)


def test_model_hedges_refuse_a_problem_whose_state_they_cannot_see():
    blind = HedgingProblem(Book((OptionLeg("call", 100.0, 30, -1.0),)), mark_model=PRICER)
    with pytest.raises(ValueError, match="variance observed"):
        ModelDelta(blind)
    with pytest.raises(ValueError, match="variance observed"):
        MinimumVarianceDelta(blind)


def test_a_band_around_the_minimum_variance_delta_trades_only_outside_it():
    from agents.baselines import FixedBand

    hedging = problem()
    band = FixedBand(hedging, half_width=0.05, center="minimum_variance_delta")
    assert band.factor_names == ("variance",)
    center = MinimumVarianceDelta(hedging)
    obs = np.column_stack([np.full(5, 1.02), np.full(5, 20 / 365), np.linspace(-1.0, 0.0, 5), np.full(5, 0.05)])
    hedge = center.act(obs)
    expected = np.clip(obs[:, 2], hedge - 0.05, hedge + 0.05)
    np.testing.assert_allclose(band.act(obs), expected, rtol=0, atol=1e-12)
    with pytest.raises(ValueError, match="band center"):
        FixedBand(hedging, center="gamma")
