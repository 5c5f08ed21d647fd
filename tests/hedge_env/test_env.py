"""Gymnasium views of the step (hedge_env.env): conformance, seeding, episode accounting, replay."""

from __future__ import annotations

import warnings

import gymnasium as gym
import numpy as np
import pytest
from gymnasium.utils.env_checker import check_env
from gymnasium.vector.utils import batch_space

import hedge_env  # noqa: F401  (registers rehedge/Hedging-v0)
from hedge_env import ENV_ID
from hedge_env.book import Book, MarkParameters, OptionLeg
from hedge_env.env import HedgingEnv, HedgingVectorEnv
from hedge_env.frictions import Frictions
from hedge_env.market import GBMMarket, MarketPaths
from hedge_env.objective import Objective
from hedge_env.problem import HedgingProblem, Schedule

PNL_PARTS = ("pnl", "hedge_gain", "book_change", "financing", "trading_cost", "impact_cost", "traded_shares",
             "held")


def friction_problem() -> HedgingProblem:
    return HedgingProblem(
        book=Book((
            OptionLeg("call", 100.0, 12.0, quantity=-1.0, multiplier=10.0),
            OptionLeg("put", 95.0, 6.0, quantity=1.0, multiplier=10.0),
        )),
        marks=MarkParameters(volatility=0.25, rate=0.02, dividend_yield=0.01),
        frictions=Frictions(cost_rate=0.001, fixed_cost=0.05, impact_coefficient=0.02, permanent_impact=0.05,
                            adv_shares=200.0, cash_rate=0.03, borrow_fee=0.05, dividend_yield=0.01),
        objective=Objective(risk_aversion=0.1),
        schedule=Schedule(steps=12, step_days=1.0),
    )


def run_episode(env, seed, policy=lambda obs, info: -info["delta"] / 20.0 + 0.1 * np.sin(obs[0] * 50.0)):
    """One episode; returns the observations, rewards, terminated flags and infos."""
    obs, info = env.reset(seed=seed)
    observations, rewards, terminated_flags, infos = [obs], [], [], [info]
    terminated = False
    while not terminated:
        action = np.array([policy(obs, info)], dtype=np.float32)
        obs, reward, terminated, truncated, info = env.step(action)
        assert truncated is False
        observations.append(obs)
        rewards.append(reward)
        terminated_flags.append(terminated)
        infos.append(info)
    return observations, rewards, terminated_flags, infos


# --- conformance -------------------------------------------------------------------


def test_gymnasium_env_checker_passes_on_the_registered_env():
    # Reference library: gymnasium.utils.env_checker.check_env (warnings allowed, errors not).
    env = gym.make(ENV_ID).unwrapped
    assert isinstance(env, HedgingEnv)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        check_env(env)


def test_make_vec_with_vector_entry_point_returns_the_native_vector_env_with_batched_spaces():
    # Reference library: gymnasium.make_vec. The installed gymnasium (1.x) has no vector-env
    # checker, so the VectorEnv API points are checked one by one below.
    envs = gym.make_vec(ENV_ID, num_envs=8, vectorization_mode="vector_entry_point")
    assert isinstance(envs, HedgingVectorEnv) and envs.num_envs == 8
    single = gym.make(ENV_ID).unwrapped
    assert envs.single_observation_space == single.observation_space
    assert envs.single_action_space == single.action_space
    assert envs.observation_space == batch_space(single.observation_space, 8)
    assert envs.action_space == batch_space(single.action_space, 8)
    assert envs.metadata["autoreset_mode"] == gym.vector.AutoresetMode.NEXT_STEP
    obs, info = envs.reset(seed=3)
    assert obs.shape == (8, 3) and obs.dtype == np.float32
    assert envs.observation_space.contains(obs)
    assert all(np.shape(value) == (8,) for value in info.values())
    envs.close()


def test_vector_env_steps_terminate_together_then_autoreset_next_step_with_zero_reward():
    envs = gym.make_vec(ENV_ID, num_envs=8, vectorization_mode="vector_entry_point")
    steps = envs.problem.schedule.steps
    obs, _ = envs.reset(seed=11)
    envs.action_space.seed(11)
    first_obs = obs.copy()
    for k in range(steps):
        obs, reward, terminated, truncated, info = envs.step(envs.action_space.sample())
        assert obs.shape == (8, 3) and obs.dtype == np.float32 and envs.observation_space.contains(obs)
        assert reward.shape == (8,) and reward.dtype == np.float64
        assert terminated.dtype == bool and truncated.dtype == bool and not truncated.any()
        assert terminated.all() == (k == steps - 1) and terminated.any() == (k == steps - 1)
        assert info["pnl"].shape == (8,)
    # Next-step autoreset: rewards 0, not terminated, fresh episodes at the start, no shares held.
    obs, reward, terminated, truncated, info = envs.step(envs.action_space.sample())
    np.testing.assert_array_equal(reward, 0.0)
    assert not terminated.any() and not truncated.any()
    np.testing.assert_allclose(obs[:, 1], envs.problem.horizon_years, rtol=1e-7)
    np.testing.assert_array_equal(obs[:, 2], 0.0)
    np.testing.assert_array_equal(obs[:, 0], first_obs[:, 0])  # default GBM starts every path at 100
    assert "pnl" not in info
    # ...and the new episode runs its full length again.
    for k in range(steps):
        _, _, terminated, _, _ = envs.step(envs.action_space.sample())
    assert terminated.all()


def test_vector_env_reset_with_a_seed_is_deterministic_and_seeds_differ():
    def episode(seed):
        envs = gym.make_vec(ENV_ID, num_envs=8, vectorization_mode="vector_entry_point")
        obs, _ = envs.reset(seed=seed)
        trace, rewards = [obs], []
        actions = np.linspace(-0.9, 0.9, 8, dtype=np.float32).reshape(8, 1)
        for _ in range(envs.problem.schedule.steps):
            obs, reward, *_ = envs.step(actions)
            trace.append(obs)
            rewards.append(reward)
        return np.array(trace), np.array(rewards)

    obs_a, rewards_a = episode(5)
    obs_b, rewards_b = episode(5)
    obs_c, rewards_c = episode(6)
    np.testing.assert_array_equal(obs_a, obs_b)
    np.testing.assert_array_equal(rewards_a, rewards_b)
    assert (rewards_a != rewards_c).all()


# --- the single env ---------------------------------------------------------------


def test_reset_with_the_same_seed_twice_gives_identical_episodes():
    env = HedgingEnv(friction_problem(), GBMMarket(spot=100.0, volatility=0.25))
    first = run_episode(env, seed=17)
    second = run_episode(env, seed=17)
    other = run_episode(env, seed=18)
    for a, b in zip(first[0], second[0]):
        np.testing.assert_array_equal(a, b)
    assert first[1] == second[1]
    for a, b in zip(first[3], second[3]):
        assert a.keys() == b.keys() and all(a[key] == b[key] for key in a)
    assert first[1] != other[1]


def test_episode_has_schedule_steps_steps_and_info_carries_marks_delta_and_pnl_parts():
    problem = friction_problem()
    env = HedgingEnv(problem, GBMMarket(spot=100.0, volatility=0.25))
    observations, rewards, terminated, infos = run_episode(env, seed=2)
    assert len(rewards) == problem.schedule.steps == 12
    assert terminated == [False] * 11 + [True]
    assert {"mark", "delta", "spot", "wealth"} <= infos[0].keys()
    for info in infos[1:]:
        assert {"mark", "delta", "spot", "wealth", *PNL_PARTS} <= info.keys()
    for obs in observations:
        assert obs.shape == (3,) and obs.dtype == np.float32 and env.observation_space.contains(obs)
    # After the horizon: every option has expired, the hedge is unwound.
    assert infos[-1]["mark"] == 0.0 and infos[-1]["delta"] == 0.0
    assert observations[-1][2] == 0.0 and observations[-1][1] == 0.0
    with pytest.raises(RuntimeError):
        env.step(np.array([0.0], dtype=np.float32))


def test_sum_of_info_pnl_equals_final_wealth_and_rewards_are_mean_variance_of_it():
    # Wealth starts at 0 (premium received = initial mark), so the P&L of the steps adds up to it.
    problem = friction_problem()
    env = HedgingEnv(problem, GBMMarket(spot=100.0, volatility=0.25))
    for seed in range(5):
        _, rewards, _, infos = run_episode(env, seed=seed)
        assert infos[0]["wealth"] == pytest.approx(0.0, abs=1e-12)
        pnl = [info["pnl"] for info in infos[1:]]
        assert sum(pnl) == pytest.approx(infos[-1]["wealth"], rel=1e-9, abs=1e-9)
        kappa = problem.objective.risk_aversion
        assert rewards == pytest.approx([x - 0.5 * kappa * x * x for x in pnl], rel=1e-12, abs=1e-12)


def test_env_driven_by_given_paths_replays_them():
    # Zero permanent impact, so the spot the env shows is the given path itself.
    problem = HedgingProblem(
        book=Book((OptionLeg("call", 100.0, 5.0, quantity=-1.0),)),
        frictions=Frictions(cost_rate=0.001),
        schedule=Schedule(steps=5, step_days=1.0),
    )
    spot = np.array([
        [100.0, 101.0, 99.0, 98.5, 102.0, 103.0],
        [90.0, 91.0, 92.0, 89.0, 88.0, 90.5],
        [110.0, 108.0, 111.0, 112.0, 109.0, 107.0],
    ])
    env = HedgingEnv(problem, paths=MarketPaths(spot))
    seen = set()
    for seed in range(20):
        _, _, _, infos = run_episode(env, seed=seed, policy=lambda obs, info: 0.5)
        shown = np.array([info["spot"] for info in infos])
        row = int(np.flatnonzero(spot[:, 0] == shown[0])[0])
        np.testing.assert_array_equal(shown, spot[row])
        seen.add(row)
    assert seen == {0, 1, 2}

    envs = HedgingVectorEnv(num_envs=6, problem=problem, paths=MarketPaths(spot))
    _, info = envs.reset(seed=1)
    shown = [info["spot"]]
    for _ in range(problem.schedule.steps):
        *_, info = envs.step(np.full((6, 1), 0.5, dtype=np.float32))
        shown.append(info["spot"])
    shown = np.array(shown).T
    for path in shown:
        assert any(np.array_equal(path, given) for given in spot)
