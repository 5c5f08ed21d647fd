"""Training from a config: draw the training paths once, tune the baselines, collect
transitions, fit every configured agent; save and load run folders.

A run folder ``runs/NAME-TIMESTAMP/`` holds the config as given
(``config.toml``) and resolved (``config.json``), ``manifest.json``
(package version, seeds, config hash, timings, data sizes, tuned values),
one ``agents/NAME.joblib`` per fitted agent and ``training.log``.
"""

from __future__ import annotations

import json
import platform
import time
from collections.abc import Callable
from dataclasses import dataclass, field, replace
from datetime import datetime, timezone
from pathlib import Path

import joblib
import numpy as np
import sklearn
from sklearn import ensemble, linear_model, neighbors, neural_network

import hedge_env
from rehedge.errors import ConfigError
from rehedge.config import config_hash, parse_config
from rehedge.schema import Config
from agents.dataset import Exploration, TransitionStore, Transitions, collect
from agents.fitted_q import FittedQAgent, default_regressor
from agents.grid_dp import GridDPAgent
from agents.linear import LinearBasisAgent
from rehedge.build import (
    build_baseline,
    build_markets,
    build_problem,
    describe_markets,
    prepare_baselines,
    training_path_set,
)
from hedge_env.market import GBMMarket, PathGenerator, PathSet
from hedge_env.problem import HedgingProblem

REGRESSOR_CLASSES = {
    "hist_gradient_boosting": ensemble.HistGradientBoostingRegressor,
    "extra_trees": ensemble.ExtraTreesRegressor,
    "random_forest": ensemble.RandomForestRegressor,
    "gradient_boosting": ensemble.GradientBoostingRegressor,
    "ridge": linear_model.Ridge,
    "k_neighbors": neighbors.KNeighborsRegressor,
    "mlp": neural_network.MLPRegressor,
}

# Reporter of progress: start(label, total) -> advance(n).
ProgressStart = Callable[[str, int], Callable[[int], None]]


def no_progress(label: str, total: int) -> Callable[[int], None]:
    return lambda n: None


def make_regressor(name: str, params: dict, where: str):
    """A scikit-learn regressor by name, from the fitted-Q agent's own settings for the default
    tree ensemble; unknown parameters are a config error naming ``where``."""
    regressor = default_regressor() if name == "hist_gradient_boosting" else REGRESSOR_CLASSES[name]()
    unknown = sorted(set(params) - set(regressor.get_params()))
    if unknown:
        raise ConfigError(f"{where}: unknown parameter {unknown[0]!r} for {name}")
    return regressor.set_params(**params)


def build_agent(spec, index: int, problem: HedgingProblem, market: PathGenerator):
    """An unfitted agent from its config entry ``agents[index]``."""
    where = f"agents[{index}]"
    if spec.kind == "grid_dp":
        if not isinstance(market, GBMMarket):
            raise ConfigError(f"{where}.kind: grid_dp needs a one-factor GBM market")
        return GridDPAgent(problem, drift=market.drift, volatility=market.volatility,
                           spot_points=spec.spot_points, holding_points=spec.holding_points,
                           quadrature_nodes=spec.quadrature_nodes, name=spec.name)
    common = dict(factor_names=market.observed_factors, drift=spec.drift, name=spec.name)
    if spec.band_widths is not None:
        common["band_widths"] = tuple(spec.band_widths)
    if spec.basis is not None:
        common["basis"] = tuple(spec.basis)
    if spec.kind == "linear":
        return LinearBasisAgent(problem, ridge=spec.ridge, smoothing=spec.smoothing, **common)
    if spec.kind == "fitted_q":
        regressor = make_regressor(spec.regressor, spec.regressor_params, f"{where}.regressor_params")
        return FittedQAgent(problem, regressor=regressor, max_rows_per_step=spec.max_rows_per_step, **common)
    raise ConfigError(f"{where}.kind: unknown agent kind {spec.kind!r}")


def _exploration(spec) -> Exploration:
    e = spec.exploration
    return Exploration(no_trade=e.no_trade, delta=e.delta, spread=e.spread, actions_per_state=e.actions_per_state)


@dataclass
class Training:
    """Everything a training run produced."""

    config: Config
    problem: HedgingProblem
    market: PathGenerator
    agents: dict[str, object]
    baselines: dict[str, object]
    tuning: dict
    timings: dict[str, float] = field(default_factory=dict)
    sizes: dict[str, int] = field(default_factory=dict)
    log: list[str] = field(default_factory=list)
    # The held-out source: the training one for a simulated model, a history's later windows otherwise.
    heldout_market: PathGenerator | None = None

    @property
    def policies(self) -> dict[str, object]:
        return {**self.baselines, **self.agents}

    @property
    def kinds(self) -> dict[str, str]:
        kinds = {spec.name: spec.kind for spec in self.config.baselines}
        kinds.update({spec.name: spec.kind for spec in self.config.agents})
        return kinds

    def note(self, line: str) -> None:
        self.log.append(f"{datetime.now(timezone.utc).isoformat(timespec='seconds')} {line}")


def train(config: Config, start: ProgressStart = no_progress) -> Training:
    """Tune the baselines and fit every agent of ``config`` on its training paths."""
    problem = build_problem(config)
    market, heldout_market = build_markets(config)
    agents = {spec.name: build_agent(spec, i, problem, market) for i, spec in enumerate(config.agents)}
    outcome = Training(config, problem, market, {}, {}, {}, heldout_market=heldout_market)
    data = config.data
    # Drawn a chunk at a time whenever needed, never held whole: memory stays bounded at any path count.
    paths = training_path_set(config, market, problem)
    n_train = paths.n_paths
    outcome.sizes.update(train_paths=n_train, steps=problem.schedule.steps)
    outcome.note(f"training paths: {n_train} x {problem.schedule.steps} steps, seed {data.train_seed}")
    for role, facts in describe_markets(market, heldout_market).items():
        outcome.note(f"{role} paths: {facts['source']} of {facts['first_date']} .. {facts['last_date']} "
                     f"({facts['rows']} trading days)")

    clock = time.perf_counter()
    start("tuning baselines", 1)
    outcome.baselines, outcome.tuning = prepare_baselines(config, problem, market, train=paths)
    outcome.timings["tune_s"] = time.perf_counter() - clock
    for name, result in outcome.tuning.items():
        outcome.note(f"tuned {name}.{result.parameter} = {result.value:.6g} (train objective {result.objective:.6g})")

    transitions: dict[Exploration, TransitionStore] = {}
    for index, spec in enumerate(config.agents):
        agent = agents[spec.name]
        clock = time.perf_counter()
        if spec.kind == "grid_dp":
            agent.fit()
        else:
            exploration = _exploration(spec)
            if exploration not in transitions:
                advance = start(f"collecting transitions ({spec.name})", n_train)
                transitions[exploration] = store = TransitionStore()
                for chunk in collect_training_chunks(problem, paths, exploration, data.train_seed,
                                                     data.chunk_paths):
                    store.add(chunk)
                    advance(chunk.n_states)
                rows = store.n_states * exploration.actions_per_state * problem.schedule.steps
                outcome.sizes[f"transitions_{spec.name}"] = rows
                outcome.note(f"collected {rows} transitions for {spec.name}"
                             + (f" ({store.spilled} of {len(store)} chunks on disk)" if store.spilled else ""))
            agent.fit(transitions[exploration], progress=start(f"fitting {spec.name}", problem.schedule.steps))
        outcome.timings[f"fit_{spec.name}_s"] = time.perf_counter() - clock
        outcome.note(f"fitted {spec.name} ({spec.kind}) in {outcome.timings[f'fit_{spec.name}_s']:.2f} s")
        outcome.agents[spec.name] = agent
    for store in transitions.values():
        store.close()  # removes its files (also done when a failed fit drops it)
    return outcome


def collect_training_chunks(problem: HedgingProblem, paths: PathSet, exploration: Exploration, train_seed: int,
                            chunk_paths: int):
    """Transitions of the training paths, ``chunk_paths`` paths at a time; chunk i's behaviour draws
    come from ``SeedSequence(train_seed, spawn_key=(1, i))``."""
    for i, begin in enumerate(range(0, paths.n_paths, chunk_paths)):
        yield collect_training_chunk(problem, paths, exploration, train_seed, chunk_paths, i)


def collect_training_chunk(problem: HedgingProblem, paths: PathSet, exploration: Exploration, train_seed: int,
                           chunk_paths: int, index: int) -> Transitions:
    """Chunk ``index`` of :func:`collect_training_chunks` alone (what a worker collects)."""
    begin = index * chunk_paths
    chunk = paths.rows(begin, min(begin + chunk_paths, paths.n_paths))
    seed = np.random.SeedSequence(train_seed, spawn_key=(1, index))
    return collect(problem, chunk, exploration, seed, paths.observed_factors)


def _timestamp() -> str:
    return datetime.now(timezone.utc).strftime("%Y%m%dT%H%M%SZ")


PARTIAL = ".partial"


def write_run(training: Training, config_text: str, runs_dir: Path, extra: dict | None = None,
              finish: bool = True) -> Path:
    """Write a run folder; it is built under the name ``NAME-TIMESTAMP.partial`` and renamed when
    complete, so nothing half-written looks like a run. With ``finish=False`` the staging folder is
    returned for more files (held-out metrics, report); :func:`finish_run` then renames it."""
    config = training.config
    stem = f"{config.name}-{_timestamp()}"
    final, n = Path(runs_dir) / stem, 2
    while final.exists() or final.with_name(final.name + PARTIAL).exists():  # two runs in one second
        final, n = Path(runs_dir) / f"{stem}-{n}", n + 1
    staging = final.with_name(final.name + PARTIAL)
    (staging / "agents").mkdir(parents=True)
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
        **_history_facts(training),
        **(extra or {}),
    }
    (staging / "manifest.json").write_text(json.dumps(manifest, indent=2) + "\n")
    (staging / "training.log").write_text("\n".join(training.log) + "\n")
    return finish_run(staging) if finish else staging


def finish_run(staging: Path) -> Path:
    """Rename a complete staging folder ``NAME.partial`` to ``NAME``; returns the final path."""
    final = staging.with_name(staging.name.removesuffix(PARTIAL))
    staging.rename(final)
    return final


def _history_facts(training: Training) -> dict:
    """For a historical market: the CSV, its sha256 and the training and held-out date ranges."""
    heldout = training.heldout_market or training.market
    markets = describe_markets(training.market, heldout)
    if not markets:
        return {}
    history = heldout.history
    return {"history": {"csv": history.source, "csv_sha256": history.sha256, **markets}}


@dataclass
class Run:
    """A run folder read back: config, problem, market, policies (baselines rebuilt with their tuned values)."""

    path: Path
    config: Config
    manifest: dict
    problem: HedgingProblem
    market: PathGenerator
    agents: dict[str, object]
    baselines: dict[str, object]
    heldout_market: PathGenerator | None = None


def load_run(path: str | Path, partial_ok: bool = False) -> Run:
    """Read a run folder written by :func:`write_run`; a missing or broken folder is a ConfigError, and so
    is an unfinished ``.partial`` one unless ``partial_ok`` (the run writing it reads it back)."""
    path = Path(path)
    if path.name.endswith(PARTIAL) and not partial_ok:
        raise ConfigError(f"{path}: an incomplete run folder (its run was interrupted); run it again")
    manifest_file = path / "manifest.json"
    if not manifest_file.is_file():
        raise ConfigError(f"{path}: not a run folder (no manifest.json)")
    manifest = json.loads(manifest_file.read_text())
    config = parse_config(json.loads((path / "config.json").read_text()), source=str(path / "config.json"))
    problem = build_problem(config)
    market, heldout_market = build_markets(config)
    recorded = manifest.get("history", {}).get("csv_sha256")
    if recorded and recorded != heldout_market.history.sha256:
        raise ConfigError(f"market.csv: {config.market.csv} changed since the run was written "
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
    return Run(path, config, manifest, problem, market, agents, baselines, heldout_market)
