"""Model-based reference optimum under Heston: dynamic programming on a (time, log spot, variance,
holding) grid.

Under Heston the hedger's state at a rehedge time is the spot, the variance and the holding, so the
per-step objective ``E[sum_k r_k]`` is maximised by the backward induction of
:mod:`agents.grid_dp` with one more state axis::

    V_k(S, v, h) = max_a E[r_k(S, v, h, a, S', v') + V_{k+1}(S', v', a)]

The expectation is over the step's joint move of spot and variance, by a two-dimensional quadrature
that follows the market's own discrete-time law (Andersen's QE scheme, hedge_env.market.HestonMarket):

- the next variance ``v'`` given ``v`` is the scheme's: ``a (b + Z)^2`` with Gauss-Hermite nodes in
  ``Z`` where the spread of the variance is small, else a mass ``p`` at 0 plus an exponential tail
  with Gauss-Laguerre nodes. Every node is >= 0: the variance never goes negative, and the first two
  conditional moments are the CIR process's exactly, as on the simulated paths;
- given ``v`` and ``v'`` the log spot is normal (the scheme's central rule for the integrated
  variance): ``log S' = log S + drift dt + shift - k3 v / 2 + k2 v' + sqrt(k3 (v + v')) Z_S``, with
  Gauss-Hermite nodes in ``Z_S`` (split at the strikes, Gauss-Legendre, on a step where options
  settle) and ``shift`` set so that the quadrature's ``E[S' | S, v] = S exp(drift dt)``, the
  scheme's martingale correction.

So the DP's transition is the law the held-out paths are drawn from, not a continuous-time
approximation of it. The book is marked at the model's price (``problem.mark_model``) at the grid's
variance. The trade cost separates from the rest of the step as in :class:`agents.grid_dp.GridDPAgent`
(``Q = level - P slope + c2 P^2``, ``level`` and ``slope`` from the no-trade step's moments), so the
maximisation over targets is array arithmetic per (spot, variance) state. Values between grid
variances are linear in the volatility ``sqrt(v)``; between spots, cubic splines in log spot.
"""

from __future__ import annotations

import math

import numpy as np
from numpy.polynomial.hermite_e import hermegauss
from numpy.polynomial.laguerre import laggauss
from scipy.interpolate import CubicSpline
from scipy.special import logsumexp
from sklearn.utils.validation import check_is_fitted

from agents.grid_base import GridOptimum
from agents.grid_numerics import (
    affine_pieces,
    best_targets,
    decision_indices,
    normal_quadrature,
    reward_coefficients,
    rows_by_time,
    stay_value,
    trade_charge,
)
from agents.policy import decode
from hedge_env.market import QE_PSI_SWITCH, HestonMarket
from hedge_env.problem import HedgingProblem
from hedge_env.step import HedgeState, hedge_step

# The default grid (class and config). On configs/heston.toml its value at the start is within 6e-5
# of the next finer grid's (81 x 81 x 201, 10 x 10 nodes): the README's convergence table.
DEFAULT_GRID = {"spot_points": 61, "variance_points": 61, "holding_points": 151, "variance_nodes": 8,
                "spot_nodes": 8}
# (state, target) elements per block of the maximisation, and rows per block of act: ~10 MB temporaries.
_CHUNK_ELEMENTS = 1 << 18


class HestonGridDPAgent(GridOptimum):
    """Grid dynamic-programming optimum under Heston of the problem's objective: the per-step
    mean-variance objective, or exponential utility of the wealth at the horizon.

    Parameters
    ----------
    problem : HedgingProblem
        With Heston model marks whose variance is observed (``mark_state_column``).
    market : hedge_env.market.HestonMarket
        The Heston market the expectation is taken under (real-world drift): its parameters and
        its QE scheme's constants (``qe_step``), the law the paths are drawn from.
    spot_points, variance_points, holding_points : int
        Points of the log-spot grid, of the variance grid (equally spaced in volatility from 0)
        and of the holding grid (also the candidate targets).
    variance_nodes, spot_nodes : int
        Quadrature nodes of the next variance and of the spot given it.
    log_spot_width : float
        Width of the log-spot grid in standard deviations of log spot over the horizon at the
        larger of the initial and long-run volatilities.
    variance_quantile : float
        The variance grid reaches this quantile of the variance at the horizon, and at least twice
        the larger of the initial and long-run variances.
    name : str

    Attributes
    ----------
    log_spots_, variances_, holdings_ : ndarray
        The grids (log currency, annual variance, shares).
    value_ : ndarray (steps, spot_points, variance_points, holding_points)
        ``V_k(S, v, h)``, currency.
    policy_ : ndarray, like ``value_``
        Best target holding, shares.
    no_trade_value_, cost_weight_ : ndarray, like ``value_``
        ``level`` and ``slope`` of ``Q_k(S, v, h, a) = level(a) - P slope(a) + c2 P^2`` at target
        ``a`` (the last axis), ``P`` the charge of the trade from ``h`` to ``a``.

    Notes
    -----
    As in the GBM grid, each grid state's cash is set as if the hedger's wealth were 0 there (exact
    without financing).
    """

    solves_markets = ("heston",)
    market_words = "a Heston market"
    needs_model_state = True  # its state is the spot, the variance and the holding

    @classmethod
    def models_permanent_impact(cls, objective_form) -> bool:
        return False

    def __init__(self, problem: HedgingProblem, market: HestonMarket | None = None,
                 spot_points: int = DEFAULT_GRID["spot_points"],
                 variance_points: int = DEFAULT_GRID["variance_points"],
                 holding_points: int = DEFAULT_GRID["holding_points"],
                 variance_nodes: int = DEFAULT_GRID["variance_nodes"], spot_nodes: int = DEFAULT_GRID["spot_nodes"],
                 log_spot_width: float = 8.0, variance_quantile: float = 0.999, name: str = "heston_grid_dp"):
        self.problem = problem
        self.market = market
        self.spot_points = spot_points
        self.variance_points = variance_points
        self.holding_points = holding_points
        self.variance_nodes = variance_nodes
        self.spot_nodes = spot_nodes
        self.log_spot_width = log_spot_width
        self.variance_quantile = variance_quantile
        self.name = name

    @property
    def factor_names(self) -> tuple[str, ...]:
        return ("variance",)

    def _market(self) -> HestonMarket:
        """The market solved: the given one, or the default Heston market."""
        return HestonMarket() if self.market is None else self.market

    # --- fitting --------------------------------------------------------------------------------

    def _prepare(self) -> None:
        """The grids and arrays of a fit (:meth:`GridOptimum.fit` then inducts step by step back)."""
        problem = self.problem
        if problem.mark_model is None or problem.mark_state_column is None:
            raise ValueError("the Heston grid optimum needs Heston model marks with the variance observed")
        if problem.frictions.permanent_impact:
            raise ValueError("the Heston grid optimum does not model permanent impact")
        if min(self.spot_points, self.variance_points, self.holding_points) < 4 or min(
                self.variance_nodes, self.spot_nodes) < 2:
            raise ValueError("need spot_points, variance_points, holding_points >= 4 and quadrature nodes >= 2")
        steps = problem.schedule.steps
        # Under exponential utility Q is kept as -log E[exp(-gamma W_T)]: level - charge x gamma_k, linear.
        self.exponential_ = problem.objective.certainty_equivalent
        self.reward_coefficients_ = (1.0, 0.0) if self.exponential_ else reward_coefficients(problem)
        self.log_spots_ = self._log_spot_grid()
        self.variances_ = self._variance_grid()
        self.holdings_ = self._holding_grid(np.exp(self.log_spots_))
        shape = (steps, self.spot_points, self.variances_.size, self.holdings_.size)
        self.value_, self.policy_ = np.empty(shape), np.empty(shape)
        self.no_trade_value_, self.cost_weight_ = np.empty(shape), np.empty(shape)

    def _induct_step(self, k: int, value_next) -> None:
        spots = np.exp(self.log_spots_)
        next_spots, next_variances, weights = self._transition(k, spots)
        induct = self._induct_exponential if self.exponential_ else self._induct
        induct(k, spots, next_spots, next_variances, weights, value_next)

    def _log_spot_grid(self) -> np.ndarray:
        problem = self.problem
        market = self._market()
        vol = math.sqrt(max(market.initial_variance, market.long_run_variance))
        horizon = problem.horizon_years
        centre = math.log(problem.reference_spot) + (market.drift - 0.5 * vol * vol) * horizon / 2
        half_width = 0.5 * self.log_spot_width * vol * math.sqrt(horizon)
        return np.linspace(centre - half_width, centre + half_width, self.spot_points)

    def _variance_grid(self) -> np.ndarray:
        """From 0 to the ``variance_quantile`` of the variance at the horizon given the initial one
        (the CIR law: a scaled non-central chi-square), and at least twice the larger of the initial
        and long-run variances; equally spaced in volatility."""
        from scipy.stats import ncx2

        market = self._market()
        kappa, theta, xi, v0 = market.mean_reversion, market.long_run_variance, market.vol_of_vol, market.initial_variance
        high = 2.0 * max(v0, theta)
        horizon = self.problem.horizon_years
        if kappa > 0 and xi > 0 and theta > 0:
            c = xi * xi * -math.expm1(-kappa * horizon) / (4.0 * kappa)
            quantile = c * float(ncx2.ppf(self.variance_quantile, 4.0 * kappa * theta / (xi * xi),
                                          v0 * math.exp(-kappa * horizon) / c))
            high = max(high, quantile)
        return np.linspace(0.0, math.sqrt(high), self.variance_points) ** 2

    def _holding_grid(self, spots: np.ndarray) -> np.ndarray:
        problem = self.problem
        notional = problem.notional_shares
        spot, variance = (g.ravel() for g in np.meshgrid(spots, self.variances_, indexing="ij"))
        hedges = np.concatenate([-problem.book_value_and_delta(spot, problem.schedule.time_days(k), variance)[1]
                                 for k in range(problem.schedule.steps)])
        low = min(0.0, float(hedges.min())) - 0.1 * notional
        high = max(0.0, float(hedges.max())) + 0.1 * notional
        limit = problem.frictions.position_limit_shares
        return np.linspace(max(low, -limit), min(high, limit), self.holding_points)

    def _transition(self, k: int, spots: np.ndarray):
        """Next spots and variances and their weights per (spot, variance) state: arrays of shape
        (spot, variance, variance node, spot node)."""
        problem, market = self.problem, self._market()
        dt = problem.dt_years
        qe = market.qe_step(dt)
        v = self.variances_
        mean = qe.mean_const + qe.mean_slope * v
        spread = qe.spread_const + qe.spread_slope * v
        psi = spread / np.maximum(mean * mean, 1e-300)
        n = self.variance_nodes
        # Quadratic branch: v' = a (b + z)^2 at Gauss-Hermite z.
        z, wz = hermegauss(n)
        wz = wz / wz.sum()
        t = 2.0 / np.clip(psi, 1e-12, QE_PSI_SWITCH)
        b2 = t - 1.0 + np.sqrt(t * (t - 1.0))
        a = mean / (1.0 + b2)
        quadratic = a[:, None] * (np.sqrt(b2)[:, None] + z[None, :]) ** 2
        # Exponential branch: 0 with probability p, else exponential with rate beta (Gauss-Laguerre).
        x, wx = laggauss(n - 1)
        p = (psi - 1.0) / (psi + 1.0)
        beta = (1.0 - p) / np.maximum(mean, 1e-300)
        exponential = np.concatenate([np.zeros((v.size, 1)), x[None, :] / beta[:, None]], axis=1)
        exp_weights = np.concatenate([p[:, None], (1.0 - p)[:, None] * (wx / wx.sum())[None, :]], axis=1)
        large = (psi > QE_PSI_SWITCH)[:, None]
        next_v = np.where(large, exponential, quadratic)                         # (variance, node)
        v_weights = np.where(large, exp_weights, np.broadcast_to(wz, (v.size, n)))
        # The spot given v and v': the scheme's K constants with gamma1 = gamma2 = 1/2.
        k2, k3 = qe.k2, qe.k3
        scale = np.sqrt(k3 * (v[:, None] + next_v))                                # (variance, node)
        centre = -0.5 * k3 * v[:, None] + k2 * next_v
        schedule, book = problem.schedule, problem.book
        strikes = sorted({leg.strike for leg in book.live_legs(schedule.time_days(k))
                          if not leg.live_at(schedule.time_days(k + 1))})
        log_spots = self.log_spots_
        if strikes:
            # Kinks at the strikes: per (spot, variance, node) its own split rule, placed with the
            # martingale correction of the exact normal (the quadrature's own, below, differs from it
            # only by the variance quadrature's error).
            approximate = -np.log((v_weights * np.exp(centre + 0.5 * scale * scale)).sum(axis=1, keepdims=True))
            base = log_spots[:, None, None] + (centre + approximate)[None] + market.drift * dt
            zs, ws = normal_quadrature(self.spot_nodes, np.exp(base).ravel(), strikes, 0.0,
                                       np.broadcast_to(np.maximum(scale, 1e-12)[None], base.shape).reshape(-1, 1))
            zs = zs.reshape(*base.shape, -1)
            ws = ws.reshape(*base.shape, -1)
        else:
            zs, ws = hermegauss(self.spot_nodes)
            ws = ws / ws.sum()
            zs = np.broadcast_to(zs, (1, 1, 1, zs.size))
            ws = np.broadcast_to(ws, (1, 1, 1, ws.size))
        move = centre[None, :, :, None] + scale[None, :, :, None] * zs                # log move less drift, shift
        weights = v_weights[None, :, :, None] * ws
        # The martingale correction on the quadrature itself: E[S'/S] = exp(drift dt) exactly.
        shift = -np.log((weights * np.exp(move)).sum(axis=(2, 3), keepdims=True))
        log_next = log_spots[:, None, None, None] + market.drift * dt + shift + move
        shape = np.broadcast_shapes(log_next.shape, weights.shape)
        next_variances = np.broadcast_to(next_v[None, :, :, None], shape)
        return np.exp(np.broadcast_to(log_next, shape)), next_variances, np.broadcast_to(weights, shape)

    def _no_trade_pnl(self, k, spots, next_spots, next_variances, actions) -> np.ndarray:
        """P&L of hedge_step holding each of ``actions`` through step k without a trade:
        shape (spot, variance, nodes..., action). Each grid state's cash is set as if the hedger's
        wealth were 0 there."""
        problem = self.problem
        n_s, n_v = spots.size, self.variances_.size
        node_shape = next_spots.shape[2:]
        out = np.empty(next_spots.shape + (actions.size,))
        for i in range(n_s):
            shape = (n_v, *node_shape, actions.size)
            column = (n_v,) + (1,) * (len(shape) - 1)
            # The book priced once per grid state, then spread over its nodes and actions.
            mark, delta = problem.book_value_and_delta(np.full(n_v, spots[i]), problem.schedule.time_days(k),
                                                       self.variances_)
            mark, delta = (np.broadcast_to(x.reshape(column), shape).ravel() for x in (mark, delta))
            spot = np.full(mark.size, spots[i])
            held = np.broadcast_to(actions, shape).ravel()
            state = HedgeState(k, spot, np.ones_like(spot), held, -(held * spot + mark), mark, delta)
            exogenous = np.broadcast_to(next_spots[i][..., None], shape).ravel()
            vol_next = np.broadcast_to(next_variances[i][..., None], shape).ravel()
            out[i] = hedge_step(self.problem, state, held, exogenous, vol_next).pnl.reshape(shape)
        return out

    def _affine_pieces(self, k, spots, next_spots, next_variances):
        """The no-trade P&L's affine pieces in the holding (agents.grid_numerics.affine_pieces), ``u``
        and ``v`` of shape (spot, variance, nodes..., piece), or None."""
        return affine_pieces(self.problem,
                             lambda held: self._no_trade_pnl(k, spots, next_spots, next_variances, held),
                             self.holdings_, axis=-1)

    def _moments(self, k, spots, next_spots, next_variances, weights) -> tuple[np.ndarray, np.ndarray]:
        """E[dW0] and E[dW0^2] per (spot, variance, action), dW0 the no-trade step's P&L: from its
        affine pieces where it has them (:meth:`_affine_pieces`), else (impact, a fixed cost on the
        unwind) from hedge_step at every action."""
        w = weights[..., None]
        axes = (2, 3)
        pieces = self._affine_pieces(k, spots, next_spots, next_variances)
        if pieces is not None:
            u, dv, piece, f = pieces
            mu, mv = (u * w).sum(axis=axes), (dv * w).sum(axis=axes)
            muu, muv, mvv = (u * u * w).sum(axis=axes), (u * dv * w).sum(axis=axes), (dv * dv * w).sum(axis=axes)
            first = mu[..., piece] + f * mv[..., piece]
            second = muu[..., piece] + 2.0 * f * muv[..., piece] + f * f * mvv[..., piece]
            return first, second
        pnl = self._no_trade_pnl(k, spots, next_spots, next_variances, self.holdings_)
        return (pnl * w).sum(axis=axes), (pnl * pnl * w).sum(axis=axes)

    def _continuation(self, value_next, next_spots, next_variances, weights) -> np.ndarray | float:
        """E[V_{k+1}(S', v', a)] per (spot, variance, action)."""
        if value_next is None:
            return 0.0
        table = _SpotVarianceTable(self.log_spots_, self.variances_, value_next)
        out = np.empty(next_spots.shape[:2] + (self.holdings_.size,))
        for i in range(next_spots.shape[0]):
            values = table(np.log(next_spots[i]).ravel(), next_variances[i].ravel())
            out[i] = (values.reshape(*next_spots.shape[1:], -1) * weights[i][..., None]).sum(axis=(1, 2))
        return out

    def _induct_exponential(self, k, spots, next_spots, next_variances, weights, value_next) -> None:
        """Exponential utility, as agents.grid_dp.GridDPAgent._induct_exponential: ``L = -log phi`` with
        ``E[-exp(-gamma W_T)] = -exp(-gamma W) phi_k(S, v, h)`` and

            L_k(S, v, h) = max_a [ -gamma_k P - log E[exp(-gamma_k dW0(S, v, a, S', v') - L_{k+1}(S', v', a))] ],

        the expectation a log-sum-exp over the two-dimensional quadrature, one spot at a time."""
        gamma = self.problem.objective.risk_aversion * self.problem.horizon_growth(k)
        pieces = self._affine_pieces(k, spots, next_spots, next_variances)
        table = None if value_next is None else _SpotVarianceTable(self.log_spots_, self.variances_, value_next)
        sizes = np.abs(self.holdings_[:, None] - self.holdings_[None, :])   # (holding, action)
        for i in range(spots.size):
            if pieces is not None:
                u, dv, piece, fraction = pieces
                pnl = u[i][..., piece] + fraction * dv[i][..., piece]          # (variance, nodes..., action)
            else:
                one = slice(i, i + 1)
                pnl = self._no_trade_pnl(k, spots[one], next_spots[one], next_variances[one], self.holdings_)[0]
            exponent = -gamma * pnl
            if table is not None:
                exponent -= table(np.log(next_spots[i]).ravel(), next_variances[i].ravel()).reshape(exponent.shape)
            with np.errstate(divide="ignore"):
                exponent += np.log(weights[i])[..., None]
            level = -logsumexp(exponent, axis=(1, 2))                            # (variance, action)
            slope = np.full_like(level, gamma)
            self.no_trade_value_[k, i], self.cost_weight_[k, i] = level, slope
            charge = trade_charge(self.problem, spots[i], sizes)
            self.policy_[k, i], self.value_[k, i] = best_targets(level, slope, charge, 0.0, self.holdings_)

    def _induct(self, k, spots, next_spots, next_variances, weights, value_next) -> None:
        c1, c2 = self.reward_coefficients_
        m1, m2 = self._moments(k, spots, next_spots, next_variances, weights)
        level = c1 * m1 + c2 * m2 + self._continuation(value_next, next_spots, next_variances, weights)
        slope = c1 + 2.0 * c2 * m1
        self.no_trade_value_[k], self.cost_weight_[k] = level, slope
        sizes = np.abs(self.holdings_[:, None] - self.holdings_[None, :])   # (holding, action)
        for i in range(spots.size):  # (variance, holding, action) per spot
            charge = trade_charge(self.problem, spots[i], sizes)
            self.policy_[k, i], self.value_[k, i] = best_targets(level[i], slope[i], charge, c2, self.holdings_)

    # --- the greedy policy ----------------------------------------------------------------------

    def act(self, obs) -> np.ndarray:
        """Target holding per share of notional (Policy protocol): ``Q_k`` at each row's own spot,
        variance and holding, over every grid target and "no trade"."""
        return self._best(obs)[0] / self.problem.notional_shares

    def _best(self, obs):
        check_is_fitted(self, "value_")
        obs = np.asarray(obs, dtype=float)
        decoded = decode(self.problem, obs)
        variance = self.problem.observed_mark_state(obs)
        times = decision_indices(self.problem, decoded.t_days, obs.shape[0])
        targets, values = np.empty(obs.shape[0]), np.empty(obs.shape[0])
        per_block = max(1, _CHUNK_ELEMENTS // (4 * self.holdings_.size))
        c2 = self.reward_coefficients_[1]
        actions = self.holdings_
        step = actions[1] - actions[0]
        for k, rows in rows_by_time(times):
            rows = np.arange(obs.shape[0])[rows]
            table = self._q_table(k)
            for start in range(0, rows.size, per_block):
                block = rows[start: start + per_block]
                spot, held = decoded.spot[block], decoded.holding_shares[block]
                both = table(np.log(spot), variance[block])
                level, slope = both[..., 0], both[..., 1]
                charge = trade_charge(self.problem, spot[:, None], np.abs(actions[None, :] - held[:, None]))
                q = level - charge * slope
                if c2:
                    q += c2 * (charge * charge)
                pick = np.arange(block.size)
                best = q.argmax(axis=1)
                middle = np.clip(np.rint((held - actions[0]) / step).astype(int), 1, actions.size - 2)
                t = (held - actions[middle]) / step
                below, centre, above = level[pick, middle - 1], level[pick, middle], level[pick, middle + 1]
                stay_q = stay_value(below, centre, above, t)
                stay = stay_q >= q[pick, best]
                targets[block] = np.where(stay, held, actions[best])
                values[block] = np.where(stay, stay_q, q[pick, best])
        return targets, values

    def _make_q_table(self, k: int) -> _SpotVarianceTable:
        """``no_trade_value_[k]`` and ``cost_weight_[k]`` as one table in (log spot, variance)."""
        stacked = np.stack([self.no_trade_value_[k], self.cost_weight_[k]], axis=-1)
        return _SpotVarianceTable(self.log_spots_, self.variances_, stacked)


class _SpotVarianceTable:
    """Values on a (log spot, variance) grid, read at any point: a cubic spline in log spot (continued
    linearly beyond the ends) and linear in the volatility ``sqrt(v)`` between grid variances (held
    at the ends)."""

    def __init__(self, log_spots: np.ndarray, variances: np.ndarray, values: np.ndarray):
        self.knots = log_spots
        self.vols = np.sqrt(variances)
        spline = CubicSpline(log_spots, values, axis=0)
        # (interval, variance, ...) x 4 powers, so a point's coefficients are read in one piece.
        self.coef = np.moveaxis(spline.c, 0, -1)

    def __call__(self, log_spot: np.ndarray, variance: np.ndarray) -> np.ndarray:
        knots, vols = self.knots, self.vols
        inside = np.clip(log_spot, knots[0], knots[-1])
        interval = np.clip(np.searchsorted(knots, inside, side="right") - 1, 0, knots.size - 2)
        t = inside - knots[interval]
        powers = np.stack([t ** 3, t * t, t, np.ones_like(t)], axis=-1)
        beyond = log_spot - inside
        if beyond.any():
            powers += beyond[:, None] * np.stack([3.0 * t * t, 2.0 * t, np.ones_like(t), np.zeros_like(t)], axis=-1)
        vol = np.clip(np.sqrt(np.maximum(variance, 0.0)), vols[0], vols[-1])
        j = np.clip(np.searchsorted(vols, vol, side="right") - 1, 0, vols.size - 2)
        w = (vol - vols[j]) / (vols[j + 1] - vols[j])
        extra = (None,) * (self.coef.ndim - 3)
        low = (self.coef[interval, j] * powers[(slice(None),) + extra]).sum(axis=-1)
        high = (self.coef[interval, j + 1] * powers[(slice(None),) + extra]).sum(axis=-1)
        weight = w.reshape((-1,) + (1,) * (low.ndim - 1))
        return (1.0 - weight) * low + weight * high
