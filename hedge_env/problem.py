"""The hedging problem: book, marks, frictions, objective and rehedge schedule in one object."""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from functools import cached_property
from typing import Literal

import numpy as np

from hedge_env.book import Book, MarkParameters
from hedge_env.frictions import Frictions
from hedge_env.market import MARK_VOLATILITY_FACTOR
from hedge_env.objective import Objective


@dataclass(frozen=True)
class Schedule:
    """Rehedge times: ``steps`` decisions, ``step_days`` apart; the horizon is ``steps * step_days``.

    ``settlement`` says what happens at the horizon: ``"liquidate"`` unwinds
    the hedge at cost; ``"physical"`` lets options expiring at the horizon
    settle in shares, so only the residual holding is traded.
    """

    steps: int = 30
    step_days: float = 1.0
    settlement: Literal["liquidate", "physical"] = "liquidate"

    def __post_init__(self) -> None:
        if self.steps < 1 or self.step_days <= 0:
            raise ValueError(f"need steps >= 1 and step_days > 0, got {self.steps}, {self.step_days}")
        if self.settlement not in ("liquidate", "physical"):
            raise ValueError(f"settlement must be 'liquidate' or 'physical', got {self.settlement!r}")

    @property
    def horizon_days(self) -> float:
        return self.steps * self.step_days

    def time_days(self, k: int) -> float:
        return k * self.step_days


@dataclass(frozen=True)
class HedgingProblem:
    """Everything the step function needs besides the market paths.

    Parameters
    ----------
    book : Book
        Options held (signed quantities).
    marks : MarkParameters
        Black-Scholes inputs of marks and Greeks (volatility, rate, dividend yield, year basis).
    frictions : Frictions
        Costs, impact, financing, position limit.
    objective : Objective
        Risk aversion and risk measures.
    schedule : Schedule
        Rehedge interval, number of rehedges, settlement at the horizon.
    reference_spot : float
        Spot that observations are scaled by (the starting spot).
    mark_volatility_observed : bool
        The market supplies the mark volatility per path and time (factor
        ``mark_volatility``, e.g. an implied volatility) and lists it first
        among its observed factors, so observation column 3 carries it and
        policies price their Greeks at it; ``marks.volatility`` is then only
        a typical level (scales and quotes).
    mark_model : HestonPricer or MertonPricer, optional
        Marks (and the step's deltas) at this model's price
        (:mod:`hedge_env.model_pricing`) instead of Black-Scholes at
        ``marks.volatility``; the model's state (the Heston variance) comes per
        path from the market factor :attr:`mark_factor` (observation column
        ``mark_state_column`` when the hedger observes it). ``marks`` still holds
        the rate, dividend yield and year basis, and the Black-Scholes
        volatility of the baselines that price at it.
    """

    book: Book
    marks: MarkParameters = field(default_factory=MarkParameters)
    frictions: Frictions = field(default_factory=Frictions)
    objective: Objective = field(default_factory=Objective)
    schedule: Schedule = field(default_factory=Schedule)
    reference_spot: float = 100.0
    mark_volatility_observed: bool = False
    mark_model: object | None = None
    mark_state_column: int | None = None

    @property
    def mark_factor(self) -> str | None:
        """The market factor the marks read per path: the model's state (None: it has none) or,
        with Black-Scholes marks, a mark volatility (when the market supplies one)."""
        return self.mark_model.state_factor if self.mark_model is not None else MARK_VOLATILITY_FACTOR

    def book_value_and_delta(self, spot, t_days, state=None, legs=None, scalar: bool = False):
        """The book's mark and delta (shares) at ``t_days``: at the mark model's price with its state
        ``state`` per path, or Black-Scholes at the mark volatility (``state``: per path, or None)."""
        if self.mark_model is None:
            if scalar:
                return self.book.value_and_delta_scalar(spot, t_days, self.marks, state, legs)
            return self.book.value_and_delta(spot, t_days, self.marks, state, legs)
        value, delta, _ = self.model_greeks(spot, t_days, state, legs)
        return (float(value), float(delta)) if scalar else (value, delta)

    def model_greeks(self, spot, t_days, state=None, legs=None):
        """The book's value, delta and dV/d(state) at the mark model's price; ``t_days`` one time or
        one per row."""
        spot = np.asarray(spot, dtype=float)
        if np.ndim(t_days) == 0:
            return self.book.model_greeks(self.mark_model, spot, float(t_days), self.marks, state, legs)
        # Rows at several times: one pass per time, each with the legs live then.
        out = np.zeros((3, *spot.shape))
        state = None if state is None else np.broadcast_to(state, spot.shape)
        for t in np.unique(t_days):
            rows = t_days == t
            greeks = self.book.model_greeks(self.mark_model, spot[rows], float(t), self.marks,
                                                     None if state is None else state[rows])
            for part, values in zip(out, greeks):
                part[rows] = values
        return out[0], out[1], out[2]

    @property
    def model_hedge_observable(self) -> bool:
        """Whether a policy can compute the mark model's Greeks from its observation rows (a model
        with no state, or one whose state is observed)."""
        return self.mark_model is not None and (self.mark_model.state_factor is None
                                                or self.mark_state_column is not None)

    def observed_mark_state(self, obs):
        """The mark model's state in observation rows (None for a model without one)."""
        return None if self.mark_state_column is None else np.asarray(obs[:, self.mark_state_column], dtype=float)

    @cached_property
    def dt_years(self) -> float:
        return self.schedule.step_days / self.marks.days_per_year

    @cached_property
    def horizon_years(self) -> float:
        return self.schedule.horizon_days / self.marks.days_per_year

    @cached_property
    def notional_shares(self) -> float:
        return self.book.notional_shares

    def years_to_horizon(self, k: int) -> float:
        return (self.schedule.steps - k) * self.dt_years

    def horizon_growth(self, k: int) -> float:
        """What one unit of step k's P&L (booked at t_{k+1}) grows to by the horizon in the cash account."""
        return math.exp(self.frictions.cash_rate * (self.years_to_horizon(k) - self.dt_years))

    def days_from_years_to_horizon(self, years_left):
        """Days elapsed at an observation's years to horizon: how policies read time.

        Values within 1e-4 days of a rehedge time snap to it, so float32
        observations cannot move a time across an option's expiry.
        """
        days = self.schedule.horizon_days - np.asarray(years_left, dtype=float) * self.marks.days_per_year
        on_grid = np.rint(days / self.schedule.step_days) * self.schedule.step_days
        return np.where(np.abs(days - on_grid) < 1e-4, on_grid, days)
