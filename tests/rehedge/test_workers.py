"""Work spread over workers in bounded memory: training paths drawn per chunk, transitions spilled
to disk, and the linear agent's normal equations summed over chunks held by workers (this process,
joblib processes, a dask cluster) giving the single-process fit."""

from __future__ import annotations

from dataclasses import replace

import numpy as np
import pytest
from threadpoolctl import threadpool_limits

from agents.baselines import DeltaHedge, FixedBand
from agents.dataset import Exploration, Transitions, TransitionStore
from agents.linear import LinearBasisAgent
from hedge_env.env import default_problem
from hedge_env.market import PathSet
from hedge_env.problem import Schedule
from hedge_env.rollout import rollout_many
from rehedge.training import collect_training_chunks
from rehedge.workers import collect_on_workers

PATHS = 800
CHUNK = 200
SEED = 11


@pytest.fixture(scope="module")
def setting():
    problem, market = default_problem()
    problem = replace(problem, schedule=Schedule(steps=10, step_days=1.0))  # 10 rehedges of the 30-day call
    paths = PathSet(market, PATHS, problem.schedule.steps, problem.dt_years, SEED)
    return problem, market, paths


@pytest.fixture(scope="module")
def single_process_fit(setting):
    """The fit as rehedge.training.train does it: chunks collected and streamed in this process."""
    problem, _, paths = setting
    with TransitionStore() as store, threadpool_limits(limits=1):
        for chunk in collect_training_chunks(problem, paths, Exploration(), SEED, CHUNK):
            store.add(chunk)
        return LinearBasisAgent(problem).fit(store)


def relative_difference(a, b) -> float:
    return float(np.abs(np.asarray(a) - np.asarray(b)).max() / np.abs(b).max())


def test_a_path_set_gives_the_rows_of_the_paths_drawn_whole(setting):
    problem, market, paths = setting
    whole = market.generate(PATHS, problem.schedule.steps, problem.dt_years, SEED)
    assert np.array_equal(paths.rows(250, 700).spot, whole.spot[250:700])
    # A rollout over the set draws the same paths chunk by chunk.
    policies = {"delta": DeltaHedge(problem), "band": FixedBand(problem, 0.05)}
    lazy = rollout_many(problem, policies, paths, paths.n_paths, chunk_paths=CHUNK)
    drawn = rollout_many(problem, policies, whole, chunk_paths=CHUNK)
    for name in policies:
        for key in ("pnl", "reward", "trading_cost", "trades", "step_cost"):
            assert np.array_equal(getattr(lazy[name], key), getattr(drawn[name], key)), (name, key)


def test_transitions_spilled_to_disk_give_the_fit_of_transitions_in_memory(setting, single_process_fit):
    problem, _, paths = setting
    store = TransitionStore(memory_bytes=0)  # every chunk to a file
    for chunk in collect_training_chunks(problem, paths, Exploration(), SEED, CHUNK):
        store.add(chunk)
    assert store.spilled == len(store) == PATHS // CHUNK and store.n_states == PATHS
    folder = store._folder
    with threadpool_limits(limits=1):
        agent = LinearBasisAgent(problem).fit(store)
    store.close()
    assert not folder.exists()
    assert np.array_equal(agent.coef_, single_process_fit.coef_)


@pytest.mark.parametrize("where", ["this process", "2 joblib workers", "dask cluster"])
def test_linear_fit_mapped_over_chunks_on_workers_equals_the_single_process_fit(setting, single_process_fit,
                                                                             where, request):
    # Least squares (identity): normal equations add over disjoint rows, so the per-chunk statistics
    # summed before each solve give the single-process fit; summed in the same (chunk) order they are
    # the same numbers, up to floating-point rounding at most.
    problem, _, paths = setting
    options = {"this process": {}, "2 joblib workers": {"workers": 2},
               "dask cluster": {"scheduler": request.getfixturevalue("dask_scheduler")}}[where]
    chunks = collect_on_workers(problem, paths, Exploration(), SEED, CHUNK, **options)
    try:
        agent = LinearBasisAgent(problem).fit_map(chunks)
    finally:
        chunks.close()
    expected = single_process_fit
    assert agent.mean_squared_return_ == pytest.approx(expected.mean_squared_return_, rel=1e-12)
    for k in range(problem.schedule.steps):
        assert agent.statistics_[k].rows == expected.statistics_[k].rows == PATHS * Exploration().actions_per_state
        assert relative_difference(agent.statistics_[k].xtx, expected.statistics_[k].xtx) <= 1e-10, k
        assert relative_difference(agent.coef_[k], expected.coef_[k]) <= 1e-10, k
    rng = np.random.default_rng(0)
    obs = np.column_stack([rng.uniform(0.9, 1.1, 500), rng.integers(1, 11, 500) / 365.0, rng.uniform(-1, 0, 500)])
    assert np.allclose(agent.act(obs), expected.act(obs), rtol=1e-10, atol=1e-12)


def test_transitions_concat_of_the_chunks_holds_every_path_once(setting):
    problem, _, paths = setting
    chunks = list(collect_training_chunks(problem, paths, Exploration(), SEED, CHUNK))
    whole = Transitions.concat(chunks)
    assert whole.n_states == PATHS and [c.n_states for c in chunks] == [CHUNK] * (PATHS // CHUNK)


PARENT_SCRIPT = """
import os, sys, threading
from pathlib import Path
from rehedge.workers import run_each

folder = Path(sys.argv[1])

def hold(index):
    (folder / f"worker-{index}-{os.getpid()}").write_text("")
    threading.Event().wait()  # a cell that runs until something ends it

for _ in run_each(hold, range(2), workers=2):
    pass
"""


def _alive(pid: int) -> bool:
    import os

    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    try:  # a zombie is gone for our purposes (its parent, killed, cannot reap it)
        return "State:\tZ" not in open(f"/proc/{pid}/status").read()
    except OSError:
        return False


def _children(pid: int) -> list[int]:
    """Processes whose parent is ``pid`` (from /proc)."""
    from pathlib import Path

    found = []
    for stat in Path("/proc").glob("[0-9]*/stat"):
        try:
            fields = stat.read_text().rsplit(")", 1)[1].split()
        except OSError:
            continue
        if int(fields[1]) == pid:
            found.append(int(stat.parent.name))
    return found


def test_local_workers_end_when_the_process_that_started_them_is_killed(tmp_path):
    # The moment acted on is controlled: the parent is killed only once both workers have started
    # their task (each writes a file). Then every worker, and every helper the parent started (loky's
    # resource trackers), must be gone; the deadline is only a bound
    # on a busy machine, the watch itself polls every rehedge.workers.PARENT_POLL_SECONDS. Before the
    # watch the two workers (blocked in their task) outlived the parent for good.
    import os
    import signal
    import subprocess
    import sys
    import time

    parent = subprocess.Popen([sys.executable, "-c", PARENT_SCRIPT, str(tmp_path)])
    try:
        deadline = time.monotonic() + 180
        while len(list(tmp_path.glob("worker-*"))) < 2:
            assert parent.poll() is None, "the parent ended before its workers started"
            assert time.monotonic() < deadline, "the workers never started"
            time.sleep(0.05)
        workers = [int(path.name.split("-")[2]) for path in tmp_path.glob("worker-*")]
        assert all(_alive(pid) for pid in workers)
        workers = sorted(set(workers) | set(_children(parent.pid)))
        assert len(workers) >= 3  # two workers and at least one helper
        os.kill(parent.pid, signal.SIGKILL)
        parent.wait()
        deadline = time.monotonic() + 60
        while any(_alive(pid) for pid in workers) and time.monotonic() < deadline:
            time.sleep(0.1)
        assert not any(_alive(pid) for pid in workers), workers
    finally:
        if parent.poll() is None:
            parent.kill()
        for path in tmp_path.glob("worker-*"):
            try:
                os.kill(int(path.name.split("-")[2]), signal.SIGKILL)
            except ProcessLookupError:
                pass
