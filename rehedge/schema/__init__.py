"""The config schema: every table of a desk's TOML config as a typed model, with its defaults and
the rules that join sections (cross-field rules live here, so loading a config checks everything a
run would). One module per part: ``base`` (helpers, ranges, the base of every section),
``markets``, ``sections`` (book, pricing, schedule, frictions, objective, data), ``policies``
(baselines and agents) and ``whole`` (the Config and its cross-section rules).

Conventions: lengths are in days, rates are annual decimals (0.20 = 20%), money
is in the config's currency, quantities are in contracts or shares. A rule is
raised as ``_rule(text, *key_path)``; :mod:`rehedge.config` turns it into one
line that starts with the TOML key path, e.g.
``book.options[1].strike: must be > 0, got -5``.
"""

from __future__ import annotations

from rehedge.schema.base import (
    MAX_NAME_CHARS, SPOT_RANGE, VOLATILITY_RANGE, VARIANCE_MAX, RATE_RANGE, EXPIRY_DAYS_MAX,
    QUANTITY_MAX, SHARES_MAX, MONEY_MAX, RISK_AVERSION_MAX, HALF_WIDTH_MAX, STEPS_MAX, PATHS_MAX,
    SEED_MAX, ROWS_MAX, GRID_POINTS_MAX, TABLE_POINTS_MAX, VOL_OF_VOL_MIN, PolicyName,
)
from rehedge.schema.markets import (
    GBMMarket, HestonMarket, MertonMarket, HistoricalMarket, MarketSpec,
)
from rehedge.schema.sections import (
    OptionSpec, BookSpec, PricingSpec, ScheduleSpec, FrictionsSpec, ObjectiveSpec, DataSpec,
)
from rehedge.schema.policies import (
    NoHedgeBaseline, DeltaBaseline, LelandBaseline, WhalleyWilmottBaseline, FixedBandBaseline,
    ModelDeltaBaseline, MinimumVarianceDeltaBaseline, BaselineSpec, default_baselines,
    ExplorationSpec, BasisTerms, FittedQAgentSpec, LinearAgentSpec, GridDPAgentSpec,
    HestonGridDPAgentSpec, AgentSpec,
)
from rehedge.schema.whole import (
    ComputeSpec, ReportSpec, ExportSpec, Config,
)

__all__ = [
    "MAX_NAME_CHARS", "SPOT_RANGE", "VOLATILITY_RANGE", "VARIANCE_MAX", "RATE_RANGE",
    "EXPIRY_DAYS_MAX", "QUANTITY_MAX", "SHARES_MAX", "MONEY_MAX", "RISK_AVERSION_MAX",
    "HALF_WIDTH_MAX", "STEPS_MAX", "PATHS_MAX", "SEED_MAX", "ROWS_MAX", "GRID_POINTS_MAX",
    "TABLE_POINTS_MAX", "VOL_OF_VOL_MIN", "PolicyName", "GBMMarket", "HestonMarket", "MertonMarket",
    "HistoricalMarket", "MarketSpec", "OptionSpec", "BookSpec", "PricingSpec", "ScheduleSpec",
    "FrictionsSpec", "ObjectiveSpec", "DataSpec", "NoHedgeBaseline", "DeltaBaseline",
    "LelandBaseline", "WhalleyWilmottBaseline", "FixedBandBaseline", "ModelDeltaBaseline",
    "MinimumVarianceDeltaBaseline", "BaselineSpec", "default_baselines", "ExplorationSpec",
    "BasisTerms", "FittedQAgentSpec", "LinearAgentSpec", "GridDPAgentSpec", "HestonGridDPAgentSpec",
    "AgentSpec", "ComputeSpec", "ReportSpec", "ExportSpec", "Config",
]
