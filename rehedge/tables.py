"""Hedge tables: any policy written out as plain CSV + JSON, read back with numpy alone.

A hedge table is a folder of three files:

- ``targets.csv``: one row per grid point ``days_left, moneyness, holding_shares``
  with the policy's ``target_shares`` there (the tidy form every reader needs);
- ``band.csv``: one row per ``days_left, moneyness`` with the no-trade band
  ``band_lower_shares, band_upper_shares`` and the targets of a holding below
  and above the holding domain (the view for people, and the band ``advise``
  shows);
- ``table.json``: the sidecar (format version, book, units, marks, schedule,
  frictions, objective, policy and its parameters, config hash, grid, domain,
  creation time, SHA-256 and row count of each CSV).

Units: holdings and targets in shares of the underlying (what a live system
trades), time as days left to the hedging horizon, moneyness as spot divided
by the reference spot of the sidecar. The README section "Hedge tables"
describes the format for readers in other languages.

This module imports numpy, json and the standard library only (at import
time): ``rehedge advise`` and a live process load tables without
scikit-learn, pandas, gymnasium or pickle. :func:`export_table` reads the
problem and the policy it is handed; it imports nothing of hedge_env either.
"""

from __future__ import annotations

import dataclasses
import hashlib
import io
import json
import math
import os
import shutil
from dataclasses import dataclass
from datetime import datetime, timezone
from pathlib import Path

import numpy as np

FORMAT = "rehedge-hedge-table"
FORMAT_VERSION = 1
SIDECAR = "table.json"
TARGETS_FILE = "targets.csv"
BAND_FILE = "band.csv"
TARGET_COLUMNS = ("days_left", "moneyness", "holding_shares", "target_shares")
BAND_COLUMNS = ("days_left", "moneyness", "band_lower_shares", "band_upper_shares",
                "target_below_shares", "target_above_shares")

INTERPOLATION_RULE = (
    "target: trilinear interpolation of target_shares in (days_left, moneyness, holding_shares) "
    "between the grid nodes around the point; band edges: bilinear in (days_left, moneyness); "
    "a holding inside [band_lower_shares, band_upper_shares] keeps its holding (trade 0); "
    "each coordinate outside the domain is clamped to it and the decision flagged as clamped"
)

# A trade smaller than this fraction of the book's notional shares counts as no trade when the
# band is read off a policy: policies that keep the holding return it up to rounding.
NO_TRADE_TOLERANCE = 1e-7
# Bisection steps that place each band edge between two holding nodes (2^-40 of a node spacing).
BAND_BISECTIONS = 40
# Significant digits in the CSVs: grid nodes are rounded to them, so they read back exactly.
NODE_DIGITS = 6
TARGET_DIGITS = 7


class TableError(ValueError):
    """A hedge table that cannot be written, read or trusted; ``str(error)`` is one line."""


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


@dataclass(frozen=True)
class TableDecision:
    """Decisions of a hedge table at many points (arrays of one shape), shares.

    ``inside_band`` rows keep their holding. ``clamped`` is True where any of
    ``days_left``, moneyness or holding was outside the table's domain and was
    moved to its edge before the lookup (``clamped_days_left`` etc. say which).
    Band edges are NaN where the policy has no no-trade region at that point.
    """

    target_shares: np.ndarray
    trade_shares: np.ndarray
    band_lower_shares: np.ndarray
    band_upper_shares: np.ndarray
    inside_band: np.ndarray
    clamped_days_left: np.ndarray
    clamped_moneyness: np.ndarray
    clamped_holding: np.ndarray

    @property
    def clamped(self) -> np.ndarray:
        return self.clamped_days_left | self.clamped_moneyness | self.clamped_holding


# ---------------------------------------------------------------------------------------------
# Reading
# ---------------------------------------------------------------------------------------------


def _sidecar_path(path: Path) -> Path:
    return path / SIDECAR if path.is_dir() else path


def _sha256(data: bytes) -> str:
    return hashlib.sha256(data).hexdigest()


def _read_csv(folder: Path, entry: dict, columns: tuple[str, ...], what: str) -> np.ndarray:
    """A CSV file named in the sidecar, checked against its SHA-256, header and row count."""
    name = entry.get("name")
    if not isinstance(name, str) or Path(name).name != name:
        raise TableError(f"{folder / SIDECAR}: files.{what}.name must be a file name in the table folder")
    path = folder / name
    try:
        data = path.read_bytes()
    except OSError as exc:
        raise TableError(f"{path}: cannot read ({exc.strerror or exc})") from None
    digest = _sha256(data)
    if digest != entry.get("sha256"):
        raise TableError(f"{path}: SHA-256 {digest[:12]}... does not match the sidecar's "
                         f"{str(entry.get('sha256'))[:12]}...: the file was changed or is incomplete; "
                         "export the table again")
    header, _, body = data.partition(b"\n")
    if header.decode("ascii", "replace").strip() != ",".join(columns):
        raise TableError(f"{path}: header must be {','.join(columns)}")
    try:
        values = np.loadtxt(io.BytesIO(body), delimiter=",", dtype=float, ndmin=2)
    except ValueError as exc:
        raise TableError(f"{path}: not a numeric CSV ({exc})") from None
    if values.shape != (entry.get("rows"), len(columns)):
        raise TableError(f"{path}: {values.shape[0]} rows of {values.shape[1]} columns, the sidecar says "
                         f"{entry.get('rows')} rows of {len(columns)}")
    return values


def _check_axis_column(values: np.ndarray, nodes: np.ndarray, name: str, path: Path) -> None:
    if not np.allclose(values, nodes, rtol=1e-9, atol=0.0):
        raise TableError(f"{path}: column {name} does not follow the sidecar's grid in row order "
                         "(days_left slowest, then moneyness, holding_shares fastest)")


class HedgeTable:
    """A hedge table read back from disk: ``decide`` in shares, ``act`` as a Policy.

    Use :meth:`load`. Attributes: ``meta`` (the sidecar dict), ``path`` (the
    table folder), the grid nodes ``days_left``, ``moneyness``,
    ``holding_shares`` (ascending), ``targets`` (days x moneyness x holding,
    shares), ``band_lower`` and ``band_upper`` (days x moneyness, shares),
    ``reference_spot``, ``notional_shares``, ``days_per_year``, ``name``.
    """

    def __init__(self, meta: dict, path: Path, targets: np.ndarray, band: np.ndarray) -> None:
        self.meta, self.path = meta, path
        grid = meta["grid"]
        self.days_left = np.asarray(grid["days_left"], dtype=float)
        self.moneyness = np.asarray(grid["moneyness"], dtype=float)
        self.holding_shares = np.asarray(grid["holding_shares"], dtype=float)
        shape = (self.days_left.size, self.moneyness.size, self.holding_shares.size)
        self.targets = targets.reshape(shape)
        self.band_lower, self.band_upper = band[0].reshape(shape[:2]), band[1].reshape(shape[:2])
        self.target_below, self.target_above = band[2].reshape(shape[:2]), band[3].reshape(shape[:2])
        self.reference_spot = float(meta["book"]["reference_spot"])
        self.notional_shares = float(meta["book"]["notional_shares"])
        self.days_per_year = float(meta["marks"]["days_per_year"])
        self.horizon_days = float(meta["schedule"]["horizon_days"])
        self.policy_name = str(meta["policy"]["name"])
        self.name = f"{self.policy_name}.table"

    @classmethod
    def load(cls, path: str | Path) -> HedgeTable:
        """Read a table folder (or its ``table.json``); refuses, with a :class:`TableError`, a
        table of another format version or whose CSVs fail their SHA-256 or shape checks."""
        sidecar = _sidecar_path(Path(path))
        folder = sidecar.parent
        try:
            meta = json.loads(sidecar.read_text(encoding="utf-8"))
        except FileNotFoundError:
            raise TableError(f"{sidecar}: no hedge table here (no {SIDECAR})") from None
        except OSError as exc:
            raise TableError(f"{sidecar}: cannot read ({exc.strerror or exc})") from None
        except (json.JSONDecodeError, UnicodeDecodeError) as exc:
            raise TableError(f"{sidecar}: not valid JSON ({exc})") from None
        if not isinstance(meta, dict) or meta.get("format") != FORMAT:
            raise TableError(f"{sidecar}: not a hedge table sidecar (format must be {FORMAT!r})")
        version = meta.get("format_version")
        if version != FORMAT_VERSION:
            raise TableError(f"{sidecar}: format_version {version!r} is not supported by this reader "
                             f"(reads version {FORMAT_VERSION}); export the table again with this version")
        try:
            files, grid = meta["files"], meta["grid"]
            days, money, hold = (np.asarray(grid[k], dtype=float)
                                 for k in ("days_left", "moneyness", "holding_shares"))
            for key in ("reference_spot", "notional_shares"):
                float(meta["book"][key])
            float(meta["marks"]["days_per_year"]), float(meta["schedule"]["horizon_days"])
            meta["policy"]["name"]
        except (KeyError, TypeError, ValueError) as exc:
            raise TableError(f"{sidecar}: sidecar field missing or malformed ({exc})") from None
        for name, nodes in (("days_left", days), ("moneyness", money), ("holding_shares", hold)):
            if nodes.ndim != 1 or nodes.size < 1 or not np.all(np.diff(nodes) > 0):
                raise TableError(f"{sidecar}: grid.{name} must be a list of increasing numbers")
        targets = _read_csv(folder, files.get("targets", {}), TARGET_COLUMNS, "targets")
        band = _read_csv(folder, files.get("band", {}), BAND_COLUMNS, "band")
        n_days, n_money, n_hold = days.size, money.size, hold.size
        if targets.shape[0] != n_days * n_money * n_hold or band.shape[0] != n_days * n_money:
            raise TableError(f"{sidecar}: the CSV row counts do not match the grid sizes")
        t_path, b_path = folder / files["targets"]["name"], folder / files["band"]["name"]
        _check_axis_column(targets[:, 0], np.repeat(days, n_money * n_hold), "days_left", t_path)
        _check_axis_column(targets[:, 1], np.tile(np.repeat(money, n_hold), n_days), "moneyness", t_path)
        _check_axis_column(targets[:, 2], np.tile(hold, n_days * n_money), "holding_shares", t_path)
        _check_axis_column(band[:, 0], np.repeat(days, n_money), "days_left", b_path)
        _check_axis_column(band[:, 1], np.tile(money, n_days), "moneyness", b_path)
        if not np.isfinite(targets[:, 3]).all():
            raise TableError(f"{t_path}: target_shares must be finite numbers")
        return cls(meta, folder, targets[:, 3].copy(), band[:, 2:].T.copy())

    # --- decisions ------------------------------------------------------------------------------

    @property
    def domain(self) -> dict[str, tuple[float, float]]:
        """Validity domain per coordinate (days left, moneyness, spot, holding in shares)."""
        low, high = self.moneyness[0], self.moneyness[-1]
        return {
            "days_left": (float(self.days_left[0]), float(self.days_left[-1])),
            "moneyness": (float(low), float(high)),
            "spot": (float(low * self.reference_spot), float(high * self.reference_spot)),
            "holding_shares": (float(self.holding_shares[0]), float(self.holding_shares[-1])),
        }

    def decide(self, spot, days_left, holding) -> TableDecision:
        """Target holding at spot (currency), days left to the horizon and current holding (shares).

        Inputs broadcast against each other; the trilinear rule of
        :data:`INTERPOLATION_RULE` applies. Raises TableError for a spot that
        is not a positive number or a non-finite time or holding.
        """
        spot, days, held = np.broadcast_arrays(*(np.asarray(x, dtype=float) for x in (spot, days_left, holding)))
        if not (np.all(spot > 0) and np.all(np.isfinite(spot))):
            raise TableError("spot must be a positive finite number")
        if not (np.all(np.isfinite(days)) and np.all(np.isfinite(held))):
            raise TableError("days_left and holding must be finite numbers")
        shape = spot.shape
        days, money, held = days.ravel(), spot.ravel() / self.reference_spot, held.ravel()
        (i, wi, ci), (j, wj, cj), (k, wk, ck) = (
            _locate(self.days_left, days), _locate(self.moneyness, money), _locate(self.holding_shares, held))
        n_money, n_hold = self.moneyness.size, self.holding_shares.size
        # Flat-index steps to the upper neighbour on each axis (0 on an axis of one node).
        next_day = n_money * n_hold if self.days_left.size > 1 else 0
        next_money = n_hold if n_money > 1 else 0
        next_hold = 1 if n_hold > 1 else 0
        flat = self.targets.ravel()
        base = (i * n_money + j) * n_hold + k
        target = np.zeros(days.size)
        for day_step, day_weight in ((0, 1.0 - wi), (next_day, wi)):
            for money_step, money_weight in ((0, 1.0 - wj), (next_money, wj)):
                corner = base + day_step + money_step
                target += day_weight * money_weight * ((1.0 - wk) * flat[corner] + wk * flat[corner + next_hold])
        lower, upper = (
            _bilinear_corners(edge.ravel(), i * n_money + j, wi, wj, next_day // n_hold, next_money // n_hold)
            for edge in (self.band_lower, self.band_upper))
        inside = (held >= lower) & (held <= upper)  # NaN edges (no band) compare False
        target = np.where(inside, held, target)
        return TableDecision(
            target.reshape(shape), (target - held).reshape(shape), lower.reshape(shape), upper.reshape(shape),
            inside.reshape(shape), ci.reshape(shape), cj.reshape(shape), ck.reshape(shape))

    def act(self, obs: np.ndarray) -> np.ndarray:
        """Policy protocol: observation rows ``[spot / reference spot, years to horizon, holding /
        notional]`` -> target per share of notional. The rows must come from a problem with this
        table's book, reference spot and schedule (see :meth:`check_problem`)."""
        obs = np.asarray(obs, dtype=float)
        decision = self.decide(obs[:, 0] * self.reference_spot, obs[:, 1] * self.days_per_year,
                               obs[:, 2] * self.notional_shares)
        return decision.target_shares / self.notional_shares

    def check_problem(self, problem) -> None:
        """Raise TableError unless ``problem`` (a hedge_env HedgingProblem) has this table's book,
        reference spot, year basis and schedule: its observations are scaled by them."""
        meta = self.meta
        legs = [_leg_dict(leg) for leg in problem.book.legs]
        checks = (
            ("book", legs, meta["book"]["legs"]),
            ("reference spot", float(problem.reference_spot), self.reference_spot),
            ("days per year", float(problem.marks.days_per_year), self.days_per_year),
            ("horizon days", float(problem.schedule.horizon_days), self.horizon_days),
        )
        for what, here, there in checks:
            if here != there:
                raise TableError(f"{self.path}: the table was exported for another {what} "
                                 f"({there!r}) than this problem's ({here!r})")


def _locate(nodes: np.ndarray, x: np.ndarray):
    """Lower node index, weight of the upper node and the clamped flag of each point."""
    low, high = nodes[0], nodes[-1]
    clamped = (x < low) | (x > high)
    x = np.clip(x, low, high)
    if nodes.size == 1:
        return np.zeros(x.size, dtype=np.intp), np.zeros(x.size), clamped
    index = np.clip(np.searchsorted(nodes, x, side="right") - 1, 0, nodes.size - 2)
    left = nodes[index]
    weight = (x - left) / (nodes[index + 1] - left)
    return index, weight, clamped


def _bilinear_corners(flat, base, wi, wj, step_i: int, step_j: int) -> np.ndarray:
    """Bilinear interpolation of a flattened (days, moneyness) array from each point's lower corner."""
    return ((1 - wi) * ((1 - wj) * flat[base] + wj * flat[base + step_j])
            + wi * ((1 - wj) * flat[base + step_i] + wj * flat[base + step_i + step_j]))


# ---------------------------------------------------------------------------------------------
# Writing
# ---------------------------------------------------------------------------------------------


def _leg_dict(leg) -> dict:
    return {"kind": leg.kind, "strike": float(leg.strike), "expiry_days": float(leg.expiry_days),
            "quantity": float(leg.quantity), "multiplier": float(leg.multiplier)}


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


def _policy_targets(policy, problem, days_nodes, money, holds) -> np.ndarray:
    """The policy's targets (shares) on a (len(days_nodes), len(money), len(holds)) grid."""
    notional = problem.notional_shares
    out = np.empty((days_nodes.size, money.size, holds.size))
    m, h = np.meshgrid(money, holds / notional, indexing="ij")
    for index in range(days_nodes.size):
        k = problem.schedule.steps - 1 - index
        obs = np.column_stack([m.ravel(), np.full(m.size, problem.years_to_horizon(k)), h.ravel()])
        out[index] = np.asarray(policy.act(obs), dtype=float).reshape(m.shape) * notional
    return out


def _targets_at(policy, problem, days_nodes, money, holdings) -> np.ndarray:
    """Targets (shares) at one holding per (day, moneyness) point: ``holdings`` (days, money).

    One call of the policy for every point: rows of different times in one batch.
    """
    notional = problem.notional_shares
    years = np.array([problem.years_to_horizon(problem.schedule.steps - 1 - index)
                      for index in range(days_nodes.size)])
    obs = np.column_stack([np.tile(money, days_nodes.size), np.repeat(years, money.size),
                           np.ravel(holdings) / notional])
    return np.asarray(policy.act(obs), dtype=float).reshape(np.shape(holdings)) * notional


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
    """Lower and upper no-trade edges (shares) per (day, moneyness); NaN where none is found.

    The lower edge is where the policy stops buying as the holding rises, the
    upper edge where it starts selling (a trade within the tolerance counts as
    none). Each is bracketed by two holding nodes, or is the end of the holding
    domain, and placed by bisection on the policy itself, so a band narrower
    than the node spacing is found too. A policy that sells below where it
    buys has no band (NaN).
    """
    tolerance = NO_TRADE_TOLERANCE * problem.notional_shares
    trade = targets - holds
    n_hold = holds.size
    edges = []
    for no_trade_side, searching_up in ((lambda t: t <= tolerance, True), (lambda t: t >= -tolerance, False)):
        # no_trade_side: not buying (lower edge) or not selling (upper edge). Lower edge: first node
        # that does not buy, searched upward; upper edge: last node that does not sell, searched
        # downward. The node before it (which trades) brackets the edge.
        ok = no_trade_side(trade)
        found = ok.any(axis=-1)
        if searching_up:
            index = ok.argmax(axis=-1)
            neighbour = index - 1
        else:
            index = n_hold - 1 - ok[..., ::-1].argmax(axis=-1)
            neighbour = index + 1
        inner = holds[index]
        at_domain_end = (neighbour < 0) | (neighbour >= n_hold)
        outer = np.where(at_domain_end, inner, holds[np.clip(neighbour, 0, n_hold - 1)])
        for _ in range(BAND_BISECTIONS):
            middle = 0.5 * (inner + outer)
            inside = no_trade_side(_targets_at(policy, problem, days_nodes, money, middle) - middle)
            inner, outer = np.where(inside, middle, inner), np.where(inside, outer, middle)
        edges.append(np.where(found, inner, np.nan))
    lower, upper = edges
    crossed = lower > upper
    return np.stack([np.where(crossed, np.nan, lower), np.where(crossed, np.nan, upper)])


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
    days_nodes = _days_left_nodes(problem)
    if grid.moneyness_range is not None:
        m_low, m_high = grid.moneyness_range
    else:
        sd = (marks.volatility if volatility is None else volatility) * math.sqrt(problem.horizon_years)
        m_low, m_high = math.exp(-grid.moneyness_width * sd), math.exp(grid.moneyness_width * sd)
    money = _round_nodes(np.linspace(m_low, m_high, grid.moneyness_points))
    h_low, h_high = _holding_domain(policy, problem, grid, days_nodes, money)
    if not h_low < h_high:
        raise TableError(f"empty holding domain [{h_low:g}, {h_high:g}] shares")
    holds = _round_nodes(np.linspace(h_low, h_high, grid.holding_points))

    targets = _policy_targets(policy, problem, days_nodes, money, holds)
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
# From configs and run folders; advice for one state
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


def tables_as_policies(paths, problem) -> tuple[dict[str, HedgeTable], dict[str, str]]:
    """Hedge tables to score next to a problem's policies: name -> table, and name -> kind ``table``.

    Each table must fit the problem (:meth:`HedgeTable.check_problem`); two
    tables of one name are told apart by a numeric suffix.
    """
    tables = {}
    for path in paths:
        table = HedgeTable.load(path)
        table.check_problem(problem)
        name, n = table.name, 2
        while name in tables:
            name, n = f"{table.name}{n}", n + 1
        table.name = name
        tables[name] = table
    return tables, {name: "table" for name in tables}


def advice(table: HedgeTable, spot: float, days_left: float, holding: float) -> dict:
    """One decision of ``table`` as a JSON-ready record: target, trade, band, clamping notes."""
    decision = table.decide(spot, days_left, holding)
    domain = table.domain
    notes = []
    for axis, value, flag in (("days_left", days_left, decision.clamped_days_left),
                              ("spot", spot, decision.clamped_moneyness),
                              ("holding_shares", holding, decision.clamped_holding)):
        if bool(flag):
            low, high = domain[axis]
            edge = low if value < low else high
            notes.append(f"{axis} {value:g} is outside the table's domain [{low:g}, {high:g}]: "
                         f"decided at {edge:g}")
    lower, upper = float(decision.band_lower_shares), float(decision.band_upper_shares)
    meta = table.meta
    return {
        "table": str(table.path),
        "policy": meta["policy"]["name"],
        "config": meta.get("config", {}).get("name"),
        "created": meta.get("created"),
        "spot": float(spot),
        "moneyness": float(spot) / table.reference_spot,
        "days_left": float(days_left),
        "holding_shares": float(holding),
        "target_shares": float(decision.target_shares),
        "trade_shares": float(decision.trade_shares),
        "band_lower_shares": None if math.isnan(lower) else lower,
        "band_upper_shares": None if math.isnan(upper) else upper,
        "inside_band": bool(decision.inside_band),
        "clamped": bool(decision.clamped),
        "clamping": notes,
        "currency": meta.get("units", {}).get("currency"),
    }
