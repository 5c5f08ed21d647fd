"""Config schema, loading, error messages and hashing (rehedge.config)."""

from __future__ import annotations

import math
import re
import tomllib
from pathlib import Path

import pytest

from rehedge.build import build_markets, build_problem
from rehedge.config import config_hash, load_config, parse_config
from rehedge.errors import ConfigError
from rehedge.schema import Config, DeltaBaseline, LelandBaseline

DEMO = Path(__file__).resolve().parents[2] / "configs" / "demo.toml"

# A small valid config; each bad case below changes exactly one thing in it.
MINIMAL = """\
name = "unit-test"
seed = 7

[market]
model = "gbm"
spot = 100.0
volatility = 0.2

[[book.options]]
kind = "call"
strike = 100.0
expiry_days = 30
quantity = -10
multiplier = 100

[[book.options]]
kind = "put"
strike = 95.0
expiry_days = 30
quantity = 5
multiplier = 100

[schedule]
steps = 30

[frictions]
cost_rate = 0.001

[objective]
risk_aversion = 0.001
"""


def write(tmp_path: Path, text: str, name: str = "config.toml") -> Path:
    path = tmp_path / name
    path.write_text(text, encoding="utf-8")
    return path


def variant(old: str, new: str) -> str:
    assert old in MINIMAL, f"test bug: {old!r} not in MINIMAL"
    return MINIMAL.replace(old, new, 1)


# --- the demo ----------------------------------------------------------------


def test_demo_config_loads_and_is_fully_resolved():
    config = load_config(DEMO)
    assert isinstance(config, Config)
    # pricing.volatility is absent in the demo and resolves to market.volatility
    assert config.pricing.volatility == config.market.volatility
    # data seeds are derived, filled in and distinct
    assert isinstance(config.data.train_seed, int)
    assert isinstance(config.data.heldout_seed, int)
    assert config.data.train_seed != config.data.heldout_seed
    # baseline defaults that depend on other sections are filled in
    for baseline in config.baselines:
        if isinstance(baseline, (DeltaBaseline, LelandBaseline)):
            assert baseline.volatility == config.pricing.volatility
        if isinstance(baseline, LelandBaseline):
            assert baseline.cost_rate == config.frictions.cost_rate
    assert config.policy_names[:5] == ["no_hedge", "delta", "leland", "whalley_wilmott", "fixed_band"]
    assert config.horizon_days == config.schedule.steps * config.schedule.step_days
    assert config.notional_shares == sum(abs(o.quantity) * o.multiplier for o in config.book.options)


def test_demo_book_is_a_short_atm_long_otm_call_spread_rehedged_daily():
    config = load_config(DEMO)
    short, long_ = config.book.options
    assert short.kind == long_.kind == "call"
    assert short.quantity < 0 < long_.quantity
    assert short.strike == config.market.spot < long_.strike
    assert config.schedule.step_days == 1.0 and config.horizon_days == 30
    assert config.frictions.cost_rate == pytest.approx(0.001)
    assert 1e-3 <= config.objective.risk_aversion <= 5e-3
    assert (config.data.train_paths, config.data.heldout_paths) == (20_000, 50_000)


def test_resolved_dump_validates_back_to_the_same_config():
    config = load_config(DEMO)
    again = parse_config(config.model_dump())
    assert again == config
    assert config_hash(again) == config_hash(config)


# --- defaults and resolution -------------------------------------------------


def test_absent_sections_get_defaults_and_seeds_derive_from_master_seed(tmp_path):
    config = load_config(write(tmp_path, MINIMAL))
    assert config.pricing.volatility == 0.2
    assert config.pricing.days_per_year == 365
    assert config.data.train_seed == 2 * 7 + 1
    assert config.data.heldout_seed == 2 * 7 + 2
    assert [b.kind for b in config.baselines] == [
        "no_hedge", "delta", "leland", "whalley_wilmott", "fixed_band",
    ]
    assert config.agents == []
    assert config.report.reference_policy == "delta"
    assert config.objective.var_levels == [0.95, 0.99]
    assert config.objective.entropic_risk_aversion == config.objective.risk_aversion
    assert config.frictions.position_limit_shares is None


def test_explicit_pricing_volatility_is_kept(tmp_path):
    text = MINIMAL + "\n[pricing]\nvolatility = 0.3\n"
    config = load_config(write(tmp_path, text))
    assert config.pricing.volatility == 0.3
    delta = next(b for b in config.baselines if b.kind == "delta")
    assert delta.volatility == 0.3


def test_defaulted_seed_moves_rather_than_collide_with_an_explicit_one(tmp_path):
    text = MINIMAL + "\n[data]\ntrain_seed = 16\n"  # 2 * 7 + 2, the default held-out seed
    config = load_config(write(tmp_path, text))
    assert config.data.train_seed == 16
    assert config.data.heldout_seed != 16


def test_entropic_risk_aversion_is_skipped_when_risk_aversion_is_zero(tmp_path):
    config = load_config(write(tmp_path, variant("risk_aversion = 0.001", "risk_aversion = 0")))
    assert config.objective.entropic_risk_aversion is None


def test_inf_position_limit_means_no_limit(tmp_path):
    text = variant("cost_rate = 0.001", "cost_rate = 0.001\nposition_limit_shares = inf")
    assert load_config(write(tmp_path, text)).frictions.position_limit_shares is None


# --- hashing -----------------------------------------------------------------


def test_config_hash_is_stable_across_loads(tmp_path):
    path = write(tmp_path, MINIMAL)
    first, second = config_hash(load_config(path)), config_hash(load_config(path))
    assert first == second
    assert len(first) == 64 and int(first, 16) >= 0
    assert config_hash(load_config(DEMO)) == config_hash(load_config(DEMO))


def test_config_hash_changes_when_a_value_changes(tmp_path):
    base = config_hash(load_config(write(tmp_path, MINIMAL, "a.toml")))
    changed = config_hash(load_config(write(tmp_path, variant("strike = 95.0", "strike = 96.0"), "b.toml")))
    assert base != changed


def test_config_hash_ignores_formatting_and_spelt_out_defaults(tmp_path):
    base = config_hash(load_config(write(tmp_path, MINIMAL, "a.toml")))
    spelt_out = MINIMAL + "\n# a comment\n[pricing]\nvolatility = 0.2\ndays_per_year = 365\n"
    assert config_hash(load_config(write(tmp_path, spelt_out, "b.toml"))) == base


# --- error messages ----------------------------------------------------------

BAD_INPUTS = [
    pytest.param(
        variant("strike = 95.0", "strike = -5"),
        "book.options[1].strike: must be >= 0.0001, got -5",
        id="negative-strike",
    ),
    pytest.param(
        variant("volatility = 0.2", "volatilty = 0.2\nvolatility = 0.2"),
        "market.volatilty: unknown key 'volatilty' (did you mean 'volatility'?)",
        id="unknown-key",
    ),
    pytest.param(
        variant('model = "gbm"', 'model = "gmb"'),
        "market.model: must be one of 'gbm', 'heston', 'merton', 'historical', got 'gmb'",
        id="bad-market-model",
    ),
    pytest.param(
        variant("spot = 100.0\n", ""),
        "market.spot: required key missing",
        id="missing-required-key",
    ),
    pytest.param(
        variant("spot = 100.0", 'spot = "abc"'),
        "market.spot: must be a number, got 'abc'",
        id="not-a-number",
    ),
    pytest.param(
        variant("spot = 100.0", "spot = true"),
        "market.spot: must be a number, got true",
        id="bool-is-not-a-number",
    ),
    pytest.param(
        variant("steps = 30", "steps = 30.5"),
        "schedule.steps: must be an integer, got 30.5",
        id="not-an-integer",
    ),
    pytest.param(
        variant("risk_aversion = 0.001", "risk_aversion = 0.001\nvar_levels = [1.5, 0.99]"),
        "objective.var_levels[0]: must be in (0, 1), got 1.5",
        id="var-level-out-of-range",
    ),
    pytest.param(
        variant("cost_rate = 0.001", "cost_rate = -0.1"),
        "frictions.cost_rate: must be >= 0, got -0.1",
        id="negative-cost-rate",
    ),
    pytest.param(
        variant("cost_rate = 0.001", "cost_rate = 0.001\nimpact_exponent = 1.5"),
        "frictions.impact_exponent: must be in [0, 1], got 1.5",
        id="impact-exponent-out-of-range",
    ),
    pytest.param(
        variant('kind = "put"', 'kind = "pt"'),
        "book.options[1].kind: must be one of 'call', 'put', got 'pt'",
        id="bad-option-kind",
    ),
    pytest.param(
        variant("quantity = 5", "quantity = 0"),
        "book.options[1].quantity: must be non-zero (+ long, - short), got 0",
        id="zero-quantity",
    ),
    pytest.param(
        MINIMAL + '\n[[baselines]]\nkind = "delta"\n\n[[baselines]]\nkind = "delta"\n',
        "baselines[1].name: duplicate policy name 'delta'",
        id="duplicate-baseline-names",
    ),
    pytest.param(
        MINIMAL + '\n[[baselines]]\nkind = "delta"\n\n[[baselines]]\nkind = "no_hedge"\n'
        '\n[[baselines]]\nkind = "deltaa"\n',
        "baselines[2].kind: must be one of 'no_hedge', 'delta', 'leland', 'whalley_wilmott', "
        "'fixed_band', 'model_delta', 'minimum_variance_delta', got 'deltaa'",
        id="unknown-baseline-kind",
    ),
    pytest.param(
        MINIMAL + '\n[[baselines]]\nkind = "whalley_wilmott"\nrisk_aversion = "auto"\n',
        "baselines[0].risk_aversion: must be a number > 0 or 'tune', got 'auto'",
        id="tunable-parameter-bad-string",
    ),
    pytest.param(
        MINIMAL + '\n[[agents]]\nkind = "linear"\nname = "delta"\n',
        "agents[0].name: duplicate policy name 'delta'",
        id="agent-name-clashes-with-baseline",
    ),
    pytest.param(
        MINIMAL.split("[[book.options]]")[0] + "[book]\noptions = []\n"
        + "[schedule]" + MINIMAL.split("[schedule]")[1],
        "book.options: must hold at least one option",
        id="empty-book",
    ),
    pytest.param(
        MINIMAL + "\n[data]\nheldout_paths = 0\n",
        "data.heldout_paths: must be > 0, got 0",
        id="zero-heldout-paths",
    ),
    pytest.param(
        MINIMAL + "\n[data]\ntrain_seed = 3\nheldout_seed = 3\n",
        "data.heldout_seed: must differ from data.train_seed, got 3",
        id="equal-data-seeds",
    ),
    pytest.param(
        MINIMAL + '\n[report]\nreference_policy = "bs_delta"\n',
        "report.reference_policy: unknown policy 'bs_delta'; policies: 'no_hedge', 'delta', "
        "'leland', 'whalley_wilmott', 'fixed_band'",
        id="unknown-reference-policy",
    ),
    pytest.param(
        variant("risk_aversion = 0.001", 'kind = "exponential"\nrisk_aversion = 0'),
        "objective.risk_aversion: must be > 0 with kind = 'exponential' (gamma of the utility)",
        id="exponential-without-risk-aversion",
    ),
    pytest.param(
        variant("risk_aversion = 0.001", 'kind = "power"\nrisk_aversion = 0.001'),
        "objective.kind: must be one of 'mean_variance', 'exponential', got 'power'",
        id="unknown-objective-kind",
    ),
    pytest.param(
        variant("risk_aversion = 0.001", 'kind = "exponential"\nrisk_aversion = 0.001')
        + '\n[[agents]]\nkind = "fitted_q"\nlinear_basis = "none"\n',
        "agents[0].linear_basis: must not be 'none' with objective.kind = 'exponential' (the linear stage "
        "carries the value's level across states)",
        id="exponential-fitted-q-without-linear-stage",
    ),
    pytest.param(
        variant('name = "unit-test"', 'name = "unit test"'),
        "name: must use only letters, digits, '_', '.', '-' (it names run folders), got 'unit test'",
        id="name-unsafe-for-folders",
    ),
    pytest.param(
        variant('name = "unit-test"', f'name = "{"n" * 300}"'),
        f"name: must be at most 64 characters (it names folders and files), got 300: '{'n' * 24}'...",
        id="name-too-long-for-a-folder",
    ),
    pytest.param(
        MINIMAL + f'\n[[baselines]]\nkind = "delta"\nname = "{"p" * 250}"\n',
        f"baselines[0].name: must be at most 64 characters (it names folders and files), got 250: '{'p' * 24}'...",
        id="policy-name-too-long-for-a-file",
    ),
]


@pytest.mark.parametrize("text, expected", BAD_INPUTS)
def test_bad_input_gives_exactly_one_line_naming_the_key(tmp_path, text, expected):
    with pytest.raises(ConfigError) as info:
        load_config(write(tmp_path, text))
    message = str(info.value)
    assert message == expected
    assert "\n" not in message
    assert info.value.key == expected.split(": ")[0]


def test_each_reported_problem_is_one_line_and_the_count_of_others_is_given(tmp_path):
    text = variant("spot = 100.0", "spot = -1").replace("volatility = 0.2", "volatility = -1")
    with pytest.raises(ConfigError) as info:
        load_config(write(tmp_path, text))
    assert str(info.value) == "market.spot: must be >= 0.0001, got -1 (and 1 more error)"
    assert info.value.problems == (
        "market.spot: must be >= 0.0001, got -1",
        "market.volatility: must be >= 0.0001, got -1",
    )
    assert all("\n" not in p for p in info.value.problems)


def test_book_options_written_as_a_single_table_gets_a_hint(tmp_path):
    text = MINIMAL.split("[[book.options]]")[0] + (
        '[book.options]\nkind = "call"\nstrike = 100.0\nexpiry_days = 30\nquantity = -10\n\n'
    ) + "[schedule]" + MINIMAL.split("[schedule]")[1]
    with pytest.raises(ConfigError) as info:
        load_config(write(tmp_path, text))
    assert str(info.value) == (
        "book.options: must be an array, got a table (write [[book.options]] for each entry)"
    )


def test_toml_syntax_error_names_the_file_and_line(tmp_path):
    text = variant("steps = 30", "steps = = 30")
    line = text.splitlines().index("steps = = 30") + 1
    path = write(tmp_path, text)
    with pytest.raises(ConfigError) as info:
        load_config(path)
    message = str(info.value)
    assert "\n" not in message
    assert message.startswith(f"{path}: TOML syntax error at line {line}")


def test_missing_file_is_a_config_error(tmp_path):
    path = tmp_path / "nope.toml"
    with pytest.raises(ConfigError) as info:
        load_config(path)
    assert str(info.value) == f"{path}: config file not found"


def test_config_error_is_a_value_error_and_records_its_source(tmp_path):
    with pytest.raises(ValueError) as info:
        parse_config({"name": "x"}, source="inline")
    assert isinstance(info.value, ConfigError)
    assert info.value.source == "inline"


def test_non_table_input_is_rejected():
    with pytest.raises(ConfigError, match="must be a table"):
        parse_config([1, 2, 3])  # type: ignore[arg-type]


@pytest.mark.parametrize("change, message", [
    # Issue: grid_dp on a Merton market passed check-config and failed in training.
    ({"market": {"model": "merton", "spot": 100.0, "volatility": 0.2, "jump_intensity": 1.0, "jump_mean": -0.05,
                 "jump_std": 0.1}, "agents": [{"kind": "grid_dp"}]},
     "agents[0].kind: grid_dp solves a one-factor GBM market only, got market.model = 'merton'"),
    ({"agents": [{"kind": "fitted_q", "regressor": "extra_trees", "regressor_params": {"n_estimator": 5}}]},
     "agents[0].regressor_params: unknown parameter 'n_estimator' for extra_trees (did you mean 'n_estimators'?)"),
    ({"frictions": {"cost_rate": 0.001, "permanent_impact": 2.0, "adv_shares": 1000.0}},
     "frictions.permanent_impact: permanent_impact x notional shares / adv_shares must be <= 1 (a trade of the "
     "whole book moves the price by at most a factor e), got 3"),
])
def test_rules_that_training_relies_on_are_checked_when_the_config_is_loaded(change, message):
    data = tomllib.loads(MINIMAL)
    data.update(change)
    with pytest.raises(ConfigError) as error:
        parse_config(data)
    assert str(error.value) == message


@pytest.mark.parametrize("regressor, key, value, rule", [
    ("extra_trees", "n_estimators", "lots", "must be an int in the range [1, inf). Got 'lots' instead."),
    ("extra_trees", "n_estimators", -5, "must be an int in the range [1, inf). Got -5 instead."),
    ("extra_trees", "max_depth", float("nan"), "must be an int in the range [1, inf) or None. Got nan instead."),
    ("hist_gradient_boosting", "learning_rate", {"a": 1}, "must be a float in the range (0.0, inf). Got {'a': 1}"),
    ("ridge", "alpha", -1.0, "must be a float in the range [0.0, inf)"),
])
def test_regressor_parameters_pass_scikit_learns_own_check_when_the_config_is_loaded(regressor, key, value, rule):
    """A value scikit-learn would refuse mid-training is refused here, naming the parameter."""
    data = tomllib.loads(MINIMAL)
    data["agents"] = [{"kind": "linear"}, {"kind": "fitted_q", "regressor": regressor, "regressor_params": {key: value}}]
    with pytest.raises(ConfigError) as error:
        parse_config(data)
    message = str(error.value)
    assert message.startswith(f"agents[1].regressor_params.{key}: {rule}")
    assert message.endswith(f"(scikit-learn's rule for {regressor})") and error.value.key == (
        f"agents[1].regressor_params.{key}")


def test_a_misspelt_key_is_named_with_the_closest_valid_one():
    with pytest.raises(ConfigError) as error:
        parse_config(tomllib.loads(MINIMAL.replace("cost_rate = ", "cost_rat = ")))
    assert str(error.value) == "frictions.cost_rat: unknown key 'cost_rat' (did you mean 'cost_rate'?)"


@pytest.mark.parametrize("market", [
    {"model": "gbm", "spot": 100.0, "volatility": 0.2},
    {"model": "heston", "spot": 100.0, "initial_variance": 0.04, "mean_reversion": 2.0, "long_run_variance": 0.04,
     "vol_of_vol": 0.5, "correlation": -0.7},
    {"model": "merton", "spot": 100.0, "volatility": 0.15, "jump_intensity": 2.0, "jump_mean": -0.05,
     "jump_std": 0.1},
])
def test_market_drift_is_the_growth_of_the_price_whatever_the_dividend_yield(market):
    # market.drift means one thing: E[S_t] = S_0 exp(drift t) (README, "Market models"); the dividend
    # yield is paid to a long holding on top, never taken out of the price path. A Monte Carlo mean,
    # bounded by 4 standard errors of its own sample.
    data = tomllib.loads(MINIMAL)
    data["market"] = {**market, "drift": 0.12, "dividend_yield": 0.05, "rate": 0.02}
    config = parse_config(data)
    problem, (source, _) = build_problem(config), build_markets(config)
    paths = source.generate(40_000, problem.schedule.steps, problem.dt_years, 3)
    growth = paths.spot[:, -1] / paths.spot[:, 0]
    expected = math.exp(0.12 * problem.horizon_years)
    assert abs(growth.mean() - expected) <= 4 * growth.std(ddof=1) / math.sqrt(growth.size)
    # The same test tells a price drift of drift - dividend_yield apart: 5% a year over 30 days.
    assert abs(expected - math.exp((0.12 - 0.05) * problem.horizon_years)) > 8 * growth.std(ddof=1) / math.sqrt(growth.size)


def _heston_data() -> dict:
    return tomllib.loads((Path(__file__).resolve().parents[2] / "configs" / "heston.toml").read_text())


def test_model_marks_are_the_default_under_heston_and_merton_only():
    assert parse_config(_heston_data()).pricing.marks == "model"
    demo = tomllib.loads((Path(__file__).resolve().parents[2] / "configs" / "demo.toml").read_text())
    assert parse_config(demo).pricing.marks == "black_scholes"
    demo.setdefault("pricing", {})["marks"] = "model"
    with pytest.raises(ConfigError, match=r"^pricing\.marks: 'model' needs a heston or merton market"):
        parse_config(demo)


def test_hedges_at_the_model_greeks_need_model_marks_and_the_observed_variance():
    data = _heston_data()
    data["baselines"] = [{"kind": "delta"}, {"kind": "minimum_variance_delta"}]
    assert [b.kind for b in parse_config(data).baselines] == ["delta", "minimum_variance_delta"]
    data["market"]["variance_observed"] = False
    with pytest.raises(ConfigError) as blind:
        parse_config(data)
    assert str(blind.value) == ("baselines[1].kind: minimum_variance_delta needs market.variance_observed = true "
                                "(its Greeks depend on the variance)")
    data["market"]["variance_observed"] = True
    data["pricing"]["marks"] = "black_scholes"
    with pytest.raises(ConfigError, match=r"needs pricing\.marks = 'model'"):
        parse_config(data)


def test_the_heston_grid_optimum_needs_a_heston_market_with_model_marks_and_the_variance_observed():
    data = _heston_data()
    data["agents"] = [{"kind": "heston_grid_dp", "variance_points": 31}]
    assert parse_config(data).agents[0].variance_points == 31
    data["agents"] = [{"kind": "grid_dp"}]
    with pytest.raises(ConfigError) as wrong_kind:
        parse_config(data)
    assert str(wrong_kind.value) == ("agents[0].kind: grid_dp solves a one-factor GBM market only, got "
                                     "market.model = 'heston' (heston_grid_dp solves a Heston market)")
    data["agents"] = [{"kind": "heston_grid_dp"}]
    data["market"]["variance_observed"] = False
    data["baselines"] = [{"kind": "delta"}]
    data["report"]["reference_policy"] = "delta"
    with pytest.raises(ConfigError, match=r"^agents\[0\]\.kind: heston_grid_dp needs pricing\.marks = 'model' and "
                                          r"market\.variance_observed = true"):
        parse_config(data)
    demo = tomllib.loads((Path(__file__).resolve().parents[2] / "configs" / "demo.toml").read_text())
    demo["agents"] = [{"kind": "heston_grid_dp"}]
    with pytest.raises(ConfigError, match=r"^agents\[0\]\.kind: heston_grid_dp solves a Heston market only"):
        parse_config(demo)


# --- the memory estimate and the sweep's size, before any work -------------------------------


def test_a_run_too_large_for_the_machine_is_refused_when_the_config_loads_naming_its_keys():
    data = tomllib.loads(MINIMAL)
    data["market"] = {"model": "heston", "spot": 100.0, "initial_variance": 0.04, "mean_reversion": 2.0,
                      "long_run_variance": 0.04, "vol_of_vol": 0.5, "correlation": -0.7, "variance_observed": True}
    data["agents"] = [{"kind": "heston_grid_dp", "spot_points": 2001, "variance_points": 2001,
                       "holding_points": 2001}]  # each within its range; together 8e9 nodes a step
    with pytest.raises(ConfigError) as error:
        parse_config(data)
    message = str(error.value)
    assert message.startswith("agents[0].spot_points: the run would need about ")
    assert "for agents[0]'s value and policy grids (set by agents[0].spot_points, agents[0].variance_points, " \
           "agents[0].holding_points, schedule.steps)" in message and "\n" not in message


@pytest.mark.parametrize("changes, key", [
    ({"data": {"heldout_paths": 10_000_000}}, "data.heldout_paths"),
    ({"data": {"chunk_paths": 10_000_000}}, "data.chunk_paths"),
    ({"report": {"bootstrap_samples": 1_000_000}}, "report.bootstrap_samples"),
    ({"data": {"train_paths": 2_000_000}, "agents": [{"kind": "linear"}]}, "data.train_paths"),
])
def test_the_memory_estimate_names_the_keys_of_its_largest_part(changes, key):
    """On a machine of 4 GB (given, so the test does not depend on this one's memory)."""
    from rehedge.budget import check_memory, memory_parts

    data = tomllib.loads(MINIMAL)
    data.update(changes)
    config = parse_config(data) if key != "report.bootstrap_samples" else None
    if config is None:  # a million resamples of 2,000 batches is 32 GB: refused here on any machine below 43 GB
        config = Config.model_validate(data)
    with pytest.raises(ConfigError, match=rf"^{re.escape(key)}: the run would need about .* of this machine's "
                                          r"4\.0 GB\); make them smaller$"):
        check_memory(config, memory=4 * 2**30)
    check_memory(config, memory=sum(part.bytes for part in memory_parts(config)) / 0.75 + 1)  # fits: no error


def test_a_hedge_table_larger_than_a_reader_accepts_is_refused_before_training():
    data = tomllib.loads(MINIMAL)
    data["export"] = {"policy": "delta", "moneyness_points": 1001, "holding_points": 1001}
    with pytest.raises(ConfigError, match=r"^export.moneyness_points: the hedge table would have 30,060,030 rows, "
                                          r"about 917 MB, more than the 512 MB a table may have"):
        parse_config(data)


def test_a_sweep_of_too_many_cells_is_refused_before_one_is_built(tmp_path):
    text = MINIMAL + "\n[sweep]\n" + "\n".join(
        f'"frictions.{key}" = [{", ".join(str(0.001 * i) for i in range(1, 101))}]'
        for key in ("cost_rate", "fixed_cost", "borrow_fee"))
    from rehedge.config import load_variants

    with pytest.raises(ConfigError, match=r"^sweep: 1,000,000 cells \(the product of the lists' lengths\), more than "
                                          r"the 10,000 a sweep may have"):
        load_variants(write(tmp_path, text))


def test_the_config_ranges_page_is_what_the_schema_checks():
    # docs/config-ranges.md is generated from the schema (python -m rehedge.config_ranges): a range
    # changed in one and not the other fails here.
    from rehedge.config_ranges import ranges_markdown

    page = (Path(__file__).resolve().parents[2] / "docs" / "config-ranges.md").read_text()
    assert page == ranges_markdown(), "regenerate: python -m rehedge.config_ranges > docs/config-ranges.md"
    assert "| any |" not in page  # every numeric key has a documented range


def test_every_policy_and_market_field_is_a_parameter_of_its_class_or_an_application_field():
    # rehedge.build.construct passes a spec's fields to its class by name: a field that matches no
    # parameter would be dropped without a word, so it must be one the application reads itself.
    import inspect
    import typing

    from agents.registry import AGENTS, BASELINES
    from hedge_env.market import MARKET_MODELS
    from rehedge import schema
    from rehedge.build import APPLICATION_FIELDS, construct

    checked = 0
    for union, registry, key in ((schema.BaselineSpec, BASELINES, "kind"), (schema.AgentSpec, AGENTS, "kind"),
                                 (schema.MarketSpec, MARKET_MODELS, "model")):
        for spec in typing.get_args(typing.get_args(union)[0]):
            kind = typing.get_args(spec.model_fields[key].annotation)[0]
            if kind not in registry:  # a history is read, not constructed
                continue
            stray = set(spec.model_fields) - set(inspect.signature(registry[kind]).parameters) - APPLICATION_FIELDS
            assert not stray, (spec.__name__, stray)
            checked += 1
    assert checked == len(BASELINES) + len(AGENTS) + len(MARKET_MODELS)

    class Misspelt(schema.DeltaBaseline):
        volatilty: float | None = None

    with pytest.raises(TypeError, match="volatilty"):
        construct(BASELINES["delta"], Misspelt(kind="delta", name="delta"))
