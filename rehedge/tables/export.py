"""Hedge tables, written: any policy on its problem as ``targets.csv``, ``band.csv`` and the
``table.json`` sidecar (the format is :mod:`rehedge.tables.reader`'s), never half-written."""

from __future__ import annotations

import dataclasses
import io
import json
import math
import os
import shutil
import tempfile
from dataclasses import dataclass
from datetime import datetime, timezone
from pathlib import Path

import numpy as np

from agents.band import NO_TRADE_TOLERANCE, no_trade_band
from agents.dataset import Exploration, collect_chunks
from hedge_env.market import MARK_VOLATILITY_FACTOR
from hedge_env.rollout import rollout
from hedge_env.step import observation_rows
from rehedge.tables.reader import (
    BAND_FILE,
    FORMAT,
    FORMAT_VERSION,
    INTERPOLATION_RULE,
    SIDECAR,
    SIDECAR_HASH_KEY,
    STATE_AXES,
    TARGETS_FILE,
    TableError,
    _leg_dict,
    _sha256,
    band_columns,
    is_table_folder,
    sidecar_digest,
    target_columns,
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
    state_points : int
        Nodes of the state axis (a policy that reads the variance or an implied
        volatility), equally spaced in volatility (a variance axis's nodes are
        the squares of equally spaced volatilities).
    state_range : (float, float) or None
        The state axis's domain, in its units; :func:`export_table` takes it from
        its ``state_range`` argument when None.
    """

    moneyness_points: int = 101
    holding_points: int = 41
    moneyness_width: float = 4.0
    moneyness_range: tuple[float, float] | None = None
    holding_range_shares: tuple[float, float] | None = None
    holding_pad: float = 0.05
    state_points: int = 13
    state_range: tuple[float, float] | None = None

    def __post_init__(self) -> None:
        if self.moneyness_points < 2 or self.holding_points < 2 or self.state_points < 2:
            raise TableError(f"a hedge table needs >= 2 nodes per axis, got moneyness_points="
                             f"{self.moneyness_points}, holding_points={self.holding_points}, "
                             f"state_points={self.state_points}")
        for name, pair in (("moneyness_range", self.moneyness_range),
                           ("holding_range_shares", self.holding_range_shares),
                           ("state_range", self.state_range)):
            if pair is not None and not pair[0] < pair[1]:
                raise TableError(f"{name} must be (low, high) with low < high, got {pair}")
        if self.moneyness_range is not None and self.moneyness_range[0] <= 0:
            raise TableError(f"moneyness_range must be above 0, got {self.moneyness_range}")
        if self.state_range is not None and self.state_range[0] < 0:
            raise TableError(f"state_range must be >= 0, got {self.state_range}")


# The market factor each state axis reads (observation column 3).
STATE_FACTORS = {"variance": "variance", "implied_vol": MARK_VOLATILITY_FACTOR}


def table_state(policy, problem) -> str | None:
    """The state axis ``policy``'s table needs on ``problem``: ``implied_vol`` when the marks are at
    an observed implied volatility (every policy prices at it), the axis of the one market factor the
    policy reads (``variance``), or None. A policy that reads anything else is refused."""
    if problem.mark_volatility_observed:
        return "implied_vol"
    names = tuple(getattr(policy, "factor_names", ()))
    if not names:
        return None
    axis = next((a for a, factor in STATE_FACTORS.items() if (factor,) == names), None)
    if axis is None:
        raise TableError(f"policy {getattr(policy, 'name', '?')!r} observes market factors {names}: a hedge "
                         f"table has time, moneyness, holding and at most one of {', '.join(STATE_AXES)}")
    return axis


def state_nodes(axis: str, low: float, high: float, points: int) -> np.ndarray:
    """Nodes of a state axis on [low, high]: equally spaced in volatility."""
    if axis == "variance":
        return _round_nodes(np.linspace(math.sqrt(low), math.sqrt(high), points) ** 2)
    return _round_nodes(np.linspace(low, high, points))


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
    if dataclasses.is_dataclass(value) and not isinstance(value, type):  # a market the policy solves
        return {f.name: _json_safe(getattr(value, f.name)) for f in dataclasses.fields(value)}
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


def _points(problem, days_nodes, money, states) -> tuple[np.ndarray, ...]:
    """Years to the horizon, spot and state (or None) on the (days, moneyness[, state]) grid of a table."""
    years = np.array([problem.years_to_horizon(problem.schedule.steps - 1 - index)
                      for index in range(days_nodes.size)])
    if states is None:
        return years[:, None], (money * problem.reference_spot)[None, :], None
    return years[:, None, None], (money * problem.reference_spot)[None, :, None], states[None, None, :]


def _targets_at(policy, problem, points, holdings) -> np.ndarray:
    """The policy's targets (shares) at ``holdings`` (shares) of shape (days, moneyness[, state], ...): a
    holding per point, or per point and holding node. One call of the policy for every point."""
    years, spot, states = points
    shape = np.shape(holdings)
    extra = (1,) * (len(shape) - years.ndim)
    columns = [np.broadcast_to(x.reshape(x.shape + extra), shape).ravel() for x in (spot, years)]
    factors = () if states is None else (np.broadcast_to(states.reshape(states.shape + extra), shape).ravel(),)
    obs = observation_rows(problem, columns[0], columns[1], np.ravel(holdings), factors)
    return np.asarray(policy.act(obs), dtype=float).reshape(shape) * problem.notional_shares


def _holding_domain(policy, problem, grid: TableGrid, points) -> tuple[float, float]:
    notional = problem.notional_shares
    if grid.holding_range_shares is not None:
        low, high = grid.holding_range_shares
    else:
        years, spot, states = points
        t_days = problem.schedule.horizon_days - years * problem.marks.days_per_year
        shape = np.broadcast_shapes(years.shape, spot.shape, () if states is None else states.shape)
        hedge = -problem.book.value_and_delta(np.broadcast_to(spot, shape), np.broadcast_to(t_days, shape),
                                              problem.marks)[1]
        low, high = min(0.0, hedge.min()), max(0.0, hedge.max())
        for edge in (low, high):
            targets = _targets_at(policy, problem, points, np.full(hedge.shape, edge))
            low, high = min(low, targets.min()), max(high, targets.max())
        low, high = low - grid.holding_pad * notional, high + grid.holding_pad * notional
    limit = problem.frictions.position_limit_shares
    return max(low, -limit), min(high, limit)


def _band(policy, problem, points, holds, targets) -> np.ndarray:
    """Lower and upper no-trade edges (shares) per (day, moneyness[, state]); NaN where none is found."""
    return np.stack(no_trade_band(lambda held: _targets_at(policy, problem, points, held), holds,
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


@dataclass(frozen=True)
class TableNodes:
    """The nodes of a hedge table: days left (ascending), moneyness, the state axis (None without
    one) and holdings (shares)."""

    days_left: np.ndarray
    moneyness: np.ndarray
    state: str | None
    state_nodes: np.ndarray | None
    holding_shares: np.ndarray

    @property
    def axes(self) -> list[tuple[str, np.ndarray]]:
        """(name, nodes) of every axis in row order, the holding last."""
        state = [] if self.state is None else [(self.state, self.state_nodes)]
        return [("days_left", self.days_left), ("moneyness", self.moneyness), *state,
                ("holding_shares", self.holding_shares)]


def table_nodes(policy, problem, grid: TableGrid = TableGrid(), volatility: float | None = None,
                state_range: tuple[float, float] | None = None) -> TableNodes:
    """The nodes of ``policy``'s hedge table. ``volatility`` sets the moneyness domain and
    ``state_range`` the state axis's (when ``grid.state_range`` does not) as in :func:`export_table`."""
    days_nodes = _days_left_nodes(problem)
    if grid.moneyness_range is not None:
        m_low, m_high = grid.moneyness_range
    else:
        sd = (problem.marks.volatility if volatility is None else volatility) * math.sqrt(problem.horizon_years)
        m_low, m_high = math.exp(-grid.moneyness_width * sd), math.exp(grid.moneyness_width * sd)
    money = _round_nodes(np.linspace(m_low, m_high, grid.moneyness_points))
    state = table_state(policy, problem)
    states = None
    if state is not None:
        given = grid.state_range or state_range
        if given is None:
            raise TableError(f"policy {getattr(policy, 'name', '?')!r} reads the {state}: its table needs the "
                             f"{state} axis's range (state_range)")
        states = state_nodes(state, *given, grid.state_points)
    h_low, h_high = _holding_domain(policy, problem, grid, _points(problem, days_nodes, money, states))
    if not h_low < h_high:
        raise TableError(f"empty holding domain [{h_low:g}, {h_high:g}] shares")
    return TableNodes(days_nodes, money, state, states, _round_nodes(np.linspace(h_low, h_high, grid.holding_points)))


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
    state_range: tuple[float, float] | None = None,
    training_range: dict | None = None,
    lot_shares: float = 1.0,
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
    state_range : (float, float), optional
        Domain of the state axis (:func:`table_state`: a policy that reads the
        variance, or marks at an observed implied volatility), unless
        ``grid.state_range`` gives it; required for such a table.
    training_range : dict, optional
        Per decision time, the range of each axis the policy met on its training paths
        (:func:`training_range`); null in the sidecar without it.
    lot_shares : float
        Shares per tradable lot (``frictions.lot_size``): advice rounds trades to whole lots.
    """
    folder = Path(folder)
    notional, marks = problem.notional_shares, problem.marks
    nodes = table_nodes(policy, problem, grid, volatility, state_range)
    days_nodes, money, holds = nodes.days_left, nodes.moneyness, nodes.holding_shares
    points = _points(problem, days_nodes, money, nodes.state_nodes)
    point_shape = tuple(n.size for _, n in nodes.axes[:-1])
    targets = _targets_at(policy, problem, points, np.broadcast_to(holds, point_shape + holds.shape))
    # Rounding dust far below a share (e.g. 1e-70 deep out of the money) is written as 0.
    targets[np.abs(targets) < NO_TRADE_TOLERANCE * 1e-2 * notional] = 0.0
    if not np.isfinite(targets).all():
        raise TableError(f"policy {getattr(policy, 'name', '?')!r} named non-finite targets on the table grid")
    lower, upper = _band(policy, problem, points, holds, targets)

    grids = [g.ravel() for g in np.meshgrid(*(n for _, n in nodes.axes), indexing="ij")]
    point_grids = [g.ravel() for g in np.meshgrid(*(n for _, n in nodes.axes[:-1]), indexing="ij")]
    n_axes = len(nodes.axes)
    target_body = _format_rows(grids + [targets.ravel()], [NODE_DIGITS] * n_axes + [TARGET_DIGITS])
    band_body = _format_rows(point_grids + [lower.ravel(), upper.ravel(), targets[..., 0].ravel(),
                                            targets[..., -1].ravel()],
                             [NODE_DIGITS] * (n_axes - 1) + [TARGET_DIGITS] * 4)
    target_names, band_names = target_columns(nodes.state), band_columns(nodes.state)
    files = {
        "targets": (TARGETS_FILE, (",".join(target_names) + "\n").encode() + target_body, targets.size),
        "band": (BAND_FILE, (",".join(band_names) + "\n").encode() + band_body, lower.size),
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
                 "notional_shares": float(notional), "reference_spot": float(problem.reference_spot),
                 "lot_shares": float(lot_shares)},
        "band": {"tolerance_shares": float(NO_TRADE_TOLERANCE * notional),
                 "meaning": "a trade within this of a band edge counts as none: the edges are placed to it"},
        "marks": {"volatility": float(marks.volatility), "rate": float(marks.rate),
                  "dividend_yield": float(marks.dividend_yield), "days_per_year": float(marks.days_per_year)},
        "schedule": {"steps": schedule.steps, "step_days": float(schedule.step_days),
                     "settlement": schedule.settlement, "horizon_days": float(schedule.horizon_days)},
        "frictions": _json_safe(frictions),
        "objective": _json_safe(objective),
        "state_axis": None if nodes.state is None else {
            "name": nodes.state, "units": STATE_AXES[nodes.state],
            "observation": "column 3 of a policy's observation row (after spot, time and holding)"},
        "grid": {name: values.tolist() for name, values in nodes.axes},
        "domain": {
            "days_left": [float(days_nodes[0]), float(days_nodes[-1])],
            "moneyness": [float(money[0]), float(money[-1])],
            "spot": [float(money[0] * problem.reference_spot), float(money[-1] * problem.reference_spot)],
            **({} if nodes.state is None else {
                nodes.state: [float(nodes.state_nodes[0]), float(nodes.state_nodes[-1])]}),
            "holding_shares": [float(holds[0]), float(holds[-1])],
        },
        "training_range": training_range,
        "interpolation": INTERPOLATION_RULE,
        "files": {key: {"name": name, "sha256": _sha256(data), "rows": rows,
                        "columns": list(target_names if key == "targets" else band_names)}
                  for key, (name, data, rows) in files.items()},
    }
    meta[SIDECAR_HASH_KEY] = sidecar_digest(meta)
    return _write_folder(folder, {name: data for name, data, _ in files.values()},
                         json.dumps(meta, indent=2, allow_nan=False).encode() + b"\n")


def _write_folder(folder: Path, csvs: dict[str, bytes], sidecar: bytes) -> Path:
    """Build the table in a staging folder of its own beside ``folder`` and rename it into place.
    An existing ``folder`` is replaced only if it is a hedge table; anything else there (a run folder,
    a file, a folder of other things) is refused and left as it was."""
    if folder.exists() or folder.is_symlink():
        if not is_table_folder(folder):
            raise TableError(f"{folder}: exists and is not a hedge table; a table is written to a new folder "
                             "or replaces an older table, never anything else")
    folder.parent.mkdir(parents=True, exist_ok=True)
    staging = Path(tempfile.mkdtemp(prefix=f".{folder.name[:40]}.", suffix=".partial", dir=folder.parent))
    old = None
    try:
        for name, data in csvs.items():
            (staging / name).write_bytes(data)
        (staging / SIDECAR).write_bytes(sidecar)
        if folder.exists():
            old = Path(tempfile.mkdtemp(prefix=f".{folder.name[:40]}.", suffix=".old", dir=folder.parent))
            os.replace(folder, old)
        os.replace(staging, folder)
    except BaseException:
        shutil.rmtree(staging, ignore_errors=True)
        if old is not None and not folder.exists():
            os.replace(old, folder)  # put the older table back
        raise
    if old is not None:
        shutil.rmtree(old, ignore_errors=True)
    return folder


# ---------------------------------------------------------------------------------------------
# From configs
# ---------------------------------------------------------------------------------------------


def grid_of(export) -> TableGrid:
    """The table grid of a config's ``[export]`` section (rehedge.config.ExportSpec)."""
    return TableGrid(moneyness_points=export.moneyness_points, holding_points=export.holding_points,
                     moneyness_width=export.moneyness_width, state_points=export.state_points)


# Training paths drawn for the state axis's range, and the quantiles of the state that bound it.
STATE_RANGE_PATHS = 2_000
STATE_RANGE_QUANTILES = (0.005, 0.995)


def state_range(source, problem, axis: str, seed: int = 0) -> tuple[float, float]:
    """The domain of a table's ``axis`` from the training market ``source`` (a path generator):
    the 0.5% and 99.5% quantiles of the state over ``STATE_RANGE_PATHS`` of its paths (a history's
    windows: as many as it has) and every rehedge time, widened by half their distance on each side
    (not below half the low quantile). Outside it a table clamps (and says so)."""
    n_paths = STATE_RANGE_PATHS if source.max_paths is None else min(STATE_RANGE_PATHS, source.max_paths)
    paths = source.generate(n_paths, problem.schedule.steps, problem.dt_years, seed=seed)
    values = paths.factors[STATE_FACTORS[axis]][:, :-1]
    low, high = np.quantile(values, STATE_RANGE_QUANTILES)
    # Padded by half the range on each side (the low end at most halved): the state the table is used
    # at may leave the training paths' range (a history's later years), and a clamped decision is a guess.
    pad = 0.5 * (high - low) if high > low else 0.1 * high + 1e-6
    return float(max(low - pad, 0.5 * low)), float(high + pad)


class RowRecorder:
    """A policy that passes its observation rows through to ``policy`` and keeps a copy of each."""

    def __init__(self, policy) -> None:
        self.policy, self.rows, self.name = policy, [], getattr(policy, "name", "policy")

    def act(self, obs: np.ndarray) -> np.ndarray:
        self.rows.append(np.array(obs, dtype=float))
        return self.policy.act(obs)


# The margins a training range is widened by: a one-step standard move of spot at the mark volatility
# (relative), 5% of the notional in holding, a tenth of the range in the state.
RANGE_HOLDING_MARGIN = 0.05
RANGE_STATE_MARGIN = 0.1


def training_range(policy, problem, source, state: str | None, seed: int = 0,
                   exploration: Exploration = Exploration(), n_paths: int = STATE_RANGE_PATHS) -> dict:
    """Per decision time, the range of each table axis over ``n_paths`` paths of the training market
    ``source`` (a history's windows: as many as it has; a run takes its training path count, at most
    ``STATE_RANGE_PATHS``), as the learned agents' training data visits them (``exploration``, the
    behaviour policy) and as the policy itself hedges them, widened by the margins above: the states a
    learned policy was fitted on and every policy was scored on. A state outside it is advice off the
    map (``rehedge advise`` says so)."""
    n_paths = n_paths if source.max_paths is None else min(n_paths, source.max_paths)
    recorder = RowRecorder(policy)
    rollout(problem, recorder, source, n_paths, seed)
    schedule, notional = problem.schedule, problem.notional_shares
    explored = [data.obs for data in collect_chunks(problem, source, n_paths, seed, exploration)]
    step_move = problem.marks.volatility * math.sqrt(problem.dt_years)
    out = {"days_left": [], "moneyness": [], "holding_shares": [], **({} if state is None else {state: []})}
    for k in range(schedule.steps):
        # The policy's rows of a chunk arrive one decision time after another.
        rows = np.concatenate(recorder.rows[k::schedule.steps] + [obs[k] for obs in explored])
        out["days_left"].append(float(schedule.horizon_days - schedule.time_days(k)))
        money = rows[:, 0]
        out["moneyness"].append([float(money.min() * math.exp(-step_move)), float(money.max() * math.exp(step_move))])
        held = rows[:, 2] * notional
        margin = RANGE_HOLDING_MARGIN * notional
        out["holding_shares"].append([float(held.min() - margin), float(held.max() + margin)])
        if state is not None:
            values = rows[:, 3]
            pad = RANGE_STATE_MARGIN * float(values.max() - values.min())
            low = values.min() - pad
            out[state].append([float(max(low, 0.0) if values.min() >= 0 else low), float(values.max() + pad)])
    return out


def off_map_share(table, problem, source, n_paths: int, seed: int) -> float:
    """The share of a loaded table's decisions, hedging ``n_paths`` paths of ``source``, at states
    outside the training range its sidecar records (NaN for a table that records none)."""
    if table.training_range is None:
        return math.nan
    recorder = RowRecorder(table)
    rollout(problem, recorder, source, n_paths, seed)
    rows = np.concatenate(recorder.rows)
    return float(table.off_map_rows(rows).mean())


def export_policy(config, problem, policies: dict, name: str, folder: str | Path, market=None) -> Path:
    """Export the policy called ``name`` among ``policies`` (of ``config``) with the grid of
    ``config.export``; an unknown name is a TableError that lists the known ones. ``market`` (the
    training path generator) gives the state axis's range when the policy's table has one."""
    from rehedge.config import config_hash
    from rehedge.training import exploration_of

    if name not in policies:
        known = ", ".join(repr(n) for n in policies) or "none"
        raise TableError(f"unknown policy {name!r}; policies: {known}")
    kinds = {spec.name: spec.kind for spec in [*config.baselines, *config.agents]}
    axis = table_state(policies[name], problem)
    bounds = None if axis is None or market is None else state_range(market, problem, axis, config.data.train_seed)
    agent = next((spec for spec in config.agents if spec.name == name), None)
    exploration = Exploration() if agent is None else exploration_of(agent)
    seen = (None if market is None else
            training_range(policies[name], problem, market, axis, config.data.train_seed, exploration,
                           min(STATE_RANGE_PATHS, config.data.train_paths)))
    return export_table(policies[name], problem, folder, grid=grid_of(config.export), kind=kinds.get(name, ""),
                        config_name=config.name, config_hash=config_hash(config),
                        currency=config.export.currency or config.currency, volatility=config.pricing.volatility, state_range=bounds,
                        training_range=seen, lot_shares=config.frictions.lot_size)
