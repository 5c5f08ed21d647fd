"""The rules that join sections of a config, each a named function of the whole config. They run in
the order of ``CROSS_SECTION_RULES`` (defaults first, so later rules see them), each raising
``_rule(text, *key_path)`` on a config it refuses."""

from __future__ import annotations

from agents.registry import AGENTS, BASELINES
from hedge_env.market import MARKET_MODELS
from hedge_env.objective import OBJECTIVE_FORMS
from rehedge.schema.base import _num, _rule, _show
from rehedge.schema.markets import HestonMarket, HistoricalMarket
from rehedge.schema.policies import DeltaBaseline, LelandBaseline


def resolve_historical(config) -> None:
    """Rules and defaults of a historical market that involve other sections."""
    market, step_days = config.market, config.schedule.step_days
    if not isinstance(market, HistoricalMarket):
        return
    if not float(step_days).is_integer():
        raise _rule("must be a whole number of trading days (CSV rows) with market.model = 'historical', "
                    f"got {_show(_num(step_days))}", "schedule", "step_days")
    config.schedule.step_days = float(step_days)
    horizon_rows = config.schedule.steps * int(step_days)
    if market.marks == "configured" and config.pricing.volatility is None:
        raise _rule("required with market.marks = 'configured'", "pricing", "volatility")
    if market.marks != "configured" and config.pricing.volatility is not None:
        raise _rule(f"set only with market.marks = 'configured' (marks are {market.marks!r})",
                    "pricing", "volatility")
    if market.gap_days is None:
        market.gap_days = horizon_rows
    if market.heldout_stride_days is None:
        market.heldout_stride_days = horizon_rows


def resolve_marks(config) -> None:
    """``pricing.marks`` defaults to the model's own where the market model prices options itself
    (hedge_env.market, ``has_model_marks``), and 'model' needs such a market, with Heston parameters
    its pricer can take."""
    priced = [name for name, model in MARKET_MODELS.items() if model.has_model_marks]
    model_marks = config.market.model in priced
    if config.pricing.marks is None:
        config.pricing.marks = "model" if model_marks else "black_scholes"
    if config.pricing.marks == "model" and not model_marks:
        raise _rule(f"'model' needs a {' or '.join(priced)} market (the {config.market.model} market's marks are "
                    "Black-Scholes)", "pricing", "marks")
    if config.pricing.marks == "model" and isinstance(config.market, HestonMarket):
        for key in ("vol_of_vol", "mean_reversion", "long_run_variance"):
            if not getattr(config.market, key) > 0:
                raise _rule(f"must be > 0 for Heston model marks (pricing.marks = 'model'), got "
                            f"{_show(getattr(config.market, key))}", "market", key)


def _check_model_hedge(config, hedge: str, i: int, key: str, section: str = "baselines") -> None:
    """A hedge at the mark model's Greeks needs those marks, and their state where the model has one."""
    if config.pricing.marks != "model":
        raise _rule(f"{hedge} needs pricing.marks = 'model' (a heston or merton market)", section, i, key)
    if config.market.model == "heston" and not config.market.variance_observed:
        raise _rule(f"{hedge} needs market.variance_observed = true (its Greeks depend on the "
                    "variance)", section, i, key)


def check_model_hedges(config) -> None:
    """Baselines and agents at the model's Greeks (a model hedge, a band centre, an agent's anchor)."""
    for i, baseline in enumerate(config.baselines):
        if getattr(BASELINES[baseline.kind], "reads_model_greeks", False):  # declared on the class
            _check_model_hedge(config, baseline.kind, i, "kind")
        if getattr(baseline, "center", "delta") != "delta":
            _check_model_hedge(config, baseline.center, i, "center")
    for i, agent in enumerate(config.agents):
        if getattr(agent, "anchor", "delta") != "delta":
            _check_model_hedge(config, agent.anchor, i, "anchor", "agents")
            if agent.blind and config.market.model == "heston":
                raise _rule(f"{agent.anchor} reads the variance: not with blind = true", "agents", i, "anchor")


def resolve_volatilities(config) -> None:
    """``pricing.volatility`` defaults to the market model's own; the delta and Leland baselines
    default to it, and Leland's cost to the frictions'."""
    if config.pricing.volatility is None:
        volatility = config.market.pricing_volatility(config.horizon_days / config.pricing.days_per_year)
        if volatility is not None and not volatility > 0:
            raise _rule("must be given: the market model's default volatility is 0", "pricing", "volatility")
        config.pricing.volatility = volatility
    for baseline in config.baselines:
        if isinstance(baseline, (DeltaBaseline, LelandBaseline)) and baseline.volatility is None:
            baseline.volatility = config.pricing.volatility
        if isinstance(baseline, LelandBaseline) and baseline.cost_rate is None:
            baseline.cost_rate = config.frictions.cost_rate


def resolve_seeds(config) -> None:
    """The training and held-out seeds default from the master seed, and never coincide."""
    data = config.data
    given_train, given_heldout = data.train_seed, data.heldout_seed
    if given_train is not None and given_heldout is not None and given_train == given_heldout:
        raise _rule(f"must differ from data.train_seed, got {given_heldout}", "data", "heldout_seed")
    train = given_train if given_train is not None else 2 * config.seed + 1
    heldout = given_heldout if given_heldout is not None else 2 * config.seed + 2
    if train == heldout:  # exactly one was defaulted and collided: move the defaulted one
        if given_train is None:
            train = heldout + 1
        else:
            heldout = train + 1
    data.train_seed, data.heldout_seed = train, heldout


def check_horizon(config) -> None:
    """The horizon does not run past the last option's expiry."""
    last, last_expiry = max(enumerate(option.expiry_days for option in config.book.options), key=lambda o: o[1])
    if config.horizon_days > last_expiry * (1 + 1e-9):
        raise _rule(
            f"the horizon (schedule.steps x schedule.step_days = {config.horizon_days:g} days) must not run past the "
            f"last option expiry (book.options[{last}].expiry_days = {last_expiry:g})", "schedule", "steps"
        )


def check_permanent_impact(config) -> None:
    """A trade of the whole book's notional moves the price by at most a factor e: beyond that the
    model (every later price times exp(gamma d / ADV)) leaves any market a desk trades in, and a
    policy that trades a few notionals would overflow the factor."""
    impact = config.frictions.permanent_impact * config.notional_shares / config.frictions.adv_shares
    if impact > 1:
        raise _rule(f"permanent_impact x notional shares / adv_shares must be <= 1 (a trade of the whole "
                    f"book moves the price by at most a factor e), got {impact:.4g}", "frictions",
                    "permanent_impact")


def check_agent_markets(config) -> None:
    """What each agent kind solves, as its class declares it (``solves_markets``, ``needs_model_state``,
    ``models_permanent_impact``), and the fitted-Q agent's linear stage under a certainty-equivalent
    objective."""
    form = OBJECTIVE_FORMS[config.objective.kind]
    model = config.market.model
    for i, agent in enumerate(config.agents):
        kind, cls = agent.kind, AGENTS[agent.kind]
        if cls.solves_markets is not None and model not in cls.solves_markets:
            others = [f"{name} solves {other.market_words}" for name, other in AGENTS.items()
                      if other.solves_markets and model in other.solves_markets]
            raise _rule(f"{kind} solves {cls.market_words} only, got market.model = {model!r}"
                        + (f" ({'; '.join(others)})" if others else ""), "agents", i, "kind")
        if cls.needs_model_state and (config.pricing.marks != "model" or not config.market.variance_observed):
            raise _rule(f"{kind} needs pricing.marks = 'model' and market.variance_observed = true (its state is "
                        "the spot, the variance and the holding)", "agents", i, "kind")
        if config.frictions.permanent_impact and not cls.models_permanent_impact(form):
            under = "" if not any(cls.models_permanent_impact(f) for f in OBJECTIVE_FORMS.values()) else (
                f" under objective.kind = {config.objective.kind!r}")
            raise _rule(f"{kind}{under} does not model permanent impact", "agents", i, "kind")
        if kind == "fitted_q" and form.certainty_equivalent and agent.linear_basis == "none":
            raise _rule("must not be 'none' with objective.kind = 'exponential' (the linear stage carries the "
                        "value's level across states)", "agents", i, "linear_basis")


def check_policy_names(config) -> None:
    """Policy names are unique, and the report's reference and the export's policy name one."""
    seen: set[str] = set()
    for section, policies in (("baselines", config.baselines), ("agents", config.agents)):
        for i, policy in enumerate(policies):
            if policy.name in seen:
                raise _rule(f"duplicate policy name {policy.name!r}", section, i, "name")
            seen.add(policy.name)
    names = config.policy_names
    known = ", ".join(repr(n) for n in names) if names else "none (no baselines or agents)"
    reference = config.report.reference_policy
    if reference not in seen:
        default = "" if "reference_policy" in config.report.model_fields_set else " (the default)"
        raise _rule(f"unknown policy {reference!r}{default}; policies: {known}", "report", "reference_policy")
    if config.export.policy is not None and config.export.policy not in seen:
        raise _rule(f"unknown policy {config.export.policy!r}; policies: {known}", "export", "policy")


# In order: each may rely on the defaults the ones before it filled in.
CROSS_SECTION_RULES = (resolve_historical, resolve_marks, check_model_hedges, resolve_volatilities, resolve_seeds,
                       check_horizon, check_permanent_impact, check_agent_markets, check_policy_names)
