"""Hedge tables, written: any policy on its problem as ``targets.csv``, ``band.csv`` and the
``table.json`` sidecar (the format is :mod:`rehedge.tables.reader`'s), never half-written."""

from __future__ import annotations

import dataclasses
import io
import json
import math
import os
import shutil
from dataclasses import dataclass
from datetime import datetime, timezone
from pathlib import Path

import numpy as np

from agents.band import NO_TRADE_TOLERANCE, no_trade_band
from hedge_env.step import observation_rows
from rehedge.tables.reader import (
    BAND_COLUMNS,
    BAND_FILE,
    FORMAT,
    FORMAT_VERSION,
    INTERPOLATION_RULE,
    SIDECAR,
    TARGET_COLUMNS,
    TARGETS_FILE,
    TableError,
    _leg_dict,
    _sha256,
)

# Significant digits in the CSVs: grid nodes are rounded to them, so they read back exactly.
NODE_DIGITS = 6
TARGET_DIGITS = 7


@dataclass(frozen=True)
class TableGrid:
    """Grid sizes and domain of an export.

    Parameters
    ----------
    moneyness_points : int
        Nodes of the moneyness axis (spot / reference spot), equally spaced.
    holding_points : int
        Nodes of the holding axis, shares, equally spaced.
    moneyness_width : float
        Half-width of the moneyness domain in standard deviations of log spot
        over the horizon (``volatility * sqrt(horizon years)``), around 1.
    moneyness_range : (float, float) or None
        Explicit moneyness domain; overrides ``moneyness_width``.
    holding_range_shares : (float, float) or None
        Explicit holding domain in shares. None: the range of the book's
        Black-Scholes hedge over the grid, widened to 0 and to every target the
        policy names from the ends of that range, padded by ``holding_pad`` of notional.
    holding_pad : float
        Padding of the automatic holding domain on each side, fraction of notional shares.
    """

    moneyness_points: int = 101
    holding_points: int = 41
    moneyness_width: float = 4.0
    moneyness_range: tuple[float, float] | None = None
    holding_range_shares: tuple[float, float] | None = None
    holding_pad: float = 0.05

    def __post_init__(self) -> None:
        if self.moneyness_points < 2 or self.holding_points < 2:
            raise TableError(f"a hedge table needs >= 2 nodes per axis, got moneyness_points="
                             f"{self.moneyness_points}, holding_points={self.holding_points}")
        for name, pair in (("moneyness_range", self.moneyness_range),
                           ("holding_range_shares", self.holding_range_shares)):
            if pair is not None and not pair[0] < pair[1]:
                raise TableError(f"{name} must be (low, high) with low < high, got {pair}")
        if self.moneyness_range is not None and self.moneyness_range[0] <= 0:
            raise TableError(f"moneyness_range must be above 0, got {self.moneyness_range}")


# ---------------------------------------------------------------------------------------------
# Writing
# ---------------------------------------------------------------------------------------------


def _json_safe(value):
    """Parameters as JSON values: numbers, strings, lists, dicts; anything else by its repr."""
    if isinstance(value, bool) or value is None or isinstance(value, str):
        return value
    if isinstance(value, (int, np.integer)):
        return int(value)
    if isinstance(value, (float, np.floating)):
        return float(value) if math.isfinite(value) else None
    if isinstance(value, (list, tuple)):
        return [_json_safe(v) for v in value]
    if isinstance(value, dict):
        return {str(k): _json_safe(v) for k, v in value.items()}
    return repr(value)


def policy_parameters(policy) -> dict:
    """A policy's parameters for the sidecar (the problem itself is described elsewhere in it)."""
    if hasattr(policy, "get_params"):
        params = policy.get_params(deep=False)
    elif dataclasses.is_dataclass(policy):
        params = {f.name: getattr(policy, f.name) for f in dataclasses.fields(policy)}
    else:
        params = {}
    return {k: _json_safe(v) for k, v in params.items() if k not in ("problem", "name")}


def _round_nodes(values: np.ndarray) -> np.ndarray:
    return np.array([float(f"{v:.{NODE_DIGITS}g}") for v in values])


def _days_left_nodes(problem) -> np.ndarray:
    """Days left at each rehedge, ascending: the times a policy is asked at."""
    steps = problem.schedule.steps
    return _round_nodes(np.array([problem.years_to_horizon(k) * problem.marks.days_per_year
                                  for k in range(steps - 1, -1, -1)]))


def _targets_at(policy, problem, days_nodes, money, holdings) -> np.ndarray:
    """The policy's targets (shares) at ``holdings`` (shares) of shape (days, moneyness, ...): a holding
    per point, or per point and holding node. One call of the policy for every point."""
    shape = np.shape(holdings)
    inner = (1,) * (len(shape) - 2)
    years = np.array([problem.years_to_horizon(problem.schedule.steps - 1 - index)
                      for index in range(days_nodes.size)])
    spot = np.broadcast_to((money * problem.reference_spot).reshape(1, -1, *inner), shape)
    obs = observation_rows(problem, spot.ravel(), np.broadcast_to(years.reshape(-1, 1, *inner), shape).ravel(),
                           np.ravel(holdings))
    return np.asarray(policy.act(obs), dtype=float).reshape(shape) * problem.notional_shares


def _holding_domain(policy, problem, grid: TableGrid, days_nodes, money) -> tuple[float, float]:
    notional = problem.notional_shares
    if grid.holding_range_shares is not None:
        low, high = grid.holding_range_shares
    else:
        hedge = np.empty((days_nodes.size, money.size))
        for index in range(days_nodes.size):
            t_days = problem.schedule.horizon_days - days_nodes[index]
            hedge[index] = -problem.book.value_and_delta(money * problem.reference_spot, t_days, problem.marks)[1]
        low, high = min(0.0, hedge.min()), max(0.0, hedge.max())
        for edge in (low, high):
            targets = _targets_at(policy, problem, days_nodes, money, np.full(hedge.shape, edge))
            low, high = min(low, targets.min()), max(high, targets.max())
        low, high = low - grid.holding_pad * notional, high + grid.holding_pad * notional
    limit = problem.frictions.position_limit_shares
    return max(low, -limit), min(high, limit)


def _band(policy, problem, days_nodes, money, holds, targets) -> np.ndarray:
    """Lower and upper no-trade edges (shares) per (day, moneyness); NaN where none is found."""
    return np.stack(no_trade_band(lambda held: _targets_at(policy, problem, days_nodes, money, held), holds,
                                  targets, NO_TRADE_TOLERANCE * problem.notional_shares))


def _format_rows(columns: list[np.ndarray], digits: list[int]) -> bytes:
    """CSV body: numbers in %g with the given significant digits; NaN as 'NaN'."""
    text = io.StringIO()
    formats = [f"%.{d}g" for d in digits]
    table = np.column_stack(columns)
    template = ",".join(formats) + "\n"
    if np.isnan(table).any():
        out = []
        for row in table:
            out.append(",".join("NaN" if math.isnan(v) else fmt % v for fmt, v in zip(formats, row)) + "\n")
        text.write("".join(out))
    else:
        text.write("".join(template % tuple(row) for row in table.tolist()))
    return text.getvalue().encode("ascii")


def table_nodes(policy, problem, grid: TableGrid = TableGrid(),
                volatility: float | None = None) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """The nodes of ``policy``'s hedge table: days left (ascending), moneyness, and holdings (shares).
    ``volatility`` sets the moneyness domain as in :func:`export_table`."""
    days_nodes = _days_left_nodes(problem)
    if grid.moneyness_range is not None:
        m_low, m_high = grid.moneyness_range
    else:
        sd = (problem.marks.volatility if volatility is None else volatility) * math.sqrt(problem.horizon_years)
        m_low, m_high = math.exp(-grid.moneyness_width * sd), math.exp(grid.moneyness_width * sd)
    money = _round_nodes(np.linspace(m_low, m_high, grid.moneyness_points))
    h_low, h_high = _holding_domain(policy, problem, grid, days_nodes, money)
    if not h_low < h_high:
        raise TableError(f"empty holding domain [{h_low:g}, {h_high:g}] shares")
    return days_nodes, money, _round_nodes(np.linspace(h_low, h_high, grid.holding_points))


def export_table(
    policy,
    problem,
    folder: str | Path,
    *,
    grid: TableGrid = TableGrid(),
    kind: str = "",
    config_name: str | None = None,
    config_hash: str | None = None,
    currency: str | None = None,
    volatility: float | None = None,
) -> Path:
    """Write ``policy`` on ``problem`` as a hedge table folder; returns the folder.

    Parameters
    ----------
    policy : Policy
        Anything with ``act(obs)`` (baseline, learned agent, grid DP, another table).
    problem : hedge_env.problem.HedgingProblem
        The problem the policy was made for: book, marks, schedule, frictions, objective.
    folder : path
        The table folder to write. It is built under a temporary name and
        renamed into place, replacing an older table there: never half-written.
    grid : TableGrid
        Grid sizes and domain.
    kind, config_name, config_hash, currency : str, optional
        Written to the sidecar (the policy's kind, the config it came from, a currency label).
    volatility : float, optional
        Volatility of the moneyness domain, annual; default the mark volatility.
    """
    if getattr(policy, "factor_names", ()):
        raise TableError(f"policy {getattr(policy, 'name', '?')!r} observes market factors "
                         f"{tuple(policy.factor_names)}: a hedge table has only time, moneyness and holding")
    folder = Path(folder)
    notional, marks = problem.notional_shares, problem.marks
    days_nodes, money, holds = table_nodes(policy, problem, grid, volatility)
    targets = _targets_at(policy, problem, days_nodes, money,
                          np.broadcast_to(holds, (days_nodes.size, money.size, holds.size)))
    # Rounding dust far below a share (e.g. 1e-70 deep out of the money) is written as 0.
    targets[np.abs(targets) < NO_TRADE_TOLERANCE * 1e-2 * notional] = 0.0
    if not np.isfinite(targets).all():
        raise TableError(f"policy {getattr(policy, 'name', '?')!r} named non-finite targets on the table grid")
    lower, upper = _band(policy, problem, days_nodes, money, holds, targets)

    n_d, n_m, n_h = targets.shape
    target_body = _format_rows(
        [np.repeat(days_nodes, n_m * n_h), np.tile(np.repeat(money, n_h), n_d), np.tile(holds, n_d * n_m),
         targets.ravel()], [NODE_DIGITS] * 3 + [TARGET_DIGITS])
    band_body = _format_rows(
        [np.repeat(days_nodes, n_m), np.tile(money, n_d), lower.ravel(), upper.ravel(),
         targets[..., 0].ravel(), targets[..., -1].ravel()], [NODE_DIGITS] * 2 + [TARGET_DIGITS] * 4)
    files = {
        "targets": (TARGETS_FILE, (",".join(TARGET_COLUMNS) + "\n").encode() + target_body, n_d * n_m * n_h),
        "band": (BAND_FILE, (",".join(BAND_COLUMNS) + "\n").encode() + band_body, n_d * n_m),
    }
    frictions = {f.name: getattr(problem.frictions, f.name) for f in dataclasses.fields(problem.frictions)}
    objective = {f.name: getattr(problem.objective, f.name) for f in dataclasses.fields(problem.objective)}
    schedule = problem.schedule
    meta = {
        "format": FORMAT,
        "format_version": FORMAT_VERSION,
        "created": datetime.now(timezone.utc).isoformat(timespec="seconds"),
        "policy": {"name": getattr(policy, "name", type(policy).__name__), "kind": kind,
                   "class": type(policy).__name__, "parameters": policy_parameters(policy)},
        "config": {"name": config_name, "hash": config_hash},
        "units": {
            "holding_shares": "shares of the underlying held (signed: + long, - short)",
            "target_shares": "target holding, shares of the underlying",
            "days_left": "days left to the hedging horizon (schedule.horizon_days minus days elapsed)",
            "moneyness": "spot / book.reference_spot",
            "spot": "currency per share",
            "currency": currency,
            "days_per_year": float(marks.days_per_year),
        },
        "book": {"legs": [_leg_dict(leg) for leg in problem.book.legs],
                 "notional_shares": float(notional), "reference_spot": float(problem.reference_spot)},
        "marks": {"volatility": float(marks.volatility), "rate": float(marks.rate),
                  "dividend_yield": float(marks.dividend_yield), "days_per_year": float(marks.days_per_year)},
        "schedule": {"steps": schedule.steps, "step_days": float(schedule.step_days),
                     "settlement": schedule.settlement, "horizon_days": float(schedule.horizon_days)},
        "frictions": _json_safe(frictions),
        "objective": _json_safe(objective),
        "grid": {"days_left": days_nodes.tolist(), "moneyness": money.tolist(), "holding_shares": holds.tolist()},
        "domain": {
            "days_left": [float(days_nodes[0]), float(days_nodes[-1])],
            "moneyness": [float(money[0]), float(money[-1])],
            "spot": [float(money[0] * problem.reference_spot), float(money[-1] * problem.reference_spot)],
            "holding_shares": [float(holds[0]), float(holds[-1])],
        },
        "interpolation": INTERPOLATION_RULE,
        "files": {key: {"name": name, "sha256": _sha256(data), "rows": rows,
                        "columns": list(TARGET_COLUMNS if key == "targets" else BAND_COLUMNS)}
                  for key, (name, data, rows) in files.items()},
    }
    return _write_folder(folder, {name: data for name, data, _ in files.values()},
                         json.dumps(meta, indent=2, allow_nan=False).encode() + b"\n")


def _write_folder(folder: Path, csvs: dict[str, bytes], sidecar: bytes) -> Path:
    """Build the table under ``NAME.partial`` and rename it into place (replacing an older one)."""
    folder.parent.mkdir(parents=True, exist_ok=True)
    staging = folder.with_name(folder.name + ".partial")
    if staging.exists():
        shutil.rmtree(staging)
    staging.mkdir()
    try:
        for name, data in csvs.items():
            (staging / name).write_bytes(data)
        (staging / SIDECAR).write_bytes(sidecar)
        if folder.exists():
            old = folder.with_name(folder.name + ".old")
            if old.exists():
                shutil.rmtree(old)
            os.replace(folder, old)
            os.replace(staging, folder)
            shutil.rmtree(old)
        else:
            os.replace(staging, folder)
    except BaseException:
        shutil.rmtree(staging, ignore_errors=True)
        raise
    return folder


# ---------------------------------------------------------------------------------------------
# From configs
# ---------------------------------------------------------------------------------------------


def grid_of(export) -> TableGrid:
    """The table grid of a config's ``[export]`` section (rehedge.config.ExportSpec)."""
    return TableGrid(moneyness_points=export.moneyness_points, holding_points=export.holding_points,
                     moneyness_width=export.moneyness_width)


def export_policy(config, problem, policies: dict, name: str, folder: str | Path) -> Path:
    """Export the policy called ``name`` among ``policies`` (of ``config``) with the grid of
    ``config.export``; an unknown name is a TableError that lists the known ones."""
    from rehedge.config import config_hash

    if name not in policies:
        known = ", ".join(repr(n) for n in policies) or "none"
        raise TableError(f"unknown policy {name!r}; policies: {known}")
    kinds = {spec.name: spec.kind for spec in [*config.baselines, *config.agents]}
    return export_table(policies[name], problem, folder, grid=grid_of(config.export), kind=kinds.get(name, ""),
                        config_name=config.name, config_hash=config_hash(config),
                        currency=config.export.currency, volatility=config.pricing.volatility)


