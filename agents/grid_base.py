"""What the grid optima share: the backward fit loop, the cached Q tables, ``value`` and pickling.

A grid optimum (agents.grid_dp for GBM, agents.grid_heston for Heston) supplies its grids and
arrays (``_prepare``), one step of backward induction (``_induct_step``), the Q table of a
decision time (``_make_q_table``) and its greedy read (``_best``: targets and values of
observation rows); the base runs the induction from the horizon back, keeps each time's table once
built, and reports values as money under the problem's objective.
"""

from __future__ import annotations

import numpy as np
from sklearn.base import BaseEstimator

from agents.policy import Solves


class GridOptimum(Solves, BaseEstimator):
    """Base of the grid optima (see the module's text). Both objective kinds are solved: the
    per-step mean-variance objective, or exponential utility of the wealth at the horizon, as the
    problem's objective says."""

    label = "grid optimum"  # what reports call the kind

    def fit(self, paths=None):
        """Backward induction over the grid; ``paths`` is ignored (the agent is model-based)."""
        self._prepare()
        value_next = None
        for k in reversed(range(self.problem.schedule.steps)):
            self._induct_step(k, value_next)
            value_next = self.value_[k]
        return self

    def value(self, obs) -> np.ndarray:
        """``V_k`` at observation rows, currency: the optimal expected sum of rewards from their state
        on; under exponential utility the certainty equivalent of the wealth at the horizon."""
        objective = self.problem.objective
        return objective.form.value_in_money(objective, self._best(obs)[1])

    def _q_table(self, k: int):
        """The Q table of decision time ``k`` (``_make_q_table``), kept once built (a rollout asks for
        every time once per chunk of paths; not pickled)."""
        cache = self.__dict__.setdefault("_q_tables", {})
        if k not in cache:
            cache[k] = self._make_q_table(k)
        return cache[k]

    def __getstate__(self):
        state = dict(super().__getstate__())
        state.pop("_q_tables", None)  # a cache, rebuilt on use
        return state

    # What each grid supplies.
    def _prepare(self) -> None:
        raise NotImplementedError

    def _induct_step(self, k: int, value_next) -> None:
        raise NotImplementedError

    def _make_q_table(self, k: int):
        raise NotImplementedError

    def _best(self, obs) -> tuple[np.ndarray, np.ndarray]:
        raise NotImplementedError
