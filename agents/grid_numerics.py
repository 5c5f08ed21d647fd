"""Numerics of the grid optimum (agents.grid_dp): the quadrature of the next spot, the reward's
quadratic coefficients, and reading Q splines over many rows at once."""

from __future__ import annotations

import math

import numpy as np
from numpy.polynomial.hermite_e import hermegauss
from numpy.polynomial.legendre import leggauss
from scipy.interpolate import CubicSpline

from hedge_env.problem import HedgingProblem

# Half-width, in standard normal units, of the Gauss-Legendre rule used on steps where options settle.
SETTLEMENT_QUADRATURE_HALF_WIDTH = 8.0


def normal_quadrature(n: int, spots: np.ndarray, strikes, mean: float, scale: float) -> tuple[np.ndarray, np.ndarray]:
    """Standard normal nodes and weights per spot, each (spots, nodes), weights summing to 1.

    Gauss-Hermite with ``n`` nodes when no option settles over the step
    (``strikes`` empty). Where options settle the integrand has kinks (payoffs)
    or jumps (delivered shares) at the strikes, where Gauss-Hermite converges
    slowly; there the real line, cut to +-8, is split into 8 pieces of width 2
    and further at each strike's node ``(log(K / S) - mean) / scale``, and every
    piece gets a Gauss-Legendre rule of ``n // 2`` (at least 4) nodes against
    the normal density.
    """
    if not strikes:
        nodes, weights = hermegauss(n)
        weights = weights / weights.sum()
        return np.broadcast_to(nodes, (spots.size, n)), np.broadcast_to(weights, (spots.size, n))
    edge = SETTLEMENT_QUADRATURE_HALF_WIDTH
    kinks = (np.log(np.asarray(strikes)[None, :] / spots[:, None]) - mean) / scale
    fixed = np.broadcast_to(np.linspace(-edge, edge, 9), (spots.size, 9))
    bounds = np.sort(np.concatenate([fixed, np.clip(kinks, -edge, edge)], axis=1), axis=1)
    unit_nodes, unit_weights = leggauss(max(4, n // 2))
    middle = 0.5 * (bounds[:, 1:] + bounds[:, :-1])
    half = 0.5 * (bounds[:, 1:] - bounds[:, :-1])
    nodes = (middle[:, :, None] + half[:, :, None] * unit_nodes).reshape(spots.size, -1)
    weights = (half[:, :, None] * unit_weights).reshape(spots.size, -1) * np.exp(-0.5 * nodes**2)
    return nodes, weights / weights.sum(axis=1, keepdims=True)


def reward_coefficients(problem: HedgingProblem) -> tuple[float, float]:
    """``(c1, c2)`` with ``objective.reward(x) = c1 x + c2 x**2``; the DP needs a reward quadratic in the P&L."""
    reward = problem.objective.reward
    up, down = float(reward(1.0)), float(reward(-1.0))
    c1, c2 = 0.5 * (up - down), 0.5 * (up + down)
    for x in (0.0, 0.5, 3.0, -2.0):
        if not math.isclose(float(reward(x)), c1 * x + c2 * x * x, rel_tol=1e-12, abs_tol=1e-12):
            raise ValueError("GridDPAgent needs a per-step reward quadratic in the step P&L (mean-variance)")
    return c1, c2


def trade_charge(problem: HedgingProblem, spots, sizes):
    """What a trade of ``sizes`` shares at ``spots`` takes out of the step's P&L, currency.

    The step pays ``trading_cost + impact_cost`` out of cash; cash then earns the step's financing,
    so the charge is the costs less the interest they would have earned. These are the frictions'
    own methods, the ones :func:`hedge_env.step.hedge_step` calls; the grid optima check the sum
    against ``hedge_step``.
    """
    frictions = problem.frictions
    paid = frictions.trading_cost(sizes, spots) + frictions.impact_cost(sizes, spots)
    if frictions.has_financing:
        paid = paid - frictions.financing(-paid, 0.0 * paid, spots, problem.dt_years)
    return paid


def affine_pieces(problem: HedgingProblem, no_trade_pnl, actions: np.ndarray, axis: int):
    """The no-trade P&L at the ends of its affine pieces in the holding, or None.

    Without a trade a step's P&L is affine in the holding on each side of 0 (hedge gain, interest,
    dividends; the borrow fee and a proportional unwind cost bend it at 0). So ``no_trade_pnl``
    (a function of an array of holdings, which it lays along ``axis`` of its result) runs at the ends
    of each piece only, plus two probe holdings that must come out on the lines; if they do not (impact,
    a fixed cost on the unwind), None: every holding must go through hedge_step. Returns ``(u, v,
    piece, fraction)``: ``dW0(a) = u + f v`` on piece ``piece[a]`` at fraction ``fraction[a]``, with
    ``u`` and ``v`` laid out as ``no_trade_pnl``'s result, the pieces along ``axis``."""
    anchors = np.unique(np.clip([actions[0], 0.0, actions[-1]], actions[0], actions[-1]))
    if anchors.size < 2:
        return None
    probes = np.array([actions.size // 3, (2 * actions.size) // 3])
    pnl = no_trade_pnl(np.concatenate([anchors, actions[probes]]))
    axis = axis % pnl.ndim
    before = (slice(None),) * axis
    anchor_pnl, probe_pnl = pnl[before + (slice(None, anchors.size),)], pnl[before + (slice(anchors.size, None),)]
    piece = np.clip(np.searchsorted(anchors, actions, side="right") - 1, 0, anchors.size - 2)
    fraction = (actions - anchors[piece]) / (anchors[piece + 1] - anchors[piece])
    start, end = anchor_pnl[before + (piece[probes],)], anchor_pnl[before + (piece[probes] + 1,)]
    along = fraction[probes].reshape((-1,) + (1,) * (pnl.ndim - axis - 1))
    on_lines = start + along * (end - start)
    scale = problem.notional_shares * problem.reference_spot
    if not np.allclose(on_lines, probe_pnl, rtol=1e-9, atol=1e-11 * scale):
        return None
    u = anchor_pnl[before + (slice(None, -1),)]
    return u, anchor_pnl[before + (slice(1, None),)] - u, piece, fraction


def best_targets(level, slope, charge, c2: float, targets: np.ndarray):
    """The best target and its Q from every holding: ``Q = level - charge x slope + c2 charge^2``,
    ``level`` and ``slope`` of shape (..., target), ``charge`` (..., holding, target) the charge of
    the trade from each holding to each target. Returns (targets, values), each (..., holding)."""
    q = level[..., None, :] - charge * slope[..., None, :]
    if c2:
        q += c2 * (charge * charge)
    best = q.argmax(axis=-1)
    return targets[best], np.take_along_axis(q, best[..., None], axis=-1)[..., 0]


def stay_value(below, centre, above, t):
    """Q of not trading at a holding a fraction ``t`` of a node spacing from the nearest grid target
    (whose no-trade values are ``centre``, with its neighbours ``below`` and ``above``): quadratic
    through the three (linear would be biased low, the value being concave in the target, and
    would narrow the band)."""
    return centre + 0.5 * t * (above - below) + 0.5 * t * t * (above - 2.0 * centre + below)


def decision_indices(problem: HedgingProblem, t_days, n: int) -> np.ndarray:
    """Decision time index of each of ``n`` rows at ``t_days``; ValueError off the schedule's times."""
    schedule = problem.schedule
    days = np.broadcast_to(np.asarray(t_days, dtype=float), (n,))
    k = np.rint(days / schedule.step_days)
    off_grid = np.abs(days - k * schedule.step_days) > 1e-3 * schedule.step_days
    if off_grid.any() or ((k < 0) | (k >= schedule.steps)).any():
        bad = float(days[off_grid | (k < 0) | (k >= schedule.steps)][0])
        raise ValueError(
            f"observation at day {bad:g} is not a decision time of the schedule "
            f"(0 .. {schedule.horizon_days - schedule.step_days:g} every {schedule.step_days:g} days)"
        )
    return k.astype(int)


def rows_by_time(times: np.ndarray):
    """(k, rows) per decision time present; rows is a slice when all rows share one time (a rollout)."""
    if times.size and (times == times[0]).all():
        return [(int(times[0]), slice(None))]
    return [(int(k), np.flatnonzero(times == k)) for k in np.unique(times)]


def q_columns(table, points: np.ndarray, columns: np.ndarray | None = None):
    """Level and slope of the Q spline ``table`` (see ``GridDPAgent._q_table``) at ``points`` (rows,),
    continued linearly beyond the grid ends: two arrays (rows, targets), of every target or of
    ``columns`` (rows, m) only."""
    knots, coef = table
    n_targets = coef.shape[1]
    inside = np.clip(points, knots[0], knots[-1])
    interval = np.clip(np.searchsorted(knots, inside, side="right") - 1, 0, knots.size - 2)
    t = inside - knots[interval]
    # Each (row, target) reads its 8 coefficients in one piece; the cubic is a batched product
    # with (t^3, t^2, t, 1), plus (3 t^2, 2 t, 1, 0) times the distance beyond the grid.
    powers = np.stack([t * t * t, t * t, t, np.ones_like(t)], axis=1)
    beyond = points - inside
    if beyond.any():
        powers += beyond[:, None] * np.stack([3.0 * t * t, 2.0 * t, np.ones_like(t), np.zeros_like(t)], axis=1)
    flat = coef.reshape(-1, 8)
    if columns is None:
        gathered = flat.reshape(-1, n_targets * 8)[interval]
        m = n_targets
    else:
        gathered = flat[(interval * n_targets)[:, None] + columns]
        m = columns.shape[1]
    value = np.matmul(gathered.reshape(points.size, 2 * m, 4), powers[:, :, None]).reshape(points.size, m, 2)
    return value[..., 0], value[..., 1]


def evaluate_spline(spline: CubicSpline, points: np.ndarray, columns: np.ndarray | None = None) -> np.ndarray:
    """Spline values at ``points``, continued linearly beyond the grid ends.

    Without ``columns``: every column of the spline's values, shape
    ``(len(points), *columns_shape)``. With ``columns`` (an integer array like
    ``points``): only that column at each point, shape like ``points``.
    """
    knots = spline.x
    inside = np.clip(points, knots[0], knots[-1])
    beyond = points - inside
    outside = np.flatnonzero(beyond)
    if columns is None:
        value = spline(inside)
        if outside.size:
            slope = spline(inside[outside], 1)
            value[outside] += slope * beyond[outside].reshape((-1,) + (1,) * (slope.ndim - 1))
        return value
    interval = np.clip(np.searchsorted(knots, inside, side="right") - 1, 0, knots.size - 2)
    c = spline.c[:, interval, columns]
    t = inside - knots[interval]
    value = ((c[0] * t + c[1]) * t + c[2]) * t + c[3]
    if outside.size:
        value = value + ((3.0 * c[0] * t + 2.0 * c[1]) * t + c[2]) * beyond
    return value
