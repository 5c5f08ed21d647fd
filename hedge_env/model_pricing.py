"""European options at the simulated model's own price: Heston (1993) and Merton (1976).

Both price under the risk-neutral measure with the market model's own parameters (no premium for
variance or jump risk): the drift becomes ``rate - dividend_yield``, everything else is kept. Each
pricer returns, per path, the value, dV/dS and the derivative in the model's state (dV/dv in the
variance for Heston; none for Merton, which has no state).

Heston. With ``x = log(F / K)``, ``F = S e^{(r - q) tau}`` and ``X = log(S_T / F)``, whose
characteristic function is ``psi(u) = exp(C(u) + D(u) v)`` (the "little Heston trap" form of
Albrecher, Mayer, Schoutens and Tistaert, 2007, which stays on the principal branch of the
logarithm), Lewis's (2001) single integral gives the call in units of the discounted strike:

    c(x, v) = E[(e^{x + X} - 1)^+] = e^x - e^{x/2} / pi * I,
    I = int_0^inf Re[e^{i u x} psi(u - i/2)] / (u^2 + 1/4) du,

so that ``V = K e^{-r tau} c``, ``dV/dS = K e^{-r tau} c_x / S`` and ``dV/dv = K e^{-r tau} c_v``,
with ``c_x`` and ``c_v`` the same integral with ``i u`` and ``D(u - i/2)`` under it. The integrand
has poles at ``u = +-i/2`` and decays on the scale ``1 / sqrt(w tau)`` (``w`` the expected mean
variance to expiry), two scales far apart at short expiries: Gauss-Legendre on [0, 2] resolves the
first, panels of a 16-node Gauss-Legendre rule (doubling in width, then as wide as the oscillation
``e^{i u x}`` and the decay allow) up to where the integrand falls below 1e-18 the second.
Checked against QuantLib's AnalyticHestonEngine in tests/hedge_env/test_model_pricing.py
(docs/references.md).

Many paths at one time share ``tau``: :func:`heston_table` tabulates ``c, c_x, c_v`` once per
``tau``, less the Black-Scholes ``c`` at the expected mean variance ``w(v)`` (the difference is
small and smooth), on a grid of standardised log-moneyness ``z = x / sqrt(w(v) tau)`` and
``y = v^(1/4)``; paths are read off it by cubic convolution and the Black-Scholes part added back
in closed form. The table checks itself when it is built, against rows computed between its nodes:
a path is read off it only in a cell that met the marks' tolerances there (1e-6 of spot, 1e-4 of a
share per share), and beyond its z range only where the tails are provably within them; every
other path is priced by the integral.

Merton. The series of Black-Scholes prices conditional on the number of jumps (Merton 1976): with
``k = E[J] - 1``, ``lambda' = lambda (1 + k)``, ``n`` jumps weigh ``e^{-lambda' tau} (lambda'
tau)^n / n!`` and price at volatility ``sqrt(sigma^2 + n delta^2 / tau)`` and rate
``r - lambda k + n log(1 + k) / tau``; the series is summed outward from the Poisson mode until a
bound on the weights left is below 1e-15.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from functools import lru_cache

import numpy as np
from scipy.signal import CZT
from scipy.special import ndtr

from hedge_env import pricing

_INV_SQRT_2PI = 1.0 / math.sqrt(2.0 * math.pi)

# The table: standardised log-moneyness z in [-Z, Z] at Z_POINTS nodes (steps of 0.05 standard
# deviations), y = v^(1/4) in [0, y_max] at Y_POINTS nodes (y_max from the parameters, see heston_table).
TABLE_Z = 24.0
TABLE_Z_POINTS = 961
TABLE_Y_POINTS = 61
# Paths priced by the integral in one group (of similar variance: they share the nodes).
_GROUP = 256
# Integrand size below which the integral is cut off, relative to the strike's discounted unit.
_CUTOFF = 1e-18
_POLE_NODES = 48
_POLE_RANGE = 2.0
_MAX_PANELS = 200_000  # 3.2 million nodes: beyond, the integral raises rather than stop short
_PANEL_NODES = 16
_NODE_BLOCK = 4096
_TRAPEZOID_MAX = 64 * 256  # t nodes at most: beyond, a row is not trusted
_TRAPEZOID_BLOCK = 256


class MarkAccuracyError(ValueError):
    """The model's marks cannot be computed to their stated accuracy for these parameters and paths;
    the message is one line naming the model's parameters (the config's market keys)."""


@lru_cache(maxsize=64)
def _gauss_legendre(n: int) -> tuple[np.ndarray, np.ndarray]:
    return np.polynomial.legendre.leggauss(n)


# The least mean variance the integration's step in u is scaled to: a variance that stays near 0
# (at v = 0 with kappa near 0) would otherwise make the step infinite.
_MEAN_VARIANCE_FLOOR = 1e-12


def _log1p_ratio(y: np.ndarray) -> np.ndarray:
    """``log(1 + y) / y`` for complex ``y``, 1 at 0: its series below ``|y| = 1e-3`` (the first
    dropped term is under 2e-13), the logarithm above (rounding under 1e-13 relative there)."""
    y = np.asarray(y, dtype=complex)
    small = np.abs(y) < 1e-3
    safe = np.where(small, 1.0, y)
    return np.where(small, 1.0 - y / 2.0 + y * y / 3.0 - y * y * y / 4.0, np.log(1.0 + safe) / safe)


@dataclass(frozen=True)
class HestonPricer:
    """Heston (1993) prices, deltas and variance sensitivities, risk-neutral, per path.

    Parameters are the market model's (annual): ``mean_reversion`` kappa, ``long_run_variance``
    theta, ``vol_of_vol`` xi (> 0), ``correlation`` rho, and the ``rate`` and ``dividend_yield``
    of the marks.
    """

    mean_reversion: float
    long_run_variance: float
    vol_of_vol: float
    correlation: float
    rate: float = 0.0
    dividend_yield: float = 0.0

    state_factor = "variance"  # the market factor the marks read per path

    def __post_init__(self) -> None:
        if not (self.vol_of_vol > 0 and self.mean_reversion > 0 and self.long_run_variance > 0):
            raise ValueError("Heston marks need vol_of_vol, mean_reversion and long_run_variance > 0")

    def exponents(self, u: np.ndarray, tau: float) -> tuple[np.ndarray, np.ndarray]:
        """``C(u), D(u)`` of ``psi(u) = exp(C + D v)`` for ``X = log(S_T / F)`` (complex ``u``).

        Albrecher et al.'s form (``g = (b - d) / (b + d)``, ``exp(-d tau)``), with ``b - d`` taken as
        ``-xi^2 q / (b + d)``, ``q = i u + u^2``, so that nothing is divided by ``xi^2``: as the vol of
        vol goes to 0 the exponents go smoothly to those of the deterministic variance (Black-Scholes
        at the mean variance) instead of cancelling to noise or dividing by zero."""
        kappa, theta, xi, rho = self.mean_reversion, self.long_run_variance, self.vol_of_vol, self.correlation
        iu = 1j * u
        q = iu + u * u
        b = kappa - rho * xi * iu
        d = np.sqrt(b * b + xi * xi * q)
        s = b + d
        g = -xi * xi * q / (s * s)  # (b - d) / (b + d)
        decay = np.exp(-d * tau)
        rise = -np.expm1(-d * tau)  # 1 - exp(-d tau)
        dd = -(q / s) * rise / (1.0 - g * decay)
        # log((1 - g e) / (1 - g)) / xi^2 = log(1 + y) / xi^2 with y = g (1 - e) / (1 - g), as
        # (y / xi^2) * log1p(y) / y: finite at xi = 0.
        y_over = -(q / (s * s)) * rise / (1.0 - g)
        c = kappa * theta * (-(q / s) * tau - 2.0 * y_over * _log1p_ratio(xi * xi * y_over))
        return c, dd

    def mean_variance(self, v, tau: float):
        """Expected mean variance from now to ``tau`` given the variance ``v`` now."""
        kappa, theta = self.mean_reversion, self.long_run_variance
        return theta + (np.asarray(v, dtype=float) - theta) * (-math.expm1(-kappa * tau)) / (kappa * tau)

    def _nodes(self, tau: float, v_low: float, x_high: float) -> tuple[np.ndarray, np.ndarray]:
        """Quadrature nodes and weights in u good for every path with ``v >= v_low``, ``|x| <= x_high``.

        Raises :class:`MarkAccuracyError` rather than cut the integral short: when the integrand has
        not fallen below the cutoff by ``1e4`` of its own scale, or the panels would exceed
        ``_MAX_PANELS`` (a path tens of thousands of standard deviations from the strike)."""
        scale = math.sqrt(max(float(self.mean_variance(v_low, tau)), _MEAN_VARIANCE_FLOOR) * tau)
        trial = np.geomspace(0.5, 1e4, 300) / scale
        c, d = self.exponents(trial - 0.5j, tau)
        log_size = np.real(c + d * v_low) + 0.5 * x_high - np.log(trial * trial + 0.25) + np.log(trial)
        below = np.nonzero(log_size < math.log(_CUTOFF))[0]
        if not below.size:
            raise MarkAccuracyError(self._describe(tau, "the Fourier integrand does not decay below 1e-18 "
                                                        f"by u = {trial[-1]:.3g}"))
        u_max = max(float(trial[below[0]]), 2.0 * _POLE_RANGE)
        # Panels of a 16-node Gauss-Legendre rule: doubling in width from the pole region (where
        # 1 / (u^2 + 1/4) changes by its own size), up to a width that keeps the oscillation
        # e^{i u x} under 1.5 radians and the decay under one scale per panel.
        widest = min(1.5 / max(x_high, 1e-12), 1.0 / scale)
        edges = [_POLE_RANGE]
        while edges[-1] < u_max and edges[-1] < widest:
            edges.append(2.0 * edges[-1])
        wide = math.ceil(max(u_max - edges[-1], 0.0) / widest)
        if len(edges) + wide > _MAX_PANELS:
            raise MarkAccuracyError(self._describe(tau, f"a path at log-moneyness {x_high:.3g} needs "
                                                        f"{len(edges) + wide:,} panels (at most {_MAX_PANELS:,})"))
        edges = np.concatenate([edges, edges[-1] + widest * np.arange(1, wide + 1)])
        a, wa = _gauss_legendre(_POLE_NODES)
        b, wb = _gauss_legendre(_PANEL_NODES)
        half = 0.5 * np.diff(edges)[:, None]
        u = np.concatenate([0.5 * _POLE_RANGE * (a + 1.0), (edges[:-1, None] + half * (b + 1.0)).ravel()])
        weights = np.concatenate([0.5 * _POLE_RANGE * wa, (half * wb).ravel()])
        return u, weights

    def _describe(self, tau: float, problem: str) -> str:
        return (f"Heston marks for an expiry {tau * 365.0:.4g} d away (mean_reversion {self.mean_reversion:g}, "
                f"long_run_variance {self.long_run_variance:g}, vol_of_vol {self.vol_of_vol:g}, correlation "
                f"{self.correlation:g}): {problem}")

    def normalized_call(self, x, v, tau: float) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """``c, c_x, c_v`` at log forward-moneyness ``x`` and variance ``v`` (arrays alike) by the integral.

        Paths are taken in groups, each on the nodes its lowest variance and largest ``|x|`` need (the
        decay of the integrand is set by the variance, the width of its panels by ``|x|``): groups of
        similar variance, halved by ``|x|`` or by variance while the group's work (paths x panels) is
        over twice what its paths would need alone (a far-from-the-money path beside one at a
        variance near 0 would make every path of the group integrate as far and as finely as both). Every path is
        integrated to its own cutoff or beyond, so its price does not depend on its company."""
        x = np.atleast_1d(np.asarray(x, dtype=float))
        v = np.maximum(np.broadcast_to(np.atleast_1d(np.asarray(v, dtype=float)), x.shape), 0.0)
        out = np.empty((3, x.size))
        # Panels a path needs, up to a factor: its |x| over the scale of its decay (at least 1).
        scale = np.sqrt(np.maximum(self.mean_variance(v, tau), _MEAN_VARIANCE_FLOOR) * tau)
        need = np.maximum(np.abs(x) / scale, 1.0)
        order = np.argsort(v, kind="stable")
        pending = [order[start:start + _GROUP] for start in range(0, x.size, _GROUP)]
        def together(rows: np.ndarray) -> float:  # panels of the group's nodes, up to the same factor
            return max(float(np.abs(x[rows]).max()) / float(scale[rows].min()), 1.0)

        while pending:
            rows = pending.pop()
            if rows.size > 1 and rows.size * (together(rows) + 64.0) > 2.0 * float((need[rows] + 64.0).sum()):
                # Halve by |x| or by the scale, whichever leaves less work (paths x panels).
                halves = []
                for key in (np.abs(x[rows]), scale[rows]):
                    ranked = rows[np.argsort(key, kind="stable")]
                    halves.append((ranked[: rows.size // 2], ranked[rows.size // 2:]))
                pending += min(halves, key=lambda pair: sum(part.size * together(part) for part in pair))
                continue
            out[:, rows] = self._integrals(x[rows], v[rows], tau)
        return out[0], out[1], out[2]

    def _integrals(self, x: np.ndarray, v: np.ndarray, tau: float) -> np.ndarray:
        u, weights = self._nodes(tau, float(v.min()), float(np.abs(x).max()))
        integral = np.zeros((3, x.size))
        for start in range(0, u.size, _NODE_BLOCK):  # blocks of nodes: the matrix stays small
            part = slice(start, start + _NODE_BLOCK)
            c_u, d_u = self.exponents(u[part] - 0.5j, tau)
            scaled = weights[part] / (u[part] * u[part] + 0.25)
            terms = np.exp(1j * np.multiply.outer(x, u[part]) + c_u + np.multiply.outer(v, d_u))
            integral[0] += np.real(terms) @ scaled
            integral[1] += np.real(terms * (1j * u[part])) @ scaled
            integral[2] += np.real(terms * d_u) @ scaled
        half, whole = np.exp(0.5 * x) / math.pi, np.exp(x)
        return np.stack([whole - half * integral[0], whole - half * (0.5 * integral[0] + integral[1]),
                         -half * integral[2]])

    def value_delta_vega(self, spot, strike: float, tau: float, variance, is_call: bool, scale: float = 1.0,
                         exact: bool = False):
        """``scale`` x (value, dV/dS, dV/dv) of one option per path; ``tau <= 0``: the payoff.
        ``exact`` prices every path by the integral instead of the table."""
        spot = np.asarray(spot, dtype=float)
        if tau <= 0:
            value, delta = pricing.price_and_delta(spot, strike, 0.0, 0.0, is_call=is_call, scale=scale)
            return value, delta, np.zeros_like(value)
        if variance is None:
            raise ValueError("Heston marks need the variance per path (the market factor 'variance')")
        discount = math.exp(-self.rate * tau)
        x = np.log(spot / strike) + (self.rate - self.dividend_yield) * tau
        variance = np.broadcast_to(np.asarray(variance, dtype=float), spot.shape)
        if exact:
            c, c_x, c_v = (part.reshape(spot.shape) for part in self.normalized_call(x.ravel(), variance.ravel(), tau))
        else:
            c, c_x, c_v = heston_table(self, tau).lookup(x, variance)
        unit = scale * strike * discount
        value, delta, vega = unit * c, unit * c_x / spot, unit * c_v
        if not is_call:  # parity: P = C - S e^{-q tau} + K e^{-r tau}
            carry = scale * math.exp(-self.dividend_yield * tau)
            value = value - carry * spot + unit
            delta = delta - carry
        return value, delta, vega


def _black_normalized(x: np.ndarray, v: np.ndarray, pricer: HestonPricer, tau: float) -> np.ndarray:
    """``c, c_x, c_v`` of Black-Scholes at the expected mean variance ``w(v)``: the part of the Heston
    call the table leaves out (the difference is smooth in the table's coordinates and small)."""
    w = pricer.mean_variance(v, tau)
    root = np.sqrt(w * tau)
    # A mean variance of 0 (v = 0 with kappa tau at 0) gives NaN here, without a warning: such points lie
    # outside the table's z range and fail the tails' check, so the integral prices them.
    with np.errstate(divide="ignore", invalid="ignore"):
        d1 = x / root + 0.5 * root
        forward = np.exp(x)
        c_x = forward * ndtr(d1)
        c = c_x - ndtr(d1 - root)
        # dc/dw = e^x phi(d1) sqrt(tau) / (2 sqrt(w)); dw/dv = (1 - e^{-kappa tau}) / (kappa tau)
        slope = -math.expm1(-pricer.mean_reversion * tau) / (pricer.mean_reversion * tau)
        c_v = forward * np.exp(-0.5 * d1 * d1) * (_INV_SQRT_2PI * tau * 0.5 * slope) / root
    return np.stack([c, c_x, c_v])


def _keys_weights(t: np.ndarray) -> np.ndarray:
    """Cubic-convolution weights (Keys 1981, a = -1/2) of the 4 nodes around each fraction ``t`` in [0, 1)."""
    t2, t3 = t * t, t * t * t
    return np.stack([-0.5 * t3 + t2 - 0.5 * t, 1.5 * t3 - 2.5 * t2 + 1.0,
                     -1.5 * t3 + 2.0 * t2 + 0.5 * t, 0.5 * t3 - 0.5 * t2])


def _interpolate(stacked: np.ndarray, zi: np.ndarray, si: np.ndarray) -> np.ndarray:
    """(3, n) cubic convolution of the (y node x z node, part) values at grid coordinates ``zi, si``
    (each with its 4-node stencil inside the grid)."""
    z0, s0 = np.floor(zi).astype(np.intp), np.floor(si).astype(np.intp)
    wz, ws = _keys_weights(zi - z0), _keys_weights(si - s0)
    corner = (s0 - 1) * TABLE_Z_POINTS + (z0 - 1)
    total = np.zeros((zi.size, 3))
    for a in range(4):  # one gather of the three parts per stencil node
        for b in range(4):
            total += (ws[a] * wz[b])[:, None] * stacked.take(corner + (a * TABLE_Z_POINTS + b), axis=0)
    return total.T


@dataclass(frozen=True)
class HestonTable:
    """``c, c_x, c_v`` of one ``tau`` on the (z, y) grid, with the cells it may be read in; see
    :func:`heston_table`."""

    pricer: HestonPricer
    tau: float
    y_step: float
    stacked: np.ndarray  # (y node x z node, part): Heston less Black-Scholes, y from -y_step to y_max + 2 steps
    trusted: np.ndarray  # (y nodes, z nodes) bool: cell [s0, z0] (by its lower-left node) within tolerance
    tails: np.ndarray  # (2, y nodes) bool: beyond the z range below / above, Black-Scholes is within tolerance

    def coordinates(self, x: np.ndarray, v: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """Grid coordinates (fractional z and y node indices, y counted from the row below 0)."""
        z = x / np.sqrt(self.pricer.mean_variance(v, self.tau) * self.tau)
        return (z + TABLE_Z) / _Z_STEP, np.sqrt(np.sqrt(v)) / self.y_step + 1.0

    def lookup(self, x: np.ndarray, v: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        shape = np.shape(x)
        x, v = np.ravel(x), np.maximum(np.ravel(v), 0.0)
        zi, si = self.coordinates(x, v)
        # The 4-node stencil must lie inside the grid and the cell must have passed its check;
        # beyond the z range (deep in or out of the money) the difference from Black-Scholes is left
        # out where the tails' check allows it. Everything else is priced by the integral.
        in_variance = si < self.trusted.shape[0] - 2.0
        in_z = (zi >= 1.0) & (zi < TABLE_Z_POINTS - 2.0)
        s0 = np.where(in_variance, np.floor(si), 0).astype(np.intp)
        z0 = np.clip(np.floor(zi), 0, TABLE_Z_POINTS - 1).astype(np.intp)
        inside = in_variance & in_z & self.trusted[s0, z0]
        tail = in_variance & ~in_z & self.tails[(zi >= 1.0).astype(np.intp), s0]
        out = _black_normalized(x, v, self.pricer, self.tau)
        if inside.any():
            out[:, inside] += _interpolate(self.stacked, zi[inside], si[inside])
        exact = ~(inside | tail)
        if exact.any():
            out[:, exact] = np.stack(self.pricer.normalized_call(x[exact], v[exact], self.tau))
        return out[0].reshape(shape), out[1].reshape(shape), out[2].reshape(shape)


# The table's trapezoid step in t = u sqrt(w tau): resolves e^{i t z} over |z| <= TABLE_Z.
_T_STEP = min(0.2, 2.0 / TABLE_Z)
# The points each row is computed at: the z nodes, then a quarter of a step above each node but the
# last (one check point per cell).
_Z_NODES = np.linspace(-TABLE_Z, TABLE_Z, TABLE_Z_POINTS)
_Z_STEP = _Z_NODES[1] - _Z_NODES[0]
_CHECK_AT = 0.25


# What the table must meet wherever it is read (else the integral prices the path): a mark within
# PRICE_TOLERANCE of spot, a delta within DELTA_TOLERANCE of a share per share, and dV/dv within
# DELTA_TOLERANCE / xi (its weight in the minimum-variance delta, rho xi / S dV/dv, is at most xi / S).
# The check reads errors where cubic interpolation errs most and allows them a quarter of the
# tolerance (_CHECK_SHARE).
PRICE_TOLERANCE = 1e-6
DELTA_TOLERANCE = 1e-4
_CHECK_SHARE = 0.25


@lru_cache(maxsize=16)
def _chirp_transforms(columns: int) -> tuple[CZT, CZT]:
    """Sums ``sum_k f_k e^{i t_k z}`` over ``columns`` t nodes (``t_k = k _T_STEP``) at the z nodes
    and at the check points: both grids are uniform, so each is a chirp z-transform (Bluestein's
    FFT, O(n log n) against the n^2 of the direct sum), the same for every row of every table as
    both grids are in standardised units."""
    spin = np.exp(1j * _T_STEP * _Z_STEP)
    return (CZT(columns, TABLE_Z_POINTS, w=spin, a=np.exp(-1j * _T_STEP * _Z_NODES[0])),
            CZT(columns, TABLE_Z_POINTS - 1, w=spin, a=np.exp(-1j * _T_STEP * (_Z_NODES[0] + _CHECK_AT * _Z_STEP))))


def _difference_row(pricer: HestonPricer, v: float, tau: float) -> tuple[np.ndarray, bool]:
    """Heston less Black-Scholes ``c, c_x, c_v`` at the variance ``v`` and ``x = z sqrt(w(v) tau)``
    over the z nodes then the check points, and whether both transforms died out (else the row is not
    trusted).

    Both transforms have the poles of 1 / (u^2 + 1/4) at ``u = +-i/2`` with the same residue
    (``psi(0) = psi(-i) = 1`` for both), so their difference is smooth there and the trapezoid rule
    on it converges geometrically; steps of ``t = u sqrt(w tau)`` resolve the oscillation of
    ``e^{i u x} = e^{i t z}`` over the table's z range."""
    w = float(pricer.mean_variance(v, tau))
    x = np.concatenate([_Z_NODES, _Z_NODES[:-1] + _CHECK_AT * _Z_STEP]) * math.sqrt(w * tau)
    scale = math.sqrt(max(w, _MEAN_VARIANCE_FLOOR) * tau)
    x_high = TABLE_Z * math.sqrt(w * tau)
    step = _T_STEP / scale  # in u
    blocks, converged = [], False
    for start in range(0, _TRAPEZOID_MAX, _TRAPEZOID_BLOCK):  # until both transforms have died out
        u = step * np.arange(start, start + _TRAPEZOID_BLOCK)
        shifted = u - 0.5j
        c, d = pricer.exponents(shifted, tau)
        heston = np.exp(c + d * v)
        exponent = -0.5 * tau * (shifted * shifted + 1j * shifted)  # Black-Scholes: psi = exp(w * exponent)
        black = np.exp(w * exponent)
        blocks.append((u, heston, black, d, exponent))
        size = (np.abs(heston) + np.abs(black)) * math.exp(0.5 * x_high) / (u * u + 0.25)
        if size[-1] * step < _CUTOFF:
            converged = True
            break
    u, heston, black, d, exponent = (np.concatenate(parts) for parts in zip(*blocks))
    slope = -math.expm1(-pricer.mean_reversion * tau) / (pricer.mean_reversion * tau)  # dw/dv
    weights = np.full(u.size, step) / (u * u + 0.25)
    weights[0] *= 0.5
    difference = (heston - black) * weights
    transforms = np.stack([difference, difference * 1j * u, (heston * d - black * exponent * slope) * weights])
    on_nodes, on_checks = _chirp_transforms(u.size)
    integral, integral_x, integral_v = np.concatenate([on_nodes(transforms), on_checks(transforms)], axis=1).real
    half = np.exp(0.5 * x) / math.pi
    return np.stack([-half * integral, -half * (0.5 * integral + integral_x), -half * integral_v]), converged


def _budgets(pricer: HestonPricer, x: np.ndarray, tau: float) -> np.ndarray:
    """(3, n) the tolerances of ``c, c_x, c_v`` at ``x``: in the call's units (the discounted strike,
    ``K e^{-r tau} = S e^{-x - q tau}``), the marks' tolerances in units of spot."""
    to_spot = np.exp(x + pricer.dividend_yield * tau)
    return np.stack([PRICE_TOLERANCE * to_spot, DELTA_TOLERANCE * to_spot, DELTA_TOLERANCE / pricer.vol_of_vol * to_spot])


def _over(error: np.ndarray, budget: np.ndarray) -> np.ndarray:
    """Per point, whether any part's error is over its share of the budget (NaN counts as over)."""
    return ~np.all(np.abs(error) <= _CHECK_SHARE * budget, axis=0)


@lru_cache(maxsize=256)
def heston_table(pricer: HestonPricer, tau: float) -> HestonTable:
    """The (z, y) table of ``pricer`` at ``tau`` (built once, then cached), checked where it is read.

    ``y = v^(1/4)`` (uniform nodes, so the variance nodes crowd near 0, where the price changes
    fastest in v at short expiries) runs up to ``y_max`` with ``y_max^2 = 4 sqrt(theta) + 3 xi
    sqrt(tau)``, a volatility generous for the paths of a few months; ``c`` depends on ``v = y^4``,
    so it is even in ``y`` and the row below 0 is the mirror of the first row above it.

    The check: each node row is also computed a quarter of a step above each z node, and a row a
    quarter of a step above each node row, at the z nodes and those points; a cell (the square
    between four nodes) is read only if the table's values at its check points are within a quarter
    of the tolerances (:data:`PRICE_TOLERANCE`, :data:`DELTA_TOLERANCE`) of the computed ones, and
    every row of its stencil converged. Beyond the z range, Black-Scholes alone is used where both it
    and the Heston price at the edge node are within tolerance in units of spot: out-of-the-money
    calls (below) and puts (above) and their deltas fall monotonically further out, so their
    difference stays within it (dV/dv is only checked at the edge).
    """
    y_max = math.sqrt(4.0 * math.sqrt(pricer.long_run_variance) + 3.0 * pricer.vol_of_vol * math.sqrt(tau))
    y_step = y_max / (TABLE_Y_POINTS - 1)
    y_nodes = y_step * np.arange(-1, TABLE_Y_POINTS + 2)
    bands = np.arange(1, TABLE_Y_POINTS + 1)  # cells [s0, z0] by their lower-left node
    cells_z = np.arange(1, TABLE_Z_POINTS - 2)
    # Rows at the y nodes, and at a quarter of a step above the lower node of every band of cells.
    rows = [_difference_row(pricer, v, tau) for v in np.concatenate([y_nodes, y_step * (bands - 0.75)]) ** 4]
    fine = np.stack([row for row, _ in rows], axis=1)  # (3, rows, z nodes then check points)
    converged = np.array([ok for _, ok in rows])
    on_nodes, on_quarters = fine[:, :y_nodes.size], fine[:, y_nodes.size:]
    values = np.ascontiguousarray(on_nodes[:, :, :TABLE_Z_POINTS])

    # Keys' interpolation reproduces quadratics: its error is ~ h^3 f''' t (1 - t) (1 - 2 t) in each
    # direction, zero at a cell's nodes and midpoint and largest (and, to leading order, of one size)
    # near its quarter points: it is read at a quarter of a step above a node, in z and in y. All
    # check points share those fractions, so the table's values there are fixed 4-node filters.
    weights = _keys_weights(np.array(_CHECK_AT))

    def along(array: np.ndarray, axis: int, lower: np.ndarray) -> np.ndarray:
        """Keys' interpolation at ``lower + _CHECK_AT`` along ``axis`` (stencils lower - 1 .. lower + 2)."""
        return sum(w * np.take(array, lower - 1 + b, axis=axis) for b, w in enumerate(weights))

    def over(table: np.ndarray, exact: np.ndarray, v: np.ndarray, zi: np.ndarray) -> np.ndarray:
        """Per point, whether the table's ``table`` misses ``exact`` (both (3, y, z)) by over the share."""
        x = (zi[None, :] * _Z_STEP - TABLE_Z) * np.sqrt(pricer.mean_variance(v, tau) * tau)[:, None]
        return _over((table - exact).reshape(3, -1), _budgets(pricer, x.ravel(), tau)).reshape(x.shape)

    z_nodes = np.arange(1, TABLE_Z_POINTS - 1)
    node_rows = np.arange(1, TABLE_Y_POINTS + 2)
    quarter_v = (y_step * (bands - 1 + _CHECK_AT)) ** 4
    # Node rows 1 .. Y + 1 at the z check points: the cells below and above each.
    bad_z = over(along(values[:, node_rows], 2, cells_z), on_nodes[:, node_rows][:, :, TABLE_Z_POINTS + cells_z],
                 y_nodes[node_rows] ** 4, cells_z + _CHECK_AT)
    # The quarter rows at the z nodes (each checks the cells either side) and at the check points.
    at_node = over(along(values[:, :, z_nodes], 1, bands), on_quarters[:, :, z_nodes], quarter_v, z_nodes)
    at_quarter = over(along(along(values, 2, cells_z), 1, bands), on_quarters[:, :, TABLE_Z_POINTS + cells_z],
                      quarter_v, cells_z + _CHECK_AT)
    bad = (bad_z[:-1] | bad_z[1:] | at_quarter | at_node[:, :-1] | at_node[:, 1:]
           | ~converged[y_nodes.size:, None])
    # A row that did not converge spoils every stencil it is in (rows s0 - 1 .. s0 + 2).
    node_ok = converged[:y_nodes.size]
    stencil_ok = np.array([node_ok[s0 - 1:s0 + 3].all() for s0 in bands])
    trusted = np.zeros((y_nodes.size, TABLE_Z_POINTS), dtype=bool)
    trusted[1:TABLE_Y_POINTS + 1, 1:TABLE_Z_POINTS - 2] = ~bad & stencil_ok[:, None]

    # The tails: the out-of-the-money call below the z range (at node 1), the put above it (node
    # Z - 2), per row; Heston and Black-Scholes each within the budget, for every row of the stencil.
    row_ok = np.zeros((2, y_nodes.size), dtype=bool)
    v = y_nodes**4
    for side, node in ((0, 1), (1, TABLE_Z_POINTS - 2)):
        x = _Z_NODES[node] * np.sqrt(pricer.mean_variance(v, tau) * tau)
        black = _black_normalized(x, v, pricer, tau)
        heston = black + values[:, :, node]
        if side == 1:  # to the put: p = c - e^x + 1, p_x = c_x - e^x
            shift = np.stack([np.exp(x) - 1.0, np.exp(x), np.zeros_like(x)])
            black, heston = black - shift, heston - shift
        budget = _budgets(pricer, x, tau)
        row_ok[side] = node_ok & ~_over(black, budget) & ~_over(heston, budget)
    tails = np.zeros_like(row_ok)
    tails[:, bands] = np.stack([row_ok[:, s0 - 1:s0 + 3].all(axis=1) for s0 in bands], axis=1)
    return HestonTable(pricer, tau, y_step, np.ascontiguousarray(values.reshape(3, -1).T), trusted, tails)


_MAX_JUMP_TERMS = 100_000


@dataclass(frozen=True)
class MertonPricer:
    """Merton (1976) jump-diffusion prices and deltas, risk-neutral, by the series over jump counts."""

    volatility: float
    jump_intensity: float
    jump_mean: float
    jump_std: float
    rate: float = 0.0
    dividend_yield: float = 0.0

    state_factor = None  # no state: the marks depend on spot and time only

    def terms(self, tau: float) -> list[tuple[float, float, float]]:
        """(weight, volatility, rate) of each jump count that matters: summed outward from the Poisson
        mode, each side until a bound on the weights left beyond it is below 5e-16 (past the mode the
        weights fall at least geometrically, by ``m / (n + 1)`` upward and ``n / m`` downward, with
        ``m`` the mean count). Raises :class:`MarkAccuracyError` beyond ``_MAX_JUMP_TERMS`` terms."""
        k = math.exp(self.jump_mean + 0.5 * self.jump_std**2) - 1.0
        mean_jumps = self.jump_intensity * (1.0 + k) * tau
        weights = {0: 1.0}
        if mean_jumps > 0.0:
            # Weights relative to the mode's by the recurrence w(n + 1) = w(n) m / (n + 1), normalised
            # at the end: the weights left out are below 1e-15, and each weight's rounding is a few
            # units in the last place instead of that of exp(lgamma) of a large count.
            mode = math.floor(mean_jumps)
            at_mode = math.exp(-mean_jumps + mode * math.log(mean_jumps) - math.lgamma(mode + 1))
            weights = {mode: 1.0}
            for direction in (1, -1):
                n, relative = mode, 1.0
                while n > 0 or direction > 0:
                    ratio = mean_jumps / (n + 1) if direction > 0 else n / mean_jumps
                    if ratio < 1.0 and at_mode * relative * ratio / (1.0 - ratio) < 5e-16:
                        break
                    relative *= ratio
                    n += direction
                    weights[n] = relative
                    if len(weights) > _MAX_JUMP_TERMS:
                        raise MarkAccuracyError(
                            f"Merton marks for an expiry {tau * 365.0:.4g} d away (jump_intensity "
                            f"{self.jump_intensity:g}, jump_mean {self.jump_mean:g}, jump_std {self.jump_std:g}): "
                            f"{mean_jumps:.3g} jumps expected, the series needs over {_MAX_JUMP_TERMS:,} terms")
        total = math.fsum(weights.values())
        out = []
        for n in sorted(weights):
            vol = math.sqrt(self.volatility**2 + n * self.jump_std**2 / tau)
            rate = self.rate - self.jump_intensity * k + n * math.log1p(k) / tau
            out.append((weights[n] / total, vol, rate))
        return out

    def value_delta_vega(self, spot, strike: float, tau: float, variance, is_call: bool, scale: float = 1.0,
                         exact: bool = False):
        """``scale`` x (value, dV/dS, 0) of one option per path (``variance`` is ignored)."""
        spot = np.asarray(spot, dtype=float)
        if tau <= 0:
            value, delta = pricing.price_and_delta(spot, strike, 0.0, 0.0, is_call=is_call, scale=scale)
            return value, delta, np.zeros_like(value)
        value = delta = 0.0
        for weight, vol, rate in self.terms(tau):
            # Black-Scholes at the term's own rate: its discount e^{-r_n tau} against the true e^{-r tau}
            # is what turns the jump count's Poisson weights at lambda into those at lambda'.
            part_value, part_delta = pricing.price_and_delta(
                spot, strike, tau, vol, rate, self.dividend_yield, is_call, scale * weight)
            value = value + part_value
            delta = delta + part_delta
        return value, delta, np.zeros_like(value)
