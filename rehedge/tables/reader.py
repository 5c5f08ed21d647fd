"""Hedge tables, read back: load a table folder, check it, and decide from it with numpy alone.

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
describes the format for readers in other languages; :mod:`rehedge.tables.export`
writes tables.

This module imports numpy, json and the standard library only: ``rehedge advise``
and a live process load tables without scikit-learn, pandas, gymnasium or pickle.
"""

from __future__ import annotations

import hashlib
import io
import itertools
import json
import math
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from rehedge.errors import UserError, one_line
from rehedge.files import CONFIG_BYTES, TABLE_BYTES, read_regular

FORMAT = "rehedge-hedge-table"
# 2: a target outside the band is moved onto its nearer edge (the reading rule's step 4).
# 3: an optional fourth axis, the observed volatility state (``state_axis`` in the sidecar).
# 4: the sidecar carries the SHA-256 of its own content (``sidecar_sha256``), and holds no NaN or Infinity.
# 5: ``training_range``: per decision time, the range of each axis on the policy's own training paths.
# 6: a target from outside the band short of it by more than the band's tolerance (``band`` in the sidecar)
#    stands; version 5 moved every target outside the band onto its nearer edge, which undid a policy's
#    trades that stop short of the band.
FORMAT_VERSION = 6
SIDECAR_HASH_KEY = "sidecar_sha256"
SIDECAR = "table.json"
TARGETS_FILE = "targets.csv"
BAND_FILE = "band.csv"
TARGET_COLUMNS = ("days_left", "moneyness", "holding_shares", "target_shares")
BAND_COLUMNS = ("days_left", "moneyness", "band_lower_shares", "band_upper_shares",
                "target_below_shares", "target_above_shares")
# The fourth axis a table may have: the market state its policy reads besides spot, time and
# holding, with its units. Its column comes after moneyness in both CSVs.
STATE_AXES = {
    "variance": "instantaneous variance of the underlying's return, annual (0.04 = 20% volatility)",
    "implied_vol": "implied (mark) volatility, annual decimal (0.25 = 25%)",
}

INTERPOLATION_RULE = (
    "target: multilinear interpolation of target_shares in (days_left, moneyness, [state,] holding_shares) "
    "between the grid nodes around the point (trilinear; quadrilinear with a state axis); band edges: "
    "multilinear in (days_left, moneyness[, state]); "
    "a holding inside [band_lower_shares, band_upper_shares] keeps its holding (trade 0); from outside "
    "it, a target that reaches the band (within band.tolerance_shares of its near edge, or past it) is "
    "clipped into [band_lower_shares, band_upper_shares], and a target short of the band stands; "
    "each coordinate outside the domain is clamped to it and the decision flagged as clamped"
)


def target_columns(state: str | None = None) -> tuple[str, ...]:
    """Columns of targets.csv: a state axis's column comes after moneyness."""
    return TARGET_COLUMNS if state is None else TARGET_COLUMNS[:2] + (state,) + TARGET_COLUMNS[2:]


def band_columns(state: str | None = None) -> tuple[str, ...]:
    """Columns of band.csv: a state axis's column comes after moneyness."""
    return BAND_COLUMNS if state is None else BAND_COLUMNS[:2] + (state,) + BAND_COLUMNS[2:]

class TableError(UserError):
    """A hedge table that cannot be written, read or trusted; ``str(error)`` is one line."""


@dataclass(frozen=True)
class TableDecision:
    """Decisions of a hedge table at many points (arrays of one shape), shares.

    ``inside_band`` rows keep their holding. ``clamped`` is True where any of
    ``days_left``, moneyness, the state (a table with a state axis) or holding
    was outside the table's domain and was moved to its edge before the lookup
    (``clamped_days_left`` etc. say which). Band edges are NaN where the policy
    has no no-trade region at that point.
    """

    target_shares: np.ndarray
    trade_shares: np.ndarray
    band_lower_shares: np.ndarray
    band_upper_shares: np.ndarray
    inside_band: np.ndarray
    clamped_days_left: np.ndarray
    clamped_moneyness: np.ndarray
    clamped_holding: np.ndarray
    clamped_state: np.ndarray | bool = False

    @property
    def clamped(self) -> np.ndarray:
        return self.clamped_days_left | self.clamped_moneyness | self.clamped_state | self.clamped_holding


# ---------------------------------------------------------------------------------------------
# Reading
# ---------------------------------------------------------------------------------------------


def _sidecar_path(path: Path) -> Path:
    return path / SIDECAR if path.is_dir() else path


def _sha256(data: bytes) -> str:
    return hashlib.sha256(data).hexdigest()


def sidecar_digest(meta: dict) -> str:
    """SHA-256 of a sidecar's content without its own ``sidecar_sha256``: canonical JSON (sorted keys,
    no spaces, no NaN), so any edit of a number, a name or a file's checksum changes it."""
    content = {key: value for key, value in meta.items() if key != SIDECAR_HASH_KEY}
    return _sha256(json.dumps(content, sort_keys=True, separators=(",", ":"), allow_nan=False).encode())


def _refuse_constant(name: str):
    raise ValueError(f"{name} is not a number a hedge table may hold")


def _finite_float(text: str) -> float:
    value = float(text)
    if not math.isfinite(value):
        raise ValueError(f"{text} is out of a double's range")
    return value


def _bounded_int(text: str) -> int:
    if len(text.lstrip("-")) > 18:
        raise ValueError(f"integer {text[:20]}... is too large")
    return int(text)


def _positive(meta: dict, section: str, key: str) -> float:
    """``meta[section][key]`` as a finite number > 0 (a scale every decision is multiplied by)."""
    value = meta[section][key]
    if isinstance(value, bool) or not isinstance(value, (int, float)) or not (math.isfinite(value) and value > 0):
        raise TableError(f"{section}.{key} must be a finite number > 0, got {value!r}")
    return float(value)


def _read_csv(folder: Path, entry: dict, columns: tuple[str, ...], what: str) -> np.ndarray:
    """A CSV file named in the sidecar, checked against its SHA-256, header and row count."""
    name = entry.get("name")
    if not isinstance(name, str) or Path(name).name != name:
        raise TableError(f"{folder / SIDECAR}: files.{what}.name must be a file name in the table folder")
    path = folder / name
    data = read_regular(path, TABLE_BYTES, TableError, "hedge table file")
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


def _check_axis_columns(values: np.ndarray, axes: list[tuple[str, np.ndarray]], path: Path) -> None:
    """The first columns of a CSV run over the grid of ``axes`` in row order (the first slowest)."""
    nodes = np.meshgrid(*(n for _, n in axes), indexing="ij")
    for column, (name, _), grid in zip(values.T, axes, nodes):
        if not np.allclose(column, grid.ravel(), rtol=1e-9, atol=0.0):
            order = ", then ".join(n for n, _ in axes)
            raise TableError(f"{path}: column {name} does not follow the sidecar's grid in row order "
                             f"({order}; the first slowest)")


class HedgeTable:
    """A hedge table read back from disk: ``decide`` in shares, ``act`` as a Policy.

    Use :meth:`load`. Attributes: ``meta`` (the sidecar dict), ``path`` (the
    table folder), the grid nodes ``days_left``, ``moneyness``,
    ``holding_shares`` (ascending), ``state`` (the state axis's name, or None)
    and ``state_nodes``, ``targets`` (days x moneyness [x state] x holding,
    shares), ``band_lower`` and ``band_upper`` (days x moneyness [x state],
    shares), ``band_tolerance`` (shares: a trade within it of an edge counts as none),
    ``reference_spot``, ``notional_shares``, ``days_per_year``, ``name``.
    """

    def __init__(self, meta: dict, path: Path, targets: np.ndarray, band: np.ndarray) -> None:
        self.meta, self.path = meta, path
        grid = meta["grid"]
        self.state = _state_name(meta)
        self.days_left = np.asarray(grid["days_left"], dtype=float)
        self.moneyness = np.asarray(grid["moneyness"], dtype=float)
        self.state_nodes = None if self.state is None else np.asarray(grid[self.state], dtype=float)
        self.holding_shares = np.asarray(grid["holding_shares"], dtype=float)
        points = tuple(n.size for n in self.point_nodes)
        self.targets = targets.reshape(points + (self.holding_shares.size,))
        self.band_lower, self.band_upper, self.target_below, self.target_above = (b.reshape(points) for b in band)
        self.reference_spot = float(meta["book"]["reference_spot"])
        self.notional_shares = float(meta["book"]["notional_shares"])
        self.days_per_year = float(meta["marks"]["days_per_year"])
        self.horizon_days = float(meta["schedule"]["horizon_days"])
        self.band_tolerance = float(meta["band"]["tolerance_shares"])
        self.policy_name = str(meta["policy"]["name"])
        self.name = f"{self.policy_name}.table"
        seen = meta.get("training_range")
        self.training_days = None if seen is None else np.asarray(seen["days_left"], dtype=float)
        self.training_range = None if seen is None else {
            axis: np.asarray(seen[axis], dtype=float) for axis in self.range_axes}

    @property
    def range_axes(self) -> list[str]:
        """The axes a training range is recorded for: moneyness, the state axis if any, holding."""
        return ["moneyness"] + ([] if self.state is None else [self.state]) + ["holding_shares"]

    def off_map(self, spot, days_left, holding, state=None) -> list[np.ndarray]:
        """Per axis of :attr:`range_axes`, which points lie outside the range the policy's training
        paths covered at the decision time nearest ``days_left`` (all False without a recorded range)."""
        spot, days, held = np.broadcast_arrays(*(np.asarray(x, dtype=float) for x in (spot, days_left, holding)))
        values = {"moneyness": spot / self.reference_spot, "holding_shares": held}
        if self.state is not None:
            values[self.state] = np.broadcast_to(np.asarray(state, dtype=float), spot.shape)
        if self.training_range is None:
            return [np.zeros(spot.shape, dtype=bool) for _ in self.range_axes]
        nearest = np.abs(days[..., None] - self.training_days).argmin(axis=-1)
        out = []
        for axis in self.range_axes:
            low, high = self.training_range[axis][nearest, 0], self.training_range[axis][nearest, 1]
            out.append((values[axis] < low) | (values[axis] > high))
        return out

    def off_map_rows(self, obs: np.ndarray) -> np.ndarray:
        """Which observation rows (as :meth:`act` reads them) lie outside the training range."""
        obs = np.asarray(obs, dtype=float)
        flags = self.off_map(obs[:, 0] * self.reference_spot, obs[:, 1] * self.days_per_year,
                             obs[:, 2] * self.notional_shares, None if self.state is None else obs[:, 3])
        return np.logical_or.reduce(flags)

    @property
    def point_nodes(self) -> list[np.ndarray]:
        """Nodes of the axes a band is given on: days left, moneyness and the state axis if any."""
        return [self.days_left, self.moneyness] + ([] if self.state is None else [self.state_nodes])

    @classmethod
    def load(cls, path: str | Path) -> HedgeTable:
        """Read a table folder (or its ``table.json``); refuses, with a :class:`TableError`, a
        table of another format version or whose CSVs fail their SHA-256 or shape checks."""
        sidecar = _sidecar_path(Path(path))
        folder = sidecar.parent
        if not sidecar.exists():
            raise TableError(f"{sidecar}: no hedge table here (no {SIDECAR})")
        meta = read_sidecar(sidecar)
        version = meta.get("format_version")
        if version != FORMAT_VERSION:
            raise TableError(f"{sidecar}: format_version {version!r} is not supported by this reader "
                             f"(reads version {FORMAT_VERSION}); export the table again with this version")
        if meta.get(SIDECAR_HASH_KEY) != sidecar_digest(meta):
            raise TableError(f"{sidecar}: its content does not match its {SIDECAR_HASH_KEY}: the sidecar was "
                             "changed or is incomplete; export the table again")
        try:
            state = _state_name(meta)
            names = ["days_left", "moneyness"] + ([] if state is None else [state]) + ["holding_shares"]
            files, grid = meta["files"], meta["grid"]
            axes = [(name, np.asarray(grid[name], dtype=float)) for name in names]
            for section, key in (("book", "reference_spot"), ("book", "notional_shares"),
                                 ("marks", "days_per_year"), ("schedule", "horizon_days"),
                                 ("band", "tolerance_shares")):
                _positive(meta, section, key)
            meta["policy"]["name"]
        except TableError as exc:
            raise TableError(f"{sidecar}: {exc}") from None
        except (KeyError, TypeError, ValueError) as exc:
            raise TableError(f"{sidecar}: sidecar field missing or malformed ({exc})") from None
        for name, nodes in axes:
            if (nodes.ndim != 1 or nodes.size < 1 or not np.isfinite(nodes).all()
                    or not np.all(np.diff(nodes) > 0)):
                raise TableError(f"{sidecar}: grid.{name} must be a list of increasing finite numbers")
        _check_training_range(meta, names[1:], sidecar)
        targets = _read_csv(folder, files.get("targets", {}), target_columns(state), "targets")
        band = _read_csv(folder, files.get("band", {}), band_columns(state), "band")
        points = math.prod(n.size for _, n in axes[:-1])
        if targets.shape[0] != points * axes[-1][1].size or band.shape[0] != points:
            raise TableError(f"{sidecar}: the CSV row counts do not match the grid sizes")
        t_path, b_path = folder / files["targets"]["name"], folder / files["band"]["name"]
        _check_axis_columns(targets, axes, t_path)
        _check_axis_columns(band, axes[:-1], b_path)
        if not np.isfinite(targets[:, -1]).all():
            raise TableError(f"{t_path}: target_shares must be finite numbers")
        _check_band(band[:, len(axes) - 1:], b_path)
        return cls(meta, folder, targets[:, -1].copy(), band[:, len(axes) - 1:].T.copy())

    # --- decisions ------------------------------------------------------------------------------

    @property
    def domain(self) -> dict[str, tuple[float, float]]:
        """Validity domain per coordinate (days left, moneyness, spot, the state, holding in shares)."""
        low, high = self.moneyness[0], self.moneyness[-1]
        domain = {
            "days_left": (float(self.days_left[0]), float(self.days_left[-1])),
            "moneyness": (float(low), float(high)),
            "spot": (float(low * self.reference_spot), float(high * self.reference_spot)),
            "holding_shares": (float(self.holding_shares[0]), float(self.holding_shares[-1])),
        }
        if self.state is not None:
            domain[self.state] = (float(self.state_nodes[0]), float(self.state_nodes[-1]))
        return domain

    def decide(self, spot, days_left, holding, state=None) -> TableDecision:
        """Target holding at spot (currency), days left to the horizon and current holding (shares),
        and ``state`` (the value on the table's state axis) when the table has one.

        Inputs broadcast against each other; the multilinear rule of
        :data:`INTERPOLATION_RULE` applies. Raises TableError for a spot that
        is not a positive number, a non-finite time, holding or state, or a
        state given to a table without that axis or missing from one with it.
        """
        if (state is None) != (self.state is None):
            raise TableError(f"this table has a {self.state} axis: give the {self.state}" if state is None else
                             "this table has no state axis (its policy reads spot, time and holding alone)")
        given = (spot, days_left, holding) + (() if state is None else (state,))
        spot, days, held, *rest = np.broadcast_arrays(*(np.asarray(x, dtype=float) for x in given))
        if not (np.all(spot > 0) and np.all(np.isfinite(spot))):
            raise TableError("spot must be a positive finite number")
        if not (np.all(np.isfinite(days)) and np.all(np.isfinite(held))):
            raise TableError("days_left and holding must be finite numbers")
        if rest and not np.all(np.isfinite(rest[0])):
            raise TableError(f"{self.state} must be a finite number")
        shape = spot.shape
        coordinates = [days.ravel(), spot.ravel() / self.reference_spot] + [r.ravel() for r in rest] + [held.ravel()]
        located = [_locate(nodes, x) for nodes, x in zip(self.point_nodes + [self.holding_shares], coordinates)]
        target = _interpolate(self.targets, located)
        lower, upper = (_interpolate(edge, located[:-1]) for edge in (self.band_lower, self.band_upper))
        held = coordinates[-1]
        inside = (held >= lower) & (held <= upper)  # NaN edges (no band) compare False
        # Interpolated separately, a target can pass the far edge of the interpolated band (both are
        # exact at the nodes only): from below the band it stops at the upper edge, from above at the
        # lower. A target short of the band stands: under impact costs that grow faster than the trade,
        # the best trade from far off stops short of the no-trade region (moving it onto the edge cost
        # the demo's linear agent 0.7% of its objective).
        # A target within the band's own tolerance of its near edge is on the band (the edges are placed
        # to that tolerance), so asking again from it trades nothing.
        banded = np.isfinite(lower) & np.isfinite(upper)
        reach = self.band_tolerance
        onto = banded & (((held < lower) & (target >= lower - reach)) | ((held > upper) & (target <= upper + reach)))
        target = np.where(onto, np.clip(target, lower, upper), target)
        target = np.where(inside, held, target)
        flags = [flag.reshape(shape) for _, _, flag in located]
        return TableDecision(
            target.reshape(shape), (target - held).reshape(shape), lower.reshape(shape), upper.reshape(shape),
            inside.reshape(shape), flags[0], flags[1], flags[-1], flags[2] if rest else False)

    def act(self, obs: np.ndarray) -> np.ndarray:
        """Policy protocol: observation rows ``[spot / reference spot, years to horizon, holding /
        notional(, state)]`` -> target per share of notional; a table with a state axis reads the
        state from column 3 (the market's observed variance or implied volatility). The rows must
        come from a problem with this table's book, reference spot and schedule (see
        :meth:`check_problem`)."""
        obs = np.asarray(obs, dtype=float)
        state = None if self.state is None else obs[:, 3]
        decision = self.decide(obs[:, 0] * self.reference_spot, obs[:, 1] * self.days_per_year,
                               obs[:, 2] * self.notional_shares, state)
        return decision.target_shares / self.notional_shares

    def check_problem(self, problem) -> None:
        """Raise TableError unless ``problem`` (a hedge_env HedgingProblem) has this table's book,
        reference spot, year basis and schedule: its observations are scaled by them."""
        meta = self.meta
        legs = [_leg_dict(leg) for leg in problem.book.legs]
        checks = (
            ("book", legs, meta["book"]["legs"]),
            ("reference spot", float(problem.reference_spot), self.reference_spot),
            ("notional", float(problem.notional_shares), self.notional_shares),
            ("days per year", float(problem.marks.days_per_year), self.days_per_year),
            ("horizon days", float(problem.schedule.horizon_days), self.horizon_days),
        )
        for what, here, there in checks:
            if here != there:
                raise TableError(f"{self.path}: the table was exported for another {what} "
                                 f"({there!r}) than this problem's ({here!r})")


def read_sidecar(sidecar: Path) -> dict:
    """A sidecar's JSON object: a regular file of bounded size, valid JSON without NaN or Infinity
    and of bounded depth, whose ``format`` names a hedge table; else a one-line TableError."""
    data = read_regular(sidecar, CONFIG_BYTES, TableError, "hedge table sidecar")
    try:
        meta = json.loads(data.decode("utf-8"), parse_constant=_refuse_constant, parse_float=_finite_float,
                          parse_int=_bounded_int)
    except RecursionError:
        raise TableError(f"{sidecar}: not a hedge table sidecar (nested too deep)") from None
    except (ValueError, UnicodeDecodeError) as exc:  # JSONDecodeError is a ValueError
        raise TableError(f"{sidecar}: not valid JSON ({one_line(exc)})") from None
    if not isinstance(meta, dict) or meta.get("format") != FORMAT:
        raise TableError(f"{sidecar}: not a hedge table sidecar (format must be {FORMAT!r})")
    return meta


def _check_training_range(meta: dict, axes: list[str], sidecar: Path) -> None:
    """``training_range`` is null, or per decision time (``days_left``, finite) a [low, high] pair of
    finite numbers, low <= high, for each of ``axes``."""
    seen = meta.get("training_range")
    if seen is None:
        return
    try:
        days = np.asarray(seen["days_left"], dtype=float)
        pairs = [np.asarray(seen[axis], dtype=float) for axis in axes]
    except (KeyError, TypeError, ValueError):
        raise TableError(f"{sidecar}: training_range must give days_left and a [low, high] list for each of "
                         f"{', '.join(axes)}") from None
    if days.ndim != 1 or days.size < 1 or not np.isfinite(days).all():
        raise TableError(f"{sidecar}: training_range.days_left must be a list of finite numbers")
    for axis, pair in zip(axes, pairs):
        if (pair.shape != (days.size, 2) or not np.isfinite(pair).all() or (pair[:, 0] > pair[:, 1]).any()):
            raise TableError(f"{sidecar}: training_range.{axis} must hold one [low, high] pair of finite numbers "
                             "(low <= high) per decision time")


def _check_band(band: np.ndarray, path: Path) -> None:
    """Band edges finite or NaN (no band) together, lower <= upper; targets beyond the holding
    domain finite."""
    lower, upper, below, above = band.T
    if np.isinf(lower).any() or np.isinf(upper).any():
        raise TableError(f"{path}: band edges must be finite numbers, or NaN where the policy has no band")
    if (np.isnan(lower) != np.isnan(upper)).any():
        raise TableError(f"{path}: band_lower_shares and band_upper_shares must be NaN together (no band)")
    both = ~np.isnan(lower)
    if (lower[both] > upper[both]).any():
        row = int(np.flatnonzero(both & (lower > upper))[0]) + 2
        raise TableError(f"{path}: row {row}: band_lower_shares must be <= band_upper_shares")
    if not (np.isfinite(below).all() and np.isfinite(above).all()):
        raise TableError(f"{path}: target_below_shares and target_above_shares must be finite numbers")


def is_table_folder(folder: Path) -> bool:
    """Whether ``folder`` is a hedge table folder (a sidecar of this format, and nothing but table
    files): the only kind of folder an export may replace."""
    if not folder.is_dir() or folder.is_symlink():
        return False
    if not {p.name for p in folder.iterdir()} <= {SIDECAR, TARGETS_FILE, BAND_FILE}:
        return False
    try:
        read_sidecar(folder / SIDECAR)
    except TableError:
        return False
    return True


def _leg_dict(leg) -> dict:
    return {"kind": leg.kind, "strike": float(leg.strike), "expiry_days": float(leg.expiry_days),
            "quantity": float(leg.quantity), "multiplier": float(leg.multiplier)}


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


def _interpolate(values: np.ndarray, located) -> np.ndarray:
    """Multilinear interpolation of ``values`` (one axis per entry of ``located``, each the points'
    lower node index and upper weight from :func:`_locate`): the sum over the surrounding corners of
    the node values times the product of the axis weights."""
    total = np.zeros(located[0][0].size)
    for corner in itertools.product((0, 1), repeat=len(located)):
        index, weight = [], 1.0
        for up, (lower, w, _), size in zip(corner, located, values.shape):
            index.append(np.minimum(lower + up, size - 1))
            weight = weight * (w if up else 1.0 - w)
        total += weight * values[tuple(index)]
    return total


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


def _state_name(meta: dict) -> str | None:
    """The sidecar's state axis name (``state_axis.name``), or None for a table without one."""
    axis = meta.get("state_axis")
    if axis is None:
        return None
    name = axis.get("name") if isinstance(axis, dict) else None
    if name not in STATE_AXES:
        raise TableError(f"state_axis.name must be one of {', '.join(STATE_AXES)}, got {name!r}")
    return name


def black_scholes_hedge(meta: dict, spot: float, days_left: float) -> float:
    """Minus the book's Black-Scholes delta (shares) at the sidecar's mark volatility, rate and dividend
    yield: the delta hedge a desk would hold at this point (math.erf; tested against hedge_env.pricing)."""
    marks, schedule = meta["marks"], meta["schedule"]
    vol, rate, carry = float(marks["volatility"]), float(marks["rate"]), float(marks["dividend_yield"])
    elapsed = float(schedule["horizon_days"]) - days_left
    delta = 0.0
    for leg in meta["book"]["legs"]:
        tau = (float(leg["expiry_days"]) - elapsed) / float(marks["days_per_year"])
        shares = float(leg["quantity"]) * float(leg["multiplier"])
        call = leg["kind"] == "call"
        if tau <= 0:
            continue
        d1 = (math.log(spot / float(leg["strike"])) + (rate - carry + 0.5 * vol * vol) * tau) / (vol * math.sqrt(tau))
        cdf = 0.5 * (1.0 + math.erf(d1 / math.sqrt(2.0)))
        delta += shares * math.exp(-carry * tau) * (cdf if call else cdf - 1.0)
    return -delta


def trade_cost(frictions: dict, trade: float, spot: float) -> float:
    """The cost of trading ``trade`` shares at mid ``spot`` under the sidecar's frictions: proportional
    and fixed cost, temporary impact, and the fill halfway through the trade's own permanent impact
    (hedge_env.frictions.Frictions's formulas; tested against it)."""
    size = abs(trade)
    if size == 0:
        return 0.0
    cost = float(frictions["cost_rate"]) * size * spot + float(frictions["fixed_cost"])
    adv, beta = float(frictions["adv_shares"]), float(frictions["impact_exponent"])
    cost += float(frictions["impact_coefficient"]) * spot * size ** (1.0 + beta) / adv**beta
    cost += 0.5 * trade * spot * math.expm1(float(frictions["permanent_impact"]) / adv * trade)
    return cost


def advice(table: HedgeTable, spot: float, days_left: float, holding: float, state: float | None = None) -> dict:
    """One decision of ``table`` as a JSON-ready record: target, trade, band, clamping notes."""
    decision = table.decide(spot, days_left, holding, state)
    domain = table.domain
    notes = []
    checks = [("days_left", days_left, decision.clamped_days_left), ("spot", spot, decision.clamped_moneyness),
              ("holding_shares", holding, decision.clamped_holding)]
    if table.state is not None:
        checks.insert(2, (table.state, state, decision.clamped_state))
    for axis, value, flag in checks:
        if bool(flag):
            low, high = domain[axis]
            edge = low if value < low else high
            notes.append(f"{axis} {value:g} is outside the table's domain [{low:g}, {high:g}]: "
                         f"decided at {edge:g}")
    off_map = []
    if table.training_range is not None:
        nearest = int(np.abs(days_left - table.training_days).argmin())
        values = {"moneyness": spot / table.reference_spot, "holding_shares": holding, table.state: state}
        for axis, flag in zip(table.range_axes, table.off_map(spot, days_left, holding, state)):
            if bool(flag):
                low, high = table.training_range[axis][nearest]
                off_map.append(f"{axis} {values[axis]:,.6g} is outside what the policy met on its training paths "
                               f"{table.training_days[nearest]:g} days before the horizon [{low:,.6g}, {high:,.6g}]")
    lower, upper = float(decision.band_lower_shares), float(decision.band_upper_shares)
    meta = table.meta
    lot = float(meta["book"].get("lot_shares", 1.0))
    trade = lot * round(float(decision.trade_shares) / lot)  # whole lots; the unrounded target stays beside
    return {
        "table": str(table.path),
        "policy": meta["policy"]["name"],
        "config": meta.get("config", {}).get("name"),
        "created": meta.get("created"),
        "spot": float(spot),
        "moneyness": float(spot) / table.reference_spot,
        "days_left": float(days_left),
        **({} if table.state is None else {table.state: float(state)}),
        "holding_shares": float(holding),
        "target_shares": float(decision.target_shares),
        "lot_shares": lot,
        "trade_shares": trade,
        "traded_target_shares": float(holding) + trade,
        "trade_cost": trade_cost(meta["frictions"], trade, float(spot)),
        "delta_hedge_shares": black_scholes_hedge(meta, float(spot), float(days_left)),
        "band_lower_shares": None if math.isnan(lower) else lower,
        "band_upper_shares": None if math.isnan(upper) else upper,
        "inside_band": bool(decision.inside_band),
        "clamped": bool(decision.clamped),
        "clamping": notes,
        "off_map": off_map,
        "training_range_known": table.training_range is not None,
        "currency": meta.get("units", {}).get("currency"),
    }
