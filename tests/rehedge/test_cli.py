"""The command line: evaluate, train, run, check-config; run folders; one-line errors."""

from __future__ import annotations

import json
import subprocess
import sys
import tomllib
from pathlib import Path

import joblib
import numpy as np
import pytest
import tomli_w

from rehedge.run_folder import load_run

ROOT = Path(__file__).resolve().parents[2]

from tests.scenarios import SMALL


def rehedge(*args: str, cwd: Path | None = None) -> subprocess.CompletedProcess:
    return subprocess.run([sys.executable, "-c", "from rehedge.cli import main; main()", *args],
                          capture_output=True, text=True, cwd=cwd or ROOT)


@pytest.fixture(scope="module")
def small_run(tmp_path_factory):
    folder = tmp_path_factory.mktemp("cli")
    config = folder / "small.toml"
    config.write_text(SMALL)
    done = rehedge("run", str(config), "--runs-dir", str(folder / "runs"), "--json", "--quiet")
    assert done.returncode == 0, done.stderr
    return folder, config, json.loads(done.stdout)


def test_run_prints_every_policy_with_the_promised_json_fields(small_run):
    _, _, out = small_run
    names = {p["name"] for p in out["policies"]}
    assert names == {"delta", "fixed_band", "linear", "fitted_q", "grid_dp"}
    for policy in out["policies"]:
        for key in ("name", "kind", "objective", "mean_pnl", "std_pnl", "cvar_95", "mean_cost", "turnover"):
            assert key in policy
        assert set(policy["vs_reference"]) >= {"mean", "ci_low", "ci_high"}
    objectives = [p["objective"] for p in out["policies"]]
    assert objectives == sorted(objectives, reverse=True)  # ranked by objective
    delta = next(p for p in out["policies"] if p["name"] == "delta")
    assert delta["vs_reference"]["mean"] == 0.0 and delta["vs_reference"]["ci_low"] == 0.0


def test_run_folder_holds_config_manifest_agents_log_and_metrics(small_run):
    _, _, out = small_run
    run_dir = Path(out["run"])
    for name in ("config.toml", "config.json", "manifest.json", "training.log", "metrics.csv", "metrics.json"):
        assert (run_dir / name).is_file(), name
    manifest = json.loads((run_dir / "manifest.json").read_text())
    assert manifest["seeds"]["train_seed"] != manifest["seeds"]["heldout_seed"]
    assert len(manifest["config_hash"]) == 64
    assert set(manifest["agents"]) == {"linear", "fitted_q", "grid_dp"}
    assert "fixed_band" in manifest["tuned"]
    metrics = json.loads((run_dir / "metrics.json").read_text())
    assert [p["objective"] for p in metrics["policies"]] == [p["objective"] for p in out["policies"]]


def test_a_run_read_back_scores_the_same_numbers(small_run):
    _, _, out = small_run
    again = rehedge("evaluate", out["run"], "--json", "--quiet")
    assert again.returncode == 0, again.stderr
    first = {p["name"]: p["objective"] for p in out["policies"]}
    second = {p["name"]: p["objective"] for p in json.loads(again.stdout)["policies"]}
    assert second == first  # same held-out seed, same policies (agents loaded, tuned values from the manifest)


def test_saved_agents_load_and_act_identically(small_run):
    _, _, out = small_run
    run = load_run(out["run"])
    obs = np.column_stack([np.linspace(0.9, 1.1, 7), np.full(7, 5 / 365), np.linspace(0.2, 0.8, 7)])
    for name, agent in run.agents.items():
        reloaded = joblib.load(Path(out["run"]) / "agents" / f"{name}.joblib")
        assert np.array_equal(agent.act(obs), reloaded.act(obs))


def test_same_config_same_seed_gives_the_same_metrics_file_at_any_thread_count(small_run):
    # The first run used the default of one native thread; two threads (tree fitting, BLAS) must not
    # change a byte of the numbers.
    folder, config, out = small_run
    again = rehedge("run", str(config), "--runs-dir", str(folder / "runs2"), "--json", "--quiet", "--threads", "2")
    assert again.returncode == 0, again.stderr
    assert json.loads(again.stdout)["policies"] == out["policies"]
    (first,), (second,) = (list((folder / name).iterdir()) for name in ("runs", "runs2"))
    assert (first / "metrics.json").read_bytes() == (second / "metrics.json").read_bytes()


def test_bad_config_is_one_line_with_key_and_rule_and_exit_code_2(tmp_path):
    bad = tmp_path / "bad.toml"
    bad.write_text(SMALL.replace("strike = 100.0", "strike = -5.0"))
    done = rehedge("run", str(bad), "--runs-dir", str(tmp_path / "runs"))
    assert done.returncode == 2
    assert done.stderr.strip() == "error: book.options[0].strike: must be >= 0.0001, got -5.0"
    assert not (tmp_path / "runs").exists()  # nothing half-written


@pytest.mark.parametrize("command", ["check-config", "train"])
def test_unknown_regressor_parameter_names_the_key_when_the_config_is_loaded(tmp_path, command):
    bad = tmp_path / "bad.toml"
    bad.write_text(SMALL.replace("max_iter = 10", "max_iters = 10"))
    extra = ["--runs-dir", str(tmp_path / "runs"), "--quiet"] if command == "train" else []
    done = rehedge(command, str(bad), *extra)
    assert done.returncode == 2
    assert done.stderr.strip() == ("error: agents[1].regressor_params: unknown parameter 'max_iters' for "
                                   "hist_gradient_boosting (did you mean 'max_iter'?)")


@pytest.mark.parametrize("args, message", [
    (("evaluate",), "error: Missing argument 'source'."),
    (("evaluate", "configs/demo.toml", "--paths", "0"), "error: Invalid value for '--paths'"),
    (("frobnicate",), "error: No such command 'frobnicate'."),
])
def test_usage_errors_are_one_line_with_exit_code_2(args, message):
    done = rehedge(*args)
    assert done.returncode == 2
    assert done.stderr.count("\n") == 1 and done.stderr.startswith(message)


@pytest.mark.parametrize("fault, what", [(RuntimeError("boom\nsecond line"), "internal error (RuntimeError: boom second line)"),
                                          (MemoryError(), "ran out of memory (MemoryError: )")])
def test_a_fault_in_rehedge_is_one_line_naming_its_crash_log_with_exit_code_3(tmp_path, monkeypatch, capsys, fault,
                                                                              what):
    import rehedge.config
    from rehedge.cli import INTERNAL_ERROR, main
    from rehedge.crash import CRASH_DIR_ENVIRONMENT

    def broken(*args, **kwargs):
        raise fault
    monkeypatch.setattr(rehedge.config, "load_config", broken)
    monkeypatch.setenv(CRASH_DIR_ENVIRONMENT, str(tmp_path / "crashes"))
    monkeypatch.setattr(sys, "argv", ["rehedge", "check-config", "configs/demo.toml"])
    with pytest.raises(SystemExit) as caught:
        main()
    assert caught.value.code == INTERNAL_ERROR == 3
    stderr = capsys.readouterr().err
    assert stderr.count("\n") == 1 and "Traceback" not in stderr
    assert stderr.startswith(f"error: {what}; this is a fault in rehedge")
    (log,) = (tmp_path / "crashes").glob("crash-*.log")
    assert str(log) in stderr
    text = log.read_text()
    assert "command: rehedge check-config configs/demo.toml" in text
    assert "Traceback (most recent call last)" in text and "in broken" in text


def test_check_config_accepts_the_shipped_configs():
    for config in ("configs/demo.toml", "configs/reference-gbm.toml"):
        done = rehedge("check-config", config)
        assert done.returncode == 0, done.stderr
        assert ": ok:" in done.stdout


def test_evaluate_json_on_the_demo_has_every_baseline():
    done = rehedge("evaluate", "configs/demo.toml", "--paths", "2000", "--json", "--quiet")
    assert done.returncode == 0, done.stderr
    out = json.loads(done.stdout)
    assert {p["name"] for p in out["policies"]} == {"no_hedge", "delta", "leland", "whalley_wilmott", "fixed_band"}
    assert out["caution"].startswith("Decision support, not advice")


def test_rehedge_alone_prints_the_help_and_exits_0():
    done = rehedge()
    assert done.returncode == 0 and done.stderr == ""
    assert done.stdout.startswith("Usage: rehedge [OPTIONS] COMMAND [ARGS]...")
    assert "error" not in done.stdout


def test_version_prints_the_installed_version():
    from importlib.metadata import version

    done = rehedge("--version")
    assert done.returncode == 0 and done.stdout.strip() == f"rehedge {version('rehedge')}"


@pytest.mark.parametrize("command", ["check-config", "evaluate", "train", "run", "quote", "report", "export",
                                     "advise", "sweep", "bench"])
def test_help_shows_brackets_as_written_and_no_python_type_tags(command):
    done = rehedge(command, "--help")
    assert done.returncode == 0
    assert "<bool>" not in done.stdout and "list[" not in done.stdout
    if command == "sweep":
        assert "[sweep]" in done.stdout


def test_every_progress_bar_of_a_run_counts_its_work_and_ends_full(tmp_path):
    # The tuning bar used to be opened with a total of 1 and never advance; writing the metrics, the
    # table and the report showed nothing.
    from rehedge.config import parse_config
    from rehedge.runner import run_config

    bars = {}

    def start(label, total):
        bars[label] = [total, 0]

        def advance(n):
            bars[label][1] += n
        return advance

    run_config(parse_config(tomllib.loads(SMALL)), SMALL, tmp_path, start=start)
    assert bars["tuning baselines on training paths (trials)"][0] > 1
    assert "writing metrics, report" in bars
    assert all(done == total for total, done in bars.values()), bars


@pytest.mark.parametrize("width", [60, 80, 100])
@pytest.mark.parametrize("wide", [False, True])
def test_the_ranked_table_never_cuts_a_number_or_a_name_at_any_width(monkeypatch, width, wide):
    from rich.console import Console

    from rehedge import cli
    from rehedge.formats import metric_columns

    record = {"name": "whalley_wilmott", "kind": "whalley_wilmott", "objective": -43605.2, "mean_pnl": -525.9,
              "std_pnl": 6624.0, "var_95": 11000.0, "cvar_95": 13240.0, "var_99": 12000.0, "cvar_99": 13240.5,
              "entropic_risk": 2.5e4, "mean_cost": 379.0, "mean_impact": 147.0, "turnover": 0.96, "trades": 24.19,
              "quote_bid": -38317.0, "quote_ask": 48515.0, "spread_bid_vol_points": 376.1,
              "spread_ask_vol_points": 12.5}
    records = [record, {**record, "name": "a_much_longer_policy_name", "kind": "linear", "objective": -1.25}]
    console = Console(width=width, record=True, file=open("/dev/null", "w"))
    monkeypatch.setattr(cli, "console", console)
    cli._print_table("title", records, wide=wide)
    text = console.export_text()
    assert "…" not in text
    for r in records:
        assert (r["name"] if r["kind"] == r["name"] else f"{r['name']} ({r['kind']})") in text
        for column in metric_columns(r):
            if wide or column.on_terminal:
                assert column.formatter([q[column.key] for q in records])(r[column.key]) in text, column.key
    assert max(len(line) for line in text.splitlines()) <= width


def test_quote_screen_gives_units_the_books_vega_what_bid_and_ask_mean_and_no_quote_without_a_hedge(tmp_path):
    from tests.scenarios import DELTA, small_gbm

    config = tmp_path / "quote.toml"
    config.write_text(small_gbm("quote-test", 3, 10, train=300, heldout=600, chunk=300,
                                baselines=({"kind": "no_hedge"}, DELTA)))
    done = rehedge("quote", str(config), "--quiet")
    assert done.returncode == 0, done.stderr
    text = " ".join(done.stdout.split())
    assert "premiums in currency units for the whole book" in text and "per volatility point" in text
    assert "ask: the premium to receive for selling this book as configured" in text  # a short call
    (row,) = [line for line in done.stdout.splitlines() if line.strip().startswith("no_hedge")]
    assert row.split()[1:] == ["*", "-", "-", "-", "-", "-"]
    assert "not hedging: its premiums price the whole unhedged risk" in text


def test_an_exponential_run_ranks_by_certainty_equivalent_and_quotes_indifference_prices(tmp_path):
    # objective.kind = "exponential": every policy's objective is -1/gamma log mean exp(-gamma P&L) of
    # its own held-out P&L (recomputed here from heldout.npz), the paired differences are differences
    # of certainty equivalents, and with no rate the indifference ask is the mark minus the certainty
    # equivalent (cash invariance of the certainty equivalent, common practice, no source).
    from hedge_env.objective import certainty_equivalent
    from tests.scenarios import DELTA, small_gbm

    config = tmp_path / "exponential.toml"
    config.write_text(small_gbm(
        "exponential-test", 3, 8, train=600, heldout=1500, chunk=500, cost_rate=0.005,
        baselines=(DELTA, {"kind": "whalley_wilmott", "risk_aversion": 1.0}),
        agents=({"kind": "linear"}, {"kind": "grid_dp", "spot_points": 41, "holding_points": 51}),
        objective={"kind": "exponential", "risk_aversion": 1.0}, report={"bootstrap_samples": 200}))
    done = rehedge("run", str(config), "--runs-dir", str(tmp_path / "runs"), "--json", "--quiet")
    assert done.returncode == 0, done.stderr
    records = json.loads(done.stdout)["policies"]
    run_dir = next((tmp_path / "runs").iterdir())
    heldout = np.load(run_dir / "heldout.npz")
    objectives = {r["name"]: r["objective"] for r in records}
    for name, value in objectives.items():
        assert value == pytest.approx(certainty_equivalent(heldout[f"pnl__{name}"], 1.0), rel=1e-12)
    assert [r["objective"] for r in records] == sorted(objectives.values(), reverse=True)
    for r in records:
        assert r["vs_reference"]["mean"] == pytest.approx(r["objective"] - objectives["delta"], abs=1e-12)
        assert r["quote_ask"] == pytest.approx(r["mark"] - r["objective"], rel=1e-12)
    html = (run_dir / "report.html").read_text()
    assert "certainty equivalent of the total P&amp;L under exponential utility" in html
    assert "utility-indifference premiums" in html
    quoted = rehedge("quote", str(config), "--quiet")
    assert quoted.returncode == 0, quoted.stderr
    assert "exponential utility (a utility-indifference price)" in " ".join(quoted.stdout.split())


def test_a_model_out_of_the_floating_point_range_ends_a_run_in_one_line_exit_2_and_writes_nothing(tmp_path):
    config = tomllib.loads((ROOT / "configs" / "merton.toml").read_text())
    config["market"].update(jump_intensity=100.0, jump_mean=2.0, jump_std=2.0)
    config["book"]["options"][0]["expiry_days"] = 3650
    config["schedule"].update(step_days=1.0, steps=3650)
    config["data"].update(train_paths=50, heldout_paths=50)
    path = tmp_path / "wild.toml"
    path.write_text(tomli_w.dumps(config))
    done = rehedge("run", str(path), "--runs-dir", str(tmp_path / "runs"), "--quiet")
    assert done.returncode == 2, done.stderr
    lines = done.stderr.strip().splitlines()
    assert len(lines) == 1 and lines[0].startswith("error: market: ") and "market.jump_mean" in lines[0], done.stderr
    assert not (tmp_path / "runs").exists() or not any((tmp_path / "runs").iterdir())


def test_marks_that_cannot_meet_their_accuracy_are_an_input_error():
    # A model whose marks cannot be computed to their tolerance (hedge_env.model_pricing) is a fact
    # of the config's market keys: one line and exit 2, like a path out of the floating-point range.
    from hedge_env.model_pricing import MarkAccuracyError
    from rehedge.cli import _input_range_error

    assert _input_range_error(MarkAccuracyError("Heston marks ...: vol_of_vol 2"))
    assert not _input_range_error(ValueError("a defect"))


def test_the_tour_from_train_to_report_through_evaluate_save_and_last(tmp_path):
    # `train` then `report` named no way forward; `evaluate RUN` saved nothing; a run folder had to be
    # typed out; a missing folder printed a blank line first; `export` printed its message twice.
    config = tmp_path / "tiny.toml"
    config.write_text(SMALL.replace("train_paths = 600", "train_paths = 300"))
    trained = rehedge("train", str(config), "--runs-dir", "runs", "--quiet", cwd=tmp_path)
    assert trained.returncode == 0, trained.stderr
    run_dir = next((tmp_path / "runs").iterdir())
    early = rehedge("report", "last", cwd=tmp_path)
    assert early.returncode == 2 and early.stderr.count("\n") == 1
    assert f"rehedge evaluate {Path('runs') / run_dir.name} --save" in early.stderr, early.stderr
    missing = rehedge("evaluate", "runs/nope", "--quiet", cwd=tmp_path)
    assert missing.returncode == 2 and missing.stderr == "error: runs/nope: no such config file or run folder\n"
    refused = rehedge("evaluate", str(config), "--save", "--quiet", cwd=tmp_path)  # saved into a run folder only
    assert refused.returncode == 2 and refused.stderr.startswith("error: --save: ")
    saved = rehedge("evaluate", "last", "--save", "--paths", "400", "--json", "--quiet", cwd=tmp_path)
    assert saved.returncode == 0, saved.stderr
    assert {f.name for f in run_dir.iterdir()} >= {"metrics.json", "metrics.csv", "heldout.npz"}
    assert not any(f.name.startswith(".") for f in run_dir.iterdir())
    recorded = json.loads((run_dir / "metrics.json").read_text())["policies"]
    assert [p["objective"] for p in recorded] == [p["objective"] for p in json.loads(saved.stdout)["policies"]]
    reported = rehedge("report", "last", cwd=tmp_path)
    assert reported.returncode == 0 and (run_dir / "report.html").is_file(), reported.stderr
    exported = rehedge("export", "last", "--policy", "linear", "--check-paths", "400", cwd=tmp_path)
    assert exported.returncode == 0, exported.stderr
    assert exported.stdout.count("hedge table") == 1, exported
    # The table beside its source and the baselines, paired on held-out paths; a warning if a baseline wins.
    assert "the table on 400 held-out paths" in exported.stdout
    assert "(its source)" in exported.stdout and "(baseline)" in exported.stdout
    assert exported.stderr == "" or exported.stderr.startswith("warning: "), exported.stderr


def screen_at(monkeypatch, width: int, draw) -> str:
    """What ``draw()`` prints on a console ``width`` columns wide."""
    from rich.console import Console

    from rehedge import cli

    console = Console(width=width, record=True, file=open("/dev/null", "w"))
    monkeypatch.setattr(cli, "console", console)
    draw()
    return console.export_text()


@pytest.mark.parametrize("width", [60, 80, 100])
def test_the_quote_table_never_cuts_a_number_at_any_width(monkeypatch, width):
    # At 80 columns the quote table cut bid and ask to `3,...` and `6,...`.
    from rehedge import cli
    from rehedge.formats import format_count, money_formatter

    row = {"name": "whalley_wilmott", "kind": "whalley_wilmott", "quote_bid": 3390.4, "quote_ask": 6140.2,
           "spread_bid_vol_points": 9.1, "spread_ask_vol_points": 12.15, "cvar_bid": 2149.0, "cvar_ask": 7487.3}
    rows = [row, {**row, "name": "a_much_longer_policy_name", "quote_bid": -1234567.0}, {**row, "name": "no_hedge",
                                                                                         "kind": "no_hedge"}]
    text = screen_at(monkeypatch, width, lambda: cli._print_quote_table(rows))
    assert "…" not in text and max(len(line) for line in text.splitlines()) <= width
    for r in rows[:2]:
        assert r["name"] in text
        for key in ("quote_bid", "quote_ask", "cvar_bid", "cvar_ask"):
            assert money_formatter([q[key] for q in rows[:2]])(r[key]) in text, key
        assert f"{format_count(r['spread_bid_vol_points'])} / {format_count(r['spread_ask_vol_points'])}" in text
    assert "no_hedge *" in text


def test_a_run_reports_its_grid_optimums_convergence(small_run):
    # Grid convergence is a per-config fact (6e-5 on configs/heston.toml, 7.4e-3 on a 10-day strike-105
    # case): a run records its grid optimum's value at the start beside the value on a grid of half the
    # points per axis, in the manifest and the report.
    _, _, out = small_run
    run_dir = Path(out["run"])
    grid = json.loads((run_dir / "manifest.json").read_text())["grid_convergence"]["grid_dp"]
    assert grid["grid"] == {"holding_points": 41, "spot_points": 41}
    assert grid["coarser_grid"] == {"holding_points": 21, "spot_points": 21}
    assert grid["difference"] == pytest.approx(grid["value"] - grid["coarser_value"], abs=1e-12)
    assert "grid optimum grid_dp: convergence" in (run_dir / "report.html").read_text()


def test_a_money_column_has_one_number_of_decimals():
    # The reference case mixed -0.19, -0.194 and 0.2 in one column.
    from rehedge.formats import money_formatter

    assert [money_formatter([-0.19, -0.194, 0.2])(v) for v in (-0.19, -0.194, 0.2)] == ["-0.190", "-0.194", "0.200"]
    assert [money_formatter([5.5, 12.25])(v) for v in (5.5, 12.25)] == ["5.50", "12.25"]
    assert [money_formatter([1368.4, -0.2, None])(v) for v in (1368.4, -0.2, None)] == ["1,368", "-0", "n/a"]
