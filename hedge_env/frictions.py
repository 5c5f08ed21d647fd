"""Cost models of trading and holding the hedge.

Each formula works on Python floats and on numpy arrays alike (only
arithmetic operators and ``abs``), so the single-path environment and the
vectorized rollout share them through the one step function. Trades and
holdings are in shares, prices in currency per share, rates annual.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np


@dataclass(frozen=True)
class Frictions:
    """Trading costs, price impact, financing and limits.

    Parameters
    ----------
    cost_rate : float
        Proportional cost as a fraction of traded notional (half-spread plus fees).
    fixed_cost : float
        Currency paid per trade (any non-zero trade).
    impact_coefficient : float
        Temporary impact eta: a trade of ``d`` shares at mid ``S`` costs
        ``eta * S * |d|**(1 + beta) / adv**beta``.
    impact_exponent : float
        beta: 1 is linear impact (quadratic cost), 0.5 the square-root law.
    permanent_impact : float
        gamma: after a trade of ``d`` shares every later price is multiplied
        by ``exp(gamma * d / adv)``; the hedger's own trades move the market.
        The trade itself fills halfway through that move. The step reports
        as impact cost what the desk loses to its own impact, net: that fill
        cost less the gain its own move of the price adds to the holding it
        keeps, which the hedge gain then leaves out. A buy-then-sell round
        trip with no market move nets zero P&L and reports zero impact cost.
    adv_shares : float
        Average daily volume, shares.
    cash_rate : float
        Annual rate earned (or paid, when negative) on cash, continuously compounded.
    borrow_fee : float
        Annual fee on the value of a short stock holding.
    dividend_yield : float
        Annual dividend yield: a long holding receives it, a short one pays it.
    position_limit_shares : float
        Targets are clipped to +/- this many shares.
    """

    cost_rate: float = 0.0
    fixed_cost: float = 0.0
    impact_coefficient: float = 0.0
    impact_exponent: float = 0.5
    permanent_impact: float = 0.0
    adv_shares: float = 1e6
    cash_rate: float = 0.0
    borrow_fee: float = 0.0
    dividend_yield: float = 0.0
    position_limit_shares: float = math.inf

    def __post_init__(self) -> None:
        for name in ("cost_rate", "fixed_cost", "impact_coefficient", "permanent_impact", "borrow_fee",
                     "dividend_yield"):
            if getattr(self, name) < 0:
                raise ValueError(f"{name} must be >= 0, got {getattr(self, name)}")
        if not 0.0 <= self.impact_exponent <= 1.0:
            raise ValueError(f"impact_exponent must be in [0, 1], got {self.impact_exponent}")
        if self.adv_shares <= 0 or self.position_limit_shares <= 0:
            raise ValueError("adv_shares and position_limit_shares must be > 0")

    @property
    def has_financing(self) -> bool:
        return bool(self.cash_rate or self.borrow_fee or self.dividend_yield)

    def clip_target(self, target):
        """Targets beyond the position limit are cut back to it."""
        if math.isinf(self.position_limit_shares):
            return target
        limit = self.position_limit_shares
        if isinstance(target, float):
            return min(max(target, -limit), limit)
        return np.clip(target, -limit, limit)

    def trading_cost(self, size, spot):
        """Proportional plus fixed cost of trading ``size = |d|`` shares at mid ``spot``."""
        cost = self.cost_rate * size * spot
        if self.fixed_cost:
            cost = cost + self.fixed_cost * (size > 0)
        return cost

    def impact_cost(self, size, spot):
        """Temporary impact cost of trading ``size = |d|`` shares at mid ``spot``."""
        if not self.impact_coefficient:
            return 0.0
        beta = self.impact_exponent
        # The square-root law (beta = 0.5) as size * sqrt(size): numpy's power with exponent 0.5 is a
        # square root, about 12 times faster than the general power on the learners' (rows, candidates)
        # arrays (it differs from size ** 1.5 in the last bit at most).
        grown = size * size**0.5 if beta == 0.5 else size ** (1.0 + beta)
        return self.impact_coefficient * spot * grown / self.adv_shares**beta

    def impact_factor(self, trade, exp):
        """Multiplier of all later prices after a signed trade (``exp`` is math.exp or np.exp)."""
        return exp(self.permanent_impact / self.adv_shares * trade)

    def permanent_impact_cost(self, trade, spot, factor):
        """Cost of filling a trade halfway through its own permanent impact ``factor``.

        Without it a hedger could profit from its own impact: buy, lift the
        price its holding is marked at, and sell at a mid its selling did not
        move. Filling at the mean of the pre- and post-trade mid makes a round
        trip cost about ``gamma d^2 S / adv`` instead.
        """
        return 0.5 * trade * spot * (factor - 1.0)

    def financing(self, cash, holding, spot, dt_years: float):
        """Interest on ``cash`` plus dividends minus borrow fee on ``holding`` over one step."""
        interest = cash * math.expm1(self.cash_rate * dt_years)
        carry = holding * spot * (self.dividend_yield * dt_years)
        if self.borrow_fee:
            short = (abs(holding) - holding) * 0.5
            carry = carry - short * spot * (self.borrow_fee * dt_years)
        return interest + carry
