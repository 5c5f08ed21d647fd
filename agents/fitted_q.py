"""Fitted Q iteration over any scikit-learn regressor, finite horizon, one regression per decision time.

A tree ensemble costs microseconds per prediction, and the fit and the
greedy policy need a prediction per state and candidate. When the basis
uses only quantities that are functions of moneyness and the gap at a
fixed decision time (the default), each fitted regression is tabulated once
on a moneyness x gap grid and read by bilinear interpolation: the
regressors stay what was fitted, the table is how they are evaluated.

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
from agents.certainty import StepRows, certainty_equivalent_fit
from agents.features import (
    HATS,
    TREE_BASIS,
    TREE_BASIS_STATE_ANCHOR,
    basis,
    basis_columns,
    combination,
    fitted_basis,
    state_features,
)
from agents.linear import NormalEquations, within_state
from hedge_env.problem import HedgingProblem

# Fewer band edges than the linear agent: every candidate costs a tree-ensemble prediction.
TREE_BAND_WIDTHS = (0.07, 0.14, 0.2, 0.27, 0.42, 0.55, 0.75, 1.0, 1.4, 1.9, 2.7)


# Features that, at a fixed decision time, are functions of moneyness and the gap alone.
TABULABLE = {"moneyness", "years_left", "hedge", "gamma", "target", "gap", "abs_gap", "abs_target", *HATS}
TABLE_MONEYNESS_POINTS = 121
TABLE_GAPS = np.linspace(-6.0, 6.0, 181)  # in hedge moves


def default_regressor() -> HistGradientBoostingRegressor:
    return HistGradientBoostingRegressor(max_iter=80, learning_rate=0.15, max_leaf_nodes=15,
                                         early_stopping=False, random_state=0)


def _bilinear(table: np.ndarray, x_grid: np.ndarray, y_grid: np.ndarray, x: np.ndarray, y: np.ndarray,
              cells: np.ndarray | None = None):
    """Interpolate ``table[x_grid, y_grid]`` (uniform grids) at x (n,) and y (n, C), clamped to the grid.

    ``cells`` is :func:`_cell_coefficients` of ``table`` when the caller keeps it.
    """
    nx, ny = table.shape
    if cells is None:
        cells = _cell_coefficients(table)
    fx = np.clip((x - x_grid[0]) / (x_grid[1] - x_grid[0]), 0.0, nx - 1.000001)
    fy = (y - y_grid[0]) / (y_grid[1] - y_grid[0])
    np.clip(fy, 0.0, ny - 1.000001, out=fy)
    ix, iy = fx.astype(np.intp), fy.astype(np.intp)
    wx = (fx - ix)[:, None]
    fy -= iy  # the weight in y
    iy += (ix * (ny - 1))[:, None]  # the cell's flat index
    c = cells[iy]  # (n, C, 4): one read per candidate
    value = c[..., 3] * fy
    value += c[..., 2]
    value *= wx
    value += c[..., 0]
    value += c[..., 1] * fy
    return value


def _cell_coefficients(table: np.ndarray) -> np.ndarray:
    """Per grid cell, flat (cells, 4): ``a, b, c, d`` with the bilinear value ``a + b wy + wx (c + d wy)``."""
    a = table[:-1, :-1]
    along_y = table[:-1, 1:] - a
    along_x = table[1:, :-1] - a
    twist = table[1:, 1:] - table[1:, :-1] - along_y
    return np.ascontiguousarray(np.stack([a, along_y, along_x, twist], axis=-1).reshape(-1, 4))


class FittedQAgent(BackwardQAgent):
    """Q_k(s, a) = known cost part + theta_k . linear_basis(s, a) + regressor_k(basis(s, a)).

    With ``linear_basis`` (the default) each decision time's fit is in two stages on the same
    backward targets: ridge least squares on the linear agent's basis first (within states, as
    agents.linear fits it), then the regressor on what that leaves (residual boosting). The linear
    stage carries the smooth shape of Q in the gap; the trees the kinks and interactions it misses.
    ``linear_basis=None`` fits the regressor alone.

    Under the exponential objective the linear stage is the linear agent's certainty-equivalent
    fit (agents.certainty, with the ``level_basis`` terms added: it carries the value's level),
    and the regressor fits, within states, what it leaves of each row's certainty-equivalent
    target; a linear stage is then required.

    Parameters
    ----------
    problem : HedgingProblem
    regressor : scikit-learn regressor, optional
        Cloned for every decision time; default a histogram gradient-boosted tree ensemble.
    basis : tuple of str
        Columns given to the regressor (see agents.features); default ``TREE_BASIS``, or
        ``TREE_BASIS_STATE_ANCHOR`` when the anchor reads the market state (Heston).
    band_widths, partial_moves, factor_names, drift, anchor
        As in :class:`agents.linear.LinearBasisAgent` (the candidate band widths default to the
        trees' own, ``TREE_BAND_WIDTHS``).
    linear_basis : tuple of str, "polynomial", "none" or None
        Terms of the first, linear stage; "polynomial": the linear agent's default
        basis (agents.features.polynomial_basis of the observed factors); "none" or None: none.
    ridge : float
        Ridge penalty of the linear stage, relative to each column's sum of squares.
    max_rows_per_step : int
        Regression rows kept per decision time: beyond it every r-th training
        state is kept (with all its replayed targets), so memory stays bounded
        at any path count while the other agents use every path.
    name : str
    """

    label = "fitted-Q agent"  # what reports call the kind

    def __init__(self, problem: HedgingProblem, regressor=None, basis=None,
                 band_widths=TREE_BAND_WIDTHS, partial_moves=DEFAULT_PARTIAL_MOVES, factor_names=(),
                 drift: float | None = None, max_rows_per_step: int = 2_000_000, anchor: str = "delta",
                 linear_basis="polynomial", ridge: float = 1e-6, name: str = "fitted_q"):
        super().__init__(problem, basis, band_widths, partial_moves, factor_names, drift, anchor, name)
        self.regressor = regressor
        self.max_rows_per_step = max_rows_per_step
        self.linear_basis = linear_basis
        self.ridge = ridge

    @property
    def terms(self) -> tuple[str, ...]:
        if self.basis is not None:
            return tuple(self.basis)
        return TREE_BASIS_STATE_ANCHOR if self._state_anchor() else TREE_BASIS

    def _state_anchor(self) -> bool:
        """Whether the anchor depends on the mark model's state (a Heston hedge), not on spot and time alone."""
        return self.anchor != "delta" and self.problem.mark_state_column is not None

    @property
    def linear_terms(self) -> tuple[str, ...]:
        """Terms of the linear stage (empty without one)."""
        if self.linear_basis is None or self.linear_basis == "none":
            return ()
        basis = None if self.linear_basis == "polynomial" else self.linear_basis
        return fitted_basis(basis, tuple(self.factor_names), self.problem.objective.certainty_equivalent)

    def _setup(self) -> None:
        steps = self.problem.schedule.steps
        self.regressors_: list = [None] * steps
        # Terms of observed factors (not on the table's moneyness x gap grid) need the regressor itself,
        # and so does an observed mark volatility (the hedge and gamma of a row depend on it); under an
        # anchor at a Heston model's Greeks so do the hedge and the target.
        tabulable_terms = TABULABLE - {"hedge", "target", "abs_target"} if self._state_anchor() else TABULABLE
        tabulable = not self.problem.mark_volatility_observed and all(
            factor.partition("^")[0] in tabulable_terms for term in self.terms for factor in term.split("*"))
        self.tables_: list | None = [None] * steps if tabulable else None
        self.linear_coef_ = np.zeros((steps, len(self.linear_terms)))
        self._rows: list[tuple[np.ndarray, np.ndarray, np.ndarray]] = []

    def _begin_fit(self, moment_sums) -> None:
        if self.problem.objective.certainty_equivalent and not self.linear_terms:
            raise ValueError("fitted Q under the exponential objective needs a linear stage (linear_basis not "
                             "'none'): it carries the value's level across states")
        moment_sums = list(moment_sums)
        super()._begin_fit(moment_sums)
        # Each chunk's return count is its states times the decision times.
        self._states = sum(moments.count for moments in moment_sums) // self.problem.schedule.steps

    def _fitted_terms(self) -> tuple[str, ...]:
        return self.terms + self.linear_terms

    def _design(self, state, targets: np.ndarray):
        """The regressor's columns and the linear stage's terms, each term-major (terms, n, M)."""
        return basis_columns(self.terms, state, targets), basis_columns(self.linear_terms, state, targets)

    def _start_step(self, k: int) -> None:
        self._rows = []
        self._normal = NormalEquations.empty(len(self.linear_terms))
        self._certainty_rows = StepRows()
        self._seen = 0
        self._moneyness_range = (np.inf, -np.inf)

    def _regression_rows(self, chunk, k):
        moneyness = np.log(chunk.obs[k, :, 0])
        low, high = self._moneyness_range
        self._moneyness_range = (min(low, moneyness.min()), max(high, moneyness.max()))
        return super()._regression_rows(chunk, k)

    def _add(self, k: int, design, y: np.ndarray) -> None:
        # Within-state targets: the M actions of a state are independent draws of the behaviour, so
        # E[y_j - mean_i y_i | s, a_j] = (M - 1) / M * (Q(s, a_j) - mean over actions of Q(s, .)).
        # Rescaled, the regression learns Q up to a function of the state, without the noise that
        # the actions share.
        X, linear = design
        m = y.shape[-1]
        if m < 2:
            raise ValueError("fitted Q needs exploration.actions_per_state >= 2")
        keep = self._kept(y.shape[-2], m)
        if self.problem.objective.certainty_equivalent:
            # The certainty-equivalent stage needs every row; the regressor's rows are cut like the others.
            self._certainty_rows = self._certainty_rows + StepRows.of(linear, y)
            self._rows.append((X if keep is None else X[:, keep], keep, None))
            return
        if len(linear):
            self._normal = self._normal + within_state(linear, y)
        centred = (y - y.mean(axis=1, keepdims=True)) * (m / (m - 1))
        if keep is not None:
            X, centred, linear = X[:, keep], centred[keep], linear[:, keep]
        # The linear stage's terms centred within states and rescaled like the targets, so that the
        # residual the trees fit is (M / (M - 1)) (y - theta . x) centred: the same estimator of Q up to
        # a function of the state, less the linear stage (not less (M - 1) / M of it).
        linear = (linear - linear.mean(axis=2, keepdims=True)) * (m / (m - 1))
        self._rows.append((X.reshape(len(X), -1).T, centred.reshape(-1), linear.reshape(len(linear), centred.size).T))

    def _kept(self, n: int, m: int) -> np.ndarray | None:
        """Which of the next ``n`` states the regressor keeps (None: all): every stride-th, so that
        ceil(states / stride) states of m rows each stay within ``max_rows_per_step``, the same states
        at every decision time."""
        stride = -(-self._states // max(1, self.max_rows_per_step // m))
        keep = (self._seen + np.arange(n)) % stride == 0 if stride > 1 else None
        self._seen += n
        return keep

    def _certainty_equivalent_rows(self, k: int) -> None:
        """Under the exponential objective: the linear stage's certainty-equivalent fit, and the
        regressor's rows (design, within-state residual of each row's certainty-equivalent target)."""
        coef, target = certainty_equivalent_fit(self._certainty_rows, self.problem.objective.risk_aversion,
                                                self.ridge, self.linear_terms)
        self.linear_coef_[k] = coef
        residual = target - np.tensordot(coef, np.concatenate(self._certainty_rows.designs, axis=1), axes=1)
        m = residual.shape[1]
        residual = (residual - residual.mean(axis=1, keepdims=True)) * (m / (m - 1))
        self._certainty_rows = StepRows()
        rows, start = [], 0
        for X, keep, _ in self._rows:
            n = len(keep) if keep is not None else X.shape[1]
            part = residual[start:start + n]
            start += n
            part = part if keep is None else part[keep]
            rows.append((X.reshape(len(X), -1).T, part.reshape(-1), None))
        self._rows = rows

    def _finish_step(self, k: int) -> None:
        if self.problem.objective.certainty_equivalent:
            self._certainty_equivalent_rows(k)
        X = np.concatenate([x for x, _, _ in self._rows])
        y = np.concatenate([t for _, t, _ in self._rows])
        if len(self.linear_terms) and not self.problem.objective.certainty_equivalent:
            self.linear_coef_[k] = self._normal.solve(self.ridge)
            y = y - np.concatenate([lin for _, _, lin in self._rows]) @ self.linear_coef_[k]
        self._rows = []
        base = default_regressor() if self.regressor is None else self.regressor
        self.regressors_[k] = clone(base).fit(X, y)
        if self.tables_ is not None:
            self.tables_[k] = self._tabulate(k)

    def _tabulate(self, k: int) -> tuple[np.ndarray, np.ndarray]:
        """The fitted regression of time k on a moneyness x gap grid over the training range."""
        low, high = self._moneyness_range
        # Padded: at the first decision every path may sit at the same spot.
        pad = max(0.05 * (high - low), 3.0 * self.problem.marks.volatility * np.sqrt(self.problem.dt_years))
        moneyness = np.linspace(low - pad, high + pad, TABLE_MONEYNESS_POINTS)
        obs = np.column_stack([np.exp(moneyness), np.full_like(moneyness, self.problem.years_to_horizon(k)),
                               np.zeros_like(moneyness)])
        # A state anchor leaves the hedge out of the (tabulable) columns: any hedge gives the same gaps.
        state = state_features(self.problem, obs, anchor="delta" if self._state_anchor() else self.anchor)
        targets = state.hedge[:, None] + self.move_ * TABLE_GAPS[None, :]
        return moneyness, self._regress(k, state, targets)

    def _regress(self, k: int, state, targets: np.ndarray) -> np.ndarray:
        X = basis(self.terms, state, targets)
        return self.regressors_[k].predict(X.reshape(-1, X.shape[-1])).reshape(targets.shape)

    def _predict(self, k: int, state, targets: np.ndarray) -> np.ndarray:
        if self.tables_ is None:
            trees = self._regress(k, state, targets)
        else:
            moneyness, table = self.tables_[k]
            gaps = (targets - state.hedge[:, None]) / self.move_
            trees = _bilinear(table, moneyness, TABLE_GAPS, state.values["moneyness"], gaps, self._cells(k))
        if len(self.linear_terms):
            trees += combination(self.linear_terms, self.linear_coef_[k], state, targets)
        return trees

    def _cells(self, k: int) -> np.ndarray:
        """Cell coefficients of ``tables_[k]``, kept once built (a cache, not pickled)."""
        cache = self.__dict__.setdefault("_table_cells", {})
        if k not in cache:
            cache[k] = _cell_coefficients(self.tables_[k][1])
        return cache[k]

    def __getstate__(self):
        state = dict(super().__getstate__())
        state.pop("_table_cells", None)
        return state
