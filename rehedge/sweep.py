"""Sweeps: one config over a grid of overrides, each cell a run of its own, in parallel.

A config's ``[sweep]`` table maps dotted keys to lists of values
(``"frictions.cost_rate" = [0.0005, 0.002]``, ``seed = [1, 2]``); every
combination is a *cell*: the config with those values, validated like a
config of its own (rehedge.config.load_variants). A cell does what
``rehedge run`` does for one config (tune the baselines, fit the agents,
score every policy on the held-out paths with CIs and quotes, write the
metrics and the report) in a run folder of its own,
``SWEEP_DIR/cells/CELL_NAME/``.

Cells run serially, on local worker processes (joblib) or on a
dask.distributed cluster (rehedge.workers.run_each). A cell's numbers depend
on its config alone: its seeds come from the config (a swept ``seed`` gives
each cell its own; otherwise the cells share paths, which pairs their
comparison), and every cell runs with one BLAS thread, so the results are the
same bit for bit whichever way the cells ran. A worker builds the folder in a
temporary place and sends its files back; they are written under
``CELL_NAME.partial/`` and renamed into place, so a folder named after its
cell is complete (its ``cell.json`` records the config hash it was run with).
``resume`` keeps complete folders of unchanged cells and runs the rest.

A failed cell does not stop the others: its error goes into the combined
table and ``failures.json``. The sweep folder holds ``sweep.csv`` and
``sweep.json`` (one row per cell and policy: the cell's overrides, then the
policy's held-out metrics) and ``frontier.png`` (cost against risk per policy
across the cells; rehedge.report).
"""

from __future__ import annotations

import itertools
import json
import math
import shutil
import tempfile
import time
import traceback
from collections.abc import Callable
from dataclasses import dataclass, field
from datetime import datetime, timezone
from pathlib import Path
from typing import Any

import pandas as pd

from rehedge.config import config_hash, load_config, load_variants
from rehedge.errors import ConfigError
from rehedge.schema import Config
from rehedge.workers import THREADS_PER_TASK, run_each

CELL_FILE = "cell.json"


@dataclass(frozen=True)
class Cell:
    """One combination of the sweep grid: its position, name, overrides and resolved config."""

    index: int
    name: str
    overrides: dict[str, Any]
    config: Config


@dataclass
class CellOutcome:
    """What a worker sends back: the run folder's files (relative path -> bytes) or the error."""

    index: int
    name: str
    status: str  # "ok" or "failed"
    seconds: float
    files: dict[str, bytes] = field(default_factory=dict, repr=False)
    error: str | None = None
    traceback: str | None = None


@dataclass
class SweepResult:
    """A finished sweep: its folder, cells, how each ended, and the combined table."""

    folder: Path
    cells: list[Cell]
    status: dict[str, str]  # cell name -> "ok", "resumed", "failed" or "lost"
    errors: dict[str, str]
    table: pd.DataFrame
    seconds: float

    @property
    def failed(self) -> list[str]:
        return [name for name, status in self.status.items() if status in ("failed", "lost")]


def sweep_cells(config_path: str | Path) -> tuple[Config, list[Cell]]:
    """The base config and every cell of its sweep (one cell when it has none); ConfigError if any
    cell is not a valid config."""
    base = load_config(config_path)
    variants = load_variants(config_path)
    combinations = list(itertools.product(*base.sweep.values())) if base.sweep else [()]
    cells = [Cell(index, config.name, dict(zip(base.sweep, values)), config)
             for index, (values, config) in enumerate(zip(combinations, variants))]
    names = [cell.name for cell in cells]
    if len(set(names)) != len(names):
        duplicate = next(name for name in names if names.count(name) > 1)
        raise ConfigError(f"sweep: two cells share the name {duplicate!r} (swept keys with the same last part?)",
                          source=str(config_path), key="sweep")
    return base, cells


def run_cell(cell: Cell, config_text: str = "", heldout_paths: int | None = None, report: bool = True) -> CellOutcome:
    """Train, score and (with ``report``) report one cell in a temporary folder; return the folder's files.

    Any error is caught and returned: a failed cell is reported, it does not stop a sweep.
    """
    from rehedge.runner import run_config

    clock = time.perf_counter()
    config = cell.config
    try:
        with tempfile.TemporaryDirectory(prefix="rehedge-cell-") as folder:
            run_dir = run_config(config, config_text, Path(folder), heldout_paths, report=report,
                                 extra={"sweep_cell": {"index": cell.index, "overrides": cell.overrides}}).run_dir
            files = {path.relative_to(run_dir).as_posix(): path.read_bytes()
                     for path in sorted(run_dir.rglob("*")) if path.is_file()}
    except Exception as error:  # noqa: BLE001 - recorded in the sweep's table and failures.json
        return CellOutcome(cell.index, cell.name, "failed", time.perf_counter() - clock,
                           error=f"{type(error).__name__}: {error}", traceback=traceback.format_exc())
    return CellOutcome(cell.index, cell.name, "ok", time.perf_counter() - clock, files=files)


def _cell_facts(cell: Cell, heldout_paths: int | None) -> dict:
    """What a cell's numbers depend on besides its code: its config and the held-out paths asked for
    (``--paths``, else the config's own count)."""
    return {"config_hash": config_hash(cell.config),
            "heldout_paths_asked": int(heldout_paths or cell.config.data.heldout_paths)}


def _cell_record(cell: Cell, heldout_paths: int | None, seconds: float) -> dict:
    return {"index": cell.index, "name": cell.name, "overrides": cell.overrides, **_cell_facts(cell, heldout_paths),
            "seconds": round(seconds, 3)}


def cell_complete(folder: Path, cell: Cell, heldout_paths: int | None = None) -> bool:
    """Whether ``folder`` holds a finished run of ``cell`` as configured now, scored on as many
    held-out paths as asked now (a cell recorded before the count was kept is stale)."""
    record = folder / CELL_FILE
    if not (record.is_file() and (folder / "metrics.json").is_file()):
        return False
    try:
        recorded = json.loads(record.read_text())
    except (OSError, ValueError):
        return False
    return isinstance(recorded, dict) and all(recorded.get(key) == value
                                              for key, value in _cell_facts(cell, heldout_paths).items())


def _store(outcome: CellOutcome, cell: Cell, cells_dir: Path, heldout_paths: int | None) -> Path:
    """Write a worker's files under a staging name, metrics.json last, then rename into place."""
    final = cells_dir / cell.name
    staging = cells_dir / f"{cell.name}.partial"
    shutil.rmtree(staging, ignore_errors=True)
    for relative in sorted(outcome.files, key=lambda name: name == "metrics.json"):
        target = staging / relative
        target.parent.mkdir(parents=True, exist_ok=True)
        target.write_bytes(outcome.files[relative])
    (staging / CELL_FILE).write_text(json.dumps(_cell_record(cell, heldout_paths, outcome.seconds), indent=2) + "\n")
    if final.exists():  # a stale run of a cell whose config changed since
        shutil.rmtree(final)
    staging.rename(final)
    return final


def default_sweep_dir(base: Config, runs_dir: Path) -> Path:
    return Path(runs_dir) / f"{base.name}-sweep"


def run_sweep(config_path: str | Path, *, runs_dir: str | Path = "runs", sweep_dir: str | Path | None = None,
              workers: int = 1, scheduler=None, resume: bool = False, heldout_paths: int | None = None,
              threads: int = THREADS_PER_TASK, report: bool = True,
              progress: Callable[[int], None] | None = None) -> SweepResult:
    """Run every cell of the sweep in ``config_path`` and write the combined table and frontier.

    Parameters
    ----------
    config_path : path
        A config with a ``[sweep]`` table.
    runs_dir, sweep_dir : path
        The sweep folder is ``sweep_dir``, default ``runs_dir/NAME-sweep``. Without
        ``resume`` it must not hold cells yet (ConfigError).
    workers : int
        Local worker processes (joblib, loky backend); 1 runs the cells here, one after another.
    scheduler : str or distributed.Client, optional
        A dask.distributed scheduler address (``tcp://host:8786``): the cells run on its
        workers, which need rehedge installed; their files come back here.
    resume : bool
        Keep the complete folders of cells whose config is unchanged; run the others.
    heldout_paths : int, optional
        Held-out paths per cell (default each cell's ``data.heldout_paths``).
    threads : int
        BLAS/OpenMP threads per cell.
    report : bool
        Write each cell's report.html (most of a small cell's time goes into its figures).
    progress : callable, optional
        Called with 1 as each cell ends.
    """
    clock = time.perf_counter()
    config_path = Path(config_path)
    base, cells = sweep_cells(config_path)
    folder = Path(sweep_dir) if sweep_dir is not None else default_sweep_dir(base, Path(runs_dir))
    cells_dir = folder / "cells"
    if folder.exists() and not (folder.is_dir() and (cells_dir.is_dir() or not any(folder.iterdir()))):
        raise ConfigError(f"{folder}: exists and is not a sweep folder (no cells/); --sweep-dir must name a sweep "
                          "folder, an empty folder or a new one", source=str(config_path))
    if not resume and cells_dir.is_dir() and any(cells_dir.iterdir()):
        raise ConfigError(f"{folder}: already holds a sweep; --resume finishes it, --sweep-dir names another "
                          "folder", source=str(config_path))
    cells_dir.mkdir(parents=True, exist_ok=True)
    config_text = config_path.read_text()
    (folder / "config.toml").write_text(config_text)

    status: dict[str, str] = {}
    errors: dict[str, str] = {}
    todo = []
    for cell in cells:
        if resume and cell_complete(cells_dir / cell.name, cell, heldout_paths):
            status[cell.name] = "resumed"
            if progress is not None:
                progress(1)
        else:
            todo.append(cell)
    failures = []
    items = [(cell, config_text, heldout_paths, report) for cell in todo]
    for index, outcome, lost in run_each(_run_item, items, workers=workers, scheduler=scheduler, threads=threads):
        cell = todo[index]
        if lost is not None:
            status[cell.name], errors[cell.name] = "lost", f"{type(lost).__name__}: {lost}"
            failures.append({"cell": cell.name, "overrides": cell.overrides, "error": errors[cell.name]})
        elif outcome.status == "ok":
            _store(outcome, cell, cells_dir, heldout_paths)
            status[cell.name] = "ok"
        else:
            status[cell.name], errors[cell.name] = "failed", outcome.error
            failures.append({"cell": cell.name, "overrides": cell.overrides, "error": outcome.error,
                             "traceback": outcome.traceback})
        if progress is not None:
            progress(1)
    status = {cell.name: status[cell.name] for cell in cells}
    failures_file = folder / "failures.json"
    if failures:
        failures_file.write_text(json.dumps(failures, indent=2) + "\n")
    elif failures_file.exists():
        failures_file.unlink()

    table = combined_table(cells, cells_dir, status, errors)
    seconds = time.perf_counter() - clock
    _write_atomic(folder / "sweep.csv", table.to_csv(index=False))
    meta = {"config": str(config_path), "name": base.name,
            "created": datetime.now(timezone.utc).isoformat(timespec="seconds"), "keys": list(base.sweep),
            "cells": len(cells), "workers": workers, "scheduler": _address(scheduler), "status": status,
            "seconds": round(seconds, 2)}
    rows = [{key: _plain(value) for key, value in row.items()} for row in table.to_dict("records")]
    _write_atomic(folder / "sweep.json", json.dumps({"sweep": meta, "rows": rows}, indent=2) + "\n")
    done = [cells_dir / cell.name for cell in cells if status[cell.name] in ("ok", "resumed")]
    frontier = folder / "frontier.png"
    if len(done) >= 2:
        from rehedge.report import write_frontier

        write_frontier(done, frontier, list(base.sweep))
    elif frontier.exists():
        frontier.unlink()
    return SweepResult(folder, cells, status, errors, table, seconds)


def _run_item(item) -> CellOutcome:
    return run_cell(*item)


def _write_atomic(path: Path, text: str) -> None:
    staging = path.with_name(path.name + ".partial")
    staging.write_text(text)
    staging.replace(path)


def _flat_record(record: dict) -> dict:
    row = {}
    for key, value in record.items():
        if isinstance(value, dict):
            for inner, item in value.items():
                if inner != "policy":
                    row[f"{key}_{inner}"] = item
        else:
            row[key] = value
    return row


def combined_table(cells: list[Cell], cells_dir: Path, status: dict[str, str],
                   errors: dict[str, str]) -> pd.DataFrame:
    """One row per cell and policy (a failed cell: one row with its error), cells in grid order:
    cell, its overrides (one column per swept key), status, run folder, then the policy's metrics."""
    rows = []
    for cell in cells:
        head = {"cell": cell.name, **cell.overrides, "status": status[cell.name]}
        run = cells_dir / cell.name
        if status[cell.name] in ("ok", "resumed"):
            metrics = json.loads((run / "metrics.json").read_text())
            for record in metrics["policies"]:
                rows.append({**head, "run": f"cells/{cell.name}", "error": "", **_flat_record(record)})
        else:
            rows.append({**head, "run": "", "error": errors.get(cell.name, ""), "name": ""})
    return pd.DataFrame(rows).rename(columns={"name": "policy"})


def _plain(value):
    """A table value for JSON: numbers exactly as in the cells' metrics.json, missing ones as null."""
    if hasattr(value, "item"):
        value = value.item()
    if isinstance(value, float) and not math.isfinite(value):
        return None
    return value


def _address(scheduler) -> str | None:
    """The scheduler's address, given as a string or a Client."""
    if scheduler is None or isinstance(scheduler, str):
        return scheduler
    return getattr(getattr(scheduler, "scheduler", None), "address", str(scheduler))
