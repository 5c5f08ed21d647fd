"""Offline transitions from market paths and an exploring behaviour policy.

The behaviour policy explores the actions that matter for hedging under
costs: no trade, trade to delta, and targets spread around both. Because the
market path does not depend on the hedger's target (unless permanent impact
is on), each visited state is also replayed with a few more targets on the
same market move (``actions_per_state``): common random numbers that let a
regression tell the actions apart at a fraction of the paths. The trajectory
itself follows the first (behaviour) action.

Every reward comes from :func:`hedge_env.step.hedge_step`; nothing here
computes a cost or a mark.
"""

from __future__ import annotations

import shutil
import tempfile
import weakref
from collections.abc import Iterator
from dataclasses import dataclass, fields
from pathlib import Path

import numpy as np

from agents.baselines import band_center
from agents.features import hedge_move
from hedge_env.market import MarketPaths, PathGenerator
from hedge_env.problem import HedgingProblem
from hedge_env.rollout import as_market, check_observed_marks
from hedge_env.step import HedgeState, hedge_step, initial_state, observe


@dataclass(frozen=True)
class Exploration:
    """Behaviour policy: with probability ``no_trade`` keep the holding, with ``delta`` trade
    to the hedge, otherwise draw a target normally around the hedge or around the holding, half
    and half, with std ``spread`` hedge moves (agents.features.hedge_move: the typical one-step
    change of the hedge). The hedge is ``center`` (agents.baselines.BAND_CENTERS; ``delta`` is
    the step's own delta): the one the agent measures its targets from, so the tried targets
    surround the ones it will choose among."""

    no_trade: float = 0.3
    delta: float = 0.2
    spread: float = 1.1
    actions_per_state: int = 8
    center: str = "delta"

    def __post_init__(self) -> None:
        if not (0 <= self.no_trade and 0 <= self.delta and self.no_trade + self.delta <= 1):
            raise ValueError("exploration: no_trade and delta must be probabilities summing to <= 1")
        if self.spread < 0 or self.actions_per_state < 1:
            raise ValueError("exploration: spread must be >= 0 and actions_per_state >= 1")

    def draw(self, rng: np.random.Generator, holding: np.ndarray, hedge: np.ndarray, size: int,
             move: float) -> np.ndarray:
        """(n, size) targets per share of notional for rows with ``holding`` and ``hedge``;
        ``move`` is the hedge move in shares per share of notional."""
        n = holding.shape[0]
        u = rng.random((n, size))
        center = np.where(rng.random((n, size)) < 0.5, hedge[:, None], holding[:, None])
        spread = center + (self.spread * move) * rng.standard_normal((n, size))
        targets = np.where(u < self.no_trade + self.delta, hedge[:, None], spread)
        return np.where(u < self.no_trade, holding[:, None], targets)


@dataclass
class Transitions:
    """Transitions of a block of paths, by decision time.

    Shapes: ``obs`` (steps, n, n_obs): the visited states; ``actions``,
    ``rewards``, ``next_holding`` (steps, n, M): M targets tried at each
    state (column 0 the behaviour's), per share of notional, their rewards
    (under the exponential objective the step's P&L instead: its reward
    reads the wealth gathered before, which is the behaviour's, and the
    agents' certainty-equivalent recursion takes the P&L) and the holding
    they led to; ``next_obs`` (steps, n, n_obs): the next
    observation with the holding column of the behaviour action (replace it
    with ``next_holding`` for the other columns). The step after the last
    decision is terminal (``done``).
    """

    obs: np.ndarray
    actions: np.ndarray
    rewards: np.ndarray
    next_obs: np.ndarray
    next_holding: np.ndarray

    @property
    def steps(self) -> int:
        return self.obs.shape[0]

    @property
    def n_states(self) -> int:
        return self.obs.shape[1]

    def done(self, k: int) -> bool:
        return k == self.steps - 1

    def next_observations(self, k: int, next_moneyness: np.ndarray | None = None) -> np.ndarray:
        """(n * M, n_obs) next observations of every tried action at step ``k`` (row-major in (n, M)).

        ``next_moneyness`` (n, M): each tried target's own next spot over the reference spot, where
        the target moves the market (permanent impact; :func:`replayed_next_spots`)."""
        n, m = self.actions.shape[1:]
        tiled = np.repeat(self.next_obs[k], m, axis=0)
        tiled[:, 2] = self.next_holding[k].reshape(n * m)
        if next_moneyness is not None:
            tiled[:, 0] = next_moneyness.reshape(n * m)
        return tiled

    def flat(self) -> dict[str, np.ndarray]:
        """The classic (obs, action, reward, next_obs, done) rows, one per tried action."""
        steps, n, m = self.actions.shape
        obs = np.repeat(self.obs.reshape(steps * n, -1), m, axis=0)
        next_obs = np.concatenate([self.next_observations(k) for k in range(steps)])
        done = np.repeat(np.arange(steps) == steps - 1, n * m)
        return {"obs": obs, "action": self.actions.reshape(-1), "reward": self.rewards.reshape(-1),
                "next_obs": next_obs, "done": done}

    @staticmethod
    def concat(parts: list[Transitions]) -> Transitions:
        return Transitions(*(np.concatenate([getattr(p, f) for p in parts], axis=1)
                             for f in ("obs", "actions", "rewards", "next_obs", "next_holding")))


_STATE_ARRAYS = ("spot", "impact", "holding", "cash", "mark", "delta")


def _tile(state: HedgeState, m: int) -> HedgeState:
    """The state repeated m times (block j of the result is copy j)."""
    return HedgeState(state.k, *(np.tile(getattr(state, name), m) for name in _STATE_ARRAYS))


def _first_rows(state: HedgeState, n: int) -> HedgeState:
    return HedgeState(state.k, *(getattr(state, name)[:n] for name in _STATE_ARRAYS))


def collect(problem: HedgingProblem, paths: MarketPaths, exploration: Exploration, seed: int,
            observed: tuple[str, ...] = ()) -> Transitions:
    """Transitions of ``paths`` under the behaviour policy (random draws from ``seed``)."""
    check_observed_marks(problem, observed)
    rng = np.random.default_rng(seed)
    move = hedge_move(problem)
    n, steps, m = paths.n_paths, problem.schedule.steps, exploration.actions_per_state
    notional = problem.notional_shares
    spot = np.ascontiguousarray(paths.spot.T)
    factors = {name: np.ascontiguousarray(v.T) for name, v in paths.factors.items()}
    mark_vol = factors.get(problem.mark_factor)
    state = initial_state(problem, spot[0], None if mark_vol is None else mark_vol[0])
    n_obs = 3 + len(observed)
    obs = np.empty((steps, n, n_obs))
    next_obs = np.empty((steps, n, n_obs))
    actions = np.empty((steps, n, m))
    rewards = np.empty((steps, n, m))
    next_holding = np.empty((steps, n, m))
    for k in range(steps):
        obs[k] = observe(problem, state, [factors[f][k] for f in observed])
        hedge = (-state.delta if exploration.center == "delta" else band_center(problem, exploration.center, obs[k])[0]
                 ) / notional
        actions[k] = exploration.draw(rng, obs[k, :, 2], hedge, m, move)
        # Column-major tiling: rows j*n .. (j+1)*n-1 are action j of every state.
        outcome = hedge_step(
            problem, _tile(state, m), actions[k].T.reshape(-1) * notional, np.tile(spot[k + 1], m),
            None if mark_vol is None else np.tile(mark_vol[k + 1], m),
        )
        rewards[k] = problem.objective.form.learning_signal(outcome.pnl, outcome.reward).reshape(m, n).T
        next_holding[k] = (outcome.state.holding / notional).reshape(m, n).T
        state = _first_rows(outcome.state, n)  # the trajectory follows the behaviour action
        next_obs[k] = observe(problem, state, [factors[f][k + 1] for f in observed])
    return Transitions(obs, actions, rewards, next_obs, next_holding)


def replayed_impact(problem: HedgingProblem, chunk: Transitions, k: int) -> np.ndarray | None:
    """(n, M) factor ``exp(gamma d / ADV)`` by which each tried target's own trade at step ``k`` moves
    every later price (hedge_env.frictions.Frictions.impact_factor of the clipped trade); None
    without permanent impact, where every target sees the same next spot."""
    frictions = problem.frictions
    if not frictions.permanent_impact:
        return None
    notional = problem.notional_shares
    trade = frictions.clip_target(chunk.actions[k] * notional) - (chunk.obs[k, :, 2] * notional)[:, None]
    return frictions.impact_factor(trade, np.exp)


def replayed_next_spots(problem: HedgingProblem, chunk: Transitions, k: int,
                        factors: np.ndarray | None = None) -> np.ndarray:
    """(n, M) next spot of every tried target at step ``k``: the behaviour's (column 0) where targets do
    not move the market, else rescaled by each target's impact factor over the behaviour's
    (``factors``: :func:`replayed_impact`, when the caller has it already)."""
    behaviour = chunk.next_obs[k, :, 0] * problem.reference_spot
    if factors is None:
        factors = replayed_impact(problem, chunk, k)
    if factors is None:
        return np.broadcast_to(behaviour[:, None], chunk.actions[k].shape)
    return behaviour[:, None] * (factors / factors[:, :1])


def collect_chunks(problem: HedgingProblem, source: PathGenerator | MarketPaths, n_paths: int, seed: int,
                   exploration: Exploration, chunk_paths: int = 8192) -> Iterator[Transitions]:
    """Transitions of ``n_paths`` paths of ``source``, a chunk of paths at a time.

    Paths come from ``seed``; the behaviour's draws from a child of it per chunk.
    """
    market = as_market(source, problem)
    for index, chunk in enumerate(market.iter_chunks(n_paths, problem.schedule.steps, problem.dt_years, seed,
                                                     chunk_paths)):
        behaviour_seed = np.random.SeedSequence(seed, spawn_key=(1, index))
        yield collect(problem, chunk, exploration, behaviour_seed, market.observed_factors)


# Transitions a store keeps in memory before it writes further chunks to disk.
MEMORY_BUDGET_BYTES = 256 * 2**20


class TransitionStore:
    """Transitions of many paths, chunk by chunk: in memory up to ``memory_bytes``, then in files.

    A fit streams the chunks once per decision time and reads only that time's
    rows; chunks in files are memory-mapped, so a chunk on disk costs memory
    only for the rows being read. 1,000,000 paths x 30 steps with 8 targets a
    state are about 7 GB of transitions: on disk, not in memory. The files go
    to a temporary folder removed by :meth:`close` (or on leaving a ``with``).
    Iterating yields the chunks in the order they were added, so sums over
    chunks are the same whichever way the chunks are held.
    """

    def __init__(self, memory_bytes: int = MEMORY_BUDGET_BYTES):
        self.memory_bytes = memory_bytes
        self._chunks: list[Transitions | Path] = []
        self._in_memory = 0
        self._folder: Path | None = None

    def add(self, chunk: Transitions) -> None:
        """Keep ``chunk`` (in memory while the budget allows, else in a file)."""
        size = sum(getattr(chunk, f.name).nbytes for f in fields(Transitions))
        if self._in_memory + size <= self.memory_bytes:
            self._chunks.append(chunk)
            self._in_memory += size
            return
        if self._folder is None:
            self._folder = Path(tempfile.mkdtemp(prefix="rehedge-transitions-"))
            # Removed with the store even when an error ends the fit before close().
            self._remove = weakref.finalize(self, shutil.rmtree, self._folder, True)
        self._chunks.append(save_transitions(chunk, self._folder / f"chunk{len(self._chunks):06d}"))

    def __iter__(self) -> Iterator[Transitions]:
        for chunk in self._chunks:
            yield chunk if isinstance(chunk, Transitions) else load_transitions(chunk)

    def __call__(self) -> Iterator[Transitions]:
        """The chunks again (a fit's transition source: called once per decision time)."""
        return iter(self)

    def __len__(self) -> int:
        return len(self._chunks)

    @property
    def n_states(self) -> int:
        return sum(chunk.n_states for chunk in self)

    @property
    def spilled(self) -> int:
        """Number of chunks held in files."""
        return sum(isinstance(chunk, Path) for chunk in self._chunks)

    def close(self) -> None:
        """Drop the chunks and remove the files."""
        self._chunks, self._in_memory = [], 0
        if self._folder is not None:
            self._remove()
            self._folder = None

    def __enter__(self) -> TransitionStore:
        return self

    def __exit__(self, *exc) -> None:
        self.close()


def save_transitions(chunk: Transitions, folder: Path) -> Path:
    """Write ``chunk`` as one .npy file per array into ``folder`` (created)."""
    folder = Path(folder)
    folder.mkdir(parents=True, exist_ok=True)
    for f in fields(Transitions):
        np.save(folder / f"{f.name}.npy", getattr(chunk, f.name))
    return folder


def load_transitions(folder: Path) -> Transitions:
    """Transitions written by :func:`save_transitions`, memory-mapped read-only."""
    return Transitions(*(np.load(Path(folder) / f"{f.name}.npy", mmap_mode="r") for f in fields(Transitions)))
