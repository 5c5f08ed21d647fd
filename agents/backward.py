"""Finite-horizon backward fitting of Q functions from offline transitions.

Shared by the fitted-Q agent (any scikit-learn regressor) and the
linear-basis agent (streamed ridge least squares). At decision time k

    Q_k(s, a) = known_part(s, a) + model_k(basis(s, a))

``known_part`` is what is known of the reward without fitting: the cost of
the trade, ``-paid - kappa/2 paid^2`` with ``paid`` the trading and impact
cost of moving from the holding to ``a`` at the current spot (the step's own
cost formulas, ``problem.frictions``), and the leading one-step risk of the
gap from the hedge, ``-kappa/2 ((a - hedge) N S)^2 m2(s)`` (m2 the second
moment of the next return, below). The model learns the rest: the
market's part of the reward and the value of what follows,
``r - known_part + max_a' Q_{k+1}(s', a')``, fitted backward from the last
decision to the first (one regression per decision time).

Two control variates cut the noise of the regression targets without
changing their expectation given the state. The hedge gain ``a (S' - S)``
carries the market move in full; its surprise ``a (S' - S - S m1)`` (m1 the
mean one-step return) is taken out. The risk term ``-kappa/2 dW^2`` carries
``(a - hedge)^2 (S' - S)^2``; its surprise against ``S^2 m2(s)`` is taken out
too. ``m2(s)`` is the second moment of the next return given what the agent
observes: when it observes the variance (or an implied volatility, squared),
the training paths' least-squares line of R^2 on it (ReturnMoments), so the
gap risk of the known part grows with the variance; else the mean of R^2. (An
unconditional m2 in the control variate would cancel the state dependence of
the gap risk.) The line is used only when the fitted part can follow the
variance too (a basis term or the anchor reads it): see ``_uses_variance``.
m1 comes from the given drift or from the training paths.

Under the exponential objective (``objective.kind = "exponential"``) Q is the certainty
equivalent of the step's P&L and what follows, in money at the horizon: the known part is the
trade's cost and the gap's one-step risk at gamma, and the targets keep their whole noise, which
is the risk being priced; agents.certainty fits them (``_regression_rows`` says what it gets).

The greedy action maximises Q over a candidate set that always holds no
trade, the Black-Scholes hedge, band edges around it
(``hedge +/- band_widths``, in hedge moves: agents.features.hedge_move) and
partial moves toward it.
"""

from __future__ import annotations

import math
from collections.abc import Callable, Iterable
from dataclasses import dataclass, fields

import numpy as np
from sklearn.base import BaseEstimator
from sklearn.utils.validation import check_is_fitted

from agents.baselines import check_center
from agents.dataset import Transitions, replayed_impact, replayed_next_spots
from agents.features import StateFeatures, basis_columns, check_terms, hedge_move, state_features
from agents.policy import Solves
from hedge_env.market import MARK_VOLATILITY_FACTOR
from hedge_env.problem import HedgingProblem

# Band edges around the hedge, in hedge moves (the typical one-step change of the hedge).
DEFAULT_BAND_WIDTHS = (0.035, 0.07, 0.1, 0.14, 0.2, 0.27, 0.35, 0.42, 0.55, 0.7, 0.9, 1.1, 1.4, 1.8, 2.3, 3.0, 4.0)
DEFAULT_PARTIAL_MOVES = (0.25, 0.5, 0.75)
# Rows evaluated at a time: bounds the (rows, candidates) arrays; 1024 keeps them in cache (measured
# 15-25% faster than 2048 and no slower than 512).
ROW_BLOCK = 1024


def candidate_targets(state: StateFeatures, band_widths, partial_moves, limit: float, move: float = 1.0) -> np.ndarray:
    """(n, C) candidate targets per share of notional: no trade, hedge, band edges
    (``band_widths`` x ``move``), partial moves."""
    tied = holding_candidates(state, partial_moves, limit)
    return np.concatenate([tied[:, :1], hedge_candidates(state, band_widths, limit, move), tied[:, 1:]], axis=1)


def hedge_candidates(state: StateFeatures, band_widths, limit: float, move: float = 1.0) -> np.ndarray:
    """The candidates of :func:`candidate_targets` that do not depend on the holding: the hedge and
    the band edges, (n, 1 + 2 W)."""
    hedge = state.hedge[:, None]
    widths = np.asarray(band_widths, dtype=float) * move
    return _clipped(np.concatenate([hedge, hedge - widths, hedge + widths], axis=1), limit)


def holding_candidates(state: StateFeatures, partial_moves, limit: float) -> np.ndarray:
    """The candidates of :func:`candidate_targets` that depend on the holding: no trade and the
    partial moves toward the hedge, (n, 1 + P)."""
    h, hedge = state.holding[:, None], state.hedge[:, None]
    moves = np.asarray(partial_moves, dtype=float)
    return _clipped(np.concatenate([h, h + moves * (hedge - h)], axis=1), limit)


def _clipped(targets: np.ndarray, limit: float) -> np.ndarray:
    if math.isfinite(limit):  # no limit, no pass
        np.clip(targets, -limit, limit, out=targets)
    return targets


# Features that read the holding (the rest of a basis reads the state's market part and the target).
HOLDING_FEATURES = frozenset({"holding", "trade", "abs_trade"})


def known_part(problem: HedgingProblem, state: StateFeatures, targets: np.ndarray,
               second_moment: np.ndarray | float, growth: float = 1.0) -> np.ndarray:
    """What is known of the reward of moving to ``targets`` (n, C): the trade's cost and the
    leading one-step risk of the gap, ``-paid - kappa/2 paid^2 - kappa/2 (gap N S)^2 m2``, with
    ``m2`` the second moment of the next return, one for all rows or one per row.

    Under the exponential objective, the certainty equivalent's counterpart in money at the
    horizon: ``-G (paid + gamma G / 2 (gap N S)^2 m2)``, G the growth of the step's P&L to the
    horizon at the cash rate (``growth``): a sure amount passes through a certainty equivalent
    unchanged, and a normal one-step gap move costs gamma/2 times its variance."""
    frictions, objective = problem.frictions, problem.objective
    notional = problem.notional_shares
    spot = state.spot[:, None]
    # In place on the (n, C) arrays: this runs for every row and candidate of the greedy policy.
    size = np.abs(targets - state.holding[:, None])
    size *= notional
    paid = frictions.trading_cost(size, spot)
    impact = frictions.impact_cost(size, spot)
    if not isinstance(impact, float):
        paid = paid + impact
    gap_risk = targets - state.hedge[:, None]
    gap_risk *= gap_risk
    risk_aversion = objective.form.gap_aversion(objective, growth)
    gap_risk *= (0.5 * risk_aversion * notional * notional) * (spot * spot * np.reshape(second_moment, (-1, 1)))
    return objective.form.known_value(objective, paid, gap_risk, growth)


def check_anchor(problem: HedgingProblem, anchor: str, factor_names: tuple[str, ...]) -> None:
    """An anchor other than the Black-Scholes delta is a hedge at the mark model's Greeks: the problem
    must give them, and the agent must see the model's state where it has one."""
    check_center(problem, anchor, "anchor")
    if anchor != "delta" and problem.mark_state_column is not None and problem.mark_factor not in factor_names:
        raise ValueError(f"anchor {anchor!r} reads the {problem.mark_factor}: the agent must observe it (not blind)")


def decision_index(problem: HedgingProblem, obs: np.ndarray) -> np.ndarray:
    """Decision time index k of each observation row."""
    days = problem.days_from_years_to_horizon(obs[:, 1])
    k = np.rint(days / problem.schedule.step_days).astype(int)
    return np.clip(k, 0, problem.schedule.steps - 1)


TransitionSource = Transitions | Callable[[], Iterable[Transitions]]


def _chunks(data: TransitionSource) -> Iterable[Transitions]:
    return [data] if isinstance(data, Transitions) else data()


# Observed factors that carry the instant's variance, and the power that makes them one: the
# Heston variance itself, or a mark (implied) volatility squared.
VARIANCE_FACTORS = {"variance": 1, MARK_VOLATILITY_FACTOR: 2}


def variance_factor(factor_names) -> tuple[int, int] | None:
    """(column among the factors, power) of the first observed factor that gives the variance, or None."""
    for j, name in enumerate(factor_names):
        if name in VARIANCE_FACTORS:
            return j, VARIANCE_FACTORS[name]
    return None


@dataclass(frozen=True)
class ReturnMoments:
    """Sums over the one-step simple returns R of training paths and the observed variance x at
    each step's start (0 when none is observed): enough for the mean return, and for the
    least-squares line of R^2 on x, the conditional second moment of the move."""

    count: int = 0
    r: float = 0.0
    r2: float = 0.0
    x: float = 0.0
    xx: float = 0.0
    xr2: float = 0.0

    def __add__(self, other: ReturnMoments) -> ReturnMoments:
        return ReturnMoments(*(getattr(self, f.name) + getattr(other, f.name) for f in fields(self)))

    def second_moment_line(self) -> tuple[float, float, float]:
        """(mean R^2, mean x, slope of R^2 on x): E[R^2 | x] ~ mean R^2 + slope (x - mean x)."""
        n = self.count
        mean_x, mean_r2 = self.x / n, self.r2 / n
        spread = self.xx / n - mean_x * mean_x
        # A factor that does not move (or none observed) leaves the unconditional moment.
        slope = (self.xr2 / n - mean_x * mean_r2) / spread if spread > 1e-12 * max(self.xx / n, 1e-300) else 0.0
        return mean_r2, mean_x, slope


def return_moment_sums(chunk: Transitions, problem: HedgingProblem, factor_names=()) -> ReturnMoments:
    """:class:`ReturnMoments` of a chunk's market (without the behaviour's own impact, under
    permanent impact), with the variance of the factors named ``factor_names`` (the observation's
    columns after the holding)."""
    simple = chunk.next_obs[..., 0] / chunk.obs[..., 0]
    if problem.frictions.permanent_impact:
        simple = simple / np.stack([replayed_impact(problem, chunk, k)[:, 0] for k in range(chunk.steps)])
    simple = simple - 1.0
    square = simple * simple
    column = variance_factor(factor_names)
    x = np.zeros_like(simple) if column is None else chunk.obs[..., 3 + column[0]] ** column[1]
    return ReturnMoments(simple.size, float(simple.sum()), float(square.sum()), float(x.sum()),
                         float((x * x).sum()), float((x * square).sum()))


class BackwardQAgent(Solves, BaseEstimator):
    """Base of the batch agents; subclasses say how one decision time's regression is fitted.

    Subclasses implement ``_start_step(k)``, ``_add(k, X, y)`` (rows of the
    design and targets, chunk by chunk), ``_finish_step(k)`` and
    ``_predict(k, X)`` for an array of shape (..., n_basis).
    """

    def __init__(self, problem: HedgingProblem, basis, band_widths, partial_moves, factor_names, drift, anchor,
                 name):
        # The parameters every backward agent has, stored unchanged (scikit-learn's convention); a
        # subclass's __init__ names them with its own defaults and adds its own.
        self.problem = problem
        self.basis = basis
        self.band_widths = band_widths
        self.partial_moves = partial_moves
        self.factor_names = factor_names
        self.drift = drift
        self.anchor = anchor
        self.name = name

    @property
    def terms(self) -> tuple[str, ...]:
        return tuple(self.basis)

    # -- fitting ------------------------------------------------------------------------------
    def fit(self, data: TransitionSource, progress: Callable[[int], None] | None = None):
        """Fit from transitions: a Transitions block, or a callable returning an iterable of blocks
        (called once per decision time, so the data may be streamed from paths)."""
        steps = self.problem.schedule.steps
        self._begin_fit([return_moment_sums(chunk, self.problem, tuple(self.factor_names)) for chunk in _chunks(data)])
        for k in reversed(range(steps)):
            self._start_step(k)
            for chunk in _chunks(data):
                if chunk.steps != steps:
                    raise ValueError(f"transitions have {chunk.steps} steps, the schedule has {steps}")
                X, y = self._regression_rows(chunk, k)
                self._add(k, X, y)
            self._finish_step(k)
            if progress is not None:
                progress(1)
        return self

    def _setup(self) -> None:
        """Reset learned state before a fit."""

    def _begin_fit(self, moment_sums) -> None:
        """Reset learned state and set the return moments from each chunk's
        :func:`return_moment_sums` (summed in chunk order)."""
        self.move_ = hedge_move(self.problem)
        check_anchor(self.problem, self.anchor, tuple(self.factor_names))
        check_terms(self._fitted_terms(), tuple(self.factor_names))
        self._setup()
        moments = sum(moment_sums, ReturnMoments())
        self.mean_squared_return_, self.mean_variance_, self.variance_slope_ = moments.second_moment_line()
        if not self._uses_variance():
            self.variance_slope_ = 0.0
        mean_return = moments.r / moments.count
        self.drift_ = np.log1p(mean_return) / self.problem.dt_years if self.drift is None else float(self.drift)

    def _uses_variance(self) -> bool:
        """Whether the fitted part can follow the observed variance: a basis term or the anchor reads it.
        Else the known part keeps the mean second moment: a gap risk that grows with the variance
        around a best target that cannot move with it puts that target in the wrong place (measured
        on configs/heston.toml: 71 against 84 for the blind agent, over the minimum-variance delta)."""
        column = variance_factor(self.factor_names)
        if column is None:
            return False
        name = self.factor_names[column[0]]
        in_terms = any(factor.partition("^")[0] == name
                       for term in self._fitted_terms() for factor in term.split("*"))
        return in_terms or (self.anchor != "delta" and name == self.problem.mark_factor)

    def second_moment(self, state: StateFeatures) -> np.ndarray | float:
        """E[R^2 | s] of the next simple return R: the training paths' line in the observed
        variance (agents.backward.ReturnMoments), per row; the mean when no variance is observed."""
        column = variance_factor(self.factor_names)
        if column is None or not self.variance_slope_:
            return self.mean_squared_return_
        x = state.values[self.factor_names[column[0]]] ** column[1]
        # Floored: the line is fitted, and a variance far outside the training range must not make it negative.
        return np.maximum(self.mean_squared_return_ + self.variance_slope_ * (x - self.mean_variance_), 0.0)

    def _regression_rows(self, chunk: Transitions, k: int) -> tuple[np.ndarray, np.ndarray]:
        """Design, term-major of shape (n_terms, n, M), and targets (n, M) of step k: one row per
        state and tried action.

        Under the exponential objective the targets are (5, n, M), in money at the horizon (a step's
        P&L grown by G at the cash rate): ``Y = G dW + V_{k+1}(s') - known``, whose certainty
        equivalent given (s, a) is ``Q_k(s, a) - known(s, a)``, with no control variate taken out (a
        term of zero mean changes a certainty equivalent); the hedge gain's surprise ``G gap N (S' -
        S - S m1)`` and the gap's squared surprise ``G^2 (gap N)^2 ((S' - S)^2 - S^2 m2)`` against the
        anchor; and the return's surprises ``R - m1`` and ``R^2 - m2``: what agents.certainty needs.
        With a cash rate the interest that the behaviour path's past P&L earns is in dW, the same for
        every tried target of a state."""
        problem = self.problem
        state = state_features(problem, chunk.obs[k], self.factor_names, self.anchor)
        targets = chunk.actions[k]
        X = self._design(state, targets)
        second_moment = self.second_moment(state)
        notional = problem.notional_shares
        gap_shares = (targets - state.hedge[:, None]) * notional
        move_surprise, square_surprise, next_moneyness = self._surprises(chunk, k, state, second_moment)
        if problem.objective.certainty_equivalent:
            growth = problem.horizon_growth(k)
            y = chunk.rewards[k] * growth - known_part(problem, state, targets, second_moment, growth)
            hedge_surprise = growth * (gap_shares * move_surprise)
            square_gap_surprise = (growth * growth) * (gap_shares * gap_shares * square_surprise)
        else:
            y = chunk.rewards[k] - known_part(problem, state, targets, second_moment)
            y = y - targets * (notional * move_surprise)
            y = y + (0.5 * problem.objective.risk_aversion) * gap_shares * gap_shares * square_surprise
        if not chunk.done(k):
            y = y + self._next_values(chunk, k, next_moneyness)
        if problem.objective.certainty_equivalent:
            spot = state.spot[:, None]
            return X, np.stack(np.broadcast_arrays(y, hedge_surprise, square_gap_surprise, move_surprise / spot,
                                                   square_surprise / (spot * spot)))
        return X, y

    def _surprises(self, chunk: Transitions, k: int, state: StateFeatures, second_moment):
        """The market move's surprises at step k, broadcast to (n, M): ``S' - S - S m1`` and
        ``(S' - S)^2 - S^2 m2(s)`` (zero mean given the state), and the next moneyness of each tried
        target where targets move the market (else None)."""
        problem = self.problem
        spot = state.spot
        factors = replayed_impact(problem, chunk, k)
        growth = np.expm1(self.drift_ * problem.dt_years)
        if factors is None:
            # Every tried target sees the same market move.
            move = chunk.next_obs[k, :, 0] * problem.reference_spot - spot
            move_surprise = (move - spot * growth)[:, None]
            square_surprise = (move * move - spot * spot * second_moment)[:, None]
            return move_surprise, square_surprise, None
        # Each target moved the market by its own factor f: E[S' | s, a] = S f (1 + m1) and
        # E[(S' - S)^2 | s, a] = S^2 (f^2 E[R^2] - 2 f (1 + m1) + 1), R the market's return.
        next_spots = replayed_next_spots(problem, chunk, k, factors)
        move = next_spots - spot[:, None]
        move_surprise = move - spot[:, None] * (factors * (1.0 + growth) - 1.0)
        second = np.reshape(second_moment, (-1, 1)) + (2.0 * growth + 1.0)
        square_surprise = move * move - (spot * spot)[:, None] * (
            factors * factors * second - 2.0 * factors * (1.0 + growth) + 1.0)
        return move_surprise, square_surprise, next_spots / problem.reference_spot

    def _fitted_terms(self) -> tuple[str, ...]:
        """Every term the fitted part reads."""
        return self.terms

    def _design(self, state: StateFeatures, targets: np.ndarray):
        """The regression's design for candidate ``targets`` (n, M): the basis, term-major."""
        return basis_columns(self.terms, state, targets)

    # -- using the fitted Q ------------------------------------------------------------------
    def _known(self, state: StateFeatures, targets: np.ndarray, growth: float = 1.0) -> np.ndarray:
        return known_part(self.problem, state, targets, self.second_moment(state), growth)

    def _q(self, k: int, state: StateFeatures, targets: np.ndarray) -> np.ndarray:
        return self._known(state, targets, self.problem.horizon_growth(k)) + self._predict(k, state, targets)

    def _limit(self) -> float:
        return self.problem.frictions.position_limit_shares / self.problem.notional_shares

    def _best(self, obs: np.ndarray, k: int) -> tuple[np.ndarray, np.ndarray]:
        """Greedy targets and their Q values for rows all at decision time k."""
        targets_out = np.empty(len(obs))
        values_out = np.empty(len(obs))
        # State features once for all rows (numpy call overhead is per call); the (rows, candidates)
        # work in blocks that stay in cache.
        features = state_features(self.problem, obs, self.factor_names, self.anchor)
        for start in range(0, len(obs), ROW_BLOCK):
            rows = slice(start, start + ROW_BLOCK)
            state = features.rows(rows) if len(obs) > ROW_BLOCK else features
            targets = candidate_targets(state, self.band_widths, self.partial_moves, self._limit(), self.move_)
            q = self._q(k, state, targets)
            best = np.argmax(q, axis=1)
            pick = np.arange(len(best))
            targets_out[rows] = targets[pick, best]
            values_out[rows] = q[pick, best]
        return targets_out, values_out

    def _next_values(self, chunk: Transitions, k: int, next_moneyness: np.ndarray | None) -> np.ndarray:
        """max_a Q_{k+1} at the next state of each tried target of step k, (n, M). Without impact the
        M next states of a state differ only in the holding, so a fit that ignores the holding
        predicts its holding-free candidates once per state (:meth:`value_at_holdings`)."""
        if next_moneyness is None and not self._reads_holding():
            return self.value_at_holdings(chunk.next_obs[k], chunk.next_holding[k], k + 1)
        return self.value(chunk.next_observations(k, next_moneyness), k + 1).reshape(chunk.next_holding[k].shape)

    def _reads_holding(self) -> bool:
        """Whether any fitted term reads the holding (``HOLDING_FEATURES``)."""
        return any(factor.partition("^")[0] in HOLDING_FEATURES
                   for term in self._fitted_terms() for factor in term.split("*"))

    def value_at_holdings(self, obs: np.ndarray, holdings: np.ndarray, k: int) -> np.ndarray:
        """:meth:`value` of each row of ``obs`` (n,) at each of its ``holdings`` (n, M), the same
        numbers to the bit, for a fit whose terms ignore the holding: the state's features and the
        predictions of :func:`hedge_candidates` are computed once per row, and only the trade's known
        part and the :func:`holding_candidates` once per holding."""
        problem, limit = self.problem, self._limit()
        growth = problem.horizon_growth(k)
        features = state_features(problem, np.asarray(obs, dtype=float), self.factor_names, self.anchor)
        values = np.empty(holdings.shape)
        for start in range(0, len(obs), ROW_BLOCK):
            rows = slice(start, start + ROW_BLOCK)
            state = features.rows(rows)
            free = hedge_candidates(state, self.band_widths, limit, self.move_)
            free_predicted = self._predict(k, state, free)
            for j in range(holdings.shape[1]):
                held = state.with_holding(holdings[rows, j], problem.notional_shares)
                tied = holding_candidates(held, self.partial_moves, limit)
                best_free = (self._known(held, free, growth) + free_predicted).max(axis=1)
                values[rows, j] = np.maximum(best_free, self._q(k, held, tied).max(axis=1))
        return values

    def value(self, obs: np.ndarray, k: int) -> np.ndarray:
        """max_a Q_k(s, a) of rows at decision time k (up to a function of the state alone when
        fitted within states: differences between holdings at the same spot are what count)."""
        return self._best(np.asarray(obs, dtype=float), k)[1]

    def act(self, obs: np.ndarray) -> np.ndarray:
        """Greedy target holdings per share of notional (Policy protocol); NotFittedError before ``fit``."""
        check_is_fitted(self)
        obs = np.asarray(obs, dtype=float)
        k = decision_index(self.problem, obs)
        if (k == k[0]).all():
            return self._best(obs, int(k[0]))[0]
        targets = np.empty(len(obs))
        for step in np.unique(k):
            rows = k == step
            targets[rows] = self._best(obs[rows], int(step))[0]
        return targets
