"""Tests of attribution.implied_vol: round trips through our BSM kernel and the no-arbitrage bounds.

Reference: the kernel attribution.pricing.bsm_price, itself checked against QuantLib in test_pricing.py.
The no-arbitrage bounds of a European option (common practice, no source):
max(cp (S e^-qT - K e^-rT), 0) < price < S e^-qT (call) or K e^-rT (put).
"""

from __future__ import annotations

import numpy as np
from hypothesis import given, settings
from hypothesis import strategies as st
from numpy.testing import assert_allclose

from attribution.implied_vol import implied_vol
from attribution.pricing import bsm_greeks, bsm_price


def _bounds(spot, strike, tau, rate, div, call) -> tuple[np.ndarray, np.ndarray]:
    """Lower and upper no-arbitrage bounds of a European option's price."""
    sign = np.where(call, 1.0, -1.0)
    forward_part, strike_part = spot * np.exp(-div * tau), strike * np.exp(-rate * tau)
    return np.maximum(sign * (forward_part - strike_part), 0.0), np.where(call, forward_part, strike_part)


def test_round_trip_on_random_options(make_options) -> None:
    """Every price strictly inside the bounds (10,000 options) reprices to 1e-10 x max(1, price); others NaN."""
    o = make_options(10_000, 99)
    s, k, t, v, r, q, c = o.args()
    price = bsm_price(*o.args())
    lower, upper = _bounds(s, k, t, r, q, c)
    inside = (price > lower) & (price < upper)
    assert inside.sum() >= 9_500  # the rest are deep in the money: time value lost in rounding
    result = implied_vol(price, s, k, t, r, q, c)
    assert np.isfinite(result.vol[inside]).all()
    assert (result.reason[inside] == "").all()
    repriced = bsm_price(s[inside], k[inside], t[inside], result.vol[inside], r[inside], q[inside], c[inside])
    assert (np.abs(repriced - price[inside]) <= 1e-10 * np.maximum(1.0, price[inside])).all()
    assert np.isnan(result.vol[~inside]).all()
    assert all(result.reason[~inside])


def test_recovers_the_vol_where_vega_is_material(make_options) -> None:
    """Where vega >= 0.01 S per unit vol, the solved vol equals the vol that made the price to 1e-10 absolute."""
    o = make_options(10_000, 98)
    s, k, t, v, r, q, c = o.args()
    g = bsm_greeks(*o.args())
    material = g.vega >= 0.01 * s
    assert material.sum() >= 8_000
    solved = implied_vol(g.price, s, k, t, r, q, c).vol
    assert_allclose(solved[material], v[material], rtol=0.0, atol=1e-10)


def test_prices_outside_the_bounds_get_nan_and_a_reason() -> None:
    """Below, at the lower bound, at and above the upper bound: NaN vol with a non-empty reason."""
    # r = q = 0, so the bounds are exact in floating point: lower max(cp (S - K), 0), upper S (call) or K (put).
    spot = np.array([120.0, 80.0, 120.0, 80.0, 100.0, 100.0, 80.0, 120.0])
    call = np.array([True, True, False, False, True, False, True, False])
    price = np.array([19.99, 0.0, 0.0, 20.0, 100.0, 100.0, 81.0, 100.5])
    # [ITM call below intrinsic, OTM call at 0, OTM put at 0, ITM put at intrinsic,
    #  call at S, put at K, call above S, put above K]
    result = implied_vol(price, spot, 100.0, 0.5, 0.0, 0.0, call)
    assert np.isnan(result.vol).all()
    assert all(result.reason)
    assert "below" in result.reason[0]
    assert "lower bound" in result.reason[1] and "lower bound" in result.reason[3]
    assert all("upper bound" in text for text in result.reason[4:])


def test_negative_price_and_bounds_with_rates_get_nan() -> None:
    """With rates and dividends: below zero, at and above the bounds give NaN and a reason; inside solves."""
    spot, strike, tau, rate, div = 100.0, 90.0, 1.0, 0.05, 0.03
    lower, upper = _bounds(spot, strike, tau, rate, div, True)
    price = np.array([-0.01, lower[()] * (1 - 1e-9), lower[()], upper[()], upper[()] * 1.001, 15.0])
    result = implied_vol(price, spot, strike, tau, rate, div, True)
    assert np.isnan(result.vol[:5]).all() and all(result.reason[:5])
    assert np.isfinite(result.vol[5]) and result.reason[5] == ""


def test_no_time_to_expiry_gives_nan_with_a_reason() -> None:
    """tau = 0: implied vol is undefined, NaN with a reason naming the missing time."""
    result = implied_vol([5.0, 0.0], 100.0, 100.0, 0.0, 0.03, 0.0, [True, False])
    assert np.isnan(result.vol).all()
    assert all("time" in text for text in result.reason)


def test_invalid_inputs_give_nan_with_a_reason() -> None:
    """NaN price, infinite rate, spot <= 0, strike <= 0 and tau < 0 give NaN and a reason, not an exception."""
    result = implied_vol([np.nan, 5.0, 5.0, 5.0, 5.0], [100.0, 100.0, 0.0, 100.0, 100.0],
                         [100.0, 100.0, 100.0, -1.0, 100.0], [0.5, 0.5, 0.5, 0.5, -0.1],
                         [0.03, np.inf, 0.03, 0.03, 0.03], 0.0, True)
    assert np.isnan(result.vol).all()
    assert all(result.reason)


@settings(max_examples=300, deadline=None)
@given(st.floats(1.0, 1000.0), st.floats(0.3, 3.0), st.integers(1, 5 * 365 + 1), st.floats(0.05, 1.50),
       st.floats(-0.02, 0.10), st.floats(0.0, 0.10), st.booleans())
def test_round_trip_property(spot, moneyness, days, vol, rate, div, call) -> None:
    """For any option in range: solved when strictly inside the bounds and reprices to 1e-10 x max(1, price)."""
    strike, tau = spot / moneyness, days / 365.0
    price = bsm_price(spot, strike, tau, vol, rate, div, call)
    lower, upper = _bounds(spot, strike, tau, rate, div, call)
    result = implied_vol(price, spot, strike, tau, rate, div, call)
    if lower < price[0] < upper:
        assert result.reason[0] == ""
        repriced = bsm_price(spot, strike, tau, result.vol, rate, div, call)
        assert abs(repriced[0] - price[0]) <= 1e-10 * max(1.0, price[0])
    else:
        assert np.isnan(result.vol[0]) and result.reason[0] != ""
