"""The hedging step: the single place where trades, costs, impact, financing,
marks and settlement are accounted for.

Every user of the dynamics (the Gymnasium env, the vector env, the batch
rollout, dataset collection) calls :func:`hedge_step`. It runs on numpy
arrays (one entry per path) or, with ``scalar=True``, on Python floats for
the single-path environment; the arithmetic is the same code either way.

Accounting of one step from t_k to t_{k+1} (holdings in shares, money in currency)::

    trade       d = a - h                         a: clipped target, h: holding
    costs       c = cost_rate |d| S + fixed [d != 0] + eta S |d|^(1+beta) / adv^beta
                    + d S (f - 1) / 2     (the trade fills halfway through its permanent impact)
    impact      f = exp(gamma d / adv);  I' = I f;  S_{k+1} = X_{k+1} I'   (X: exogenous path)
    cash        C' = C - d S - c;  financing F = C' (e^{r dt} - 1) + a S q dt - fee max(-a, 0) S dt
    marks       B_{k+1} = value at t_{k+1} of the options live at t_k (expired ones at payoff)
    P&L         dW = a (S_{k+1} - S_k) + F - c + (B_{k+1} - B_k)
    settlement  options expiring by t_{k+1} pay their payoff into cash and leave the book

The book value B is signed (a short book is negative), so wealth is
``C + h S + B``; it starts at 0 because the premium received equals the
initial mark. At the horizon the hedge is unwound at ``S_N`` with costs; with
physical settlement the shares delivered by expiring options are netted
first, so only the residual trades.
"""

from __future__ import annotations

import math
from typing import NamedTuple

import numpy as np

from hedge_env.book import OptionLeg
from hedge_env.problem import HedgingProblem


class HedgeState(NamedTuple):
    """State at decision time t_k, per path (arrays of one shape) or for one path (floats).

    A named tuple rather than a frozen dataclass: one is built every step of
    the single-path environment, and a tuple is built three times faster.

    Attributes
    ----------
    k : int
        Decision index, 0 .. steps (steps means the episode is over).
    spot : observed mid price S_k (exogenous price times the impact factor), currency.
    impact : cumulative permanent-impact factor I_k (1 without impact).
    holding : shares of underlying held, h_k.
    cash : cash account C_k, currency.
    mark : value B_k of the options still in the book, currency (signed).
    delta : delta of those options at the mark volatility, shares (signed).
    """

    k: int
    spot: np.ndarray | float
    impact: np.ndarray | float
    holding: np.ndarray | float
    cash: np.ndarray | float
    mark: np.ndarray | float
    delta: np.ndarray | float

    def wealth(self):
        return self.cash + self.holding * self.spot + self.mark


class StepOutcome(NamedTuple):
    """Result of one step; money in currency, per path.

    ``pnl`` equals ``hedge_gain + book_change + financing - trading_cost - impact_cost``.
    ``held`` is the holding over the step (the clipped target), shares;
    ``trades`` counts non-zero trades (the unwind at the horizon included):
    an int for one path, a float64 array of counts for arrays.
    ``financing`` and ``impact_cost`` are the float 0.0 when the frictions
    have none.
    """

    state: HedgeState
    held: np.ndarray | float
    pnl: np.ndarray | float
    reward: np.ndarray | float
    hedge_gain: np.ndarray | float
    book_change: np.ndarray | float
    financing: np.ndarray | float
    trading_cost: np.ndarray | float
    impact_cost: np.ndarray | float
    traded_shares: np.ndarray | float
    trades: np.ndarray | int


class _StepPlan(NamedTuple):
    """The schedule's facts about one step, worked out once per problem instead of once per call."""

    t_next: float  # days at t_{k+1}
    live_next: tuple[OptionLeg, ...]  # marked at t_{k+1}
    settling: tuple[OptionLeg, ...]  # live at t_k, expired by t_{k+1}: paid at their payoff
    last: bool  # the step that ends at the horizon (the unwind)


class _Plan(NamedTuple):
    """What hedge_step reads on every call: the schedule's steps and which frictions are on."""

    steps: tuple[_StepPlan, ...]
    clip: bool  # a finite position limit
    temporary_impact: bool
    permanent_impact: bool
    financing: bool
    physical: bool  # options expiring at the horizon settle in shares


# Problems are frozen, so their plan never goes stale; it is kept in the
# instance's __dict__ the way functools.cached_property keeps its values.
_PLAN_ATTRIBUTE = "_hedge_step_plan"


def _make_plan(problem: HedgingProblem) -> _Plan:
    book, schedule, frictions = problem.book, problem.schedule, problem.frictions
    steps = []
    for k in range(schedule.steps):
        t_now, t_next = schedule.time_days(k), schedule.time_days(k + 1)
        settling = tuple(leg for leg in book.live_legs(t_now) if not leg.live_at(t_next))
        steps.append(_StepPlan(t_next, book.live_legs(t_next), settling, k + 1 == schedule.steps))
    plan = _Plan(
        tuple(steps), not math.isinf(frictions.position_limit_shares), bool(frictions.impact_coefficient),
        bool(frictions.permanent_impact), frictions.has_financing, schedule.settlement == "physical",
    )
    problem.__dict__[_PLAN_ATTRIBUTE] = plan
    return plan


def initial_state(problem: HedgingProblem, spot, volatility=None, scalar: bool = False) -> HedgeState:
    """State at t_0: no shares, cash equal to the premium received at the mark.

    ``volatility``: the marks' per-path input at t_0, the market factor ``problem.mark_factor``
    (a mark volatility, or the mark model's state), or None."""
    if scalar:
        mark, delta = problem.book_value_and_delta(float(spot), 0.0, volatility, scalar=True)
        return HedgeState(0, float(spot), 1.0, 0.0, -mark, mark, delta)
    spot = np.asarray(spot, dtype=float)
    mark, delta = problem.book_value_and_delta(spot, 0.0, volatility)
    return HedgeState(0, spot, np.ones_like(spot), np.zeros_like(spot), -mark, mark, delta)


def hedge_step(
    problem: HedgingProblem,
    state: HedgeState,
    target,
    exogenous_next,
    volatility_next=None,
    scalar: bool = False,
) -> StepOutcome:
    """Trade to ``target`` shares at t_k, let the market move, account, settle.

    Parameters
    ----------
    problem : HedgingProblem
    state : HedgeState
        State at t_k with ``state.k < problem.schedule.steps``.
    target : float or ndarray
        Target holding in shares (clipped to the position limit); an array
        has the shape of the state's arrays.
    exogenous_next : float or ndarray
        Exogenous price X_{k+1} of the market path (before the hedger's
        impact); an array has the shape of the state's arrays.
    volatility_next : float or ndarray, optional
        The marks' per-path input at t_{k+1}: the market factor ``problem.mark_factor`` (a mark
        volatility, default ``problem.marks.volatility``, or the mark model's state).
    scalar : bool
        Work on Python floats (single path) instead of arrays.

    Returns
    -------
    StepOutcome
        The state at t_{k+1} and the P&L parts of the step. After the last
        step the holding is 0 (unwound) and the cash holds the final wealth
        less the value of options that outlive the horizon.
    """
    plan = problem.__dict__.get(_PLAN_ATTRIBUTE) or _make_plan(problem)
    if not 0 <= state.k < len(plan.steps):
        raise ValueError(f"step index {state.k} outside 0..{len(plan.steps) - 1}: the episode is over")
    step = plan.steps[state.k]
    frictions, book = problem.frictions, problem.book
    if scalar:
        target = float(target)
    if plan.clip:
        target = frictions.clip_target(target)

    # Zero terms are skipped, not added: this runs once per path and step. Augmented
    # assignments (x -= y) only ever update a temporary made in this step: on arrays they
    # work in place, so a step touches fewer buffers; on floats they are plain arithmetic.
    spot = state.spot
    trade = target - state.holding
    size = abs(trade)
    trading_cost = paid = frictions.trading_cost(size, spot)
    impact_cost = 0.0
    impact, spot_next = state.impact, exogenous_next
    if plan.temporary_impact:
        impact_cost = frictions.impact_cost(size, spot)
    if plan.permanent_impact:
        factor = frictions.impact_factor(trade, math.exp if scalar else np.exp)
        fill_cost = frictions.permanent_impact_cost(trade, spot, factor)
        impact_cost = impact_cost + fill_cost if plan.temporary_impact else fill_cost
        impact = impact * factor
        spot_next = exogenous_next * impact
    has_impact = plan.temporary_impact or plan.permanent_impact
    if has_impact:
        paid = trading_cost + impact_cost
    cash = state.cash - trade * spot
    cash -= paid
    financing = frictions.financing(cash, target, spot, problem.dt_years) if plan.financing else 0.0

    mark_next, delta_next = problem.book_value_and_delta(spot_next, step.t_next, volatility_next, step.live_next,
                                                         scalar)
    hedge_gain = spot_next - spot
    hedge_gain *= target
    book_change = mark_next - state.mark
    if step.settling:
        settled = problem.book_value_and_delta(spot_next, step.t_next, volatility_next, step.settling, scalar)[0]
        book_change += settled
        cash += settled
    pnl = hedge_gain + book_change
    pnl -= paid
    if plan.permanent_impact:
        # What the desk loses to its own impact, net: the fill cost less what the trade's own move of
        # the price adds to the holding it keeps (target x S' x (1 - 1/factor)). A round trip with no
        # market move then reports zero here, as its P&L is, and the parts still add up to the P&L.
        own_gain = spot_next - spot_next / factor
        own_gain *= target
        hedge_gain = hedge_gain - own_gain
        impact_cost = impact_cost - own_gain
    if plan.financing:
        pnl += financing
        cash += financing
    holding = target
    traded_shares = size
    # A float count for arrays: adding int64 counts to float totals costs more than the step's arithmetic.
    trades = (size > 0) * 1 if scalar else (size > 0).astype(np.float64)

    if step.last:
        # Unwind at the horizon; physically settled options hand over shares first.
        residual = target
        if plan.physical and step.settling:
            delivered = book.delivered_shares(spot_next, step.settling)
            residual = target + (float(delivered) if scalar else delivered)
        unwind = abs(residual)
        unwind_cost = frictions.trading_cost(unwind, spot_next)
        pnl -= unwind_cost
        cash += target * spot_next
        cash -= unwind_cost
        trading_cost += unwind_cost
        if has_impact:
            unwind_impact = frictions.impact_cost(unwind, spot_next)
            if plan.permanent_impact:
                factor = frictions.impact_factor(-residual, math.exp if scalar else np.exp)
                unwind_impact = unwind_impact + frictions.permanent_impact_cost(-residual, spot_next, factor)
            pnl -= unwind_impact
            cash -= unwind_impact
            impact_cost += unwind_impact
        holding = 0.0 * target
        traded_shares += unwind
        trades += unwind > 0

    next_state = HedgeState(state.k + 1, spot_next, impact, holding, cash, mark_next, delta_next)
    objective = problem.objective
    # A kind that tracks wealth (exponential utility) reads the P&L gathered before the step.
    wealth = state.wealth() if objective.form.tracks_wealth else 0.0
    return StepOutcome(
        next_state, target, pnl, objective.reward(pnl, wealth, step.last), hedge_gain, book_change, financing,
        trading_cost, impact_cost, traded_shares, trades,
    )


def observe(problem: HedgingProblem, state: HedgeState, factor_values=(), out: np.ndarray | None = None,
            dtype=np.float64) -> np.ndarray:
    """Observation rows of ``state`` at its decision time (see :func:`observation_rows`)."""
    return observation_rows(problem, state.spot, problem.years_to_horizon(state.k), state.holding, factor_values,
                            out, dtype)


def observation_rows(problem: HedgingProblem, spot, years_left, holding_shares, factor_values=(),
                     out: np.ndarray | None = None, dtype=np.float64) -> np.ndarray:
    """Observation rows ``[spot / reference spot, years to horizon, holding / notional, *factors]``.

    The one place observations are built (the envs, rollouts, datasets, the
    report and the hedge-table exporter all come here). ``spot``, ``years_left``
    (years to the horizon), ``holding_shares`` and each of ``factor_values`` (the
    observable factors) are floats or arrays that broadcast to one entry per row.
    ``out`` is an optional (n, 3 + n_factors) buffer to fill; the result is 2-D
    for arrays and 1-D when every input is a float.
    """
    if isinstance(spot, float) and np.ndim(holding_shares) == 0 and np.ndim(years_left) == 0:
        return np.array(
            (spot / problem.reference_spot, years_left, holding_shares / problem.notional_shares, *factor_values),
            dtype=dtype,
        )
    if out is None:
        rows = np.broadcast_shapes(np.shape(spot), np.shape(years_left), np.shape(holding_shares))[0]
        out = np.empty((rows, 3 + len(factor_values)), dtype=dtype)
    # Scaled straight into the columns: no temporaries to copy over.
    np.divide(spot, problem.reference_spot, out=out[..., 0])
    out[..., 1] = years_left
    np.divide(holding_shares, problem.notional_shares, out=out[..., 2])
    for j, column in enumerate(factor_values, start=3):
        out[..., j] = column
    return out
