"""The main job as one library call: train, score on held-out paths, write a complete run folder.

``rehedge run`` and every cell of ``rehedge sweep`` go through :func:`run_config`.
The folder is built as ``NAME-TIMESTAMP.partial`` and renamed only when the
metrics, the hedge table (``export.policy``) and the report are all written;
on any error or interrupt the staging folder is removed, and a process that is
killed outright leaves only a ``.partial`` folder, which nothing reads as a run.
"""

from __future__ import annotations

import json
import os
import shutil
import time
from dataclasses import dataclass
from pathlib import Path

from threadpoolctl import threadpool_limits

from rehedge.build import path_count
from rehedge.compare import Evaluation, evaluate_with_quotes, write_metrics
from rehedge.run_folder import finish_run, write_run
from rehedge.schema import Config
from rehedge.training import ProgressStart, Training, no_progress, train

# Tests that stop a run part-way name a file here: the run then stops before its held-out stage, with
# its training written, until that file is removed (it first writes FILE.reached), so the moment a
# signal arrives is the test's choice, not a guess about how fast the machine is.
PAUSE_ENVIRONMENT = "REHEDGE_PAUSE_BEFORE_HELDOUT"


def _pause_if_asked() -> None:
    pause = os.environ.get(PAUSE_ENVIRONMENT)
    if not pause:
        return
    Path(pause + ".reached").touch()
    while Path(pause).exists():
        time.sleep(0.01)


@dataclass
class RunOutcome:
    """What :func:`run_config` made: the training, the held-out evaluation and the run folder."""

    training: Training
    evaluation: Evaluation
    run_dir: Path
    heldout_paths: int
    heldout_seed: int


def run_config(config: Config, config_text: str, runs_dir: str | Path, heldout_paths: int | None = None,
               start: ProgressStart = no_progress, report: bool = True, extra: dict | None = None,
               threads: int | None = None) -> RunOutcome:
    """Train every agent of ``config``, score all policies on the same held-out paths (paired CIs
    and quotes) and write the run folder under ``runs_dir``.

    Parameters
    ----------
    config : Config
        A validated config (one variant).
    config_text : str
        The config file as given (kept in the folder as ``config.toml``).
    heldout_paths : int, optional
        Held-out paths (default ``data.heldout_paths``; a history's windows cap it).
    start : callable
        Progress hook ``start(label, total) -> advance(n)``.
    report : bool
        Build ``report.html`` (a sweep's cells may skip it).
    extra : dict, optional
        More entries for ``manifest.json``.
    threads : int, optional
        BLAS and OpenMP threads (default ``compute.threads``); the numbers do not depend on it.
    """
    with threadpool_limits(limits=threads or config.compute.threads):
        return _run_config(config, config_text, runs_dir, heldout_paths, start, report, extra)


def _run_config(config, config_text, runs_dir, heldout_paths, start, report, extra) -> RunOutcome:
    from rehedge.report import build_report
    from rehedge.tables.export import export_policy

    training = train(config, start)
    staging = write_run(training, config_text, Path(runs_dir), extra, finish=False)
    try:
        _pause_if_asked()
        market = training.heldout_market or training.market
        n_paths = path_count(market, heldout_paths or config.data.heldout_paths)
        seed = config.data.heldout_seed
        reference = config.report.reference_policy
        evaluation = evaluate_with_quotes(
            training.problem, training.policies, market, n_paths, seed, kinds=training.kinds,
            chunk_paths=config.data.chunk_paths, progress=start("hedging held-out paths (both sides of the book)",
                                                                n_paths),
            reference=reference if reference in training.policies else None,
            bootstrap_samples=config.report.bootstrap_samples)
        parts = ["metrics"] + (["hedge table"] if config.export.policy is not None else []) + (["report"] if report else [])
        advance = start(f"writing {', '.join(parts)}", len(parts))
        write_metrics(evaluation, staging)
        advance(1)
        if config.export.policy is not None:
            name = config.export.policy
            export_policy(config, training.problem, training.policies, name, staging / "tables" / name,
                          training.market)
            advance(1)
        if report:
            build_report(staging, staging=True)
            advance(1)
        run_dir = finish_run(staging)
    except BaseException:
        shutil.rmtree(staging, ignore_errors=True)
        raise
    return RunOutcome(training, evaluation, run_dir, n_paths, seed)


def report_variants(run_dirs: list[Path]) -> None:
    """Reports of a config's sweep variants run one after another (``rehedge run``): each also draws
    the cost-risk frontier across the others, whose folders its ``sweep.json`` names."""
    from rehedge.report import build_report

    for run_dir in run_dirs:
        siblings = [d for d in run_dirs if d != run_dir]
        (run_dir / "sweep.json").write_text(json.dumps({"siblings": [d.name for d in siblings]}, indent=2))
        build_report(run_dir, siblings)
