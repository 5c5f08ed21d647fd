"""Black-Scholes(-Merton) pricing of European calls and puts.

Continuous risk-free rate ``rate`` and continuous dividend (or carry) yield
``dividend``; all quantities are annual: ``tau`` is time to expiry in years,
``vol``, ``rate`` and ``dividend`` are decimals per year (0.2 means 20%).

Conventions match QuantLib's ``AnalyticEuropeanEngine``:

* ``vega`` is dV/dvol for a change of 1.00 in volatility (not one vol point);
* ``theta`` is dV/dt per year of calendar time, i.e. ``-dV/dtau``.

The limits are exact and free of NaN and numpy warnings:

* ``tau <= 0`` (expiry or past it): price is the payoff ``max(w (S - K), 0)``
  with ``w = +1`` for calls and ``-1`` for puts; delta is the step ``w`` in
  the money, 0 out of it and ``0.5 w`` exactly at the money; gamma, vega and
  theta are 0.
* ``vol <= 0`` with ``tau > 0``: price is the discounted forward intrinsic
  value ``max(w (S e^{-q tau} - K e^{-r tau}), 0)``, delta ``w e^{-q tau}`` in
  the money of the forward (half of it exactly at the forward), gamma and
  vega 0, theta the exact time derivative of the intrinsic value.

Spot and strike must be positive.

Two families of functions are provided: vectorised numpy functions (any
inputs broadcast; results are float64 arrays, 0-d for scalar input) and
``*_scalar`` functions built on :mod:`math` alone for single-path loops where
numpy call overhead would dominate.
"""

from __future__ import annotations

import math
from typing import NamedTuple

import numpy as np
from scipy.special import ndtr

__all__ = [
    "Greeks",
    "black_scholes",
    "price",
    "price_and_delta",
    "delta",
    "gamma",
    "vega",
    "theta",
    "price_and_delta_scalar",
    "gamma_scalar",
]

_INV_SQRT_2PI = 1.0 / math.sqrt(2.0 * math.pi)
_INV_SQRT2 = 1.0 / math.sqrt(2.0)

# Total standard deviation vol*sqrt(tau) at or below which the zero-volatility
# limit is used. Far below any meaningful value (the price differs from the
# limit by about S * 1e-100) but large enough that log-moneyness / stdev and
# its square cannot overflow, so subnormal inputs raise no warnings.
_MIN_STD = 1e-100


class Greeks(NamedTuple):
    """Black-Scholes price and sensitivities (float64 arrays).

    Attributes
    ----------
    price : ndarray
        Option value, in currency units of the spot.
    delta : ndarray
        dV/dS.
    gamma : ndarray
        d2V/dS2, per unit of spot.
    vega : ndarray
        dV/dvol for a change of 1.00 in volatility.
    theta : ndarray
        dV/dt per year of calendar time (``-dV/dtau``).
    """

    price: np.ndarray
    delta: np.ndarray
    gamma: np.ndarray
    vega: np.ndarray
    theta: np.ndarray


_PARAMS_DOC = """
    Parameters
    ----------
    spot : float or array_like
        Underlying price S, > 0.
    strike : float or array_like
        Strike K, > 0.
    tau : float or array_like
        Time to expiry in years; values <= 0 mean expired (payoff limit).
    vol : float or array_like
        Annual volatility as a decimal; values <= 0 mean the zero-volatility
        limit.
    rate : float or array_like, default 0.0
        Continuously compounded risk-free rate per year.
    dividend : float or array_like, default 0.0
        Continuous dividend yield per year.
    is_call : bool or array_like of bool, default True
        True for a call, False for a put.
"""


def _as_float(x) -> float | None:
    """Return ``x`` as a Python float if it is a scalar, else None."""
    # Cheap type tests first: this runs on every hot-loop call.
    t = type(x)
    if t is float or t is int:
        return float(x)
    if isinstance(x, (np.floating, np.integer)):
        return float(x)
    if isinstance(x, np.ndarray) and x.ndim == 0:
        return float(x)
    return None


def _as_sign(is_call) -> float | None:
    """Return +1.0 / -1.0 for a scalar call/put flag, else None."""
    if isinstance(is_call, (bool, np.bool_, int, np.integer)):
        return 1.0 if is_call else -1.0
    if isinstance(is_call, np.ndarray) and is_call.ndim == 0:
        return 1.0 if bool(is_call) else -1.0
    return None


def _payoff_price_delta(spot, strike, w, scale):
    """Price and delta at or past expiry (scalar tau <= 0 and sign), times ``scale``.

    The payoff and the step delta of the limit, without the masks and the
    normal CDFs of the general path: the last step of every rollout lands here.
    Bit for bit what :func:`black_scholes` gives at ``tau <= 0`` when ``scale`` is 1.
    """
    S = np.asarray(spot, dtype=np.float64)
    k = _as_float(strike)
    K = k if k is not None else np.asarray(strike, dtype=np.float64)
    # Intrinsic value w (S - K), written as K - S for puts so at the money it is +0.0, not -0.0.
    intrinsic = S - K if w > 0.0 else K - S
    # sign(w (S - K)) is 1, 0, -1 in, at and out of the money: delta w (1 + sign) / 2 is w, w/2, 0.
    dlt = np.sign(intrinsic)
    dlt += 1.0
    dlt *= 0.5 * w * scale
    dlt += 0.0  # turns the -0.0 of an out-of-the-money put into 0.0, as the general path does
    prc = np.maximum(intrinsic, 0.0)
    if scale != 1.0:
        prc *= scale
    return np.asarray(prc), np.asarray(dlt)


def _fast_price_delta(spot, strike, tau, vol, rate, dividend, w, scale=1.0):
    """Price and delta for scalar tau > 0, vol > 0, rate, dividend and sign, times ``scale``.

    No masks are needed because vol*sqrt(tau) > 0; every scalar factor is
    computed once and the array work is one log, two ndtr and a few
    multiply/adds. The sign ``w`` and ``scale`` are folded into the scalar
    factors so puts and positions cost the same as one call, and puts are
    computed directly from N(-d1), N(-d2), which keeps far out-of-the-money
    puts accurate (no parity cancellation).
    """
    S = np.asarray(spot, dtype=np.float64)
    std = vol * math.sqrt(tau)
    df_r = math.exp(-rate * tau)
    df_q = math.exp(-dividend * tau)
    # w*d1 = (w/std) * log(S e^{(r - q + vol^2/2) tau} / K): one log pass and
    # one scale; the drift and the half-variance are folded into a scalar.
    growth = math.exp((rate - dividend) * tau + 0.5 * std * std)
    k = _as_float(strike)
    w_scale = w * scale
    if k is not None:
        x = S * (growth / k)
        k_df = w_scale * df_r * k
    else:
        K = np.asarray(strike, dtype=np.float64)
        x = S * (growth / K)
        k_df = (w_scale * df_r) * K
    a = w / std
    if not isinstance(x, np.ndarray):
        # Scalar spot and strike: numpy scalars cannot be written in place.
        x = np.log(x) * a
        with np.errstate(under="ignore"):
            dlt = ndtr(x) * (w_scale * df_q)
            prc = S * dlt - ndtr(x - w * std) * k_df
        return np.asarray(prc), np.asarray(dlt)
    # Array case: work in place in x, which has the full broadcast shape of
    # spot and strike, so only three arrays are allocated.
    np.log(x, out=x)
    x *= a  # x = w*d1
    n2 = x - w * std  # w*d2
    ndtr(n2, out=n2)
    ndtr(x, out=x)
    # ndtr returns subnormals for w*d in about [-37.7, -37.5]; scaling them
    # may underflow, which is correct, so keep a caller's under="raise" quiet.
    with np.errstate(under="ignore"):
        x *= w_scale * df_q  # delta = w e^{-q tau} N(w d1)
        prc = S * x
        n2 *= k_df
        prc -= n2  # price = S*delta - w K e^{-r tau} N(w d2)
    return prc, x


def black_scholes(spot, strike, tau, vol, rate=0.0, dividend=0.0, is_call=True) -> Greeks:
    """Black-Scholes price and Greeks of a European call or put.
    {params}
    Returns
    -------
    Greeks
        NamedTuple ``(price, delta, gamma, vega, theta)`` of float64 arrays
        broadcast over the inputs. ``vega`` is per 1.00 of volatility and
        ``theta`` is dV/dt per year (QuantLib conventions).

    Notes
    -----
    Where ``vol * sqrt(tau)`` is zero, d1 = d2 = +inf / -inf / 0 according to
    whether the discounted spot ``S e^{{-q tau}}`` is above, below or equal to
    the discounted strike ``K e^{{-r tau}}``; the normal CDF formulas then give
    the expiry and zero-volatility limits exactly.
    """
    S = np.asarray(spot, dtype=np.float64)
    K = np.asarray(strike, dtype=np.float64)
    t = np.maximum(np.asarray(tau, dtype=np.float64), 0.0)  # past expiry == at expiry
    v = np.maximum(np.asarray(vol, dtype=np.float64), 0.0)
    r = np.asarray(rate, dtype=np.float64)
    q = np.asarray(dividend, dtype=np.float64)
    w = np.where(is_call, 1.0, -1.0)

    # Far-tail densities and probabilities underflow to 0 by design; that is
    # the correct value, so the underflow flag is not an error here.
    with np.errstate(under="ignore"):
        sqrt_t = np.sqrt(t)
        std = v * sqrt_t
        live = std > _MIN_STD
        safe_std = np.where(live, std, 1.0)
        safe_sqrt_t = np.where(live, sqrt_t, 1.0)
        std = np.where(live, std, 0.0)
        df_r = np.exp(-r * t)
        df_q = np.exp(-q * t)
        fs = S * df_q  # discounted forward of the spot
        fk = K * df_r  # discounted strike

        log_m = np.log(S / K) + (r - q) * t
        d_lim = np.where(fs > fk, np.inf, np.where(fs < fk, -np.inf, 0.0))
        d1 = np.where(live, log_m / safe_std + 0.5 * std, d_lim)
        d2 = d1 - std

        n1 = ndtr(w * d1)
        n2 = ndtr(w * d2)
        pdf = np.where(live, np.exp(-0.5 * d1 * d1) * _INV_SQRT_2PI, 0.0)

        prc = w * (fs * n1 - fk * n2)
        dlt = w * df_q * n1
        gam = df_q * pdf / (S * safe_std)
        veg = fs * pdf * sqrt_t
        th = -0.5 * fs * pdf * v / safe_sqrt_t + w * (q * fs * n1 - r * fk * n2)
        # Expired options have no time value left to decay.
        th = np.where(t > 0.0, th, 0.0)

    # gamma and vega do not depend on is_call; give every field the same
    # shape. Adding 0.0 turns the -0.0 of w * 0 into 0.0.
    fields = [np.asarray(a + 0.0) for a in (prc, dlt, gam, veg, th)]
    shape = np.broadcast_shapes(*(a.shape for a in fields))
    return Greeks(*(a if a.shape == shape else np.broadcast_to(a, shape).copy() for a in fields))


def price_and_delta(spot, strike, tau, vol, rate=0.0, dividend=0.0, is_call=True, scale=1.0):
    """Black-Scholes price and delta, with fast paths for the hedging loop.
    {params}    scale : float, default 1.0
        Multiplier of both results, e.g. the signed shares of a position;
        folded into scalar factors, so it costs no pass over the arrays.

    Returns
    -------
    price : ndarray
        Option value times ``scale``, float64, broadcast over the inputs.
    delta : ndarray
        dV/dS times ``scale``, float64, broadcast over the inputs.

    Notes
    -----
    When ``tau``, ``vol``, ``rate``, ``dividend`` and ``is_call`` are scalars
    with ``tau > 0`` and ``vol > 0`` (the usual case: one time step across
    many paths) a mask-free path is used: one log over the spot array and
    two ``ndtr`` calls. A scalar ``tau <= 0`` with a scalar ``is_call`` gives
    the payoff and step delta directly. Otherwise the general
    :func:`black_scholes` is used.
    """
    t = _as_float(tau)
    v = _as_float(vol)
    if t is not None and v is not None:
        r = _as_float(rate)
        q = _as_float(dividend)
        w = _as_sign(is_call)
        if r is not None and q is not None and w is not None:
            if t <= 0.0:
                return _payoff_price_delta(spot, strike, w, scale)
            if v > 0.0 and v * math.sqrt(t) > _MIN_STD:
                return _fast_price_delta(spot, strike, t, v, r, q, w, scale)
    g = black_scholes(spot, strike, tau, vol, rate, dividend, is_call)
    if scale != 1.0:
        return g.price * scale, g.delta * scale
    return g.price, g.delta


def price(spot, strike, tau, vol, rate=0.0, dividend=0.0, is_call=True) -> np.ndarray:
    """Black-Scholes price of a European option.
    {params}
    Returns
    -------
    ndarray
        Option value in currency units of the spot, float64.
    """
    return price_and_delta(spot, strike, tau, vol, rate, dividend, is_call)[0]


def delta(spot, strike, tau, vol, rate=0.0, dividend=0.0, is_call=True) -> np.ndarray:
    """Black-Scholes delta dV/dS.
    {params}
    Returns
    -------
    ndarray
        dV/dS, float64 (calls in [0, e^{{-q tau}}], puts in [-e^{{-q tau}}, 0]).
    """
    return price_and_delta(spot, strike, tau, vol, rate, dividend, is_call)[1]


def gamma(spot, strike, tau, vol, rate=0.0, dividend=0.0, is_call=True) -> np.ndarray:
    """Black-Scholes gamma d2V/dS2 (same for calls and puts).
    {params}
    Returns
    -------
    ndarray
        d2V/dS2 per unit of spot, float64; 0 at expiry and at zero volatility.
    """
    scalars = [_as_float(x) for x in (tau, vol, rate, dividend)]
    if None in scalars:  # per-element times or volatilities: the general function's masks
        return black_scholes(spot, strike, tau, vol, rate, dividend, is_call).gamma
    tau, vol, rate, dividend = scalars
    shape = np.broadcast_shapes(np.shape(spot), np.shape(strike))
    std = vol * math.sqrt(max(tau, 0.0))
    if tau <= 0.0 or vol <= 0.0 or std <= _MIN_STD:
        return np.zeros(shape)
    # One time and volatility (the step's case): e^{-q tau} phi(d1) / (S std) directly, without the
    # price, the delta, vega and theta that the general function computes beside it.
    S = np.asarray(spot, dtype=np.float64)
    with np.errstate(under="ignore"):
        d1 = np.log(S / np.asarray(strike, dtype=np.float64)) * (1.0 / std) + ((rate - dividend) * tau / std + 0.5 * std)
        out = np.exp(-0.5 * d1 * d1) * (math.exp(-dividend * tau) * _INV_SQRT_2PI / std) / S
    out = np.asarray(out)
    return np.broadcast_to(out, shape).copy() if out.shape != shape else out


def vega(spot, strike, tau, vol, rate=0.0, dividend=0.0, is_call=True) -> np.ndarray:
    """Black-Scholes vega dV/dvol (same for calls and puts).
    {params}
    Returns
    -------
    ndarray
        dV/dvol for a change of 1.00 in volatility (divide by 100 for one vol
        point), float64; 0 at expiry and at zero volatility.
    """
    return black_scholes(spot, strike, tau, vol, rate, dividend, is_call).vega


def theta(spot, strike, tau, vol, rate=0.0, dividend=0.0, is_call=True) -> np.ndarray:
    """Black-Scholes theta dV/dt.
    {params}
    Returns
    -------
    ndarray
        dV/dt per year of calendar time (``-dV/dtau``; divide by 365 for a
        calendar day, as QuantLib's ``thetaPerDay``), float64; 0 at expiry.
    """
    return black_scholes(spot, strike, tau, vol, rate, dividend, is_call).theta


for _f in (black_scholes, price_and_delta, price, delta, gamma, vega, theta):
    _f.__doc__ = _f.__doc__.format(params=_PARAMS_DOC)
del _f


def price_and_delta_scalar(
    spot: float,
    strike: float,
    tau: float,
    vol: float,
    rate: float,
    dividend: float,
    is_call: bool,
) -> tuple[float, float]:
    """Price and delta of one option using :mod:`math` only (no numpy).

    Parameters
    ----------
    spot : float
        Underlying price S, > 0.
    strike : float
        Strike K, > 0.
    tau : float
        Time to expiry in years; <= 0 means expired (payoff limit).
    vol : float
        Annual volatility as a decimal; <= 0 means the zero-volatility limit.
    rate : float
        Continuously compounded risk-free rate per year.
    dividend : float
        Continuous dividend yield per year.
    is_call : bool
        True for a call, False for a put.

    Returns
    -------
    price : float
        Option value in currency units of the spot.
    delta : float
        dV/dS.
    """
    w = 1.0 if is_call else -1.0
    if tau <= 0.0:
        intrinsic = w * (spot - strike)
        if intrinsic > 0.0:
            return intrinsic, w
        if intrinsic < 0.0:
            return 0.0, 0.0
        return 0.0, 0.5 * w
    df_r = math.exp(-rate * tau)
    df_q = math.exp(-dividend * tau)
    std = vol * math.sqrt(tau) if vol > 0.0 else 0.0
    if std <= _MIN_STD:
        intrinsic = w * (spot * df_q - strike * df_r)
        if intrinsic > 0.0:
            return intrinsic, w * df_q
        if intrinsic < 0.0:
            return 0.0, 0.0
        return 0.0, 0.5 * w * df_q
    d1 = (math.log(spot / strike) + (rate - dividend) * tau) / std + 0.5 * std
    # N(x) = erfc(-x / sqrt 2) / 2, written out (no helper call: this runs every step of the
    # single-path env). erfc keeps relative accuracy in the lower tail, where 1 + erf(x) would
    # cancel to zero.
    n1 = 0.5 * math.erfc(-(w * d1) * _INV_SQRT2)
    n2 = 0.5 * math.erfc(-(w * (d1 - std)) * _INV_SQRT2)
    dlt = w * df_q * n1
    return spot * dlt - w * strike * df_r * n2, dlt


def gamma_scalar(
    spot: float,
    strike: float,
    tau: float,
    vol: float,
    rate: float,
    dividend: float,
) -> float:
    """Gamma d2V/dS2 of one option (calls and puts alike), :mod:`math` only.

    Parameters
    ----------
    spot : float
        Underlying price S, > 0.
    strike : float
        Strike K, > 0.
    tau : float
        Time to expiry in years; <= 0 gives 0.
    vol : float
        Annual volatility as a decimal; <= 0 gives 0.
    rate : float
        Continuously compounded risk-free rate per year.
    dividend : float
        Continuous dividend yield per year.

    Returns
    -------
    float
        d2V/dS2 per unit of spot.
    """
    if tau <= 0.0 or vol <= 0.0:
        return 0.0
    std = vol * math.sqrt(tau)
    if std <= _MIN_STD:
        return 0.0
    d1 = (math.log(spot / strike) + (rate - dividend) * tau) / std + 0.5 * std
    return math.exp(-dividend * tau - 0.5 * d1 * d1) * _INV_SQRT_2PI / (spot * std)
