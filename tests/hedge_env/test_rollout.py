"""Batch rollouts (hedge_env.rollout): reproducibility, agreement with the single env, and the
statistics of discrete delta hedging against the literature."""

from __future__ import annotations

import math
import statistics
from dataclasses import replace

import numpy as np
import pytest

from agents.baselines import DeltaHedge
from hedge_env import pricing
from hedge_env.book import Book, MarkParameters, OptionLeg
from hedge_env.env import HedgingEnv
from hedge_env.frictions import Frictions
from hedge_env.market import GBMMarket, MarketPaths
from hedge_env.objective import Objective
from hedge_env.problem import HedgingProblem, Schedule
from hedge_env.rollout import HedgeResult, rollout
from hedge_env.step import hedge_step, initial_state

PER_PATH = ("pnl", "reward", "hedge_gain", "book_change", "financing", "trading_cost", "impact_cost",
            "traded_shares", "trades")


def friction_problem(steps: int = 10) -> HedgingProblem:
    return HedgingProblem(
        book=Book((
            OptionLeg("call", 100.0, 10.0, quantity=-2.0, multiplier=5.0),
            OptionLeg("put", 97.0, 6.0, quantity=1.0, multiplier=5.0),
        )),
        marks=MarkParameters(volatility=0.25, rate=0.02, dividend_yield=0.01),
        frictions=Frictions(
            cost_rate=0.001, fixed_cost=0.05, impact_coefficient=0.02, impact_exponent=0.5,
            permanent_impact=0.05, adv_shares=200.0, cash_rate=0.03, borrow_fee=0.05, dividend_yield=0.01,
        ),
        objective=Objective(risk_aversion=0.05),
        schedule=Schedule(steps=steps, step_days=1.0),
    )


def short_call_problem(steps: int, maturity_days: float, **marks) -> HedgingProblem:
    """Short one ATM call expiring at the horizon, no frictions."""
    return HedgingProblem(
        book=Book((OptionLeg("call", 100.0, maturity_days, quantity=-1.0),)),
        marks=MarkParameters(**marks),
        schedule=Schedule(steps=steps, step_days=maturity_days / steps),
    )


def std_with_influence(x: np.ndarray) -> tuple[float, np.ndarray]:
    """Sample std and its influence per observation: std error = std(influence) / sqrt(n).

    The delta method for s = sqrt(m2): s - sigma ~ mean((x - mu)^2 - sigma^2) / (2 sigma). It is
    valid for any finite fourth moment (the hedging P&L has fat tails at few rehedges), and the
    influences of several estimates on the same paths give the errors of their combinations.
    Common practice, no source.
    """
    s = float(x.std(ddof=1))
    return s, ((x - x.mean()) ** 2 - s * s) / (2.0 * s)


def standard_error(influence: np.ndarray) -> float:
    return float(influence.std(ddof=1) / math.sqrt(influence.size))


# --- reproducibility ------------------------------------------------------------


def test_same_seed_gives_bit_identical_results_and_chunk_size_does_not_change_any_path():
    problem = friction_problem()
    market = GBMMarket(spot=100.0, volatility=0.25)
    policy = DeltaHedge(problem)
    reference = rollout(problem, policy, market, n_paths=10_000, seed=3, keep_holdings=True)
    again = rollout(problem, policy, market, n_paths=10_000, seed=3, keep_holdings=True)
    for chunk in (1_000, 3_001, 4_096, 10_000):
        chunked = rollout(problem, policy, market, n_paths=10_000, seed=3, chunk_paths=chunk, keep_holdings=True)
        for name in PER_PATH + ("holdings",):
            assert np.array_equal(getattr(chunked, name), getattr(reference, name)), f"chunk {chunk}: {name}"
    for name in PER_PATH + ("holdings",):
        assert np.array_equal(getattr(again, name), getattr(reference, name)), name


def test_different_seed_gives_different_pnl_on_every_path():
    problem = friction_problem()
    market = GBMMarket(spot=100.0, volatility=0.25)
    first = rollout(problem, DeltaHedge(problem), market, n_paths=2_000, seed=3)
    second = rollout(problem, DeltaHedge(problem), market, n_paths=2_000, seed=4)
    assert (first.pnl != second.pnl).all()


# --- the batch rollout and the single env agree -----------------------------------


def test_rollout_over_given_paths_equals_a_manual_loop_over_the_single_env():
    problem = friction_problem()
    paths = GBMMarket(spot=100.0, volatility=0.25).generate(40, problem.schedule.steps, problem.dt_years, seed=8)
    result = rollout(problem, DeltaHedge(problem), paths)
    notional = problem.notional_shares
    summed = ("pnl", "hedge_gain", "book_change", "financing", "trading_cost", "impact_cost", "traded_shares")
    for i in range(paths.n_paths):
        env = HedgingEnv(problem, paths=paths.rows(i, i + 1))
        _, info = env.reset(seed=i)
        totals = dict.fromkeys(summed, 0.0)
        total_reward, steps, done = 0.0, 0, False
        while not done:
            # The delta hedge's target, from the env's own book delta (float64, as the rollout uses).
            _, reward, done, truncated, info = env.step(np.array([-info["delta"] / notional]))
            assert not truncated
            total_reward += reward
            for key in summed:
                totals[key] += info[key]
            steps += 1
        assert steps == problem.schedule.steps
        assert total_reward == pytest.approx(result.reward[i], rel=1e-9, abs=1e-9)
        for key in summed:
            assert totals[key] == pytest.approx(getattr(result, key)[i], rel=1e-9, abs=1e-9), f"path {i} {key}"
        assert info["wealth"] == pytest.approx(result.pnl[i], rel=1e-9, abs=1e-9)


# --- discrete delta hedging against the literature --------------------------------


def test_kamal_derman_std_of_discrete_delta_hedge_within_its_known_approximation_error():
    # Kamal and Derman (1999), "When you cannot hedge continuously: the corrections to
    # Black-Scholes", Risk, January 1999, from memory: std of the P&L of a short ATM
    # option delta-hedged N times without costs ~ sqrt(pi/4) * vol * vega / sqrt(N).
    # docs/references.md, "Discrete delta hedging": the formula overstates the simulated std by about 8% at N = 4, 3-4% at
    # N = 30 and 2% at N = 80. So the ratio simulated / formula must lie in
    # [1 - gap bound - 4 se, 1 + 4 se], and the gap must shrink with N.
    maturity_days, volatility, n = 30.0, 0.2, 150_000
    gap_bound = {4: 0.08, 30: 0.04, 120: 0.02}  # at 120 the 80-rehedge figure bounds it (the gap shrinks)
    # One set of 120-step paths, sampled every 30, 4 and 1 steps: the same Brownian paths at every N,
    # so the std estimates are correlated. 150k paths make the expected gap difference between
    # N = 30 and N = 120 (about 0.02, docs/references.md) some 7 standard errors (about 0.0028).
    fine = GBMMarket(spot=100.0, drift=0.0, volatility=volatility).generate(
        n, 120, maturity_days / 120 / 365.0, seed=21)
    vega = float(pricing.vega(100.0, 100.0, maturity_days / 365.0, volatility))
    ratio, ratio_influence = {}, {}
    for steps in gap_bound:
        problem = short_call_problem(steps, maturity_days, volatility=volatility)
        paths = MarketPaths(np.ascontiguousarray(fine.spot[:, :: 120 // steps]))
        pnl = rollout(problem, DeltaHedge(problem), paths).pnl
        formula = math.sqrt(math.pi / 4.0) * volatility * vega / math.sqrt(steps)
        s, influence = std_with_influence(pnl)
        ratio[steps], ratio_influence[steps] = s / formula, influence / formula
        se = standard_error(ratio_influence[steps])
        assert 1.0 - gap_bound[steps] - 4.0 * se <= ratio[steps] <= 1.0 + 4.0 * se, (steps, ratio[steps], se)
    for coarse, finer in ((4, 30), (30, 120)):
        # gap(coarse) - gap(finer) = ratio(finer) - ratio(coarse) > 0, significant at 3 standard errors.
        difference = ratio[finer] - ratio[coarse]
        se = standard_error(ratio_influence[finer] - ratio_influence[coarse])
        assert difference > 3.0 * se, (coarse, finer, difference, se)


def test_zero_cost_hedging_error_shrinks_like_one_over_sqrt_n():
    # Boyle and Emanuel (1980), Kamal and Derman (1999), from memory: the hedging error of discrete
    # delta hedging has std proportional to 1/sqrt(N). The fitted slope of log std on log N is
    # -0.5 plus the slope of log(ratio to the Kamal-Derman formula); that ratio rises
    # monotonically towards 1 (checked in the test above; docs/references.md: about 0.92 at N = 4),
    # so over N >= 8 it adds between 0 and (sum of the positive regression weights) * -log(0.92).
    maturity_days, volatility, n = 32.0, 0.2, 40_000
    rehedges = np.array([8, 16, 32, 64, 128])
    fine = GBMMarket(spot=100.0, drift=0.0, volatility=volatility).generate(
        n, 128, maturity_days / 128 / 365.0, seed=31)
    log_n = np.log(rehedges)
    weights = (log_n - log_n.mean()) / ((log_n - log_n.mean()) ** 2).sum()  # OLS slope = weights . y
    log_std, slope_influence = [], np.zeros(n)
    for steps, weight in zip(rehedges, weights):
        problem = short_call_problem(int(steps), maturity_days, volatility=volatility)
        paths = MarketPaths(np.ascontiguousarray(fine.spot[:, :: 128 // steps]))
        s, influence = std_with_influence(rollout(problem, DeltaHedge(problem), paths).pnl)
        log_std.append(math.log(s))
        slope_influence += weight * influence / s  # influence of log s is influence of s over s
    slope = float(weights @ np.array(log_std))
    se = standard_error(slope_influence)
    approximation_bias = weights[weights > 0].sum() * -math.log(1.0 - 0.08)
    assert -0.5 - 4.0 * se <= slope <= -0.5 + approximation_bias + 4.0 * se, (slope, se, approximation_bias)


def test_zero_cost_delta_hedge_under_risk_neutral_drift_has_zero_mean_pnl():
    # No arbitrage: under the risk-neutral drift (rate - dividend) any self-financing hedge of a
    # book marked at its risk-neutral value has mean P&L 0 (common practice, no source).
    # Left over: the dividend is credited as q dt per step instead of e^{q dt} - 1, about
    # 1e-5 here against a standard error of about 1e-3.
    rate, dividend, volatility, n = 0.05, 0.02, 0.2, 100_000
    problem = HedgingProblem(
        book=Book((
            OptionLeg("call", 100.0, 30.0, quantity=-1.0),
            OptionLeg("put", 95.0, 30.0, quantity=1.0),
        )),
        marks=MarkParameters(volatility=volatility, rate=rate, dividend_yield=dividend),
        frictions=Frictions(cash_rate=rate, dividend_yield=dividend),
        schedule=Schedule(steps=30, step_days=1.0),
    )
    market = GBMMarket(spot=100.0, drift=rate - dividend, volatility=volatility)
    result = rollout(problem, DeltaHedge(problem), market, n_paths=n, seed=41)
    se = result.pnl.std(ddof=1) / math.sqrt(n)
    assert abs(result.pnl.mean()) <= 4.0 * se, (result.pnl.mean(), se)
    assert (result.financing != 0).all()  # rate and dividend were really accounted


# --- HedgeResult ----------------------------------------------------------------


def test_summary_of_a_hand_made_result_gives_the_hand_computed_metrics():
    pnl = np.array([2.0, -3.0, 0.5, -1.0, 5.0])
    result = HedgeResult(
        name="hand", objective=Objective(risk_aversion=0.5, var_levels=(0.7, 0.9)), notional_shares=2.0,
        pnl=pnl, reward=np.array([1.0, -4.0, 0.0, -2.0, 3.0]),
        hedge_gain=np.zeros(5), book_change=np.zeros(5),
        financing=np.array([0.01, 0.02, 0.03, 0.04, 0.05]),
        trading_cost=np.array([0.1, 0.2, 0.3, 0.4, 0.5]), impact_cost=np.array([0.0, 0.1, 0.0, 0.1, 0.3]),
        traded_shares=np.array([1.0, 2.0, 3.0, 4.0, 5.0]), trades=np.array([1, 2, 2, 3, 4]),
    )
    row = result.summary()
    assert row.name == "hand"
    assert row["objective"] == pytest.approx(-2.0 / 5.0, rel=1e-15)
    assert row["mean_pnl"] == pytest.approx(3.5 / 5.0, rel=1e-15)
    assert row["std_pnl"] == pytest.approx(statistics.stdev(pnl.tolist()), rel=1e-14)
    # Sorted P&L: -3, -1, 0.5, 2, 5. Empirical VaR and the Acerbi-Tasche expected shortfall with a
    # fractional last atom (Acerbi and Tasche, 2002, "On the coherence of expected shortfall", from memory).
    # 70%: the worst 1.5 outcomes are -3 and half of -1.
    assert row["var_70"] == pytest.approx(1.0, rel=1e-12)
    assert row["cvar_70"] == pytest.approx((3.0 + 0.5 * 1.0) / 1.5, rel=1e-12)
    # 90%: the worst 0.5 outcome is half of -3.
    assert row["var_90"] == pytest.approx(3.0, rel=1e-12)
    assert row["cvar_90"] == pytest.approx(3.0, rel=1e-12)
    entropic = math.log(sum(math.exp(-0.5 * x) for x in pnl.tolist()) / 5.0) / 0.5  # common practice, no source
    assert row["entropic_risk"] == pytest.approx(entropic, rel=1e-12)
    assert row["mean_cost"] == pytest.approx(0.3, rel=1e-12)
    assert row["mean_impact"] == pytest.approx(0.1, rel=1e-12)
    assert row["mean_financing"] == pytest.approx(0.03, rel=1e-12)
    assert row["turnover"] == pytest.approx(3.0 / 2.0, rel=1e-12)
    assert row["trades"] == pytest.approx(12.0 / 5.0, rel=1e-12)
    assert row["paths"] == 5


def test_summary_var_is_the_lower_quantile_even_when_the_tail_count_is_a_whole_number():
    # 100 outcomes, losses 1..100: the 95% VaR is the 5th worst loss (96) and the 99% VaR the worst
    # (100), although 1 - 0.95 is 0.05000000000000004 in floating point. Reference library: numpy's
    # quantile with method="inverted_cdf" (Hyndman and Fan, 1996, definition 1), given the tail
    # probability as the decimal it is.
    pnl = -np.arange(1.0, 101.0)
    zeros = np.zeros(100)
    result = HedgeResult("var", Objective(var_levels=(0.9, 0.95, 0.975, 0.99)), 1.0, pnl, zeros, zeros, zeros,
                         zeros, zeros, zeros, zeros, zeros)
    row = result.summary()
    assert [row["var_90"], row["var_95"], row["var_97.5"], row["var_99"]] == [91.0, 96.0, 98.0, 100.0]
    assert row["cvar_95"] == pytest.approx((100 + 99 + 98 + 97 + 96) / 5, rel=1e-12)
    rng = np.random.default_rng(0)
    levels = {0.7: 0.3, 0.75: 0.25, 0.9: 0.1, 0.95: 0.05, 0.975: 0.025, 0.99: 0.01}
    for n in (20, 40, 100, 200, 400, 1000, 2000):
        sample = rng.normal(size=n)
        measures = Objective(var_levels=tuple(levels)).risk_measures(sample)
        for level, tail_probability in levels.items():
            expected = -np.quantile(sample, tail_probability, method="inverted_cdf")
            assert measures[f"var_{level * 100:g}"] == expected, (n, level)


def test_rollout_objective_is_the_mean_of_summed_step_rewards_and_cvar_is_at_least_var():
    problem = friction_problem()
    paths = GBMMarket(spot=100.0, volatility=0.25).generate(500, problem.schedule.steps, problem.dt_years, seed=6)
    result = rollout(problem, DeltaHedge(problem), paths)
    state = initial_state(problem, paths.spot[:, 0])
    summed_reward, summed_pnl = np.zeros(paths.n_paths), np.zeros(paths.n_paths)
    for k in range(problem.schedule.steps):
        outcome = hedge_step(problem, state, -state.delta, paths.spot[:, k + 1])
        pnl = outcome.pnl
        summed_reward += pnl - 0.5 * problem.objective.risk_aversion * pnl**2
        summed_pnl += pnl
        state = outcome.state
    np.testing.assert_allclose(result.reward, summed_reward, rtol=1e-12, atol=1e-12)
    np.testing.assert_allclose(result.pnl, summed_pnl, rtol=1e-12, atol=1e-12)
    row = result.summary()
    assert row["objective"] == pytest.approx(summed_reward.mean(), rel=1e-12)
    assert row["objective"] < row["mean_pnl"]  # the variance penalty of every step is > 0
    for tag in ("95", "99"):
        assert row[f"cvar_{tag}"] >= row[f"var_{tag}"]
    assert row["cvar_99"] >= row["cvar_95"]


def test_exponential_rewards_sum_to_the_terminal_utility_and_the_objective_is_its_certainty_equivalent():
    # u(W) = (1 - exp(-gamma W)) / gamma: the rewards (0, then u at the last step) sum to u(W_T) on every
    # path, with financing, fees, temporary and permanent impact (the wealth the last reward reads, cash +
    # shares x spot + book, must be the P&L gathered so far). Common practice, no source.
    gamma = 0.05
    problem = replace(friction_problem(), objective=Objective(risk_aversion=gamma, kind="exponential"))
    paths = GBMMarket(spot=100.0, volatility=0.25).generate(500, problem.schedule.steps, problem.dt_years, seed=6)
    result = rollout(problem, DeltaHedge(problem), paths)
    np.testing.assert_allclose(result.reward, -np.expm1(-gamma * result.pnl) / gamma, rtol=1e-9, atol=1e-12)
    expected = -math.log(statistics.fmean(math.exp(-gamma * x) for x in result.pnl.tolist())) / gamma
    assert result.objective_value == pytest.approx(expected, rel=1e-10)
    assert result.summary()["objective"] == pytest.approx(-result.summary()["entropic_risk"], rel=1e-12)
    # The same paths under the mean-variance objective: the P&L is the same to the bit.
    mean_variance = rollout(friction_problem(), DeltaHedge(problem), paths)
    np.testing.assert_array_equal(mean_variance.pnl, result.pnl)


@pytest.mark.filterwarnings("error")  # no overflow or invalid-value warning either
def test_exponential_rewards_at_a_thousand_calls_are_the_utility_never_nan():
    # 1,000 short calls at gamma 1: with telescoping step rewards 12.5% of a delta hedge's paths gave
    # inf or NaN and the sums missed u(W_T) by up to a relative 1e24. Now every path's return is u(W_T)
    # to a rounding where it is a double, and -inf exactly where gamma x loss is beyond log(max double).
    gamma = 1.0
    book = Book((OptionLeg("call", 100.0, 10.0, quantity=-1000.0),))
    problem = replace(friction_problem(), book=book, objective=Objective(risk_aversion=gamma, kind="exponential"),
                      frictions=Frictions(cost_rate=0.001))
    paths = GBMMarket(spot=100.0, volatility=0.25).generate(4000, problem.schedule.steps, problem.dt_years, seed=2)
    result = rollout(problem, DeltaHedge(problem), paths)
    assert not np.isnan(result.reward).any()
    beyond = -gamma * result.pnl > math.log(np.finfo(float).max)
    assert beyond.any() and not beyond.all()  # the case has both
    np.testing.assert_array_equal(np.isneginf(result.reward), beyond)
    # The wealth the last reward reads and the summed step P&Ls agree to 1e-9 currency units, so u to
    # a relative gamma x 1e-9.
    np.testing.assert_allclose(result.reward[~beyond], -np.expm1(-gamma * result.pnl[~beyond]) / gamma,
                               rtol=gamma * 1e-9)
    # The Gymnasium env's rewards on one path: 0 until the last step, then u(W_T).
    env = HedgingEnv(problem, paths=MarketPaths(paths.spot[:1]))
    env.reset(seed=0)
    rewards, done = [], False
    while not done:
        _, reward, done, _, _ = env.step(np.array([0.0]))
        rewards.append(reward)
    assert rewards[:-1] == [0.0] * (len(rewards) - 1) and not math.isnan(rewards[-1])


def test_certainty_equivalent_does_not_overflow_where_the_exponent_would():
    # exp(-gamma x) overflows a double beyond 709; the log-sum-exp does not. Two outcomes -1000 and 0
    # at gamma 1: CE = -1000 - log(1/2 (1 + e^-1000)) = -1000 + log 2. Common practice, no source.
    objective = Objective(risk_aversion=1.0, kind="exponential")
    assert objective.score(np.array([-1000.0, 0.0]), np.zeros(2)) == pytest.approx(-1000.0 + math.log(2.0), rel=1e-12)


def test_holdings_are_kept_only_on_request_with_shape_paths_by_steps():
    problem = friction_problem()
    market = GBMMarket(spot=100.0, volatility=0.25)
    kept = rollout(problem, DeltaHedge(problem), market, n_paths=5_000, seed=1, chunk_paths=2_048,
                   keep_holdings=True)
    assert kept.holdings.shape == (5_000, problem.schedule.steps)
    # The first decision of a delta hedge is minus the book delta at the start, the same on every path.
    start_delta = problem.book.value_and_delta(100.0, 0.0, problem.marks)[1]
    np.testing.assert_allclose(kept.holdings[:, 0], -start_delta, rtol=1e-12)
    assert np.unique(kept.holdings[:, 1]).size == 5_000
    assert rollout(problem, DeltaHedge(problem), market, n_paths=100, seed=1).holdings is None
