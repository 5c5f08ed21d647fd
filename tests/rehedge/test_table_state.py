"""Hedge tables with a fourth axis: policies that read the Heston variance or price at an observed
implied volatility, exported, read back, scored against their source and used by ``advise``."""

from __future__ import annotations

import json
import tomllib
from pathlib import Path

import numpy as np
import pytest
from typer.testing import CliRunner

from hedge_env.rollout import rollout
from rehedge.build import path_count
from rehedge.cli import app
from rehedge.config import parse_config
from rehedge.tables.export import export_policy
from rehedge.tables.reader import HedgeTable, TableError, band_columns, target_columns
from rehedge.training import train

CONFIGS = Path(__file__).resolve().parents[2] / "configs"


def _trained(name: str, baselines: tuple[str, ...]):
    """A shipped config with its first (not blind) linear agent and the named baselines, trained."""
    data = tomllib.loads((CONFIGS / name).read_text())
    data.pop("sweep", None)
    data["baselines"] = [b for b in data["baselines"] if b["kind"] in baselines]
    data["agents"] = [next(a for a in data["agents"] if a["kind"] == "linear" and not a.get("blind"))]
    data["report"]["reference_policy"] = baselines[0]
    config = parse_config(data, base_dir=CONFIGS)
    return config, train(config)


@pytest.fixture(scope="module")
def heston(tmp_path_factory):
    config, training = _trained("heston.toml", ("minimum_variance_delta",))
    folder = tmp_path_factory.mktemp("heston-tables")
    tables = {name: HedgeTable.load(export_policy(config, training.problem, training.policies, name, folder / name,
                                                  training.market))
              for name in ("linear", "minimum_variance_delta")}
    return config, training, tables


def _objectives(training, policies, source, n_paths, seed):
    return [float(rollout(training.problem, policy, source, n_paths, seed).reward.mean()) for policy in policies]


@pytest.mark.parametrize("name", ["linear", "minimum_variance_delta"])
def test_a_policy_that_reads_the_heston_variance_round_trips_through_a_table_with_a_variance_axis(heston, name):
    # configs/heston.toml (variance observed): on 20,000 held-out paths the table's objective is within
    # 1% of its source's (the target for a table with a volatility axis).
    config, training, tables = heston
    table = tables[name]
    assert table.state == "variance" and table.meta["state_axis"]["name"] == "variance"
    assert table.targets.shape == (30, 101, 13, 41)
    source, copy = _objectives(training, (training.policies[name], table), training.heldout_market or
                               training.market, 20_000, config.data.heldout_seed)
    assert abs(copy - source) <= 0.01 * abs(source), (source, copy)


def test_a_variance_table_has_the_documented_columns_and_returns_its_nodes(heston):
    _, _, tables = heston
    table = tables["minimum_variance_delta"]
    lines = (table.path / "targets.csv").read_text().splitlines()
    header = "days_left,moneyness,variance,holding_shares,target_shares"
    assert lines[0] == ",".join(target_columns("variance")) == header
    band = (table.path / "band.csv").read_text().splitlines()
    assert band[0] == ",".join(band_columns("variance"))
    # Row (((i * M + j) * V + l) * H + k) is node (days i, moneyness j, variance l, holding k).
    i, j, l, k = 4, 50, 6, 20
    m, v, h = table.moneyness.size, table.state_nodes.size, table.holding_shares.size
    row = lines[1 + ((i * m + j) * v + l) * h + k].split(",")
    assert [float(x) for x in row[:4]] == [table.days_left[i], table.moneyness[j], table.state_nodes[l],
                                           table.holding_shares[k]]
    # The minimum-variance delta trades to its hedge from everywhere: at a node the table gives the CSV target.
    decision = table.decide(table.moneyness[j] * table.reference_spot, table.days_left[i], table.holding_shares[k],
                            table.state_nodes[l])
    assert float(decision.target_shares) == pytest.approx(float(row[4]), rel=1e-6)
    assert np.all(np.diff(np.sqrt(table.state_nodes)) == pytest.approx(np.diff(np.sqrt(table.state_nodes))[0],
                                                                        rel=1e-4))  # even in volatility
    with pytest.raises(TableError, match="this table has a variance axis: give the variance"):
        table.decide(60.0, 10.0, 0.0)


def test_a_policy_at_observed_implied_vols_round_trips_through_a_table_with_an_implied_vol_axis(tmp_path):
    # configs/historical.toml (marks at each date's implied volatility): every policy reads it. On the
    # 20,000 bootstrap paths of the training years the table's objective is within 1% of its source's.
    # (The 48 held-out windows are too few to tell: their per-path differences scatter by about 130.)
    config, training = _trained("historical.toml", ("delta",))
    source = training.market
    n = path_count(source, 20_000)
    for name in ("linear", "delta"):
        table = HedgeTable.load(export_policy(config, training.problem, training.policies, name, tmp_path / name,
                                              source))
        assert table.state == "implied_vol"
        low, high = table.domain["implied_vol"]
        assert 0 < low < 0.15 and 0.3 < high < 1.0
        original, copy = _objectives(training, (training.policies[name], table), source, n, config.data.train_seed)
        assert abs(copy - original) <= 0.01 * abs(original), (name, original, copy)


runner = CliRunner()


def test_advise_takes_the_variance_a_table_needs_and_refuses_in_one_line_without_it(heston, tmp_path):
    _, _, tables = heston
    path = str(tables["linear"].path)
    point = ["--spot", "62", "--days-left", "12", "--holding", "-1000"]  # inside the training range
    done = runner.invoke(app, ["advise", path, *point, "--variance", "0.05", "--json"])
    assert done.exit_code == 0, done.stderr
    record = json.loads(done.stdout)
    expected = tables["linear"].decide(62.0, 12.0, -1000.0, 0.05)
    assert record["variance"] == 0.05 and record["target_shares"] == float(expected.target_shares)
    text = runner.invoke(app, ["advise", path, *point, "--variance", "0.05"])
    assert text.exit_code == 0 and "variance 0.05" in text.stdout
    far = runner.invoke(app, ["advise", path, *point, "--variance", "2.0"])
    assert far.exit_code == 4 and "CLAMPED: variance 2 is outside the table's domain" in far.stdout
    assert "OFF THE MAP: variance 2 is outside what the policy met on its training paths" in far.stdout
    for args, message in (
        ([], "error: --variance is required: this table's targets depend on the variance\n"),
        (["--implied-vol", "0.2"], "error: --implied-vol: this table has no implied_vol axis (it reads the variance: "
                                   "give --variance)\n"),
        (["--variance", "nan"], "error: variance must be a finite number\n"),
    ):
        refused = runner.invoke(app, ["advise", path, *point, *args])
        assert refused.exit_code == 2 and refused.stderr == message and refused.stdout == ""
