"""Run folders: write one (staged under ``NAME.partial``, renamed when complete) and read it back.

A run folder ``runs/NAME-TIMESTAMP/`` holds the config as given
(``config.toml``) and resolved (``config.json``), ``manifest.json``
(package version, seeds, config hash, timings, data sizes, tuned values),
one ``agents/NAME.joblib`` per fitted agent and ``training.log``; the runner
adds the held-out metrics, the hedge table and the report before the rename.
"""

from __future__ import annotations

import errno
import itertools
import json
import platform
import shutil
from dataclasses import dataclass, replace
from datetime import datetime, timezone
from pathlib import Path

import joblib
import numpy as np
import sklearn

import hedge_env
from rehedge.build import build_baseline, build_markets, build_problem, describe_markets
from rehedge.config import config_hash, parse_config
from rehedge.errors import RunFolderError
from rehedge.training import Scenario, Training


def _timestamp() -> str:
    return datetime.now(timezone.utc).strftime("%Y%m%dT%H%M%SZ")


PARTIAL = ".partial"
LAST = "last"  # the newest finished run folder under the runs folder, wherever a run folder is asked for


def resolve_run(path: str | Path, runs_dir: str | Path = "runs") -> Path:
    """``last``: the newest finished run folder under ``runs_dir`` (by its manifest's creation time,
    then its name); any other path as given."""
    path = Path(path)
    if str(path) != LAST or path.exists():
        return path
    runs_dir = Path(runs_dir)
    found = []
    for folder in runs_dir.iterdir() if runs_dir.is_dir() else ():
        manifest = folder / "manifest.json"
        if folder.name.endswith(PARTIAL) or not manifest.is_file():
            continue
        try:
            created = json.loads(manifest.read_text()).get("created", "")
        except (OSError, ValueError):
            continue
        found.append((str(created), folder.name, folder))
    if not found:
        raise RunFolderError(f"last: no finished run folder under {runs_dir}")
    return max(found)[2]


def save_scores(evaluation, run_dir: Path) -> list[str]:
    """Write an evaluation's metrics.csv, metrics.json and heldout.npz into a finished run folder:
    staged in a hidden folder inside it, then each moved into place (a reader sees the old files or
    the new ones, never half of one). Returns the names written."""
    from rehedge.compare import write_metrics

    staging = run_dir / f".scores{PARTIAL}"
    shutil.rmtree(staging, ignore_errors=True)
    staging.mkdir()
    try:
        write_metrics(evaluation, staging)
        names = sorted(f.name for f in staging.iterdir())
        for name in names:
            (staging / name).replace(run_dir / name)
    finally:
        shutil.rmtree(staging, ignore_errors=True)
    return names


def write_run(training: Training, config_text: str, runs_dir: Path, extra: dict | None = None,
              finish: bool = True) -> Path:
    """Write a run folder; it is built under the name ``NAME-TIMESTAMP.partial`` and renamed when
    complete, so nothing half-written looks like a run. With ``finish=False`` the staging folder is
    returned for more files (held-out metrics, report); :func:`finish_run` then renames it."""
    config = training.config
    staging = _reserve(Path(runs_dir), f"{config.name}-{_timestamp()}")
    try:
        (staging / "agents").mkdir()
        (staging / "config.toml").write_text(config_text)
        (staging / "config.json").write_text(json.dumps(config.model_dump(), indent=2, default=str) + "\n")
        for name, agent in training.agents.items():
            joblib.dump(agent, staging / "agents" / f"{name}.joblib")
        manifest = {
            "package": "rehedge",
            "version": hedge_env.__version__,
            "python": platform.python_version(),
            "numpy": np.__version__,
            "scikit_learn": sklearn.__version__,
            "created": datetime.now(timezone.utc).isoformat(timespec="seconds"),
            "config_name": config.name,
            "config_hash": config_hash(config),
            "seeds": {"seed": config.seed, "train_seed": config.data.train_seed,
                      "heldout_seed": config.data.heldout_seed},
            "timings_s": {k: round(v, 4) for k, v in training.timings.items()},
            "sizes": training.sizes,
            "tuned": {name: {r.parameter: r.value, "train_objective": r.objective}
                      for name, r in training.tuning.items()},
            "agents": {spec.name: spec.kind for spec in config.agents},
            "grid_convergence": training.grid_convergence,
            **_history_facts(training),
            **(extra or {}),
        }
        (staging / "manifest.json").write_text(json.dumps(manifest, indent=2) + "\n")
        (staging / "training.log").write_text("\n".join(training.log) + "\n")
    except BaseException:  # nothing half-written stays behind, whatever stopped it
        shutil.rmtree(staging, ignore_errors=True)
        raise
    return finish_run(staging) if finish else staging


def _names(stem: str):
    """``stem``, then ``stem-2``, ``stem-3``, ...: the names a run may take (two runs in one second)."""
    yield stem
    for n in itertools.count(2):
        yield f"{stem}-{n}"


def _reserve(runs_dir: Path, stem: str) -> Path:
    """Create and return an empty staging folder ``NAME.partial`` whose ``NAME`` no other run holds,
    staged or finished. The mkdir itself is the reservation (it fails if another process made the
    folder first), so two runs starting at once never share one."""
    runs_dir.mkdir(parents=True, exist_ok=True)
    for name in _names(stem):
        if (runs_dir / name).exists():
            continue
        staging = runs_dir / (name + PARTIAL)
        try:
            staging.mkdir()
        except FileExistsError:
            continue
        return staging


def finish_run(staging: Path) -> Path:
    """Rename a complete staging folder ``NAME.partial`` to ``NAME`` (``NAME-2``, ... if a run that
    started in the same second finished first under ``NAME``); returns the final path. A rename never
    replaces a folder that holds anything."""
    for name in _names(staging.name.removesuffix(PARTIAL)):
        final = staging.with_name(name)
        if final.exists():
            continue
        try:
            staging.rename(final)
        except OSError as error:
            if error.errno not in (errno.EEXIST, errno.ENOTEMPTY):
                raise
            continue
        return final


def _history_facts(training: Training) -> dict:
    """For a historical market: the CSV, its sha256 and the training and held-out date ranges."""
    heldout = training.heldout_market or training.market
    markets = describe_markets(training.market, heldout)
    if not markets:
        return {}
    history = heldout.history
    return {"history": {"csv": history.source, "csv_sha256": history.sha256, **markets}}


@dataclass(kw_only=True)
class Run(Scenario):
    """A run folder read back: its folder and manifest, and the scenario (config, problem, markets,
    policies: baselines rebuilt with their tuned values)."""

    path: Path
    manifest: dict


def load_run(path: str | Path, partial_ok: bool = False) -> Run:
    """Read a run folder written by :func:`write_run`. A missing folder, one whose history CSV changed and
    an unfinished ``.partial`` one (unless ``partial_ok``: the run writing it reads it back) are
    RunFolderErrors; a broken config in it is a ConfigError."""
    path = Path(path)
    if path.name.endswith(PARTIAL) and not partial_ok:
        raise RunFolderError(f"{path}: an incomplete run folder (its run was interrupted); run it again")
    manifest_file = path / "manifest.json"
    if not manifest_file.is_file():
        raise RunFolderError(f"{path}: not a run folder (no manifest.json)")
    manifest = json.loads(manifest_file.read_text())
    config = parse_config(json.loads((path / "config.json").read_text()), source=str(path / "config.json"))
    problem = build_problem(config)
    market, heldout_market = build_markets(config)
    recorded = manifest.get("history", {}).get("csv_sha256")
    if recorded and recorded != heldout_market.history.sha256:
        raise RunFolderError(f"market.csv: {config.market.csv} changed since the run was written "
                          "(sha256 differs from the manifest's); its held-out windows would not be the run's")
    baselines = {}
    for spec in config.baselines:
        policy = build_baseline(spec, problem)
        # Tuned values come from the manifest: a run is read back, never re-tuned.
        tuned = manifest.get("tuned", {}).get(spec.name)
        if tuned:
            parameter = next(k for k in tuned if k != "train_objective")
            policy = replace(policy, **{parameter: tuned[parameter]})
        baselines[spec.name] = policy
    agents = {spec.name: joblib.load(path / "agents" / f"{spec.name}.joblib") for spec in config.agents}
    return Run(path=path, config=config, manifest=manifest, problem=problem, market=market, agents=agents,
               baselines=baselines, heldout_market=heldout_market)
