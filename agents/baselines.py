"""Classic hedging rules, vectorized over observation rows.

Every baseline hedges the book's Black-Scholes delta in some way: the hedge
target is minus the book's delta (shares), expressed per share of notional.

- ``NoHedge``: never trades.
- ``DeltaHedge``: trades to delta at every rehedge, at its own pricing
  volatility (so a wrong-volatility hedge can be studied).
- ``LelandDelta``: delta at Leland's (1985) cost-adjusted volatility,
  ``vol^2 (1 + sign * sqrt(2/pi) * k / (vol sqrt(dt)))`` with ``k`` the
  round-trip cost rate; written options get the higher volatility, bought
  ones the lower.
- ``WhalleyWilmottBand``: no trade while the holding is within
  ``(3/2 exp(-r tau) c S Gamma^2 / risk_aversion)^(1/3)`` shares of delta
  (Whalley and Wilmott, 1997); outside it trades to the nearest edge.
- ``FixedBand``: the same with a constant half-width, per share of notional.
"""

from __future__ import annotations

import functools
import math
from dataclasses import dataclass

import numpy as np

from agents.policy import decode
from hedge_env.book import Book
from hedge_env.model_pricing import HestonPricer, MertonPricer
from hedge_env.problem import HedgingProblem


def _to_band(holding: np.ndarray, center: np.ndarray, half_width: np.ndarray) -> np.ndarray:
    """Stay inside [center - half_width, center + half_width]; outside, move to the nearest edge."""
    return np.clip(holding, center - half_width, center + half_width)


@dataclass(frozen=True)
class NoHedge:
    problem: HedgingProblem
    name: str = "no_hedge"
    label = "no hedge"  # what reports call the kind

    def act(self, obs: np.ndarray) -> np.ndarray:
        return np.zeros(len(obs))


@dataclass(frozen=True)
class DeltaHedge:
    """Trade to minus the book's Black-Scholes delta at ``volatility`` (default: the mark volatility)."""

    problem: HedgingProblem
    volatility: float | None = None
    name: str = "delta"
    label = "Black-Scholes delta"

    def hedge_shares(self, obs: np.ndarray, book_delta: np.ndarray | None = None):
        """Target holding in shares and the decoded observation.

        ``book_delta`` (shares, at the mark volatility) is used when given and
        this hedge prices at the mark volatility.
        """
        decoded = decode(self.problem, obs)
        marks = self.problem.marks
        # The step's delta is at the mark volatility (per row when the market supplies it), unless the
        # marks are a model's: then it is the model's delta, not this Black-Scholes one.
        own = self.problem.mark_model is not None or (
            self.volatility is not None and (decoded.volatility is not None or self.volatility != marks.volatility))
        if book_delta is None or own:
            volatility = self.volatility if self.volatility is not None else decoded.volatility
            book_delta = self.problem.book.value_and_delta(decoded.spot, decoded.t_days, marks, volatility)[1]
        return -book_delta, decoded

    def act(self, obs: np.ndarray, book_delta: np.ndarray | None = None) -> np.ndarray:
        return self.hedge_shares(obs, book_delta)[0] / self.problem.notional_shares

    act_with_delta = act


def _model_greeks(problem: HedgingProblem, obs: np.ndarray):
    """Decoded rows and the book's value, delta and dV/d(state) at the mark model's price."""
    decoded = decode(problem, obs)
    return decoded, problem.model_greeks(decoded.spot, decoded.t_days, problem.observed_mark_state(obs))


def _state_factors(problem: HedgingProblem) -> tuple[str, ...]:
    """The market factors a hedge at the model's Greeks reads from its observation (its state)."""
    return (problem.mark_factor,) if problem.mark_state_column is not None else ()


def _needs_model_hedge(problem: HedgingProblem, kind: str) -> None:
    if not problem.model_hedge_observable:
        raise ValueError(f"{kind} needs model marks whose state the hedger observes (Merton; Heston with the "
                         "variance observed)")


@dataclass(frozen=True)
class ModelDelta:
    """Trade to minus the book's delta at the mark model's price (dV/dS at the observed state)."""

    problem: HedgingProblem
    name: str = "model_delta"
    label = "model delta"
    reads_model_greeks = True  # needs the model's marks (and their state observed)

    def __post_init__(self) -> None:
        _needs_model_hedge(self.problem, "model_delta")

    @property
    def factor_names(self) -> tuple[str, ...]:
        return _state_factors(self.problem)

    def act(self, obs: np.ndarray, book_delta: np.ndarray | None = None) -> np.ndarray:
        # The step's delta is the model's (the marks are), at the state the observation shows.
        if book_delta is None:
            book_delta = _model_greeks(self.problem, obs)[1][1]
        return -book_delta / self.problem.notional_shares

    act_with_delta = act


# Gauss-Hermite nodes of the expectation over a Merton jump's normal log size.
JUMP_NODES = 24


@dataclass(frozen=True)
class MinimumVarianceDelta:
    """The hedge that minimises the variance of the hedged book's move over an instant, at the mark
    model's price. Heston: minus (dV/dS + rho xi / S dV/dv), which also hedges the part of the
    variance's move that goes with the spot's. Merton: minus
    ``(sigma^2 dV/dS + lambda/S E[(e^z - 1)(V(S e^z) - V(S))]) / (sigma^2 + lambda E[(e^z - 1)^2])``
    (z the log jump), the regression of the book's move on the spot's with the jumps in both."""

    problem: HedgingProblem
    name: str = "minimum_variance_delta"
    label = "minimum-variance delta"
    reads_model_greeks = True

    def __post_init__(self) -> None:
        _needs_model_hedge(self.problem, "minimum_variance_delta")
        if not isinstance(self.problem.mark_model, (HestonPricer, MertonPricer)):
            raise ValueError("minimum_variance_delta is implemented for Heston and Merton marks")

    @property
    def factor_names(self) -> tuple[str, ...]:
        return _state_factors(self.problem)

    def act(self, obs: np.ndarray) -> np.ndarray:
        decoded, (value, delta, vega) = _model_greeks(self.problem, obs)
        model = self.problem.mark_model
        if isinstance(model, HestonPricer):
            hedge = delta + model.correlation * model.vol_of_vol / decoded.spot * vega
        else:
            hedge = _merton_minimum_variance(self.problem, decoded.spot, decoded.t_days, value, delta)
        return -hedge / self.problem.notional_shares


def _merton_minimum_variance(problem: HedgingProblem, spot, t_days, value, delta) -> np.ndarray:
    """The Merton minimum-variance hedge ratio of the book (shares) at ``spot``: exact for a few rows,
    else interpolated in log spot on its per-time table (:func:`_merton_ratio_table`)."""
    if spot.size <= MERTON_EXACT_ROWS:
        return _merton_ratio(problem, spot, t_days, value, delta)
    out = np.empty_like(spot)
    times = np.broadcast_to(t_days, spot.shape)
    for t in np.unique(times):
        rows = times == t
        nodes, ratio = _merton_ratio_table(problem, float(t))
        log_spot = np.log(spot[rows])
        inside = (log_spot >= nodes[0]) & (log_spot <= nodes[-1])
        out[rows] = np.interp(log_spot, nodes, ratio)
        if not inside.all():  # off the table: exactly, from the rows' own value and delta
            far = np.flatnonzero(rows)[~inside]
            out[far] = _merton_ratio(problem, spot[far], float(t), value[far], delta[far])
    return out


# Rows up to which the Merton hedge is computed exactly; the table's log-spot nodes: half-width around
# the reference spot and spacing (linear interpolation; the ratio moves on the scale of the volatility
# over the time left, at least a day's: 0.015 at 30% volatility, about 15 node spacings).
MERTON_EXACT_ROWS = 64
MERTON_TABLE_WIDTH = 1.5
MERTON_TABLE_SPACING = 0.001


@functools.lru_cache(maxsize=512)
def _merton_ratio_table(problem: HedgingProblem, t_days: float) -> tuple[np.ndarray, np.ndarray]:
    """Log-spot nodes and the Merton minimum-variance ratio there, at time ``t_days`` (cached)."""
    center = math.log(problem.reference_spot)
    count = int(round(2 * MERTON_TABLE_WIDTH / MERTON_TABLE_SPACING)) + 1
    nodes = np.linspace(center - MERTON_TABLE_WIDTH, center + MERTON_TABLE_WIDTH, count)
    spot = np.exp(nodes)
    value, delta = problem.model_greeks(spot, t_days)[:2]
    return nodes, _merton_ratio(problem, spot, t_days, value, delta)


def _merton_ratio(problem: HedgingProblem, spot, t_days, value, delta) -> np.ndarray:
    """The ratio's formula (MinimumVarianceDelta), the jump expectations by Gauss-Hermite quadrature
    over the normal log jump."""
    model = problem.mark_model
    nodes, weights = np.polynomial.hermite_e.hermegauss(JUMP_NODES)
    weights = weights / weights.sum()
    growth = np.expm1(model.jump_mean + model.jump_std * nodes)  # e^z - 1 at each node
    jumped = spot[None, :] * (1.0 + growth[:, None])
    times = t_days if np.ndim(t_days) == 0 else np.broadcast_to(t_days, jumped.shape).ravel()
    moved = problem.model_greeks(jumped.ravel(), times)[0].reshape(jumped.shape)
    covariance = weights @ (growth[:, None] * (moved - value[None, :]))
    diffusion = model.volatility ** 2
    return ((diffusion * delta + model.jump_intensity * covariance / spot)
            / (diffusion + model.jump_intensity * float(weights @ (growth * growth))))


BAND_CENTERS = ("delta", "model_delta", "minimum_variance_delta")


def band_center(problem: HedgingProblem, center: str, obs: np.ndarray, book_delta=None):
    """The hedge (shares) a band is centred on, and the decoded rows: the Black-Scholes ``delta``
    (the step's delta when it is at the mark volatility), or the ``model_delta`` or
    ``minimum_variance_delta`` hedge."""
    if center == "delta":
        return DeltaHedge(problem).hedge_shares(obs, book_delta)
    policy = ModelDelta(problem) if center == "model_delta" else MinimumVarianceDelta(problem)
    return policy.act(obs) * problem.notional_shares, decode(problem, obs)


def check_center(problem: HedgingProblem, center: str, what: str = "band center") -> None:
    """``center`` is one of BAND_CENTERS, and a model hedge the problem can give."""
    if center not in BAND_CENTERS:
        raise ValueError(f"{what} must be one of {BAND_CENTERS}, got {center!r}")
    if center != "delta":  # the model hedges check what they need
        (ModelDelta if center == "model_delta" else MinimumVarianceDelta)(problem)


def leland_volatility(volatility: float, round_trip_cost: float, dt_years: float, written: bool) -> float:
    """Leland (1985) adjusted volatility; floored at a tiny positive number when the adjustment overwhelms it."""
    leland_number = math.sqrt(2.0 / math.pi) * round_trip_cost / (volatility * math.sqrt(dt_years))
    variance = volatility**2 * (1.0 + leland_number if written else 1.0 - leland_number)
    if isinstance(variance, np.ndarray):  # a mark volatility per row
        return np.sqrt(np.maximum(variance, 1e-12))
    return math.sqrt(max(variance, 1e-12))


@dataclass(frozen=True)
class LelandDelta:
    """Delta at Leland's volatility; ``cost_rate`` is the one-way proportional cost (default: the frictions')."""

    problem: HedgingProblem
    cost_rate: float | None = None
    volatility: float | None = None
    name: str = "leland"
    label = "Leland delta"

    def act(self, obs: np.ndarray) -> np.ndarray:
        problem = self.problem
        decoded = decode(problem, obs)
        vol = self.volatility
        if vol is None:
            vol = problem.marks.volatility if decoded.volatility is None else decoded.volatility
        cost = problem.frictions.cost_rate if self.cost_rate is None else self.cost_rate
        book_delta = np.zeros(len(obs))
        for written in (True, False):
            legs = tuple(leg for leg in problem.book.legs if (leg.quantity < 0) == written)
            if legs:
                sub_vol = leland_volatility(vol, 2.0 * cost, problem.dt_years, written)
                book_delta += Book(legs).value_and_delta(decoded.spot, decoded.t_days, problem.marks, sub_vol)[1]
        return -book_delta / problem.notional_shares


def _risk_aversion_scale(problem: HedgingProblem) -> float:
    """The reward's kappa, or risk-neutral one per notional value: the centre of a band's risk-aversion search."""
    kappa = problem.objective.risk_aversion
    return kappa if kappa > 0 else 1.0 / (problem.notional_shares * problem.reference_spot)


@dataclass(frozen=True)
class WhalleyWilmottBand:
    """Asymptotic optimal no-trade band around ``center`` (see :func:`band_center`), of the width
    Whalley and Wilmott give with the Black-Scholes gamma; ``risk_aversion`` per currency unit."""

    problem: HedgingProblem
    risk_aversion: float = 1.0
    center: str = "delta"
    name: str = "whalley_wilmott"
    label = "Whalley-Wilmott band"
    # Tuned around the reward's kappa (or, risk-neutral, one per notional value), 4 decades each way.
    search_spaces = {"risk_aversion": lambda problem: (_risk_aversion_scale(problem) * np.logspace(-2, 4, 13), True)}

    def __post_init__(self) -> None:
        check_center(self.problem, self.center)

    @property
    def factor_names(self) -> tuple[str, ...]:
        return () if self.center == "delta" else _state_factors(self.problem)

    def half_width_shares(self, spot, t_days, volatility=None) -> np.ndarray:
        """Band half-width in shares; gamma at ``volatility`` (per row, or None: the mark volatility)."""
        problem = self.problem
        gamma = problem.book.gamma(spot, t_days, problem.marks, volatility)
        years_left = (problem.schedule.horizon_days - np.asarray(t_days)) / problem.marks.days_per_year
        discount = np.exp(-problem.marks.rate * years_left)
        cost = problem.frictions.cost_rate
        return np.cbrt(1.5 * discount * cost * spot * gamma**2 / self.risk_aversion)

    def act(self, obs: np.ndarray, book_delta: np.ndarray | None = None) -> np.ndarray:
        center, decoded = band_center(self.problem, self.center, obs, book_delta)
        half_width = self.half_width_shares(decoded.spot, decoded.t_days, decoded.volatility)
        return _to_band(decoded.holding_shares, center, half_width) / self.problem.notional_shares

    act_with_delta = act


@dataclass(frozen=True)
class FixedBand:
    """No trade within ``half_width`` (per share of notional) of ``center`` (see :func:`band_center`);
    outside, to the nearest edge."""

    problem: HedgingProblem
    half_width: float = 0.05
    center: str = "delta"
    name: str = "fixed_band"
    label = "fixed band"
    search_spaces = {"half_width": lambda problem: (np.linspace(0.0, 0.4, 17), False)}  # per share of notional

    def __post_init__(self) -> None:
        check_center(self.problem, self.center)

    @property
    def factor_names(self) -> tuple[str, ...]:
        return () if self.center == "delta" else _state_factors(self.problem)

    def act(self, obs: np.ndarray, book_delta: np.ndarray | None = None) -> np.ndarray:
        center, decoded = band_center(self.problem, self.center, obs, book_delta)
        notional = self.problem.notional_shares
        return _to_band(decoded.holding_shares / notional, center / notional, self.half_width)

    act_with_delta = act
