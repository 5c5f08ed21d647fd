"""A run stopped part-way (Ctrl-C, or the process killed) leaves nothing that looks like a run,
and the next run is unaffected; the same config and seed give a byte-identical metrics.json."""

from __future__ import annotations

import json
import signal
import subprocess
import sys
import time
from pathlib import Path

import pytest

from tests.test_cli import SMALL

ROOT = Path(__file__).resolve().parents[1]


def start_run(config: Path, runs: Path) -> subprocess.Popen:
    return subprocess.Popen([sys.executable, "-c", "from rehedge.cli import main; main()", "run", str(config),
                             "--runs-dir", str(runs), "--quiet", "--json"],
                            stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True, cwd=ROOT)


def wait_for_staging(process: subprocess.Popen, runs: Path, timeout_s: float = 300.0) -> Path:
    """The run's .partial folder, once training is written and held-out scoring has begun."""
    deadline = time.monotonic() + timeout_s
    while time.monotonic() < deadline:
        found = [p for p in runs.glob("*.partial") if (p / "manifest.json").is_file()]
        if found:
            return found[0]
        assert process.poll() is None, process.communicate()
        time.sleep(0.05)
    raise AssertionError("the run never reached its held-out stage")


def complete_runs(runs: Path) -> list[Path]:
    return sorted(p for p in runs.iterdir() if not p.name.endswith(".partial"))


@pytest.fixture
def config(tmp_path) -> Path:
    path = tmp_path / "small.toml"
    # More held-out paths, so the held-out stage lasts long enough to be interrupted in.
    path.write_text(SMALL.replace("heldout_paths = 1500", "heldout_paths = 60000"))
    return path


def test_a_killed_run_leaves_only_a_partial_folder_that_nothing_reads_and_the_next_run_completes(config, tmp_path):
    runs = tmp_path / "runs"
    process = start_run(config, runs)
    staging = wait_for_staging(process, runs)
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
    process = start_run(config, runs)
    wait_for_staging(process, runs)
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
