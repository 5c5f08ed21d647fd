"""A run stopped part-way (Ctrl-C, or the process killed) leaves nothing that looks like a run,
and the next run is unaffected; the same config and seed give a byte-identical metrics.json."""

from __future__ import annotations

import json
import os
import signal
import subprocess
import sys
import time
from pathlib import Path

import pytest

from rehedge.runner import PAUSE_ENVIRONMENT
from tests.scenarios import SMALL

ROOT = Path(__file__).resolve().parents[2]


def start_run(config: Path, runs: Path, pause: Path | None = None) -> subprocess.Popen:
    """``rehedge run`` in a process of its own; with ``pause``, it stops before its held-out stage for as
    long as that file exists (rehedge.runner.PAUSE_ENVIRONMENT)."""
    environment = dict(os.environ)
    if pause is not None:
        pause.touch()
        environment[PAUSE_ENVIRONMENT] = str(pause)
    return subprocess.Popen([sys.executable, "-c", "from rehedge.cli import main; main()", "run", str(config),
                             "--runs-dir", str(runs), "--quiet", "--json"],
                            stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True, cwd=ROOT, env=environment)


def wait_until_paused(process: subprocess.Popen, runs: Path, pause: Path, timeout_s: float = 600.0) -> Path:
    """The run's .partial folder once the run has stopped at its pause: training written, held-out
    scoring not begun. The deadline only ends a hung test; nothing here depends on speed."""
    reached = Path(str(pause) + ".reached")
    deadline = time.monotonic() + timeout_s
    while not reached.exists():
        assert process.poll() is None, process.communicate()
        assert time.monotonic() < deadline, "the run never reached its held-out stage"
        time.sleep(0.05)
    (staging,) = [p for p in runs.glob("*.partial") if (p / "manifest.json").is_file()]
    return staging


def complete_runs(runs: Path) -> list[Path]:
    return sorted(p for p in runs.iterdir() if not p.name.endswith(".partial"))


@pytest.fixture
def config(tmp_path) -> Path:
    path = tmp_path / "small.toml"
    path.write_text(SMALL)
    return path


def test_a_killed_run_leaves_only_a_partial_folder_that_nothing_reads_and_the_next_run_completes(config, tmp_path):
    runs = tmp_path / "runs"
    process = start_run(config, runs, tmp_path / "pause")
    staging = wait_until_paused(process, runs, tmp_path / "pause")
    process.send_signal(signal.SIGKILL)
    process.communicate()
    assert complete_runs(runs) == []
    assert staging.exists() and not (staging / "metrics.json").exists()

    refused = subprocess.run([sys.executable, "-c", "from rehedge.cli import main; main()", "evaluate", str(staging),
                              "--quiet"], capture_output=True, text=True, cwd=ROOT)
    assert refused.returncode == 2
    assert refused.stderr.count("\n") == 1 and "incomplete run folder" in refused.stderr

    small = tmp_path / "small.toml"
    small.write_text(SMALL)
    for _ in range(2):
        done = subprocess.run([sys.executable, "-c", "from rehedge.cli import main; main()", "run", str(small),
                               "--runs-dir", str(runs), "--quiet", "--json"], capture_output=True, text=True, cwd=ROOT)
        assert done.returncode == 0, done.stderr
    first, second = complete_runs(runs)
    for name in ("metrics.json", "metrics.csv", "report.html"):
        assert (first / name).is_file() and (second / name).is_file()
    # Same config, same seed: the same file, byte for byte.
    assert (first / "metrics.json").read_bytes() == (second / "metrics.json").read_bytes()


def test_ctrl_c_removes_the_unfinished_folder_and_says_so_in_one_line(config, tmp_path):
    runs = tmp_path / "runs"
    process = start_run(config, runs, tmp_path / "pause")
    wait_until_paused(process, runs, tmp_path / "pause")
    process.send_signal(signal.SIGINT)
    _, stderr = process.communicate(timeout=120)
    assert process.returncode == 130
    assert "Traceback" not in stderr
    assert stderr.strip().splitlines()[-1] == "error: interrupted; no unfinished run folder is kept"
    assert list(runs.iterdir()) == []


def test_a_different_seed_gives_different_metrics(tmp_path):
    objectives = []
    for seed in (3, 4):
        path = tmp_path / f"seed{seed}.toml"
        path.write_text(SMALL.replace("seed = 3", f"seed = {seed}"))
        done = subprocess.run([sys.executable, "-c", "from rehedge.cli import main; main()", "evaluate", str(path),
                               "--quiet", "--json", "--paths", "2000"], capture_output=True, text=True, cwd=ROOT)
        assert done.returncode == 0, done.stderr
        objectives.append({p["name"]: p["objective"] for p in json.loads(done.stdout)["policies"]})
    # The numbers themselves differ (not only the seeds printed beside them), for every policy.
    assert objectives[0].keys() == objectives[1].keys()
    assert all(objectives[0][name] != objectives[1][name] for name in objectives[0])


# ---------------------------------------------------------------------------------------------
# Two runs of one config in the same second: each folder name is taken by one run only
# ---------------------------------------------------------------------------------------------


def test_a_staging_name_is_reserved_by_its_mkdir_even_when_the_check_before_it_lost_the_race(tmp_path, monkeypatch):
    from rehedge.run_folder import _reserve

    runs = tmp_path / "runs"
    (runs / "demo-20261204T000000Z.partial").mkdir(parents=True)  # another run reserved it after our check
    monkeypatch.setattr(Path, "exists", lambda self: False)  # the check saw neither name: the race lost
    staging = _reserve(runs, "demo-20261204T000000Z")
    assert staging.name == "demo-20261204T000000Z-2.partial" and staging.is_dir()


def test_a_finished_run_never_replaces_one_that_finished_first_under_the_same_name(tmp_path, monkeypatch):
    from rehedge.run_folder import finish_run

    first = tmp_path / "demo-20261204T000000Z"
    first.mkdir()
    (first / "metrics.json").write_text("{}")
    second = tmp_path / "demo-20261204T000000Z.partial"
    second.mkdir()
    (second / "metrics.json").write_text('{"second": true}')
    monkeypatch.setattr(Path, "exists", lambda self: False)
    final = finish_run(second)
    assert final.name == "demo-20261204T000000Z-2"
    assert (first / "metrics.json").read_text() == "{}" and json.loads((final / "metrics.json").read_text())
