"""From a validated config to the objects that do the work: problem, market, policies."""

from __future__ import annotations

import math
from dataclasses import replace

from agents import baselines
from agents.config import Config
from agents.tuning import tune_parameter
from hedge_env.book import Book, MarkParameters, OptionLeg
from hedge_env.frictions import Frictions
from hedge_env.market import GBMMarket, PathGenerator, PathSet
from hedge_env.objective import Objective
from hedge_env.problem import HedgingProblem, Schedule


def build_problem(config: Config) -> HedgingProblem:
    """The hedging problem a config describes."""
    market, frictions = config.market, config.frictions
    legs = tuple(
        OptionLeg(o.kind, o.strike, o.expiry_days, o.quantity, o.multiplier) for o in config.book.options
    )
    limit = frictions.position_limit_shares
    return HedgingProblem(
        book=Book(legs),
        marks=MarkParameters(
            volatility=config.pricing.volatility,
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
        ),
        schedule=Schedule(
            steps=config.schedule.steps,
            step_days=config.schedule.step_days,
            settlement=config.schedule.settlement,
        ),
        reference_spot=market.spot,
    )


def build_market(config: Config) -> PathGenerator:
    """The path generator of ``config.market``."""
    market = config.market
    if market.model == "gbm":
        return GBMMarket(spot=market.spot, drift=market.drift, volatility=market.volatility)
    raise ValueError(f"market.model: no generator for {market.model!r}")  # the schema admits no other yet


def build_baseline(spec, problem: HedgingProblem):
    """One baseline policy from its config entry; parameters set to "tune" are left at a placeholder
    and must go through :func:`agents.tuning.tune_baselines` before use."""
    kind, name = spec.kind, spec.name
    if kind == "no_hedge":
        return baselines.NoHedge(problem, name=name)
    if kind == "delta":
        return baselines.DeltaHedge(problem, volatility=spec.volatility, name=name)
    if kind == "leland":
        return baselines.LelandDelta(problem, cost_rate=spec.cost_rate, volatility=spec.volatility, name=name)
    if kind == "whalley_wilmott":
        return baselines.WhalleyWilmottBand(problem, risk_aversion=_fixed_or(spec.risk_aversion, 1.0), name=name)
    if kind == "fixed_band":
        return baselines.FixedBand(problem, half_width=_fixed_or(spec.half_width, 0.0), name=name)
    raise ValueError(f"baselines: unknown kind {kind!r}")


def tuned_parameters(config: Config) -> dict[str, str]:
    """Baseline name -> parameter name, for every baseline whose parameter is "tune"."""
    wanted = {}
    for spec in config.baselines:
        for parameter in ("risk_aversion", "half_width"):
            if getattr(spec, parameter, None) == "tune":
                wanted[spec.name] = parameter
    return wanted


def _fixed_or(value, placeholder: float) -> float:
    return placeholder if value == "tune" else float(value)


def training_paths(config: Config, market: PathGenerator, problem: HedgingProblem):
    """The training paths of ``config.data`` (the only paths tuning and fitting may see)."""
    return market.generate(config.data.train_paths, problem.schedule.steps, problem.dt_years, config.data.train_seed)


def training_path_set(config: Config, market: PathGenerator, problem: HedgingProblem) -> PathSet:
    """The paths of :func:`training_paths`, drawn a chunk at a time when used: memory stays bounded
    at any path count (a rollout over it: ``rollout(problem, policy, paths, paths.n_paths)``)."""
    return PathSet(market, config.data.train_paths, problem.schedule.steps, problem.dt_years, config.data.train_seed)


def prepare_baselines(config: Config, problem: HedgingProblem, market: PathGenerator, train=None):
    """Every configured baseline, with parameters set to "tune" fitted on the training paths.

    Returns ``(policies, tuning)``: name -> policy, and name -> TuningResult
    for the tuned ones. ``train`` are the training paths if already drawn.
    """
    policies = {spec.name: build_baseline(spec, problem) for spec in config.baselines}
    tuning = {}
    wanted = tuned_parameters(config)
    if wanted:
        train = training_path_set(config, market, problem) if train is None else train
        for name, parameter in wanted.items():
            result = tune_parameter(problem, policies[name], parameter, train, config.data.chunk_paths)
            policies[name] = replace(policies[name], **{parameter: result.value})
            tuning[name] = result
    return policies, tuning
