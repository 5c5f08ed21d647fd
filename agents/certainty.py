"""Certainty equivalents of noisy targets, fitted by least squares only.

The exponential objective's backward step needs, per state s and tried
target a, ``CE(s, a) = -1/gamma log E[exp(-gamma Y) | s, a]`` from one draw of
Y per row. Taking logs of single draws (or regressing them) is biased:
``E[log Z] < log E[Z]`` (Jensen). Here no log of a sample is taken: the
certainty equivalent is expanded in cumulants,
``CE = E[Y | s, a] - gamma/2 Var[Y | s, a] + gamma^2/6 k3 - ...``, and its
first two terms are fitted by least squares, each unbiased. The expansion's
error is of the order of gamma^2 times the third cumulant of one step's
outcome: small whenever one step's risk is small against 1/gamma (on the
reference case gamma times one step's standard deviation is about 0.05), which
is where discrete rehedging lives. (A Poisson pseudo-likelihood fit of
``E[exp(-gamma Y)]`` is exact in the limit but cannot use the control
variates below; measured on the reference case it reached 94% of the optimum's
gain at 50 bps and 78% at 10 bps on scratch paths, against 97% and 98% for
this fit; more training paths did not move it.)

Each moment is fitted as the mean-variance fit is, within states (the M
targets tried at a state share its market move; agents.linear.within_state)
with control variates of zero mean given the state, plus a level per state on
the state's own terms (under exponential utility the value's level across next
states is a risk, not a constant). With ``U1`` the hedge gain's surprise and
``U2`` the surprise of the gap's squared move (both from
agents.backward.BackwardQAgent._regression_rows); the return's own surprises
``R - m1`` and ``R^2 - m2``, times each term, are regressors too (regression-
adjusted control variates), their coefficients left out of the result:

1. mean within states: least squares of ``Y - U1`` on the target's terms;
2. variance within states: least squares of ``e^2 - U2`` on them, with
   ``e = Y - (fit 1)``. E[e^2 | s, a] is the variance plus the square of the
   state's missing level, which the within-state fit removes;
3. mean level: least squares of ``e - U1`` on the state's terms;
4. variance level: least squares of ``(e - fit 3)^2 - fit 2 - U2`` on them.

``CE = x . (mean coefficients - gamma/2 variance coefficients)``.

The expansion holds only while gamma times the spread of a step's outcome given (s, a) is small:
on configs/reference-exponential.toml that product is 0.13 to 0.45 over the decision times. Above
``MAX_STEP_RISK = 1`` the dropped cumulants are as large as the kept ones and the fitted value
runs away over the backward steps (a 1,000-share book at gamma 1 reached 5e5 by the third step,
and its coefficients overflowed): the fit then refuses, with :class:`ExpansionRangeError`.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

from agents.features import target_part

MAX_STEP_RISK = 1.0


class ExpansionRangeError(ValueError):
    """gamma times the spread of a step's outcome given (s, a) is beyond what the cumulant expansion
    can carry; the message is one line naming objective.risk_aversion."""


@dataclass
class StepRows:
    """The rows of one decision time's regression, kept whole: designs (terms, n, M) and targets
    (5, n, M) (Y, U1, U2, R - m1, R^2 - m2) of n states with M tried targets each, in the order they were added (the
    stages need every row, each after the one before). ``+`` appends another block's states."""

    designs: list[np.ndarray] = field(default_factory=list)
    targets: list[np.ndarray] = field(default_factory=list)

    @classmethod
    def of(cls, X: np.ndarray, y: np.ndarray) -> StepRows:
        return cls([X], [y])

    def __add__(self, other: StepRows) -> StepRows:
        return StepRows(self.designs + other.designs, self.targets + other.targets)

    def arrays(self) -> tuple[np.ndarray, np.ndarray]:
        return np.concatenate(self.designs, axis=1), np.concatenate(self.targets, axis=1)


def _ridge_solve(X: np.ndarray, y: np.ndarray, ridge: float) -> np.ndarray:
    """Ridge least squares of a term-major design (terms, rows), the penalty relative to each
    column's sum of squares (as agents.linear.NormalEquations.solve)."""
    lhs = X @ X.T
    diagonal = np.diag(lhs)
    largest = diagonal.max(initial=0.0)
    scale = np.maximum(diagonal, 1e-12 * largest) if largest > 0 else np.ones_like(diagonal)
    return np.linalg.solve(lhs + ridge * np.diag(scale), X @ y)


def _within(X: np.ndarray, y: np.ndarray, ridge: float) -> np.ndarray:
    """Least squares of y (n, M) on X (terms, n, M), both centred on each state's mean."""
    centred = (X - X.mean(axis=2, keepdims=True)).reshape(len(X), -1)
    return _ridge_solve(centred, (y - y.mean(axis=1, keepdims=True)).reshape(-1), ridge)


def _controlled(X: np.ndarray, controls: tuple[np.ndarray, ...]) -> np.ndarray:
    """The design with each term times each control appended: the regression finds each control's
    coefficient (as a function of the terms) and its first len(X) coefficients are the fit's."""
    return np.concatenate([X, *(X * control for control in controls)])


def certainty_equivalent_fit(rows: StepRows, gamma: float, ridge: float,
                             terms: tuple[str, ...]) -> tuple[np.ndarray, np.ndarray]:
    """Coefficients c with ``x . c ~ CE(Y | s, a)`` to second order (the four least-squares stages
    of the module's text), and each row's certainty-equivalent target (n, M): ``Y - U1 - gamma/2
    (e^2 - U2)`` less the fitted controls, whose mean given (s, a) is the certainty equivalent up
    to a function of the state (what a further within-state stage can fit the rest of). ``terms``
    name the design's rows (agents.features): those of the state alone must span the constant."""
    action = np.array([bool(target_part(term)) for term in terms])
    X, (y, hedge_surprise, square_surprise, move, square_move) = rows.arrays()
    on_action, on_state = X[action], X[~action]
    n_action, n_state = len(on_action), len(on_state)
    with_controls = _controlled(on_action, (move, square_move))
    mean = _within(with_controls, y - hedge_surprise, ridge)
    residual = y - np.tensordot(mean[:n_action], on_action, axes=1)
    variance = _within(with_controls, residual * residual - square_surprise, ridge)
    # The level's targets averaged over each state's tries: the same fit as on every row, M times fewer rows.
    states = _controlled(on_state[:, :, 0], (move[:, 0], square_move[:, 0]))
    level = _ridge_solve(states, (residual - hedge_surprise).mean(axis=1), ridge)[:n_state]
    centred = residual - (level @ on_state[:, :, 0])[:, None]
    _check_step_risk(gamma, centred)
    spread = centred * centred - np.tensordot(variance[:n_action], on_action, axes=1) - square_surprise
    level_variance = _ridge_solve(states, spread.mean(axis=1), ridge)[:n_state]
    coef = np.empty(len(X))
    coef[action] = mean[:n_action] - 0.5 * gamma * variance[:n_action]
    coef[~action] = level - 0.5 * gamma * level_variance
    controls = mean[n_action:] - 0.5 * gamma * variance[n_action:]
    target = (y - hedge_surprise - 0.5 * gamma * (residual * residual - square_surprise)
              - np.tensordot(controls, with_controls[n_action:], axes=1))
    return coef, target


def _check_step_risk(gamma: float, residual: np.ndarray) -> None:
    """Refuse when gamma times the root mean square of the residuals of the mean fit (within states
    and level: Y less its fitted mean given (s, a)) is above MAX_STEP_RISK, or not a number."""
    spread = float(np.sqrt(np.mean(residual * residual)))
    risk = gamma * spread
    if not risk <= MAX_STEP_RISK:
        raise ExpansionRangeError(
            f"objective.risk_aversion: gamma {gamma:g} times one step's spread of outcomes ({spread:,.4g} in "
            f"currency) is {risk:.3g}, above the {MAX_STEP_RISK:g} the exponential agents' certainty-equivalent "
            "fit can carry (its expansion in cumulants would run away); lower objective.risk_aversion (it is "
            "per currency unit: a larger book needs a smaller one) or hedge a smaller book")
