"""Gymnasium views of the hedging step: one path (`HedgingEnv`) and many at once (`HedgingVectorEnv`)."""

from __future__ import annotations

import math
from typing import Any

import gymnasium as gym
import numpy as np
from gymnasium import spaces
from gymnasium.vector import AutoresetMode, VectorEnv
from gymnasium.vector.utils import batch_space

from hedge_env.book import Book, MarkParameters, OptionLeg
from hedge_env.frictions import Frictions
from hedge_env.market import BLOCK_PATHS, GBMMarket, GivenPaths, MarketPaths, PathGenerator
from hedge_env.objective import Objective
from hedge_env.problem import HedgingProblem, Schedule
from hedge_env.step import HedgeState, StepOutcome, hedge_step, initial_state, observe

# A European book's delta per share of notional lies in [-1, 1], so no hedge needs more.
DEFAULT_MAX_HOLDING = 1.0


def default_problem() -> tuple[HedgingProblem, PathGenerator]:
    """Short one at-the-money 30-day call on one share, GBM at 20% volatility,
    30 daily rehedges, 10 bps proportional cost, risk aversion 1 per currency unit."""
    problem = HedgingProblem(
        book=Book((OptionLeg("call", strike=100.0, expiry_days=30, quantity=-1.0),)),
        marks=MarkParameters(volatility=0.2),
        frictions=Frictions(cost_rate=0.001),
        objective=Objective(risk_aversion=1.0),
        schedule=Schedule(steps=30, step_days=1.0),
        reference_spot=100.0,
    )
    return problem, GBMMarket(spot=100.0, drift=0.0, volatility=0.2)


def _spaces(problem: HedgingProblem, observed: tuple[str, ...]) -> tuple[spaces.Box, spaces.Box]:
    limit = problem.frictions.position_limit_shares / problem.notional_shares
    max_holding = min(limit, DEFAULT_MAX_HOLDING) if math.isfinite(limit) else DEFAULT_MAX_HOLDING
    extra = len(observed)
    low = np.array([0.0, 0.0, -max_holding] + [-np.inf] * extra, dtype=np.float32)
    high = np.array([np.inf, problem.horizon_years, max_holding] + [np.inf] * extra, dtype=np.float32)
    observation_space = spaces.Box(low, high, dtype=np.float32)
    action_space = spaces.Box(-max_holding, max_holding, shape=(1,), dtype=np.float32)
    return observation_space, action_space


def _info(problem: HedgingProblem, outcome: StepOutcome | None, state: HedgeState) -> dict[str, Any]:
    if outcome is None:
        return {"mark": state.mark, "delta": state.delta, "spot": state.spot, "wealth": state.wealth()}
    # One literal rather than a dict and an update: this runs every step of the single env.
    return {
        "mark": state.mark, "delta": state.delta, "spot": state.spot, "wealth": state.wealth(),
        "pnl": outcome.pnl, "hedge_gain": outcome.hedge_gain, "book_change": outcome.book_change,
        "financing": outcome.financing, "trading_cost": outcome.trading_cost,
        "impact_cost": outcome.impact_cost, "traded_shares": outcome.traded_shares, "held": outcome.held,
    }


class HedgingEnv(gym.Env):
    """Hedge an options book by trading its underlying, one path at a time.

    ## Description

    The agent holds a book of European options (short ones are a liability)
    and, at each rehedge time, names a target holding of the underlying.
    Trading costs spread, fees and price impact; cash earns interest, short
    stock pays a borrow fee, dividends are paid on the holding. The market
    then moves and the book is marked at Black-Scholes. All of the
    accounting is :func:`hedge_env.step.hedge_step`; this class only feeds it
    one path and reshapes its outcome.

    ## Action Space

    ``Box(-m, m, (1,), float32)``: the target holding per share of book
    notional (``sum |quantity| x multiplier``); ``m`` is 1, or the position
    limit if smaller. A target beyond the limit is clipped.

    ## Observation Space

    ``Box(float32)`` of shape ``(3 + k,)``:

    | index | meaning | range |
    |-------|---------|-------|
    | 0 | spot / reference spot | (0, inf) |
    | 1 | years to the horizon | [0, horizon] |
    | 2 | holding per share of notional | [-m, m] |
    | 3.. | observable market factors (e.g. variance), if the market has any | (-inf, inf) |

    ## Rewards

    ``dW`` is the change in the hedger's wealth over the step (hedge gain +
    book mark change + financing - costs); the sum of ``dW`` over an episode
    is the P&L against the initial mark ``W_T``. The reward is the problem's
    objective kind's (``objective.kind``, hedge_env.objective):

    - ``mean_variance``: ``r = dW - kappa / 2 * dW**2`` each step, kappa the
      risk aversion per currency unit; the return is the summed rewards.
    - ``exponential``: 0 at every step but the last, which pays
      ``u(W_T) = (1 - exp(-gamma W_T)) / gamma``, gamma the absolute risk
      aversion: the return is the terminal utility (-inf where gamma times the
      loss is past the double range), whose expectation ranks policies as
      their certainty equivalent does.

    ## Starting State

    Spot at the first price of a market path, no shares, cash equal to the
    premium received at the initial mark (wealth 0).

    ## Episode End

    Terminates after ``schedule.steps`` rehedges; the last step also unwinds
    the hedge at cost (or nets physically settled shares first). Never truncated.

    ## Arguments

    - ``problem``: :class:`hedge_env.problem.HedgingProblem` (default
      :func:`default_problem`: one short ATM call, 10 bps, kappa 1).
    - ``market``: a :class:`hedge_env.market.PathGenerator` to simulate from
      (default GBM matching the default problem).
    - ``paths``: :class:`hedge_env.market.MarketPaths` to replay instead
      (historical windows, a test's paths); each reset picks one at random.

    The info dict holds ``mark``, ``delta`` (book delta in shares at the
    mark volatility), ``spot``, ``wealth`` and, after a step, the P&L parts
    ``pnl``, ``hedge_gain``, ``book_change``, ``financing``,
    ``trading_cost``, ``impact_cost``, ``traded_shares``, ``held``.

    ## Example

    >>> import gymnasium as gym, hedge_env
    >>> env = gym.make("rehedge/Hedging-v0")
    >>> obs, info = env.reset(seed=7)
    >>> done = False
    >>> while not done:
    ...     obs, reward, done, truncated, info = env.step([-info["delta"]])  # a one-share book: delta per share
    """

    metadata = {"render_modes": []}

    def __init__(
        self,
        problem: HedgingProblem | None = None,
        market: PathGenerator | None = None,
        paths: MarketPaths | None = None,
    ):
        if problem is None:
            problem, default_market = default_problem()
            market = market or default_market
        if paths is not None:
            market = GivenPaths(paths, observed_factors=market.observed_factors if market else ())
        if market is None:
            raise ValueError("give a market (path generator) or paths with a custom problem")
        self.problem, self.market = problem, market
        self.observation_space, self.action_space = _spaces(problem, market.observed_factors)
        self._pool: MarketPaths | None = None
        self._pool_next = 0
        self._path: MarketPaths | None = None
        self._spot_path: list[float] = []
        self._factor_paths: list[list[float]] = []
        self._mark_volatility_path: list[float] | None = None
        self._state: HedgeState | None = None

    def _draw_path(self) -> MarketPaths:
        steps = self.problem.schedule.steps
        if isinstance(self.market, GivenPaths):
            index = int(self.np_random.integers(self.market.paths.n_paths))
            return self.market.paths.rows(index, index + 1)
        # Simulate a block at a time from seeds drawn off np_random: resets stay cheap and reproducible.
        if self._pool is None or self._pool_next == self._pool.n_paths:
            block_seed = int(self.np_random.integers(2**63))
            self._pool = self.market.generate(BLOCK_PATHS, steps, self.problem.dt_years, block_seed)
            self._pool_next = 0
        self._pool_next += 1
        return self._pool.rows(self._pool_next - 1, self._pool_next)

    def _observation(self) -> np.ndarray:
        k = self._state.k
        factors = [path[k] for path in self._factor_paths]
        return observe(self.problem, self._state, factors, dtype=np.float32)

    def _mark_volatility(self, k: int):
        return None if self._mark_volatility_path is None else self._mark_volatility_path[k]

    def reset(self, *, seed: int | None = None, options: dict | None = None):
        super().reset(seed=seed)
        if seed is not None:
            self._pool = None
        self._path = self._draw_path()
        # Python floats, once per episode: each step then reads list items, not numpy scalars.
        self._spot_path = self._path.spot[0].tolist()
        self._factor_paths = [self._path.factors[f][0].tolist() for f in self.market.observed_factors]
        mark_volatility = self._path.factors.get(self.problem.mark_factor)
        self._mark_volatility_path = None if mark_volatility is None else mark_volatility[0].tolist()
        self._state = initial_state(self.problem, self._spot_path[0], self._mark_volatility(0), scalar=True)
        return self._observation(), _info(self.problem, None, self._state)

    def step(self, action):
        if self._state is None or self._state.k >= self.problem.schedule.steps:
            raise RuntimeError("call reset() before step(), and again after the episode ends")
        # item(0) is the first element of any array, as reshape(-1)[0], without two array views.
        first = action.item(0) if isinstance(action, np.ndarray) else np.asarray(action).reshape(-1)[0]
        target = float(first) * self.problem.notional_shares
        k = self._state.k
        outcome = hedge_step(
            self.problem, self._state, target, self._spot_path[k + 1], self._mark_volatility(k + 1), scalar=True
        )
        self._state = outcome.state
        terminated = outcome.state.k == self.problem.schedule.steps
        return self._observation(), float(outcome.reward), terminated, False, _info(self.problem, outcome, self._state)


class HedgingVectorEnv(VectorEnv):
    """``num_envs`` hedging episodes stepped together in numpy (see :class:`HedgingEnv` for the manual).

    All sub-environments run in lock step: episodes have a fixed length, so
    they end together and are reset together (next-step autoreset: the step
    after the last one returns fresh observations with reward 0). Each reset
    draws ``num_envs`` new paths from the market, seeded from ``np_random``.
    Actions have shape ``(num_envs, 1)``; info values are arrays.
    """

    metadata = {"render_modes": [], "autoreset_mode": AutoresetMode.NEXT_STEP}

    def __init__(
        self,
        num_envs: int = 8,
        problem: HedgingProblem | None = None,
        market: PathGenerator | None = None,
        paths: MarketPaths | None = None,
    ):
        self._single = HedgingEnv(problem, market, paths)
        self.problem, self.market = self._single.problem, self._single.market
        self.num_envs = num_envs
        self.single_observation_space = self._single.observation_space
        self.single_action_space = self._single.action_space
        self.observation_space = batch_space(self.single_observation_space, num_envs)
        self.action_space = batch_space(self.single_action_space, num_envs)
        self._state: HedgeState | None = None
        self._ended = False

    def _new_episodes(self) -> None:
        steps = self.problem.schedule.steps
        if isinstance(self.market, GivenPaths):
            rows = self.np_random.integers(self.market.paths.n_paths, size=self.num_envs)
            paths = MarketPaths(self.market.paths.spot[rows], {k: v[rows] for k, v in self.market.paths.factors.items()})
        else:
            seed = int(self.np_random.integers(2**63))
            paths = self.market.generate(self.num_envs, steps, self.problem.dt_years, seed)
        self._spot = np.ascontiguousarray(paths.spot.T)
        self._factors = {name: np.ascontiguousarray(v.T) for name, v in paths.factors.items()}
        self._state = initial_state(self.problem, self._spot[0], self._mark_volatility(0))
        self._ended = False

    def _mark_volatility(self, k: int):
        values = self._factors.get(self.problem.mark_factor)
        return None if values is None else values[k]

    def _observation(self) -> np.ndarray:
        k = self._state.k
        factors = [self._factors[f][k] for f in self.market.observed_factors]
        return observe(self.problem, self._state, factors, dtype=np.float32)

    def reset(self, *, seed: int | None = None, options: dict | None = None):
        super().reset(seed=seed)
        self._new_episodes()
        return self._observation(), self._vector_info(None)

    def step(self, actions):
        if self._state is None:
            raise RuntimeError("call reset() before step()")
        n = self.num_envs
        if self._ended:
            self._new_episodes()
            return self._observation(), np.zeros(n), np.zeros(n, bool), np.zeros(n, bool), self._vector_info(None)
        targets = np.asarray(actions, dtype=float).reshape(n) * self.problem.notional_shares
        k = self._state.k
        outcome = hedge_step(self.problem, self._state, targets, self._spot[k + 1], self._mark_volatility(k + 1))
        self._state = outcome.state
        self._ended = outcome.state.k == self.problem.schedule.steps
        terminated = np.full(n, self._ended)
        info = self._vector_info(outcome)
        return self._observation(), np.asarray(outcome.reward, dtype=float), terminated, np.zeros(n, bool), info

    def _vector_info(self, outcome: StepOutcome | None) -> dict[str, np.ndarray]:
        info = _info(self.problem, outcome, self._state)
        return {key: np.broadcast_to(np.asarray(value, dtype=float), (self.num_envs,)).copy() for key, value in info.items()}
