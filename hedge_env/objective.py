"""Reward and risk measures.

Two objectives (``Objective.kind``; each a class in ``OBJECTIVE_FORMS``):

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

class MeanVariance:
    """The mean-variance objective: each step pays ``r = dW - kappa / 2 dW^2`` (kappa the risk
    aversion per currency unit) and a policy scores the mean over paths of its summed rewards."""

    kind = "mean_variance"
    # What the step, the learners and the screens ask of an objective:
    tracks_wealth = False  # the step reward reads the P&L gathered before the step
    certainty_equivalent = False  # the score is a certainty equivalent of the terminal P&L (not summed rewards)
    score_name = "objective"  # what the screens call the score
    difference_words = "mean per-path difference in summed reward"  # what a paired difference from the reference is
    quote_words = "mean-variance indifference premiums"  # what its bid and ask are
    quote_title = "mean-variance objective"
    measure_note = ""  # the report's words on the kind's own measures

    def check(self, objective: Objective) -> None:
        """Refuse parameters the kind cannot take (ValueError)."""

    def reward(self, objective: Objective, pnl, wealth, last: bool):
        if not objective.risk_aversion:
            return pnl
        # pnl - (kappa / 2) pnl^2 in one buffer for arrays: the same bits, as negation is exact.
        reward = pnl * pnl
        reward *= -0.5 * objective.risk_aversion
        reward += pnl
        return reward

    def score(self, objective: Objective, pnl: np.ndarray, reward: np.ndarray) -> float:
        return float(np.mean(reward))

    def resampled_score(self, objective: Objective, pnl: np.ndarray, reward: np.ndarray,
                        resamples) -> tuple[float, np.ndarray]:
        return float(reward.mean()), resampled_mean(reward, resamples)

    def versus(self, objective: Objective, pnl: dict, reward: dict, reference: str, resamples) -> dict:
        """Each policy's score minus the reference's, on all paths and on each resample: the mean of
        the per-path reward differences, paired path by path."""
        base = reward[reference]
        return {name: (float((r - base).mean()), resampled_mean(r - base, resamples)) for name, r in reward.items()}

    def learning_signal(self, pnl, reward):
        """What a step gives the learners: its reward."""
        return reward

    def value_in_money(self, objective: Objective, value):
        """A grid optimum's value as money: its expected summed reward already is."""
        return value

    def known_value(self, objective: Objective, paid, gap_risk, growth: float):
        """The known part of a step's value for the batch learners (agents.backward.known_part):
        ``-(paid + kappa/2 paid^2 + gap_risk)``, the gap risk already scaled by :meth:`gap_aversion`
        (a kind may work in place on ``gap_risk``'s array)."""
        known = paid * paid
        known *= 0.5 * objective.risk_aversion
        known += paid
        known += gap_risk
        return np.negative(known, out=known)

    def gap_aversion(self, objective: Objective, growth: float) -> float:
        """The risk aversion the one-step gap risk is charged at."""
        return objective.risk_aversion

    def extra_measures(self, objective: Objective, pnl: np.ndarray) -> dict[str, float]:
        return {}

    def describe(self, objective: Objective) -> str:
        return (f"mean over paths of the summed step rewards dW - {objective.risk_aversion:g} / 2 dW^2 "
                "(risk aversion per currency unit)")


class ExponentialUtility:
    """Exponential (constant absolute risk aversion) utility of the terminal P&L, gamma the risk
    aversion per currency unit: the reward is 0 until the last step, which pays ``u(W_T)`` (see the
    module's text), and a policy scores the certainty equivalent of its P&L."""

    kind = "exponential"
    tracks_wealth = True
    certainty_equivalent = True
    score_name = "certainty equivalent"
    difference_words = "difference in certainty equivalent"
    quote_words = "utility-indifference premiums under exponential utility"
    quote_title = "exponential utility (a utility-indifference price)"
    measure_note = ("CE paths: Kish's effective number of paths behind each certainty equivalent, "
                    "(sum w)^2 / sum w^2 with w = exp(-gamma P&L); under half the paths, its interval is not to be "
                    "trusted. ")

    def check(self, objective: Objective) -> None:
        if not objective.risk_aversion > 0:
            raise ValueError("an exponential objective needs risk_aversion > 0")

    def reward(self, objective: Objective, pnl, wealth, last: bool):
        if not last:
            return 0.0 * pnl
        return terminal_utility(wealth + pnl, objective.risk_aversion)

    def score(self, objective: Objective, pnl: np.ndarray, reward: np.ndarray) -> float:
        return certainty_equivalent(pnl, objective.risk_aversion)

    def resampled_score(self, objective: Objective, pnl: np.ndarray, reward: np.ndarray,
                        resamples) -> tuple[float, np.ndarray]:
        return resampled_certainty_equivalent(pnl, objective.risk_aversion, resamples)

    def versus(self, objective: Objective, pnl: dict, reward: dict, reference: str, resamples) -> dict:
        """Each policy's certainty equivalent minus the reference's, each recomputed on every resample."""
        gamma = objective.risk_aversion
        base, base_resampled = resampled_certainty_equivalent(pnl[reference], gamma, resamples)
        out = {}
        for name, x in pnl.items():
            ce, ce_resampled = resampled_certainty_equivalent(x, gamma, resamples)
            out[name] = (ce - base, ce_resampled - base_resampled)
        return out

    def learning_signal(self, pnl, reward):
        """What a step gives the learners: its P&L (they fit the certainty-equivalent recursion)."""
        return pnl

    def value_in_money(self, objective: Objective, value):
        """A grid optimum's value, kept as -log E[exp(-gamma W_T)], as a certainty equivalent."""
        return value / objective.risk_aversion

    def known_value(self, objective: Objective, paid, gap_risk, growth: float):
        """``-G (paid + gap_risk)``: the certainty equivalent's counterpart in money at the horizon."""
        known = gap_risk
        known += paid
        known *= growth
        return np.negative(known, out=known)

    def gap_aversion(self, objective: Objective, growth: float) -> float:
        return objective.risk_aversion * growth

    def extra_measures(self, objective: Objective, pnl: np.ndarray) -> dict[str, float]:
        return {"ce_effective_paths": effective_paths(pnl, objective.risk_aversion)}

    def describe(self, objective: Objective) -> str:
        return (f"certainty equivalent of the total P&L under exponential utility, -1/gamma log "
                f"E[exp(-gamma P&L)], gamma = {objective.risk_aversion:g} per currency unit")


# Every objective kind by its config name: adding one is a class with the methods above, listed here.
OBJECTIVE_FORMS = {form.kind: form() for form in (MeanVariance, ExponentialUtility)}
OBJECTIVE_KINDS = tuple(OBJECTIVE_FORMS)


@dataclass(frozen=True)
class Objective:
    """Risk appetite of the desk: a kind (its behaviour, :attr:`form`) and its parameters.

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
        A key of ``OBJECTIVE_FORMS`` (see the module's text).
    """

    risk_aversion: float = 0.0
    var_levels: tuple[float, ...] = (0.95, 0.99)
    entropic_risk_aversion: float | None = None
    kind: str = "mean_variance"

    def __post_init__(self) -> None:
        if self.kind not in OBJECTIVE_FORMS:
            raise ValueError(f"objective kind {self.kind!r} is not one of {', '.join(OBJECTIVE_KINDS)}")
        self.form.check(self)

    @property
    def form(self) -> MeanVariance | ExponentialUtility:
        """The kind's behaviour: its reward, score, bootstrap, what the learners fit and its words."""
        return OBJECTIVE_FORMS[self.kind]

    @property
    def certainty_equivalent(self) -> bool:
        """Whether the score is a certainty equivalent of the terminal P&L (the fits differ)."""
        return self.form.certainty_equivalent

    def reward(self, pnl, wealth=0.0, last: bool = True):
        """Per-step reward of a wealth change ``pnl`` (float or array); ``wealth``, the P&L gathered
        before the step, and ``last``, whether the step ends at the horizon, are read only by a kind
        that tracks wealth (exponential: 0 before the last step, then u(wealth + pnl))."""
        return self.form.reward(self, pnl, wealth, last)

    def score(self, pnl: np.ndarray, reward: np.ndarray) -> float:
        """A policy's objective from its per-path total P&L and summed rewards: the mean summed
        reward (mean-variance) or the certainty equivalent of the P&L (exponential)."""
        return self.form.score(self, pnl, reward)

    @property
    def entropic_theta(self) -> float:
        return self.risk_aversion if self.entropic_risk_aversion is None else self.entropic_risk_aversion

    def risk_measures(self, total_pnl: np.ndarray) -> dict[str, float]:
        """Mean, std, VaR and CVaR at each level, and entropic risk of total P&L per path, and the
        kind's own measures (the certainty equivalent's effective paths)."""
        pnl = np.asarray(total_pnl, dtype=float)
        measures = {"mean_pnl": float(pnl.mean()), "std_pnl": float(pnl.std(ddof=1)) if pnl.size > 1 else 0.0}
        ordered = np.sort(pnl)
        for level in self.var_levels:
            tag = level_tag(level)
            measures[f"var_{tag}"] = value_at_risk(ordered, level, presorted=True)
            measures[f"cvar_{tag}"] = conditional_value_at_risk(ordered, level, presorted=True)
        if self.entropic_theta > 0:
            measures["entropic_risk"] = entropic_risk(pnl, self.entropic_theta)
        measures.update(self.form.extra_measures(self, pnl))
        return measures


def resampled_mean(values: np.ndarray, resamples) -> np.ndarray:
    """The mean of ``values`` (one per path) on each bootstrap resample ``(starts, draws, counts)``
    (rehedge.compare.resample_batches: batches of consecutive paths drawn with replacement)."""
    starts, draws, counts = resamples
    return np.add.reduceat(values, starts)[draws].sum(axis=1) / counts


def resampled_certainty_equivalent(pnl: np.ndarray, gamma: float, resamples) -> tuple[float, np.ndarray]:
    """``-1/gamma log mean exp(-gamma P&L)`` of all paths and of each resample ``(starts, draws,
    counts)``: a log-sum-exp within each batch (shifted by the batch's own largest exponent), then one
    across the resample's batches, so no exponent overflows and no batch far below the worst path
    rounds to zero (a shift by the overall largest would give log 0)."""
    starts, draws, counts = resamples
    exponent = -gamma * pnl
    peaks = np.maximum.reduceat(exponent, starts)
    sizes = np.diff(np.append(starts, pnl.size))
    batch_logs = peaks + np.log(np.add.reduceat(np.exp(exponent - np.repeat(peaks, sizes)), starts))
    return certainty_equivalent(pnl, gamma), -(logsumexp(batch_logs[draws], axis=1) - np.log(counts)) / gamma


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
