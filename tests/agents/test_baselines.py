"""Classic hedging rules (agents.baselines) against their published formulas, computed here."""

from __future__ import annotations

import math

import numpy as np
import pytest

from agents.baselines import (
    DeltaHedge,
    FixedBand,
    LelandDelta,
    NoHedge,
    WhalleyWilmottBand,
    leland_volatility,
)
from hedge_env import pricing
from hedge_env.book import Book, MarkParameters, OptionLeg
from hedge_env.frictions import Frictions
from hedge_env.problem import HedgingProblem, Schedule

DAYS = 365.0
VOL, RATE, DIVIDEND = 0.2, 0.03, 0.01
COST_RATE = 0.002
STEPS, STEP_DAYS = 30, 1.0
HORIZON_DAYS = STEPS * STEP_DAYS
SPOTS = np.array([88.0, 95.0, 100.0, 104.0, 112.0])


def make_problem(legs, cost_rate=COST_RATE) -> HedgingProblem:
    return HedgingProblem(
        book=Book(tuple(legs)),
        marks=MarkParameters(volatility=VOL, rate=RATE, dividend_yield=DIVIDEND),
        frictions=Frictions(cost_rate=cost_rate),
        schedule=Schedule(steps=STEPS, step_days=STEP_DAYS),
        reference_spot=100.0,
    )


# Short 2 calls x 50 shares expiring at the horizon: notional 100 shares.
SHORT_CALL = OptionLeg("call", 100.0, HORIZON_DAYS, quantity=-2.0, multiplier=50.0)
# Long 1 put x 50 shares expiring mid-way (day 14).
LONG_PUT = OptionLeg("put", 97.0, 14.0, quantity=1.0, multiplier=50.0)


def observations(problem, spots, t_days, holding_per_notional, dtype=np.float64) -> np.ndarray:
    t_days = np.broadcast_to(np.asarray(t_days, dtype=float), np.shape(spots))
    years_left = (problem.schedule.horizon_days - t_days) / problem.marks.days_per_year
    holding = np.broadcast_to(np.asarray(holding_per_notional, dtype=float), np.shape(spots))
    return np.column_stack([np.asarray(spots) / problem.reference_spot, years_left, holding]).astype(dtype)


def bs_delta(spot, leg, t_days, vol=VOL):
    tau = (leg.expiry_days - t_days) / DAYS
    return pricing.delta(spot, leg.strike, tau, vol, RATE, DIVIDEND, leg.is_call)


# --- Leland ----------------------------------------------------------------------


@pytest.mark.parametrize("written", [True, False])
def test_leland_volatility_matches_leland_1985_formula(written):
    # Leland (1985), "Option pricing and replication with transactions costs", J. Finance, from
    # memory: sigma_L^2 = sigma^2 (1 +/- sqrt(2/pi) k / (sigma sqrt(dt))), k the round-trip cost
    # rate; + for a written option, - for a bought one.
    sigma, k, dt = 0.2, 0.004, 1.0 / 365.0
    number = math.sqrt(2.0 / math.pi) * k / (sigma * math.sqrt(dt))
    expected = math.sqrt(sigma**2 * (1.0 + number if written else 1.0 - number))
    assert leland_volatility(sigma, k, dt, written) == pytest.approx(expected, rel=1e-14)
    assert (expected > sigma) == written


def test_leland_volatility_is_floored_when_the_adjustment_exceeds_the_variance():
    # A bought option with a Leland number above 1 has no real adjusted volatility.
    assert leland_volatility(0.05, 0.05, 1.0 / 365.0, written=False) == pytest.approx(1e-6, rel=1e-12)


def test_leland_policy_targets_black_scholes_delta_at_leland_volatility_per_side_of_the_book():
    # Leland (1985), from memory: hedge a written option at the raised volatility, a bought one at
    # the lowered volatility; k is the round trip, twice the one-way cost rate.
    problem = make_problem([SHORT_CALL, LONG_PUT])
    t_days = 5.0
    obs = observations(problem, SPOTS, t_days, 0.0)
    dt = STEP_DAYS / DAYS
    number = math.sqrt(2.0 / math.pi) * (2.0 * COST_RATE) / (VOL * math.sqrt(dt))
    vol_written = math.sqrt(VOL**2 * (1.0 + number))
    vol_bought = math.sqrt(VOL**2 * (1.0 - number))
    book_delta = (SHORT_CALL.shares * bs_delta(SPOTS, SHORT_CALL, t_days, vol_written)
                  + LONG_PUT.shares * bs_delta(SPOTS, LONG_PUT, t_days, vol_bought))
    expected = -book_delta / problem.notional_shares
    np.testing.assert_allclose(LelandDelta(problem).act(obs), expected, rtol=1e-12, atol=1e-15)
    # Not the plain delta: the adjustment is material at 20 bps round trip and daily rehedging.
    plain = DeltaHedge(problem).act(obs)
    assert np.abs(LelandDelta(problem).act(obs) - plain).max() > 1e-3


def test_leland_policy_with_only_a_short_call_hedges_its_delta_at_the_raised_volatility():
    problem = make_problem([SHORT_CALL])
    obs = observations(problem, SPOTS, 0.0, 0.0)
    vol_leland = leland_volatility(VOL, 2.0 * COST_RATE, problem.dt_years, written=True)
    # The hedge of a short call is long its delta: -(-100 shares x delta) / 100 shares.
    np.testing.assert_allclose(LelandDelta(problem).act(obs), bs_delta(SPOTS, SHORT_CALL, 0.0, vol_leland),
                               rtol=1e-12)


# --- Whalley-Wilmott ------------------------------------------------------------


@pytest.mark.parametrize("t_days, spots", [
    (0.0, SPOTS), (12.0, SPOTS), (27.0, np.array([98.0, 99.0, 100.0, 101.5, 102.0])),
])
def test_whalley_wilmott_band_edges_match_the_1997_half_width(t_days, spots):
    # Whalley and Wilmott (1997), "An asymptotic analysis of an optimal hedging model for option
    # pricing with transaction costs", Math. Finance, from memory: no trade while
    # |holding - delta| <= (3/2 exp(-r tau) c S Gamma^2 / gamma)^(1/3), Gamma of the position.
    problem = make_problem([SHORT_CALL])
    risk_aversion = 0.02
    policy = WhalleyWilmottBand(problem, risk_aversion=risk_aversion)
    notional = problem.notional_shares
    tau = (HORIZON_DAYS - t_days) / DAYS
    gamma = SHORT_CALL.shares * pricing.gamma(spots, SHORT_CALL.strike, tau, VOL, RATE, DIVIDEND)
    half_width = (1.5 * math.exp(-RATE * tau) * COST_RATE * spots * gamma**2 / risk_aversion) ** (1.0 / 3.0)
    center = -SHORT_CALL.shares * bs_delta(spots, SHORT_CALL, t_days)
    assert (half_width > 0.01).all()  # shares: a band wide enough to probe (near the money so late)
    for side in (-1.0, 1.0):
        inside = center + side * 0.999 * half_width
        outside = center + side * 1.001 * half_width
        np.testing.assert_allclose(policy.act(observations(problem, spots, t_days, inside / notional)),
                                   inside / notional, rtol=1e-12)
        np.testing.assert_allclose(policy.act(observations(problem, spots, t_days, outside / notional)),
                                   (center + side * half_width) / notional, rtol=1e-9)
    np.testing.assert_allclose(policy.half_width_shares(spots, t_days), half_width, rtol=1e-9)


# --- delta and fixed band -----------------------------------------------------------


def test_delta_hedge_targets_minus_book_delta_per_notional_share():
    problem = make_problem([SHORT_CALL, LONG_PUT])
    t_days = 3.0
    obs = observations(problem, SPOTS, t_days, 0.3)
    book_delta = (SHORT_CALL.shares * bs_delta(SPOTS, SHORT_CALL, t_days)
                  + LONG_PUT.shares * bs_delta(SPOTS, LONG_PUT, t_days))
    np.testing.assert_allclose(DeltaHedge(problem).act(obs), -book_delta / 150.0, rtol=1e-12)


def test_delta_hedge_at_its_own_volatility_uses_that_volatility_not_the_mark():
    problem = make_problem([SHORT_CALL, LONG_PUT])
    t_days = 3.0
    obs = observations(problem, SPOTS, t_days, 0.0)
    own = 0.35
    book_delta = (SHORT_CALL.shares * bs_delta(SPOTS, SHORT_CALL, t_days, own)
                  + LONG_PUT.shares * bs_delta(SPOTS, LONG_PUT, t_days, own))
    policy = DeltaHedge(problem, volatility=own)
    np.testing.assert_allclose(policy.act(obs), -book_delta / 150.0, rtol=1e-12)
    # Given the mark-volatility delta (as the rollout passes it), it still prices at its own volatility.
    mark_delta = problem.book.value_and_delta(SPOTS, t_days, problem.marks)[1]
    np.testing.assert_allclose(policy.act_with_delta(obs, mark_delta), -book_delta / 150.0, rtol=1e-12)
    assert np.abs(policy.act(obs) - DeltaHedge(problem).act(obs)).max() > 1e-2


@pytest.mark.parametrize("make_policy", [
    lambda p: DeltaHedge(p),
    lambda p: DeltaHedge(p, volatility=0.3),
    lambda p: WhalleyWilmottBand(p, risk_aversion=0.05),
    lambda p: FixedBand(p, half_width=0.04),
], ids=["delta", "delta_own_vol", "whalley_wilmott", "fixed_band"])
def test_act_and_act_with_delta_give_the_same_targets(make_policy):
    problem = make_problem([SHORT_CALL, LONG_PUT])
    t_days = 9.0
    obs = observations(problem, SPOTS, t_days, np.linspace(-0.6, 0.6, SPOTS.size))
    mark_delta = problem.book.value_and_delta(SPOTS, t_days, problem.marks)[1]
    policy = make_policy(problem)
    np.testing.assert_allclose(policy.act_with_delta(obs, mark_delta), policy.act(obs), rtol=1e-14, atol=1e-15)


def test_fixed_band_keeps_holdings_inside_and_moves_outside_ones_to_the_nearest_edge():
    problem = make_problem([SHORT_CALL])
    half_width = 0.05
    policy = FixedBand(problem, half_width=half_width)
    spot = np.full(6, 100.0)
    center = float(-SHORT_CALL.shares * bs_delta(100.0, SHORT_CALL, 0.0) / problem.notional_shares)
    holdings = center + np.array([-0.2, -0.049, 0.0, 0.03, 0.0501, 0.4])
    expected = center + np.array([-0.05, -0.049, 0.0, 0.03, 0.05, 0.05])
    np.testing.assert_allclose(policy.act(observations(problem, spot, 0.0, holdings)), expected, rtol=1e-12)


# --- input forms: float32 rows at different times ---------------------------------------


ALL_BASELINES = {
    "no_hedge": lambda p: NoHedge(p),
    "delta": lambda p: DeltaHedge(p),
    "delta_own_vol": lambda p: DeltaHedge(p, volatility=0.3),
    "leland": lambda p: LelandDelta(p),
    "whalley_wilmott": lambda p: WhalleyWilmottBand(p, risk_aversion=0.05),
    "fixed_band": lambda p: FixedBand(p, half_width=0.04),
}


@pytest.mark.parametrize("name", list(ALL_BASELINES))
def test_baselines_accept_float32_rows_at_different_times_and_match_row_by_row(name):
    problem = make_problem([SHORT_CALL, LONG_PUT])
    policy = ALL_BASELINES[name](problem)
    # Times on the rehedge grid, one exactly at the put's expiry (day 14) and some after it.
    t_days = np.array([0.0, 3.0, 13.0, 14.0, 15.0, 29.0])
    spots = np.array([96.0, 101.0, 99.5, 94.0, 103.0, 100.5])
    obs = observations(problem, spots, t_days, np.linspace(-0.5, 0.7, t_days.size), dtype=np.float32)
    assert obs.dtype == np.float32 and np.unique(obs[:, 1]).size == t_days.size
    targets = policy.act(obs)
    assert targets.shape == (t_days.size,) and np.isfinite(targets).all()
    for i in range(t_days.size):
        single = policy.act(obs[i : i + 1])
        np.testing.assert_allclose(targets[i], single[0], rtol=1e-12, atol=1e-15, err_msg=f"row {i}")


def test_delta_hedge_on_float32_rows_drops_an_option_from_its_expiry_on():
    # Float32 time can land a hair before day 14; the put must count as expired there all the same.
    problem = make_problem([SHORT_CALL, LONG_PUT])
    t_days = np.array([13.0, 14.0, 20.0])
    spots = np.array([95.0, 95.0, 95.0])
    obs = observations(problem, spots, t_days, 0.0, dtype=np.float32)
    decoded_spot = obs[:, 0].astype(float) * problem.reference_spot
    call_only = -SHORT_CALL.shares * bs_delta(decoded_spot, SHORT_CALL, t_days) / 150.0
    put_part = -LONG_PUT.shares * bs_delta(decoded_spot[0], LONG_PUT, 13.0) / 150.0
    targets = DeltaHedge(problem).act(obs)
    np.testing.assert_allclose(targets[1:], call_only[1:], rtol=1e-6)
    np.testing.assert_allclose(targets[0], call_only[0] + put_part, rtol=1e-6)
