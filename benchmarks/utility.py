"""The grid optimum under exponential utility against Whalley and Wilmott's band, and its solve
time against the mean-variance grid's. Measures and prints; passes nothing.

    python -m benchmarks.utility [--gamma 1.0]

The reference case's sold call (GBM, 20% volatility, 30 days), exponential utility with absolute
risk aversion gamma: for a sequence of falling costs and finer rehedging, the exact grid's no-trade
half-width at the money at mid-horizon against Whalley and Wilmott's (1997) asymptote
``(3/2 exp(-r tau) c S Gamma^2 / gamma)^(1/3)`` (their ratio should tend to 1 along the sequence),
the indifference ask's cost premium (the zero-cost grid's certainty equivalent minus this one's, at
the same rehedging) over cost^(2/3) (Whalley and Wilmott: the premium grows like cost^(2/3), so this
column should level off), the untuned Whalley-Wilmott band's share of the optimum's certainty-equivalent
gain over delta on held-out paths, and the fit time of the exponential grid over the mean-variance
grid on the same grid (target <= 2x).
"""

from __future__ import annotations

import argparse
import math
import time
from dataclasses import replace

import numpy as np
from scipy.stats import norm

from agents.baselines import DeltaHedge, WhalleyWilmottBand
from agents.grid_dp import GridDPAgent
from hedge_env.env import default_problem
from hedge_env.frictions import Frictions
from hedge_env.objective import Objective
from hedge_env.problem import Schedule
from hedge_env.rollout import rollout_many
from hedge_env.step import observation_rows

SEQUENCE = ((0.004, 1.0), (0.002, 0.5), (0.001, 0.25), (0.0005, 0.125))


def band_at_the_money(agent: GridDPAgent, k: int) -> tuple[float, float]:
    """(half-width, centre) in shares of the grid policy's no-trade region at the grid spot nearest 100."""
    i = int(np.argmin(np.abs(agent.log_spots_ - math.log(agent.problem.reference_spot))))
    stay = np.isclose(agent.policy_[k, i], agent.holdings_)
    low, high = agent.holdings_[stay].min(), agent.holdings_[stay].max()
    return 0.5 * (high - low), math.exp(agent.log_spots_[i])


def whalley_wilmott_half_width(cost: float, spot: float, tau: float, volatility: float, gamma: float,
                               strike: float = 100.0) -> float:
    d1 = (math.log(spot / strike) + 0.5 * volatility**2 * tau) / (volatility * math.sqrt(tau))
    gamma_option = norm.pdf(d1) / (spot * volatility * math.sqrt(tau))
    return (1.5 * cost * spot * gamma_option**2 / gamma) ** (1.0 / 3.0)


def start_value(agent: GridDPAgent) -> float:
    """The grid's certainty equivalent at t0 (at the reference spot, holding nothing)."""
    problem = agent.problem
    return float(agent.value(observation_rows(problem, problem.reference_spot, problem.horizon_years, 0.0)[None])[0])


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    parser.add_argument("--gamma", type=float, default=1.0)
    parser.add_argument("--paths", type=int, default=20_000, help="held-out paths of the band shares")
    args = parser.parse_args()
    problem, market = default_problem()
    objective = Objective(risk_aversion=args.gamma, kind="exponential")
    print(f"{'cost':>8}{'step (days)':>13}{'grid half-width':>17}{'WW half-width':>15}{'ratio':>8}"
          f"{'premium':>10}{'/ c^(2/3)':>11}{'WW share':>10}{'exp fit s':>11}{'m-v fit s':>11}{'time ratio':>12}")
    for cost, step_days in SEQUENCE:
        steps = int(round(problem.schedule.horizon_days / step_days))
        case = replace(problem, frictions=Frictions(cost_rate=cost), objective=objective,
                       schedule=Schedule(steps, step_days))
        grid = {"spot_points": 151, "holding_points": 401}
        started = time.perf_counter()
        agent = GridDPAgent(case, drift=0.0, volatility=market.volatility, **grid).fit()
        exp_s = time.perf_counter() - started
        started = time.perf_counter()
        GridDPAgent(replace(case, objective=Objective(risk_aversion=args.gamma)), drift=0.0,
                    volatility=market.volatility, **grid).fit()
        mv_s = time.perf_counter() - started
        k = steps // 2
        half, spot = band_at_the_money(agent, k)
        tau = case.years_to_horizon(k)
        ww = whalley_wilmott_half_width(cost, spot, tau, market.volatility, args.gamma)
        # The indifference ask's cost premium: what the cost adds to the price at this rehedging.
        free = GridDPAgent(replace(case, frictions=Frictions()), drift=0.0, volatility=market.volatility,
                           **grid).fit()
        premium = start_value(free) - start_value(agent)
        # The untuned band's share of the optimum's certainty-equivalent gain over delta, on held-out paths.
        results = rollout_many(case, {"delta": DeltaHedge(case), "ww": WhalleyWilmottBand(case, args.gamma),
                                      "grid": agent}, market, args.paths, seed=5)
        delta, band, best = (results[name].objective_value for name in ("delta", "ww", "grid"))
        print(f"{cost:>8g}{step_days:>13g}{half:>17.4f}{ww:>15.4f}{half / ww:>8.3f}{premium:>10.4f}"
              f"{premium / cost ** (2 / 3):>11.3f}{(band - delta) / (best - delta):>10.3f}{exp_s:>11.1f}"
              f"{mv_s:>11.1f}{exp_s / mv_s:>11.2f}x")


if __name__ == "__main__":
    main()
