"""Paired comparisons of policies: the bootstrap over paths and the evaluation table."""

from __future__ import annotations

import math

import numpy as np
import pytest

from agents.baselines import DeltaHedge, FixedBand, NoHedge
from hedge_env.env import default_problem
from rehedge.compare import certainty_equivalent_bootstrap, evaluate_policies, paired_bootstrap
from rehedge.errors import PolicyError


def test_a_policy_against_itself_has_a_zero_width_interval_at_zero():
    problem, market = default_problem()
    policies = {"delta": DeltaHedge(problem), "band": FixedBand(problem, 0.05)}
    evaluation = evaluate_policies(problem, policies, market, 3000, seed=5, reference="delta")
    row = evaluation.table.loc["delta"]
    assert (row["vs_reference_mean"], row["vs_reference_ci_low"], row["vs_reference_ci_high"]) == (0.0, 0.0, 0.0)


def _assert_nominal_coverage(interval, truth: float, trials: int) -> None:
    """``interval(t)`` (independent samples for each t) must cover ``truth`` in about 95% of trials:
    within 3 binomial standard errors of the coverage estimate plus 1.5 points for the percentile
    method's small-sample undercoverage (common practice, no source)."""
    covered = 0
    for t in range(trials):
        ci = interval(t)
        covered += ci["ci_low"] <= truth <= ci["ci_high"]
    se = np.sqrt(0.95 * 0.05 / trials)
    assert 0.95 - 3 * se - 0.015 <= covered / trials <= 0.95 + 3 * se


def test_bootstrap_interval_covers_a_known_difference_at_about_the_nominal_rate():
    # Synthetic paired case with a known answer: differences are normal with mean 0.3.
    rng = np.random.default_rng(11)
    _assert_nominal_coverage(
        lambda t: paired_bootstrap({"p": 0.3 + rng.standard_normal(1000) * 2.0}, samples=800, seed=t, batches=250)["p"],
        0.3, 400)


def test_certainty_equivalent_interval_covers_a_known_difference_at_about_the_nominal_rate():
    # Normal P&L has a closed-form certainty equivalent, CE(N(mu, s^2)) = mu - gamma s^2 / 2 (the
    # normal's moment generating function, common practice, no source): N(0.3, 0.5^2) against N(0, 1)
    # at gamma 1 differ by 0.3 + (1 - 0.25) / 2 = 0.675.
    rng = np.random.default_rng(12)

    def interval(t: int) -> dict:
        pnl = {"ref": rng.standard_normal(2000), "p": 0.3 + 0.5 * rng.standard_normal(2000)}
        return certainty_equivalent_bootstrap(pnl, "ref", 1.0, samples=800, seed=t, batches=250)["p"]

    _assert_nominal_coverage(interval, 0.675, 300)


def test_certainty_equivalent_interval_survives_exponents_a_double_cannot_hold():
    # exp(1000) overflows; shifting by the largest exponent does not. Shifting a policy's P&L by -1000
    # shifts its certainty equivalent by -1000 exactly (cash invariance, common practice, no source).
    rng = np.random.default_rng(3)
    base = rng.standard_normal(4000)
    out = certainty_equivalent_bootstrap({"ref": base, "far": base - 1000.0}, "ref", 1.0, samples=200)
    assert out["far"]["mean"] == pytest.approx(-1000.0, abs=1e-9)
    assert out["far"]["ci_low"] == pytest.approx(-1000.0, abs=1e-9)
    assert out["far"]["ci_high"] == pytest.approx(-1000.0, abs=1e-9)


def test_bootstrap_is_reproducible_from_its_seed_and_paired_across_policies():
    rng = np.random.default_rng(2)
    base = rng.standard_normal(5000)
    diffs = {"a": base, "b": base + 1.0}
    first, second = paired_bootstrap(diffs, seed=9), paired_bootstrap(diffs, seed=9)
    assert first == second
    # Same resamples for every policy: shifting the differences by 1 shifts the interval by 1.
    assert np.isclose(first["b"]["ci_low"] - first["a"]["ci_low"], 1.0)
    assert np.isclose(first["b"]["ci_high"] - first["a"]["ci_high"], 1.0)


def test_table_is_ranked_by_objective_and_records_keep_the_promised_fields():
    problem, market = default_problem()
    policies = {"no_hedge": NoHedge(problem), "delta": DeltaHedge(problem), "band": FixedBand(problem, 0.03)}
    evaluation = evaluate_policies(problem, policies, market, 4000, seed=8, kinds={"band": "fixed_band"})
    objectives = list(evaluation.table["objective"])
    assert objectives == sorted(objectives, reverse=True)
    records = evaluation.to_records()
    assert records[0]["name"] == evaluation.table.index[0]
    for record in records:
        assert {"name", "kind", "objective", "mean_pnl", "std_pnl", "cvar_95", "mean_cost", "turnover"} <= set(record)
        assert record["vs_reference"]["policy"] == "delta"


@pytest.mark.parametrize("kind", ["mean_variance", "exponential"])
def test_quotes_of_a_zero_cost_delta_hedge_tend_to_the_black_scholes_price_as_rehedging_gets_finer(kind):
    # Black-Scholes (1973): with continuous frictionless rehedging the hedged book is riskless, so
    # the premium the risk justifies tends to the Black-Scholes price. With N rehedges the
    # mean-variance quote exceeds it by about kappa/2 times the hedging-error variance, which
    # falls like 1/N (Kamal and Derman 1999, from memory), and the bid sits below by as much. The
    # exponential utility's indifference price does the same (Hodges and Neuberger 1989, from
    # memory): its certainty equivalent is -gamma/2 times the variance to leading order. That case
    # runs with a 5% rate (marks, drift and cash), where the quote discounts the certainty equivalent.
    from dataclasses import replace

    from hedge_env.book import MarkParameters
    from hedge_env.frictions import Frictions
    from hedge_env.market import GBMMarket
    from hedge_env.objective import Objective
    from hedge_env.problem import Schedule
    from rehedge.compare import evaluate_with_quotes

    problem, market = default_problem()
    if kind == "exponential":
        rate = 0.05
        problem = replace(problem, objective=Objective(risk_aversion=1.0, kind=kind),
                          marks=MarkParameters(volatility=0.2, rate=rate))
        market = GBMMarket(spot=100.0, drift=rate, volatility=0.2)
    excess = []
    for steps in (8, 32, 128):
        fine = replace(problem, frictions=Frictions(cash_rate=problem.marks.rate),
                       schedule=Schedule(steps=steps, step_days=30 / steps))
        evaluation = evaluate_with_quotes(fine, {"delta": DeltaHedge(fine)}, market, 20000, seed=4)
        q = evaluation.quotes["delta"]
        result = evaluation.results["delta"]
        # Monte Carlo error of the quote: the standard error of the mean summed reward, or of the
        # certainty equivalent by the delta method (std of exp(-gamma X) over gamma E[exp(-gamma X)]).
        if kind == "exponential":
            weights = np.exp(-result.pnl)
            se = weights.std(ddof=1) / weights.mean() / np.sqrt(result.n_paths)
        else:
            se = result.reward.std(ddof=1) / np.sqrt(result.n_paths)
        excess.append((q["quote_ask"] - q["mark"], q["mark"] - q["quote_bid"], se))
    asks = [a for a, _, _ in excess]
    assert asks[0] > asks[1] > asks[2] > 0
    # The spread around the mark shrinks about fourfold for every fourfold finer rehedging.
    for (a0, b0, _), (a1, b1, _) in zip(excess, excess[1:]):
        assert 2.5 < a0 / a1 < 6.0 and 2.5 < b0 / b1 < 6.0
    ask, bid, se = excess[-1]
    assert abs(ask - 0.5 * (ask + bid)) < 4 * se  # at N = 128 the two sides are symmetric within MC error


class _BrokenAfter:
    """Delta hedging until decision ``k``, then ``value`` on one row."""

    def __init__(self, problem, k: int, row: int, value: float):
        self.delta, self.k, self.row, self.value, self.name = DeltaHedge(problem), k, row, value, "broken"
        self.problem = problem

    def act(self, obs):
        targets = self.delta.act(obs)
        if np.isclose(obs[0, 1], self.problem.years_to_horizon(self.k)):
            targets = targets.copy()
            targets[self.row] = self.value
        return targets


@pytest.mark.parametrize("value", [np.nan, np.inf, -np.inf])
def test_a_policy_naming_a_non_finite_target_stops_the_comparison_in_one_line(value):
    problem, market = default_problem()
    policies = {"delta": DeltaHedge(problem), "broken": _BrokenAfter(problem, 3, 17, value)}
    with pytest.raises(PolicyError) as error:
        evaluate_policies(problem, policies, market, 3000, seed=5, chunk_paths=1000)
    message = str(error.value)
    assert "\n" not in message
    assert message.startswith(f"policy 'broken' named a target of {value * problem.notional_shares} shares at "
                              "decision 3 of path ")
    assert message.endswith(": targets must be finite numbers")


def test_certainty_equivalent_intervals_stay_finite_when_whole_batches_sit_far_below_the_worst_path():
    # Exponents spread over thousands: shifting every batch by the overall largest exponent rounds whole
    # batches to zero, and their log is -inf. Per-batch log-sum-exps, then one across the resample's
    # batches, keep each resample's certainty equivalent what its own paths give (logsumexp, exact).
    from scipy.special import logsumexp

    from rehedge.compare import resample_batches, resampled_certainty_equivalent

    rng = np.random.default_rng(5)
    pnl = 300.0 * rng.standard_normal(4000)
    pnl[17] = -4000.0  # one path far worse than the rest
    out = certainty_equivalent_bootstrap({"ref": pnl, "p": pnl + 5.0}, "ref", 1.0, samples=300, batches=400)
    assert all(np.isfinite(v) for v in out["p"].values())
    assert out["p"]["ci_low"] == pytest.approx(5.0, abs=1e-9) and out["p"]["ci_high"] == pytest.approx(5.0, abs=1e-9)
    resamples = resample_batches(pnl.size, 50, seed=2, batches=400)
    _, resampled = resampled_certainty_equivalent(pnl, 1.0, resamples)
    starts, draws, counts = resamples
    bounds = np.append(starts, pnl.size)
    for row in range(50):
        paths = np.concatenate([pnl[bounds[b]:bounds[b + 1]] for b in draws[row]])
        direct = -(logsumexp(-paths) - np.log(paths.size))
        assert resampled[row] == pytest.approx(direct, rel=1e-12, abs=1e-9)


def test_quotes_need_no_cvar_95_among_the_configured_levels():
    # CVaR-95 quotes come from the P&L itself, whatever objective.var_levels lists.
    from dataclasses import replace

    from hedge_env.objective import Objective, conditional_value_at_risk
    from rehedge.compare import evaluate_with_quotes

    problem, market = default_problem()
    problem = replace(problem, objective=Objective(risk_aversion=problem.objective.risk_aversion, var_levels=(0.9,)))
    evaluation = evaluate_with_quotes(problem, {"delta": DeltaHedge(problem)}, market, 2000, seed=4)
    q, result = evaluation.quotes["delta"], evaluation.results["delta"]
    assert q["cvar_ask"] == pytest.approx(q["mark"] + conditional_value_at_risk(result.pnl, 0.95), rel=1e-12)
    assert "cvar_95" not in evaluation.to_records()[0]


@pytest.mark.parametrize("c, heavy", [(0.3, False), (0.8, True)])
def test_a_certainty_equivalent_on_too_few_effective_paths_is_flagged_where_its_interval_stops_covering(c, heavy):
    # A short-gamma toy with a known answer: P&L = -a Z^2, Z standard normal, so E[exp(-gamma P&L)] =
    # (1 - 2 gamma a)^(-1/2) and CE = log(1 - 2 gamma a) / (2 gamma) (the chi-square's moment generating
    # function; common practice, no source). At c = 2 gamma a = 0.3 the weights have finite variance and
    # the bootstrap interval covers at the nominal 95% (within 3 binomial standard errors) with the
    # effective paths over half the paths in every sample (no warning); at c = 0.8 they have none, the
    # interval covers far less, and the warning fires on most samples (docs/references.md,
    # "Certainty-equivalent intervals").
    from hedge_env.objective import effective_paths
    from rehedge.compare import resample_batches, resampled_certainty_equivalent
    from rehedge.formats import ce_caution

    gamma, n, trials = 1.0, 2000, 200
    a, known = c / (2 * gamma), math.log(1 - c) / (2 * gamma)
    rng = np.random.default_rng(21)
    covered = flagged = 0
    for t in range(trials):
        pnl = -a * rng.standard_normal(n) ** 2
        _, resampled = resampled_certainty_equivalent(pnl, gamma, resample_batches(n, 400, t))
        low, high = np.quantile(resampled, [0.025, 0.975])
        covered += low <= known <= high
        record = {"name": "toy", "paths": n, "ce_effective_paths": effective_paths(pnl, gamma)}
        flagged += ce_caution([record]) is not None
    coverage, tolerance = covered / trials, 3 * math.sqrt(0.95 * 0.05 / trials)
    if heavy:
        assert coverage < 0.95 - tolerance and flagged > trials / 2, (coverage, flagged)
    else:
        assert abs(coverage - 0.95) <= tolerance and flagged == 0, (coverage, flagged)


def _normal_result(pnl, theta):
    from hedge_env.objective import Objective
    from hedge_env.rollout import HedgeResult

    zeros = np.zeros_like(pnl)
    return HedgeResult("p", Objective(risk_aversion=theta, var_levels=(0.95, 0.99)), 1.0, pnl=pnl, reward=zeros,
                       trading_cost=zeros, impact_cost=zeros, financing=zeros, traded_shares=zeros, trades=zeros,
                       hedge_gain=zeros, book_change=zeros, step_cost=np.zeros(1))


def test_tail_figures_come_with_bootstrap_intervals_that_cover_their_known_values():
    # A tail figure moves with the paths (entropic risk moved from 1,947 to 3,011 between 50,000 and
    # 200,000 paths): each has a percentile bootstrap interval. Normal P&L N(mu, s^2) has entropic
    # risk -mu + theta s^2 / 2 (the normal's moment generating function), VaR -mu - s z and CVaR
    # -mu + s phi(z) / (1 - level) with z the (1 - level) quantile (common practice, no source).
    from scipy.stats import norm

    from rehedge.compare import tail_intervals

    theta, mu, s = 0.5, 0.2, 1.0
    z = {tag: norm.ppf(1 - level) for tag, level in (("95", 0.95), ("99", 0.99))}
    known = {"entropic_risk": -mu + theta * s * s / 2}
    for tag, level in (("95", 0.95), ("99", 0.99)):
        known[f"var_{tag}"] = -mu - s * z[tag]
        known[f"cvar_{tag}"] = -mu + s * norm.pdf(z[tag]) / (1 - level)
    rng = np.random.default_rng(13)
    covered, trials = dict.fromkeys(known, 0), 200
    for t in range(trials):
        result = _normal_result(mu + s * rng.standard_normal(4000), theta)
        ci = tail_intervals({"p": result}, samples=400, seed=t, batches=250)["p"]
        for key, value in known.items():
            covered[key] += ci[f"{key}_ci_low"] <= value <= ci[f"{key}_ci_high"]
    tolerance = 3 * math.sqrt(0.95 * 0.05 / trials)
    for key, count in covered.items():  # + 0.015: the percentile method's small-sample undercoverage
        assert abs(count / trials - 0.95) <= tolerance + 0.015, (key, count / trials)


def test_a_resample_that_draws_every_batch_once_gives_the_point_estimates():
    # The weighted tail read on a resample is the same estimator as the point figures (Acerbi-Tasche
    # CVaR with its fractional last atom, the lower-quantile VaR), not a second formula.
    from hedge_env.objective import conditional_value_at_risk, value_at_risk
    from rehedge.compare import resample_batches, resampled_tails

    pnl = np.random.default_rng(5).standard_t(3, size=1003)
    starts, _, _ = resample_batches(pnl.size, 1, 0, 100)
    identity = (starts, np.arange(starts.size)[None, :], np.array([pnl.size]))
    shuffled = np.random.default_rng(6).permutation(starts.size)[None, :]
    for draws in (identity[1], shuffled):
        for level in (0.9, 0.95, 0.99, 0.999):
            var, cvar = resampled_tails(pnl, level, (starts, draws, identity[2]))
            assert var[0] == value_at_risk(pnl, level)
            assert cvar[0] == pytest.approx(conditional_value_at_risk(pnl, level), rel=1e-13)
    # A resample of the best batch alone: its tail lies among the best paths, past the worst ones read first.
    sizes = np.diff(np.append(starts, pnl.size))
    best = int(np.argmax(np.add.reduceat(pnl, starts) / sizes))
    batch = pnl[starts[best]:starts[best] + sizes[best]]
    only_best = (starts, np.full((1, starts.size), best), np.array([starts.size * batch.size]))
    repeated = np.tile(batch, starts.size)
    var, cvar = resampled_tails(pnl, 0.95, only_best)
    assert var[0] == value_at_risk(repeated, 0.95)
    assert cvar[0] == pytest.approx(conditional_value_at_risk(repeated, 0.95), rel=1e-12)
