"""From a validated config to the objects that do the work: problem, market, policies."""

from __future__ import annotations

import inspect
import math
from dataclasses import replace

import numpy as np

from agents.registry import AGENTS, BASELINES
from agents.tuning import trial_count, tune_parameter
from hedge_env.book import Book, MarkParameters, OptionLeg
from hedge_env.frictions import Frictions
from hedge_env.history import (
    HistoricalWindows,
    History,
    HistoryError,
    StationaryBootstrap,
    parse_history,
    split_history,
)
from hedge_env.market import MARKET_MODELS, PathGenerator, PathSet
from hedge_env.objective import Objective
from hedge_env.problem import HedgingProblem, Schedule
from rehedge.errors import ConfigError
from rehedge.files import HISTORY_BYTES, read_regular
from rehedge.schema import Config


def build_problem(config: Config) -> HedgingProblem:
    """The hedging problem a config describes."""
    market, frictions = config.market, config.frictions
    volatility, observed = config.pricing.volatility, False
    if market.model == "historical" and market.marks != "configured":
        # Realised: of the training part. Implied: per path and date from the market; the mean over
        # the training part is the typical level (scales, quotes).
        train = historical_parts(config)[0]
        observed = market.marks == "implied"
        volatility = (float(np.mean(train.implied_volatility)) if observed
                      else train.realised_volatility(config.pricing.days_per_year))
    legs = tuple(
        OptionLeg(o.kind, o.strike, o.expiry_days, o.quantity, o.multiplier) for o in config.book.options
    )
    limit = frictions.position_limit_shares
    model = None
    if config.pricing.marks == "model":  # the market model's own pricer (hedge_env.market, has_model_marks)
        model = build_market(config).mark_pricer(market.rate, market.dividend_yield)
    return HedgingProblem(
        book=Book(legs),
        marks=MarkParameters(
            volatility=volatility,
            rate=market.rate,
            dividend_yield=market.dividend_yield,
            days_per_year=config.pricing.days_per_year,
        ),
        frictions=Frictions(
            cost_rate=frictions.cost_rate,
            fixed_cost=frictions.fixed_cost,
            impact_coefficient=frictions.impact_coefficient,
            impact_exponent=frictions.impact_exponent,
            permanent_impact=frictions.permanent_impact,
            adv_shares=frictions.adv_shares,
            cash_rate=market.rate,
            borrow_fee=frictions.borrow_fee,
            dividend_yield=market.dividend_yield,
            position_limit_shares=math.inf if limit is None else limit,
        ),
        objective=Objective(
            risk_aversion=config.objective.risk_aversion,
            var_levels=tuple(config.objective.var_levels),
            entropic_risk_aversion=config.objective.entropic_risk_aversion,
            kind=config.objective.kind,
        ),
        schedule=Schedule(
            steps=config.schedule.steps,
            step_days=config.schedule.step_days,
            settlement=config.schedule.settlement,
        ),
        reference_spot=market.spot,
        mark_volatility_observed=observed,
        mark_model=model,
        # The Heston variance, when observed, is the first (only) observed factor.
        mark_state_column=3 if model is not None and getattr(market, "variance_observed", False) else None,
    )


def build_market(config: Config) -> PathGenerator:
    """The path generator of a simulated ``config.market`` (its class from ``MARKET_MODELS``)."""
    return construct(MARKET_MODELS[config.market.model], config.market)


# Config fields that the application reads rather than the class it builds: the kind's name, what an agent
# learns from (its exploration, whether it is blind to the factors, its regressor's parameters), the
# market's rate and dividend yield (the marks').
APPLICATION_FIELDS = frozenset({"kind", "model", "blind", "exploration", "regressor_params", "rate", "dividend_yield"})


def construct(cls, spec, **given):
    """``cls(...)`` with ``given`` arguments, then every other parameter of ``cls`` that ``spec`` has as a
    field (a list becomes a tuple; None, and "tune" for a parameter still to be tuned, keep the class
    default). Adding a kind is its class and its schema: the names match, and a schema field that names
    no parameter (nor an ``APPLICATION_FIELDS`` one) is a TypeError, not silently dropped."""
    parameters = inspect.signature(cls).parameters
    stray = sorted(set(type(spec).model_fields) - set(parameters) - APPLICATION_FIELDS)
    if stray:
        raise TypeError(f"{type(spec).__name__} has fields {stray} that {cls.__name__} does not take")
    arguments = dict(given)
    for name in parameters:
        value = getattr(spec, name, None)
        if name in arguments or value is None or (isinstance(value, str) and value == "tune"):
            continue
        arguments[name] = tuple(value) if isinstance(value, list) else value
    return cls(**arguments)


def build_markets(config: Config) -> tuple[PathGenerator, PathGenerator]:
    """``(training source, held-out source)`` of ``config.market``.

    A simulated model is one generator for both (training paths from
    ``data.train_seed``, held-out ones from ``data.heldout_seed``). A history
    gives the rolling windows or the bootstrap of its early part for training
    and the rolling windows of its later part for held-out testing; see
    :func:`path_count` for how many paths each gives.
    """
    market = config.market
    if market.model != "historical":
        source = build_market(config)
        return source, source
    train, heldout = historical_parts(config)
    steps, step_rows = config.schedule.steps, int(config.schedule.step_days)
    implied = market.marks == "implied"
    if market.training == "bootstrap":
        train_source = StationaryBootstrap(history=train, spot=market.spot, step_rows=step_rows,
                                           mean_block_rows=market.bootstrap_mean_block_days, implied_marks=implied)
    else:
        train_source = HistoricalWindows.build(train, steps, step_rows, market.stride_days, market.spot,
                                               implied, role="training")
    heldout_source = HistoricalWindows.build(heldout, steps, step_rows, market.heldout_stride_days, market.spot,
                                             implied, role="held-out")
    return train_source, heldout_source


def historical_parts(config: Config) -> tuple[History, History]:
    """The training and held-out parts of ``config.market``'s history; CSV problems are ConfigErrors
    naming ``market.csv`` (and the row), split problems the split key."""
    market = config.market
    try:
        raw = read_regular(market.csv, HISTORY_BYTES, HistoryError, "CSV file")
        history = parse_history(raw, market.csv, market.date_column, market.close_column,
                                market.implied_volatility_column, market.implied_volatility_unit, market.date_format)
    except HistoryError as error:
        raise ConfigError(f"market.csv: {error}", key="market.csv") from None
    key = "market.split_date" if market.split_date is not None else "market.split_fraction"
    try:
        return split_history(history, config.schedule.steps * int(config.schedule.step_days),
                             market.split_date, market.split_fraction, market.gap_days)
    except HistoryError as error:
        raise ConfigError(f"{key}: {error}", key=key) from None


def path_count(source: PathGenerator, requested: int) -> int:
    """Paths to draw from ``source``: ``requested``, capped by what a history's windows give."""
    return requested if source.max_paths is None else min(requested, source.max_paths)


def describe_markets(train: PathGenerator, heldout: PathGenerator) -> dict:
    """Date ranges and counts of the training and held-out sources ({} for a simulated model)."""
    facts = {"train": train.describe(), "heldout": heldout.describe()}
    return facts if any(facts.values()) else {}


def build_baseline(spec, problem: HedgingProblem):
    """One baseline policy from its config entry; parameters set to "tune" keep the class default until
    :func:`prepare_baselines` tunes them."""
    return construct(BASELINES[spec.kind], spec, problem=problem)


def build_agent(spec, problem: HedgingProblem, market: PathGenerator):
    """An unfitted agent from its config entry, with what it takes from the market (``model_inputs``)."""
    return construct(AGENTS[spec.kind], spec, problem=problem, **spec.model_inputs(market))


def tuned_parameters(config: Config) -> dict[str, str]:
    """Baseline name -> parameter name, for every baseline with a field set to "tune" (the schema lets
    only a tunable field take it; the policy's class declares its search, ``search_spaces``)."""
    return {spec.name: parameter for spec in config.baselines
            for parameter, value in spec if isinstance(value, str) and value == "tune"}


def training_path_set(config: Config, market: PathGenerator, problem: HedgingProblem) -> PathSet:
    """The training paths of ``config.data`` from the training source (the only paths tuning and
    fitting may see; a history's windows cap their number), drawn a chunk at a time when used, so
    memory stays bounded at any path count (a rollout over it: ``rollout(problem, policy, paths,
    paths.n_paths)``; all at once: ``paths.rows(0, paths.n_paths)``)."""
    n_paths = path_count(market, config.data.train_paths)
    return PathSet(market, n_paths, problem.schedule.steps, problem.dt_years, config.data.train_seed)


def prepare_baselines(config: Config, problem: HedgingProblem, market: PathGenerator, train=None, start=None):
    """Every configured baseline, with parameters set to "tune" fitted on the training paths.

    Returns ``(policies, tuning)``: name -> policy, and name -> TuningResult
    for the tuned ones. ``train`` are the training paths if already drawn;
    ``start(label, total) -> advance(n)`` reports the tuning trials.
    """
    policies = {spec.name: build_baseline(spec, problem) for spec in config.baselines}
    tuning = {}
    wanted = tuned_parameters(config)
    if wanted:
        train = training_path_set(config, market, problem) if train is None else train
        total = sum(trial_count(problem, policies[name], parameter) for name, parameter in wanted.items())
        advance = start("tuning baselines on training paths (trials)", total) if start else None
        for name, parameter in wanted.items():
            result = tune_parameter(problem, policies[name], parameter, train, config.data.chunk_paths, advance)
            policies[name] = replace(policies[name], **{parameter: result.value})
            tuning[name] = result
        if advance is not None:  # the refinement may stop early: the bar ends full
            advance(total - sum(len(result.trials) for result in tuning.values()))
    return policies, tuning
