"""The accounting step (hedge_env.step): every P&L part against arithmetic written out by hand.

The reference numbers here are computed in the test itself, step by step, from
the accounting of docs/references.md ("Accounting") and the formulas in the
module docstring of hedge_env/step.py; only Black-Scholes prices and deltas
come from hedge_env.pricing (checked against QuantLib in its own tests).
"""

from __future__ import annotations

import math

import numpy as np
import pytest

from hedge_env import pricing
from hedge_env.book import Book, MarkParameters, OptionLeg
from hedge_env.frictions import Frictions
from hedge_env.market import GBMMarket
from hedge_env.objective import Objective
from hedge_env.problem import HedgingProblem, Schedule
from hedge_env.step import hedge_step, initial_state

# --- the hand-computed three-step case -----------------------------------------

DAYS_PER_YEAR = 365.0
STEP_DAYS = 7.0
MARK_VOLATILITY, MARK_RATE, MARK_DIVIDEND = 0.25, 0.03, 0.01
COST_RATE, FIXED_COST = 0.002, 0.05
IMPACT_ETA, IMPACT_BETA, PERMANENT_GAMMA, ADV_SHARES = 0.1, 0.5, 0.02, 10.0
CASH_RATE, BORROW_FEE, DIVIDEND_YIELD = 0.04, 0.05, 0.01
RISK_AVERSION = 0.5
CALL_STRIKE, CALL_EXPIRY_DAYS = 100.0, 21.0  # short, expires at the horizon (step 3)
PUT_STRIKE, PUT_EXPIRY_DAYS = 102.0, 14.0  # long, expires before the horizon (step 2)

# Two paths in one array: A ends with both options in the money and a short
# hedge at step 1; B ends with both out of the money, goes short at step 0
# and is flat before the unwind (so the unwind trades nothing).
EXOGENOUS = {"A": [100.0, 101.5, 99.0, 103.0], "B": [100.0, 98.0, 104.0, 97.0]}
TARGETS = {"A": [0.3, -0.4, 0.6], "B": [-0.2, 0.5, 0.0]}


def hand_problem(settlement: str) -> HedgingProblem:
    return HedgingProblem(
        book=Book((
            OptionLeg("call", CALL_STRIKE, CALL_EXPIRY_DAYS, quantity=-1.0),
            OptionLeg("put", PUT_STRIKE, PUT_EXPIRY_DAYS, quantity=1.0),
        )),
        marks=MarkParameters(MARK_VOLATILITY, MARK_RATE, MARK_DIVIDEND, DAYS_PER_YEAR),
        frictions=Frictions(
            cost_rate=COST_RATE, fixed_cost=FIXED_COST, impact_coefficient=IMPACT_ETA,
            impact_exponent=IMPACT_BETA, permanent_impact=PERMANENT_GAMMA, adv_shares=ADV_SHARES,
            cash_rate=CASH_RATE, borrow_fee=BORROW_FEE, dividend_yield=DIVIDEND_YIELD,
        ),
        objective=Objective(risk_aversion=RISK_AVERSION),
        schedule=Schedule(steps=3, step_days=STEP_DAYS, settlement=settlement),
        reference_spot=100.0,
    )


def _call(spot, t_days):
    tau = (CALL_EXPIRY_DAYS - t_days) / DAYS_PER_YEAR
    args = (spot, CALL_STRIKE, tau, MARK_VOLATILITY, MARK_RATE, MARK_DIVIDEND, True)
    return float(pricing.price(*args)), float(pricing.delta(*args))


def _put(spot, t_days):
    tau = (PUT_EXPIRY_DAYS - t_days) / DAYS_PER_YEAR
    args = (spot, PUT_STRIKE, tau, MARK_VOLATILITY, MARK_RATE, MARK_DIVIDEND, False)
    return float(pricing.price(*args)), float(pricing.delta(*args))


def hand_path(x: list[float], a: list[float], settlement: str) -> tuple[dict, list[dict]]:
    """The three steps of one path, written out; returns the initial state and one record per step."""
    dt = STEP_DAYS / DAYS_PER_YEAR
    sqrt_adv = math.sqrt(ADV_SHARES)  # adv ** beta with beta = 0.5
    interest = math.exp(CASH_RATE * dt) - 1.0  # continuously compounded cash rate over one step

    # t_0 = 0 days: short call (21 days left), long put (14 days left); cash = premium = -mark.
    s0 = x[0]
    call0, call_delta0 = _call(s0, 0.0)
    put0, put_delta0 = _put(s0, 0.0)
    mark0 = -call0 + put0
    delta0 = -call_delta0 + put_delta0
    cash0 = -mark0
    start = dict(spot=s0, impact=1.0, holding=0.0, cash=cash0, mark=mark0, delta=delta0)

    # Step 0: t = 0 -> 7 days. Holding 0 -> a0.
    trade = a[0] - 0.0
    cost = COST_RATE * abs(trade) * s0 + (FIXED_COST if trade != 0 else 0.0)
    impact_cost = IMPACT_ETA * s0 * abs(trade) ** 1.5 / sqrt_adv
    # The trade fills halfway through its own permanent impact.
    impact_cost += 0.5 * trade * s0 * (math.exp(PERMANENT_GAMMA * trade / ADV_SHARES) - 1.0)
    impact1 = 1.0 * math.exp(PERMANENT_GAMMA * trade / ADV_SHARES)
    s1 = x[1] * impact1
    cash_after_trade = cash0 - trade * s0 - cost - impact_cost
    # Reported: the holding's gain from the trade's own move of the price is netted out of the impact
    # cost and left out of the hedge gain (frictions.py).
    own_gain = a[0] * (s1 - s1 / math.exp(PERMANENT_GAMMA * trade / ADV_SHARES))
    financing = (cash_after_trade * interest + a[0] * s0 * DIVIDEND_YIELD * dt
                 - BORROW_FEE * max(-a[0], 0.0) * s0 * dt)
    call1, call_delta1 = _call(s1, 7.0)
    put1, put_delta1 = _put(s1, 7.0)
    mark1 = -call1 + put1
    cash1 = cash_after_trade + financing
    step0 = dict(
        spot=s1, impact=impact1, holding=a[0], held=a[0], cash=cash1, mark=mark1,
        delta=-call_delta1 + put_delta1,
        hedge_gain=a[0] * (s1 - s0) - own_gain, book_change=mark1 - mark0, financing=financing,
        trading_cost=cost, impact_cost=impact_cost - own_gain, traded_shares=abs(trade), trades=int(trade != 0),
        pnl=(cash1 + a[0] * s1 + mark1) - (cash0 + 0.0 * s0 + mark0),  # wealth change
    )

    # Step 1: t = 7 -> 14 days. The put expires at 14 days: paid at its payoff, leaves the book.
    trade = a[1] - a[0]
    cost = COST_RATE * abs(trade) * s1 + (FIXED_COST if trade != 0 else 0.0)
    impact_cost = IMPACT_ETA * s1 * abs(trade) ** 1.5 / sqrt_adv
    # The trade fills halfway through its own permanent impact.
    impact_cost += 0.5 * trade * s1 * (math.exp(PERMANENT_GAMMA * trade / ADV_SHARES) - 1.0)
    impact2 = impact1 * math.exp(PERMANENT_GAMMA * trade / ADV_SHARES)
    s2 = x[2] * impact2
    cash_after_trade = cash1 - trade * s1 - cost - impact_cost
    own_gain = a[1] * (s2 - s2 / math.exp(PERMANENT_GAMMA * trade / ADV_SHARES))
    financing = (cash_after_trade * interest + a[1] * s1 * DIVIDEND_YIELD * dt
                 - BORROW_FEE * max(-a[1], 0.0) * s1 * dt)
    put_payoff = max(PUT_STRIKE - s2, 0.0)  # long one put: received
    call2, call_delta2 = _call(s2, 14.0)
    mark2 = -call2  # only the short call is left
    cash2 = cash_after_trade + put_payoff + financing
    step1 = dict(
        spot=s2, impact=impact2, holding=a[1], held=a[1], cash=cash2, mark=mark2, delta=-call_delta2,
        hedge_gain=a[1] * (s2 - s1) - own_gain, book_change=(mark2 + put_payoff) - mark1, financing=financing,
        trading_cost=cost, impact_cost=impact_cost - own_gain, traded_shares=abs(trade), trades=int(trade != 0),
        pnl=(cash2 + a[1] * s2 + mark2) - (cash1 + a[0] * s1 + mark1),
    )

    # Step 2: t = 14 -> 21 days, the horizon. The call expires; the hedge is unwound.
    trade = a[2] - a[1]
    cost = COST_RATE * abs(trade) * s2 + (FIXED_COST if trade != 0 else 0.0)
    impact_cost = IMPACT_ETA * s2 * abs(trade) ** 1.5 / sqrt_adv
    # The trade fills halfway through its own permanent impact.
    impact_cost += 0.5 * trade * s2 * (math.exp(PERMANENT_GAMMA * trade / ADV_SHARES) - 1.0)
    impact3 = impact2 * math.exp(PERMANENT_GAMMA * trade / ADV_SHARES)
    s3 = x[3] * impact3
    cash_after_trade = cash2 - trade * s2 - cost - impact_cost
    own_gain = a[2] * (s3 - s3 / math.exp(PERMANENT_GAMMA * trade / ADV_SHARES))
    financing = (cash_after_trade * interest + a[2] * s2 * DIVIDEND_YIELD * dt
                 - BORROW_FEE * max(-a[2], 0.0) * s2 * dt)
    call_in_the_money = s3 > CALL_STRIKE
    if settlement == "liquidate":
        # Pay the short call's payoff in cash; sell (or buy back) the whole holding at s3.
        unwind_trade = -a[2]
        settlement_cash = -max(s3 - CALL_STRIKE, 0.0) + a[2] * s3
    else:
        # Physical: exercised, the call takes one share for the strike; only the rest trades at s3.
        delivered = 1.0 if call_in_the_money else 0.0
        unwind_trade = -(a[2] - delivered)
        settlement_cash = delivered * CALL_STRIKE + (a[2] - delivered) * s3
    unwind = abs(unwind_trade)
    unwind_cost = COST_RATE * unwind * s3 + (FIXED_COST if unwind != 0 else 0.0)
    unwind_impact = IMPACT_ETA * s3 * unwind**1.5 / sqrt_adv
    unwind_impact += 0.5 * unwind_trade * s3 * (math.exp(PERMANENT_GAMMA * unwind_trade / ADV_SHARES) - 1.0)
    cash3 = cash_after_trade + financing + settlement_cash - unwind_cost - unwind_impact
    mark3 = 0.0
    step2 = dict(
        spot=s3, impact=impact3, holding=0.0, held=a[2], cash=cash3, mark=mark3, delta=0.0,
        hedge_gain=a[2] * (s3 - s2) - own_gain, book_change=-max(s3 - CALL_STRIKE, 0.0) - mark2, financing=financing,
        trading_cost=cost + unwind_cost, impact_cost=impact_cost + unwind_impact - own_gain,
        traded_shares=abs(trade) + unwind, trades=int(trade != 0) + int(unwind != 0),
        pnl=cash3 - (cash2 + a[1] * s2 + mark2),  # holding 0 and no book left after the horizon
    )
    records = [step0, step1, step2]
    for record in records:
        record["reward"] = record["pnl"] - 0.5 * RISK_AVERSION * record["pnl"] ** 2
    return start, records


STATE_FIELDS = ("spot", "impact", "holding", "cash", "mark", "delta")
OUTCOME_FIELDS = ("held", "pnl", "reward", "hedge_gain", "book_change", "financing", "trading_cost",
                  "impact_cost", "traded_shares", "trades")


def _close(actual, expected):
    return actual == pytest.approx(expected, rel=1e-12, abs=1e-12)


def _compare(outcome_state, outcome, record, index=None, label=""):
    pick = (lambda v: float(np.asarray(v)[index])) if index is not None else float
    for name in STATE_FIELDS:
        assert _close(pick(getattr(outcome_state, name)), record[name]), f"{label} state.{name}"
    for name in OUTCOME_FIELDS:
        assert _close(pick(getattr(outcome, name)), record[name]), f"{label} {name}"


def test_hand_case_parts_sum_to_the_wealth_change_and_path_a_visits_every_branch():
    # Guards the hand case itself: each written-out wealth change equals the sum of its parts,
    # and path A really exercises the put settlement, the short hedge and the in-the-money call.
    for name in EXOGENOUS:
        for settlement in ("liquidate", "physical"):
            _, records = hand_path(EXOGENOUS[name], TARGETS[name], settlement)
            for r in records:
                parts = r["hedge_gain"] + r["book_change"] + r["financing"] - r["trading_cost"] - r["impact_cost"]
                assert parts == pytest.approx(r["pnl"], rel=1e-12, abs=1e-12)
    _, records = hand_path(EXOGENOUS["A"], TARGETS["A"], "liquidate")
    assert records[1]["spot"] < PUT_STRIKE and records[2]["spot"] > CALL_STRIKE
    _, records = hand_path(EXOGENOUS["B"], TARGETS["B"], "liquidate")
    assert records[1]["spot"] > PUT_STRIKE and records[2]["spot"] < CALL_STRIKE


@pytest.mark.parametrize("settlement", ["liquidate", "physical"])
def test_vector_step_matches_hand_accounting_of_every_part(settlement):
    problem = hand_problem(settlement)
    names = list(EXOGENOUS)
    hand = [hand_path(EXOGENOUS[n], TARGETS[n], settlement) for n in names]
    exogenous = np.array([EXOGENOUS[n] for n in names])
    targets = np.array([TARGETS[n] for n in names])

    state = initial_state(problem, exogenous[:, 0])
    for i, (start, _) in enumerate(hand):
        for field in STATE_FIELDS:
            assert _close(float(np.asarray(getattr(state, field))[i]), start[field]), f"start {field}"
    for k in range(3):
        outcome = hedge_step(problem, state, targets[:, k], exogenous[:, k + 1])
        assert outcome.state.k == k + 1
        for i, (_, records) in enumerate(hand):
            _compare(outcome.state, outcome, records[k], index=i, label=f"{names[i]} step {k}")
        state = outcome.state


@pytest.mark.parametrize("settlement", ["liquidate", "physical"])
@pytest.mark.parametrize("name", ["A", "B"])
def test_scalar_step_matches_hand_accounting_of_every_part(settlement, name):
    problem = hand_problem(settlement)
    start, records = hand_path(EXOGENOUS[name], TARGETS[name], settlement)
    state = initial_state(problem, EXOGENOUS[name][0], scalar=True)
    for field in STATE_FIELDS:
        assert _close(getattr(state, field), start[field]), f"start {field}"
    for k in range(3):
        outcome = hedge_step(problem, state, TARGETS[name][k], EXOGENOUS[name][k + 1], scalar=True)
        assert isinstance(outcome.pnl, float) and isinstance(outcome.state.cash, float)
        _compare(outcome.state, outcome, records[k], label=f"{name} step {k}")
        state = outcome.state


def test_physical_settlement_unwinds_only_the_residual_of_delivered_shares():
    # Path A: the short call ends in the money and takes 1 share; the hedge held 0.6.
    _, liquidate = hand_path(EXOGENOUS["A"], TARGETS["A"], "liquidate")
    _, physical = hand_path(EXOGENOUS["A"], TARGETS["A"], "physical")
    problem = hand_problem("physical")
    state = initial_state(problem, EXOGENOUS["A"][0], scalar=True)
    for k in range(3):
        outcome = hedge_step(problem, state, TARGETS["A"][k], EXOGENOUS["A"][k + 1], scalar=True)
        state = outcome.state
    # Last trade 0.6 - (-0.4) = 1.0 share, then the unwind: 0.6 (liquidate) or |0.6 - 1| = 0.4 (physical).
    assert outcome.traded_shares == pytest.approx(1.4, rel=1e-12)
    assert liquidate[2]["traded_shares"] == pytest.approx(1.6, rel=1e-12)
    assert physical[2]["trading_cost"] < liquidate[2]["trading_cost"]
    assert outcome.trading_cost == pytest.approx(physical[2]["trading_cost"], rel=1e-12)


def test_step_after_the_horizon_is_refused():
    problem = hand_problem("liquidate")
    state = initial_state(problem, 100.0, scalar=True)
    for k in range(3):
        state = hedge_step(problem, state, 0.1, 100.0, scalar=True).state
    with pytest.raises(ValueError, match="episode is over"):
        hedge_step(problem, state, 0.1, 100.0, scalar=True)


# --- random paths with every friction on ----------------------------------------


def friction_problem(settlement: str, steps: int = 12) -> HedgingProblem:
    """Every friction on; one leg expires mid-way, one at the horizon, one outlives it."""
    return HedgingProblem(
        book=Book((
            OptionLeg("call", 100.0, 12.0, quantity=-3.0, multiplier=10.0),
            OptionLeg("put", 95.0, 5.5, quantity=2.0, multiplier=10.0),
            OptionLeg("call", 110.0, 40.0, quantity=1.0, multiplier=10.0),
        )),
        marks=MarkParameters(volatility=0.3, rate=0.02, dividend_yield=0.01),
        frictions=Frictions(
            cost_rate=0.001, fixed_cost=0.2, impact_coefficient=0.05, impact_exponent=0.5,
            permanent_impact=0.1, adv_shares=500.0, cash_rate=0.03, borrow_fee=0.04, dividend_yield=0.015,
            position_limit_shares=45.0,
        ),
        objective=Objective(risk_aversion=0.01),
        schedule=Schedule(steps=steps, step_days=1.0, settlement=settlement),
    )


def random_targets(problem, state, rng):
    """Noisy delta hedge that crosses zero and the position limit now and then."""
    return -state.delta + rng.normal(0.0, 12.0, np.shape(state.delta))


@pytest.mark.parametrize("settlement", ["liquidate", "physical"])
def test_sum_of_step_pnl_equals_terminal_wealth_with_every_friction(settlement):
    # Wealth = cash + holding x spot + book value starts at 0 (premium = mark); common practice, no source.
    problem = friction_problem(settlement)
    n, steps = 4000, problem.schedule.steps
    paths = GBMMarket(spot=100.0, drift=0.05, volatility=0.3).generate(n, steps, problem.dt_years, seed=5).spot
    rng = np.random.default_rng(9)
    state = initial_state(problem, paths[:, 0])
    np.testing.assert_allclose(state.wealth(), 0.0, atol=1e-12)
    total = np.zeros(n)
    went_short = hit_limit = False
    for k in range(steps):
        target = random_targets(problem, state, rng)
        outcome = hedge_step(problem, state, target, paths[:, k + 1])
        went_short |= bool((outcome.held < 0).any())
        hit_limit |= bool((np.abs(target) > 45.0).any())
        parts = (outcome.hedge_gain + outcome.book_change + outcome.financing
                 - outcome.trading_cost - outcome.impact_cost)
        np.testing.assert_allclose(outcome.pnl, parts, rtol=1e-12, atol=1e-10)
        total += outcome.pnl
        state = outcome.state
    assert went_short and hit_limit
    np.testing.assert_array_equal(state.holding, 0.0)
    remaining_book = problem.book.value(state.spot, problem.schedule.horizon_days, problem.marks)
    np.testing.assert_allclose(state.mark, remaining_book, rtol=1e-12)
    assert (remaining_book != 0).all()  # the 40-day call outlives the 12-day horizon
    scale = 100.0 * problem.notional_shares  # money moved is of order spot x notional
    np.testing.assert_allclose(total, state.cash + state.mark, rtol=1e-9, atol=1e-9 * scale)


@pytest.mark.parametrize("settlement", ["liquidate", "physical"])
def test_vector_and_scalar_steps_give_the_same_numbers_on_the_same_paths(settlement):
    problem = friction_problem(settlement)
    n, steps = 16, problem.schedule.steps
    paths = GBMMarket(spot=100.0, drift=0.0, volatility=0.3).generate(n, steps, problem.dt_years, seed=2).spot
    targets = np.random.default_rng(4).normal(0.0, 25.0, (n, steps))
    vector_outcomes = []
    state = initial_state(problem, paths[:, 0])
    for k in range(steps):
        outcome = hedge_step(problem, state, targets[:, k], paths[:, k + 1])
        vector_outcomes.append(outcome)
        state = outcome.state
    for i in range(n):
        state = initial_state(problem, float(paths[i, 0]), scalar=True)
        for k in range(steps):
            outcome = hedge_step(problem, state, float(targets[i, k]), float(paths[i, k + 1]), scalar=True)
            vector = vector_outcomes[k]
            for name in STATE_FIELDS:
                assert getattr(outcome.state, name) == pytest.approx(
                    float(getattr(vector.state, name)[i]), rel=1e-12, abs=1e-12), f"path {i} step {k} {name}"
            for name in OUTCOME_FIELDS:
                assert getattr(outcome, name) == pytest.approx(
                    float(np.asarray(getattr(vector, name))[i]), rel=1e-12, abs=1e-12), f"path {i} step {k} {name}"
            state = outcome.state


def test_position_limit_clips_targets_in_vector_and_scalar_steps():
    problem = HedgingProblem(
        book=Book((OptionLeg("call", 100.0, 10.0, quantity=-1.0),)),
        frictions=Frictions(cost_rate=0.001, position_limit_shares=0.5),
        schedule=Schedule(steps=2, step_days=1.0),
    )
    state = initial_state(problem, np.full(3, 100.0))
    outcome = hedge_step(problem, state, np.array([2.0, -3.0, 0.2]), np.full(3, 100.0))
    np.testing.assert_array_equal(outcome.held, [0.5, -0.5, 0.2])
    np.testing.assert_array_equal(outcome.state.holding, [0.5, -0.5, 0.2])
    np.testing.assert_array_equal(outcome.traded_shares, [0.5, 0.5, 0.2])
    np.testing.assert_allclose(outcome.trading_cost, 0.001 * 100.0 * np.array([0.5, 0.5, 0.2]), rtol=1e-15)

    scalar = initial_state(problem, 100.0, scalar=True)
    assert hedge_step(problem, scalar, 2.0, 100.0, scalar=True).held == 0.5
    assert hedge_step(problem, scalar, -3.0, 100.0, scalar=True).held == -0.5
    assert hedge_step(problem, scalar, 0.2, 100.0, scalar=True).held == 0.2


@pytest.mark.parametrize("scalar", [False, True])
def test_a_round_trip_with_no_market_move_nets_zero_pnl_and_zero_impact_in_every_part(scalar):
    # Permanent impact model (common practice, no source: the linear-in-trade log impact of the
    # market-impact literature): buy d, every later price times f = exp(gamma d / ADV), the buy fills
    # at the mean of the mids; sell d back, the price returns. A material impact: gamma d / ADV = 0.1.
    gamma, adv, shares, spot = 0.1, 1000.0, 1000.0, 100.0
    problem = HedgingProblem(
        book=Book((OptionLeg("put", 1.0, 30.0, quantity=-1.0),)),  # worth 0 at every spot here
        marks=MarkParameters(0.2, 0.0, 0.0, 365.0),
        frictions=Frictions(permanent_impact=gamma, adv_shares=adv),
        objective=Objective(risk_aversion=0.0),
        schedule=Schedule(steps=2, step_days=1.0, settlement="liquidate"),
        reference_spot=spot,
    )
    f = math.exp(gamma * shares / adv)
    if scalar:
        state = initial_state(problem, spot, scalar=True)
        buy = hedge_step(problem, state, shares, spot, scalar=True)
        sell = hedge_step(problem, buy.state, 0.0, spot, scalar=True)
    else:
        state = initial_state(problem, np.array([spot]))
        buy = hedge_step(problem, state, np.array([shares]), np.array([spot]))
        sell = hedge_step(problem, buy.state, np.array([0.0]), np.array([spot]))
    assert _one(buy.state.spot) == pytest.approx(spot * f, rel=1e-14)
    assert _one(sell.state.spot) == pytest.approx(spot, rel=1e-14)
    # The buy's step P&L: the holding is marked at the mid its own buying raised, less the fill cost.
    assert _one(buy.pnl) == pytest.approx(0.5 * shares * spot * (f - 1.0), rel=1e-12)
    # Reported: no hedge gain (the market did not move); the own move of the price, net of the fill,
    # is in the impact cost, which over the round trip is zero, as the P&L is.
    for outcome in (buy, sell):
        assert _one(outcome.hedge_gain) == pytest.approx(0.0, abs=1e-9)
        assert _one(outcome.book_change) == 0.0 and _one(outcome.trading_cost) == 0.0
        parts = outcome.hedge_gain + outcome.book_change + outcome.financing - outcome.trading_cost - outcome.impact_cost
        assert _one(parts) == pytest.approx(_one(outcome.pnl), rel=1e-12, abs=1e-9)
    assert _one(buy.impact_cost) == pytest.approx(-0.5 * shares * spot * (f - 1.0), rel=1e-12)
    assert _one(sell.impact_cost) == pytest.approx(0.5 * shares * spot * (f - 1.0), rel=1e-12)
    assert _one(buy.pnl + sell.pnl) == pytest.approx(0.0, abs=1e-9)
    assert _one(buy.impact_cost + sell.impact_cost) == pytest.approx(0.0, abs=1e-9)


def _one(value) -> float:
    """The single number of a float or a one-path array."""
    return float(np.asarray(value).reshape(-1)[0])
