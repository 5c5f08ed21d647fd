"""Policies: the baselines and the learned agents, each discriminated on ``kind``."""

from __future__ import annotations

import difflib
import re
from typing import Annotated, Any, Literal, Union

from pydantic import AfterValidator, Field, model_validator

from agents.grid_heston import DEFAULT_GRID as HESTON_GRID_DEFAULTS
from agents.fitted_q import FittedQAgent
from agents.grid_dp import GridDPAgent
from agents.linear import LinearBasisAgent
from agents.registry import REGRESSORS
from rehedge.schema.base import (
    GRID_POINTS_MAX, HALF_WIDTH_MAX, PATHS_MAX, PolicyName, RISK_AVERSION_MAX, VOLATILITY_RANGE,
    _Spec, _check_closed_unit, _rule, _tunable, default_of,
)


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


# The hedge a band sits around (agents.baselines.BAND_CENTERS), one field type for every band.
BandCenter = Annotated[Literal["delta", "model_delta", "minimum_variance_delta"], Field(
    description="The hedge the band is centred on: the Black-Scholes 'delta', or (with model marks) "
                "'model_delta' or 'minimum_variance_delta'.")]


class WhalleyWilmottBaseline(_NamedPolicy):
    """No-trade band around delta with the Whalley-Wilmott asymptotic width."""

    kind: Literal["whalley_wilmott"] = Field(description="Baseline type.")
    name: PolicyName = Field(description="Policy name in reports; defaults to the kind.")
    risk_aversion: Annotated[float | Literal["tune"], _tunable(strictly_positive=True, high=RISK_AVERSION_MAX)] = Field(
        "tune", description="Risk aversion in the band formula, per currency unit, or 'tune' to fit it."
    )
    center: BandCenter = "delta"


class FixedBandBaseline(_NamedPolicy):
    """No-trade band of fixed half-width around delta."""

    kind: Literal["fixed_band"] = Field(description="Baseline type.")
    name: PolicyName = Field(description="Policy name in reports; defaults to the kind.")
    half_width: Annotated[float | Literal["tune"], _tunable(strictly_positive=False, high=HALF_WIDTH_MAX)] = Field(
        "tune", description="Band half-width in shares per share of book notional, or 'tune' to fit it."
    )
    center: BandCenter = "delta"


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
        default_of(LinearBasisAgent, "anchor"), description="The hedge the agent measures its targets from: the Black-Scholes delta (the "
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
        default_of(FittedQAgent, "linear_basis"), description="Terms of the linear stage fitted before the regressor, which then fits what "
                                  "it leaves: the linear agent's default basis, a list of terms, or none.")
    max_rows_per_step: int = Field(default_of(FittedQAgent, "max_rows_per_step"), ge=1000, le=PATHS_MAX, description="Regression rows kept per decision time "
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
    ridge: float = Field(default_of(LinearBasisAgent, "ridge"), ge=0, le=1e6, description="Ridge penalty relative to each column's sum of squares.")
    smoothing: float = Field(default_of(LinearBasisAgent, "smoothing"), ge=0, le=1e6, description="Shrinkage toward the next decision time's coefficients.")


class GridDPAgentSpec(_NamedPolicy):
    """Model-based dynamic programming on a (time, log spot, holding) grid: the reference optimum (GBM)."""

    kind: Literal["grid_dp"] = Field(description="Agent type.")
    name: PolicyName = Field(description="Policy name in reports; defaults to the kind.")
    spot_points: int = Field(default_of(GridDPAgent, "spot_points"), ge=11, le=GRID_POINTS_MAX, description="Log-spot grid points.")
    holding_points: int = Field(default_of(GridDPAgent, "holding_points"), ge=11, le=GRID_POINTS_MAX, description="Holding grid points (also the candidate targets).")
    quadrature_nodes: int = Field(default_of(GridDPAgent, "quadrature_nodes"), ge=4, le=128, description="Gauss-Hermite nodes of the next-spot expectation.")

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
