"""The Heston and Merton path generators against outside references, their config checks, and the
learned agents trained and evaluated unchanged on every market model (gbm, heston, merton).

References, named beside each check:
- QuantLib (PyPI ``QuantLib``): AnalyticHestonEngine (Heston 1993 semi-closed form) for Heston
  call prices; BatesEngine at constant variance (Bates 1996 = Heston + Merton jumps) for Merton.
- Merton (1976), "Option pricing when underlying stock returns are discontinuous": the call price
  as a Poisson-weighted series of Black-Scholes prices (written below, from memory).
- Martingale property (law): under drift = r - q, E[S_T] = S_0 exp((r - q) T); and for the CIR
  variance E[v_T] = theta + (v0 - theta) exp(-kappa T) (Cox, Ingersoll and Ross 1985, from memory).
Monte Carlo checks bound their error by standard errors of their own sample.
"""

from __future__ import annotations

import math
import tomllib
import warnings
from pathlib import Path

import numpy as np
import pytest
from threadpoolctl import threadpool_limits

from hedge_env import pricing
from hedge_env.market import BLOCK_PATHS, HestonMarket, MertonMarket
from hedge_env.rollout import rollout
from rehedge.compare import evaluate_policies, write_metrics
from rehedge.config import parse_config
from rehedge.errors import ConfigError
from rehedge.report import build_report
from rehedge.run_folder import write_run
from rehedge.training import train

CONFIGS = Path(__file__).resolve().parents[2] / "configs"
RATE, DIVIDEND = 0.03, 0.01
DT_YEARS = 1.0 / 365.0
DAYS = 60
STRIKES = (90.0, 100.0, 110.0)
MC_PATHS = 100_000
# Realistic equity parameters, and a harsh set far outside the Feller condition (2 kappa theta = 0.12 < xi^2 = 1).
HESTON_SETS = {
    "equity": dict(initial_variance=0.04, mean_reversion=2.0, long_run_variance=0.04, vol_of_vol=0.5,
                   correlation=-0.7),
    "harsh": dict(initial_variance=0.09, mean_reversion=1.0, long_run_variance=0.06, vol_of_vol=1.0,
                  correlation=-0.9),
}
# Discretisation bias of the QE scheme at daily steps over 60 days, measured against QuantLib with
# 2,000,000 paths (control variate on S_T), both sets, the three strikes: estimates from -0.0007 to
# +0.0008, each within one standard error of that sample (0.0007-0.0022), so no bias is detectable;
# 0.005 bounds it (estimate plus two of those standard errors). It is added to the Monte Carlo bound
# of 4 standard errors of the test's own sample (about 0.03 at the money).
QE_DAILY_BIAS = 0.005


@pytest.fixture(autouse=True, scope="module")
def one_thread_per_numerical_library():
    with threadpool_limits(1):
        yield


def quantlib_heston_call(strike: float, days: int, spot: float, params: dict) -> float:
    """AnalyticHestonEngine price of a European call, flat Actual365Fixed curves."""
    ql = pytest.importorskip("QuantLib")  # only the checks against QuantLib skip without it
    today = ql.Date(15, ql.January, 2026)
    ql.Settings.instance().evaluationDate = today
    counter = ql.Actual365Fixed()
    process = ql.HestonProcess(
        ql.YieldTermStructureHandle(ql.FlatForward(today, RATE, counter)),
        ql.YieldTermStructureHandle(ql.FlatForward(today, DIVIDEND, counter)),
        ql.QuoteHandle(ql.SimpleQuote(spot)),
        params["initial_variance"], params["mean_reversion"], params["long_run_variance"],
        params["vol_of_vol"], params["correlation"])
    option = ql.VanillaOption(ql.PlainVanillaPayoff(ql.Option.Call, strike), ql.EuropeanExercise(today + days))
    option.setPricingEngine(ql.AnalyticHestonEngine(ql.HestonModel(process)))
    return option.NPV()


def quantlib_merton_call(strike: float, days: int, spot: float, market: MertonMarket) -> float:
    """QuantLib BatesEngine price of a European call with a constant variance: the Python bindings
    have no JumpDiffusionEngine, and Bates (1996) is Heston plus Merton's lognormal jumps, so with the
    variance started at its long-run level and a vanishing vol of vol (1e-4) it is Merton's model
    (the gap is of order vol of vol squared, about 1e-9 here)."""
    ql = pytest.importorskip("QuantLib")  # only the checks against QuantLib skip without it
    today = ql.Date(15, ql.January, 2026)
    ql.Settings.instance().evaluationDate = today
    counter = ql.Actual365Fixed()
    variance = market.volatility**2
    process = ql.BatesProcess(
        ql.YieldTermStructureHandle(ql.FlatForward(today, RATE, counter)),
        ql.YieldTermStructureHandle(ql.FlatForward(today, DIVIDEND, counter)),
        ql.QuoteHandle(ql.SimpleQuote(spot)),
        variance, 1.0, variance, 1e-4, 0.0, market.jump_intensity, market.jump_mean, market.jump_std)
    option = ql.VanillaOption(ql.PlainVanillaPayoff(ql.Option.Call, strike), ql.EuropeanExercise(today + days))
    option.setPricingEngine(ql.BatesEngine(ql.BatesModel(process)))
    return option.NPV()


def merton_series_call(spot: float, strike: float, tau: float, market: MertonMarket, terms: int = 80) -> float:
    """Merton (1976) call price, from memory: with k = E[J] - 1, lambda' = lambda (1 + k),

        C = sum_n exp(-lambda' tau) (lambda' tau)^n / n! * BS(S, K, tau, sigma_n, r_n, q),
        sigma_n^2 = sigma^2 + n delta^2 / tau,  r_n = r - lambda k + n log(1 + k) / tau.
    """
    k = market.jump_compensator
    weight_rate = market.jump_intensity * (1.0 + k) * tau
    total = 0.0
    for n in range(terms):
        weight = math.exp(-weight_rate + n * math.log(weight_rate) - math.lgamma(n + 1)) if weight_rate > 0 else float(n == 0)
        vol = math.sqrt(market.volatility**2 + n * market.jump_std**2 / tau)
        rate = RATE - market.jump_intensity * k + n * math.log1p(k) / tau
        total += weight * float(pricing.price(spot, strike, tau, vol, rate, DIVIDEND, True))
    return total


def controlled_mean(payoff: np.ndarray, control: np.ndarray, control_mean: float) -> tuple[float, float]:
    """Mean of ``payoff`` with ``control`` (of known mean) as control variate, and its standard error."""
    cov = np.cov(payoff, control)
    beta = cov[0, 1] / cov[1, 1]
    adjusted = payoff - beta * (control - control_mean)
    return float(adjusted.mean()), float(adjusted.std(ddof=1) / math.sqrt(adjusted.size))


@pytest.fixture(scope="module", params=sorted(HESTON_SETS))
def heston_case(request):
    params = HESTON_SETS[request.param]
    market = HestonMarket(spot=100.0, drift=RATE - DIVIDEND, **params)
    return params, market, market.generate(MC_PATHS, DAYS, DT_YEARS, seed=11)


def test_heston_monte_carlo_call_prices_match_quantlib_analytic_heston_within_four_standard_errors(heston_case):
    params, market, paths = heston_case
    tau = DAYS * DT_YEARS
    terminal = paths.spot[:, -1]
    forward = market.spot * math.exp((RATE - DIVIDEND) * tau)
    for strike in STRIKES:
        payoff = np.maximum(terminal - strike, 0.0) * math.exp(-RATE * tau)
        estimate, error = controlled_mean(payoff, terminal, forward)
        reference = quantlib_heston_call(strike, DAYS, market.spot, params)  # QuantLib AnalyticHestonEngine
        assert abs(estimate - reference) < 4.0 * error + QE_DAILY_BIAS, (strike, estimate, reference, error)


def test_heston_paths_are_martingales_under_drift_r_minus_q_and_the_variance_has_the_cir_mean(heston_case):
    params, market, paths = heston_case
    tau = DAYS * DT_YEARS
    terminal = paths.spot[:, -1]
    # Martingale property (law): E[S_T] = S_0 exp((r - q) T).
    expected = market.spot * math.exp((RATE - DIVIDEND) * tau)
    assert abs(terminal.mean() - expected) < 4.0 * terminal.std() / math.sqrt(terminal.size)
    # CIR mean (Cox, Ingersoll and Ross 1985, from memory): E[v_T] = theta + (v0 - theta) exp(-kappa T).
    variance = paths.factors["variance"]
    theta, v0, kappa = params["long_run_variance"], params["initial_variance"], params["mean_reversion"]
    cir_mean = theta + (v0 - theta) * math.exp(-kappa * tau)
    assert abs(variance[:, -1].mean() - cir_mean) < 4.0 * variance[:, -1].std() / math.sqrt(variance.shape[0])
    assert variance.min() >= 0.0 and np.all(np.isfinite(paths.spot)) and np.all(paths.spot > 0.0)
    assert np.all(variance[:, 0] == v0) and np.all(paths.spot[:, 0] == market.spot)


def test_heston_real_world_drift_is_the_expected_return_even_with_positive_correlation():
    # Positive correlation is where Andersen's martingale correction can fail and falls back.
    market = HestonMarket(spot=50.0, drift=0.08, initial_variance=0.09, mean_reversion=1.5, long_run_variance=0.05,
                          vol_of_vol=0.9, correlation=0.6)
    terminal = market.generate(MC_PATHS, 30, DT_YEARS, seed=3).spot[:, -1]
    expected = market.spot * math.exp(0.08 * 30 * DT_YEARS)  # martingale property (law) of S e^{-drift t}
    assert abs(terminal.mean() - expected) < 4.0 * terminal.std() / math.sqrt(terminal.size)


def test_heston_without_vol_of_vol_is_black_scholes_at_the_deterministic_variance():
    market = HestonMarket(spot=100.0, drift=RATE - DIVIDEND, initial_variance=0.04, mean_reversion=3.0,
                          long_run_variance=0.04, vol_of_vol=0.0, correlation=-0.5)
    paths = market.generate(MC_PATHS, DAYS, DT_YEARS, seed=4)
    assert np.all(paths.factors["variance"] == 0.04)
    tau = DAYS * DT_YEARS
    payoff = np.maximum(paths.spot[:, -1] - 100.0, 0.0) * math.exp(-RATE * tau)
    forward = 100.0 * math.exp((RATE - DIVIDEND) * tau)
    estimate, error = controlled_mean(payoff, paths.spot[:, -1], forward)
    # Black-Scholes (1973) at 20% (the pricing module is itself checked against QuantLib).
    reference = float(pricing.price(100.0, 100.0, tau, 0.2, RATE, DIVIDEND, True))
    assert abs(estimate - reference) < 4.0 * error


@pytest.mark.parametrize("params", [
    dict(initial_variance=0.0, mean_reversion=0.0, long_run_variance=0.0, vol_of_vol=0.5, correlation=0.0),
    dict(initial_variance=0.0, mean_reversion=2.0, long_run_variance=0.04, vol_of_vol=2.0, correlation=1.0),
    dict(initial_variance=0.04, mean_reversion=0.0, long_run_variance=0.0, vol_of_vol=0.3, correlation=-1.0),
])
def test_heston_paths_stay_finite_and_positive_at_the_edges_of_the_parameter_ranges(params):
    with np.errstate(all="raise"):
        paths = HestonMarket(spot=10.0, **params).generate(2_000, 40, DT_YEARS, seed=2)
    assert np.all(np.isfinite(paths.spot)) and np.all(paths.spot > 0.0)
    assert np.all(np.isfinite(paths.factors["variance"])) and paths.factors["variance"].min() >= 0.0


MERTON = MertonMarket(spot=100.0, drift=RATE - DIVIDEND, volatility=0.25, jump_intensity=3.0, jump_mean=-0.08,
                      jump_std=0.15)


def test_merton_series_formula_agrees_with_quantlib_bates_engine_at_constant_variance():
    tau = DAYS * DT_YEARS
    for strike in STRIKES:
        series = merton_series_call(100.0, strike, tau, MERTON)   # Merton (1976) series, from memory
        library = quantlib_merton_call(strike, DAYS, 100.0, MERTON)  # QuantLib BatesEngine, constant variance
        assert abs(series - library) < 1e-7, (strike, series, library)


def test_merton_monte_carlo_call_prices_match_the_series_formula_within_four_standard_errors():
    tau = DAYS * DT_YEARS
    terminal = MERTON.generate(MC_PATHS, DAYS, DT_YEARS, seed=12).spot[:, -1]
    forward = MERTON.spot * math.exp((RATE - DIVIDEND) * tau)
    # Martingale property (law), jumps compensated: E[S_T] = S_0 exp((r - q) T).
    assert abs(terminal.mean() - forward) < 4.0 * terminal.std() / math.sqrt(terminal.size)
    for strike in STRIKES:
        payoff = np.maximum(terminal - strike, 0.0) * math.exp(-RATE * tau)
        estimate, error = controlled_mean(payoff, terminal, forward)
        reference = merton_series_call(100.0, strike, tau, MERTON)  # Merton (1976) series, from memory
        assert abs(estimate - reference) < 4.0 * error, (strike, estimate, reference, error)


def test_merton_jumps_arrive_at_the_configured_intensity_and_size():
    # Exact per-step draws: log returns have mean (drift - sigma^2/2 - lambda k + lambda mu_J) dt and
    # variance (sigma^2 + lambda (mu_J^2 + delta^2)) dt (compound Poisson moments, law).
    steps = MERTON.generate(20_000, 30, DT_YEARS, seed=5).spot
    returns = np.diff(np.log(steps), axis=1).ravel()
    lam, k = MERTON.jump_intensity, MERTON.jump_compensator
    mean = (MERTON.drift - 0.5 * MERTON.volatility**2 - lam * k + lam * MERTON.jump_mean) * DT_YEARS
    variance = (MERTON.volatility**2 + lam * (MERTON.jump_mean**2 + MERTON.jump_std**2)) * DT_YEARS
    assert abs(returns.mean() - mean) < 4.0 * returns.std() / math.sqrt(returns.size)
    fourth = ((returns - returns.mean()) ** 2).var()  # variance of the squared deviations: SE of the variance
    assert abs(returns.var() - variance) < 4.0 * math.sqrt(fourth / returns.size)


@pytest.mark.parametrize("market", [
    HestonMarket(spot=100.0, drift=0.05, variance_observed=True),
    MertonMarket(spot=100.0, drift=0.05, jump_intensity=5.0, jump_mean=-0.1, jump_std=0.2),
], ids=["heston", "merton"])
def test_same_seed_gives_the_same_paths_bit_for_bit_whatever_the_chunk_size(market):
    n = BLOCK_PATHS + 1_500
    whole = market.generate(n, 12, DT_YEARS, seed=8)
    for chunk in (1_000, BLOCK_PATHS + 1, n):
        parts = list(market.iter_chunks(n, 12, DT_YEARS, seed=8, chunk_paths=chunk))
        assert np.array_equal(np.concatenate([p.spot for p in parts]), whole.spot)
        for name in market.factor_names:
            assert np.array_equal(np.concatenate([p.factors[name] for p in parts]), whole.factors[name])
    middle = market.generate(700, 12, DT_YEARS, seed=8, start=BLOCK_PATHS - 300)
    assert np.array_equal(middle.spot, whole.spot[BLOCK_PATHS - 300:BLOCK_PATHS + 400])
    assert not np.array_equal(market.generate(100, 12, DT_YEARS, seed=9).spot, whole.spot[:100])


# ---------------------------------------------------------------------------
# Config
# ---------------------------------------------------------------------------


def config_data(name: str) -> dict:
    return tomllib.loads((CONFIGS / name).read_text())


@pytest.mark.parametrize("key, value, message", [
    ("correlation", -1.2, "market.correlation: must be >= -1, got -1.2"),
    ("correlation", 1.5, "market.correlation: must be <= 1, got 1.5"),
    ("vol_of_vol", -0.5, "market.vol_of_vol: must be >= 0, got -0.5"),
    ("initial_variance", -0.01, "market.initial_variance: must be >= 0, got -0.01"),
    ("long_run_variance", "high", "market.long_run_variance: must be a number, got 'high'"),
    ("mean_reversion", -1, "market.mean_reversion: must be >= 0, got -1"),
    ("variance_observed", 1, "market.variance_observed: must be true or false, got 1"),
    ("volatility", 0.2, "market.volatility: unknown key 'volatility'"),
])
def test_bad_heston_settings_are_one_line_errors_naming_the_key(key, value, message):
    data = config_data("heston.toml")
    data["market"][key] = value
    with pytest.raises(ConfigError) as info:
        parse_config(data)
    assert str(info.value) == message


@pytest.mark.parametrize("key, value, message", [
    ("jump_intensity", -1.0, "market.jump_intensity: must be >= 0, got -1.0"),
    ("jump_std", -0.1, "market.jump_std: must be >= 0, got -0.1"),
    ("volatility", 0.0, "market.volatility: must be >= 0.0001, got 0.0"),
    ("jump_mean", None, "market.jump_mean: required key missing"),
])
def test_bad_merton_settings_are_one_line_errors_naming_the_key(key, value, message):
    data = config_data("merton.toml")
    if value is None:
        del data["market"][key]
    else:
        data["market"][key] = value
    with pytest.raises(ConfigError) as info:
        parse_config(data)
    assert str(info.value) == message


def test_a_heston_market_with_no_variance_at_all_needs_an_explicit_pricing_volatility():
    data = config_data("heston.toml")
    data["market"].update(initial_variance=0.0, long_run_variance=0.0)
    with pytest.raises(ConfigError) as info:
        parse_config(data)
    # The model's own marks need a long-run variance; Black-Scholes marks a volatility.
    assert str(info.value) == ("market.long_run_variance: must be > 0 for Heston model marks "
                               "(pricing.marks = 'model'), got 0.0")
    data["pricing"]["marks"] = "black_scholes"
    data["baselines"] = [{k: v for k, v in b.items() if k != "center"} for b in data["baselines"]
                         if b["kind"] not in ("model_delta", "minimum_variance_delta")]
    data["agents"] = [{k: v for k, v in a.items() if k != "anchor"} for a in data["agents"]]
    data["report"]["reference_policy"] = "delta"
    with pytest.raises(ConfigError) as info:
        parse_config(data)
    assert str(info.value) == "pricing.volatility: must be given: the market model's default volatility is 0"
    data["pricing"]["volatility"] = 0.2
    assert parse_config(data).pricing.volatility == 0.2


def test_default_pricing_volatility_is_the_expected_mean_variance_for_heston_and_total_volatility_for_merton():
    heston = parse_config(config_data("heston.toml"))
    assert heston.pricing.volatility == pytest.approx(0.2, abs=1e-15)  # v0 = theta = 0.04
    data = config_data("heston.toml")
    data["market"].update(initial_variance=0.09, long_run_variance=0.04, mean_reversion=2.0)
    horizon = 30 / 365
    # The mean over [0, T] of E[v_t] = theta + (v0 - theta) e^{-kappa t} (CIR mean, from memory).
    mean_variance = 0.04 + 0.05 * (1 - math.exp(-2.0 * horizon)) / (2.0 * horizon)
    assert parse_config(data).pricing.volatility == pytest.approx(math.sqrt(mean_variance), rel=1e-12)
    merton = parse_config(config_data("merton.toml"))
    assert merton.pricing.volatility == pytest.approx(math.sqrt(0.3**2 + 3.0 * (0.05**2 + 0.12**2)), rel=1e-12)


# ---------------------------------------------------------------------------
# Agents unchanged on every model
# ---------------------------------------------------------------------------


FAST_TREES = {"max_iter": 40, "max_leaf_nodes": 15}


def small_config(name: str, **market) -> dict:
    """A shipped config at small sizes (10 daily rehedges of its book, 20,000 training paths: with 5,000 the
    linear agent on the Merton book hedged no better than no hedge at all): delta, no hedge and a fixed
    band; linear and fitted-Q agents."""
    data = config_data(name)
    data.pop("sweep", None)
    data["market"].update(market)
    data["schedule"]["steps"] = 10
    # 20,000 held-out paths: an agent that keeps some jump risk has a wide per-path spread of
    # differences from delta, and its paired interval needs them to separate from zero.
    data["data"] = {"train_paths": 20_000, "heldout_paths": 20_000, "chunk_paths": 10_000}
    data["baselines"] = [{"kind": "no_hedge"}, {"kind": "delta"}, {"kind": "fixed_band", "half_width": 0.05}]
    data["agents"] = [{"kind": "linear"}, {"kind": "fitted_q", "regressor_params": FAST_TREES}]
    data["report"] = {"reference_policy": "delta", "bootstrap_samples": 200}
    return data


def trained_and_evaluated(data: dict):
    config = parse_config(data)
    training = train(config)
    evaluation = evaluate_policies(training.problem, training.policies, training.market, config.data.heldout_paths,
                                   config.data.heldout_seed, training.kinds, config.data.chunk_paths)
    return config, training, evaluation.table


def check_agents_learned_to_hedge(table) -> None:
    assert set(table.index) == {"no_hedge", "delta", "fixed_band", "linear", "fitted_q"}
    assert np.all(np.isfinite(table["objective"])) and np.all(np.isfinite(table["vs_reference_mean"]))
    # Each learned agent beats delta hedging on the objective: the paired bootstrap 95% interval of
    # its per-path difference from delta on the same held-out paths lies above zero (under costs the
    # optimum gains over delta: docs/references.md, "The grid optimum and the reference case").
    for agent in ("linear", "fitted_q"):
        assert table.loc[agent, "vs_reference_ci_low"] > 0, agent
        assert 0.0 < table.loc[agent, "turnover"] < 2.0 * table.loc["delta", "turnover"]


@pytest.mark.parametrize("name", ["demo.toml", "heston.toml", "merton.toml"], ids=["gbm", "heston", "merton"])
def test_agents_train_and_evaluate_unchanged_on_every_market_model(name):
    config, training, table = trained_and_evaluated(small_config(name, **(
        {"variance_observed": False} if name == "heston.toml" else {})))
    assert training.market.observed_factors == ()
    check_agents_learned_to_hedge(table)


def test_agents_observe_the_heston_variance_and_can_use_it_in_their_basis(tmp_path):
    data = small_config("heston.toml", variance_observed=True)
    data["data"]["train_paths"] = 5_000  # a fitted-Q basis with the variance is evaluated tree by tree: slow
    data["agents"] = [{"kind": "linear", "basis": ["gap", "gap^2", "gap^2*variance", "abs_gap", "abs_gap*variance"]},
                      {"kind": "fitted_q", "basis": ["moneyness", "hedge", "gap", "abs_gap", "variance"],
                       "regressor_params": FAST_TREES}]
    config, training, table = trained_and_evaluated(data)
    check_agents_learned_to_hedge(table)
    # The run folder and its report work with the extra observed column too.
    folder = write_run(training, "# heston, variance observed\n", tmp_path)
    evaluation = evaluate_policies(training.problem, training.policies, training.market, 500,
                                   config.data.heldout_seed, training.kinds, config.data.chunk_paths)
    write_metrics(evaluation, folder)
    assert "Heston (QE scheme)" in build_report(folder).read_text()
    for agent in training.agents.values():
        assert agent.factor_names == ("variance",)
    assert training.agents["fitted_q"].tables_ is None  # a basis with the variance is off the tabulated grid
    k, n = 5, 500
    paths = training.market.generate(n, config.schedule.steps, training.problem.dt_years, seed=5)
    obs = np.column_stack([paths.spot[:, k] / config.market.spot, np.full(n, training.problem.years_to_horizon(k)),
                           np.full(n, 0.5), paths.factors["variance"][:, k]])
    low_variance, high_variance = obs.copy(), obs.copy()
    low_variance[:, 3], high_variance[:, 3] = 0.01, 0.16
    linear = training.agents["linear"]
    # The variance enters the fitted value: the same states at other variances can get other targets.
    assert linear.coef_[k, 2] != 0.0 and not np.array_equal(linear.act(low_variance), linear.act(high_variance))
    assert np.all(np.isfinite(linear.act(obs))) and np.all(np.isfinite(training.agents["fitted_q"].act(obs)))


def test_on_the_heston_config_the_linear_agent_that_sees_the_variance_beats_the_same_agent_blind():
    # configs/heston.toml's book, market, costs and training paths; its linear agent (anchored on the
    # minimum-variance delta) against the same agent blind, on 20,000 held-out paths. Per path
    # d_i = objective_seeing - objective_blind; the 95% interval mean +- 1.96 standard errors of d
    # (from this sample) must lie above zero.
    data = config_data("heston.toml")
    data["data"]["heldout_paths"] = 20_000
    data["baselines"] = [{"kind": "minimum_variance_delta"}]
    data["agents"] = [agent for agent in data["agents"] if agent["kind"] == "linear"]
    assert [agent.get("blind", False) for agent in data["agents"]] == [False, True]
    config = parse_config(data)
    training = train(config)
    seeing, blind = (training.policies[spec.name] for spec in config.agents)
    rewards = {}
    for policy in (seeing, blind):
        rewards[policy.name] = rollout(training.problem, policy, training.market, 20_000,
                                       config.data.heldout_seed).reward
    d = rewards[seeing.name] - rewards[blind.name]
    assert d.mean() - 1.96 * d.std(ddof=1) / np.sqrt(d.size) > 0
    assert seeing.variance_slope_ > 0 and blind.variance_slope_ == 0.0


def test_the_gymnasium_env_on_heston_paths_shows_the_variance_and_passes_the_env_checker():
    from gymnasium.utils.env_checker import check_env

    from hedge_env.env import HedgingEnv, default_problem

    problem, _ = default_problem()
    env = HedgingEnv(problem, HestonMarket(spot=problem.reference_spot, variance_observed=True))
    assert env.observation_space.shape == (4,)
    obs, _ = env.reset(seed=3)
    assert obs[3] == np.float32(0.04)  # the initial variance, appended after spot, time and holding
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        check_env(env)  # reference library: gymnasium.utils.env_checker (warnings allowed, errors not)


def test_a_model_whose_prices_leave_the_floating_point_range_is_refused_naming_its_keys():
    # 100 jumps a year of mean log size 2 (each within its config range) over 10 years: the log price
    # moves by hundreds a year and exp overflows (or reaches 0). Before the check the paths carried inf
    # and 0 into the marks, and a run ended in NaN numbers or a traceback.
    from hedge_env.market import ModelRangeError

    market = MertonMarket(spot=100.0, drift=0.0, volatility=0.2, jump_intensity=100.0, jump_mean=2.0, jump_std=2.0)
    with pytest.raises(ModelRangeError) as info:
        market.generate(10, 3650, 1 / 365, seed=1)
    message = str(info.value)
    assert "\n" not in message and message.startswith("market: ")
    assert all(f"market.{key}" in message for key in ("jump_intensity", "jump_mean", "jump_std", "volatility"))
    assert np.isfinite(market.generate(10, 10, 1 / 365, seed=1).spot).all()  # the same model, a short horizon
