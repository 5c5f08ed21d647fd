"""The memory a config's run needs, estimated before any work starts.

Each part is the size of the arrays that part of a run holds at once (8 bytes a
number), from the same shapes the code allocates: the path block simulated at a
time, the training transitions, the held-out results of every policy on both
sides of the book, the bootstrap's resamples, a grid optimum's tables and the
hedge table's nodes. The estimate is an upper one within a small factor; its
point is to refuse in one line, naming the keys, a config that would end in a
MemoryError (or swap the machine to a halt) an hour in.

The budget is three quarters of the machine's physical memory: the rest is the
interpreter, the libraries and whatever else the machine runs.
"""

from __future__ import annotations

import os
from dataclasses import dataclass

from rehedge.errors import ConfigError
from rehedge.files import TABLE_BYTES
from rehedge.schema import Config

FLOAT_BYTES = 8
BUDGET_SHARE = 0.75
GIGABYTE = 1 << 30

# Arrays per path and step in a simulated block: spot, a factor (variance or implied vol), the marks,
# the holdings and two working arrays of the step.
_PATH_BLOCK_ARRAYS = 6
# Per held-out path, policy and book side: the step totals of hedge_env.rollout (_TOTALS, 9) and two more.
_HELDOUT_NUMBERS = 11
_BOOTSTRAP_BATCHES = 2000  # rehedge.compare.resample_batches's default
_OBSERVATION_COLUMNS = 4  # spot, time, holding and one observed factor (agents.dataset)
_EXPORT_ARRAYS = 6  # targets, band edges and the working arrays of the export's decisions
# Bytes of a row of a hedge table's targets file: 23 on the tests' tables, with room for longer numbers.
_TABLE_ROW_BYTES = 32
_TABLE_KEYS = ("export.moneyness_points", "export.holding_points", "export.state_points", "schedule.steps")


@dataclass(frozen=True)
class Part:
    """One part of the estimate: its size, what it is and the keys that set it."""

    bytes: float
    what: str
    keys: tuple[str, ...]


def memory_parts(config: Config) -> list[Part]:
    """The estimate's parts for ``config`` (one variant), largest first."""
    steps = config.schedule.steps
    data = config.data
    policies = len(config.baselines) + len(config.agents)
    parts = [
        Part(FLOAT_BYTES * _PATH_BLOCK_ARRAYS * data.chunk_paths * (steps + 1), "the path block simulated at a time",
             ("data.chunk_paths", "schedule.steps")),
        Part(FLOAT_BYTES * _HELDOUT_NUMBERS * 2 * policies * data.heldout_paths,
             "the held-out results of every policy, both sides of the book", ("data.heldout_paths",)),
        Part(FLOAT_BYTES * 2 * config.report.bootstrap_samples * min(data.heldout_paths, _BOOTSTRAP_BATCHES),
             "the bootstrap's resamples", ("report.bootstrap_samples",)),
    ]
    for i, agent in enumerate(config.agents):
        exploration = getattr(agent, "exploration", None)
        if exploration is not None:
            m = exploration.actions_per_state
            per_row = 2 * _OBSERVATION_COLUMNS + 3 * m + 3  # the step's observations, actions, rewards, path
            parts.append(Part(FLOAT_BYTES * per_row * steps * data.train_paths,
                              f"agents[{i}]'s training transitions",
                              ("data.train_paths", "schedule.steps", f"agents[{i}].exploration.actions_per_state")))
        if agent.kind == "grid_dp":
            parts.append(Part(FLOAT_BYTES * 4 * steps * agent.spot_points * agent.holding_points,
                              f"agents[{i}]'s value and policy grids",
                              (f"agents[{i}].spot_points", f"agents[{i}].holding_points", "schedule.steps")))
        if agent.kind == "heston_grid_dp":
            parts.append(Part(FLOAT_BYTES * 4 * steps * agent.spot_points * agent.variance_points
                              * agent.holding_points, f"agents[{i}]'s value and policy grids",
                              (f"agents[{i}].spot_points", f"agents[{i}].variance_points",
                               f"agents[{i}].holding_points", "schedule.steps")))
    if config.export.policy is not None:
        parts.append(Part(FLOAT_BYTES * _EXPORT_ARRAYS * table_rows(config), "the hedge table's nodes",
                          _TABLE_KEYS))
    return sorted(parts, key=lambda part: -part.bytes)


def _has_state_axis(config: Config) -> bool:
    """Whether an exported table has a state axis: the market's observed variance or implied marks."""
    market = config.market
    return bool(getattr(market, "variance_observed", False)) or getattr(market, "marks", None) == "implied"


def table_rows(config: Config) -> int:
    """Rows of the exported hedge table's targets file: a node per decision time, moneyness, state
    (when the table has a state axis) and holding."""
    export = config.export
    states = export.state_points if _has_state_axis(config) else 1
    return config.schedule.steps * export.moneyness_points * states * export.holding_points


def machine_memory() -> float:
    """The machine's physical memory, bytes (0 where the system does not say)."""
    try:
        return float(os.sysconf("SC_PAGE_SIZE") * os.sysconf("SC_PHYS_PAGES"))
    except (ValueError, OSError, AttributeError):
        return 0.0


def check_memory(config: Config, source: str = "<config>", memory: float | None = None) -> None:
    """Raise a one-line ConfigError naming the keys of the largest part when the estimate is more
    than the budget (``BUDGET_SHARE`` of ``memory``, default this machine's physical memory), or
    when the hedge table to export would be larger than a table may be (rehedge.files.TABLE_BYTES)."""
    if config.export.policy is not None and table_rows(config) * _TABLE_ROW_BYTES > TABLE_BYTES:
        raise ConfigError(
            f"{_TABLE_KEYS[0]}: the hedge table would have {table_rows(config):,} rows, about "
            f"{_gigabytes(table_rows(config) * _TABLE_ROW_BYTES)}, more than the {_gigabytes(TABLE_BYTES)} a table may "
            f"have (set by {', '.join(_TABLE_KEYS)}); make them smaller", source=source, key=_TABLE_KEYS[0])
    memory = machine_memory() if memory is None else memory
    if memory <= 0:
        return
    parts = memory_parts(config)
    total = sum(part.bytes for part in parts)
    budget = BUDGET_SHARE * memory
    if total <= budget:
        return
    largest = parts[0]
    raise ConfigError(
        f"{largest.keys[0]}: the run would need about {_gigabytes(total)} of memory, {_gigabytes(largest.bytes)} of "
        f"it for {largest.what} (set by {', '.join(largest.keys)}), more than the {_gigabytes(budget)} it may use "
        f"({BUDGET_SHARE:.0%} of this machine's {_gigabytes(memory)}); make them smaller",
        source=source, key=largest.keys[0])


def _gigabytes(size: float) -> str:
    return f"{size / GIGABYTE:,.1f} GB" if size >= GIGABYTE else f"{size / (1 << 20):,.0f} MB"
