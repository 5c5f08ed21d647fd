"""Hedge tables: round trip to the source policy's objective, refusal of tampered or foreign tables,
clamping, the Policy protocol, and the export / advise / evaluate commands."""

from __future__ import annotations

import json
import math
from dataclasses import replace
import shutil
import subprocess
import sys
import tomllib
from pathlib import Path

import numpy as np
import pytest
from typer.testing import CliRunner

from agents.baselines import DeltaHedge, FixedBand, LelandDelta, NoHedge, WhalleyWilmottBand, band_center
from agents.dataset import Exploration, Transitions, collect_chunks
from agents.fitted_q import FittedQAgent, default_regressor
from agents.grid_dp import GridDPAgent
from agents.linear import LinearBasisAgent
from agents.policy import Policy
from hedge_env.book import Book, MarkParameters, OptionLeg
from hedge_env.frictions import Frictions
from hedge_env.market import GBMMarket
from hedge_env.objective import Objective
from hedge_env.problem import HedgingProblem, Schedule
from hedge_env.rollout import rollout_many
from rehedge.cli import CAUTION, app
from rehedge.config import parse_config
from rehedge.errors import ConfigError
from rehedge.tables.export import TARGET_DIGITS, TableGrid, export_table
from hedge_env.step import observation_rows
from rehedge.tables.reader import BAND_COLUMNS, TARGET_COLUMNS, HedgeTable, TableError, sidecar_digest

ROOT = Path(__file__).resolve().parents[2]


def reference_like(cost_rate: float = 0.005) -> HedgingProblem:
    """The reference GBM case made small: short one ATM 10-day call, 10 daily rehedges, kappa 1."""
    return HedgingProblem(
        book=Book((OptionLeg("call", 100.0, 10.0, -1.0),)),
        marks=MarkParameters(volatility=0.2),
        frictions=Frictions(cost_rate=cost_rate),
        objective=Objective(risk_aversion=1.0),
        schedule=Schedule(steps=10, step_days=1.0),
        reference_spot=100.0,
    )


@pytest.fixture(scope="module")
def exported(tmp_path_factory):
    """Grid DP and two band baselines on the small reference case, each exported on the default grid."""
    folder = tmp_path_factory.mktemp("tables")
    problem = reference_like()
    sources = {
        "grid_dp": GridDPAgent(problem, drift=0.0, volatility=0.2, spot_points=61, holding_points=81).fit(),
        "whalley_wilmott": WhalleyWilmottBand(problem, risk_aversion=5.0),
        "fixed_band": FixedBand(problem, half_width=0.05),
    }
    tables = {name: HedgeTable.load(export_table(policy, problem, folder / name, kind=name))
              for name, policy in sources.items()}
    return problem, sources, tables, folder


def test_default_grid_table_reaches_the_source_objective_within_one_percent_on_heldout_paths(exported):
    # Issue 5, item 5: the loaded table, scored on held-out paths, within 1% of the source's objective.
    # Default grid: every rehedge time x 101 moneyness nodes (+-4 sd of log spot) x 41 holding nodes.
    problem, sources, tables, _ = exported
    policies = {**sources, **{f"{name}.table": table for name, table in tables.items()}}
    results = rollout_many(problem, policies, GBMMarket(spot=100.0, drift=0.0, volatility=0.2),
                           n_paths=6000, seed=12345)
    for name in sources:
        source, table = results[name].reward, results[f"{name}.table"].reward
        gap = table.mean() - source.mean()
        assert abs(gap) <= 0.01 * abs(source.mean()), (name, source.mean(), table.mean())


def test_table_files_have_the_documented_columns_rows_and_sidecar(exported):
    problem, _, tables, _ = exported
    table = tables["grid_dp"]
    meta = table.meta
    assert meta["format"] == "rehedge-hedge-table" and meta["format_version"] == 6
    assert meta["state_axis"] is None and table.state is None  # the policy reads spot, time and holding alone
    n_days, n_money, n_hold = (len(meta["grid"][k]) for k in ("days_left", "moneyness", "holding_shares"))
    assert (n_days, n_money, n_hold) == (10, 101, 41)
    assert meta["grid"]["days_left"] == [float(d) for d in range(1, 11)]  # days left at each rehedge
    lines = (table.path / "targets.csv").read_text().splitlines()
    assert lines[0] == ",".join(TARGET_COLUMNS) and len(lines) == 1 + n_days * n_money * n_hold
    band = (table.path / "band.csv").read_text().splitlines()
    assert band[0] == ",".join(BAND_COLUMNS) and len(band) == 1 + n_days * n_money
    assert meta["book"]["notional_shares"] == 1.0 and meta["book"]["reference_spot"] == 100.0
    assert meta["frictions"]["cost_rate"] == 0.005 and meta["objective"]["risk_aversion"] == 1.0
    assert meta["policy"]["parameters"]["holding_points"] == 81
    assert meta["units"]["holding_shares"].startswith("shares")
    assert meta["domain"]["holding_shares"] == [meta["grid"]["holding_shares"][0], meta["grid"]["holding_shares"][-1]]


def test_decide_at_grid_nodes_returns_the_csv_targets_and_keeps_holdings_inside_the_band(exported):
    _, _, tables, _ = exported
    table = tables["whalley_wilmott"]
    rows = np.loadtxt(table.path / "targets.csv", delimiter=",", skiprows=1)
    decision = table.decide(rows[:, 1] * table.reference_spot, rows[:, 0], rows[:, 2])
    inside = decision.inside_band
    assert np.allclose(decision.target_shares[~inside], rows[~inside, 3], rtol=0, atol=1e-12)
    assert np.array_equal(decision.trade_shares[inside], np.zeros(inside.sum()))
    assert 0 < inside.mean() < 1 and not decision.clamped.any()
    # The band's edges hold the policy's own no-trade region: Whalley-Wilmott's band around delta.
    source = WhalleyWilmottBand(table_problem := reference_like(), risk_aversion=5.0)
    spot, days = np.array([97.0, 100.0, 104.0]), np.array([3.0, 3.0, 3.0])
    centre = -table_problem.book.value_and_delta(spot, 7.0, table_problem.marks)[1]
    half = source.half_width_shares(spot, 7.0)
    at = table.decide(spot, days, centre)
    assert np.allclose(at.band_lower_shares, centre - half, atol=2e-3)
    assert np.allclose(at.band_upper_shares, centre + half, atol=2e-3)


def test_points_outside_the_domain_are_clamped_to_its_edge_and_flagged(exported):
    _, _, tables, _ = exported
    table = tables["fixed_band"]
    (d_low, d_high), (s_low, s_high), (h_low, h_high) = (table.domain[k] for k in ("days_left", "spot", "holding_shares"))
    spot = np.array([100.0, s_high * 1.2, s_low * 0.8, 100.0, 100.0, 100.0])
    days = np.array([5.0, 5.0, 5.0, d_high + 3.0, d_low / 2.0, 5.0])
    held = np.array([0.2, 0.2, 0.2, 0.2, 0.2, h_high + 1.0])
    decision = table.decide(spot, days, held)
    assert decision.clamped.tolist() == [False, True, True, True, True, True]
    assert decision.clamped_moneyness.tolist() == [False, True, True, False, False, False]
    assert decision.clamped_days_left.tolist() == [False, False, False, True, True, False]
    assert decision.clamped_holding.tolist() == [False] * 5 + [True]
    edges = table.decide(np.array([s_high, s_low, 100.0, 100.0, 100.0]), np.array([5.0, 5.0, d_high, d_low, 5.0]),
                         np.array([0.2, 0.2, 0.2, 0.2, h_high]))
    assert np.array_equal(decision.target_shares[1:], edges.target_shares)
    with pytest.raises(TableError, match="spot must be a positive finite number"):
        table.decide(-1.0, 5.0, 0.0)


def test_table_is_a_policy_and_acts_per_share_of_notional(exported):
    problem, _, tables, _ = exported
    table = tables["grid_dp"]
    assert isinstance(table, Policy) and table.name == "grid_dp.table"
    obs = np.column_stack([np.linspace(0.95, 1.05, 5), np.full(5, 4 / 365), np.linspace(0.1, 0.9, 5)])
    assert np.array_equal(table.act(obs), table.decide(obs[:, 0] * 100.0, np.full(5, 4.0), obs[:, 2]).target_shares)
    table.check_problem(problem)
    other = HedgingProblem(book=Book((OptionLeg("call", 105.0, 10.0, -1.0),)), schedule=Schedule(steps=10))
    with pytest.raises(TableError, match="exported for another book"):
        table.check_problem(other)


def _copy(table: HedgeTable, tmp_path: Path) -> Path:
    copy = tmp_path / "copy"
    shutil.copytree(table.path, copy)
    return copy


def test_a_changed_csv_byte_is_refused_by_its_checksum(exported, tmp_path):
    _, _, tables, _ = exported
    copy = _copy(tables["fixed_band"], tmp_path)
    data = bytearray((copy / "targets.csv").read_bytes())
    position = data.index(b"\n", 200) - 1  # the last digit of a target
    data[position] = ord("1") if data[position] != ord("1") else ord("2")
    (copy / "targets.csv").write_bytes(bytes(data))
    with pytest.raises(TableError, match=r"targets.csv: SHA-256 .* does not match the sidecar"):
        HedgeTable.load(copy)
    (copy / "targets.csv").unlink()
    with pytest.raises(TableError, match="targets.csv: hedge table file not found"):
        HedgeTable.load(copy)


def test_another_format_version_is_refused(exported, tmp_path):
    _, _, tables, _ = exported
    copy = _copy(tables["fixed_band"], tmp_path)
    meta = json.loads((copy / "table.json").read_text())
    meta["format_version"] = 1  # the version whose targets could fall outside their own band
    (copy / "table.json").write_text(json.dumps(meta))
    with pytest.raises(TableError, match="format_version 1 is not supported by this reader"):
        HedgeTable.load(copy / "table.json")


@pytest.fixture(scope="module")
def every_kind(exported, tmp_path_factory):
    """A table of every policy kind on the small reference case: the exported ones, the other baselines
    and both learned agents (fitted on a few hundred paths: a table must agree with itself whatever
    its policy is worth)."""
    problem, _, tables, _ = exported
    folder = tmp_path_factory.mktemp("kinds")
    market = GBMMarket(spot=100.0, volatility=0.2)
    data = Transitions.concat(list(collect_chunks(problem, market, 400, 3, Exploration())))
    sources = {
        "no_hedge": NoHedge(problem), "delta": DeltaHedge(problem), "leland": LelandDelta(problem, cost_rate=0.005),
        "linear": LinearBasisAgent(problem).fit(data),
        "fitted_q": FittedQAgent(problem, regressor=default_regressor().set_params(max_iter=10)).fit(data),
    }
    made = {name: HedgeTable.load(export_table(policy, problem, folder / name, kind=name))
            for name, policy in sources.items()}
    return problem, {**tables, **made}


@pytest.mark.parametrize("kind", ["no_hedge", "delta", "leland", "whalley_wilmott", "fixed_band", "grid_dp",
                                  "linear", "fitted_q"])
def test_a_table_target_never_passes_the_far_edge_of_its_band(every_kind, kind):
    problem, tables = every_kind
    table = tables[kind]
    rng = np.random.default_rng(17)
    n = 4000
    spot = rng.uniform(*table.domain["spot"], n)
    days = rng.uniform(*table.domain["days_left"], n)
    held = rng.uniform(*table.domain["holding_shares"], n)
    first = table.decide(spot, days, held)
    lower, upper, target = first.band_lower_shares, first.band_upper_shares, first.target_shares
    banded = np.isfinite(lower) & np.isfinite(upper)
    assert (target[banded & (held < lower)] <= upper[banded & (held < lower)]).all()
    assert (target[banded & (held > upper)] >= lower[banded & (held > upper)]).all()
    assert np.array_equal(target[first.inside_band], held[first.inside_band])
    assert banded.mean() > 0.5 or kind == "no_hedge"


@pytest.mark.parametrize("kind", ["whalley_wilmott", "fixed_band"])
def test_a_band_policys_table_target_lies_in_its_band_and_asking_again_from_it_trades_nothing(every_kind, kind):
    # A band baseline trades from outside exactly onto its nearer edge, at every node: between holding
    # nodes its interpolated target is inside or on the band, so asking again trades nothing.
    problem, tables = every_kind
    table = tables[kind]
    rng = np.random.default_rng(17)
    n = 4000
    days_low, days_high = table.domain["days_left"]
    spot_low, spot_high = table.domain["spot"]
    hold_low, hold_high = table.domain["holding_shares"]
    spot = rng.uniform(spot_low, spot_high, n)
    days = rng.uniform(days_low, days_high, n)
    held = rng.uniform(hold_low, hold_high, n)
    first = table.decide(spot, days, held)
    banded = np.isfinite(first.band_lower_shares) & np.isfinite(first.band_upper_shares)
    target = first.target_shares
    assert ((target[banded] >= first.band_lower_shares[banded]) & (target[banded] <= first.band_upper_shares[banded])).all()
    again = table.decide(spot, days, target)
    assert np.array_equal(again.trade_shares[banded], np.zeros(banded.sum()))
    assert banded.mean() > 0.5 or kind == "no_hedge"


class ShortOfTheBand:
    """A policy that, from outside the band of half-width ``width`` (per share of notional) around the
    Black-Scholes hedge, moves half way to the nearer edge: the shape of the best trade under impact
    costs that grow faster than the trade."""

    name = "short_of_the_band"

    def __init__(self, problem, width: float = 0.1):
        self.problem, self.width = problem, width

    def edges(self, obs) -> tuple[np.ndarray, np.ndarray]:
        """The band's edges, per share of notional."""
        center = band_center(self.problem, "delta", obs)[0] / self.problem.notional_shares
        return center - self.width, center + self.width

    def act(self, obs):
        low, high = self.edges(obs)
        held = obs[:, 2]
        return np.where(held < low, held + 0.5 * (low - held), np.where(held > high, held - 0.5 * (held - high), held))


def test_a_target_short_of_the_band_is_read_back_as_the_policy_gave_it(exported, tmp_path):
    # At the table's (days, moneyness) nodes and holdings a node or more from either edge, trilinear
    # reading of a policy that is linear in the holding outside its band is exact: the table's target
    # is the policy's to the CSV's digits (format 5 moved it onto the band's edge, half the way off).
    problem = exported[0]
    policy = ShortOfTheBand(problem)
    table = HedgeTable.load(export_table(policy, problem, tmp_path / "short", kind="fixed_band"))
    days, money, holds = table.days_left, table.moneyness, table.holding_shares
    node = holds[1] - holds[0]
    d, m, h = (x.ravel() for x in np.meshgrid(days, money, holds, indexing="ij"))
    years = d / problem.marks.days_per_year
    obs = observation_rows(problem, m * problem.reference_spot, years, h, ())
    source = policy.act(obs) * problem.notional_shares
    low, high = (edge * problem.notional_shares for edge in policy.edges(obs))
    away = (h < low - node) | (h > high + node)
    assert away.mean() > 0.3
    decision = table.decide(m * problem.reference_spot, d, h)
    # TARGET_DIGITS significant digits in the CSV: a relative rounding of at most half a unit in the last.
    np.testing.assert_allclose(decision.target_shares[away], source[away], rtol=0.5 * 10.0 ** (1 - TARGET_DIGITS),
                               atol=1e-12)


def test_a_failed_export_writes_nothing(tmp_path):
    problem = reference_like()

    class Broken:
        name = "broken"

        def act(self, obs):
            return np.where(obs[:, 0] > 1.1, np.nan, 0.5)

    with pytest.raises(TableError, match="non-finite targets"):
        export_table(Broken(), problem, tmp_path / "broken", grid=TableGrid(moneyness_points=11, holding_points=5))
    assert list(tmp_path.iterdir()) == []


def test_export_replaces_an_older_table_whole(tmp_path):
    problem = reference_like()
    folder = tmp_path / "t"
    small = TableGrid(moneyness_points=11, holding_points=5)
    export_table(DeltaHedge(problem), problem, folder, grid=small)
    export_table(FixedBand(problem, half_width=0.1), problem, folder, grid=small)
    assert HedgeTable.load(folder).meta["policy"]["name"] == "fixed_band"
    assert sorted(p.name for p in tmp_path.iterdir()) == ["t"]


runner = CliRunner()


def test_advise_prints_target_trade_band_and_cautions_with_exit_code_0(exported):
    _, _, tables, _ = exported
    path = str(tables["whalley_wilmott"].path)
    done = runner.invoke(app, ["advise", path, "--spot", "101.5", "--days-left", "4", "--holding", "0.1", "--json"])
    assert done.exit_code == 0, done.stderr
    out = json.loads(done.stdout)
    expected = tables["whalley_wilmott"].decide(101.5, 4.0, 0.1)
    assert out["target_shares"] == float(expected.target_shares)
    # The trade in whole lots (the default lot is one share): 0.517 shares to buy rounds to 1.
    assert out["trade_shares"] == round(out["target_shares"] - 0.1) == 1.0 and out["traded_target_shares"] == 1.1
    assert out["band_lower_shares"] == float(expected.band_lower_shares) and not out["inside_band"]
    assert out["clamped"] is False and out["caution"] == CAUTION
    text = runner.invoke(app, ["advise", path, "--spot", "101.5", "--days-left", "4", "--holding", "0.1"])
    assert text.exit_code == 0
    assert f"target holding  {out['target_shares']:,.6g} shares" in text.stdout and "buy" in text.stdout
    assert "no-trade band" in text.stdout and "Decision support, not advice" in text.stdout


def test_advise_says_when_it_clamped(exported):
    _, _, tables, _ = exported
    path = str(tables["whalley_wilmott"].path)
    done = runner.invoke(app, ["advise", path, "--spot", "500", "--days-left", "4", "--holding", "-48"])
    assert done.exit_code == 0
    assert "CLAMPED: spot 500 is outside the table's domain" in done.stdout
    assert "CLAMPED: holding_shares -48 is outside" in done.stdout


@pytest.mark.parametrize("edit, args, message", [
    (None, ("--spot", "0", "--days-left", "4", "--holding", "0"), "error: spot must be a positive finite number"),
    (None, ("--spot", "100", "--days-left", "4", "--holding", "0", "--variance", "0.04"),
     "error: --variance: this table has no variance axis"),
    ("tamper", ("--spot", "100", "--days-left", "4", "--holding", "0"), "band.csv: SHA-256"),
    ("missing", ("--spot", "100", "--days-left", "4", "--holding", "0"), "no hedge table here"),
])
def test_advise_errors_are_one_line_with_exit_code_2(exported, tmp_path, edit, args, message):
    _, _, tables, _ = exported
    copy = _copy(tables["fixed_band"], tmp_path)
    if edit == "tamper":
        with open(copy / "band.csv", "a") as handle:
            handle.write("1,1,0,0,0,0\n")
    if edit == "missing":
        (copy / "table.json").unlink()
    done = runner.invoke(app, ["advise", str(copy), *args])
    assert done.exit_code == 2
    assert done.stderr.count("\n") == 1 and message in done.stderr and done.stdout == ""


def test_advise_imports_neither_scikit_learn_nor_pandas_matplotlib_gymnasium(exported):
    _, _, tables, _ = exported
    script = (
        "import sys\nfrom rehedge.cli import main\n"
        f"sys.argv = ['rehedge', 'advise', {str(tables['fixed_band'].path)!r}, '--spot', '100', "
        "'--days-left', '3', '--holding', '0.5', '--json']\n"
        "try:\n    main()\nexcept SystemExit as exit:\n    assert exit.code in (0, None), exit.code\n"
        "heavy = ('sklearn', 'pandas', 'matplotlib', 'gymnasium', 'scipy', 'joblib', 'hedge_env')\n"
        "print(sorted({m.split('.')[0] for m in sys.modules} & set(heavy)))\n"
    )
    done = subprocess.run([sys.executable, "-c", script], capture_output=True, text=True, cwd=ROOT)
    assert done.returncode == 0, done.stderr
    assert done.stdout.strip().splitlines()[-1] == "[]"


from tests.scenarios import TABLE as CONFIG


def test_export_grid_settings_are_validated_with_their_key():
    data = tomllib.loads(CONFIG)
    data["export"]["holding_points"] = 1
    with pytest.raises(ConfigError, match=r"^export.holding_points: must be >= 2, got 1$"):
        parse_config(data)


def rehedge(*args: str) -> subprocess.CompletedProcess:
    return subprocess.run([sys.executable, "-c", "from rehedge.cli import main; main()", *args],
                          capture_output=True, text=True, cwd=ROOT)


def test_run_writes_the_table_of_export_policy_and_evaluate_scores_tables_beside_the_run(tmp_path):
    config = tmp_path / "c.toml"
    config.write_text(CONFIG)
    done = rehedge("run", str(config), "--runs-dir", str(tmp_path / "runs"), "--json", "--quiet")
    assert done.returncode == 0, done.stderr
    run_dir = Path(json.loads(done.stdout)["run"])
    table = HedgeTable.load(run_dir / "tables" / "whalley_wilmott")
    meta = table.meta
    assert meta["units"]["currency"] == "EUR" and meta["config"]["name"] == "table-test"
    assert meta["book"]["notional_shares"] == 100.0
    manifest = json.loads((run_dir / "manifest.json").read_text())
    assert meta["config"]["hash"] == manifest["config_hash"]
    assert meta["policy"]["parameters"]["risk_aversion"] == manifest["tuned"]["whalley_wilmott"]["risk_aversion"]

    out = tmp_path / "delta-table"
    done = runner.invoke(app, ["export", str(run_dir), "--policy", "delta", "--out", str(out)])
    assert done.exit_code == 0, done.stderr
    done = runner.invoke(app, ["evaluate", str(run_dir), "--table", str(out), "--table", str(table.path),
                               "--json", "--quiet"])
    assert done.exit_code == 0, done.stderr
    scored = {p["name"]: p for p in json.loads(done.stdout)["policies"]}
    assert scored["delta.table"]["kind"] == "table"
    for name in ("delta", "whalley_wilmott"):  # a coarse 61 x 21 grid, still within 1% here
        assert scored[f"{name}.table"]["objective"] == pytest.approx(scored[name]["objective"], rel=0.01)
    done = runner.invoke(app, ["quote", str(run_dir), "--table", str(out), "--json", "--quiet"])
    assert done.exit_code == 0, done.stderr
    quoted = {q["name"]: q for q in json.loads(done.stdout)["quotes"]}
    # The table's bid and ask are its source's within the same 1% (the opposite book uses the mirrored table).
    for side in ("quote_bid", "quote_ask"):
        assert quoted["delta.table"][side] == pytest.approx(quoted["delta"][side], rel=0.01)

    done = runner.invoke(app, ["export", str(run_dir), "--policy", "nope"])
    assert done.exit_code == 2 and done.stderr.strip().startswith("error: unknown policy 'nope'; policies: ")


@pytest.fixture(scope="module")
def mapped(tmp_path_factory):
    """The Whalley-Wilmott band of the small reference case, exported with its training range."""
    from rehedge.tables.export import training_range

    problem = reference_like()
    market = GBMMarket(spot=100.0, drift=0.0, volatility=0.2)
    policy = WhalleyWilmottBand(problem, risk_aversion=5.0)
    seen = training_range(policy, problem, market, None, seed=1)
    folder = export_table(policy, problem, tmp_path_factory.mktemp("mapped") / "ww", kind="whalley_wilmott",
                          training_range=seen)
    return problem, market, HedgeTable.load(folder)


def test_advise_off_the_training_map_says_so_and_exits_4(mapped):
    # A table asked about a state far from its training paths gave confident trades with exit 0 (the
    # issue's: spot 64 with 29 of 30 days left and 1,500 shares held, a sell of 1,990 where delta said
    # +13). Now each decision time's range on the policy's own training rollout is in the sidecar.
    problem, market, table = mapped
    seen = table.meta["training_range"]
    assert len(seen["days_left"]) == problem.schedule.steps and seen["days_left"][0] == 10.0
    assert seen["moneyness"][0][0] < 1.0 < seen["moneyness"][0][1]
    path = str(table.path)
    far = runner.invoke(app, ["advise", path, "--spot", "128", "--days-left", "9", "--holding", "1.5"])
    assert far.exit_code == 4, far.output
    assert "OFF THE MAP: moneyness 1.28 is outside what the policy met on its training paths" in far.stdout
    assert "OFF THE MAP: holding_shares 1.5 is outside" in far.stdout
    assert far.stderr.count("\n") == 1 and far.stderr.startswith("error: off the map")
    as_json = runner.invoke(app, ["advise", path, "--spot", "128", "--days-left", "9", "--holding", "1.5", "--json"])
    assert as_json.exit_code == 4 and len(json.loads(as_json.stdout)["off_map"]) == 2
    near = runner.invoke(app, ["advise", path, "--spot", "100.5", "--days-left", "9", "--holding", "0.5"])
    assert near.exit_code == 0 and "OFF THE MAP" not in near.stdout, near.output
    # The share of held-out decisions off the map: about none on paths like the training ones, all on
    # paths that start far from them.
    from rehedge.tables.export import off_map_share

    assert off_map_share(table, problem, market, 500, seed=9) < 0.01
    assert off_map_share(table, problem, replace(market, spot=140.0), 500, seed=9) > 0.5


def test_a_table_without_a_training_range_says_so_and_a_malformed_one_is_refused(exported, mapped, tmp_path):
    _, _, tables, _ = exported
    done = runner.invoke(app, ["advise", str(tables["fixed_band"].path), "--spot", "100", "--days-left", "4",
                               "--holding", "0"])
    assert done.exit_code == 0 and "records no training range" in done.stdout
    copy = _copy(mapped[2], tmp_path)
    meta = json.loads((copy / "table.json").read_text())
    meta["training_range"]["holding_shares"][3] = [1.0, -1.0]
    meta["sidecar_sha256"] = sidecar_digest(meta)
    (copy / "table.json").write_text(json.dumps(meta))
    refused = runner.invoke(app, ["advise", str(copy), "--spot", "100", "--days-left", "4", "--holding", "0"])
    assert refused.exit_code == 2 and "training_range.holding_shares must hold one [low, high] pair" in refused.stderr


def test_advice_rounds_the_trade_to_lots_and_shows_the_delta_hedge_and_the_trade_cost(tmp_path):
    # A trader executes whole lots: the trade is rounded to frictions.lot_size (the sidecar's
    # book.lot_shares), with the Black-Scholes delta hedge beside the target and the trade's cost.
    problem = replace(reference_like(), book=Book((OptionLeg("call", 100.0, 10.0, -30.0, 100.0),)),
                      frictions=Frictions(cost_rate=0.002, fixed_cost=5.0, impact_coefficient=0.1, adv_shares=1e5))
    folder = export_table(WhalleyWilmottBand(problem, risk_aversion=0.01), problem, tmp_path / "lots", lot_shares=100.0)
    done = runner.invoke(app, ["advise", str(folder), "--spot", "101", "--days-left", "6", "--holding", "0", "--json"])
    assert done.exit_code == 0, done.output
    out = json.loads(done.stdout)
    assert out["lot_shares"] == 100.0 and out["trade_shares"] % 100.0 == 0.0 and out["trade_shares"] != 0.0
    assert abs(out["trade_shares"] - (out["target_shares"] - 0.0)) <= 50.0
    _, delta = problem.book.value_and_delta(101.0, problem.schedule.horizon_days - 6.0, problem.marks)
    assert out["delta_hedge_shares"] == pytest.approx(-float(delta), rel=1e-12)
    trade, frictions = out["trade_shares"], problem.frictions
    expected = frictions.trading_cost(abs(trade), 101.0) + frictions.impact_cost(abs(trade), 101.0)
    assert out["trade_cost"] == pytest.approx(expected, rel=1e-12)
    text = runner.invoke(app, ["advise", str(folder), "--spot", "101", "--days-left", "6", "--holding", "0"])
    assert "lots of 100" in text.stdout and "delta hedge" in text.stdout and "its cost" in text.stdout


def test_the_readers_cost_and_delta_are_the_steps_over_random_draws():
    # The reader computes them without hedge_env (a live process loads numpy alone): the same formulas
    # as hedge_env.frictions.Frictions and hedge_env's Black-Scholes book delta, over random inputs.
    from rehedge.tables.reader import black_scholes_hedge, trade_cost

    rng = np.random.default_rng(8)
    for _ in range(200):
        frictions = Frictions(cost_rate=rng.uniform(0, 0.01), fixed_cost=rng.uniform(0, 10),
                              impact_coefficient=rng.uniform(0, 1), impact_exponent=rng.uniform(0, 1),
                              permanent_impact=rng.uniform(0, 0.5), adv_shares=rng.uniform(1e3, 1e6))
        trade, spot = rng.normal(0, 5000), rng.uniform(10, 200)
        factor = frictions.impact_factor(trade, math.exp)
        expected = (frictions.trading_cost(abs(trade), spot) + frictions.impact_cost(abs(trade), spot)
                    + frictions.permanent_impact_cost(trade, spot, factor))
        sidecar = {f: getattr(frictions, f) for f in ("cost_rate", "fixed_cost", "impact_coefficient",
                                                      "impact_exponent", "permanent_impact", "adv_shares")}
        assert trade_cost(sidecar, trade, spot) == pytest.approx(expected, rel=1e-9)
        legs = (OptionLeg(str(rng.choice(["call", "put"])), rng.uniform(50, 150), rng.uniform(1, 60),
                          rng.normal(0, 10), 100.0),)
        marks = MarkParameters(rng.uniform(0.05, 0.8), rng.uniform(0, 0.05), rng.uniform(0, 0.03))
        days_left = rng.uniform(0.5, 60)
        meta = {"marks": {"volatility": marks.volatility, "rate": marks.rate, "dividend_yield": marks.dividend_yield,
                          "days_per_year": marks.days_per_year},
                "schedule": {"horizon_days": 60.0},
                "book": {"legs": [{"kind": l.kind, "strike": l.strike, "expiry_days": l.expiry_days,
                                   "quantity": l.quantity, "multiplier": l.multiplier} for l in legs]}}
        _, delta = Book(legs).value_and_delta(spot, 60.0 - days_left, marks)
        assert black_scholes_hedge(meta, spot, days_left) == pytest.approx(-float(delta), rel=1e-9, abs=1e-9)
