"""The batch agents (agents.linear, agents.fitted_q) and their data (agents.dataset) against theory,
the step function and scikit-learn's conventions. The grid DP has its own tests (test_grid_dp.py).

References, named beside each check:
- Black and Scholes (1973): with free trading the variance-minimising hedge of an option is its delta.
- docs/references.md, "The grid optimum and the reference case" (our own earlier measurement): under proportional
  costs the optimum beats plain delta hedging on the reference case; paired differences on the same
  held-out paths, 95% confidence interval from their own standard error.
- Least squares (identity): normal equations X'X, X'y of disjoint blocks of rows add up to those of
  their union, so a fit from streamed chunks is the fit from the concatenated data.
- scikit-learn's estimator conventions (get_params, clone, any regressor plugs in) and joblib's
  persistence: common practice of the libraries, no source.
- hedge_env.step.hedge_step is the one place of the accounting: the dataset's rewards are its rewards.
"""

from __future__ import annotations

import inspect
import math
from dataclasses import replace
from functools import lru_cache

import joblib
import numpy as np
import pytest
from scipy.interpolate import RegularGridInterpolator
from sklearn.base import clone
from sklearn.exceptions import NotFittedError
from sklearn.linear_model import Ridge
from sklearn.neighbors import KNeighborsRegressor
from threadpoolctl import threadpool_limits

from agents.backward import DEFAULT_BAND_WIDTHS, candidate_targets
from agents.baselines import DeltaHedge
from agents.dataset import Exploration, Transitions, collect_chunks, replayed_next_spots
from agents.features import POLYNOMIAL_BASIS, basis_columns, combination, hedge_move, state_features
from agents.fitted_q import FittedQAgent
from agents.fitted_q import _bilinear as table_bilinear
from agents.linear import LinearBasisAgent
from agents.registry import AGENTS as AGENT_KINDS
from hedge_env.env import default_problem
from hedge_env.frictions import Frictions
from hedge_env.rollout import rollout, rollout_many
from hedge_env.step import hedge_step, initial_state, observe

TRAINING_PATHS = 10_000
TRAINING_SEED = 7
HELD_OUT_PATHS = 20_000
HELD_OUT_SEED = 20_260_101
SMALL_PATHS = 400  # checks of identities and plumbing, not of learning
SMALL_SEED = 5
AGENTS = {"linear": LinearBasisAgent, "fitted_q": FittedQAgent}


@pytest.fixture(autouse=True, scope="module")
def one_thread_per_numerical_library():
    # On a busy 2-core machine BLAS and OpenMP threads contend and the fits run 5 to 10 times slower
    # (measured); the small matrix products and tree fits here gain nothing from threads.
    with threadpool_limits(1):
        yield


def reference(cost_rate: float = 0.001):
    """The reference case (hedge_env.env.default_problem) at a proportional cost rate."""
    problem, market = default_problem()
    return replace(problem, frictions=Frictions(cost_rate=cost_rate)), market


@lru_cache(maxsize=None)
def training_halves(cost_rate: float) -> tuple[Transitions, Transitions]:
    """The training transitions of the reference case, in two halves of the paths."""
    problem, market = reference(cost_rate)
    return tuple(collect_chunks(problem, market, TRAINING_PATHS, TRAINING_SEED, Exploration(),
                                chunk_paths=TRAINING_PATHS // 2))


@lru_cache(maxsize=None)
def training_data(cost_rate: float) -> Transitions:
    return Transitions.concat(list(training_halves(cost_rate)))


@lru_cache(maxsize=None)
def fitted(kind: str, cost_rate: float):
    """An agent of the given kind, default settings, fitted once for the module."""
    return AGENTS[kind](reference(cost_rate)[0]).fit(training_data(cost_rate))


def rows_at(problem, spots: np.ndarray, k: int, holding: np.ndarray) -> np.ndarray:
    return np.column_stack([spots / problem.reference_spot, np.full(spots.size, problem.years_to_horizon(k)),
                            holding])


def delta_hedge(problem, spots: np.ndarray, k: int) -> np.ndarray:
    """Minus the book's Black-Scholes delta per share of notional."""
    return -problem.book.value_and_delta(spots, problem.schedule.time_days(k), problem.marks)[1] / (
        problem.notional_shares)


def paired(a: np.ndarray, b: np.ndarray) -> tuple[float, float]:
    """Mean and standard error of the per-path difference a - b."""
    difference = a - b
    return float(difference.mean()), float(difference.std(ddof=1) / math.sqrt(difference.size))


def small_data(problem, market, seed: int = SMALL_SEED, exploration: Exploration = Exploration(),
               chunk_paths: int = SMALL_PATHS) -> Transitions:
    return Transitions.concat(list(collect_chunks(problem, market, SMALL_PATHS, seed, exploration, chunk_paths)))


def mixed_batch(problem, n: int = 300, seed: int = 3) -> np.ndarray:
    """Observation rows at random decision times, spots and holdings near the reference case's."""
    rng = np.random.default_rng(seed)
    k = rng.integers(0, problem.schedule.steps, n)
    years_left = (problem.schedule.steps - k) * problem.dt_years
    return np.column_stack([np.exp(0.05 * rng.standard_normal(n)), years_left, rng.uniform(0.0, 1.0, n)])


# --- zero costs: the frictionless hedge -----------------------------------------------------------

# Decision times from day 5 (spot std 2.3% by then, so 95..105 lies within the training paths' spread)
# to day 25, before the last days where the hedge of an at-the-money option turns steep.
ZERO_COST_DAYS = (5, 10, 15, 20, 25)
NEAR_THE_MONEY = np.linspace(95.0, 105.0, 21)


def zero_cost_gaps(kind: str, days=ZERO_COST_DAYS) -> np.ndarray:
    """|agent target - delta hedge| per share of notional, holding at the hedge, (days, spots)."""
    agent = fitted(kind, 0.0)
    problem = agent.problem
    gaps = []
    for k in days:
        hedge = delta_hedge(problem, NEAR_THE_MONEY, k)
        gaps.append(np.abs(agent.act(rows_at(problem, NEAR_THE_MONEY, k, hedge)) - hedge))
        print(f"{kind} day {k}: max |target - delta| = {gaps[-1].max():.4f}")
    return np.array(gaps)


def test_zero_cost_linear_agent_holds_the_black_scholes_delta_within_5_percent_near_the_money():
    # Black and Scholes (1973): without costs the variance-minimising holding is minus the book delta.
    # Over 7 training sets the largest gap on this grid was 0.017-0.022 (measured).
    assert zero_cost_gaps("linear").max() <= 0.05


def test_zero_cost_linear_agent_at_the_first_decision_stays_near_delta_off_the_start_spot():
    # Black and Scholes (1973) again. At day 0 every training state sits at the start spot, so the
    # moneyness terms of the basis are zero up to rounding; the ridge must shrink them to nothing rather
    # than scale them up (they had coefficients of 1e13-1e29 and sent every spot but 100 to the widest
    # band edge, 0.25 from delta). Over 5 training seeds the largest gap was 0.006-0.034 (measured).
    agent = fitted("linear", 0.0)
    assert np.abs(agent.coef_[0]).max() < 10.0  # measured 0.02-0.52
    assert zero_cost_gaps("linear", days=(0,)).max() <= 0.05


def test_zero_cost_fitted_q_agent_holds_the_black_scholes_delta_within_two_hedge_moves():
    # Black and Scholes (1973). The tree agent does not meet the linear agent's 0.05 everywhere: over
    # 11 training sets of 10,000 paths its largest gap on this grid was 0.017-0.118 (median 0.062),
    # with 0-3% of the points beyond 0.05; 20,000 paths gave 0.017, 0.034 and 0.087 on 3 (measured).
    # Gaps come in the candidates' steps of the hedge move (0.062 here), so the tolerance is two moves,
    # which rules out the outermost band edge (2.7 moves), and 95% of the points within 0.05.
    gaps = zero_cost_gaps("fitted_q")
    move = fitted("fitted_q", 0.0).move_
    print(f"hedge move {move:.4f}; share of points within 0.05: {(gaps <= 0.05).mean():.3f}")
    assert gaps.max() <= 2.0 * move
    assert (gaps <= 0.05).mean() >= 0.95


def test_fitted_q_without_its_linear_stage_fits_the_trees_alone():
    problem = reference(0.001)[0]
    agent = FittedQAgent(problem, linear_basis="none").fit(training_data(0.001))
    assert agent.linear_terms == () and agent.linear_coef_.shape == (problem.schedule.steps, 0)
    with_stage = fitted("fitted_q", 0.001)
    assert len(with_stage.linear_terms) > 0 and np.any(with_stage.linear_coef_ != 0)
    obs = rows_at(problem, np.linspace(95.0, 105.0, 5), 10, np.full(5, -0.5))
    assert np.all(np.isfinite(agent.act(obs)))


# --- proportional costs: the reference case ------------------------------------------------------


def test_both_agents_beat_delta_hedging_at_10_bps_on_held_out_paths():
    # docs/references.md, "The grid optimum and the reference case" (our measurement): under costs the optimum gains over delta on the objective. Paired
    # per-path summed reward, agent minus delta, on held-out paths: the 95% CI lies above 0.
    problem, market = default_problem()
    policies = {kind: fitted(kind, 0.001) for kind in AGENTS} | {"delta": DeltaHedge(problem)}
    assert policies["linear"].problem == problem
    results = rollout_many(problem, policies, market, HELD_OUT_PATHS, HELD_OUT_SEED)
    for kind in AGENTS:
        gain, error = paired(results[kind].reward, results["delta"].reward)
        print(f"{kind} - delta = {gain:.4f}, 95% CI [{gain - 1.96 * error:.4f}, {gain + 1.96 * error:.4f}]")
        assert gain - 1.96 * error > 0


# --- the linear agent's normal equations ---------------------------------------------------------


def relative_difference(a: np.ndarray, b: np.ndarray) -> float:
    return float(np.abs(np.asarray(a) - np.asarray(b)).max() / np.abs(b).max())


@pytest.mark.parametrize("k", [0, 15, 29], ids=["first", "middle", "last"])
def test_linear_normal_equations_of_two_halves_sum_to_those_of_the_whole(k):
    # Least squares (identity): statistics add over disjoint rows; the fixed-effects centring is within
    # a state, so splitting by paths loses nothing. Later steps' coefficients are the fitted ones.
    agent = fitted("linear", 0.001)
    first, second = training_halves(0.001)
    whole = training_data(0.001)
    summed = agent.step_statistics(first, k) + agent.step_statistics(second, k)
    full = agent.step_statistics(whole, k)
    assert summed.rows == full.rows == whole.actions[k].size
    for name in ("xtx", "xty", "yty"):
        assert relative_difference(getattr(summed, name), getattr(full, name)) <= 1e-9
        # The fit accumulated the same statistics at this step.
        assert relative_difference(getattr(agent.statistics_[k], name), getattr(full, name)) <= 1e-9


def test_linear_agent_fitted_from_streamed_chunks_has_the_coefficients_of_the_concatenated_fit():
    # Least squares (identity): the streamed fit sums the chunks' normal equations before each solve.
    # Sums in another order differ by rounding only. The fitted Q values on the training rows (within
    # each state, what the fit identifies) agree to 1e-9 (measured 2e-11 to 7e-11 over 3 data sets).
    # The coefficients are less determined: "target" and "gap" are the same column within a state and
    # the ridge system's condition number reaches 1e13-1e18, so they agree to 1e-8 of each step's
    # largest coefficient (measured 4e-10 to 3.5e-9 over 8 data sets).
    problem, market = reference(0.001)

    def chunks():
        return collect_chunks(problem, market, SMALL_PATHS, SMALL_SEED, Exploration(), chunk_paths=SMALL_PATHS // 4)

    whole = Transitions.concat(list(chunks()))
    streamed = LinearBasisAgent(problem).fit(chunks)
    concatenated = LinearBasisAgent(problem).fit(whole)
    for k in range(problem.schedule.steps):
        state = state_features(problem, whole.obs[k])
        q_streamed, q_whole = (combination(agent.terms, agent.coef_[k], state, whole.actions[k])
                               for agent in (streamed, concatenated))
        assert relative_difference(q_streamed - q_streamed.mean(axis=1, keepdims=True),
                                   q_whole - q_whole.mean(axis=1, keepdims=True)) <= 1e-9, k
        assert relative_difference(streamed.coef_[k], concatenated.coef_[k]) <= 1e-8, k
    batch = mixed_batch(problem)
    assert np.array_equal(streamed.act(batch), concatenated.act(batch))


@pytest.mark.parametrize("kind", AGENTS)
@pytest.mark.parametrize("exponential", [False, True], ids=["mean_variance", "exponential"])
def test_next_values_shared_across_holdings_are_the_tiled_values_to_the_bit(kind, exponential):
    # The fit's next-state values read the holding-free candidates once per state (agents.backward,
    # value_at_holdings); they must be the greedy values of the next states repeated per tried target
    # (Transitions.next_observations), to the bit, so that a fit and a run's metrics do not move. A
    # position limit clips candidates on both routes.
    from hedge_env.objective import Objective

    problem, market = reference(0.001)
    problem = replace(problem, frictions=replace(problem.frictions, position_limit_shares=0.9 * problem.notional_shares))
    if exponential:
        problem = replace(problem, objective=Objective(kind="exponential", risk_aversion=1e-3))
    data = small_data(problem, market)
    agent = AGENTS[kind](problem).fit(data)
    assert not agent._reads_holding()
    for k in (0, 11, problem.schedule.steps - 2):
        tiled = agent.value(data.next_observations(k), k + 1).reshape(data.next_holding[k].shape)
        shared = agent.value_at_holdings(data.next_obs[k], data.next_holding[k], k + 1)
        assert np.array_equal(shared, tiled), k
    # A basis that reads the holding takes the tiled route.
    assert AGENTS[kind](problem, basis=("gap^2", "abs_trade")).fit(data)._reads_holding()


# --- persistence and scikit-learn conventions ----------------------------------------------------


@pytest.mark.parametrize("kind", AGENTS)
def test_fitted_agent_saved_with_joblib_acts_identically_after_loading(kind, tmp_path):
    agent = fitted(kind, 0.001)
    path = tmp_path / f"{kind}.joblib"
    joblib.dump(agent, path)
    loaded = joblib.load(path)
    batch = mixed_batch(agent.problem)
    assert np.array_equal(loaded.act(batch), agent.act(batch))
    rows = training_data(0.001).obs[12]  # one decision time: the agents' fast path
    assert np.array_equal(loaded.act(rows), agent.act(rows))


@pytest.mark.parametrize("regressor", [Ridge(alpha=1e-3), KNeighborsRegressor(n_neighbors=20)],
                         ids=["ridge", "k_neighbours"])
def test_fitted_q_agent_takes_any_scikit_learn_regressor_and_gives_finite_candidate_targets(regressor):
    problem, market = reference(0.001)
    agent = FittedQAgent(problem, regressor=regressor).fit(small_data(problem, market))
    assert all(type(fit) is type(regressor) and fit is not regressor for fit in agent.regressors_)
    batch = mixed_batch(problem)
    targets = agent.act(batch)
    assert targets.shape == (len(batch),) and np.isfinite(targets).all()
    # Each target is one of the candidates of its row.
    for k in np.unique(np.rint(problem.days_from_years_to_horizon(batch[:, 1]))):
        rows = np.rint(problem.days_from_years_to_horizon(batch[:, 1])) == k
        state = state_features(problem, batch[rows])
        candidates = candidate_targets(state, agent.band_widths, agent.partial_moves, np.inf, agent.move_)
        assert (candidates == targets[rows, None]).any(axis=1).all()


class CountingRidge(Ridge):
    """A ridge regression that records how many rows it was fitted on."""

    def fit(self, X, y, sample_weight=None):
        self.rows_ = len(X)
        return super().fit(X, y, sample_weight)


def test_fitted_q_keeps_at_most_its_row_cap_per_decision_time_thinning_whole_states_evenly():
    problem, market = reference(0.001)
    data = small_data(problem, market)
    rows = data.n_states * data.actions.shape[-1]
    uncapped = FittedQAgent(problem, regressor=CountingRidge()).fit(data)
    assert {fit.rows_ for fit in uncapped.regressors_} == {rows}
    cap = rows // 3 + 1
    capped = FittedQAgent(problem, regressor=CountingRidge(), max_rows_per_step=cap).fit(data)
    stride = math.ceil(data.n_states / (cap // data.actions.shape[-1]))  # every third state, all its targets
    expected = math.ceil(data.n_states / stride) * data.actions.shape[-1]
    assert {fit.rows_ for fit in capped.regressors_} == {expected}
    assert expected <= cap
    assert np.isfinite(capped.act(mixed_batch(problem))).all()


@pytest.mark.parametrize("kind", AGENTS)
def test_get_params_returns_the_constructor_arguments_and_clone_gives_an_unfitted_equal_agent(kind):
    agent = fitted(kind, 0.001)
    params = agent.get_params()
    assert set(params) == set(inspect.signature(type(agent)).parameters)
    assert params["problem"] == agent.problem and params["basis"] == agent.basis
    copy = clone(agent)
    assert copy.get_params() == params
    assert not hasattr(copy, "coef_") and not hasattr(copy, "regressors_")
    changed = clone(agent).set_params(name="renamed")
    assert changed.name == "renamed" and agent.name == kind


def test_candidate_set_always_holds_no_trade_the_hedge_and_every_band_edge():
    problem, _ = reference(0.001)
    batch = mixed_batch(problem, n=500)
    batch[:, 2] = np.random.default_rng(4).uniform(-1.0, 1.0, len(batch))
    move = hedge_move(problem)
    for k in range(problem.schedule.steps):
        rows = batch.copy()
        rows[:, 1] = problem.years_to_horizon(k)
        state = state_features(problem, rows)
        candidates = candidate_targets(state, DEFAULT_BAND_WIDTHS, (0.25, 0.5, 0.75), np.inf, move)
        required = [state.holding, state.hedge] + [state.hedge + sign * width * move
                                                   for width in DEFAULT_BAND_WIDTHS for sign in (-1.0, 1.0)]
        for value in required:
            assert (candidates == value[:, None]).any(axis=1).all()


def test_grouped_combination_equals_the_design_times_the_coefficients_for_any_terms():
    # Identity (distributivity): combination groups terms by their target factors, sums the state
    # factors per row and powers by Horner's rule; only rounding may differ from design @ coefficients.
    problem, _ = reference(0.001)
    rng = np.random.default_rng(8)
    terms = POLYNOMIAL_BASIS + ("1", "moneyness", "hat4", "trade*abs_trade", "gap*target^2*gamma",
                                "abs_trade^3*hat4", "target", "years_left*gap^2", "gap*gap")
    coef = rng.normal(size=len(terms))
    for k in (0, 17, problem.schedule.steps - 1):
        rows = mixed_batch(problem, n=400, seed=k)
        rows[:, 1] = problem.years_to_horizon(k)
        state = state_features(problem, rows)
        targets = candidate_targets(state, DEFAULT_BAND_WIDTHS, (0.25, 0.5, 0.75), np.inf, hedge_move(problem))
        expected = np.tensordot(coef, basis_columns(terms, state, targets), axes=1)
        scale = np.abs(basis_columns(terms, state, targets) * coef[:, None, None]).sum(axis=0).max()
        assert np.max(np.abs(combination(terms, coef, state, targets) - expected)) <= 1e-13 * scale


def test_fitted_q_table_reading_is_bilinear_interpolation_clamped_at_the_grid_edges():
    # scipy.interpolate.RegularGridInterpolator (method "linear"), a reference library, at points
    # clipped to the grid. The reader clamps 1e-6 of a cell inside the upper edges, which moves a value
    # there by at most 1e-6 of the largest difference between neighbouring table entries.
    rng = np.random.default_rng(9)
    x_grid, y_grid = np.linspace(-0.3, 0.25, 31), np.linspace(-6.0, 6.0, 41)
    table = rng.normal(size=(31, 41)).cumsum(axis=0).cumsum(axis=1)
    x = rng.uniform(-0.4, 0.35, 500)
    y = rng.uniform(-7.0, 7.0, (500, 9))
    reference_reader = RegularGridInterpolator((x_grid, y_grid), table, method="linear")
    points = np.stack(np.broadcast_arrays(np.clip(x, x_grid[0], x_grid[-1])[:, None],
                                          np.clip(y, y_grid[0], y_grid[-1])), axis=-1)
    expected = reference_reader(points.reshape(-1, 2)).reshape(y.shape)
    step = max(np.abs(np.diff(table, axis=0)).max(), np.abs(np.diff(table, axis=1)).max())
    assert np.max(np.abs(table_bilinear(table, x_grid, y_grid, x, y) - expected)) <= 2e-6 * step + 1e-12


# --- the dataset ----------------------------------------------------------------------------------


def test_transitions_have_the_documented_shapes_and_one_flat_row_per_tried_action():
    problem, market = reference(0.001)
    exploration = Exploration(actions_per_state=3)
    data = small_data(problem, market, exploration=exploration, chunk_paths=150)
    steps, n, m = problem.schedule.steps, SMALL_PATHS, 3
    assert data.obs.shape == data.next_obs.shape == (steps, n, 3)
    assert data.actions.shape == data.rewards.shape == data.next_holding.shape == (steps, n, m)
    assert (data.steps, data.n_states) == (steps, n)
    flat = data.flat()
    assert {name: len(values) for name, values in flat.items()} == dict.fromkeys(flat, steps * n * m)
    assert flat["done"].sum() == n * m and flat["done"][-n * m:].all()
    np.testing.assert_array_equal(data.next_observations(4)[:, 2], data.next_holding[4].reshape(-1))
    np.testing.assert_array_equal(data.obs[1:], data.next_obs[:-1])  # the trajectory follows column 0
    np.testing.assert_array_equal(data.obs[1:, :, 2], data.next_holding[:-1, :, 0])


def test_dataset_rewards_are_the_step_function_rewards_of_every_tried_target():
    # The state is rebuilt along the behaviour's path (column 0) with hedge_step itself; every tried
    # target of a state must get hedge_step's reward and holding from that state.
    problem, market = reference(0.001)
    data = small_data(problem, market)
    paths = market.generate(SMALL_PATHS, problem.schedule.steps, problem.dt_years, SMALL_SEED)
    notional = problem.notional_shares
    state = initial_state(problem, paths.spot[:, 0])
    for k in range(problem.schedule.steps):
        np.testing.assert_allclose(data.obs[k], observe(problem, state), rtol=0, atol=1e-12)
        for j in range(data.actions.shape[2]):
            outcome = hedge_step(problem, state, data.actions[k, :, j] * notional, paths.spot[:, k + 1])
            np.testing.assert_allclose(data.rewards[k, :, j], outcome.reward, rtol=0, atol=1e-9)
            np.testing.assert_allclose(data.next_holding[k, :, j], outcome.state.holding / notional, rtol=0,
                                       atol=1e-12)
        state = hedge_step(problem, state, data.actions[k, :, 0] * notional, paths.spot[:, k + 1]).state


def test_under_permanent_impact_every_replayed_target_gets_the_next_spot_hedge_step_gives_it():
    # A material impact: a trade of one notional moves every later price by exp(0.1) (about 10.5%).
    # Each tried target moves the market differently, so its next spot, its next observation and its
    # reward must be hedge_step's for that target (the step's accounting, hedge_env/step.py).
    problem, market = reference(0.001)
    notional = problem.notional_shares
    problem = replace(problem, frictions=Frictions(cost_rate=0.001, permanent_impact=0.1, adv_shares=notional))
    data = small_data(problem, market)
    paths = market.generate(SMALL_PATHS, problem.schedule.steps, problem.dt_years, SMALL_SEED)
    n, m = data.n_states, data.actions.shape[2]
    state = initial_state(problem, paths.spot[:, 0])
    largest_gap = 0.0
    for k in range(problem.schedule.steps):
        spots = replayed_next_spots(problem, data, k)
        next_obs = data.next_observations(k, spots / problem.reference_spot).reshape(n, m, -1)
        for j in range(m):
            outcome = hedge_step(problem, state, data.actions[k, :, j] * notional, paths.spot[:, k + 1])
            np.testing.assert_allclose(data.rewards[k, :, j], outcome.reward, rtol=0, atol=1e-9)
            np.testing.assert_allclose(spots[:, j], outcome.state.spot, rtol=1e-13, atol=0)
            np.testing.assert_allclose(next_obs[:, j, 0], outcome.state.spot / problem.reference_spot,
                                       rtol=1e-13, atol=0)
            np.testing.assert_allclose(next_obs[:, j, 2], outcome.state.holding / notional, rtol=0, atol=1e-12)
        largest_gap = max(largest_gap, float(np.max(np.abs(spots / spots[:, :1] - 1.0))))
        state = hedge_step(problem, state, data.actions[k, :, 0] * notional, paths.spot[:, k + 1]).state
    assert largest_gap > 0.01  # the targets really do move the market apart


@lru_cache(maxsize=None)
def _material_impact_scores():
    """The 5-day one-share book of tests/agents/test_grid_dp.py, where a trade of the whole book moves
    every later price by about 10.5%: the linear agent's and not hedging's held-out rewards, and the
    grid optimum's V_0 (41 x 61 points; its grid error is measured there at 3.4e-3)."""
    from agents.baselines import NoHedge
    from agents.grid_dp import GridDPAgent
    from hedge_env.book import Book, OptionLeg
    from hedge_env.objective import Objective
    from hedge_env.problem import HedgingProblem, Schedule

    problem = HedgingProblem(book=Book((OptionLeg("call", 100.0, 5.0, -1.0),)),
                             frictions=Frictions(cost_rate=0.001, permanent_impact=0.1, adv_shares=1.0),
                             objective=Objective(risk_aversion=1.0), schedule=Schedule(steps=5, step_days=1.0))
    _, market = default_problem()
    data = Transitions.concat(list(collect_chunks(problem, market, 4000, TRAINING_SEED, Exploration(), 2000)))
    agent = LinearBasisAgent(problem).fit(data)
    optimum = GridDPAgent(problem, volatility=market.volatility, spot_points=41, holding_points=61,
                          quadrature_nodes=8).fit()
    value = float(optimum.value(np.array([[1.0, problem.years_to_horizon(0), 0.0]]))[0])
    results = rollout_many(problem, {"linear": agent, "none": NoHedge(problem)}, market, HELD_OUT_PATHS, HELD_OUT_SEED)
    return results["linear"].reward, results["none"].reward, value


def test_under_permanent_impact_a_learned_agent_is_bounded_by_the_optimum():
    # No policy's expected objective exceeds the optimum, which the grid DP's V_0 gives within its
    # grid error (1e-2 allowed, three times the measured 3.4e-3): the agent's held-out mean is at
    # most V_0 + 1e-2 + 3 standard errors. Before, this case checked only that numbers were finite.
    reward, _, value = _material_impact_scores()
    assert reward.mean() <= value + 1e-2 + 3 * reward.std(ddof=1) / math.sqrt(reward.size)


@pytest.mark.xfail(strict=True, reason="a known defect that issue 26 (trades that move the price) takes up: under "
                   "material permanent impact the learned agents lose to not hedging (held out: linear -3.71, "
                   "fitted Q -1.31, no hedge -0.985, grid optimum -0.416; delta -29.7)")
def test_under_permanent_impact_a_learned_agent_improves_on_not_hedging():
    reward, none, _ = _material_impact_scores()
    difference = reward - none
    assert difference.mean() - 1.96 * difference.std(ddof=1) / math.sqrt(difference.size) > 0


def test_delta_only_exploration_rewards_sum_to_the_delta_rollout_rewards_path_by_path():
    problem, market = reference(0.001)
    data = small_data(problem, market, exploration=Exploration(no_trade=0.0, delta=1.0))
    assert (data.rewards == data.rewards[:, :, :1]).all()  # every tried target is the hedge
    result = rollout(problem, DeltaHedge(problem), market, SMALL_PATHS, SMALL_SEED)
    np.testing.assert_allclose(data.rewards[:, :, 0].sum(axis=0), result.reward, rtol=0, atol=1e-9)


def test_same_seed_gives_identical_transitions_and_another_seed_does_not():
    problem, market = reference(0.001)
    first, again, other = (small_data(problem, market, seed) for seed in (SMALL_SEED, SMALL_SEED, SMALL_SEED + 1))
    for name in ("obs", "actions", "rewards", "next_obs", "next_holding"):
        assert np.array_equal(getattr(first, name), getattr(again, name))
        assert not np.array_equal(getattr(first, name), getattr(other, name))


@pytest.mark.parametrize("kind", sorted(AGENT_KINDS))
def test_an_unfitted_agent_refuses_to_act_with_scikit_learns_not_fitted_error(kind):
    # scikit-learn's convention (common practice, no source): predicting before fit raises NotFittedError.
    problem, _ = default_problem()
    with pytest.raises(NotFittedError):
        AGENT_KINDS[kind](problem).act(np.array([[1.0, problem.horizon_years, 0.0]]))


def test_an_unpenalised_fit_on_a_singular_basis_is_the_minimum_norm_least_squares_one():
    # ridge = 0 is a valid config; two identical columns make X X^T singular. The fit must be the
    # minimum-norm least-squares solution (numpy's lstsq on the design itself), not a LinAlgError.
    from agents.linear import NormalEquations

    rng = np.random.default_rng(4)
    column = rng.normal(size=200)
    X = np.vstack([column, column, rng.normal(size=200)])
    y = 2.0 * column + 0.5 * X[2] + rng.normal(scale=0.1, size=200)
    coef = NormalEquations.of(X, y).solve(ridge=0.0)
    expected = np.linalg.lstsq(X.T, y, rcond=None)[0]
    np.testing.assert_allclose(coef, expected, rtol=1e-8, atol=1e-10)
