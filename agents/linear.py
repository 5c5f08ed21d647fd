"""Linear-basis batch agent: ridge least squares on a basis of state and action, backward in time.

The regression of each decision time is solved from its normal equations,
``X'X`` and ``X'y``, accumulated chunk by chunk: memory does not grow with
the number of paths, and statistics from several workers (each with its own
paths and the same later-step coefficients) are summed before the solve.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from agents.backward import DEFAULT_BAND_WIDTHS, DEFAULT_PARTIAL_MOVES, BackwardQAgent, return_moment_sums
from agents.certainty import StepRows, certainty_equivalent_fit
from agents.dataset import Transitions
from agents.features import combination, fitted_basis
from hedge_env.problem import HedgingProblem


@dataclass
class NormalEquations:
    """Sufficient statistics of a least-squares fit: X'X, X'y, y'y and the row count."""

    xtx: np.ndarray
    xty: np.ndarray
    yty: float = 0.0
    rows: int = 0

    @classmethod
    def empty(cls, n_terms: int) -> NormalEquations:
        return cls(np.zeros((n_terms, n_terms)), np.zeros(n_terms))

    @classmethod
    def of(cls, X: np.ndarray, y: np.ndarray) -> NormalEquations:
        """Statistics of a term-major design ``X`` (n_terms, rows) and targets ``y`` (rows,)."""
        return cls(X @ X.T, X @ y, float(y @ y), len(y))

    def __add__(self, other: NormalEquations) -> NormalEquations:
        return NormalEquations(self.xtx + other.xtx, self.xty + other.xty, self.yty + other.yty,
                               self.rows + other.rows)

    def solve(self, ridge: float, prior: np.ndarray | None = None, prior_weight: float = 0.0) -> np.ndarray:
        """Ridge solution, shrunk toward ``prior`` with weight ``prior_weight`` (both penalties
        scaled to each column's sum of squares, so they are free of the columns' units)."""
        # Floored against the largest column: a column that is zero up to rounding (a moneyness term
        # at the first decision, where every training state sits at the start spot) must be shrunk to
        # nothing, not scaled up to a coefficient of 1e13 that explodes off that spot.
        diagonal = np.diag(self.xtx)
        largest = diagonal.max(initial=0.0)
        scale = np.maximum(diagonal, 1e-12 * largest) if largest > 0 else np.ones_like(diagonal)
        lhs = self.xtx + (ridge + prior_weight) * np.diag(scale)
        rhs = self.xty if prior is None or not prior_weight else self.xty + prior_weight * scale * prior
        try:
            return np.linalg.solve(lhs, rhs)
        except np.linalg.LinAlgError:
            # With no penalty (ridge 0) a basis whose columns coincide on the training states is
            # singular: the least-squares fit is then not unique, and its minimum-norm one is taken.
            return np.linalg.lstsq(lhs, rhs, rcond=None)[0]


class LinearBasisAgent(BackwardQAgent):
    """Q_k(s, a) = known cost part + theta_k . basis(s, a), theta_k by ridge least squares.

    Under the exponential objective theta_k comes from the certainty-equivalent recursion
    instead (agents.certainty: mean and variance by least squares within states, with control
    variates, and the value's level across states on the ``level_basis`` terms added to the
    basis); ``smoothing`` is not used there.

    Parameters
    ----------
    problem : HedgingProblem
    basis : tuple of str, optional
        Basis terms (see agents.features); default ``POLYNOMIAL_BASIS`` and, per
        observed factor, its ``FACTOR_TERMS`` (agents.features.polynomial_basis).
        The exponential objective adds the ``level_basis`` terms the basis lacks.
    ridge : float
        Ridge penalty relative to each column's sum of squares.
    smoothing : float
        Shrinkage of each decision time's coefficients toward the next one's,
        relative to the data's weight: pools information across neighbouring
        times (0: independent regressions).
    band_widths, partial_moves : tuple of float
        Candidate targets besides no trade and the hedge: hedge +/- width, and
        holding + fraction x (hedge - holding). Per share of notional.
    factor_names : tuple of str
        Observable market factors appended to the observation, in order.
    drift : float, optional
        Annual drift of the underlying for the hedge-gain control variate; None
        estimates it from the training paths.
    anchor : str
        The hedge the gap and the candidate targets are measured from:
        ``delta`` (Black-Scholes at the mark volatility; the model's delta under
        Merton marks), ``model_delta`` or ``minimum_variance_delta``.
    name : str
    """

    label = "linear agent"  # what reports call the kind

    def __init__(self, problem: HedgingProblem, basis=None, ridge: float = 1e-6, smoothing: float = 0.0,
                 band_widths=DEFAULT_BAND_WIDTHS, partial_moves=DEFAULT_PARTIAL_MOVES, factor_names=(),
                 drift: float | None = None, anchor: str = "delta", name: str = "linear"):
        super().__init__(problem, basis, band_widths, partial_moves, factor_names, drift, anchor, name)
        self.ridge = ridge
        self.smoothing = smoothing

    @property
    def terms(self) -> tuple[str, ...]:
        return fitted_basis(self.basis, tuple(self.factor_names), self.problem.objective.certainty_equivalent)

    def _setup(self) -> None:
        self.coef_ = np.zeros((self.problem.schedule.steps, len(self.terms)))
        self.statistics_: dict[int, NormalEquations | StepRows | None] = {}

    def _start_step(self, k: int) -> None:
        exponential = self.problem.objective.certainty_equivalent
        self.statistics_[k] = StepRows() if exponential else NormalEquations.empty(len(self.terms))

    def _add(self, k: int, X: np.ndarray, y: np.ndarray) -> None:
        self.statistics_[k] = self.statistics_[k] + self._statistics(X, y)

    def _statistics(self, X: np.ndarray, y: np.ndarray) -> NormalEquations | StepRows:
        return StepRows.of(X, y) if self.problem.objective.certainty_equivalent else within_state(X, y)

    def _finish_step(self, k: int) -> None:
        statistics = self.statistics_[k]
        if isinstance(statistics, StepRows):
            self.coef_[k] = certainty_equivalent_fit(statistics, self.problem.objective.risk_aversion, self.ridge,
                                                     self.terms)[0]
            self.statistics_[k] = None  # the rows are large; the coefficients are what is kept
            return
        later = k + 1 < self.problem.schedule.steps
        prior = self.coef_[k + 1] if later else None
        self.coef_[k] = statistics.solve(self.ridge, prior, self.smoothing if later else 0.0)

    def _predict(self, k: int, state, targets: np.ndarray) -> np.ndarray:
        return combination(self.terms, self.coef_[k], state, targets)

    def step_statistics(self, transitions: Transitions, k: int) -> NormalEquations | StepRows:
        """Normal equations of decision time k from one block of transitions, using the fitted
        coefficients of later times: what one worker contributes before the sum and the solve
        (under the exponential objective the rows themselves)."""
        return self._statistics(*self._regression_rows(transitions, k))

    def fit_map(self, map_chunks, progress=None):
        """The fit of :meth:`fit` with each chunk's work done where the chunk is held.

        ``map_chunks(function, *args)`` applies ``function(chunk, *args)`` to every
        chunk of transitions (in this process, joblib workers or a dask cluster: the
        application decides) and returns the results in chunk order. Per decision time,
        from the last, each chunk's normal equations are computed with the
        coefficients fitted so far, summed in chunk order and solved: the numbers
        of :meth:`fit` streaming the same chunks.
        """
        self._begin_fit(map_chunks(return_moment_sums, self.problem, tuple(self.factor_names)))
        for k in reversed(range(self.problem.schedule.steps)):
            self._start_step(k)
            for statistics in map_chunks(chunk_statistics, self, k):
                self.statistics_[k] = self.statistics_[k] + statistics
            self._finish_step(k)
            if progress is not None:
                progress(1)
        return self


def chunk_statistics(chunk: Transitions, agent: LinearBasisAgent, k: int) -> NormalEquations:
    """``agent.step_statistics(chunk, k)``, as a function of the chunk first (for a map over chunks)."""
    if chunk.steps != agent.problem.schedule.steps:
        raise ValueError(f"transitions have {chunk.steps} steps, the schedule has {agent.problem.schedule.steps}")
    return agent.step_statistics(chunk, k)


def within_state(X: np.ndarray, y: np.ndarray) -> NormalEquations:
    """Normal equations of the fixed-effects regression: design (terms, n, M) and targets (n, M)
    centred on each state's mean, so terms of the state alone carry nothing."""
    X = X - X.mean(axis=2, keepdims=True)
    y = y - y.mean(axis=1, keepdims=True)
    return NormalEquations.of(X.reshape(len(X), -1), y.reshape(-1))
