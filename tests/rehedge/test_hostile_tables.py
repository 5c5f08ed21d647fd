"""Hedge tables edited into wrong advice, files that are not files, and exports onto folders that are
not tables: each is refused in one line, and nothing is lost."""

from __future__ import annotations

import hashlib
import json
import os
import shutil
import threading
from pathlib import Path

import numpy as np
import pytest
from typer.testing import CliRunner

from agents.baselines import DeltaHedge, FixedBand
from hedge_env.book import Book, MarkParameters, OptionLeg
from hedge_env.frictions import Frictions
from hedge_env.objective import Objective
from hedge_env.problem import HedgingProblem, Schedule
from rehedge.cli import app
from rehedge.tables.export import TableGrid, export_table
from rehedge.tables.reader import HedgeTable, TableError, sidecar_digest

runner = CliRunner()


def _problem(quantity: float = -100.0) -> HedgingProblem:
    return HedgingProblem(
        book=Book((OptionLeg("call", 100.0, 10.0, quantity),)), marks=MarkParameters(volatility=0.2),
        frictions=Frictions(cost_rate=0.005), objective=Objective(risk_aversion=0.01),
        schedule=Schedule(steps=10, step_days=1.0), reference_spot=100.0)


@pytest.fixture(scope="module")
def table(tmp_path_factory) -> Path:
    problem = _problem()
    return export_table(FixedBand(problem, half_width=0.05), problem, tmp_path_factory.mktemp("t") / "band",
                        grid=TableGrid(moneyness_points=21, holding_points=11))


def _copy(table: Path, tmp_path: Path) -> Path:
    copy = tmp_path / "copy"
    shutil.copytree(table, copy)
    return copy


def _edit_sidecar(folder: Path, edit, rehash: bool = False) -> None:
    meta = json.loads((folder / "table.json").read_text())
    edit(meta)
    if rehash:
        meta["sidecar_sha256"] = sidecar_digest(meta)
    (folder / "table.json").write_text(json.dumps(meta))


def _set(section: str, key: str, value):
    def edit(meta):
        meta[section][key] = value
    return edit


def _advise(folder: Path):
    return runner.invoke(app, ["advise", str(folder), "--spot", "101", "--days-left", "4", "--holding", "20",
                               "--json"])


@pytest.mark.parametrize("section, key, value", [
    ("book", "reference_spot", 101.0), ("book", "notional_shares", 200.0), ("marks", "days_per_year", 360.0)])
def test_an_edited_sidecar_number_is_refused_by_the_sidecars_own_checksum(table, tmp_path, section, key, value):
    copy = _copy(table, tmp_path)
    _edit_sidecar(copy, _set(section, key, value))
    done = _advise(copy)
    assert done.exit_code == 2 and done.stdout == ""
    assert done.stderr.count("\n") == 1 and "does not match its sidecar_sha256" in done.stderr


@pytest.mark.parametrize("value", ["NaN", "Infinity", "-Infinity"])
def test_nan_and_infinity_in_the_sidecar_are_refused(table, tmp_path, value):
    copy = _copy(table, tmp_path)
    text = (copy / "table.json").read_text().replace('"reference_spot": 100.0', f'"reference_spot": {value}')
    assert value in text
    (copy / "table.json").write_text(text)
    with pytest.raises(TableError, match=f"not valid JSON .*{value} is not a number"):
        HedgeTable.load(copy)


@pytest.mark.parametrize("literal", ["1e400", "-1e400", "1" + "0" * 400])
def test_numbers_beyond_a_double_in_the_sidecar_are_refused(table, tmp_path, literal):
    copy = _copy(table, tmp_path)
    text = (copy / "table.json").read_text().replace('"reference_spot": 100.0', f'"reference_spot": {literal}')
    (copy / "table.json").write_text(text)
    with pytest.raises(TableError, match="not valid JSON"):
        HedgeTable.load(copy)


@pytest.mark.parametrize("value", [0.0, -100.0, "100", None])
def test_the_books_scale_numbers_must_be_finite_and_positive_even_when_the_checksum_is_recomputed(
        table, tmp_path, value):
    copy = _copy(table, tmp_path)
    _edit_sidecar(copy, _set("book", "reference_spot", value), rehash=True)
    with pytest.raises(TableError, match=r"book.reference_spot must be a finite number > 0"):
        HedgeTable.load(copy)


def _rewrite_csv(folder: Path, name: str, change) -> None:
    """Change a CSV and recompute every checksum: an edit that keeps the table self-consistent."""
    lines = (folder / name).read_text().splitlines()
    lines = change(lines)
    data = ("\n".join(lines) + "\n").encode()
    (folder / name).write_bytes(data)
    key = "targets" if name == "targets.csv" else "band"

    def edit(meta):
        meta["files"][key]["sha256"] = hashlib.sha256(data).hexdigest()
    _edit_sidecar(folder, edit, rehash=True)


def _band_row(lines, row, lower, upper):
    cells = lines[row].split(",")
    cells[2], cells[3] = lower, upper
    lines[row] = ",".join(cells)
    return lines


@pytest.mark.parametrize("lower, upper, rule", [
    ("60", "40", "row 6: band_lower_shares must be <= band_upper_shares"),
    ("-inf", "40", "band edges must be finite numbers"),
    ("NaN", "40", "must be NaN together"),
])
def test_band_invariants_are_refused_even_with_every_checksum_recomputed(table, tmp_path, lower, upper, rule):
    copy = _copy(table, tmp_path)
    _rewrite_csv(copy, "band.csv", lambda lines: _band_row(lines, 5, lower, upper))
    with pytest.raises(TableError, match=rule):
        HedgeTable.load(copy)


@pytest.mark.parametrize("nodes, rule", [([1.0, 1.0], "increasing"), ([], "increasing"), ([1.0, "x"], "finite numbers|increasing|malformed")])
def test_a_malformed_grid_is_refused_even_with_the_checksum_recomputed(table, tmp_path, nodes, rule):
    copy = _copy(table, tmp_path)
    _edit_sidecar(copy, lambda meta: meta["grid"].__setitem__("moneyness", nodes), rehash=True)
    with pytest.raises(TableError, match=rule):
        HedgeTable.load(copy)


def test_a_table_is_scored_only_on_a_problem_of_its_own_notional(table, tmp_path):
    # the legs match, the sidecar's notional (which scales every observation) was edited and rehashed
    copy = _copy(table, tmp_path)
    _edit_sidecar(copy, _set("book", "notional_shares", 200.0), rehash=True)
    with pytest.raises(TableError, match=r"another notional \(200.0\) than this problem's \(100.0\)"):
        HedgeTable.load(copy).check_problem(_problem())


def test_a_table_file_that_is_a_device_is_refused_without_reading_it(table, tmp_path):
    copy = _copy(table, tmp_path)
    (copy / "targets.csv").unlink()
    (copy / "targets.csv").symlink_to("/dev/zero")
    with pytest.raises(TableError, match="not a regular file"):
        HedgeTable.load(copy)
    (copy / "table.json").unlink()
    (copy / "table.json").symlink_to("/dev/zero")
    with pytest.raises(TableError, match="not a regular file"):
        HedgeTable.load(copy)


def test_a_fifo_sidecar_is_refused_without_blocking(table, tmp_path):
    copy = _copy(table, tmp_path)
    (copy / "table.json").unlink()
    os.mkfifo(copy / "table.json")
    outcome = {}

    def advise():
        outcome["done"] = _advise(copy)
    worker = threading.Thread(target=advise, daemon=True)
    worker.start()
    worker.join(60)  # the refusal needs no writer; a read of the FIFO would block until one came
    if worker.is_alive():  # unblock the reader so the test ends, then fail
        with open(copy / "table.json", "w"):
            pass
        worker.join(10)
        pytest.fail("advise blocked on a FIFO")
    done = outcome["done"]
    assert done.exit_code == 2 and "not a regular file" in done.stderr


def test_export_onto_a_folder_that_is_not_a_table_refuses_and_keeps_it(tmp_path):
    problem = _problem()
    precious = tmp_path / "run"
    (precious / "agents").mkdir(parents=True)
    (precious / "manifest.json").write_text("{}")
    small = TableGrid(moneyness_points=11, holding_points=5)
    with pytest.raises(TableError, match="exists and is not a hedge table"):
        export_table(DeltaHedge(problem), problem, precious, grid=small)
    assert sorted(p.name for p in precious.iterdir()) == ["agents", "manifest.json"]
    file = tmp_path / "notes.txt"
    file.write_text("keep")
    with pytest.raises(TableError, match="exists and is not a hedge table"):
        export_table(DeltaHedge(problem), problem, file, grid=small)
    assert file.read_text() == "keep"
    assert sorted(p.name for p in tmp_path.iterdir()) == ["notes.txt", "run"]  # no staging folder left


def test_cli_export_onto_its_own_run_folder_refuses_and_keeps_the_run(tmp_path):
    from tests.scenarios import small_gbm

    config = tmp_path / "c.toml"
    config.write_text(small_gbm("keep-run", 3, 5, train=200, heldout=200, chunk=200,
                                baselines=({"kind": "delta"},)))
    done = runner.invoke(app, ["train", str(config), "--runs-dir", str(tmp_path / "runs"), "--quiet"])
    assert done.exit_code == 0, done.stderr
    run_dir = next((tmp_path / "runs").iterdir())
    before = sorted(p.name for p in run_dir.iterdir())
    done = runner.invoke(app, ["export", str(run_dir), "--policy", "delta", "--out", str(run_dir)])
    assert done.exit_code == 2 and done.stderr.count("\n") == 1
    assert "exists and is not a hedge table" in done.stderr
    assert sorted(p.name for p in run_dir.iterdir()) == before
    assert sorted(p.name for p in (tmp_path / "runs").iterdir()) == [run_dir.name]


def test_export_replaces_an_older_table_and_a_failed_replacement_keeps_it(tmp_path):
    problem = _problem()
    small = TableGrid(moneyness_points=11, holding_points=5)
    folder = export_table(DeltaHedge(problem), problem, tmp_path / "t", grid=small)

    class Broken:
        name = "broken"

        def act(self, obs):
            return np.full(len(obs), np.nan)

    with pytest.raises(TableError, match="non-finite"):
        export_table(Broken(), problem, folder, grid=small)
    assert HedgeTable.load(folder).meta["policy"]["name"] == "delta"
    export_table(FixedBand(problem, half_width=0.1), problem, folder, grid=small)
    assert HedgeTable.load(folder).meta["policy"]["name"] == "fixed_band"
    assert sorted(p.name for p in tmp_path.iterdir()) == ["t"]
