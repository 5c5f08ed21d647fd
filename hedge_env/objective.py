"""Reward and risk measures.

Two objectives (``Objective.kind``):

- ``mean_variance`` (the default): the per-step penalty
  ``r = dW - kappa / 2 * dW**2`` with kappa the risk aversion per currency
  unit; a policy's objective is the mean over paths of its summed rewards.
- ``exponential``: exponential (constant absolute risk aversion) utility of
  the terminal P&L W_T, with gamma = ``risk_aversion`` per currency unit. A
  policy's objective is the certainty equivalent
  ``CE = -1/gamma log E[exp(-gamma W_T)]`` over paths (computed with a
  log-sum-exp, so no exponent overflows). The reward is 0 at every step but
  the last, which pays the terminal utility ``u(W_T) = (1 - exp(-gamma W_T)) / gamma``
  in one rounding: an episode's return is exactly u(W_T), so a
  reinforcement learner that maximises expected return maximises expected
  utility, whose certainty equivalent is ``-log(1 - gamma E[u]) / gamma``.
  (The telescoping increments ``u(W_{k+1}) - u(W_k)`` sum to the same in exact
  arithmetic, but each is ``exp(-gamma W_k)`` times a step's change: a path
  that dips to a loss and recovers sums numbers far larger than its utility,
  which cancel to noise, and overflow to inf - inf = NaN; at 100 short calls
  and gamma 1 the sums missed u(W_T) by a relative 1e24.) u(W_T) itself is
  below the double range, so -inf, exactly where gamma times the loss is over
  709; no positive per-path rescaling can avoid that without reweighting the
  paths (and so changing the optimum), while the certainty equivalent stays
  finite. The batch agents do not read the reward, they fit the
  certainty-equivalent recursion on the step P&L.

Evaluation looks at the whole distribution of total P&L: losses are
positive numbers in VaR and CVaR.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
from scipy.special import logsumexp

OBJECTIVE_KINDS = ("mean_variance", "exponential")


@dataclass(frozen=True)
class Objective:
    """Risk appetite of the desk.

    Parameters
    ----------
    risk_aversion : float
        kappa, per currency unit, in the per-step reward (mean-variance), or
        gamma, the absolute risk aversion of the exponential utility.
    var_levels : tuple of float
        Confidence levels of VaR and CVaR, e.g. (0.95, 0.99).
    entropic_risk_aversion : float or None
        theta of the entropic risk ``log E[exp(-theta X)] / theta``; None uses
        ``risk_aversion`` (and skips the measure when that is 0).
    kind : str
        ``"mean_variance"`` or ``"exponential"`` (see the module's text).
    """

    risk_aversion: float = 0.0
    var_levels: tuple[float, ...] = (0.95, 0.99)
    entropic_risk_aversion: float | None = None
    kind: str = "mean_variance"

    def __post_init__(self) -> None:
        if self.kind not in OBJECTIVE_KINDS:
            raise ValueError(f"objective kind {self.kind!r} is not one of {', '.join(OBJECTIVE_KINDS)}")
        if self.exponential and not self.risk_aversion > 0:
            raise ValueError("an exponential objective needs risk_aversion > 0")

    @property
    def exponential(self) -> bool:
        return self.kind == "exponential"

    def reward(self, pnl, wealth=0.0, last: bool = True):
        """Per-step reward of a wealth change ``pnl`` (float or array); ``wealth``, the P&L gathered
        before the step, and ``last``, whether the step ends at the horizon, are read only by the
        exponential objective (0 before the last step, then u(wealth + pnl); see the module's text)."""
        if self.exponential:
            if not last:
                return 0.0 * pnl
            return terminal_utility(wealth + pnl, self.risk_aversion)
        if not self.risk_aversion:
            return pnl
        # pnl - (kappa / 2) pnl^2 in one buffer for arrays: the same bits, as negation is exact.
        reward = pnl * pnl
        reward *= -0.5 * self.risk_aversion
        reward += pnl
        return reward

    def score(self, pnl: np.ndarray, reward: np.ndarray) -> float:
        """A policy's objective from its per-path total P&L and summed rewards: the mean summed
        reward (mean-variance) or the certainty equivalent of the P&L (exponential)."""
        if self.exponential:
            return certainty_equivalent(pnl, self.risk_aversion)
        return float(np.mean(reward))

    @property
    def entropic_theta(self) -> float:
        return self.risk_aversion if self.entropic_risk_aversion is None else self.entropic_risk_aversion

    def risk_measures(self, total_pnl: np.ndarray) -> dict[str, float]:
        """Mean, std, VaR and CVaR at each level, and entropic risk of total P&L per path."""
        pnl = np.asarray(total_pnl, dtype=float)
        measures = {"mean_pnl": float(pnl.mean()), "std_pnl": float(pnl.std(ddof=1)) if pnl.size > 1 else 0.0}
        ordered = np.sort(pnl)
        for level in self.var_levels:
            tag = level_tag(level)
            measures[f"var_{tag}"] = value_at_risk(ordered, level, presorted=True)
            measures[f"cvar_{tag}"] = conditional_value_at_risk(ordered, level, presorted=True)
        if self.entropic_theta > 0:
            measures["entropic_risk"] = entropic_risk(pnl, self.entropic_theta)
        if self.exponential:
            measures["ce_effective_paths"] = effective_paths(pnl, self.risk_aversion)
        return measures


# The largest x whose exp(x) is a finite double.
_LOG_DOUBLE_MAX = math.log(np.finfo(float).max)


def terminal_utility(wealth, gamma: float):
    """``(1 - exp(-gamma W)) / gamma`` (float or array): -inf where ``-gamma W`` is beyond the double
    range, never a NaN or an overflow warning."""
    if isinstance(wealth, float):
        return -math.inf if -gamma * wealth > _LOG_DOUBLE_MAX else -math.expm1(-gamma * wealth) / gamma
    exponent = -gamma * np.asarray(wealth, dtype=float)
    beyond = exponent > _LOG_DOUBLE_MAX
    return np.where(beyond, -np.inf, -np.expm1(np.where(beyond, 0.0, exponent)) / gamma)


def level_tag(level: float) -> str:
    """0.95 -> "95", 0.995 -> "99.5": the suffix of var_/cvar_ keys."""
    return f"{level * 100:g}"


def value_at_risk(pnl: np.ndarray, level: float, presorted: bool = False) -> float:
    """Loss not exceeded with probability ``level``: minus the lower (1 - level) quantile of P&L."""
    ordered = pnl if presorted else np.sort(pnl)
    tail = round((1.0 - level) * ordered.size, 9)  # 1 - 0.95 is 0.0500...04: keep ceil off the next atom
    index = min(max(int(np.ceil(tail)) - 1, 0), ordered.size - 1)
    return float(-ordered[index])


def conditional_value_at_risk(pnl: np.ndarray, level: float, presorted: bool = False) -> float:
    """Mean loss in the worst (1 - level) fraction of outcomes (Acerbi-Tasche, fractional last atom)."""
    ordered = pnl if presorted else np.sort(pnl)
    tail = (1.0 - level) * ordered.size
    whole = int(np.floor(tail))
    total = ordered[:whole].sum()
    if whole < ordered.size:
        total += (tail - whole) * ordered[whole]
    return float(-total / tail)


def certainty_equivalent(pnl: np.ndarray, gamma: float) -> float:
    """``-1/gamma log E[exp(-gamma X)]``: the sure amount worth as much as ``pnl`` under exponential utility."""
    return -entropic_risk(pnl, gamma)


def effective_paths(pnl: np.ndarray, gamma: float) -> float:
    """Kish's effective sample size of the certainty equivalent's weights ``exp(-gamma P&L)``:
    ``(sum w)^2 / sum w^2``, between 1 (one path decides it) and the path count (all count alike).
    Computed with the weights scaled by the largest, so none overflows."""
    exponent = -gamma * np.asarray(pnl, dtype=float)
    weights = np.exp(exponent - exponent.max())
    return float(weights.sum() ** 2 / np.dot(weights, weights))


def entropic_risk(pnl: np.ndarray, theta: float) -> float:
    """``log E[exp(-theta X)] / theta``, computed stably; a loss-like number (higher is worse)."""
    pnl = np.asarray(pnl, dtype=float)
    return float((logsumexp(-theta * pnl) - np.log(pnl.size)) / theta)
