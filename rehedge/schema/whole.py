"""The whole config: compute, report and export settings, and the Config that joins every section."""

from __future__ import annotations

from typing import Annotated, Any

from pydantic import Field, model_validator

from rehedge.schema.base import SEED_MAX, TABLE_POINTS_MAX, PolicyName, _Spec
from rehedge.schema.markets import MarketSpec
from rehedge.schema.policies import AgentSpec, BaselineSpec, default_baselines
from rehedge.schema.rules import CROSS_SECTION_RULES
from rehedge.schema.sections import (
    BookSpec, DataSpec, FrictionsSpec, ObjectiveSpec, PricingSpec, ScheduleSpec,
)


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
        # Cross-section defaults and rules, in order (rehedge.schema.rules): the validated config is
        # fully resolved.
        for rule in CROSS_SECTION_RULES:
            rule(self)
        return self
