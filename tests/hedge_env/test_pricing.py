"""Tests for hedge_env.pricing (Black-Scholes-Merton with rate and dividend).

Outside references are named beside the checks that use them.
"""

from __future__ import annotations

import math
import warnings

import numpy as np
import pytest

from hedge_env import pricing as bs


def _random_inputs(n: int, seed: int) -> dict:
    """Random inputs over the ranges the environment uses."""
    rng = np.random.default_rng(seed)
    return dict(
        spot=rng.uniform(50.0, 150.0, n),
        strike=rng.uniform(50.0, 150.0, n),
        tau=rng.uniform(0.01, 2.0, n),
        vol=rng.uniform(0.05, 0.8, n),
        rate=rng.uniform(-0.01, 0.08, n),
        dividend=rng.uniform(0.0, 0.05, n),
        is_call=rng.random(n) < 0.5,
    )


def _limit_cases() -> list[tuple]:
    """(spot, strike, tau, vol, rate, dividend) at and around the limits."""
    cases = []
    for tau in (0.0, -0.5):
        for vol in (0.2, 0.0):
            for spot in (90.0, 100.0, 110.0):  # out of, at and in the money
                cases.append((spot, 100.0, tau, vol, 0.05, 0.02))
    for vol in (0.0, -0.1):
        for spot in (90.0, 100.0, 110.0):
            cases.append((spot, 100.0, 0.75, vol, 0.05, 0.02))
        cases.append((100.0, 100.0, 0.75, vol, 0.03, 0.03))  # exactly at the forward
    return cases


@pytest.fixture
def strict_fp():
    """Every numpy floating-point event and every warning becomes an error."""
    with np.errstate(all="raise"), warnings.catch_warnings():
        warnings.simplefilter("error")
        yield


# --------------------------------------------------------------------------
# Textbook value


def test_matches_hull_worked_example_to_the_cent():
    # Hull, Options, Futures and Other Derivatives, worked example:
    # S=42, K=40, r=10%, vol=20%, T=0.5 -> call 4.76, put 0.81.
    call = float(bs.price(42.0, 40.0, 0.5, 0.2, 0.10, 0.0, True))
    put = float(bs.price(42.0, 40.0, 0.5, 0.2, 0.10, 0.0, False))
    assert round(call, 2) == 4.76
    assert round(put, 2) == 0.81
    g = bs.black_scholes(42.0, 40.0, 0.5, 0.2, 0.10, 0.0, np.array([True, False]))
    assert np.round(g.price, 2).tolist() == [4.76, 0.81]


# --------------------------------------------------------------------------
# QuantLib reference


def _quantlib_greeks(spot, strike, days, vol, rate, dividend, is_call):
    """QuantLib AnalyticEuropeanEngine on flat Actual365Fixed curves.

    Returns (tau, price, delta, gamma, vega, theta) with tau taken from
    QuantLib's own day counter so both sides see the same year fraction.
    """
    ql = pytest.importorskip("QuantLib")  # only the checks against QuantLib skip without it
    today = ql.Date(15, ql.January, 2024)
    ql.Settings.instance().evaluationDate = today
    dc = ql.Actual365Fixed()
    expiry = today + int(days)
    process = ql.BlackScholesMertonProcess(
        ql.QuoteHandle(ql.SimpleQuote(spot)),
        ql.YieldTermStructureHandle(ql.FlatForward(today, dividend, dc)),
        ql.YieldTermStructureHandle(ql.FlatForward(today, rate, dc)),
        ql.BlackVolTermStructureHandle(ql.BlackConstantVol(today, ql.NullCalendar(), vol, dc)),
    )
    kind = ql.Option.Call if is_call else ql.Option.Put
    option = ql.VanillaOption(ql.PlainVanillaPayoff(kind, strike), ql.EuropeanExercise(expiry))
    option.setPricingEngine(ql.AnalyticEuropeanEngine(process))
    tau = dc.yearFraction(today, expiry)
    return (tau, option.NPV(), option.delta(), option.gamma(), option.vega(), option.theta(),
            option.thetaPerDay())


@pytest.fixture(scope="module")
def quantlib_table():
    ql = pytest.importorskip("QuantLib")  # only the checks against QuantLib skip without it
    saved = ql.Settings.instance().evaluationDate
    x = _random_inputs(300, seed=20240115)
    # Whole days keep tau = days/365 exact under Actual365Fixed (1 .. 730 days).
    days = np.maximum(np.rint(x["tau"] * 365.0), 1).astype(int)
    rows = [
        _quantlib_greeks(float(s), float(k), int(d), float(v), float(r), float(q), bool(c))
        for s, k, d, v, r, q, c in zip(
            x["spot"], x["strike"], days, x["vol"], x["rate"], x["dividend"], x["is_call"]
        )
    ]
    ql.Settings.instance().evaluationDate = saved
    ref = np.array(rows)
    x["tau"] = ref[:, 0]
    return x, ref


def test_quantlib_theta_is_per_year_calendar_time(quantlib_table):
    # QuantLib OneAssetOption::thetaPerDay() is theta()/365, so theta() is
    # dV/dt per year; ours is compared against theta() below.
    _, ref = quantlib_table
    np.testing.assert_allclose(ref[:, 6], ref[:, 5] / 365.0, rtol=1e-14)


def test_vectorised_greeks_match_quantlib_analytic_european_engine(quantlib_table):
    x, ref = quantlib_table
    g = bs.black_scholes(**x)
    # QuantLib AnalyticEuropeanEngine + BlackScholesMertonProcess (flat
    # curves, Actual365Fixed): NPV, delta, gamma, vega (per 1.00 vol),
    # theta (per year).
    for name, col in (("price", 1), ("delta", 2), ("gamma", 3), ("vega", 4), ("theta", 5)):
        np.testing.assert_allclose(getattr(g, name), ref[:, col], rtol=1e-8, atol=1e-10, err_msg=name)


def test_fast_path_price_and_delta_match_quantlib(quantlib_table):
    x, ref = quantlib_table
    for i in range(len(ref)):
        args = dict(
            strike=float(x["strike"][i]), tau=float(x["tau"][i]), vol=float(x["vol"][i]),
            rate=float(x["rate"][i]), dividend=float(x["dividend"][i]), is_call=bool(x["is_call"][i]),
        )
        # Scalar tau and vol with an array of spots takes the mask-free path.
        p, d = bs.price_and_delta(np.array([x["spot"][i]]), **args)
        # QuantLib AnalyticEuropeanEngine NPV and delta.
        np.testing.assert_allclose(p[0], ref[i, 1], rtol=1e-8, atol=1e-10)
        np.testing.assert_allclose(d[0], ref[i, 2], rtol=1e-8, atol=1e-10)


def test_separate_greek_functions_match_quantlib(quantlib_table):
    x, ref = quantlib_table
    # QuantLib AnalyticEuropeanEngine: the same columns as above.
    for fn, col in ((bs.price, 1), (bs.delta, 2), (bs.gamma, 3), (bs.vega, 4), (bs.theta, 5)):
        np.testing.assert_allclose(fn(**x), ref[:, col], rtol=1e-8, atol=1e-10, err_msg=fn.__name__)


# --------------------------------------------------------------------------
# Identities and numerical laws


def test_put_call_parity_holds_for_price_and_every_greek():
    x = _random_inputs(2000, seed=7)
    x.pop("is_call")
    c = bs.black_scholes(**x, is_call=True)
    p = bs.black_scholes(**x, is_call=False)
    s, k, t, r, q = x["spot"], x["strike"], x["tau"], x["rate"], x["dividend"]
    df_q, df_r = np.exp(-q * t), np.exp(-r * t)
    # Put-call parity (identity): C - P = S e^{-qT} - K e^{-rT}, and its
    # derivatives in S, vol and t.
    np.testing.assert_allclose(c.price - p.price, s * df_q - k * df_r, rtol=0, atol=1e-12)
    np.testing.assert_allclose(c.delta - p.delta, df_q, rtol=0, atol=1e-12)
    np.testing.assert_allclose(c.gamma, p.gamma, rtol=0, atol=1e-12)
    np.testing.assert_allclose(c.vega, p.vega, rtol=0, atol=1e-12)
    np.testing.assert_allclose(c.theta - p.theta, q * s * df_q - r * k * df_r, rtol=0, atol=1e-12)


def test_put_call_parity_holds_on_fast_path():
    rng = np.random.default_rng(8)
    spot = rng.uniform(50.0, 150.0, 4096)
    for tau, vol, r, q in ((0.05, 0.2, 0.0, 0.0), (1.3, 0.6, 0.07, 0.04), (0.01, 0.05, -0.01, 0.0)):
        cp, cd = bs.price_and_delta(spot, 100.0, tau, vol, r, q, True)
        pp, pd = bs.price_and_delta(spot, 100.0, tau, vol, r, q, False)
        # Put-call parity (identity).
        np.testing.assert_allclose(cp - pp, spot * math.exp(-q * tau) - 100.0 * math.exp(-r * tau),
                                   rtol=0, atol=1e-12)
        np.testing.assert_allclose(cd - pd, math.exp(-q * tau), rtol=0, atol=1e-12)


def test_greeks_equal_central_finite_differences_of_price():
    x = _random_inputs(400, seed=11)
    x["tau"] = np.random.default_rng(12).uniform(0.05, 2.0, 400)  # keep tau - h > 0
    g = bs.black_scholes(**x)

    def px(**kw):
        return bs.black_scholes(**{**x, **kw}).price

    s, t, v = x["spot"], x["tau"], x["vol"]
    std = v * np.sqrt(t)  # natural scale of log-spot moves; steps follow it
    # Central differences (numerical law): f'(x) ~ (f(x+h) - f(x-h)) / 2h,
    # f''(x) ~ (f(x+h) - 2 f(x) + f(x-h)) / h^2, truncation error O(h^2).
    hs = 1e-4 * s * std
    np.testing.assert_allclose(g.delta, (px(spot=s + hs) - px(spot=s - hs)) / (2 * hs), rtol=1e-6, atol=1e-8)
    hs = 1e-2 * s * std
    fd_gamma = (px(spot=s + hs) - 2 * g.price + px(spot=s - hs)) / hs**2
    np.testing.assert_allclose(g.gamma, fd_gamma, rtol=1e-4, atol=1e-7)
    hv = 1e-5
    np.testing.assert_allclose(g.vega, (px(vol=v + hv) - px(vol=v - hv)) / (2 * hv), rtol=1e-6, atol=1e-7)
    ht = 1e-6
    # theta is dV/dt = -dV/dtau.
    fd_theta = -(px(tau=t + ht) - px(tau=t - ht)) / (2 * ht)
    np.testing.assert_allclose(g.theta, fd_theta, rtol=1e-5, atol=1e-6)


def test_fast_path_equals_general_path():
    rng = np.random.default_rng(13)
    spot = rng.uniform(50.0, 150.0, 1000)
    strike = rng.uniform(50.0, 150.0, 1000)
    for tau, vol, r, q, call in ((0.05, 0.2, 0.0, 0.0, True), (0.7, 0.35, 0.04, 0.02, False),
                                 (1e-3, 0.1, 0.02, 0.0, True), (2.0, 0.8, -0.01, 0.05, False)):
        g = bs.black_scholes(spot, strike, np.full(1000, tau), vol, r, q, call)  # array tau: general path
        for k in (100.0, strike):  # scalar and array strike on the fast path
            p, d = bs.price_and_delta(spot, k, tau, vol, r, q, call)
            ref = bs.black_scholes(spot, k, np.full(1000, tau), vol, r, q, call) if k is not strike else g
            np.testing.assert_allclose(p, ref.price, rtol=1e-12, atol=1e-12)
            np.testing.assert_allclose(d, ref.delta, rtol=1e-12, atol=1e-12)


# --------------------------------------------------------------------------
# Limits


@pytest.mark.parametrize("tau", [0.0, -0.25])
def test_at_or_past_expiry_price_is_payoff_and_delta_is_step(tau, strict_fp):
    spot = np.array([80.0, 99.999, 100.0, 100.001, 120.0])
    is_call = np.array([[True], [False]])
    g = bs.black_scholes(spot, 100.0, tau, 0.3, 0.05, 0.02, is_call)
    payoff = np.maximum(np.where(is_call, 1.0, -1.0) * (spot - 100.0), 0.0)
    np.testing.assert_array_equal(g.price, payoff)
    np.testing.assert_array_equal(g.delta, [[0, 0, 0.5, 1, 1], [-1, -1, -0.5, 0, 0]])
    for greek in (g.gamma, g.vega, g.theta):
        np.testing.assert_array_equal(greek, np.zeros((2, 5)))
    for call in (True, False):
        p, d = bs.price_and_delta(spot, 100.0, tau, 0.3, 0.05, 0.02, call)
        np.testing.assert_array_equal(p, payoff[0 if call else 1])
        np.testing.assert_array_equal(d, g.delta[0 if call else 1])


@pytest.mark.parametrize("vol", [0.0, -0.1])
def test_zero_vol_gives_discounted_forward_intrinsic(vol, strict_fp):
    tau, r, q, k = 0.75, 0.05, 0.02, 100.0
    df_r, df_q = math.exp(-r * tau), math.exp(-q * tau)
    spot = np.array([80.0, 95.0, 99.0, 105.0, 120.0])  # forward of the strike ~ 97.8
    for call, w in ((True, 1.0), (False, -1.0)):
        g = bs.black_scholes(spot, k, tau, vol, r, q, call)
        intrinsic = np.maximum(w * (spot * df_q - k * df_r), 0.0)
        itm = w * (spot * df_q - k * df_r) > 0
        np.testing.assert_allclose(g.price, intrinsic, rtol=1e-15, atol=1e-13)
        np.testing.assert_allclose(g.delta, np.where(itm, w * df_q, 0.0), rtol=1e-15, atol=0)
        np.testing.assert_array_equal(g.gamma, 0.0)
        np.testing.assert_array_equal(g.vega, 0.0)
        # theta is d/dt of max(w (S e^{-q tau} - K e^{-r tau}), 0) = w (q S e^{-q tau} - r K e^{-r tau}).
        np.testing.assert_allclose(g.theta, np.where(itm, w * (q * spot * df_q - r * k * df_r), 0.0),
                                   rtol=1e-14, atol=1e-14)
        # ... and equals the central difference of the intrinsic value in t (numerical law).
        h = 1e-6
        fd = -(bs.price(spot, k, tau + h, vol, r, q, call) - bs.price(spot, k, tau - h, vol, r, q, call)) / (2 * h)
        np.testing.assert_allclose(g.theta, fd, rtol=1e-7, atol=1e-8)
        p, d = bs.price_and_delta(spot, k, tau, vol, r, q, call)
        np.testing.assert_array_equal(p, g.price)
        np.testing.assert_array_equal(d, g.delta)


def test_zero_vol_exactly_at_forward_gives_half_delta(strict_fp):
    tau, r = 0.75, 0.03
    df = math.exp(-r * tau)
    # With r == q the forward equals the spot, so S == K is exactly at the forward.
    for call, w in ((True, 1.0), (False, -1.0)):
        g = bs.black_scholes(100.0, 100.0, tau, 0.0, r, r, call)
        assert float(g.price) == 0.0
        assert float(g.delta) == pytest.approx(0.5 * w * df, rel=1e-15)
        assert float(g.gamma) == 0.0 and float(g.vega) == 0.0
        assert float(g.theta) == 0.0  # half of w (q S - r K) e^{-r tau} = 0


def test_no_nan_and_no_warnings_at_any_limit(strict_fp):
    spot = np.array([1.0, 50.0, 97.8, 100.0, 100.0 * math.exp(-0.03 * 0.5), 150.0, 1e4])
    tau = np.array([-1.0, 0.0, 1e-300, 1e-12, 0.5, 2.0])[:, None, None]
    vol = np.array([-0.2, 0.0, 1e-300, 1e-8, 0.2, 3.0])[:, None, None, None]
    for call in (True, False, np.array([True, False])[:, None, None, None, None]):
        g = bs.black_scholes(spot, 100.0, tau, vol, 0.03, 0.0, call)
        for name, arr in g._asdict().items():
            assert np.isfinite(arr).all(), name
            assert arr.dtype == np.float64
        p, d = bs.price_and_delta(spot, 100.0, tau, vol, 0.03, 0.0, call)
        assert np.isfinite(p).all() and np.isfinite(d).all()
    for t in (-1.0, 0.0, 1e-300, 1e-12, 0.5):
        for v in (-0.2, 0.0, 1e-300, 1e-8, 0.2):
            for s in (50.0, 100.0, 150.0):
                for call in (True, False):
                    p, d = bs.price_and_delta(s, 100.0, t, v, 0.03, 0.01, call)
                    p2, d2 = bs.price_and_delta_scalar(s, 100.0, t, v, 0.03, 0.01, call)
                    assert all(math.isfinite(z) for z in (float(p), float(d), p2, d2))
                    assert math.isfinite(bs.gamma_scalar(s, 100.0, t, v, 0.03, 0.01))


def test_far_tails_underflow_quietly_to_zero(strict_fp):
    # Near expiry a deep out-of-the-money path lands where ndtr returns
    # subnormals; scaling them underflows, which must not raise.
    spot = 100.0 * np.exp(np.linspace(-0.40, -0.39, 4001))
    p, d = bs.price_and_delta(spot, 100.0, 1 / 365, 0.2, 0.0, 0.0, True)
    assert (p >= 0).all() and (d >= 0).all() and p.max() < 1e-290
    g = bs.black_scholes(spot, 100.0, 1 / 365, 0.2, 0.0, 0.0, True)
    assert (g.gamma >= 0).all() and g.gamma.max() < 1e-280


def test_small_tau_and_small_vol_are_continuous_with_the_limits(strict_fp):
    spot = np.array([90.0, 100.0, 110.0])
    k, r, q = 100.0, 0.05, 0.02
    for call, w in ((True, 1.0), (False, -1.0)):
        payoff = np.maximum(w * (spot - k), 0.0)
        step = np.array([0.0, 0.5 * w, w]) if call else np.array([w, 0.5 * w, 0.0])
        for tau in (1e-6, 1e-10):
            g = bs.black_scholes(spot, k, tau, 0.2, r, q, call)
            # Time value at the money is ~0.4 S vol sqrt(tau); elsewhere ~0.
            assert np.all(np.abs(g.price - payoff) <= spot * 0.2 * math.sqrt(tau))
            # At the money N(d1) - 1/2 ~ 0.4 d1 with d1 ~ ((r - q)/vol + vol/2) sqrt(tau).
            np.testing.assert_allclose(g.delta, step, rtol=0, atol=math.sqrt(tau))
            p, d = bs.price_and_delta(spot, k, tau, 0.2, r, q, call)
            np.testing.assert_allclose(p, g.price, rtol=1e-12, atol=1e-12)
        tau = 0.75
        fwd = np.maximum(w * (spot * math.exp(-q * tau) - k * math.exp(-r * tau)), 0.0)
        for vol in (1e-6, 1e-10):
            g = bs.black_scholes(spot, k, tau, vol, r, q, call)
            np.testing.assert_allclose(g.price, fwd, rtol=0, atol=1e-9)
            lim = bs.black_scholes(spot, k, tau, 0.0, r, q, call)
            np.testing.assert_allclose(g.delta, lim.delta, rtol=0, atol=1e-12)
            np.testing.assert_allclose(g.theta, lim.theta, rtol=0, atol=1e-9)


def test_tau_sequence_converges_to_payoff():
    spot = np.array([95.0, 100.0, 105.0])
    errs = [np.abs(bs.price(spot, 100.0, t, 0.25, 0.03, 0.01, True) - np.maximum(spot - 100.0, 0.0)).max()
            for t in (1e-2, 1e-4, 1e-6, 1e-8, 1e-10, 0.0)]
    assert all(a > b for a, b in zip(errs[:-1], errs[1:]))
    # Time value at the money ~ 0.4 S vol sqrt(tau).
    assert errs[-1] == 0.0 and errs[-2] < 100.0 * 0.25 * math.sqrt(1e-10)


# --------------------------------------------------------------------------
# Scalar (math-only) functions


def test_scalar_functions_equal_vector_functions_on_random_inputs():
    x = _random_inputs(500, seed=21)
    g = bs.black_scholes(**x)
    for i in range(500):
        args = [float(x[key][i]) for key in ("spot", "strike", "tau", "vol", "rate", "dividend")]
        call = bool(x["is_call"][i])
        p, d = bs.price_and_delta_scalar(*args, call)
        assert isinstance(p, float) and isinstance(d, float)
        fp, fd = bs.price_and_delta(*args, call)  # fast path, scalar spot
        for ref_p, ref_d in ((g.price[i], g.delta[i]), (fp, fd)):
            assert p == pytest.approx(float(ref_p), rel=1e-12, abs=1e-12)
            assert d == pytest.approx(float(ref_d), rel=1e-12, abs=1e-12)
        assert bs.gamma_scalar(*args) == pytest.approx(float(g.gamma[i]), rel=1e-12, abs=1e-12)


@pytest.mark.parametrize("case", _limit_cases())
def test_scalar_functions_equal_vector_functions_at_the_limits(case):
    for call in (True, False):
        p, d = bs.price_and_delta_scalar(*case, call)
        g = bs.black_scholes(*case, call)
        assert p == pytest.approx(float(g.price), rel=1e-12, abs=1e-12)
        assert d == pytest.approx(float(g.delta), rel=1e-12, abs=1e-12)
    assert bs.gamma_scalar(*case) == float(bs.black_scholes(*case).gamma) == 0.0


def test_scalar_functions_do_not_use_numpy_types():
    p, d = bs.price_and_delta_scalar(100.0, 100.0, 0.5, 0.2, 0.01, 0.0, True)
    assert type(p) is float and type(d) is float
    assert type(bs.gamma_scalar(100.0, 100.0, 0.5, 0.2, 0.01, 0.0)) is float


# --------------------------------------------------------------------------
# Interface


def test_outputs_are_float64_arrays_broadcast_over_inputs():
    spot = np.array([90.0, 100.0, 110.0], dtype=np.float32)
    is_call = np.array([[True], [False]])
    g = bs.black_scholes(spot, 100.0, 0.5, 0.2, 0.01, 0.0, is_call)
    for arr in g:
        assert isinstance(arr, np.ndarray) and arr.dtype == np.float64 and arr.shape == (2, 3)
    for fn in (bs.price, bs.delta, bs.gamma, bs.vega, bs.theta):
        out = fn(100.0, 100.0, 0.5, 0.2)
        assert isinstance(out, np.ndarray) and out.dtype == np.float64 and out.shape == ()
    p, d = bs.price_and_delta(spot, 100.0, 0.5, 0.2)  # float32 spot on the fast path
    assert p.dtype == np.float64 and d.dtype == np.float64 and p.shape == (3,)
    p, d = bs.price_and_delta(spot, 100.0, 0.5, 0.2, 0.0, 0.0, is_call)  # array flag: general path
    assert p.shape == (2, 3)


def test_fast_path_does_not_modify_its_inputs():
    spot = np.array([90.0, 100.0, 110.0])
    strike = np.array([100.0, 100.0, 100.0])
    bs.price_and_delta(spot, strike, 0.5, 0.2)
    bs.price_and_delta(spot, 100.0, 0.5, 0.2)
    np.testing.assert_array_equal(spot, [90.0, 100.0, 110.0])
    np.testing.assert_array_equal(strike, 100.0)


def test_gamma_at_one_time_and_volatility_is_the_general_functions_over_random_hard_draws():
    # The direct formula (one tau and vol, the step's case, 8x faster) against black_scholes's gamma,
    # itself checked against QuantLib above: spots and strikes 1 to 300, expiries 1e-8 to 5 years,
    # volatilities 1% to 200%, negative rates, at expiry and zero volatility.
    from hedge_env import pricing

    rng = np.random.default_rng(31)
    for _ in range(300):
        spot = rng.uniform(1.0, 300.0, 200)
        strike, tau = float(rng.uniform(1.0, 300.0)), float(rng.choice([0.0, 1e-8, 1 / 365, 0.1, 1.0, 5.0]))
        vol = float(rng.choice([0.0, rng.uniform(0.01, 2.0)]))
        rate, dividend = float(rng.uniform(-0.02, 0.1)), float(rng.uniform(0.0, 0.05))
        np.testing.assert_allclose(pricing.gamma(spot, strike, tau, vol, rate, dividend),
                                   pricing.black_scholes(spot, strike, tau, vol, rate, dividend).gamma,
                                   rtol=1e-11, atol=1e-300)
