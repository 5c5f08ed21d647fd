"""Model-based reference optimum: dynamic programming on a (time, log spot, holding) grid.

In a one-factor Markov market (GBM) the hedger's state at a rehedge time is
the spot and the holding, so the per-step objective ``E[sum_k r_k]`` can be
maximised exactly, up to grid and quadrature error, by backward induction::

    V_steps = 0
    V_k(S, h) = max_a  Q_k(S, h, a),   Q_k(S, h, a) = E[r_k(S, h, a, S') + V_{k+1}(S', a)]

with the expectation over the next spot ``S' = S exp((drift - vol^2/2) dt
+ vol sqrt(dt) z)``, ``z`` standard normal. The hedge after the last step is
unwound by the step itself, hence ``V_steps = 0``. The reward of a step is
always computed by :func:`hedge_env.step.hedge_step`; this module only adds
expectations and maximisations on top of it.
"""

from __future__ import annotations

import math

import numpy as np
from scipy.interpolate import CubicSpline
from scipy.special import logsumexp
from sklearn.utils.validation import check_is_fitted

from agents.grid_base import GridOptimum
from agents.grid_numerics import (
    affine_pieces,
    best_targets,
    decision_indices,
    evaluate_spline,
    normal_quadrature,
    q_columns,
    reward_coefficients,
    rows_by_time,
    stay_value,
    trade_charge,
)
from agents.policy import decode
from hedge_env.problem import HedgingProblem
from hedge_env.step import HedgeState, hedge_step

# Elements per hedge_step call and per (spot, holding, action) block: keeps temporaries near 10 MB each.
_CHUNK_ELEMENTS = 1 << 18
# Widths of the windows of grid targets, around the targets of a row's four grid states, over which
# act evaluates Q exactly: within a cell the best target moves by a few grid steps (a band edge
# moving with spot), more near expiry where gamma is high. Each row gets the narrowest that fits.
_WINDOW_TARGETS = (8, 16, 32, 64)


class GridDPAgent(GridOptimum):
    """Grid dynamic-programming optimum under GBM of the problem's objective: the per-step
    mean-variance objective, or exponential utility of the wealth at the horizon.

    Parameters
    ----------
    problem : HedgingProblem
        Book, marks, frictions, objective and schedule (the step function's input).
    drift : float
        Annual drift of the GBM the expectation is taken under (real world).
    volatility : float
        Annual volatility of that GBM (the market's, not necessarily the marks').
    spot_points : int
        Points of the log-spot grid.
    holding_points : int
        Points of the holding grid; the candidate targets are the same points.
    quadrature_nodes : int
        Gauss-Hermite nodes of the expectation over the next spot; on a step
        where options settle (a kinked payoff) each piece between strikes gets
        this many Gauss-Legendre nodes instead.
    log_spot_width : float
        Width of the log-spot grid in standard deviations of log spot over the
        horizon (``vol * sqrt(horizon)``), centred on the mean log spot at mid-horizon.
    holding_range : (float, float) or None
        Lowest and highest holding per share of notional. None: minus the
        book delta's range over the spot grid and the rehedge times, widened
        to include 0 and padded by 10% of notional on each side. Always cut
        back to the position limit.
    name : str
        Policy name in reports.

    Attributes
    ----------
    log_spots_ : ndarray (spot_points,)
        Log-spot grid, log currency.
    holdings_ : ndarray (holding_points,)
        Holding grid, shares; also the candidate targets.
    value_ : ndarray (steps, spot_points, holding_points)
        ``V_k(S, h)``, currency (the optimal expected sum of rewards from t_k on).
    policy_ : ndarray (steps, spot_points, holding_points)
        Optimal target holding in shares at each grid state.
    no_trade_value_ : ndarray (steps, spot_points, holding_points)
        ``Q_k(S, a, a)``: holding ``a`` through the step without trading, then optimally.
    cost_weight_ : ndarray (steps, spot_points, holding_points)
        ``G_k(S, a)`` in ``Q_k(S, h, a) = no_trade_value - G * P + c2 * P**2``, where
        ``P`` is what the trade from ``h`` to ``a`` takes out of wealth and
        ``c2`` the reward's quadratic coefficient (see :meth:`fit`). This and
        ``no_trade_value_`` are not set with permanent impact.
    reward_coefficients_ : (float, float)
        ``(c1, c2)`` with ``reward(x) = c1 x + c2 x**2``, read off the objective.

    Notes
    -----
    The one approximation beyond grid and quadrature: the state has no cash
    axis. Cash moves the reward only through interest (``cash_rate``), and the
    DP sets the cash of every grid state to ``-(h S + mark)``, as if the
    hedger's wealth were 0 at t_k (it is 0 at t_0). With ``cash_rate = 0``
    this is exact.

    The greedy policy (:meth:`act_exact`) evaluates ``Q_k`` at each row's own
    spot (cubic spline in log spot) and exact holding (the trade's cost is a
    formula), over every grid target plus "no trade", and takes the best.
    :meth:`act` takes the same decisions at a tenth of the cost: a row whose
    four surrounding grid states all stay in ``policy_`` stays (it is inside
    the no-trade region); every other row maximises the same ``Q_k`` over a
    window of grid targets around those of its four grid states (8 to 64
    wide; a row off the grid, over all of them). On the reference case the two agreed on
    every decision of 20,000 held-out paths at 10 and 50 bps; a fixed cost,
    which makes the best target jump, could put it outside the window (the
    tests bound such rows to 1%). With permanent impact both interpolate
    ``policy_``.

    Examples
    --------
    >>> from hedge_env.env import default_problem
    >>> problem, market = default_problem()
    >>> agent = GridDPAgent(problem, volatility=market.volatility).fit()
    >>> target = agent.act([[1.0, problem.horizon_years, 0.0]])  # per share of notional
    """

    solves_markets = ("gbm",)
    market_words = "a one-factor GBM market"

    @classmethod
    def models_permanent_impact(cls, objective_form) -> bool:
        """Permanent impact breaks the separation of the trade's cost; the mean-variance induction then
        goes through hedge_step at every state, the exponential one does not."""
        return not objective_form.certainty_equivalent

    def __init__(
        self,
        problem: HedgingProblem,
        drift: float = 0.0,
        volatility: float = 0.2,
        spot_points: int = 151,
        holding_points: int = 201,
        quadrature_nodes: int = 16,
        log_spot_width: float = 8.0,
        holding_range: tuple[float, float] | None = None,
        name: str = "grid_dp",
    ):
        self.problem = problem
        self.drift = drift
        self.volatility = volatility
        self.spot_points = spot_points
        self.holding_points = holding_points
        self.quadrature_nodes = quadrature_nodes
        self.log_spot_width = log_spot_width
        self.holding_range = holding_range
        self.name = name

    # --- fitting --------------------------------------------------------------------------------

    def _prepare(self) -> None:
        """The grids and arrays of a fit (:meth:`GridOptimum.fit` then inducts step by step back).

        How the step function is used: a step's P&L separates into a part that
        does not depend on the holding before the trade and a trade charge,
        ``dW(S, h, a, S') = dW0(S, a, S') - P(S, |a - h|)``, where ``dW0`` is
        :func:`hedge_step` called with holding ``a`` and target ``a`` (no
        trade: costs 0; the last step's unwind depends on ``a`` only, so it
        is in ``dW0``), and ``P`` is the trade's costs plus the interest they
        forgo (the friction methods the step itself calls). With
        ``reward(x) = c1 x + c2 x**2`` the expectation is then

            E[r] = c1 m1 + c2 m2 - P (c1 + 2 c2 m1) + c2 P**2,   m_n = E[dW0**n],

        so per time step ``hedge_step`` runs only over (spot, action, node)
        and the maximisation over (spot, holding, action) is array arithmetic.
        ``fit`` checks this identity against direct ``hedge_step`` calls with
        trades on a sample of grid points and raises if it fails. Before the
        last step ``dW0`` is moreover piecewise affine in ``a`` (see
        :meth:`_no_trade_moments`, which checks it), so ``hedge_step`` runs at
        a few holdings per (spot, node) rather than at all of them. Permanent
        impact makes ``S'`` depend on the trade and breaks the separation;
        then every (spot, holding, action, node) goes through ``hedge_step``
        (slow: use small grids).
        """
        self._validate_parameters()
        problem = self.problem
        steps = problem.schedule.steps
        # The problem's objective says what is solved: the per-step mean-variance E[sum_k r_k], or the
        # expected exponential utility of the wealth at the horizon (:meth:`_induct_exponential`).
        self.exponential_ = problem.objective.certainty_equivalent
        # Under exponential utility Q is kept as -log E[exp(-gamma W_T)]: level - charge x gamma_k, linear.
        self.reward_coefficients_ = (1.0, 0.0) if self.exponential_ else reward_coefficients(problem)
        self.log_spots_ = self._log_spot_grid()
        spots = np.exp(self.log_spots_)
        self.holdings_ = self._holding_grid(spots)
        shape = (steps, self.spot_points, self.holding_points)
        self.value_ = np.empty(shape)
        self.policy_ = np.empty(shape)
        self.separable_ = not problem.frictions.permanent_impact
        if self.separable_:
            self.no_trade_value_ = np.empty(shape)
            self.cost_weight_ = np.empty(shape)
            self._check_separation(spots)

    def _induct_step(self, k: int, value_next) -> None:
        spots = np.exp(self.log_spots_)
        nodes, weights = self._quadrature(k, spots)
        next_spots = spots[:, None] * self._growth(nodes)
        if self.exponential_:
            self._induct_exponential(k, spots, next_spots, weights, value_next)
        elif self.separable_:
            self._induct_separated(k, spots, next_spots, weights, value_next)
        else:
            self._induct_directly(k, spots, next_spots, weights, value_next)

    def _validate_parameters(self) -> None:
        if not isinstance(self.problem, HedgingProblem):
            raise TypeError(f"problem must be a HedgingProblem, got {type(self.problem).__name__}")
        if self.spot_points < 4 or self.holding_points < 3 or self.quadrature_nodes < 2:
            raise ValueError(
                "need spot_points >= 4, holding_points >= 3, quadrature_nodes >= 2; got "
                f"{self.spot_points}, {self.holding_points}, {self.quadrature_nodes}"
            )
        if not (self.volatility > 0 and self.log_spot_width > 0):
            raise ValueError(f"volatility and log_spot_width must be > 0, got {self.volatility}, {self.log_spot_width}")
        if self.problem.objective.certainty_equivalent and self.problem.frictions.permanent_impact:
            raise ValueError("exponential utility needs no permanent impact")
        if self.holding_range is not None and not self.holding_range[0] < self.holding_range[1]:
            raise ValueError(f"holding_range must be (low, high) with low < high, got {self.holding_range}")

    def _log_spot_grid(self) -> np.ndarray:
        problem = self.problem
        horizon = problem.horizon_years
        # Centred on the mean log spot at mid-horizon, so that t_0 and the horizon are covered alike.
        centre = math.log(problem.reference_spot) + (self.drift - 0.5 * self.volatility**2) * horizon / 2
        half_width = 0.5 * self.log_spot_width * self.volatility * math.sqrt(horizon)
        return np.linspace(centre - half_width, centre + half_width, self.spot_points)

    def _holding_grid(self, spots: np.ndarray) -> np.ndarray:
        problem = self.problem
        notional = problem.notional_shares
        if self.holding_range is None:
            hedges = np.concatenate([
                -problem.book.value_and_delta(spots, problem.schedule.time_days(k), problem.marks)[1]
                for k in range(problem.schedule.steps)
            ])
            low = min(0.0, float(hedges.min())) - 0.1 * notional
            high = max(0.0, float(hedges.max())) + 0.1 * notional
        else:
            low, high = (float(v) * notional for v in self.holding_range)
        # Targets beyond the limit would be clipped by the step, so the grid stops there.
        limit = problem.frictions.position_limit_shares
        low, high = max(low, -limit), min(high, limit)
        if not low < high:
            raise ValueError(f"holding grid is empty after the position limit {limit}: {low} .. {high}")
        return np.linspace(low, high, self.holding_points)

    def _growth(self, nodes: np.ndarray) -> np.ndarray:
        """Exogenous gross return S'/S over one step at standard normal ``nodes``."""
        dt = self.problem.dt_years
        return np.exp((self.drift - 0.5 * self.volatility**2) * dt + self.volatility * math.sqrt(dt) * nodes)

    def _quadrature(self, k: int, spots: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """Standard normal nodes and weights per grid spot for the move over step ``k``
        (:func:`~agents.grid_numerics.normal_quadrature`: split at the strikes of options settling then)."""
        schedule, book = self.problem.schedule, self.problem.book
        t_now, t_next = schedule.time_days(k), schedule.time_days(k + 1)
        strikes = sorted({leg.strike for leg in book.live_legs(t_now) if not leg.live_at(t_next)})
        dt = self.problem.dt_years
        mean, scale = (self.drift - 0.5 * self.volatility**2) * dt, self.volatility * math.sqrt(dt)
        return normal_quadrature(self.quadrature_nodes, spots, strikes, mean, scale)

    def _grid_state(self, k: int, spots, holdings, repeats: tuple[int, ...] = ()) -> HedgeState:
        """HedgeState at t_k, wealth set to 0 (the one approximation), as flat arrays.

        ``spots`` are distinct spots; each is repeated over ``repeats`` (trailing
        axes, e.g. actions and nodes) and ``holdings`` broadcasts against that
        shape. The book is priced once per distinct spot.
        """
        problem = self.problem
        mark, delta = problem.book.value_and_delta(spots, problem.schedule.time_days(k), problem.marks)
        shape = spots.shape + repeats
        expand = (...,) + (None,) * len(repeats)

        def flat(values):
            return np.broadcast_to(values, shape).ravel()

        spot, mark, delta = flat(spots[expand]), flat(mark[expand]), flat(delta[expand])
        holding = flat(holdings)
        return HedgeState(k, spot, np.ones_like(spot), holding, -(holding * spot + mark), mark, delta)

    def _check_separation(self, spots: np.ndarray) -> None:
        """Raise unless ``hedge_step`` with a trade equals the no-trade step minus the trade charge."""
        problem = self.problem
        rng = np.random.default_rng(0)
        n = 64
        for k in sorted({0, problem.schedule.steps - 1}):
            nodes, _ = self._quadrature(k, spots)
            i = rng.integers(spots.size, size=n)
            held = self.holdings_[rng.integers(self.holdings_.size, size=n)]
            target = self.holdings_[rng.integers(self.holdings_.size, size=n)]
            spot = spots[i]
            next_spot = spot * self._growth(nodes[i, rng.integers(nodes.shape[1], size=n)])
            with_trade = hedge_step(problem, self._grid_state(k, spot, held), target, next_spot).pnl
            without = hedge_step(problem, self._grid_state(k, spot, target), target, next_spot).pnl
            separated = without - trade_charge(self.problem, spot, np.abs(target - held))
            scale = problem.notional_shares * problem.reference_spot
            if not np.allclose(with_trade, separated, rtol=1e-9, atol=1e-11 * scale):
                worst = float(np.max(np.abs(with_trade - separated)))
                raise RuntimeError(
                    f"hedge_step no longer separates into a no-trade step and a trade charge (off by {worst:g} "
                    f"at step {k}); agents.grid_numerics.trade_charge must follow the step's accounting"
                )

    def _no_trade_pnl(self, k, spots, actions, next_spots) -> np.ndarray:
        """P&L of hedge_step with holding = target (no trade), shape (spot, action, node)."""
        n_spots, n_nodes = next_spots.shape
        pnl = np.empty((n_spots, actions.size, n_nodes))
        rows = max(1, _CHUNK_ELEMENTS // (actions.size * n_nodes))
        for start in range(0, n_spots, rows):
            block = slice(start, min(start + rows, n_spots))
            shape = (block.stop - block.start, actions.size, n_nodes)
            state = self._grid_state(k, spots[block], actions[None, :, None], shape[1:])
            exogenous = np.broadcast_to(next_spots[block, None, :], shape).ravel()
            pnl[block] = hedge_step(self.problem, state, state.holding, exogenous).pnl.reshape(shape)
        return pnl

    def _affine_pieces(self, k, spots, next_spots):
        """The no-trade P&L's affine pieces in the holding (agents.grid_numerics.affine_pieces), ``u``
        and ``v`` of shape (spot, piece, node); None at the last step (the unwind) or where the
        step is not affine."""
        if k >= self.problem.schedule.steps - 1:
            return None
        return affine_pieces(self.problem, lambda held: self._no_trade_pnl(k, spots, held, next_spots),
                             self.holdings_, axis=1)

    def _no_trade_moments(self, k, spots, next_spots, weights) -> tuple[np.ndarray, np.ndarray]:
        """E[dW0] and E[dW0**2] per (spot, action), dW0 the P&L of hedge_step without a trade
        (from the affine pieces when there are: :meth:`_affine_pieces`)."""
        w = weights[:, None, :]
        pieces = self._affine_pieces(k, spots, next_spots)
        if pieces is not None:
            # pnl(a) = u + f v on the piece of a: moments from E[u], E[v], E[u^2], E[u v], E[v^2] per spot.
            u, v, piece, fraction = pieces
            mean_u, mean_v = (u * w).sum(axis=2), (v * w).sum(axis=2)
            mean_uu, mean_uv, mean_vv = (u * u * w).sum(axis=2), (u * v * w).sum(axis=2), (v * v * w).sum(axis=2)
            f = fraction[None, :]
            first = mean_u[:, piece] + f * mean_v[:, piece]
            second = mean_uu[:, piece] + 2.0 * f * mean_uv[:, piece] + f * f * mean_vv[:, piece]
            return first, second
        pnl = self._no_trade_pnl(k, spots, self.holdings_, next_spots)
        return (pnl * w).sum(axis=2), (pnl * pnl * w).sum(axis=2)

    def _no_trade_pnl_all(self, k, spots, next_spots) -> np.ndarray:
        """dW0 at every (spot, action, node): from the affine pieces when there are."""
        pieces = self._affine_pieces(k, spots, next_spots)
        if pieces is None:
            return self._no_trade_pnl(k, spots, self.holdings_, next_spots)
        u, v, piece, fraction = pieces
        return u[:, piece] + fraction[None, :, None] * v[:, piece]

    def _continuation(self, value_next, next_spots, weights) -> np.ndarray:
        """E[V_{k+1}(S', a)] per (spot, action), cubic spline in log spot with linear tails."""
        if value_next is None:
            return 0.0
        spline = CubicSpline(self.log_spots_, value_next, axis=0)
        values = evaluate_spline(spline, np.log(next_spots).ravel()).reshape(*next_spots.shape, -1)
        return np.einsum("iqa,iq->ia", values, weights)

    def _induct_separated(self, k, spots, next_spots, weights, value_next) -> None:
        c1, c2 = self.reward_coefficients_
        m1, m2 = self._no_trade_moments(k, spots, next_spots, weights)
        level = c1 * m1 + c2 * m2 + self._continuation(value_next, next_spots, weights)
        slope = c1 + 2.0 * c2 * m1
        self._maximise(k, spots, level, slope, c2)

    def _maximise(self, k, spots, level, slope, c2: float) -> None:
        """``policy_[k]``, ``value_[k]`` (and the tables the greedy policy reads) from the no-trade
        value and the cost weight of every (spot, target)."""
        self.no_trade_value_[k], self.cost_weight_[k] = level, slope
        sizes = np.abs(self.holdings_[:, None] - self.holdings_[None, :])  # (holding, action)
        rows = max(1, _CHUNK_ELEMENTS // sizes.size)
        for start in range(0, spots.size, rows):
            block = slice(start, min(start + rows, spots.size))
            charge = trade_charge(self.problem, spots[block, None, None], sizes[None])
            self.policy_[k, block], self.value_[k, block] = best_targets(level[block], slope[block], charge, c2,
                                                                         self.holdings_)

    def _induct_exponential(self, k, spots, next_spots, weights, value_next) -> None:
        """Exponential utility: with constant absolute risk aversion the value separates from wealth,
        ``E[-exp(-gamma W_T)] = -exp(-gamma W) phi_k(S, h)``, and with ``L = -log phi``

            L_k(S, h) = max_a [ -gamma_k P(S, |a - h|) - log E[exp(-gamma_k dW0(S, a, S') - L_{k+1}(S', a))] ]

        (the trade charge separates as in the mean-variance grid; gamma_k is the risk aversion times
        the growth of step k's P&L to the horizon at the cash rate: a step's P&L earns interest until
        then, so it weighs that much more). ``value_`` holds L; ``L / gamma`` is the certainty
        equivalent of the wealth at the horizon. The expectation is a log-sum-exp over the quadrature
        nodes."""
        gamma = self.problem.objective.risk_aversion * self.problem.horizon_growth(k)
        exponent = -gamma * self._no_trade_pnl_all(k, spots, next_spots)          # (spot, action, node)
        if value_next is not None:
            spline = CubicSpline(self.log_spots_, value_next, axis=0)
            later = evaluate_spline(spline, np.log(next_spots).ravel()).reshape(*next_spots.shape, -1)
            exponent -= later.transpose(0, 2, 1)
        with np.errstate(divide="ignore"):
            log_weights = np.log(weights)[:, None, :]
        level = -logsumexp(exponent + log_weights, axis=2)
        self._maximise(k, spots, level, np.full_like(level, gamma), 0.0)

    def _induct_directly(self, k, spots, next_spots, weights, value_next) -> None:
        """Every (spot, holding, action, node) through hedge_step: the trade moves S' (permanent impact)."""
        holdings = actions = self.holdings_
        n_nodes = next_spots.shape[1]
        spline = None if value_next is None else CubicSpline(self.log_spots_, value_next, axis=0)
        rows = max(1, _CHUNK_ELEMENTS // (holdings.size * actions.size * n_nodes))
        for start in range(0, spots.size, rows):
            block = slice(start, min(start + rows, spots.size))
            shape = (block.stop - block.start, holdings.size, actions.size, n_nodes)
            state = self._grid_state(k, spots[block], holdings[None, :, None, None], shape[1:])
            action_index = np.broadcast_to(np.arange(actions.size)[None, None, :, None], shape).ravel()
            exogenous = np.broadcast_to(next_spots[block, None, None, :], shape).ravel()
            outcome = hedge_step(self.problem, state, actions[action_index], exogenous)
            total = outcome.reward
            if spline is not None:
                total = total + evaluate_spline(spline, np.log(outcome.state.spot), action_index)
            q = (total.reshape(shape) * weights[block, None, None, :]).sum(axis=3)
            best = q.argmax(axis=2)
            self.policy_[k, block] = actions[best]
            self.value_[k, block] = np.take_along_axis(q, best[..., None], axis=2)[..., 0]

    # --- the greedy policy ----------------------------------------------------------------------

    def act(self, obs) -> np.ndarray:
        """Target holding per share of notional for observation rows (Policy protocol).

        The decisions of :meth:`act_exact`, read from the ``policy_`` table
        where that is exact up to interpolation (see the class docstring).
        """
        decoded, times = self._decode(obs)
        targets = np.empty(times.size)
        for k, rows in rows_by_time(times):
            spot, held = decoded.spot[rows], decoded.holding_shares[rows]
            if self.problem.frictions.permanent_impact:
                targets[rows] = self._interpolate_tables(k, spot, held)[0]
            else:
                targets[rows] = self._tabulated_targets(k, spot, held)
        return targets / self.problem.notional_shares

    def act_exact(self, obs) -> np.ndarray:
        """Target holding per share of notional, ``Q_k`` evaluated at every row over every grid target."""
        return self._best(obs)[0] / self.problem.notional_shares

    def _decode(self, obs):
        check_is_fitted(self, "value_")
        obs = np.asarray(obs, dtype=float)
        if obs.ndim != 2 or obs.shape[1] < 3:
            raise ValueError(f"observations must be an (n, >= 3) array of rows, got shape {obs.shape}")
        decoded = decode(self.problem, obs)
        return decoded, decision_indices(self.problem, decoded.t_days, decoded.spot.size)

    def _best(self, obs) -> tuple[np.ndarray, np.ndarray]:
        decoded, times = self._decode(obs)
        n_rows = times.size
        targets, values = np.empty(n_rows), np.empty(n_rows)
        rows_per_chunk = max(1, _CHUNK_ELEMENTS // (8 * self.holdings_.size))
        exact = not self.problem.frictions.permanent_impact
        for k, rows in rows_by_time(times):
            rows = np.arange(n_rows)[rows]
            for start in range(0, rows.size, rows_per_chunk):
                chunk = rows[start : start + rows_per_chunk]
                spot, held = decoded.spot[chunk], decoded.holding_shares[chunk]
                if exact:
                    targets[chunk], values[chunk] = self._best_exact(self._q_table(k), spot, held)
                else:
                    targets[chunk], values[chunk] = self._interpolate_tables(k, spot, held)
        return targets, values

    def _make_q_table(self, k: int) -> tuple[np.ndarray, np.ndarray]:
        """Cubic spline in log spot of ``no_trade_value_[k]`` and ``cost_weight_[k]``: the knots, and
        the coefficients as (interval, target, 2, power) so that a row's are read in one piece (about
        2 MB a time at the default grid)."""
        stacked = np.stack([self.no_trade_value_[k], self.cost_weight_[k]], axis=-1)
        spline = CubicSpline(self.log_spots_, stacked, axis=0)
        return spline.x, np.ascontiguousarray(spline.c.transpose(1, 2, 3, 0))

    def _tabulated_targets(self, k: int, spot, held) -> np.ndarray:
        """The targets of :meth:`_best_exact`, in shares, at a fraction of its cost.

        A row whose cell of the (log spot, holding) grid has four corners that
        all stay in ``policy_`` is inside the no-trade region: it stays, with
        no evaluation. Every other row gets the exact maximisation over the
        few grid targets around its corners' targets (the optimum moves
        little within a cell), or over all of them when those are far apart
        or the row is off the grid.
        """
        x, h, policy = self.log_spots_, self.holdings_, self.policy_[k]
        dx, dh = x[1] - x[0], h[1] - h[0]
        # Uniform grids: the cell by arithmetic, not a search.
        fx, fh = (np.log(spot) - x[0]) / dx, (held - h[0]) / dh
        on_grid = (fx >= 0) & (fx <= x.size - 1) & (fh >= 0) & (fh <= h.size - 1)
        i = np.clip(fx.astype(int), 0, x.size - 2)
        j = np.clip(fh.astype(int), 0, h.size - 2)
        corners = policy[i, j], policy[i, j + 1], policy[i + 1, j], policy[i + 1, j + 1]
        inside = on_grid & (corners[0] == h[j]) & (corners[1] == h[j + 1])
        inside &= (corners[2] == h[j]) & (corners[3] == h[j + 1])
        targets = held.copy()
        evaluate = np.flatnonzero(~inside)
        if not evaluate.size:
            return targets
        index = np.rint((np.stack([c[evaluate] for c in corners]) - h[0]) / dh).astype(int)
        low, high = index.min(axis=0) - 1, index.max(axis=0) + 1
        width = np.where(on_grid[evaluate], high - low + 1, h.size)
        table = self._q_table(k)
        done = 0
        for window in _WINDOW_TARGETS:
            if window >= h.size:
                break
            fits = (width <= window) & (width > done)
            rows = evaluate[fits]
            if rows.size:
                start = np.clip(low[fits], 0, h.size - window)
                columns = start[:, None] + np.arange(window)
                targets[rows] = self._best_exact(table, spot[rows], held[rows], columns)[0]
            done = window
        rows = evaluate[width > done]
        per_block = max(1, _CHUNK_ELEMENTS // (8 * h.size))
        for chunk in range(0, rows.size, per_block):
            block = rows[chunk : chunk + per_block]
            targets[block] = self._best_exact(table, spot[block], held[block])[0]
        return targets

    def _best_exact(self, table, spot, held, columns=None) -> tuple[np.ndarray, np.ndarray]:
        """Best of the grid targets and "no trade", with Q at the rows' own spot and holding.

        ``table`` is :meth:`_q_table` of the rows' time (``no_trade_value_`` and
        ``cost_weight_`` in log spot). ``columns`` (rows, m), optional: the
        indices of the grid targets each row chooses among (default: all).
        """
        c2 = self.reward_coefficients_[1]
        actions = self.holdings_
        step = actions[1] - actions[0]
        middle = np.clip(np.rint((held - actions[0]) / step).astype(int), 1, actions.size - 2)
        if columns is None:
            level, slope = q_columns(table, np.log(spot))
            choices = np.broadcast_to(actions, level.shape)
        else:
            # The three targets nearest the holding (for "no trade") in the same read, at the end.
            level, slope = q_columns(table, np.log(spot), np.hstack([columns, middle[:, None] + np.arange(-1, 2)]))
            nearest, level, slope = level[:, -3:], level[:, :-3], slope[:, :-3]
            choices = actions[columns]
        charge = trade_charge(self.problem, spot[:, None], np.abs(choices - held[:, None]))
        q = level - charge * slope
        if c2:
            q += c2 * (charge * charge)
        rows = np.arange(spot.size)
        best = q.argmax(axis=1)
        best_q = q[rows, best]
        # Not trading: Q(S, h, h) is the no-trade value at a = h (grid_numerics.stay_value).
        t = (held - actions[middle]) / step
        if columns is None:
            below, centre, above = level[rows, middle - 1], level[rows, middle], level[rows, middle + 1]
        else:
            below, centre, above = nearest[:, 0], nearest[:, 1], nearest[:, 2]
        stay_q = stay_value(below, centre, above, t)
        stay = stay_q >= best_q
        return np.where(stay, held, choices[rows, best]), np.where(stay, stay_q, best_q)

    def _interpolate_tables(self, k: int, spot, held) -> tuple[np.ndarray, np.ndarray]:
        """Bilinear interpolation of ``policy_`` and ``value_`` in (log spot, holding), clamped at the edges."""
        x, h = self.log_spots_, self.holdings_
        x_row = np.clip(np.log(spot), x[0], x[-1])
        h_row = np.clip(held, h[0], h[-1])
        i = np.clip(np.searchsorted(x, x_row, side="right") - 1, 0, x.size - 2)
        j = np.clip(np.searchsorted(h, h_row, side="right") - 1, 0, h.size - 2)
        u = (x_row - x[i]) / (x[i + 1] - x[i])
        v = (h_row - h[j]) / (h[j + 1] - h[j])

        def bilinear(table):
            return ((1 - u) * ((1 - v) * table[i, j] + v * table[i, j + 1])
                    + u * ((1 - v) * table[i + 1, j] + v * table[i + 1, j + 1]))

        return bilinear(self.policy_[k]), bilinear(self.value_[k])
