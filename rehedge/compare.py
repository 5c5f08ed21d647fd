"""Score policies on the same held-out paths and tabulate the results."""

from __future__ import annotations

import json
import math
from collections.abc import Callable
from dataclasses import dataclass, replace
from functools import cached_property
from pathlib import Path

import numpy as np
import pandas as pd
from scipy.optimize import brentq

from agents.policy import Mirrored
from hedge_env import pricing
from hedge_env.book import Book
from hedge_env.market import MarketPaths, PathGenerator
from hedge_env.objective import (Objective, conditional_value_at_risk, level_tag, resampled_certainty_equivalent,
                                 resampled_mean)
from hedge_env.problem import HedgingProblem
from hedge_env.rollout import HedgeResult, PolicyOutputError, rollout_many
from rehedge.errors import PolicyError


def resample_batches(n: int, samples: int, seed: int, batches: int = 2000):
    """Bootstrap resamples of ``n`` paths in ``batches`` consecutive batches (iid, like the paths
    themselves; with fewer paths than batches, one path a batch): the batch starts, the resampled
    batch indices (samples, groups) and each resample's path count."""
    groups = min(n, batches)
    starts = (np.arange(groups) * n) // groups
    counts = np.diff(np.append(starts, n))
    draws = np.random.default_rng(seed).integers(0, groups, size=(samples, groups))
    return starts, draws, counts[draws].sum(axis=1)


def _bounds(resampled: np.ndarray, level: float) -> tuple[float, float]:
    """The percentile interval at ``level`` of a bootstrap's resampled values."""
    tail = (1.0 - level) / 2.0
    low, high = np.quantile(resampled, [tail, 1.0 - tail])
    return float(low), float(high)


def _interval(name_values: dict[str, tuple[float, np.ndarray]], level: float) -> dict[str, dict[str, float]]:
    out = {}
    for name, (mean, resampled) in name_values.items():
        low, high = _bounds(resampled, level)
        out[name] = {"mean": float(mean), "ci_low": low, "ci_high": high}
    return out


def paired_bootstrap(differences: dict[str, np.ndarray], samples: int = 2000, seed: int = 0,
                     batches: int = 2000, level: float = 0.95) -> dict[str, dict[str, float]]:
    """Mean of each per-path difference and its percentile bootstrap interval.

    The resampling is over paths (:func:`resample_batches`); the same resamples serve every
    policy, so the intervals are paired and reproducible from ``seed``.
    """
    n = len(next(iter(differences.values())))
    resamples = resample_batches(n, samples, seed, batches)
    return _interval({name: (diff.mean(), resampled_mean(diff, resamples)) for name, diff in differences.items()},
                     level)


def resampled_objective(result: HedgeResult, resamples) -> tuple[float, np.ndarray]:
    """A policy's objective on all paths and on each resample of :func:`resample_batches` (its
    objective's own resampled score)."""
    objective = result.objective
    return objective.form.resampled_score(objective, result.pnl, result.reward, resamples)


def certainty_equivalent_bootstrap(pnl: dict[str, np.ndarray], reference: str, gamma: float, samples: int = 2000,
                                   seed: int = 0, batches: int = 2000,
                                   level: float = 0.95) -> dict[str, dict[str, float]]:
    """Each policy's certainty equivalent ``-1/gamma log E[exp(-gamma P&L)]`` minus the reference's, and
    the percentile bootstrap interval of that difference: the resamples of :func:`paired_bootstrap`
    (the same for every policy), each policy's CE recomputed on each resample."""
    objective = Objective(risk_aversion=gamma, kind="exponential")
    resamples = resample_batches(len(pnl[reference]), samples, seed, batches)
    return _interval(objective.form.versus(objective, pnl, {}, reference, resamples), level)


def objective_versus(results: dict[str, HedgeResult], reference: str, samples: int = 2000, seed: int = 0,
                     batches: int = 2000, level: float = 0.95) -> dict[str, dict[str, float]]:
    """Each policy's objective minus the reference's on the same paths, with its paired bootstrap
    interval, as the objective pairs them (``versus``: per-path reward differences under
    mean-variance, certainty equivalents recomputed on each resample under exponential utility)."""
    objective = results[reference].objective
    resamples = resample_batches(results[reference].n_paths, samples, seed, batches)
    pnl = {name: r.pnl for name, r in results.items()}
    reward = {name: r.reward for name, r in results.items()}
    return _interval(objective.form.versus(objective, pnl, reward, reference, resamples), level)


_BLOCK_NUMBERS = 2_000_000


def resampled_tails(pnl: np.ndarray, level: float, resamples, chunk: int = 256) -> tuple[np.ndarray, np.ndarray]:
    """VaR and CVaR at ``level`` of each resample of :func:`resample_batches`, by the estimators of
    :func:`~hedge_env.objective.value_at_risk` and :func:`~hedge_env.objective.conditional_value_at_risk`
    on the resample's paths: each path weighted by how often its batch is drawn, read in the sorted order
    of all paths. Only the worst paths are read, and more only when a resample's tail reaches past them."""
    starts, draws, counts = resamples
    n, samples, groups = pnl.size, draws.shape[0], starts.size
    batch_of = np.repeat(np.arange(groups), np.diff(np.append(starts, n)))
    order = np.argsort(pnl, kind="stable")
    ordered = pnl[order]
    drawn = np.bincount((np.arange(samples)[:, None] * groups + draws).ravel(),
                        minlength=samples * groups).reshape(samples, groups)
    tail = (1.0 - level) * counts
    needed = np.minimum(np.maximum(np.ceil(np.round(tail, 9)), 1.0), counts)  # the VaR's rank on each resample
    var, cvar = np.empty(samples), np.empty(samples)
    # The worst paths a resample's tail is likely to reach: the tail's count, plus 8 standard deviations
    # of a resample's weight on them (a batch drawn Poisson(1) times carries n / groups paths).
    expected = (1.0 - level) * n
    read = min(n, int(expected + 8.0 * math.sqrt(expected * (1.0 + expected / groups))) + 64)
    # Resamples a block, so a block's (resamples, paths read) arrays stay near 2 M numbers (16 MB) at any
    # path count (256 resamples x 50,000 tail paths of a million held three such arrays of 100 MB).
    chunk = max(1, min(chunk, _BLOCK_NUMBERS // read))
    for first in range(0, samples, chunk):
        rows = slice(first, first + chunk)
        while True:
            weights = drawn[rows][:, batch_of[order[:read]]].astype(float)
            through = np.cumsum(weights, axis=1)
            if read == n or (through[:, -1] >= np.maximum(needed[rows], tail[rows])).all():
                break
            read = min(n, 2 * read)
        var[rows] = -ordered[np.argmax(through >= needed[rows, None], axis=1)]
        share = np.clip(tail[rows, None] - (through - weights), 0.0, weights)
        cvar[rows] = -(share @ ordered[:read]) / tail[rows]
    return var, cvar


def tail_intervals(results: dict[str, HedgeResult], samples: int = 2000, seed: int = 0, batches: int = 2000,
                   level: float = 0.95) -> dict[str, dict[str, float]]:
    """Percentile bootstrap intervals of each policy's tail figures, ``{key}_ci_low`` and
    ``{key}_ci_high`` for every ``var_``/``cvar_`` level and the entropic risk ``log E[exp(-theta P&L)]
    / theta``, over one set of resamples of :func:`resample_batches` (a tail figure moves a lot with the
    paths: the issue that asked for them saw entropic risk at 1,947 on 50,000 paths and 3,011 on 200,000)."""
    first = next(iter(results.values()))
    objective = first.objective
    resamples = resample_batches(first.n_paths, samples, seed, batches)
    out = {}
    for name, result in results.items():
        resampled = {}
        for var_level in objective.var_levels:
            tag = level_tag(var_level)
            resampled[f"var_{tag}"], resampled[f"cvar_{tag}"] = resampled_tails(result.pnl, var_level, resamples)
        if objective.entropic_theta > 0:
            resampled["entropic_risk"] = -resampled_certainty_equivalent(result.pnl, objective.entropic_theta,
                                                                         resamples)[1]
        out[name] = {}
        for key, values in resampled.items():
            out[name][f"{key}_ci_low"], out[name][f"{key}_ci_high"] = _bounds(values, level)
    return out


@dataclass
class Evaluation:
    """Held-out results of several policies on the same paths, ranked by objective."""

    results: dict[str, HedgeResult]
    kinds: dict[str, str]
    seed: int
    reference: str | None = None
    bootstrap_samples: int = 2000
    bootstrap_seed: int = 0
    quotes: dict[str, dict[str, float]] | None = None

    @cached_property
    def _intervals(self) -> dict[str, dict[str, float]]:
        """Each policy's bootstrap columns (they do not change once scored, so they are resampled once):
        its difference from the reference (``vs_reference_*``) and its tail figures' intervals."""
        columns = tail_intervals(self.results, self.bootstrap_samples, self.bootstrap_seed)
        if self.reference in self.results:
            versus = objective_versus(self.results, self.reference, self.bootstrap_samples, self.bootstrap_seed)
            for name, interval in versus.items():
                columns[name] = {**{f"vs_reference_{key}": value for key, value in interval.items()}, **columns[name]}
        return columns

    @property
    def table(self) -> pd.DataFrame:
        rows = [result.summary() for result in self.results.values()]
        table = pd.DataFrame(rows)
        table.insert(0, "kind", [self.kinds.get(name, "") for name in table.index])
        for name, columns in self._intervals.items():
            for key, value in columns.items():
                table.loc[name, key] = value
        if self.quotes:
            for key in next(iter(self.quotes.values())):
                table[key] = [self.quotes[name][key] for name in table.index]
        table.index.name = "policy"
        return table.sort_values("objective", ascending=False)

    def to_records(self) -> list[dict]:
        """One dict per policy, best first, with plain Python numbers (for JSON; NaN as None)."""
        records = []
        for name, row in self.table.iterrows():
            record = {"name": name}
            for key, value in row.items():
                value = value.item() if isinstance(value, np.generic) else value
                if isinstance(value, float) and not np.isfinite(value):
                    value = None  # JSON has no NaN: an undefined number is null
                if key.startswith("vs_reference_"):
                    record.setdefault("vs_reference", {"policy": self.reference})[key[13:]] = value
                else:
                    record[key] = value
            records.append(record)
        return records


def evaluate_policies(
    problem: HedgingProblem,
    policies: dict[str, object],
    source: PathGenerator | MarketPaths,
    n_paths: int | None,
    seed: int,
    kinds: dict[str, str] | None = None,
    chunk_paths: int = 8192,
    progress: Callable[[int], None] | None = None,
    reference: str | None = "delta",
    bootstrap_samples: int = 2000,
) -> Evaluation:
    """Hedge the same ``n_paths`` held-out paths with every policy; differences are paired
    against ``reference`` (a policy name) path by path, with a bootstrap over paths seeded
    from the held-out seed. A policy that names a non-finite target stops the comparison with a
    PolicyError (one line: the policy, the decision and the path)."""
    try:
        results = rollout_many(problem, policies, source, n_paths, seed, chunk_paths, progress=progress)
    except PolicyOutputError as error:
        raise PolicyError(str(error)) from None
    return Evaluation(results, kinds or {}, seed, reference, bootstrap_samples, bootstrap_seed=seed + 1)


def write_metrics(evaluation: Evaluation, folder: Path) -> None:
    """metrics.csv (one row per policy), metrics.json (the same numbers) and heldout.npz (per-path
    P&L, reward and costs, and the mean cost per step, of every policy) into ``folder``."""
    folder = Path(folder)
    evaluation.table.to_csv(folder / "metrics.csv")
    arrays = {"policies": np.array(list(evaluation.results))}
    for name, result in evaluation.results.items():
        arrays[f"pnl__{name}"] = result.pnl
        arrays[f"reward__{name}"] = result.reward
        arrays[f"cost__{name}"] = result.trading_cost + result.impact_cost
        arrays[f"step_cost__{name}"] = result.step_cost
    np.savez_compressed(folder / "heldout.npz", **arrays)
    payload = {"heldout_seed": evaluation.seed, "reference_policy": evaluation.reference,
               "bootstrap_samples": evaluation.bootstrap_samples, "bootstrap_seed": evaluation.bootstrap_seed,
               "policies": evaluation.to_records()}
    (folder / "metrics.json").write_text(json.dumps(payload, indent=2) + "\n")


def opposite_problem(problem: HedgingProblem) -> HedgingProblem:
    """The same problem with every option quantity negated (the other side of the trade)."""
    legs = tuple(replace(leg, quantity=-leg.quantity) for leg in problem.book.legs)
    return replace(problem, book=Book(legs))


def implied_book_volatility(problem: HedgingProblem, premium: float) -> float:
    """Volatility at which the configured position's Black-Scholes liability equals ``premium``
    (NaN when no volatility in [0.1%, 500%] does)."""
    spot = np.array([problem.reference_spot])

    def gap(vol: float) -> float:
        return float(-problem.book.value(spot, 0.0, problem.marks, vol)[0]) - premium

    low, high = 1e-3, 5.0
    if gap(low) * gap(high) > 0:
        return float("nan")
    return float(brentq(gap, low, high, xtol=1e-10))


# The conservative quotes' level: mark plus the CVaR of the hedged loss at 95%.
QUOTE_CVAR_LEVEL = 0.95


def quotes(problem: HedgingProblem, evaluation: Evaluation, opposite: Evaluation,
           state0=None) -> dict[str, dict[str, float]]:
    """Per policy, the premium the risk justifies, for the book as configured and the opposite book.

    ``mark`` is the configured position's liability at t0 at the problem's marks
    (Black-Scholes, or the mark model's price with its state ``state0``): for a
    short book, the premium of the options sold. Mean-variance indifference:
    ``quote_ask = mark - objective`` (the premium at which the expected summed
    reward plus premium minus mark is zero) and ``quote_bid = mark +
    objective of the opposite book``. Exponential utility: the same with the
    certainty equivalent discounted from the horizon, ``quote_ask = mark -
    exp(-r T) CE``: the utility-indifference prices (Hodges and Neuberger
    1989), exact because the certainty equivalent is cash invariant, the
    policy does not read the cash, and a premium above the mark earns
    ``exp(r T)`` by the horizon in the cash account; conservative: ``cvar_ask = mark + CVaR95``
    and ``cvar_bid = mark - CVaR95`` of the opposite book. Spreads over the mark
    are in currency and in volatility points (implied volatility of the quote
    minus the mark volatility, x 100; for a book with no implied volatility at
    that premium, the spread over the book's vega per vol point).
    """
    spot = np.array([problem.reference_spot])
    state = None if state0 is None else np.array([state0])
    mark = float(-problem.book_value_and_delta(spot, 0.0, state)[0][0])
    vol_points = 100.0 * problem.marks.volatility
    if problem.mark_model is not None:  # spreads from the model mark's own implied volatility
        mark_implied = implied_book_volatility(problem, mark)
        vol_points = 100.0 * mark_implied if np.isfinite(mark_implied) else vol_points
    marks = problem.marks
    vega_point = 0.01 * abs(sum(
        leg.shares * float(pricing.vega(spot, leg.strike, leg.expiry_days / marks.days_per_year, marks.volatility,
                                        marks.rate, marks.dividend_yield, leg.is_call)[0])
        for leg in problem.book.legs))
    # The mean-variance objective is a sum of step rewards, not a horizon amount: it is not discounted.
    discount = (math.exp(-problem.frictions.cash_rate * problem.horizon_years)
                if problem.objective.certainty_equivalent else 1.0)
    out = {}
    for name, result in evaluation.results.items():
        other = opposite.results[name]
        row = {
            "mark": mark,
            "quote_ask": mark - discount * result.objective_value,
            "quote_bid": mark + discount * other.objective_value,
            # From the P&L, not the summary: objective.var_levels need not list 0.95.
            "cvar_ask": mark + conditional_value_at_risk(result.pnl, QUOTE_CVAR_LEVEL),
            "cvar_bid": mark - conditional_value_at_risk(other.pnl, QUOTE_CVAR_LEVEL),
            "vega_per_vol_point": vega_point,
        }
        for side in ("ask", "bid"):
            spread = abs(row[f"quote_{side}"] - mark)
            implied = implied_book_volatility(problem, row[f"quote_{side}"])
            # A book whose value is not monotone in volatility (a spread) has no implied volatility
            # for every premium: then the spread is expressed per vol point of the book's vega.
            # With no vega either (deep in or out of the money) vol points mean nothing: NaN, null in JSON.
            if np.isfinite(implied):
                points = abs(100.0 * implied - vol_points)
            else:
                points = spread / vega_point if vega_point > 0 else float("nan")
            row[f"spread_{side}"] = spread
            row[f"spread_{side}_vol_points"] = float(points)
        out[name] = row
    return out


def evaluate_with_quotes(problem, policies, source, n_paths, seed, **options) -> Evaluation:
    """Held-out evaluation of ``policies`` and of their mirrors on the opposite book (same paths)."""
    evaluation = evaluate_policies(problem, policies, source, n_paths, seed, **options)
    mirrored = {name: Mirrored(policy) for name, policy in policies.items()}
    options = {**options, "progress": None}
    opposite = evaluate_policies(opposite_problem(problem), mirrored, source, n_paths, seed, **options)
    state0 = None
    if problem.mark_model is not None and problem.mark_factor is not None:
        first = source.generate(1, problem.schedule.steps, problem.dt_years, seed)
        state0 = float(first.factors[problem.mark_factor][0, 0])
    evaluation.quotes = quotes(problem, evaluation, opposite, state0)
    return evaluation


def table_beside_sources(run, policies: dict, name: str, folder, n_paths: int, seed: int):
    """An exported hedge table (``folder``) scored on ``n_paths`` held-out paths of ``run`` beside its
    source policy ``name`` and the run's baselines: the table's policy name, the records by name
    (each with its paired difference from the table) and the baselines that score above it."""
    from rehedge.tables.reader import tables_as_policies

    loaded, _ = tables_as_policies([folder], run.problem)
    (table_name, table), = loaded.items()
    compared = {table_name: table, name: policies[name], **{b: p for b, p in run.baselines.items() if b != name}}
    evaluation = evaluate_policies(run.problem, compared, run.heldout_market, n_paths, seed, reference=table_name,
                                   chunk_paths=run.config.data.chunk_paths,
                                   bootstrap_samples=run.config.report.bootstrap_samples)
    records = {r["name"]: r for r in evaluation.to_records()}
    winners = [b for b in run.baselines if b != name and records[b]["objective"] > records[table_name]["objective"]]
    return table_name, records, winners
