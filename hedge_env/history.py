"""Historical prices as market paths.

A CSV of dates and closes (and optionally an implied volatility per date)
becomes training and held-out paths:

- :func:`load_history` reads and validates the file. Every problem is a
  :class:`HistoryError` whose one-line message names the row and the rule.
  Rows are numbered as a spreadsheet shows them: the header is row 1, the
  first price row 2.
- :func:`split_history` cuts it by date into an early (training) part and a
  later (held-out) part, with a gap of trading days between them, so no
  held-out day is seen in training.
- :class:`HistoricalWindows` are the rolling windows of one horizon over a
  part, each rescaled to start at the configured spot.
- :class:`StationaryBootstrap` makes as many training paths as asked from a
  part by the stationary block bootstrap of its daily log returns (Politis
  and Romano, 1994).

Time: each CSV row is one trading day. A schedule step of ``step_rows``
covers that many rows, so a horizon of ``steps`` steps spans
``steps * step_rows`` rows and a window has ``steps + 1`` prices. Set the
year basis (``days_per_year``) to trading days per year (252) so that
volatilities read as annual ones.

Implied volatilities are kept in decimal units (0.2 = 20%); a file in
percent says so (``unit="percent"``). The unit is not guessed: a value
outside (0, 5] in decimal units or [1, 500] in percent is an error that
suggests the other unit, so a file read in the wrong unit stops at its first
row instead of giving marks 100 times off.
"""

from __future__ import annotations

import csv
import hashlib
import io
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import pandas as pd

from hedge_env.market import MARK_VOLATILITY_FACTOR, GivenPaths, MarketPaths, SimulatedMarket

# Plausible implied volatilities per unit: (low, high, low inclusive).
_VOLATILITY_RANGE = {"decimal": (0.0, 5.0, False), "percent": (1.0, 500.0, True)}
_FIRST_ROW = 2  # spreadsheet numbering: the header is row 1
# The largest move of a close from one row to the next, as a factor either way. Real daily moves of
# listed shares stay far inside it (the largest index fall in a day was about -20%); a factor past it
# is a typing error, a unit change or a split the history is not adjusted for.
MAX_DAILY_FACTOR = 10.0


class HistoryError(ValueError):
    """A problem with a price history, in one line naming the row (or column) and the rule."""

    def __init__(self, message: str) -> None:
        super().__init__(" ".join(str(message).split()))


@dataclass(frozen=True, eq=False)
class History:
    """A validated daily price history.

    Attributes
    ----------
    dates : ndarray of datetime64[D]
        Trading dates, strictly increasing.
    close : ndarray of float64
        Closing prices, currency per share, all > 0.
    implied_volatility : ndarray of float64 or None
        Implied volatility per date, annual decimal.
    first_row : int
        Spreadsheet row number of ``dates[0]`` in the file (2 for a whole file).
    source : str
        File the history came from.
    sha256 : str
        Hash of the file's bytes (identifies the data in run manifests).
    """

    dates: np.ndarray
    close: np.ndarray
    implied_volatility: np.ndarray | None = None
    first_row: int = _FIRST_ROW
    source: str = "<history>"
    sha256: str = ""

    @property
    def n_rows(self) -> int:
        return self.close.size

    @property
    def log_returns(self) -> np.ndarray:
        """Daily log returns, ``log(close[t + 1] / close[t])``, one fewer than rows."""
        return np.diff(np.log(self.close))

    def rows(self, start: int, stop: int) -> History:
        """Rows ``start`` to ``stop`` (a part of the history)."""
        iv = None if self.implied_volatility is None else self.implied_volatility[start:stop]
        return History(self.dates[start:stop], self.close[start:stop], iv, self.first_row + start,
                       self.source, self.sha256)

    def realised_volatility(self, days_per_year: float = 252.0) -> float:
        """Annualised realised volatility: sample std of daily log returns times sqrt(days_per_year)."""
        return float(np.std(self.log_returns, ddof=1) * np.sqrt(days_per_year))

    def date_range(self) -> tuple[str, str]:
        return str(self.dates[0]), str(self.dates[-1])

    def describe(self) -> dict:
        first, last = self.date_range()
        return {"first_date": first, "last_date": last, "rows": self.n_rows,
                "first_row": self.first_row, "last_row": self.first_row + self.n_rows - 1}


# ---------------------------------------------------------------------------------------------
# Loading
# ---------------------------------------------------------------------------------------------


def _check_field_counts(path: Path, text: str) -> list[str]:
    """Every non-blank row has as many fields as the header (else pandas would shift columns);
    returns the header's names, stripped."""
    reader = csv.reader(io.StringIO(text))
    try:
        header = next(reader, [])
        for row in reader:
            if row and len(row) != len(header):
                raise HistoryError(f"{path}: row {reader.line_num}: {len(row)} fields, the header (row 1) has "
                                   f"{len(header)}")
    except csv.Error as exc:
        raise HistoryError(f"{path}: row {reader.line_num}: not a readable CSV row ({exc})") from None
    return [name.strip() for name in header]


def load_history(
    path: str | Path,
    date_column: str = "date",
    close_column: str = "close",
    implied_volatility_column: str | None = None,
    implied_volatility_unit: str = "decimal",
    date_format: str | None = None,
) -> History:
    """Read and validate a CSV of daily closes.

    Parameters
    ----------
    path : str or Path
        CSV file with a header row.
    date_column, close_column : str
        Column names of the trading date and the close (currency per share).
    implied_volatility_column : str, optional
        Column of the implied volatility per date, if any.
    implied_volatility_unit : {"decimal", "percent"}
        Unit of that column: 0.2 or 20 for 20%.
    date_format : str, optional
        strftime format of the dates; default ISO 8601 (2024-01-31).

    Returns
    -------
    History

    Raises
    ------
    HistoryError
        On the first problem found, naming the row and the rule: file not
        found or empty, a missing column, a missing or unparsable date,
        dates not strictly increasing (unsorted or duplicate), a missing,
        unparsable, non-finite or non-positive price, a missing or
        implausible implied volatility.
    """
    path = Path(path)
    try:
        raw = path.read_bytes()
    except FileNotFoundError:
        raise HistoryError(f"{path}: file not found") from None
    except IsADirectoryError:
        raise HistoryError(f"{path}: is a directory, not a CSV file") from None
    except OSError as exc:
        raise HistoryError(f"{path}: cannot read ({exc.strerror or exc})") from None
    return parse_history(raw, path, date_column, close_column, implied_volatility_column, implied_volatility_unit,
                         date_format)


def parse_history(
    raw: bytes,
    path: str | Path,
    date_column: str = "date",
    close_column: str = "close",
    implied_volatility_column: str | None = None,
    implied_volatility_unit: str = "decimal",
    date_format: str | None = None,
) -> History:
    """Validate the bytes of a CSV of daily closes read from ``path`` (named in every error); the
    parameters, result and rules are those of :func:`load_history`. An application that reads the
    file itself (regular files only, a size cap) hands the bytes here."""
    if implied_volatility_unit not in _VOLATILITY_RANGE:
        raise ValueError(f"implied_volatility_unit must be 'decimal' or 'percent', got {implied_volatility_unit!r}")
    if not raw.strip():
        raise HistoryError(f"{path}: empty file (expected a header row and one row per trading day)")
    try:
        text = raw.decode("utf-8")
    except UnicodeDecodeError as exc:
        row = raw[: exc.start].count(b"\n") + 1
        raise HistoryError(f"{path}: row {row}: not UTF-8 text (bad byte at offset {exc.start})") from None
    # Line ends: CR LF, LF or a lone CR (as text mode reads them), so row numbers are lines.
    text = text.replace("\r\n", "\n").replace("\r", "\n")
    header = _check_field_counts(path, text)
    wanted = [date_column, close_column] + ([implied_volatility_column] if implied_volatility_column else [])
    for column in wanted:
        if header.count(column) > 1:
            raise HistoryError(f"{path}: row 1 (header): column {column!r} appears {header.count(column)} times "
                               "(which one holds the data is ambiguous; rename or drop the others)")
    try:
        # Every cell as text: the rules below parse it and name the row of any bad one. Blank
        # lines are kept as rows so that row numbers stay those of the file.
        table = pd.read_csv(io.StringIO(text), dtype=str, keep_default_na=False, skip_blank_lines=False,
                            skipinitialspace=True)
    except (pd.errors.ParserError, pd.errors.EmptyDataError) as exc:
        raise HistoryError(f"{path}: not a readable CSV ({' '.join(str(exc).split())})") from None
    table.columns = [str(c).strip() for c in table.columns]
    for column in wanted:
        if column not in table.columns:
            hint = " (fields must be separated by ',')" if len(table.columns) == 1 and any(
                mark in table.columns[0] for mark in ";\t|") else ""
            raise HistoryError(f"{path}: row 1 (header): column {column!r} not found; "
                               f"columns: {', '.join(table.columns)}{hint}")
    if len(table) == 0:
        raise HistoryError(f"{path}: no rows after the header")
    rows = np.arange(len(table)) + _FIRST_ROW

    dates = _parse_dates(path, table[date_column].str.strip(), rows, date_column, date_format)
    close = _parse_numbers(path, table[close_column], rows, close_column)
    bad = np.flatnonzero(~(close > 0))
    if bad.size:
        i = bad[0]
        raise HistoryError(f"{path}: row {rows[i]}: {close_column} must be > 0, got {close[i]:g}")
    bad = np.flatnonzero(np.abs(np.diff(np.log(close))) > np.log(MAX_DAILY_FACTOR))
    if bad.size:
        i = bad[0] + 1
        raise HistoryError(
            f"{path}: row {rows[i]}: {close_column} {close[i]:g} after {close[i - 1]:g} on row {rows[i - 1]}: a move "
            f"of more than a factor of {MAX_DAILY_FACTOR:g} in a day (a data error, or a split the history is not "
            "adjusted for)")
    implied = None
    if implied_volatility_column:
        implied = _parse_numbers(path, table[implied_volatility_column], rows, implied_volatility_column)
        low, high, inclusive = _VOLATILITY_RANGE[implied_volatility_unit]
        outside = ~((implied >= low) if inclusive else (implied > low)) | (implied > high)
        bad = np.flatnonzero(outside)
        if bad.size:
            i = bad[0]
            other = "percent" if implied_volatility_unit == "decimal" else "decimal"
            bound = f"{'[' if inclusive else '('}{low:g}, {high:g}]"
            raise HistoryError(
                f"{path}: row {rows[i]}: {implied_volatility_column} must be in {bound} in "
                f"{implied_volatility_unit} units, got {implied[i]:g} (is the column in {other}?)")
        if implied_volatility_unit == "percent":
            implied = implied / 100.0
    return History(dates, close, implied, _FIRST_ROW, str(path), hashlib.sha256(raw).hexdigest())


def _parse_dates(path, text: pd.Series, rows: np.ndarray, column: str, date_format: str | None) -> np.ndarray:
    missing = np.flatnonzero((text == "").to_numpy())
    if missing.size:
        raise HistoryError(f"{path}: row {rows[missing[0]]}: missing {column}")
    try:
        parsed = pd.to_datetime(text, format=date_format or "ISO8601", errors="coerce")
    except ValueError:  # pandas refuses a column of several UTC offsets (or offsets beside none)
        _refuse_mixed_zones(path, text, rows, column, date_format)
        raise
    bad = np.flatnonzero(parsed.isna().to_numpy())
    if bad.size:
        i = bad[0]
        expected = f"format {date_format!r}" if date_format else "ISO 8601 like 2024-01-31"
        raise HistoryError(f"{path}: row {rows[i]}: {column} {text.iloc[i]!r} is not a date ({expected})")
    dates = parsed.dt.tz_localize(None) if parsed.dt.tz is not None else parsed
    days = dates.to_numpy().astype("datetime64[D]")
    steps = np.diff(days).astype(np.int64)
    bad = np.flatnonzero(steps <= 0)
    if bad.size:
        i = bad[0] + 1
        rule = (f"repeats row {rows[i - 1]} (dates must be unique)" if steps[i - 1] == 0
                else f"is before row {rows[i - 1]}'s {days[i - 1]} (dates must increase down the file)")
        raise HistoryError(f"{path}: row {rows[i]}: {column} {days[i]} {rule}")
    return days


def _refuse_mixed_zones(path, text: pd.Series, rows: np.ndarray, column: str, date_format: str | None) -> None:
    """Raise a HistoryError naming the first row whose UTC offset (or lack of one) differs from the
    first dated row's; rows that are not dates are left to the date rule."""
    zones = []
    for i, value in enumerate(text):
        stamp = pd.to_datetime(value, format=date_format or "ISO8601", errors="coerce")
        if pd.isna(stamp):
            continue
        zones.append((i, stamp.utcoffset()))
        if zones[-1][1] != zones[0][1]:
            first = zones[0][0]
            raise HistoryError(f"{path}: row {rows[i]}: {column} {value!r} has another time zone than row "
                               f"{rows[first]}'s {text.iloc[first]!r} (one zone, or none, for the whole column)")


def _parse_numbers(path, text: pd.Series, rows: np.ndarray, column: str) -> np.ndarray:
    stripped = text.str.strip()
    missing = np.flatnonzero((stripped == "").to_numpy())
    if missing.size:
        raise HistoryError(f"{path}: row {rows[missing[0]]}: missing {column}")
    values = pd.to_numeric(stripped, errors="coerce").to_numpy(dtype=float)
    bad = np.flatnonzero(~np.isfinite(values))
    if bad.size:
        i = bad[0]
        what = "is not a number" if np.isnan(values[i]) else "is not finite"
        raise HistoryError(f"{path}: row {rows[i]}: {column} {stripped.iloc[i]!r} {what}")
    return values


# ---------------------------------------------------------------------------------------------
# Splitting and windows
# ---------------------------------------------------------------------------------------------


def split_history(
    history: History,
    horizon_rows: int,
    split_date: str | np.datetime64 | None = None,
    split_fraction: float | None = None,
    gap_rows: int = 0,
) -> tuple[History, History]:
    """The early (training) and late (held-out) parts of a history.

    Training rows are the dates before ``split_date`` (or the first
    ``floor(split_fraction * rows)`` rows); the held-out part starts
    ``gap_rows`` rows after them. So the last training row plus the gap is
    before the first held-out row, and no held-out day is seen in training.
    Each part needs at least ``horizon_rows + 1`` rows (one whole window).
    """
    if (split_date is None) == (split_fraction is None):
        raise ValueError("give exactly one of split_date and split_fraction")
    n = history.n_rows
    needed = horizon_rows + 1
    if n < needed:
        raise HistoryError(f"{history.source}: {n} rows, but one horizon of {horizon_rows} trading days "
                           f"needs {needed} rows (too few rows for one horizon)")
    if split_date is not None:
        cut = int(np.searchsorted(history.dates, np.datetime64(split_date, "D"), side="left"))
        where = f"split date {np.datetime64(split_date, 'D')}"
    else:
        cut = int(np.floor(split_fraction * n))
        where = f"split fraction {split_fraction:g}"
    train, heldout = history.rows(0, cut), history.rows(min(cut + gap_rows, n), n)
    if train.n_rows < needed:
        raise HistoryError(f"{history.source}: the {where} leaves {train.n_rows} training rows before it; "
                           f"one horizon of {horizon_rows} trading days needs {needed}")
    if heldout.n_rows < needed:
        raise HistoryError(f"{history.source}: the {where} and a gap of {gap_rows} rows leave "
                           f"{heldout.n_rows} held-out rows; one horizon of {horizon_rows} trading days "
                           f"needs {needed}")
    return train, heldout


def window_count(n_rows: int, horizon_rows: int, stride_rows: int) -> int:
    """Rolling windows of ``horizon_rows`` steps of one row that fit in ``n_rows`` rows, one every
    ``stride_rows`` rows from the first: ``floor((n_rows - 1 - horizon_rows) / stride_rows) + 1``
    (0 when even one does not fit)."""
    if n_rows - 1 < horizon_rows:
        return 0
    return (n_rows - 1 - horizon_rows) // stride_rows + 1


def rolling_windows(history: History, steps: int, step_rows: int, stride_rows: int, spot: float,
                    implied_marks: bool = False) -> MarketPaths:
    """Rolling windows of ``steps`` steps of ``step_rows`` rows, one starting every ``stride_rows``
    rows, each rescaled to start at ``spot`` (window ``i`` starts at row ``i * stride_rows``).

    With ``implied_marks`` the history's implied volatility at each window date is the factor
    ``mark_volatility`` (the mark volatility per path and time)."""
    horizon = steps * step_rows
    count = window_count(history.n_rows, horizon, stride_rows)
    if count == 0:
        raise HistoryError(f"{history.source}: {history.n_rows} rows, but one horizon of {horizon} trading "
                           f"days needs {horizon + 1} rows (too few rows for one horizon)")
    index = (np.arange(count) * stride_rows)[:, None] + (np.arange(steps + 1) * step_rows)[None, :]
    prices = history.close[index]
    paths = spot * prices / prices[:, :1]
    paths[:, 0] = spot  # exactly the configured spot
    factors = {}
    if implied_marks:
        factors[MARK_VOLATILITY_FACTOR] = _implied(history)[index]
    return MarketPaths(paths, factors)


def _implied(history: History) -> np.ndarray:
    if history.implied_volatility is None:
        raise ValueError("the history has no implied volatility column")
    return history.implied_volatility


@dataclass(frozen=True, eq=False)
class HistoricalWindows(GivenPaths):
    """The rolling windows of a part of a history, as a path generator (the seed is ignored).

    ``max_paths`` is the number of windows; asking for fewer takes the earliest.
    """

    history: History | None = None
    stride_rows: int = 1
    role: str = "held-out"

    @classmethod
    def build(cls, history: History, steps: int, step_rows: int, stride_rows: int, spot: float,
              implied_marks: bool = False, role: str = "held-out") -> HistoricalWindows:
        paths = rolling_windows(history, steps, step_rows, stride_rows, spot, implied_marks)
        observed = (MARK_VOLATILITY_FACTOR,) if implied_marks else ()
        return cls(paths, observed, history, stride_rows, role)

    def describe(self) -> dict:
        return {"source": "rolling windows", "role": self.role, "windows": self.paths.n_paths,
                "stride_days": self.stride_rows, **self.history.describe()}


# ---------------------------------------------------------------------------------------------
# Stationary block bootstrap
# ---------------------------------------------------------------------------------------------


def bootstrap_indices(rng: np.random.Generator, n_returns: int, n_paths: int, n_days: int,
                      mean_block: float) -> np.ndarray:
    """Indices of resampled returns, shape (n_paths, n_days), by the stationary bootstrap.

    Politis and Romano (1994): each path starts at a uniformly drawn return;
    each next day either continues the block (the next return, wrapping from
    the last to the first, so every return is equally likely at every day)
    or, with probability ``1 / mean_block``, starts a new block at a
    uniformly drawn return. Block lengths are geometric with mean
    ``mean_block`` days.
    """
    fresh = rng.integers(0, n_returns, size=(n_paths, n_days))
    starts = rng.random((n_paths, n_days)) < 1.0 / mean_block
    starts[:, 0] = True
    day = np.arange(n_days)
    # Day of the latest block start at or before each day, then the offset into that block.
    block_start = np.maximum.accumulate(np.where(starts, day, 0), axis=1)
    first = np.take_along_axis(fresh, block_start, axis=1)
    return (first + (day - block_start)) % n_returns


@dataclass(frozen=True, eq=False)
class StationaryBootstrap(SimulatedMarket):
    """Training paths resampled from a history's daily log returns (stationary block bootstrap).

    Each path is ``steps * step_rows`` resampled days (see
    :func:`bootstrap_indices`), cumulated from ``spot`` and read every
    ``step_rows`` days. With ``implied_marks`` the implied volatility travels
    with its return: the mark volatility at a day is the one at the end of
    the resampled return (at the start, the one at the start of the first).
    Paths come in blocks like every simulated market, so the same seed gives
    the same paths whatever the chunk size. ``dt_years`` is not used: the
    history sets the step.
    """

    history: History | None = None
    spot: float = 100.0
    step_rows: int = 1
    mean_block_rows: float = 10.0
    implied_marks: bool = False
    factor_names: tuple[str, ...] = field(init=False, default=())
    observed_factors: tuple[str, ...] = field(init=False, default=())

    def __post_init__(self) -> None:
        if self.history is None or self.history.n_rows < 2:
            raise ValueError("the bootstrap needs a history of at least 2 rows")
        if self.mean_block_rows < 1:
            raise ValueError(f"mean_block_rows must be >= 1, got {self.mean_block_rows}")
        if self.implied_marks:
            _implied(self.history)
            object.__setattr__(self, "factor_names", (MARK_VOLATILITY_FACTOR,))
            object.__setattr__(self, "observed_factors", (MARK_VOLATILITY_FACTOR,))

    def _simulate(self, rng: np.random.Generator, n_paths: int, n_steps: int, dt_years: float) -> MarketPaths:
        returns = self.history.log_returns
        n_days = n_steps * self.step_rows
        index = bootstrap_indices(rng, returns.size, n_paths, n_days, self.mean_block_rows)
        log_spot = np.zeros((n_paths, n_days + 1))
        np.cumsum(returns[index], axis=1, out=log_spot[:, 1:])
        sampled = log_spot[:, :: self.step_rows]
        spot = self.spot * np.exp(sampled)
        spot[:, 0] = self.spot
        factors = {}
        if self.implied_marks:
            implied = self.history.implied_volatility
            daily = np.empty((n_paths, n_days + 1))
            daily[:, 0] = implied[index[:, 0]]
            daily[:, 1:] = implied[index + 1]
            factors[MARK_VOLATILITY_FACTOR] = np.ascontiguousarray(daily[:, :: self.step_rows])
        return MarketPaths(spot, factors)

    def describe(self) -> dict:
        return {"source": "stationary block bootstrap", "role": "training",
                "mean_block_days": self.mean_block_rows, **self.history.describe()}
