"""A scored run folder read back for the report: the run, its metrics and its held-out arrays."""

from __future__ import annotations

import json
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from agents.registry import AGENTS, BASELINES
from rehedge.errors import RunFolderError
from rehedge.run_folder import Run, load_run


@dataclass
class Scored:
    """A run folder with its held-out results."""

    run: Run
    metrics: dict
    heldout: dict[str, np.ndarray]

    @property
    def records(self) -> list[dict]:
        return self.metrics["policies"]


def policy_label(name: str, kind: str = "") -> str:
    """A policy's name as a reader sees it: the kind's readable label ("Whalley-Wilmott band") when the
    config kept the kind as the name, else the name with that label in brackets."""
    cls = {**BASELINES, **AGENTS}.get(kind)
    if cls is None:
        return name
    return cls.label if name == kind else f"{name} ({cls.label})"


def read_metrics(run_dir: Path) -> dict:
    path = run_dir / "metrics.json"
    if not path.is_file():
        raise RunFolderError(f"{run_dir}: no held-out scores (metrics.json) to report; a folder of `rehedge train` "
                             f"is scored by `rehedge evaluate {run_dir} --save`")
    return json.loads(path.read_text())


def load_scored(run_dir: Path, staging: bool = False) -> Scored:
    run_dir = Path(run_dir)
    run = load_run(run_dir, partial_ok=staging)
    metrics = read_metrics(run_dir)
    heldout_file = run_dir / "heldout.npz"
    if not heldout_file.is_file():
        raise RunFolderError(f"{run_dir}: no heldout.npz (a run folder is scored by `rehedge run`)")
    with np.load(heldout_file) as data:
        heldout = {key: data[key] for key in data.files}
    return Scored(run, metrics, heldout)


def read_sibling(path: Path) -> tuple[Path, dict, dict]:
    path = Path(path)
    config_file = path / "config.json"
    if not config_file.is_file():
        raise RunFolderError(f"{path}: not a run folder (no config.json)")
    return path, read_metrics(path), json.loads(config_file.read_text())


def recorded_siblings(run_dir: Path) -> list[Path]:
    """The scored sibling runs that a sweep variant's ``sweep.json`` names (none without one)."""
    sweep = Path(run_dir) / "sweep.json"
    if not sweep.is_file():
        return []
    siblings = [Path(run_dir).parent / name for name in json.loads(sweep.read_text())["siblings"]]
    return [d for d in siblings if (d / "metrics.json").is_file()]
