"""The config schema: every table of a desk's TOML config as a typed model, with its defaults and
the rules that join sections (cross-field rules live here, so loading a config checks everything a
run would).

Conventions: lengths are in days, rates are annual decimals (0.20 = 20%), money
is in the config's currency, quantities are in contracts or shares. A rule is
raised as ``_rule(text, *key_path)``; :mod:`rehedge.config` turns it into one
line that starts with the TOML key path, e.g.
``book.options[1].strike: must be > 0, got -5``.
"""

from __future__ import annotations

import datetime
import difflib
import math
import re
from pathlib import Path
from typing import Annotated, Any, Literal, Union

from pydantic import (
    AfterValidator,
    BaseModel,
    BeforeValidator,
    ConfigDict,
    Field,
    ValidationInfo,
    field_validator,
    model_validator,
)
from pydantic_core import PydanticCustomError

from agents.grid_heston import DEFAULT_GRID as HESTON_GRID_DEFAULTS
from agents.registry import REGRESSORS
from hedge_env.market import MARKET_MODELS
from hedge_env.objective import OBJECTIVE_FORMS, Objective

# ---------------------------------------------------------------------------
# Small validation helpers
# ---------------------------------------------------------------------------

_NAME_RE = re.compile(r"[A-Za-z0-9_.-]+")
# A name is part of folder and file names (NAME-TIMESTAMP-2.partial, agents/NAME.joblib, a sweep
# cell's NAME-key-value...), and a file name may have 255 bytes: 64 leaves room for the rest.
MAX_NAME_CHARS = 64

# Plausible ranges of the numeric keys (docs/config-ranges.md lists every key's, with the reasons).
# A value outside one is far from any market or book a desk hedges, and past it the numbers lose
# their meaning (overflow, a grid that cannot fit in memory) before they lose their finiteness.
SPOT_RANGE = (1e-4, 1e9)  # currency per share: a dear share in a currency of small units is below 1e9
VOLATILITY_RANGE = (1e-4, 5.0)  # annual: 500%, the history loader's bound on implied volatilities too
VARIANCE_MAX = 25.0  # a variance of 25 is a volatility of 500%
RATE_RANGE = (-0.2, 2.0)  # annual: policy rates have gone from -0.75% to above 100%
EXPIRY_DAYS_MAX = 3660.0  # ten years of calendar days
QUANTITY_MAX = 1e7  # contracts in one position
SHARES_MAX = 1e12  # shares: more than any company has issued
MONEY_MAX = 1e9  # currency, a fixed cost per trade: beyond any ticket charge
RISK_AVERSION_MAX = 1e6  # per currency unit: a million times a desk's usual 1 per currency unit
HALF_WIDTH_MAX = 10.0  # a band half-width, in shares per share of notional
STEPS_MAX = 20_000  # rehedges in one horizon (ten years of hourly rehedges is about 20,000)
PATHS_MAX = 50_000_000  # paths in one set: the memory estimate refuses far fewer on most machines
SEED_MAX = 2**63 - 1  # the largest integer TOML holds
ROWS_MAX = 100_000  # trading days: four centuries of rows
GRID_POINTS_MAX = 2001  # per axis of a grid optimum: its error is far below the noise at a few hundred
TABLE_POINTS_MAX = 10_001  # per axis of an exported hedge table (its rows are capped too: rehedge/budget.py)


def _rule(rule: str, *path: str | int) -> PydanticCustomError:
    """A validation error with a short rule; ``path`` is appended to the error location."""
    return PydanticCustomError("config_rule", "{rule}", {"rule": rule, "path": tuple(path)})


def _num(value: Any) -> Any:
    """Integer-valued floats as ints, for bounds and converted values (0.0 -> 0)."""
    if isinstance(value, float) and value.is_integer():
        return int(value)
    return value


def _show(value: Any) -> str:
    """Render an offending value briefly, in TOML terms where it matters."""
    if isinstance(value, bool):
        return "true" if value else "false"
    if isinstance(value, dict):
        return "a table"
    if isinstance(value, list) and len(repr(value)) > 60:
        return f"an array of {len(value)} items"
    text = repr(value)
    if len(text) > 60:
        text = text[:57] + "..."
    return text


def _check_name(value: str) -> str:
    if not _NAME_RE.fullmatch(value) or set(value) == {"."}:
        raise _rule(
            "must use only letters, digits, '_', '.', '-' (it names run folders), "
            f"got {_show(value)}"
        )
    if len(value) > MAX_NAME_CHARS:
        raise _rule(f"must be at most {MAX_NAME_CHARS} characters (it names folders and files), got "
                    f"{len(value)}: {_show(value[:24])}...")
    return value


def _check_nonzero(value: float) -> float:
    if value == 0:
        raise _rule(f"must be non-zero (+ long, - short), got {_show(_num(value))}")
    return value


def _check_open_unit(value: float) -> float:
    if not 0 < value < 1:
        raise _rule(f"must be in (0, 1), got {_show(_num(value))}")
    return value


def _check_closed_unit(value: float) -> float:
    if not 0 <= value <= 1:
        raise _rule(f"must be in [0, 1], got {_show(_num(value))}")
    return value


def _open_unit_or_none(value: float | None) -> float | None:
    return value if value is None else _check_open_unit(value)


_check_open_unit.range = _open_unit_or_none.range = ("> 0", "< 1")  # read by rehedge.config_ranges
_check_closed_unit.range = (">= 0", "<= 1")


# Below this a vol of vol is numerically no different from 0, and the QE scheme's rho / xi terms
# (the variance's shock recovered from its step, times 1 / xi) lose the spot's correlated shock to
# rounding, then overflow: 0 is the deterministic variance, exact.
VOL_OF_VOL_MIN = 1e-6  # a vol of vol below it is 0 to rounding, and the simulation overflows; 0 itself is exact


def _check_vol_of_vol(value: float) -> float:
    if 0 < value < VOL_OF_VOL_MIN:
        raise _rule(f"must be 0 (a deterministic variance) or >= {VOL_OF_VOL_MIN:g}, got {_show(_num(value))}")
    return value


_check_vol_of_vol.range = (f"not in (0, {VOL_OF_VOL_MIN:g})",)


def _inf_means_no_limit(value: Any) -> Any:
    if isinstance(value, float) and value == math.inf:
        return None
    return value


def _tunable(strictly_positive: bool, high: float):
    """Validator for 'a number (> 0 or >= 0, at most ``high``) or the string "tune"'."""
    bound = "> 0" if strictly_positive else ">= 0"

    def check(value: Any) -> Any:
        if value == "tune" and isinstance(value, str):
            return value
        if isinstance(value, bool) or not isinstance(value, (int, float)):
            raise _rule(f"must be a number {bound} or 'tune', got {_show(value)}")
        if not math.isfinite(value):
            raise _rule(f"must be a finite number {bound} or 'tune', got {_show(value)}")
        if value < 0 or (strictly_positive and value == 0):
            raise _rule(f"must be {bound} or 'tune', got {_show(value)}")
        if value > high:
            raise _rule(f"must be <= {_show(_num(high))} or 'tune', got {_show(value)}")
        return float(value)

    check.range = (bound, f"<= {high:g}", "or 'tune'")  # read by rehedge.config_ranges
    return BeforeValidator(check)


PolicyName = Annotated[str, AfterValidator(_check_name)]


class _Spec(BaseModel):
    """Base for every config table: unknown keys are errors, types are strict
    (``true`` is not a number, ``30.0`` is not an integer), NaN/inf are rejected."""

    model_config = ConfigDict(extra="forbid", strict=True, allow_inf_nan=False)


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


# ---------------------------------------------------------------------------
# Policies: baselines and learned agents
# ---------------------------------------------------------------------------


class _NamedPolicy(_Spec):
    """A policy with a ``kind`` and a ``name`` that defaults to the kind."""

    @model_validator(mode="before")
    @classmethod
    def _default_name(cls, data: Any) -> Any:
        if isinstance(data, dict) and "name" not in data and "kind" in data:
            data = {**data, "name": data["kind"]}
        return data


class NoHedgeBaseline(_NamedPolicy):
    """Never trades the underlying."""

    kind: Literal["no_hedge"] = Field(description="Baseline type.")
    name: PolicyName = Field(description="Policy name in reports; defaults to the kind.")


class DeltaBaseline(_NamedPolicy):
    """Rebalances to the Black-Scholes delta every step."""

    kind: Literal["delta"] = Field(description="Baseline type.")
    name: PolicyName = Field(description="Policy name in reports; defaults to the kind.")
    volatility: float | None = Field(
        None, ge=VOLATILITY_RANGE[0], le=VOLATILITY_RANGE[1], description="Volatility for its deltas, annual decimal; defaults to pricing.volatility."
    )


class LelandBaseline(_NamedPolicy):
    """Delta hedge with Leland's cost-adjusted volatility."""

    kind: Literal["leland"] = Field(description="Baseline type.")
    name: PolicyName = Field(description="Policy name in reports; defaults to the kind.")
    cost_rate: float | None = Field(
        None, ge=0, le=1, description="Proportional cost in Leland's adjustment; defaults to frictions.cost_rate."
    )
    volatility: float | None = Field(
        None, ge=VOLATILITY_RANGE[0], le=VOLATILITY_RANGE[1], description="Base volatility, annual decimal; defaults to pricing.volatility."
    )


class WhalleyWilmottBaseline(_NamedPolicy):
    """No-trade band around delta with the Whalley-Wilmott asymptotic width."""

    kind: Literal["whalley_wilmott"] = Field(description="Baseline type.")
    name: PolicyName = Field(description="Policy name in reports; defaults to the kind.")
    risk_aversion: Annotated[float | Literal["tune"], _tunable(strictly_positive=True, high=RISK_AVERSION_MAX)] = Field(
        "tune", description="Risk aversion in the band formula, per currency unit, or 'tune' to fit it."
    )
    center: Literal["delta", "model_delta", "minimum_variance_delta"] = Field(
        "delta", description="The hedge the band is centred on: the Black-Scholes 'delta', or (with model marks) "
                             "'model_delta' or 'minimum_variance_delta'.")


class FixedBandBaseline(_NamedPolicy):
    """No-trade band of fixed half-width around delta."""

    kind: Literal["fixed_band"] = Field(description="Baseline type.")
    name: PolicyName = Field(description="Policy name in reports; defaults to the kind.")
    half_width: Annotated[float | Literal["tune"], _tunable(strictly_positive=False, high=HALF_WIDTH_MAX)] = Field(
        "tune", description="Band half-width in shares per share of book notional, or 'tune' to fit it."
    )
    center: Literal["delta", "model_delta", "minimum_variance_delta"] = Field(
        "delta", description="The hedge the band is centred on: the Black-Scholes 'delta', or (with model marks) "
                             "'model_delta' or 'minimum_variance_delta'.")


class ModelDeltaBaseline(_NamedPolicy):
    """Rebalances to the delta at the mark model's price (needs pricing.marks = 'model'; under Heston,
    market.variance_observed = true)."""

    kind: Literal["model_delta"] = Field(description="Baseline type.")
    name: PolicyName = Field(description="Policy name in reports; defaults to the kind.")


class MinimumVarianceDeltaBaseline(_NamedPolicy):
    """Rebalances to Heston's minimum-variance delta, dV/dS + rho xi / S dV/dv at the model's price
    (needs a heston market with pricing.marks = 'model' and market.variance_observed = true)."""

    kind: Literal["minimum_variance_delta"] = Field(description="Baseline type.")
    name: PolicyName = Field(description="Policy name in reports; defaults to the kind.")


BaselineSpec = Annotated[
    Union[NoHedgeBaseline, DeltaBaseline, LelandBaseline, WhalleyWilmottBaseline, FixedBandBaseline,
          ModelDeltaBaseline, MinimumVarianceDeltaBaseline],
    Field(discriminator="kind"),
]


def default_baselines() -> list:
    """The baselines used when the config has no [[baselines]]."""
    return [
        NoHedgeBaseline(kind="no_hedge"),
        DeltaBaseline(kind="delta"),
        LelandBaseline(kind="leland"),
        WhalleyWilmottBaseline(kind="whalley_wilmott", risk_aversion="tune"),
        FixedBandBaseline(kind="fixed_band", half_width="tune"),
    ]


class ExplorationSpec(_Spec):
    """Behaviour policy that collects the training transitions."""

    no_trade: Annotated[float, AfterValidator(_check_closed_unit)] = Field(
        0.3, description="Probability of keeping the holding.")
    delta: Annotated[float, AfterValidator(_check_closed_unit)] = Field(
        0.2, description="Probability of trading to the hedge (the agent's anchor).")
    spread: float = Field(1.1, ge=0, le=100, description="Std of other targets around the hedge or the holding, "
                                                 "in hedge moves (typical one-step change of the hedge).")
    actions_per_state: int = Field(8, ge=2, le=256, description="Targets replayed on each state's market move.")

    @model_validator(mode="after")
    def _probabilities(self):
        if self.no_trade + self.delta > 1:
            raise _rule(f"no_trade + delta must be <= 1, got {self.no_trade + self.delta:g}", "no_trade")
        return self


BasisTerms = Annotated[list[str], Field(min_length=1)]


class _LearnedAgent(_NamedPolicy):
    def model_inputs(self, market) -> dict:
        """Constructor arguments that the agent takes from outside its own fields: the factors it observes."""
        return {"factor_names": () if self.blind else market.observed_factors}

    blind: bool = Field(False, description="Leave out the market factors the desk observes (the variance, an "
                                           "implied volatility): the agent decides on spot, time and holding "
                                           "alone, to measure what seeing them is worth.")

    exploration: ExplorationSpec = Field(default_factory=ExplorationSpec,
                                         description="Behaviour policy of the training transitions.")
    band_widths: list[Annotated[float, Field(gt=0, le=HALF_WIDTH_MAX)]] | None = Field(
        None, description="Band edges around the hedge among the candidate targets, in hedge moves; "
                          "default the agent's own.")
    drift: float | None = Field(None, ge=-2, le=2, description="Annual drift for the control variate; default estimated "
                                                  "from the training paths.")
    anchor: Literal["delta", "model_delta", "minimum_variance_delta"] = Field(
        "delta", description="The hedge the agent measures its targets from: the Black-Scholes delta (the "
                             "model's under Merton marks), or a hedge at the mark model's Greeks.")


class FittedQAgentSpec(_LearnedAgent):
    """Fitted Q iteration over a scikit-learn regressor, one regression per decision time."""

    kind: Literal["fitted_q"] = Field(description="Agent type.")
    name: PolicyName = Field(description="Policy name in reports; defaults to the kind.")
    regressor: Literal[tuple(REGRESSORS)] = Field(  # type: ignore[valid-type]
        "hist_gradient_boosting", description="scikit-learn regressor by name.")
    regressor_params: dict[str, Any] = Field(default_factory=dict,
                                             description="Keyword arguments of the regressor.")
    basis: BasisTerms | None = Field(None, description="Feature columns (agents.features); default the tree set.")
    linear_basis: BasisTerms | Literal["polynomial", "none"] = Field(
        "polynomial", description="Terms of the linear stage fitted before the regressor, which then fits what "
                                  "it leaves: the linear agent's default basis, a list of terms, or none.")
    max_rows_per_step: int = Field(2_000_000, ge=1000, le=PATHS_MAX, description="Regression rows kept per decision time "
                                   "(every r-th training state beyond it): bounds memory at any path count.")

    @model_validator(mode="after")
    def _known_regressor_parameters(self) -> FittedQAgentSpec:
        known = REGRESSORS[self.regressor]().get_params()
        unknown = sorted(set(self.regressor_params) - set(known))
        if unknown:
            close = difflib.get_close_matches(unknown[0], list(known), n=1, cutoff=0.6)
            hint = f" (did you mean {close[0]!r}?)" if close else ""
            raise _rule(f"unknown parameter {unknown[0]!r} for {self.regressor}{hint}", "regressor_params")
        for key, value in self.regressor_params.items():  # scikit-learn's own check, one parameter at a time
            try:
                REGRESSORS[self.regressor]().set_params(**{key: value})._validate_params()
            except (TypeError, ValueError) as error:  # InvalidParameterError is a ValueError
                rule = re.sub(r"^The '[^']*' parameter of \w+ ", "", " ".join(str(error).split()))
                raise _rule(f"{rule} (scikit-learn's rule for {self.regressor})", "regressor_params", key) from None
        return self

    def model_inputs(self, market) -> dict:
        """Constructor arguments that the agent takes from outside its own fields: the regressor."""
        regressor = REGRESSORS[self.regressor]().set_params(**self.regressor_params)
        return {**super().model_inputs(market), "regressor": regressor}


class LinearAgentSpec(_LearnedAgent):
    """Linear-basis agent: ridge least squares on basis functions, backward in time."""

    kind: Literal["linear"] = Field(description="Agent type.")
    name: PolicyName = Field(description="Policy name in reports; defaults to the kind.")
    basis: BasisTerms | None = Field(None, description="Basis terms (agents.features); default the polynomial set.")
    ridge: float = Field(1e-6, ge=0, le=1e6, description="Ridge penalty relative to each column's sum of squares.")
    smoothing: float = Field(0.0, ge=0, le=1e6, description="Shrinkage toward the next decision time's coefficients.")


class GridDPAgentSpec(_NamedPolicy):
    """Model-based dynamic programming on a (time, log spot, holding) grid: the reference optimum (GBM)."""

    kind: Literal["grid_dp"] = Field(description="Agent type.")
    name: PolicyName = Field(description="Policy name in reports; defaults to the kind.")
    spot_points: int = Field(151, ge=11, le=GRID_POINTS_MAX, description="Log-spot grid points.")
    holding_points: int = Field(201, ge=11, le=GRID_POINTS_MAX, description="Holding grid points (also the candidate targets).")
    quadrature_nodes: int = Field(16, ge=4, le=128, description="Gauss-Hermite nodes of the next-spot expectation.")

    def model_inputs(self, market) -> dict:
        """Constructor arguments that the agent takes from the market it solves: drift and volatility."""
        return {"drift": market.drift, "volatility": market.volatility}


class HestonGridDPAgentSpec(_NamedPolicy):
    """Model-based dynamic programming on a (time, log spot, variance, holding) grid: the reference
    optimum under Heston."""

    kind: Literal["heston_grid_dp"] = Field(description="Agent type.")
    name: PolicyName = Field(description="Policy name in reports; defaults to the kind.")
    spot_points: int = Field(HESTON_GRID_DEFAULTS["spot_points"], ge=11, le=GRID_POINTS_MAX, description="Log-spot grid points.")
    variance_points: int = Field(HESTON_GRID_DEFAULTS["variance_points"], ge=5, le=GRID_POINTS_MAX,
                                 description="Variance grid points (equally spaced in volatility from 0).")
    holding_points: int = Field(HESTON_GRID_DEFAULTS["holding_points"], ge=11, le=GRID_POINTS_MAX,
                                description="Holding grid points (also the candidate targets).")
    variance_nodes: int = Field(HESTON_GRID_DEFAULTS["variance_nodes"], ge=3, le=128,
                                description="Quadrature nodes of the next variance.")
    spot_nodes: int = Field(HESTON_GRID_DEFAULTS["spot_nodes"], ge=3, le=128,
                            description="Gauss-Hermite nodes of the next spot given the variance.")

    def model_inputs(self, market) -> dict:
        """Constructor arguments that the agent takes from outside its own fields: the Heston market it solves."""
        return {"market": market}


AgentSpec = Annotated[
    Union[FittedQAgentSpec, LinearAgentSpec, GridDPAgentSpec, HestonGridDPAgentSpec],
    Field(discriminator="kind"),
]


class ComputeSpec(_Spec):
    """How much of the machine a run uses."""

    threads: int = Field(1, ge=1, le=1024, description="BLAS and OpenMP threads of training and scoring: 1 keeps a busy "
                                              "machine from oversubscribing; results are the same at any count.")


class ReportSpec(_Spec):
    """Held-out report settings."""

    reference_policy: PolicyName = Field("delta", description="Policy the others are compared against.")
    bootstrap_samples: int = Field(2000, ge=100, le=1_000_000, description="Bootstrap resamples for confidence intervals.")


class ExportSpec(_Spec):
    """Policy export settings."""

    policy: PolicyName | None = Field(None, description="Name of the policy to export; None = none chosen.")
    moneyness_points: int = Field(101, ge=2, le=TABLE_POINTS_MAX, description="Hedge table nodes in moneyness (spot / reference spot).")
    holding_points: int = Field(41, ge=2, le=TABLE_POINTS_MAX, description="Hedge table nodes in the current holding, shares.")
    moneyness_width: float = Field(
        4.0, gt=0, le=20, description="Half-width of the table's moneyness domain, in standard deviations of log spot "
                               "over the horizon (pricing volatility).")
    state_points: int = Field(13, ge=2, le=TABLE_POINTS_MAX, description="Hedge table nodes in the observed variance or implied "
                                                    "volatility, for a policy that reads it (equally spaced in "
                                                    "volatility).")
    currency: str | None = Field(None, description="Currency label written into the hedge table's sidecar.")


# ---------------------------------------------------------------------------
# The whole config
# ---------------------------------------------------------------------------


class Config(_Spec):
    """A desk's scenario: book, market, frictions, risk appetite, data and policies."""

    name: PolicyName = Field(description="Scenario name, used in run folder names.")
    seed: int = Field(ge=0, le=SEED_MAX, description="Master seed; data seeds derive from it unless given.")
    description: str = Field("", description="Free text about the scenario.")
    currency: str = Field("currency units", min_length=1, max_length=32,
                          description="The money unit every screen, report and hedge table names (e.g. \"EUR\").")
    market: MarketSpec = Field(description="Model of the underlying.")
    book: BookSpec = Field(description="Options to hedge.")
    pricing: PricingSpec = Field(default_factory=PricingSpec, description="Marking and Greeks.")
    schedule: ScheduleSpec = Field(description="Rehedge interval, horizon and settlement.")
    frictions: FrictionsSpec = Field(description="Trading costs, impact and financing.")
    objective: ObjectiveSpec = Field(description="Reward and risk measures.")
    data: DataSpec = Field(default_factory=DataSpec, description="Training and held-out paths.")
    baselines: list[BaselineSpec] = Field(
        default_factory=default_baselines, description="Rule-based policies to compare."
    )
    agents: list[AgentSpec] = Field(default_factory=list, description="Learned policies to train.")
    report: ReportSpec = Field(default_factory=ReportSpec, description="Report settings.")
    compute: ComputeSpec = Field(default_factory=ComputeSpec, description="Threads of native code.")
    export: ExportSpec = Field(default_factory=ExportSpec, description="Export settings.")
    sweep: dict[str, Annotated[list[Any], Field(min_length=1)]] = Field(
        default_factory=dict,
        description="Dotted keys to vary, each with its list of values, e.g. "
                    "{ \"frictions.cost_rate\" = [0.001, 0.005] }: one variant per combination.")

    @property
    def horizon_days(self) -> float:
        """Hedging horizon, days (schedule.steps * schedule.step_days)."""
        return self.schedule.horizon_days

    @property
    def notional_shares(self) -> float:
        """Book size in shares: sum of |quantity| * multiplier."""
        return float(sum(abs(o.quantity) * o.multiplier for o in self.book.options))

    @property
    def policy_names(self) -> list[str]:
        """Names of all baselines then all agents, in config order."""
        return [p.name for p in self.baselines] + [a.name for a in self.agents]

    @model_validator(mode="after")
    def _resolve(self) -> Config:
        # Cross-section defaults, so the validated config is fully resolved.
        if isinstance(self.market, HistoricalMarket):
            self._resolve_historical()
        # A market model declares whether it prices options itself (hedge_env.market, has_model_marks).
        priced = [name for name, model in MARKET_MODELS.items() if model.has_model_marks]
        model_marks = self.market.model in priced
        if self.pricing.marks is None:
            self.pricing.marks = "model" if model_marks else "black_scholes"
        if self.pricing.marks == "model" and not model_marks:
            raise _rule(f"'model' needs a {' or '.join(priced)} market (the {self.market.model} market's marks are "
                        "Black-Scholes)", "pricing", "marks")
        if self.pricing.marks == "model" and isinstance(self.market, HestonMarket):
            for key in ("vol_of_vol", "mean_reversion", "long_run_variance"):
                if not getattr(self.market, key) > 0:
                    raise _rule(f"must be > 0 for Heston model marks (pricing.marks = 'model'), got "
                                f"{_show(getattr(self.market, key))}", "market", key)
        for i, baseline in enumerate(self.baselines):
            if baseline.kind in ("model_delta", "minimum_variance_delta"):
                self._check_model_hedge(baseline.kind, i, "kind")
            if getattr(baseline, "center", "delta") != "delta":
                self._check_model_hedge(baseline.center, i, "center")
        for i, agent in enumerate(self.agents):
            if getattr(agent, "anchor", "delta") != "delta":
                self._check_model_hedge(agent.anchor, i, "anchor", "agents")
                if agent.blind and self.market.model == "heston":
                    raise _rule(f"{agent.anchor} reads the variance: not with blind = true", "agents", i, "anchor")
        if self.pricing.volatility is None:
            volatility = self.market.pricing_volatility(self.horizon_days / self.pricing.days_per_year)
            if volatility is not None and not volatility > 0:
                raise _rule("must be given: the market model's default volatility is 0", "pricing", "volatility")
            self.pricing.volatility = volatility
        for baseline in self.baselines:
            if isinstance(baseline, (DeltaBaseline, LelandBaseline)) and baseline.volatility is None:
                baseline.volatility = self.pricing.volatility
            if isinstance(baseline, LelandBaseline) and baseline.cost_rate is None:
                baseline.cost_rate = self.frictions.cost_rate

        data = self.data
        given_train, given_heldout = data.train_seed, data.heldout_seed
        if given_train is not None and given_heldout is not None and given_train == given_heldout:
            raise _rule(
                f"must differ from data.train_seed, got {given_heldout}", "data", "heldout_seed"
            )
        train = given_train if given_train is not None else 2 * self.seed + 1
        heldout = given_heldout if given_heldout is not None else 2 * self.seed + 2
        if train == heldout:  # exactly one was defaulted and collided: move the defaulted one
            if given_train is None:
                train = heldout + 1
            else:
                heldout = train + 1
        data.train_seed, data.heldout_seed = train, heldout

        last, last_expiry = max(enumerate(option.expiry_days for option in self.book.options), key=lambda o: o[1])
        if self.horizon_days > last_expiry * (1 + 1e-9):
            raise _rule(
                f"the horizon (schedule.steps x schedule.step_days = {self.horizon_days:g} days) must not run past the last "
                f"option expiry (book.options[{last}].expiry_days = {last_expiry:g})", "schedule", "steps"
            )

        # A trade of the whole book's notional moves the price by at most a factor e: beyond that the
        # model (every later price times exp(gamma d / ADV)) leaves any market a desk trades in, and a
        # policy that trades a few notionals would overflow the factor.
        impact = self.frictions.permanent_impact * self.notional_shares / self.frictions.adv_shares
        if impact > 1:
            raise _rule(f"permanent_impact x notional shares / adv_shares must be <= 1 (a trade of the whole "
                        f"book moves the price by at most a factor e), got {impact:.4g}", "frictions",
                        "permanent_impact")

        for i, agent in enumerate(self.agents):
            if agent.kind == "grid_dp" and self.market.model != "gbm":
                raise _rule(f"grid_dp solves a one-factor GBM market only, got market.model = "
                            f"{self.market.model!r}" + (" (heston_grid_dp solves Heston)" if
                                                         self.market.model == "heston" else ""),
                            "agents", i, "kind")
            if agent.kind == "heston_grid_dp":
                if self.market.model != "heston":
                    raise _rule(f"heston_grid_dp solves a Heston market only, got market.model = "
                                f"{self.market.model!r}", "agents", i, "kind")
                if self.pricing.marks != "model" or not self.market.variance_observed:
                    raise _rule("heston_grid_dp needs pricing.marks = 'model' and market.variance_observed = "
                                "true (its state is the spot, the variance and the holding)", "agents", i, "kind")
                if self.frictions.permanent_impact:
                    raise _rule("heston_grid_dp does not model permanent impact", "agents", i, "kind")
            if agent.kind == "grid_dp" and self.objective.kind == "exponential" and self.frictions.permanent_impact:
                raise _rule("grid_dp under objective.kind = 'exponential' does not model permanent impact",
                            "agents", i, "kind")
            if agent.kind == "fitted_q" and self.objective.kind == "exponential" and agent.linear_basis == "none":
                raise _rule("must not be 'none' with objective.kind = 'exponential' (the linear stage carries the "
                            "value's level across states)", "agents", i, "linear_basis")

        seen: set[str] = set()
        for section, policies in (("baselines", self.baselines), ("agents", self.agents)):
            for i, policy in enumerate(policies):
                if policy.name in seen:
                    raise _rule(f"duplicate policy name {policy.name!r}", section, i, "name")
                seen.add(policy.name)

        names = self.policy_names
        known = ", ".join(repr(n) for n in names) if names else "none (no baselines or agents)"
        reference = self.report.reference_policy
        if reference not in seen:
            default = "" if "reference_policy" in self.report.model_fields_set else " (the default)"
            raise _rule(
                f"unknown policy {reference!r}{default}; policies: {known}", "report", "reference_policy"
            )
        if self.export.policy is not None and self.export.policy not in seen:
            raise _rule(f"unknown policy {self.export.policy!r}; policies: {known}", "export", "policy")
        return self

    def _check_model_hedge(self, hedge: str, i: int, key: str, section: str = "baselines") -> None:
        """A hedge at the mark model's Greeks needs those marks, and their state where the model has one."""
        if self.pricing.marks != "model":
            raise _rule(f"{hedge} needs pricing.marks = 'model' (a heston or merton market)", section, i, key)
        if self.market.model == "heston" and not self.market.variance_observed:
            raise _rule(f"{hedge} needs market.variance_observed = true (its Greeks depend on the "
                        "variance)", section, i, key)

    def _resolve_historical(self) -> None:
        """Rules and defaults of a historical market that involve other sections."""
        market, step_days = self.market, self.schedule.step_days
        if not float(step_days).is_integer():
            raise _rule("must be a whole number of trading days (CSV rows) with market.model = 'historical', "
                        f"got {_show(_num(step_days))}", "schedule", "step_days")
        self.schedule.step_days = float(step_days)
        horizon_rows = self.schedule.steps * int(step_days)
        if market.marks == "configured" and self.pricing.volatility is None:
            raise _rule("required with market.marks = 'configured'", "pricing", "volatility")
        if market.marks != "configured" and self.pricing.volatility is not None:
            raise _rule(f"set only with market.marks = 'configured' (marks are {market.marks!r})",
                        "pricing", "volatility")
        if market.gap_days is None:
            market.gap_days = horizon_rows
        if market.heldout_stride_days is None:
            market.heldout_stride_days = horizon_rows
