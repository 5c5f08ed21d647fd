"""Sweeps: every cell a run folder, the same numbers serially, with joblib and on dask; failed cells
reported without stopping the others; resume; the combined table and the frontier."""

from __future__ import annotations

import json
import shutil
from pathlib import Path

import pandas as pd
import pytest
from typer.testing import CliRunner

import rehedge.runner
from rehedge.cli import app
from rehedge.errors import ConfigError
from rehedge.sweep import run_sweep, sweep_cells
from tests.scenarios import sweep_scenario

SWEEP = sweep_scenario()

POLICIES = 3


@pytest.fixture(scope="module")
def config_file(tmp_path_factory) -> Path:
    path = tmp_path_factory.mktemp("sweep") / "tiny.toml"
    path.write_text(SWEEP)
    return path


@pytest.fixture(scope="module")
def serial(config_file, tmp_path_factory):
    return run_sweep(config_file, sweep_dir=tmp_path_factory.mktemp("serial"), report=False)


def cell_metrics(folder: Path) -> dict[str, bytes]:
    """Each cell's metrics.json, by cell name, as bytes (the same numbers must be the same file)."""
    return {cell.name: (cell / "metrics.json").read_bytes() for cell in sorted((folder / "cells").iterdir())}


def test_every_combination_of_the_grid_is_one_cell_with_its_overrides_and_own_seed(config_file):
    _, cells = sweep_cells(config_file)
    assert [c.overrides for c in cells] == [
        {"frictions.cost_rate": 0.001, "seed": 1}, {"frictions.cost_rate": 0.001, "seed": 2},
        {"frictions.cost_rate": 0.004, "seed": 1}, {"frictions.cost_rate": 0.004, "seed": 2}]
    for cell in cells:
        assert cell.config.frictions.cost_rate == cell.overrides["frictions.cost_rate"]
        assert cell.config.seed == cell.overrides["seed"]
        # Data seeds derive from the cell's seed (rehedge.config: 2 * seed + 1 and + 2).
        assert (cell.config.data.train_seed, cell.config.data.heldout_seed) == (2 * cell.config.seed + 1,
                                                                                2 * cell.config.seed + 2)


def test_sweep_writes_a_run_folder_per_cell_the_combined_table_and_the_frontier(serial):
    folder = serial.folder
    assert set(serial.status.values()) == {"ok"}
    assert sorted(p.name for p in (folder / "cells").iterdir()) == sorted(c.name for c in serial.cells)
    for cell in serial.cells:
        run = folder / "cells" / cell.name
        for name in ("metrics.json", "metrics.csv", "heldout.npz", "manifest.json", "cell.json", "agents/linear.joblib"):
            assert (run / name).is_file(), name
        assert json.loads((run / "cell.json").read_text())["overrides"] == cell.overrides
    assert (folder / "frontier.png").read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
    assert not (folder / "failures.json").exists()
    table = pd.read_csv(folder / "sweep.csv")
    assert len(table) == len(serial.cells) * POLICIES
    rows = json.loads((folder / "sweep.json").read_text())["rows"]
    assert len(rows) == len(table)
    # Each row carries the cell's overrides and the very numbers of the cell's metrics.json.
    metrics = {name: json.loads(text) for name, text in cell_metrics(folder).items()}
    for row in rows:
        record = next(r for r in metrics[row["cell"]]["policies"] if r["name"] == row["policy"])
        cell = next(c for c in serial.cells if c.name == row["cell"])
        assert row["frictions.cost_rate"] == cell.overrides["frictions.cost_rate"] and row["seed"] == cell.overrides["seed"]
        for key in ("objective", "std_pnl", "cvar_95", "mean_cost", "quote_ask"):
            assert row[key] == record[key], key
        assert row["vs_reference_ci_low"] == record["vs_reference"]["ci_low"]


def test_results_are_identical_serially_with_joblib_and_on_a_dask_cluster(config_file, serial, tmp_path,
                                                                         dask_scheduler):
    expected = cell_metrics(serial.folder)
    local = run_sweep(config_file, sweep_dir=tmp_path / "joblib", workers=2, report=False)
    cluster = run_sweep(config_file, sweep_dir=tmp_path / "dask", scheduler=dask_scheduler, report=False)
    for result in (local, cluster):
        assert set(result.status.values()) == {"ok"}
        assert cell_metrics(result.folder) == expected  # every number, exactly
        pd.testing.assert_frame_equal(result.table, serial.table)


def test_a_failed_cell_is_reported_and_the_others_finish(config_file, tmp_path, monkeypatch):
    real_train = rehedge.runner.train

    def train(config, *args, **kwargs):
        if config.seed == 2 and config.frictions.cost_rate == 0.004:
            raise FloatingPointError("invented failure of one cell")
        return real_train(config, *args, **kwargs)

    monkeypatch.setattr(rehedge.runner, "train", train)
    result = run_sweep(config_file, sweep_dir=tmp_path / "sweep", report=False)
    failed = "tiny-sweep-costrate0.004-seed2"
    assert result.failed == [failed]
    assert [s for n, s in result.status.items() if n != failed] == ["ok"] * 3
    failures = json.loads((result.folder / "failures.json").read_text())
    assert [f["cell"] for f in failures] == [failed]
    assert failures[0]["error"] == "FloatingPointError: invented failure of one cell"
    assert not (result.folder / "cells" / failed).exists()
    row = result.table[result.table["cell"] == failed]
    assert len(row) == 1 and row["status"].item() == "failed" and "invented failure" in row["error"].item()
    assert (result.table["status"] == "ok").sum() == 3 * POLICIES

    # Resume runs only the failed cell; the finished ones are kept as they were.
    monkeypatch.setattr(rehedge.runner, "train", real_train)
    kept = {name: (result.folder / "cells" / name / "metrics.json").stat().st_mtime_ns
            for name in result.status if name != failed}
    resumed = run_sweep(config_file, sweep_dir=tmp_path / "sweep", resume=True, report=False)
    assert resumed.status[failed] == "ok" and resumed.failed == []
    assert [s for n, s in resumed.status.items() if n != failed] == ["resumed"] * 3
    assert {n: (resumed.folder / "cells" / n / "metrics.json").stat().st_mtime_ns for n in kept} == kept
    assert not (resumed.folder / "failures.json").exists()
    assert len(resumed.table) == 4 * POLICIES


def test_resume_reruns_a_cell_whose_folder_is_incomplete_and_a_fresh_run_refuses_a_used_folder(
        config_file, serial, tmp_path):
    folder = tmp_path / "copy"
    shutil.copytree(serial.folder, folder)
    broken = folder / "cells" / serial.cells[1].name
    (broken / "metrics.json").unlink()  # as if the cell had stopped before its last file
    with pytest.raises(ConfigError, match="already holds a sweep"):
        run_sweep(config_file, sweep_dir=folder, report=False)
    resumed = run_sweep(config_file, sweep_dir=folder, resume=True, report=False)
    assert resumed.status[serial.cells[1].name] == "ok"
    assert sum(s == "resumed" for s in resumed.status.values()) == 3
    assert cell_metrics(folder) == cell_metrics(serial.folder)


def test_resume_with_another_held_out_path_count_reruns_every_cell(config_file, serial, tmp_path):
    """A cell scored on 300 held-out paths is not a cell of a sweep asked for 200: no table mixes them."""
    folder = tmp_path / "copy"
    shutil.copytree(serial.folder, folder)
    asked = serial.cells[0].config.data.heldout_paths
    same = run_sweep(config_file, sweep_dir=folder, resume=True, heldout_paths=asked, report=False)
    assert set(same.status.values()) == {"resumed"}
    other = run_sweep(config_file, sweep_dir=folder, resume=True, heldout_paths=asked // 2, report=False)
    assert set(other.status.values()) == {"ok"}
    for cell in serial.cells:
        record = json.loads((folder / "cells" / cell.name / "cell.json").read_text())
        assert record["heldout_paths_asked"] == asked // 2


def test_a_sweep_refuses_a_folder_that_is_not_a_sweep_and_leaves_it_as_it_was(config_file, tmp_path):
    run = tmp_path / "demo-20261204T000000Z"
    run.mkdir()
    (run / "config.toml").write_text("name = 'mine'\n")
    (run / "manifest.json").write_text("{}")
    for resume in (False, True):
        with pytest.raises(ConfigError, match="exists and is not a sweep folder"):
            run_sweep(config_file, sweep_dir=run, resume=resume, report=False)
    assert (run / "config.toml").read_text() == "name = 'mine'\n" and sorted(p.name for p in run.iterdir()) == [
        "config.toml", "manifest.json"]
    (tmp_path / "file").write_text("x")
    with pytest.raises(ConfigError, match="exists and is not a sweep folder"):
        run_sweep(config_file, sweep_dir=tmp_path / "file", report=False)


def test_sweep_command_prints_the_combined_table_as_json_and_writes_each_cell_report(tmp_path):
    config = tmp_path / "two.toml"
    config.write_text(sweep_scenario(seeds=False))  # two cells
    runner = CliRunner()
    out = runner.invoke(app, ["sweep", str(config), "--sweep-dir", str(tmp_path / "s"), "--quiet", "--json",
                              "--paths", "500"])
    assert out.exit_code == 0, out.output
    payload = json.loads(out.stdout)
    assert payload["sweep"]["cells"] == 2 and len(payload["rows"]) == 2 * POLICIES
    assert {row["paths"] for row in payload["rows"]} == {500}
    for name in ("tiny-sweep-costrate0.001", "tiny-sweep-costrate0.004"):
        assert (tmp_path / "s" / "cells" / name / "report.html").is_file()
    # A sweep folder in use is not overwritten: one line, exit code 2.
    again = runner.invoke(app, ["sweep", str(config), "--sweep-dir", str(tmp_path / "s"), "--quiet"])
    assert again.exit_code == 2 and "already holds a sweep" in again.output


@pytest.mark.parametrize("width", [60, 80, 100])
def test_the_sweep_table_never_cuts_a_number_at_any_width(serial, monkeypatch, width):
    # At 80 columns the sweep table cut `6,5...` and `13,2...`.
    from tests.rehedge.test_cli import screen_at

    from rehedge import cli
    from rehedge.formats import money_formatter

    text = screen_at(monkeypatch, width, lambda: cli._print_sweep(serial))
    assert "…" not in text
    table_lines = [line for line in text.splitlines() if not line.startswith(("sweep ", "cost-risk", "combined", "Decision"))]
    assert max(len(line) for line in table_lines) <= width
    records = serial.table.to_dict("records")
    for key in ("objective", "std_pnl", "cvar_95", "mean_cost"):
        shown = money_formatter([row[key] for row in records])
        for row in records:
            assert shown(row[key]) in text, key
