"""Historical prices: CSV validation, rolling windows, the block bootstrap, the date split,
marks from implied volatility, and agents trained on a history.

Real data: the daily S&P 500 and NASDAQ closes (1999-2018) and VIX (2014-2018) that the
PyPI package `arch` ships (arch.data.sp500, arch.data.nasdaq, arch.data.vix), written to CSV
and read back through the project's own loader.
"""

from __future__ import annotations

import json
import os
import subprocess
import sys
import tomllib
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from agents.baselines import DeltaHedge
from agents.registry import LEARNED_FROM_TRANSITIONS
from hedge_env.book import Book, MarkParameters, OptionLeg
from hedge_env.history import (
    HistoricalWindows,
    HistoryError,
    StationaryBootstrap,
    bootstrap_indices,
    load_history,
    split_history,
    window_count,
)
from hedge_env.problem import HedgingProblem, Schedule
from hedge_env.rollout import rollout
from rehedge.build import build_markets, build_problem, historical_parts, path_count
from rehedge.compare import evaluate_policies
from rehedge.config import parse_config
from rehedge.errors import ConfigError
from rehedge.training import train

ROOT = Path(__file__).resolve().parents[2]
DAYS_PER_YEAR = 252


# ---------------------------------------------------------------------------------------------
# Loader errors: each names the row (spreadsheet numbering, header = row 1) and the rule
# ---------------------------------------------------------------------------------------------

GOOD = "date,close,iv\n2024-01-02,10.0,0.2\n2024-01-03,10.5,0.21\n2024-01-04,10.2,0.19\n"


@pytest.mark.parametrize("text, options, expected", [
    ("date,close\n2024-01-02,10\n,11\n", {}, "row 3: missing date"),
    ("date,close\n2024-01-02,10\n2024-13-45,11\n", {}, "row 3: date '2024-13-45' is not a date"),
    ("date,close\n2024-01-02,10\n02/01/2024,11\n", {}, "row 3: date '02/01/2024' is not a date"),
    ("date,close\n2024-01-03,10\n2024-01-04,11\n2024-01-02,12\n", {},
     "row 4: date 2024-01-02 is before row 3's 2024-01-04 (dates must increase down the file)"),
    ("date,close\n2024-01-02,10\n2024-01-03,11\n2024-01-03,12\n", {},
     "row 4: date 2024-01-03 repeats row 3 (dates must be unique)"),
    ("date,close\n2024-01-02,10\n2024-01-03,\n", {}, "row 3: missing close"),
    ("date,close\n2024-01-02,10\n2024-01-03,abc\n", {}, "row 3: close 'abc' is not a number"),
    ("date,close\n2024-01-02,10\n2024-01-03,inf\n", {}, "row 3: close 'inf' is not finite"),
    ("date,close\n2024-01-02,10\n2024-01-03,11\n2024-01-04,-1\n", {}, "row 4: close must be > 0, got -1"),
    ("date,close\n2024-01-02,0\n", {}, "row 2: close must be > 0, got 0"),
    ("date,close\n2024-01-02,10\n\n2024-01-04,11\n", {}, "row 3: missing date"),  # a blank line keeps its number
    ("date,close,iv\n2024-01-02,10,0.2\n2024-01-03,11,25\n", {"implied_volatility_column": "iv"},
     "row 3: iv must be in (0, 5] in decimal units, got 25 (is the column in percent?)"),
    ("date,close,iv\n2024-01-02,10,0.2\n", {"implied_volatility_column": "iv", "implied_volatility_unit": "percent"},
     "row 2: iv must be in [1, 500] in percent units, got 0.2 (is the column in decimal?)"),
    ("date,close,iv\n2024-01-02,10,0.2\n2024-01-03,11,-0.1\n", {"implied_volatility_column": "iv"},
     "row 3: iv must be in (0, 5] in decimal units, got -0.1"),
    ("date,close,iv\n2024-01-02,10,0.2\n2024-01-03,11,\n", {"implied_volatility_column": "iv"}, "row 3: missing iv"),
    ("date,price\n2024-01-02,10\n", {}, "column 'close' not found; columns: date, price"),
    ("date,close\n2024-01-02,10\n", {"implied_volatility_column": "vol"}, "column 'vol' not found"),
    ("", {}, "empty file"),
    ("date;close\n2024-01-02;10\n", {}, "row 1 (header): column 'date' not found; columns: date;close "
                                        "(fields must be separated by ',')"),
    ("date\tclose\n2024-01-02\t10\n", {}, "row 1 (header): column 'date' not found"),
    ("date,close\n2024-01-02,10\n2024-01-03,11,5\n", {}, "row 3: 3 fields, the header (row 1) has 2"),
    ("date,close,iv\n2024-01-02,10,0.2\n2024-01-03,11\n", {"implied_volatility_column": "iv"},
     "row 3: 2 fields, the header (row 1) has 3"),
    ("date,close\n2024-01-02,10\n2024-01-03,nan\n", {}, "row 3: close 'nan' is not a number"),
    ("date,close,iv\n2024-01-02,10,NaN\n", {"implied_volatility_column": "iv"}, "row 2: iv 'NaN' is not a number"),
    ("date,close\n2024-01-02,10\n2024-01-03,1\udce90\n", {}, "row 3: not UTF-8 text"),
    ("\x00\x01\udcff\udcfe\udc89PNG\r\n\x1a\n", {}, "row 1: not UTF-8 text"),
    ("date,close\n", {}, "no rows after the header"),
    ("date,close\n2024-01-02T16:00-05:00,10\n2024-01-03T16:00-05:00,11\n2024-01-04T16:00+01:00,12\n", {},
     "row 4: date '2024-01-04T16:00+01:00' has another time zone than row 2's"),
    ("date,close\n2024-01-02,10\n2024-01-03T16:00Z,11\n", {}, "row 3: date '2024-01-03T16:00Z' has another time zone"),
    ("date,close\n2024-01-02,1e300\n2024-01-03,1e-300\n", {},
     "row 3: close 1e-300 after 1e+300 on row 2: a move of more than a factor of 10 in a day"),
    ("date,close\n2024-01-02,10\n2024-01-03,10.5\n2024-01-04,105.1\n", {}, "row 4: close 105.1 after 10.5"),
    ("date,close,close\n2024-01-02,10,11\n", {}, "row 1 (header): column 'close' appears 2 times"),
    ("date,close\n2024-01-02,10\n\"2024-01-03\"x,11\n", {}, "row 3: date '2024-01-03x' is not a date"),
    pytest.param("date,close\n2024-01-02,10\n2024-01-03," + "1" * 200_000 + "\n", {}, "row 3: not a readable CSV row",
                 id="a-field-past-the-csv-limit"),
])
def test_malformed_csv_is_one_line_naming_the_row_and_the_rule(tmp_path, text, options, expected):
    path = tmp_path / "history.csv"
    path.write_bytes(text.encode("utf-8", "surrogateescape"))  # \udcXX: raw bytes that are not UTF-8
    with pytest.raises(HistoryError) as caught:
        load_history(path, **options)
    message = str(caught.value)
    assert expected in message
    assert "\n" not in message and message.startswith(str(path))


def test_lone_carriage_returns_end_rows_as_text_mode_reads_them(tmp_path):
    path = tmp_path / "history.csv"
    path.write_bytes(b"date,close\r2024-01-02,10\r2024-01-03,11\r\r2024-01-05,12\r")
    with pytest.raises(HistoryError, match="row 4: missing date"):  # the blank line keeps its number
        load_history(path)
    path.write_bytes(b"date,close\r2024-01-02,10\r\n2024-01-03,11\r")
    np.testing.assert_array_equal(load_history(path).close, [10.0, 11.0])


def test_a_history_that_is_a_device_or_a_pipe_is_refused_before_it_is_read(tmp_path):
    """A market.csv symlinked to /dev/zero would fill memory, a FIFO block until a writer came: the
    application reads regular files only."""
    text = (ROOT / "configs" / "historical.toml").read_text()
    (tmp_path / "zero.csv").symlink_to("/dev/zero")
    os.mkfifo(tmp_path / "pipe.csv")
    for name in ("zero.csv", "pipe.csv"):
        config = tmp_path / f"{name}.toml"
        config.write_text(text.replace('csv = "data/bktp-history.csv"', f'csv = "{name}"'))
        done = subprocess.run([sys.executable, "-c", "from rehedge.cli import main; main()", "check-config",
                               str(config)], capture_output=True, text=True, cwd=ROOT, timeout=120)
        assert done.returncode == 2, done.stderr
        assert done.stderr.strip().count("\n") == 0 and "not a regular file" in done.stderr
        assert done.stderr.startswith("error: market.csv: ")


def test_missing_file_is_a_history_error(tmp_path):
    with pytest.raises(HistoryError, match="file not found"):
        load_history(tmp_path / "nowhere.csv")


def test_too_few_rows_for_one_horizon_is_named(tmp_path):
    path = tmp_path / "history.csv"
    path.write_text(GOOD)
    history = load_history(path)
    with pytest.raises(HistoryError, match=r"3 rows, but one horizon of 5 trading days needs 6 rows"):
        split_history(history, 5, split_fraction=0.5)


def test_column_names_date_format_and_percent_unit_are_configurable(tmp_path):
    path = tmp_path / "history.csv"
    path.write_text("Day,Px,VolPct\n02/01/2024,10.0,20\n03/01/2024,10.5,21.5\n")
    history = load_history(path, "Day", "Px", "VolPct", "percent", "%d/%m/%Y")
    assert [str(d) for d in history.dates] == ["2024-01-02", "2024-01-03"]
    np.testing.assert_array_equal(history.close, [10.0, 10.5])
    np.testing.assert_allclose(history.implied_volatility, [0.20, 0.215], rtol=1e-15)


def test_cli_reports_a_bad_csv_in_one_line_with_exit_code_2(tmp_path):
    (tmp_path / "bad.csv").write_text("date,close,implied_vol\n2024-01-02,10,0.2\n2024-01-03,-4,0.2\n")
    text = (ROOT / "configs" / "historical.toml").read_text()
    text = text.replace('csv = "data/bktp-history.csv"', 'csv = "bad.csv"')
    config = tmp_path / "bad.toml"
    config.write_text(text)
    done = subprocess.run([sys.executable, "-c", "from rehedge.cli import main; main()", "check-config", str(config)],
                          capture_output=True, text=True, cwd=ROOT)
    assert done.returncode == 2
    assert done.stderr.strip().count("\n") == 0 and "Traceback" not in done.stderr
    assert "market.csv:" in done.stderr and "row 3: close must be > 0, got -4" in done.stderr


# ---------------------------------------------------------------------------------------------
# The real series shipped by `arch`
# ---------------------------------------------------------------------------------------------


@pytest.fixture(scope="module")
def real(tmp_path_factory):
    """S&P 500 and NASDAQ closes and S&P 500 closes with VIX, as CSV files of our own."""
    from arch.data import nasdaq, sp500, vix

    folder = tmp_path_factory.mktemp("arch")
    frames = {"sp500": sp500.load(), "nasdaq": nasdaq.load()}
    for name, frame in frames.items():
        frame.to_csv(folder / f"{name}.csv")  # columns Date, Open, High, Low, Close, Adj Close, Volume
    both = pd.concat([frames["sp500"]["Close"], vix.load()["vix"]], axis=1, join="inner").loc["2014":"2018"]
    both.index.name = "Date"
    both.to_csv(folder / "sp500_vix.csv")
    return folder, frames


def _load(folder, name, **options):
    return load_history(folder / f"{name}.csv", date_column="Date", close_column="Close", **options)


def test_sp500_and_nasdaq_load_whole(real):
    folder, frames = real
    for name in ("sp500", "nasdaq"):
        history = _load(folder, name)
        # The arch package's daily series: 5031 rows from 1999-01-04 to 2018-12-31 (open data set).
        assert history.n_rows == len(frames[name]) == 5031
        assert history.date_range() == ("1999-01-04", "2018-12-31")
        np.testing.assert_array_equal(history.close, frames[name]["Close"].to_numpy())


@pytest.mark.parametrize("stride", [1, 5, 21, 250])
def test_window_count_and_contents_follow_from_rows_horizon_and_stride(real, stride):
    folder, frames = real
    history = _load(folder, "sp500")
    close = frames["sp500"]["Close"].to_numpy()
    horizon = 21
    windows = HistoricalWindows.build(history, horizon, 1, stride, 100.0)
    count = windows.max_paths
    # Closed form: starts 0, stride, ... while start + horizon <= rows - 1.
    assert count == (5031 - 1 - horizon) // stride + 1 == window_count(5031, horizon, stride)
    assert (count - 1) * stride + horizon <= 5031 - 1 < count * stride + horizon
    starts = np.arange(count) * stride
    expected = 100.0 * close[starts[:, None] + np.arange(horizon + 1)] / close[starts, None]
    np.testing.assert_allclose(windows.paths.spot, expected, rtol=1e-13)
    assert (windows.paths.spot[:, 0] == 100.0).all()


def test_weekly_steps_take_every_fifth_row(real):
    folder, frames = real
    history = _load(folder, "sp500")
    windows = HistoricalWindows.build(history, 4, 5, 20, 50.0)
    close = frames["sp500"]["Close"].to_numpy()
    assert windows.max_paths == (5031 - 1 - 20) // 20 + 1
    np.testing.assert_allclose(windows.paths.spot[3], 50.0 * close[60:81:5] / close[60], rtol=1e-13)


def _historical_config(csv: Path, **market) -> dict:
    data = tomllib.loads((ROOT / "configs" / "historical.toml").read_text())
    data["market"] = {"model": "historical", "csv": str(csv), "spot": 100.0, "date_column": "Date",
                      "close_column": "Close", **market}
    data["book"]["options"] = [{"kind": "call", "strike": 100.0, "expiry_days": 21, "quantity": -1}]
    return data


@pytest.mark.parametrize("split", [{"split_date": "2014-01-02"}, {"split_fraction": 0.6}])
@pytest.mark.parametrize("training", ["windows", "bootstrap"])
def test_no_heldout_day_is_seen_in_training(real, split, training):
    folder, _ = real
    config = parse_config(_historical_config(folder / "sp500.csv", training=training, gap_days=15, **split))
    train, heldout = historical_parts(config)
    history = _load(folder, "sp500")
    row = {str(d): i for i, d in enumerate(history.dates)}
    last_train, first_heldout = row[str(train.dates[-1])], row[str(heldout.dates[0])]
    assert last_train + 15 < first_heldout
    assert train.dates.max() < heldout.dates.min()
    train_source, heldout_source = build_markets(config)
    assert train_source.describe()["last_date"] == str(train.dates[-1])
    assert heldout_source.describe()["first_date"] == str(heldout.dates[0])
    # The held-out windows are those of the later part, a horizon apart by default (no overlap).
    assert heldout_source.max_paths == window_count(heldout.n_rows, 21, 21)
    if "split_date" in split:
        assert str(train.dates[-1]) == "2013-12-31" and first_heldout == row["2014-01-02"] + 15


def test_sp500_realised_volatility(real):
    folder, frames = real
    history = _load(folder, "sp500")
    close = frames["sp500"]["Close"].to_numpy()
    direct = np.std(np.log(close[1:]) - np.log(close[:-1]), ddof=1) * np.sqrt(252)
    assert history.realised_volatility(252) == pytest.approx(direct, rel=1e-12)
    # From memory: S&P 500 realised volatility over 1999-2018 was about 19% a year (15-25% band);
    # NASDAQ's, with the 2000-2002 crash, higher, roughly 25% (20-35% band).
    assert 0.15 < direct < 0.25
    assert 0.20 < _load(folder, "nasdaq").realised_volatility(252) < 0.35
    assert _load(folder, "nasdaq").realised_volatility(252) > direct


def test_realised_marks_are_the_training_periods_volatility(real):
    folder, _ = real
    config = parse_config(_historical_config(folder / "sp500.csv", split_date="2009-01-02", marks="realised"))
    train, _ = historical_parts(config)
    assert str(train.dates[-1]) == "2008-12-31"
    problem = build_problem(config)
    assert problem.marks.volatility == pytest.approx(train.realised_volatility(DAYS_PER_YEAR), rel=1e-15)
    assert not problem.mark_volatility_observed
    assert build_markets(config)[1].observed_factors == ()


def test_stationary_bootstrap_preserves_mean_and_variance_of_log_returns(real):
    folder, _ = real
    history = _load(folder, "sp500")
    returns = history.log_returns
    steps, n_paths = 21, 4000
    market = StationaryBootstrap(history=history, spot=100.0, step_rows=1, mean_block_rows=10.0)
    paths = market.generate(n_paths, steps, 1 / DAYS_PER_YEAR, seed=11)
    drawn = np.diff(np.log(paths.spot), axis=1)
    # Every return is equally likely at every day (circular blocks), so the resampled mean and
    # variance equal the sample's; paths are independent, so their per-path averages give the SE.
    per_path_mean = drawn.mean(axis=1)
    se_mean = per_path_mean.std(ddof=1) / np.sqrt(n_paths)
    assert abs(per_path_mean.mean() - returns.mean()) < 4 * se_mean
    per_path_square = ((drawn - returns.mean()) ** 2).mean(axis=1)
    se_square = per_path_square.std(ddof=1) / np.sqrt(n_paths)
    assert abs(per_path_square.mean() - returns.var()) < 4 * se_square
    assert se_square < 0.05 * returns.var()  # the check has teeth: the SE is small next to the variance


def test_bootstrap_blocks_are_geometric_with_the_configured_mean():
    mean_block, n_returns = 8.0, 5000
    index = bootstrap_indices(np.random.default_rng(3), n_returns, 2000, 50, mean_block)
    continued = index[:, 1:] == (index[:, :-1] + 1) % n_returns
    # A day continues its block with probability 1 - 1/mean, or by chance when a new block starts there.
    p = 1 - 1 / mean_block + (1 / mean_block) / n_returns
    se = np.sqrt(p * (1 - p) / continued.size)
    assert abs(continued.mean() - p) < 4 * se


def test_bootstrap_is_seeded_and_chunk_independent(real):
    folder, _ = real
    history = _load(folder, "sp500")
    market = StationaryBootstrap(history=history, spot=100.0, step_rows=2, mean_block_rows=5.0)
    whole = market.generate(5000, 10, 2 / DAYS_PER_YEAR, seed=4)
    again = market.generate(5000, 10, 2 / DAYS_PER_YEAR, seed=4)
    np.testing.assert_array_equal(whole.spot, again.spot)
    parts = [market.generate(n, 10, 2 / DAYS_PER_YEAR, seed=4, start=s) for s, n in ((0, 1234), (1234, 3766))]
    np.testing.assert_array_equal(np.concatenate([p.spot for p in parts]), whole.spot)
    assert not np.array_equal(market.generate(10, 10, 2 / DAYS_PER_YEAR, seed=5).spot, whole.spot[:10])


# ---------------------------------------------------------------------------------------------
# Implied-volatility marks: the variance risk premium on S&P 500 with VIX
# ---------------------------------------------------------------------------------------------


def test_selling_sp500_calls_at_vix_and_delta_hedging_earned_a_positive_mean(real):
    folder, _ = real
    history = load_history(folder / "sp500_vix.csv", "Date", "Close", "vix", "percent")
    assert history.date_range()[0] == "2014-01-03" and history.date_range()[1] == "2018-12-31"
    horizon = 21
    # Non-overlapping one-month windows: overlapping ones share days, and the SE below (paths
    # taken as independent) would be too small.
    windows = HistoricalWindows.build(history, horizon, 1, horizon, 100.0, implied_marks=True)
    problem = HedgingProblem(
        book=Book((OptionLeg("call", 100.0, horizon, -1.0),)),
        marks=MarkParameters(volatility=0.15, days_per_year=DAYS_PER_YEAR),
        schedule=Schedule(steps=horizon, step_days=1.0),
        reference_spot=100.0,
        mark_volatility_observed=True,
    )
    result = rollout(problem, DeltaHedge(problem), windows, n_paths=windows.max_paths)
    pnl = result.pnl
    assert pnl.size == window_count(history.n_rows, horizon, horizon) == 59
    se = pnl.std(ddof=1) / np.sqrt(pnl.size)
    # Common practice, no source: index implied volatility has on average exceeded realised
    # volatility, so one-month at-the-money calls sold at implied vol and delta hedged daily
    # (at implied vol) earned a positive mean, here more than two standard errors above 0.
    assert pnl.mean() > 2 * se
    # The premium is the mark at each window's first VIX, so it varies by path (VIX 2014-2018
    # ranged from about 9 to over 30, open data set).
    first_vix = windows.paths.factors["mark_volatility"][:, 0]
    assert first_vix.min() < 0.11 and first_vix.max() > 0.2


def test_delta_hedge_prices_at_the_observed_mark_volatility():
    problem = HedgingProblem(book=Book((OptionLeg("call", 100.0, 21, -1.0),)),
                             marks=MarkParameters(volatility=0.15, days_per_year=DAYS_PER_YEAR),
                             schedule=Schedule(steps=21), mark_volatility_observed=True)
    spot = np.array([95.0, 100.0, 105.0])
    vol = np.array([0.1, 0.3, 0.5])
    obs = np.column_stack([spot / 100.0, np.full(3, problem.years_to_horizon(5)), np.zeros(3), vol])
    expected = -problem.book.value_and_delta(spot, 5.0, problem.marks, vol)[1]
    np.testing.assert_allclose(DeltaHedge(problem).act(obs), expected, rtol=1e-12)
    flat = -problem.book.value_and_delta(spot, 5.0, problem.marks)[1]
    assert not np.allclose(expected, flat)


# ---------------------------------------------------------------------------------------------
# The shipped demo history and agents on it
# ---------------------------------------------------------------------------------------------


def test_shipped_history_config_loads_with_implied_marks():
    from rehedge.config import load_config

    config = load_config(ROOT / "configs" / "historical.toml")
    assert Path(config.market.csv).is_file() and (ROOT / "configs" / "data" / "bktp-history.csv").stat().st_size < 1e6
    train, heldout = build_markets(config)
    problem = build_problem(config)
    assert problem.mark_volatility_observed and train.observed_factors == ("mark_volatility",)
    assert heldout.describe()["first_date"] > train.describe()["last_date"]
    assert path_count(heldout, config.data.heldout_paths) == heldout.max_paths < config.data.heldout_paths


def test_every_learned_agent_trains_and_evaluates_on_the_historical_config_with_implied_marks(tmp_path):
    # The shipped config marks at each date's implied volatility, which the agents observe.
    data = tomllib.loads((ROOT / "configs" / "historical.toml").read_text())
    assert data["market"]["marks"] == "implied"
    data["market"]["csv"] = str(ROOT / "configs" / "data" / "bktp-history.csv")
    data["data"].update(train_paths=400, chunk_paths=200)
    data["baselines"] = [{"kind": "no_hedge"}, {"kind": "delta"}]
    learned = sorted(LEARNED_FROM_TRANSITIONS)
    data["agents"] = [{"kind": kind, **({"regressor_params": {"max_iter": 10}} if kind == "fitted_q" else {})}
                      for kind in learned]
    config = parse_config(data)
    training = train(config)
    assert training.sizes["train_paths"] == 400
    heldout = training.heldout_market
    n_paths = path_count(heldout, config.data.heldout_paths)
    evaluation = evaluate_policies(training.problem, training.policies, heldout, n_paths, config.data.heldout_seed)
    table = evaluation.table
    assert set(table.index) == {"no_hedge", "delta", *learned}
    assert (table["paths"] == heldout.max_paths).all()
    assert np.isfinite(table["objective"]).all()
    # Hedging beats not hedging on the held-out history (a 40-contract spread, 21 daily rehedges).
    for name in ("delta", *learned):
        assert table.loc[name, "std_pnl"] < table.loc["no_hedge", "std_pnl"]


def test_the_grid_optimum_is_refused_on_a_history_when_the_config_is_loaded():
    data = tomllib.loads((ROOT / "configs" / "historical.toml").read_text())
    data["market"]["csv"] = str(ROOT / "configs" / "data" / "bktp-history.csv")
    data["agents"] = [{"kind": "grid_dp"}]
    with pytest.raises(ConfigError, match=r"^agents\[0\]\.kind: grid_dp solves a one-factor GBM market only, "
                                          r"got market.model = 'historical'$"):
        parse_config(data)


def test_run_folder_states_both_date_ranges(tmp_path):
    text = (ROOT / "configs" / "historical.toml").read_text()
    text = text.replace('csv = "data/bktp-history.csv"', f'csv = "{ROOT / "configs" / "data" / "bktp-history.csv"}"')
    text = text.replace("train_paths = 20_000", "train_paths = 300").replace("chunk_paths = 8_192", "chunk_paths = 300")
    text = text.split("[[baselines]]")[0] + '[[baselines]]\nkind = "delta"\n\n[[agents]]\nkind = "linear"\n'
    config = tmp_path / "small.toml"
    config.write_text(text)
    done = subprocess.run([sys.executable, "-c", "from rehedge.cli import main; main()", "run", str(config),
                           "--runs-dir", str(tmp_path / "runs"), "--quiet", "--json"],
                          capture_output=True, text=True, cwd=ROOT)
    assert done.returncode == 0, done.stderr
    # The screen says what the history could give: fewer windows than asked, tails on few paths, no seed.
    screen = subprocess.run([sys.executable, "-c", "from rehedge.cli import main; main()", "evaluate", str(config),
                             "--quiet"], capture_output=True, text=True, cwd=ROOT)
    assert screen.returncode == 0, screen.stderr
    windows = json.loads(done.stdout)["heldout_paths"]
    said = " ".join(screen.stdout.split())
    assert f"{windows} held-out windows of the history (all it has; data.heldout_paths asks for 50,000)" in said
    assert f"VaR and CVaR rest on {windows} paths (fewer than 100)" in said
    title = screen.stdout.splitlines()[0]
    assert "held-out windows" in title and "seed" not in title  # fixed windows have no seed
    run_dir = next((tmp_path / "runs").iterdir())
    manifest = json.loads((run_dir / "manifest.json").read_text())
    history = manifest["history"]
    assert history["train"]["first_date"] == "2016-01-04" and history["train"]["last_date"] == "2021-01-01"
    assert history["heldout"]["first_date"] > history["train"]["last_date"]
    report = (run_dir / "report.html").read_text()
    for role in ("train", "heldout"):
        assert f"{history[role]['first_date']} to {history[role]['last_date']}" in report
    windows = history["heldout"]["windows"]
    assert f"{windows} held-out windows of the history (all it has; data.heldout_paths asks for 50,000)" in report
    assert f"VaR and CVaR rest on {windows} paths (fewer than 100)" in report
    out = json.loads(done.stdout)
    assert out["heldout_paths"] == history["heldout"]["windows"]


def test_a_split_leaving_too_few_heldout_rows_is_a_config_error(tmp_path):
    data = tomllib.loads((ROOT / "configs" / "historical.toml").read_text())
    data["market"]["csv"] = str(ROOT / "configs" / "data" / "bktp-history.csv")
    data["market"]["split_date"] = "2024-12-02"
    with pytest.raises(ConfigError, match=r"^market.split_date: .*held-out rows; one horizon of 21 trading days"):
        build_markets(parse_config(data))


@pytest.mark.parametrize("change, expected", [
    ({"market": {"implied_volatility_column": None, "marks": "implied"}},
     "market.marks: 'implied' needs market.implied_volatility_column"),
    ({"market": {"split_fraction": 0.5}}, "market.split_fraction: give split_date or split_fraction, not both"),
    ({"market": {"split_date": "2021-02-30"}}, "market.split_date: must be a date like 2024-01-31, got '2021-02-30'"),
    ({"market": {"marks": "configured"}}, "pricing.volatility: required with market.marks = 'configured'"),
    ({"pricing": {"volatility": 0.2}}, "pricing.volatility: set only with market.marks = 'configured'"),
    ({"schedule": {"step_days": 1.5}}, "schedule.step_days: must be a whole number of trading days"),
    ({"market": {"stride_days": 0}}, "market.stride_days: must be >= 1, got 0"),
    ({"market": {"implied_volatility_unit": "basis_points"}}, "market.implied_volatility_unit: must be one of"),
])
def test_historical_config_errors_name_the_key(change, expected):
    data = tomllib.loads((ROOT / "configs" / "historical.toml").read_text())
    for section, values in change.items():
        for key, value in values.items():
            if value is None:
                data[section].pop(key)
            else:
                data[section][key] = value
    with pytest.raises(ConfigError) as caught:
        parse_config(data)
    assert str(caught.value).startswith(expected)
