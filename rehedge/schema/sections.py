"""The book, pricing, schedule, frictions, objective and data sections."""

from __future__ import annotations

from typing import Annotated, Literal

from pydantic import AfterValidator, BeforeValidator, Field, field_validator, model_validator

from hedge_env.objective import OBJECTIVE_FORMS, Objective
from rehedge.schema.base import (
    EXPIRY_DAYS_MAX, MONEY_MAX, PATHS_MAX, QUANTITY_MAX, RISK_AVERSION_MAX, SEED_MAX, SHARES_MAX,
    SPOT_RANGE, STEPS_MAX, VOLATILITY_RANGE, _Spec, _check_closed_unit, _check_nonzero,
    _check_open_unit, _inf_means_no_limit, _rule, _show,
)


class OptionSpec(_Spec):
    """One European option position in the book."""

    kind: Literal["call", "put"] = Field(description="Option type: 'call' or 'put'.")
    strike: float = Field(ge=SPOT_RANGE[0], le=SPOT_RANGE[1], description="Strike price, currency per share.")
    expiry_days: float = Field(gt=0, le=EXPIRY_DAYS_MAX, description="Time to expiry from the start, days.")
    quantity: Annotated[float, AfterValidator(_check_nonzero)] = Field(
        ge=-QUANTITY_MAX, le=QUANTITY_MAX, description="Contracts held: positive long, negative short."
    )
    multiplier: float = Field(1.0, gt=0, le=1e5, description="Shares per contract.")


class BookSpec(_Spec):
    """The option book to hedge."""

    options: list[OptionSpec] = Field(description="Option positions, one [[book.options]] table each.")

    @field_validator("options")
    @classmethod
    def _not_empty(cls, options: list[OptionSpec]) -> list[OptionSpec]:
        if not options:
            raise _rule("must hold at least one option")
        return options


class PricingSpec(_Spec):
    """How the book is marked and its Greeks computed."""

    marks: Literal["model", "black_scholes"] | None = Field(
        None,
        description="'model': the book at the simulated model's own price (Heston by its Fourier integral, "
                    "Merton by its series; the default for heston and merton markets); 'black_scholes': at "
                    "Black-Scholes with pricing.volatility (the default, and the only choice, otherwise).",
    )

    volatility: float | None = Field(
        None,
        ge=VOLATILITY_RANGE[0],
        le=VOLATILITY_RANGE[1],
        description="Mark and Greeks volatility, annual decimal; defaults to the market model's "
                    "(market.volatility for gbm, the expected mean variance's root for heston, the total "
                    "volatility for merton).",
    )
    days_per_year: float = Field(365.0, ge=200, le=366, description="Days per year for converting days to years (252 trading days, 360 or 365 calendar days).")


class ScheduleSpec(_Spec):
    """When the hedge is rebalanced and how it ends."""

    step_days: float = Field(1.0, ge=1e-3, le=EXPIRY_DAYS_MAX, description="Rehedge interval, days.")
    steps: int = Field(ge=1, le=STEPS_MAX, description="Number of rehedges; the horizon is steps * step_days days.")
    settlement: Literal["liquidate", "physical"] = Field(
        "liquidate",
        description=(
            "At the horizon: 'liquidate' unwinds the hedge at cost; 'physical' settles options "
            "expiring at the horizon in shares and trades only the residual."
        ),
    )

    @property
    def horizon_days(self) -> float:
        """Hedging horizon, days."""
        return self.steps * self.step_days


class FrictionsSpec(_Spec):
    """Trading costs, market impact and financing."""

    cost_rate: float = Field(ge=0, le=1, description="Proportional cost, fraction of traded notional (half-spread + fees).")
    fixed_cost: float = Field(0.0, ge=0, le=MONEY_MAX, description="Fixed cost per trade, currency.")
    impact_coefficient: float = Field(
        0.0, ge=0, le=100, description="Temporary impact eta: cost eta * S * |trade|^(1+beta) / adv^beta, currency."
    )
    impact_exponent: Annotated[float, AfterValidator(_check_closed_unit)] = Field(
        0.5, description="Impact exponent beta in [0, 1]: 1 linear impact, 0.5 square-root law."
    )
    permanent_impact: float = Field(
        0.0, ge=0, le=100, description="Permanent impact gamma: later prices scale by exp(gamma * trade / adv)."
    )
    adv_shares: float = Field(1_000_000.0, ge=1, le=SHARES_MAX, description="Average daily volume of the underlying, shares.")
    borrow_fee: float = Field(0.0, ge=0, le=5, description="Fee on the value of a short stock holding, annual decimal.")
    position_limit_shares: Annotated[float | None, BeforeValidator(_inf_means_no_limit)] = Field(
        None, gt=0, le=SHARES_MAX, description="Hedge targets are clipped to +/- this many shares; absent or inf = no limit."
    )
    lot_size: float = Field(1.0, gt=0, le=SHARES_MAX, description=(
        "Shares per tradable lot: `rehedge advise` rounds each trade to whole lots (the hedge itself is not rounded)."))


class ObjectiveSpec(_Spec):
    """Risk appetite: the reward and the risk measures reported."""

    kind: Literal["mean_variance", "exponential"] = Field(
        "mean_variance",
        description=("mean_variance: the mean over paths of summed step rewards dW - kappa/2 dW^2; exponential: "
                     "the certainty equivalent -1/gamma log E[exp(-gamma P&L)] of the total P&L."),
    )
    risk_aversion: float = Field(
        ge=0, le=RISK_AVERSION_MAX, description=("kappa per currency unit: reward r = dW - kappa/2 * dW^2 per step; under kind = "
                           "'exponential', gamma, the absolute risk aversion per currency unit (> 0).")
    )
    var_levels: list[Annotated[float, AfterValidator(_check_open_unit)]] = Field(
        default_factory=lambda: [0.95, 0.99], description="Confidence levels for VaR/CVaR, each in (0, 1)."
    )
    entropic_risk_aversion: float | None = Field(
        None,
        gt=0,
        le=RISK_AVERSION_MAX,
        description=(
            "Entropic risk aversion per currency unit; defaults to risk_aversion, "
            "None (skipped) when that is 0."
        ),
    )

    @field_validator("var_levels")
    @classmethod
    def _distinct_levels(cls, levels: list[float]) -> list[float]:
        for i, level in enumerate(levels):
            if level in levels[:i]:
                raise _rule(f"duplicate level {_show(level)}", i)
        return levels

    @model_validator(mode="after")
    def _resolve_entropic(self) -> ObjectiveSpec:
        try:  # the kind's own check of its parameters (hedge_env.objective)
            OBJECTIVE_FORMS[self.kind].check(Objective(risk_aversion=self.risk_aversion))
        except ValueError:
            raise _rule(f"must be > 0 with kind = {self.kind!r} (gamma of the utility)", "risk_aversion") from None
        if self.entropic_risk_aversion is None and self.risk_aversion > 0:
            self.entropic_risk_aversion = self.risk_aversion
        return self


class DataSpec(_Spec):
    """Simulated paths for training and held-out testing."""

    train_paths: int = Field(20_000, gt=0, le=PATHS_MAX, description="Number of training paths.")
    heldout_paths: int = Field(50_000, gt=0, le=PATHS_MAX, description="Number of held-out test paths.")
    train_seed: int | None = Field(None, ge=0, le=SEED_MAX, description="Seed for training paths; defaults to 2 * seed + 1.")
    heldout_seed: int | None = Field(
        None, ge=0, le=SEED_MAX, description="Seed for held-out paths; defaults to 2 * seed + 2, always != train_seed."
    )
    chunk_paths: int = Field(16_384, gt=0, le=PATHS_MAX, description="Paths simulated per chunk (bounds memory).")
