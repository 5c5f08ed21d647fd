"""Fitted Q iteration over any scikit-learn regressor, finite horizon, one regression per decision time.

One regression per decision time (rather than one pooled model with time as
a feature) follows the backward structure exactly: each fit sees targets
from an already-fitted later step, so a single backward sweep is the whole
fit, while a pooled model needs repeated sweeps to the horizon and spends
capacity on the time dimension (benchmarks/agents.py shows the comparison).
"""

from __future__ import annotations

import numpy as np
from sklearn.base import clone
from sklearn.ensemble import HistGradientBoostingRegressor

from agents.backward import DEFAULT_PARTIAL_MOVES, BackwardQAgent
from agents.features import TREE_BASIS, basis, check_terms
from hedge_env.problem import HedgingProblem

# Fewer band edges than the linear agent: every candidate costs a tree-ensemble prediction.
TREE_BAND_WIDTHS = (0.005, 0.01, 0.015, 0.02, 0.03, 0.04, 0.055, 0.075, 0.1, 0.14, 0.2)


def default_regressor() -> HistGradientBoostingRegressor:
    return HistGradientBoostingRegressor(max_iter=150, learning_rate=0.1, max_leaf_nodes=31,
                                         min_samples_leaf=40, random_state=0)


class FittedQAgent(BackwardQAgent):
    """Q_k(s, a) = known cost part + regressor_k(basis(s, a)).

    Parameters
    ----------
    problem : HedgingProblem
    regressor : scikit-learn regressor, optional
        Cloned for every decision time; default a histogram gradient-boosted tree ensemble.
    basis : tuple of str
        Columns given to the regressor (see agents.features); default ``TREE_BASIS``.
    band_widths, partial_moves : tuple of float
        Candidate targets besides no trade and the hedge (per share of notional).
    factor_names : tuple of str
        Observable market factors appended to the observation, in order.
    drift : float, optional
        Annual drift of the underlying for the hedge-gain control variate; None
        estimates it from the training paths.
    name : str
    """

    def __init__(self, problem: HedgingProblem, regressor=None, basis=TREE_BASIS,
                 band_widths=TREE_BAND_WIDTHS, partial_moves=DEFAULT_PARTIAL_MOVES, factor_names=(),
                 drift: float | None = None, name: str = "fitted_q"):
        self.problem = problem
        self.regressor = regressor
        self.basis = basis
        self.band_widths = band_widths
        self.partial_moves = partial_moves
        self.factor_names = factor_names
        self.drift = drift
        self.name = name

    @property
    def terms(self) -> tuple[str, ...]:
        return tuple(self.basis)

    def _setup(self) -> None:
        check_terms(self.terms, tuple(self.factor_names))
        self.regressors_: list = [None] * self.problem.schedule.steps
        self._rows: list[tuple[np.ndarray, np.ndarray]] = []

    def _start_step(self, k: int) -> None:
        self._rows = []

    def _add(self, k: int, X: np.ndarray, y: np.ndarray) -> None:
        self._rows.append((X, y))

    def _finish_step(self, k: int) -> None:
        X = np.concatenate([x for x, _ in self._rows], axis=1).T
        y = np.concatenate([t for _, t in self._rows])
        self._rows = []
        base = default_regressor() if self.regressor is None else self.regressor
        self.regressors_[k] = clone(base).fit(X, y)

    def _predict(self, k: int, state, targets: np.ndarray) -> np.ndarray:
        X = basis(self.terms, state, targets)
        return self.regressors_[k].predict(X.reshape(-1, X.shape[-1])).reshape(targets.shape)
