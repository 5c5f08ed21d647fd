"""Every kind of policy by the name a config gives it: adding a kind is its module plus one line here.

``BASELINES`` and ``AGENTS`` map a kind to its class; ``REGRESSORS`` maps a regressor name to a
function that returns a new unfitted scikit-learn regressor (the fitted-Q agent's own default
for the tree ensemble). The application builds policies from these mappings and nothing else.
"""

from __future__ import annotations

from sklearn import ensemble, linear_model, neighbors, neural_network

from agents.baselines import (
    DeltaHedge,
    FixedBand,
    LelandDelta,
    MinimumVarianceDelta,
    ModelDelta,
    NoHedge,
    WhalleyWilmottBand,
)
from agents.fitted_q import FittedQAgent, default_regressor
from agents.grid_dp import GridDPAgent
from agents.grid_heston import HestonGridDPAgent
from agents.linear import LinearBasisAgent

BASELINES = {
    "no_hedge": NoHedge,
    "delta": DeltaHedge,
    "leland": LelandDelta,
    "whalley_wilmott": WhalleyWilmottBand,
    "fixed_band": FixedBand,
    "model_delta": ModelDelta,
    "minimum_variance_delta": MinimumVarianceDelta,
}

AGENTS = {
    "linear": LinearBasisAgent,
    "fitted_q": FittedQAgent,
    "grid_dp": GridDPAgent,
    "heston_grid_dp": HestonGridDPAgent,
}

# Agent kinds that fit on training transitions (the others solve the model they are given).
LEARNED_FROM_TRANSITIONS = ("linear", "fitted_q")

REGRESSORS = {
    "hist_gradient_boosting": default_regressor,
    "extra_trees": ensemble.ExtraTreesRegressor,
    "random_forest": ensemble.RandomForestRegressor,
    "gradient_boosting": ensemble.GradientBoostingRegressor,
    "ridge": linear_model.Ridge,
    "k_neighbors": neighbors.KNeighborsRegressor,
    "mlp": neural_network.MLPRegressor,
}
