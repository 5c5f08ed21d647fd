"""The options book being hedged.

Quantities are signed: + long, - short, in contracts; a contract is
``multiplier`` shares. The book value is sum(quantity * multiplier * price),
so a short book has a negative value (a liability of the hedger).

An option is live at time t (days) while ``expiry_days > t``. At the first
grid time on or after its expiry it is worth its payoff, is settled in cash
at that payoff and leaves the book; the step function does the settlement.
"""

from __future__ import annotations

from dataclasses import dataclass
from functools import cached_property, lru_cache
from typing import Literal

import numpy as np

from hedge_env import pricing

# Time comparisons in days: float sums of step sizes must not flip an expiry.
_DAYS_TOLERANCE = 1e-7


@dataclass(frozen=True)
class OptionLeg:
    """One European option position.

    Parameters
    ----------
    kind : "call" or "put"
    strike : float
        Currency per share.
    expiry_days : float
        Days from the start of the hedge to expiry.
    quantity : float
        Contracts, + long, - short.
    multiplier : float
        Shares per contract.
    """

    kind: Literal["call", "put"]
    strike: float
    expiry_days: float
    quantity: float
    multiplier: float = 1.0

    def __post_init__(self) -> None:
        if self.kind not in ("call", "put"):
            raise ValueError(f"option kind must be 'call' or 'put', got {self.kind!r}")
        if not (self.strike > 0 and self.expiry_days > 0 and self.multiplier > 0):
            raise ValueError(f"strike, expiry_days and multiplier must be > 0, got {self}")

    # Cached: read on every step of every path; a frozen leg cannot change them.
    @cached_property
    def is_call(self) -> bool:
        return self.kind == "call"

    @cached_property
    def shares(self) -> float:
        """Signed shares of underlying the position refers to (quantity x multiplier)."""
        return self.quantity * self.multiplier

    def live_at(self, t_days: float) -> bool:
        return self.expiry_days > t_days + _DAYS_TOLERANCE


@dataclass(frozen=True)
class MarkParameters:
    """Inputs of the Black-Scholes marks: volatility, rate, dividend yield (annual) and the year basis."""

    volatility: float = 0.2
    rate: float = 0.0
    dividend_yield: float = 0.0
    days_per_year: float = 365.0


@dataclass(frozen=True)
class Book:
    """A set of option legs, valued and risk-measured under Black-Scholes."""

    legs: tuple[OptionLeg, ...]

    def __post_init__(self) -> None:
        if not self.legs:
            raise ValueError("a book needs at least one option")

    @cached_property
    def notional_shares(self) -> float:
        """Sum of |quantity| x multiplier: the scale of holdings in observations and actions."""
        return float(sum(abs(leg.shares) for leg in self.legs))

    @lru_cache(maxsize=1024)
    def live_legs(self, t_days: float) -> tuple[OptionLeg, ...]:
        """Legs not yet expired at ``t_days`` (cached: the same few times recur every path)."""
        return tuple(leg for leg in self.legs if leg.live_at(t_days))

    def _years_left(self, leg: OptionLeg, t_days, marks: MarkParameters):
        return (leg.expiry_days - t_days) / marks.days_per_year

    def value(self, spot, t_days: float, marks: MarkParameters, volatility=None, legs=None) -> np.ndarray:
        """Book value at ``t_days`` of ``legs`` (default: those live at ``t_days``).

        Legs at or past expiry are worth their payoff. ``volatility`` overrides
        the mark volatility (a scalar or an array like ``spot``).
        """
        return self.value_and_delta(spot, t_days, marks, volatility, legs)[0]

    def value_and_delta(self, spot, t_days, marks: MarkParameters, volatility=None, legs=None):
        """Book value and delta (shares) of ``legs`` (default: those live at ``t_days``).

        ``t_days`` may be a scalar or an array like ``spot`` (rows at different
        times); with an array, each leg counts where it is live.
        """
        vol = marks.volatility if volatility is None else volatility
        scalar_time = type(t_days) is float or np.ndim(t_days) == 0  # the type test spares a numpy call
        if legs is None:
            legs = self.live_legs(float(t_days)) if scalar_time else self.legs
        value = delta = None
        for leg in legs:
            tau = self._years_left(leg, t_days, marks)
            # The position size is folded into the pricing's scalar factors: no pass over the arrays.
            leg_value, leg_delta = pricing.price_and_delta(
                spot, leg.strike, tau, vol, marks.rate, marks.dividend_yield, leg.is_call, leg.shares
            )
            if not scalar_time:
                live = leg.expiry_days > t_days + _DAYS_TOLERANCE
                leg_value = np.where(live, leg_value, 0.0)
                leg_delta = np.where(live, leg_delta, 0.0)
            if value is None:
                value, delta = leg_value, leg_delta
            else:
                value += leg_value
                delta += leg_delta
        if value is None:
            return np.zeros(np.shape(spot)), np.zeros(np.shape(spot))
        return value, delta

    def model_greeks(self, model, spot: np.ndarray, t_days: float, marks: MarkParameters, state=None, legs=None):
        """Book value, delta (shares) and sensitivity to the model's state (dV/dv for Heston, 0 for
        Merton) at the price of ``model`` (a pricer of :mod:`hedge_env.model_pricing`) with its state
        ``state`` (per path, or None), at one time."""
        value, delta, vega = np.zeros(np.shape(spot)), np.zeros(np.shape(spot)), np.zeros(np.shape(spot))
        for leg in self.live_legs(float(t_days)) if legs is None else legs:
            leg_value, leg_delta, leg_vega = model.value_delta_vega(
                spot, leg.strike, self._years_left(leg, t_days, marks), state, leg.is_call, leg.shares)
            value += leg_value
            delta += leg_delta
            vega += leg_vega
        return value, delta, vega

    def gamma(self, spot, t_days, marks: MarkParameters, volatility=None) -> np.ndarray:
        """Book gamma (shares per currency unit of spot) of the legs live at ``t_days``."""
        vol = marks.volatility if volatility is None else volatility
        total = np.zeros(np.shape(spot))
        for leg in self.legs:
            live = leg.expiry_days > np.asarray(t_days) + _DAYS_TOLERANCE
            tau = self._years_left(leg, t_days, marks)
            leg_gamma = pricing.gamma(spot, leg.strike, tau, vol, marks.rate, marks.dividend_yield)
            total += np.where(live, leg.shares * leg_gamma, 0.0)
        return total

    def delivered_shares(self, spot, legs) -> np.ndarray:
        """Shares the hedger receives (+) or delivers (-) when ``legs`` settle physically at ``spot``."""
        spot = np.asarray(spot, dtype=float)
        total = np.zeros(spot.shape)
        for leg in legs:
            in_the_money = spot > leg.strike if leg.is_call else spot < leg.strike
            total += np.where(in_the_money, leg.shares if leg.is_call else -leg.shares, 0.0)
        return total

    # Scalar versions for the single-path environment: math only, no numpy.

    def value_and_delta_scalar(self, spot: float, t_days: float, marks: MarkParameters, volatility=None,
                               legs=None) -> tuple[float, float]:
        vol = marks.volatility if volatility is None else volatility
        value = delta = 0.0
        for leg in self.live_legs(t_days) if legs is None else legs:
            leg_value, leg_delta = pricing.price_and_delta_scalar(
                spot, leg.strike, self._years_left(leg, t_days, marks), vol,
                marks.rate, marks.dividend_yield, leg.is_call,
            )
            shares = leg.shares
            value += shares * leg_value
            delta += shares * leg_delta
        return value, delta
