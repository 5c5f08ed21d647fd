"""Numerical extremes: tiny and huge volatility, deep in and out of the money, one step and a
thousand, zero and huge costs. Every reported number is finite, or null where it is undefined
(the spread in vol points of a book with no vega), never NaN or inf in a metrics file."""

from __future__ import annotations

import copy
import json
import math

import numpy as np
import pytest

from rehedge.compare import evaluate_with_quotes, write_metrics
from rehedge.config import parse_config
from rehedge.training import train

BASE = {
    "name": "extreme", "seed": 1,
    "market": {"model": "gbm", "spot": 100.0, "volatility": 0.2},
    "book": {"options": [{"kind": "call", "strike": 100.0, "expiry_days": 10, "quantity": -1}]},
    "schedule": {"steps": 10},
    "frictions": {"cost_rate": 0.001},
    "objective": {"risk_aversion": 1.0},
    "data": {"train_paths": 300, "heldout_paths": 400, "chunk_paths": 200},
    "baselines": [{"kind": "no_hedge"}, {"kind": "delta"}, {"kind": "leland"},
                  {"kind": "whalley_wilmott", "risk_aversion": "tune"}, {"kind": "fixed_band", "half_width": "tune"}],
    "agents": [{"kind": "linear"}, {"kind": "grid_dp", "spot_points": 31, "holding_points": 31,
                                    "quadrature_nodes": 8}],
}


def variant(**changes) -> dict:
    data = copy.deepcopy(BASE)
    for key, value in changes.items():
        *parents, leaf = key.split("__")
        table = data
        for part in parents:
            table = table[part]
        table[leaf] = value
    return data


def call(strike: float, days: float = 10) -> list[dict]:
    return [{"kind": "call", "strike": strike, "expiry_days": days, "quantity": -1}]


CASES = {
    "volatility 1e-4": variant(market__volatility=1e-4),
    "volatility 3.0": variant(market__volatility=3.0),
    "deep in the money": variant(book__options=call(20.0)),
    "deep out of the money": variant(book__options=call(500.0)),
    "one step": variant(schedule__steps=1, book__options=call(100.0, 1)),
    "zero costs": variant(frictions__cost_rate=0.0),
    "huge costs": variant(frictions__cost_rate=0.5, frictions__impact_coefficient=10.0,
                          frictions__fixed_cost=1e6),
    # 1,000 rehedges of a 10-day option: baselines only (the agents' per-step fits are not the point).
    "1000 steps": variant(schedule__steps=1000, schedule__step_days=0.01, agents=[],
                          data={"train_paths": 100, "heldout_paths": 100, "chunk_paths": 100}),
}


def _no_nan(text: str) -> dict:
    def refuse(constant):
        raise AssertionError(f"metrics.json holds {constant}")
    return json.loads(text, parse_constant=refuse)


@pytest.mark.parametrize("case", list(CASES))
def test_every_metric_is_finite_or_null_at_extremes(case, tmp_path):
    config = parse_config(CASES[case])
    training = train(config)
    evaluation = evaluate_with_quotes(training.problem, training.policies, training.market,
                                      config.data.heldout_paths, 5, kinds=training.kinds, bootstrap_samples=200)
    write_metrics(evaluation, tmp_path)
    metrics = _no_nan((tmp_path / "metrics.json").read_text())
    assert {p["name"] for p in metrics["policies"]} == set(training.policies)
    for policy in metrics["policies"]:
        for key, value in policy.items():
            if isinstance(value, float):
                assert math.isfinite(value), (case, policy["name"], key)
            elif value is None:
                # Only vol-point spreads may be undefined, and only when the book has no vega.
                assert key.endswith("vol_points"), (case, policy["name"], key)
                assert case in ("deep in the money", "deep out of the money", "volatility 1e-4"), (case, key)
    for result in evaluation.results.values():
        assert np.isfinite(result.pnl).all() and np.isfinite(result.reward).all()


def test_deep_in_the_money_delta_hedge_trades_one_share_once_and_keeps_no_risk():
    # A 20-strike call on a 100 stock at 20% vol has delta 1 to machine precision: delta hedging
    # buys one share at the start, holds it, and its P&L is financing-free and riskless
    # (no rate, no dividend). Common practice, no source.
    data = variant(book__options=call(20.0), frictions__cost_rate=0.0, agents=[],
                   baselines=[{"kind": "delta"}])
    config = parse_config(data)
    training = train(config)
    evaluation = evaluate_with_quotes(training.problem, training.policies, training.market, 400, 5)
    result = evaluation.results["delta"]
    assert np.allclose(result.pnl, 0.0, atol=1e-9)
    assert np.allclose(result.trades, 2.0)  # the first buy and the liquidation at the horizon
