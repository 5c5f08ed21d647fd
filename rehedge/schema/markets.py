"""The market section: one model per kind (GBM, Heston, Merton, a history), discriminated on ``model``."""

from __future__ import annotations

import datetime
import math
from pathlib import Path
from typing import Annotated, Any, Literal, Union

from pydantic import AfterValidator, BeforeValidator, Field, ValidationInfo, field_validator, model_validator

from rehedge.schema.base import (
    RATE_RANGE, ROWS_MAX, SPOT_RANGE, VARIANCE_MAX, VOLATILITY_RANGE, _Spec, _check_vol_of_vol,
    _open_unit_or_none, _rule, _show,
)


# ---------------------------------------------------------------------------
# Market, book, pricing, schedule
# ---------------------------------------------------------------------------


class _SimulatedMarketSpec(_Spec):
    """What every simulated model has: the start, the real-world growth of the price, rate and dividends."""

    spot: float = Field(ge=SPOT_RANGE[0], le=SPOT_RANGE[1],
                        description="Spot price of the underlying at the start, currency per share.")
    drift: float = Field(0.0, ge=-2, le=2, description="Real-world expected growth of the price (jumps included), annual "
                                          "decimal: E[S_t] = S_0 exp(drift t); dividends are paid on top.")
    rate: float = Field(0.0, ge=RATE_RANGE[0], le=RATE_RANGE[1],
                        description="Risk-free rate for pricing and interest on cash, annual decimal.")
    dividend_yield: float = Field(0.0, ge=0, le=0.5, description="Continuous dividend yield, annual decimal.")


class GBMMarket(_SimulatedMarketSpec):
    """Geometric Brownian motion for the underlying."""

    model: Literal["gbm"] = Field(description="Price model of the underlying.")
    volatility: float = Field(ge=VOLATILITY_RANGE[0], le=VOLATILITY_RANGE[1],
                              description="Real-world volatility of the underlying, annual decimal.")

    def pricing_volatility(self, horizon_years: float) -> float:
        """Default mark volatility (pricing.volatility when not given): the model's volatility."""
        return self.volatility

    def describe(self) -> str:
        """One line for reports."""
        return (f"GBM: spot {self.spot:g}, drift {_pct(self.drift)}, volatility {_pct(self.volatility)}, "
                f"rate {_pct(self.rate)}, dividend yield {_pct(self.dividend_yield)} (annual)")


def _pct(value: float) -> str:
    return f"{100 * value:g}%"


class HestonMarket(_SimulatedMarketSpec):
    """Heston stochastic volatility for the underlying (simulated with Andersen's QE scheme)."""

    model: Literal["heston"] = Field(description="Price model of the underlying.")
    initial_variance: float = Field(ge=0, le=VARIANCE_MAX, description="Variance v0 at the start, annual decimal^2 (0.04 = 20% vol).")
    mean_reversion: float = Field(ge=0, le=100, description="Mean-reversion speed kappa of the variance, per year.")
    long_run_variance: float = Field(ge=0, le=VARIANCE_MAX, description="Long-run variance theta, annual decimal^2.")
    vol_of_vol: Annotated[float, AfterValidator(_check_vol_of_vol)] = Field(
        ge=0, le=5, description="Volatility xi of the variance, per sqrt(year).")
    correlation: float = Field(ge=-1, le=1, description="Correlation rho of price and variance shocks, in [-1, 1].")
    variance_observed: bool = Field(
        False, description="Whether the hedger observes the current variance (appended to its observation).")

    def pricing_volatility(self, horizon_years: float) -> float:
        """Default mark volatility: the root of the expected mean variance over the horizon,
        theta + (v0 - theta) (1 - exp(-kappa T)) / (kappa T) (the variance-swap level of the model)."""
        decay = self.mean_reversion * horizon_years
        weight = -math.expm1(-decay) / decay if decay > 0 else 1.0
        return math.sqrt(self.long_run_variance + (self.initial_variance - self.long_run_variance) * weight)

    def describe(self) -> str:
        """One line for reports."""
        return (f"Heston (QE scheme): spot {self.spot:g}, drift {_pct(self.drift)}, initial variance "
                f"{self.initial_variance:g}, mean reversion {self.mean_reversion:g} per year, long-run variance "
                f"{self.long_run_variance:g}, vol of vol {self.vol_of_vol:g}, correlation {self.correlation:g}, "
                f"variance {'observed' if self.variance_observed else 'not observed'}, rate {_pct(self.rate)}, "
                f"dividend yield {_pct(self.dividend_yield)} (annual)")


class MertonMarket(_SimulatedMarketSpec):
    """Merton jump diffusion for the underlying: GBM plus lognormal jumps at Poisson times."""

    model: Literal["merton"] = Field(description="Price model of the underlying.")
    volatility: float = Field(ge=VOLATILITY_RANGE[0], le=VOLATILITY_RANGE[1],
                              description="Volatility of the diffusion part, annual decimal.")
    jump_intensity: float = Field(ge=0, le=100, description="Expected number of jumps per year.")
    jump_mean: float = Field(ge=-2, le=2, description="Mean of the log jump size (-0.05: a typical jump of about -5%).")
    jump_std: float = Field(ge=0, le=2, description="Standard deviation of the log jump size.")

    def pricing_volatility(self, horizon_years: float) -> float:
        """Default mark volatility: the total volatility of log returns, diffusion and jumps,
        sqrt(volatility^2 + jump_intensity (jump_mean^2 + jump_std^2))."""
        return math.sqrt(self.volatility**2 + self.jump_intensity * (self.jump_mean**2 + self.jump_std**2))

    def describe(self) -> str:
        """One line for reports."""
        return (f"Merton jump diffusion: spot {self.spot:g}, drift {_pct(self.drift)}, diffusion volatility "
                f"{_pct(self.volatility)}, {self.jump_intensity:g} jumps a year of log size mean "
                f"{self.jump_mean:g}, std {self.jump_std:g}, rate {_pct(self.rate)}, dividend yield "
                f"{_pct(self.dividend_yield)} (annual)")


def _to_date(value: Any) -> Any:
    """A TOML date, or an ISO date string (as config.json writes it), as a datetime.date."""
    if isinstance(value, datetime.datetime):
        return value.date()
    if isinstance(value, str):
        try:
            return datetime.date.fromisoformat(value)
        except ValueError:
            raise _rule(f"must be a date like 2024-01-31, got {_show(value)}") from None
    return value


class HistoricalMarket(_Spec):
    """Daily closes from a CSV (one row per trading day): training paths from the early part,
    held-out paths from the rolling windows of the later part (see hedge_env.history)."""

    model: Literal["historical"] = Field(description="Price model of the underlying: paths from a price history.")
    csv: str = Field(description="CSV file of dates and closes; a relative path is relative to the config file.")
    date_column: str = Field("date", description="Column of the trading dates.")
    close_column: str = Field("close", description="Column of the closes, currency per share.")
    date_format: str | None = Field(None, description="strftime format of the dates; default ISO 8601 (2024-01-31).")
    implied_volatility_column: str | None = Field(
        None, description="Column of the implied volatility per date, if any.")
    implied_volatility_unit: Literal["decimal", "percent"] = Field(
        "decimal", description="Unit of that column: 'decimal' (0.2 = 20%) or 'percent' (20).")
    marks: Literal["implied", "realised", "configured"] | None = Field(
        None, description="Mark and premium volatility: 'implied' (the column, per path and date), 'realised' "
                          "(of the training period) or 'configured' (pricing.volatility); default 'implied' "
                          "with an implied-volatility column, else 'realised'.")
    spot: float = Field(ge=SPOT_RANGE[0], le=SPOT_RANGE[1],
                        description="Spot every path is rescaled to start at, currency per share.")
    rate: float = Field(0.0, ge=RATE_RANGE[0], le=RATE_RANGE[1],
                        description="Risk-free rate for pricing and interest on cash, annual decimal.")
    dividend_yield: float = Field(0.0, ge=0, le=0.5, description="Continuous dividend yield, annual decimal.")
    split_date: Annotated[datetime.date | None, BeforeValidator(_to_date)] = Field(
        None, description="First date of the held-out part (training: the dates before it).")
    split_fraction: Annotated[float | None, AfterValidator(_open_unit_or_none)] = Field(
        None, description="Share of the rows in the training part, if no split_date; default 0.7.")
    gap_days: int | None = Field(None, ge=0, le=ROWS_MAX, description="Trading days (rows) skipped between the training and "
                                                         "the held-out part; default one horizon.")
    training: Literal["windows", "bootstrap"] = Field(
        "windows", description="Training paths: rolling windows of the training part, or its stationary "
                               "block bootstrap (data.train_paths paths).")
    stride_days: int = Field(1, ge=1, le=ROWS_MAX, description="Trading days between the starts of training windows.")
    heldout_stride_days: int | None = Field(
        None, ge=1, le=ROWS_MAX, description="Trading days between the starts of held-out windows; default one horizon "
                                "(windows that do not overlap, so confidence intervals over paths hold).")
    bootstrap_mean_block_days: float = Field(
        10.0, ge=1, le=ROWS_MAX, description="Mean block length of the stationary bootstrap, trading days.")

    @field_validator("csv")
    @classmethod
    def _relative_to_config(cls, value: str, info: ValidationInfo) -> str:
        base = (info.context or {}).get("base_dir")
        if not value:
            raise _rule("must name a CSV file")
        if base is not None and not Path(value).is_absolute():
            return str((Path(base) / value).resolve())
        return value

    @model_validator(mode="after")
    def _resolve_history(self) -> HistoricalMarket:
        if self.split_date is not None and self.split_fraction is not None:
            raise _rule("give split_date or split_fraction, not both", "split_fraction")
        if self.split_date is None and self.split_fraction is None:
            self.split_fraction = 0.7
        if self.marks is None:
            self.marks = "implied" if self.implied_volatility_column else "realised"
        if self.marks == "implied" and not self.implied_volatility_column:
            raise _rule("'implied' needs market.implied_volatility_column", "marks")
        return self

    def pricing_volatility(self, horizon_years: float) -> None:
        """None: the mark volatility of a history is known only from its data (the implied column or the
        realised volatility of the training part, see rehedge.build), or given as pricing.volatility."""
        return None

    def describe(self) -> str:
        """One line for reports."""
        return (f"Historical: closes of {self.csv} (one row per trading day), every path rescaled to start at "
                f"spot {self.spot:g}; training paths: {self.training}; rate {_pct(self.rate)}, "
                f"dividend yield {_pct(self.dividend_yield)} (annual)")


# One member per model, discriminated on `model`.
MarketSpec = Annotated[Union[GBMMarket, HestonMarket, MertonMarket, HistoricalMarket], Field(discriminator="model")]
