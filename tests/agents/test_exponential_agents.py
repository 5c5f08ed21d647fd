"""The learned agents under the exponential objective: the certainty-equivalent fit (agents.certainty)
against a case with a known answer, and the agents against delta, the mean-variance agent and the
grid optimum on held-out paths."""

from __future__ import annotations

from dataclasses import replace

import numpy as np
import pytest

from agents.baselines import DeltaHedge
from agents.certainty import StepRows, certainty_equivalent_fit
from agents.dataset import Exploration, collect_chunks
from agents.fitted_q import FittedQAgent, default_regressor
from agents.grid_dp import GridDPAgent
from agents.linear import LinearBasisAgent
from hedge_env.book import Book, OptionLeg
from hedge_env.env import default_problem
from hedge_env.frictions import Frictions
from hedge_env.objective import Objective
from hedge_env.problem import Schedule
from hedge_env.rollout import rollout_many
from rehedge.compare import certainty_equivalent_bootstrap


def _synthetic(rng, n: int, m: int, gamma: float):
    """Rows with a known certainty equivalent. Y = level(s) + mu(a) + sigma(s, a) e, with e standard
    normal and shared by a state's tries (its market move): a normal's certainty equivalent is
    exactly mean - gamma/2 variance (its moment generating function; common practice, no source), so
    the second-order fit has no expansion error here and must find the truth within its own noise."""
    s = rng.uniform(-1.0, 1.0, n)
    a = rng.normal(0.0, 1.0, (n, m))
    e = rng.standard_normal(n)[:, None]
    sigma = 0.3 + 0.2 * a + 0.1 * s[:, None]
    y = (0.5 * s - 0.4 * s * s)[:, None] + 0.3 * a - 0.2 * a * a + sigma * e
    state = lambda v: np.broadcast_to(v[:, None], a.shape)  # noqa: E731
    X = np.stack([a, a * a, a * s[:, None], np.ones_like(a), state(s), state(s * s)])
    # Controls of zero mean given the state: the move e and its squared surprise (the hedge gain's
    # and the gap's own surprises are 0 here: no known part).
    targets = np.stack([y, np.zeros_like(a), np.zeros_like(a), np.broadcast_to(e, a.shape),
                        np.broadcast_to(e * e - 1.0, a.shape)])
    # Truth: expand -gamma/2 (0.3 + 0.2 a + 0.1 s)^2 into the same terms.
    truth = np.array([0.3 - gamma * 0.06, -0.2 - gamma * 0.02, -gamma * 0.02,
                      -gamma * 0.045, 0.5 - gamma * 0.03, -0.4 - gamma * 0.005])
    return StepRows.of(X, targets), truth


def test_the_certainty_equivalent_fit_finds_a_known_answer_within_its_own_noise():
    rng = np.random.default_rng(4)
    terms = ("gap", "gap^2", "gap*moneyness", "1", "moneyness", "moneyness^2")  # names for the fit: action terms first
    estimates = []
    for _ in range(12):
        rows, truth = _synthetic(rng, 20_000, 8, gamma=2.0)
        estimates.append(certainty_equivalent_fit(rows, 2.0, 1e-9, terms)[0])
    estimates = np.array(estimates)
    error = estimates.std(axis=0, ddof=1) / np.sqrt(len(estimates))
    np.testing.assert_array_less(np.abs(estimates.mean(axis=0) - truth), 4.0 * error + 1e-12)


@pytest.fixture(scope="module")
def ten_days():
    """A sold ATM 10-day call, daily rehedging at 50 bps, gamma 1: agents trained on the same
    transitions under the exponential objective and under mean-variance (kappa = gamma), scored on
    the same held-out paths."""
    problem, market = default_problem()
    problem = replace(problem, book=Book((OptionLeg("call", 100.0, 10, -1.0),)),
                      frictions=Frictions(cost_rate=0.005), schedule=Schedule(10, 1.0),
                      objective=Objective(risk_aversion=1.0, kind="exponential"))
    chunks = list(collect_chunks(problem, market, 16_000, 3, Exploration(), 8_000))
    mean_variance = replace(problem, objective=Objective(risk_aversion=1.0))
    mv_chunks = list(collect_chunks(mean_variance, market, 16_000, 3, Exploration(), 8_000))
    trees = default_regressor().set_params(max_iter=30)
    policies = {
        "delta": DeltaHedge(problem),
        "linear": LinearBasisAgent(problem).fit(lambda: chunks),
        "fitted_q": FittedQAgent(problem, regressor=trees).fit(lambda: chunks),
        "linear_mv": LinearBasisAgent(mean_variance).fit(lambda: mv_chunks),
        "grid": GridDPAgent(problem, volatility=0.2, spot_points=81, holding_points=121).fit(),
    }
    results = rollout_many(problem, policies, market, 30_000, seed=8)
    return {name: result.pnl for name, result in results.items()}


def test_agents_fitted_on_the_certainty_equivalent_beat_delta_and_the_mean_variance_agent(ten_days):
    # The point of fitting on the objective: paired over the same held-out paths (bootstrap 95%
    # intervals of certainty-equivalent differences), the agent fitted on the certainty equivalent
    # scores higher than the same agent fitted on the per-step mean-variance reward, and both
    # learned agents beat delta.
    versus_delta = certainty_equivalent_bootstrap(ten_days, "delta", 1.0, 1000, seed=9)
    assert versus_delta["linear"]["ci_low"] > 0 and versus_delta["fitted_q"]["ci_low"] > 0
    versus_mv = certainty_equivalent_bootstrap(ten_days, "linear_mv", 1.0, 1000, seed=9)
    assert versus_mv["linear"]["ci_low"] > 0


def test_no_learned_agent_beats_the_grid_optimum_beyond_the_noise(ten_days):
    versus_grid = certainty_equivalent_bootstrap(ten_days, "grid", 1.0, 1000, seed=9)
    for name in ("linear", "fitted_q", "linear_mv"):
        assert versus_grid[name]["ci_low"] < 0, name


@pytest.mark.parametrize("agent", ["linear", "fitted_q"])
def test_a_risk_aversion_beyond_the_expansion_is_refused_naming_the_key_not_fitted_to_overflow(agent):
    # 1,000 shares of sold calls at gamma 1 per currency unit: one step's outcome spreads by about 200
    # (gamma times it 200, against 0.13-0.45 on configs/reference-exponential.toml). The cumulant
    # expansion cannot carry it; before the check the fit overflowed and the linear agent scored a
    # certainty equivalent of -23,134 against delta's -2,300 on the same paths.
    from agents.certainty import ExpansionRangeError

    problem, market = default_problem()
    problem = replace(problem, book=Book((OptionLeg("call", 100.0, 10, -10.0, 100.0),)),
                      frictions=Frictions(cost_rate=0.001), schedule=Schedule(10, 1.0),
                      objective=Objective(risk_aversion=1.0, kind="exponential"))
    chunks = list(collect_chunks(problem, market, 2_000, 3, Exploration(), 2_000))
    learner = (LinearBasisAgent(problem) if agent == "linear"
               else FittedQAgent(problem, regressor=default_regressor().set_params(max_iter=5)))
    with pytest.raises(ExpansionRangeError) as info:
        learner.fit(lambda: chunks)
    message = str(info.value)
    assert message.startswith("objective.risk_aversion: ") and "\n" not in message
    # The same book at a risk aversion a thousand times smaller is within the expansion and fits.
    calm = replace(problem, objective=Objective(risk_aversion=1e-3, kind="exponential"))
    LinearBasisAgent(calm).fit(lambda: list(collect_chunks(calm, market, 2_000, 3, Exploration(), 2_000)))
